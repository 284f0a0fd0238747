"""Linking: the engine's vectorised ``link_cumulative`` against plain-loop versions.

Formulas: METHODS §2 (Cariño 1999; Menchero 2000; GRAP 1997 / Bonafede, Foresti & Matheos
2002; Frongello 2002, written in ``tiltaudit_testkit`` as the recursion itself). Every
cumulative column is the prefix of the record linked on its own, so each prefix is checked.
The records are invented (seeded ``default_rng``); the published example is in
``tests/reference/test_linking_examples.py``.
"""

from __future__ import annotations

import math

import numpy as np
import polars as pl
import pytest
from tiltaudit_testkit import (
    IDENTITY_ATOL,
    LINKING_METHODS,
    link_loops,
    run,
    single_period_roster,
)

from attribution.linking import link_cumulative

EFFECT_NAMES = ("e1", "e2", "e3")


def _record(rng: np.random.Generator, n: int, pid: str = "p") -> pl.DataFrame:
    """R_t, B_t and three effects that add up to R_t − B_t in every period."""
    port = rng.normal(0.006, 0.04, n)
    pol = port - rng.normal(0.0, 0.01, n)
    split = rng.dirichlet([1.0, 1.0, 1.0], n) * 1.5 - 0.25  # rows sum to 1, some < 0
    active = port - pol
    cols = {name: split[:, j] * active for j, name in enumerate(EFFECT_NAMES)}
    cols["e3"] = active - cols["e1"] - cols["e2"]
    return pl.DataFrame(
        {
            "portfolio_id": [pid] * n,
            "period_index": list(range(n)),
            "portfolio_return": port,
            "policy_return": pol,
            **cols,
        }
    )


def _check_against_loops(frame: pl.DataFrame, method: str, atol: float) -> None:
    linked = link_cumulative(frame, method=method, effects=list(EFFECT_NAMES))
    rows = linked.to_dicts()
    for tau in range(1, len(rows) + 1):
        prefix = rows[:tau]
        expected = link_loops(
            method,
            [r["portfolio_return"] for r in prefix],
            [r["policy_return"] for r in prefix],
            {e: [r[e] for r in prefix] for e in EFFECT_NAMES},
        )
        last = rows[tau - 1]
        for e in EFFECT_NAMES:
            got = last[f"cum_{e}"]
            assert math.isfinite(got)
            assert abs(got - expected[e]) <= atol, (method, tau, e, got, expected[e])
        total = sum(last[f"cum_{e}"] for e in EFFECT_NAMES)
        assert abs(total - last["cum_active_return"]) <= atol


@pytest.mark.parametrize("method", LINKING_METHODS)
@pytest.mark.parametrize("n", [1, 2, 3, 12, 61])
def test_engine_matches_loops_on_every_prefix(method: str, n: int) -> None:
    rng = np.random.default_rng(1000 + n)
    _check_against_loops(_record(rng, n), method, IDENTITY_ATOL)


@pytest.mark.parametrize("method", LINKING_METHODS)
def test_groups_are_linked_independently(method: str) -> None:
    rng = np.random.default_rng(7)
    one, two = _record(rng, 9, "a"), _record(rng, 14, "b")
    together = link_cumulative(
        pl.concat([two, one]).sample(fraction=1.0, shuffle=True, seed=3),
        method=method,
        effects=list(EFFECT_NAMES),
    )
    for part in (one, two):
        alone = link_cumulative(part, method=method, effects=list(EFFECT_NAMES))
        pid = part["portfolio_id"][0]
        mixed = together.filter(pl.col("portfolio_id") == pid).sort("period_index")
        for e in EFFECT_NAMES:
            diff = (mixed[f"cum_{e}"] - alone[f"cum_{e}"]).abs().max()
            assert diff <= IDENTITY_ATOL


def test_grap_and_frongello_totals_are_identical() -> None:
    # Unrolling Frongello's recursion gives the GRAP weights (METHODS §2.4, [C]).
    rng = np.random.default_rng(11)
    frame = _record(rng, 24)
    grap = link_cumulative(frame, method="grap", effects=list(EFFECT_NAMES))
    frongello = link_cumulative(frame, method="frongello", effects=list(EFFECT_NAMES))
    for e in EFFECT_NAMES:
        assert (grap[f"cum_{e}"] - frongello[f"cum_{e}"]).abs().max() <= IDENTITY_ATOL


def test_carino_ignores_period_order_and_grap_does_not() -> None:
    # Cariño's total Σ_t (k_t/k) e_t does not depend on the order of periods; GRAP scales an
    # early effect by later benchmark returns, so reversing the record changes it
    # (METHODS §2.5, [M]).
    rng = np.random.default_rng(5)
    frame = _record(rng, 18)
    reverse = frame.with_columns(period_index=17 - pl.col("period_index"))
    for method, same in (("carino", True), ("grap", False)):
        a = link_cumulative(frame, method=method, effects=list(EFFECT_NAMES)).row(-1, named=True)
        b = link_cumulative(reverse, method=method, effects=list(EFFECT_NAMES)).row(-1, named=True)
        gap = max(abs(a[f"cum_{e}"] - b[f"cum_{e}"]) for e in EFFECT_NAMES)
        assert (gap <= IDENTITY_ATOL) if same else (gap > 1e-6)


def _edge_frame(port: list[float], pol: list[float], share: float = 0.3) -> pl.DataFrame:
    active = [r - b for r, b in zip(port, pol, strict=True)]
    return pl.DataFrame(
        {
            "portfolio_id": ["p"] * len(port),
            "period_index": list(range(len(port))),
            "portfolio_return": port,
            "policy_return": pol,
            "e1": [share * a + 0.004 for a in active],  # offsetting effects where active = 0
            "e2": [(1 - share) * a - 0.004 for a in active],
            "e3": [0.0] * len(port),
        }
    )


EDGE_CASES = {
    # R_t = B_t every period: Cariño k_t = 1/(1+R_t), k = 1/(1+R); Menchero Σd² = 0.
    "all_equal": ([0.02, -0.01, 0.03], [0.02, -0.01, 0.03]),
    # R_t = B_t in some periods only.
    "some_equal": ([0.02, -0.01, 0.03, 0.01], [0.02, -0.015, 0.03, 0.0]),
    # Differences at the rounding level (the log-ratio's series branch).
    "nearly_equal": ([0.02, -0.01 + 1e-15, 0.03], [0.02, -0.01, 0.03 - 2e-14]),
    # Cumulative R = B exactly while the periods differ: 1.1 × 0.9 = 0.9 × 1.1.
    "equal_overall": ([0.1, -0.1], [-0.1, 0.1]),
    # A zero return and a one-period record.
    "zero_returns": ([0.0], [0.0]),
}


@pytest.mark.parametrize("method", LINKING_METHODS)
@pytest.mark.parametrize("case", list(EDGE_CASES))
def test_near_zero_active_returns_stay_finite_and_reconcile(method: str, case: str) -> None:
    port, pol = EDGE_CASES[case]
    frame = _edge_frame(port, pol)
    linked = link_cumulative(frame, method=method, effects=list(EFFECT_NAMES))
    for row in linked.iter_rows(named=True):
        values = [row[f"cum_{e}"] for e in EFFECT_NAMES]
        assert all(math.isfinite(v) for v in values)
        assert abs(sum(values) - row["cum_active_return"]) <= IDENTITY_ATOL
    if method == "menchero" and case == "nearly_equal":
        # Menchero's α_t = c·d_t with c = (R − B − M Σd)/Σd², a ratio of two quantities of
        # order d² ≈ 1e-28 here: any float evaluation is dominated by rounding, so the split
        # between effects (not their total) cannot be compared to 1e-12 at this scale.
        return
    # The loop versions use the closed-form limits (METHODS §2.1-2.2) at exact equality.
    _check_against_loops(frame, method, IDENTITY_ATOL)


@pytest.mark.parametrize("method", ["carino", "grap", "frongello"])
def test_linking_is_continuous_where_active_return_vanishes(method: str) -> None:
    # Common practice, no source: the linked value at R_t = B_t + ε tends to the value at
    # R_t = B_t as ε → 0 (Cariño's limit 1/(1+B) is the continuous extension of k; GRAP
    # and Frongello are polynomial in the returns). Menchero is not continuous there: see
    # test_menchero_single_period_difference.
    base = ([0.02, -0.01, 0.03], [0.02, -0.01, 0.03])
    exact = link_cumulative(_edge_frame(*base), method=method, effects=list(EFFECT_NAMES))
    for eps in (1e-13, 1e-10):
        port = [base[0][0], base[0][1] + eps, base[0][2]]
        near = link_cumulative(
            _edge_frame(port, base[1]), method=method, effects=list(EFFECT_NAMES)
        )
        gap = max(abs(near[f"cum_{e}"][-1] - exact[f"cum_{e}"][-1]) for e in EFFECT_NAMES)
        assert gap <= 100 * eps


@pytest.mark.parametrize("eps", [1e-4, 1e-6, 1e-8])
def test_menchero_single_period_difference(eps: float) -> None:
    # Derived here from METHODS §2.2: when only period k has R_k ≠ B_k (d_k = ε), then
    # R − B = ε G with G = Π_{s≠k}(1+R_s), Σd = ε, Σd² = ε², so α_k = (εG − Mε)/ε² · ε = G − M
    # for every ε ≠ 0 and E_j = M Σ_t e_{j,t} + (G − M) e_{j,k}. At ε = 0 the convention
    # α = 0 applies instead, so Menchero's linked effects jump at zero active return (by
    # (G − M) e_{j,k}) even in exact arithmetic.
    port, pol = [0.02, -0.01 + eps, 0.03], [0.02, -0.01, 0.03]
    frame = _edge_frame(port, pol)
    linked = link_cumulative(frame, method="menchero", effects=list(EFFECT_NAMES)).row(
        -1, named=True
    )
    n = 3
    big_r = math.prod(1 + x for x in port) - 1
    big_b = math.prod(1 + x for x in pol) - 1
    m = (big_r - big_b) / n / ((1 + big_r) ** (1 / n) - (1 + big_b) ** (1 / n))
    g = (1 + port[0]) * (1 + port[2])
    # The float evaluation of c is conditioned like 1/ε (see above): tolerance scaled so.
    atol = IDENTITY_ATOL + 1e-15 / eps
    for e in ("e1", "e2"):
        values = frame[e].to_list()
        expected = m * sum(values) + (g - m) * values[1]
        assert abs(linked[f"cum_{e}"] - expected) <= atol
    # The jump: the other terms move by O(ε) between ε and 0.
    exact_zero = link_cumulative(_edge_frame(pol, pol), method="menchero", effects=["e1"])
    jump = linked["cum_e1"] - exact_zero["cum_e1"][-1]
    assert abs(jump - (g - m) * frame["e1"][1]) <= 10 * eps
    assert abs(jump) > 1e-5


def test_null_effect_columns_stay_null_and_partial_nulls_count_as_zero() -> None:
    frame = _edge_frame([0.02, 0.01, -0.02], [0.01, 0.015, -0.01]).with_columns(
        e3=pl.lit(None, dtype=pl.Float64),
        e2=pl.when(pl.col("period_index") == 1).then(None).otherwise(pl.col("e2")),
    )
    linked = link_cumulative(frame, method="carino", effects=list(EFFECT_NAMES))
    assert linked["cum_e3"].null_count() == linked.height
    assert linked["cum_e2"].null_count() == 1  # null where the period's own effect is null
    filled = frame.with_columns(pl.col("e2").fill_null(0.0))
    reference = link_cumulative(filled, method="carino", effects=["e2"])
    assert abs(linked["cum_e2"][-1] - reference["cum_e2"][-1]) <= IDENTITY_ATOL


@pytest.mark.parametrize("method", ["carino", "menchero"])
def test_period_return_at_or_below_minus_100_is_not_a_silent_nan(method: str) -> None:
    # Negative weights are allowed (DESIGN §2), so a computed return can be ≤ −100 %
    # (200 % in a class that loses 60 %, financed by −100 % cash): ln(1 + R_t) is undefined.
    # DESIGN §1: bad data is reported plainly, never turned into a quiet wrong number.
    tables = single_period_roster(
        weights=[2.0, -1.0], policy=[0.6, 0.4], index=[-0.6, 0.01], segments=None
    )
    result = run(tables, linking=method)
    summary_numbers = (
        result.summary.select(pl.selectors.float()).row(0) if result.summary.height else ()
    )
    assert not any(isinstance(v, float) and math.isnan(v) for v in summary_numbers)
    assert result.data_issues.filter(pl.col("portfolio_id") == "P").height > 0
