"""The published two-period linking example (METHODS §10 B1), through the engine.

Inputs and cumulative totals: Frongello (2004) conference slides [S, as quoted in METHODS
§10 B1]: R_t = (0.21, 0.14), B_t = (0.11, 0.09), allocation (0.06, 0.02), selection
(0.04, 0.03); R = 0.3794, B = 0.2099, R − B = 0.1695, naive sums 0.08 / 0.07.
Linked values and intermediate coefficients: [C] in METHODS §10 B1 (computed there from the
published inputs with the formulas of METHODS §2), printed at 6 decimals for Cariño and
Menchero and at 4 for GRAP and Frongello; matched here at the printed precision.
"""

from __future__ import annotations

import datetime as dt

import polars as pl
import pytest
from tiltaudit_testkit import (
    IDENTITY_ATOL,
    LINKING_METHODS,
    carino_coefficient,
    frongello_pieces,
    grap_factors,
    menchero_coefficients,
    printed_tolerance,
    run,
)

from attribution.linking import link_cumulative

pytestmark = pytest.mark.reference

PORT = (0.21, 0.14)
POL = (0.11, 0.09)
ALLOCATION = (0.06, 0.02)
SELECTION = (0.04, 0.03)

# (allocation, selection) linked, with the decimals METHODS §10 B1 prints them at [C].
LINKED = {
    "carino": ((0.090103, 0.079397), 6),
    "menchero": ((0.090371, 0.079129), 6),
    "grap": ((0.0896, 0.0799), 4),
    "frongello": ((0.0896, 0.0799), 4),
}


def _b1_frame() -> pl.DataFrame:
    return pl.DataFrame(
        {
            "portfolio_id": ["B1", "B1"],
            "period_index": [0, 1],
            "portfolio_return": list(PORT),
            "policy_return": list(POL),
            "allocation": list(ALLOCATION),
            "selection": list(SELECTION),
        }
    )


def _b1_roster() -> dict[str, list[dict[str, object]]]:
    """A two-class roster whose BF effects are exactly the B1 inputs.

    Policy 50/50, the portfolio fully in class A every month (so the window static weight
    equals the weight and timing is 0). BF allocation = 0.5 (b_A − b_B) and
    B_t = 0.5 (b_A + b_B) give b_A, b_B; selection = r_A − b_A gives r_A = R_t.
    Invented construction, here only to carry the published numbers into the engine.
    """
    ends = [dt.date(2024, 1, 31), dt.date(2024, 2, 29)]
    starts = [dt.date(2023, 12, 31), ends[0]]
    rows: dict[str, list[dict[str, object]]] = {
        "holdings": [],
        "index_returns": [],
        "policy": [],
        "segment_returns": [],
    }
    for t in range(2):
        b_a = POL[t] + ALLOCATION[t]  # b_A − B_t = a_t and b_B − B_t = −a_t
        b_b = POL[t] - ALLOCATION[t]
        r_a = b_a + SELECTION[t]
        for cls, weight, index, segment in (("A", 1.0, b_a, r_a), ("B", 0.0, b_b, b_b)):
            rows["holdings"].append(
                {"portfolio_id": "B1", "as_of": starts[t], "asset_class": cls, "weight": weight}
            )
            rows["index_returns"].append(
                {"period_end": ends[t], "asset_class": cls, "return": index}
            )
            rows["segment_returns"].append(
                {"portfolio_id": "B1", "period_end": ends[t], "asset_class": cls, "return": segment}
            )
    for cls in ("A", "B"):
        rows["policy"].append(
            {"portfolio_id": "B1", "asset_class": cls, "weight": 0.5, "effective_from": starts[0]}
        )
    return rows


@pytest.mark.parametrize("method", LINKING_METHODS)
def test_b1_linked_effects_match_the_printed_values(method: str) -> None:
    linked = link_cumulative(_b1_frame(), method=method, effects=["allocation", "selection"])
    last = linked.row(-1, named=True)
    (alloc, sel), decimals = LINKED[method]
    tol = printed_tolerance(decimals)
    assert abs(last["cum_allocation"] - alloc) <= tol
    assert abs(last["cum_selection"] - sel) <= tol


@pytest.mark.parametrize("method", LINKING_METHODS)
def test_b1_reconciles_to_the_cumulative_active_return(method: str) -> None:
    linked = link_cumulative(_b1_frame(), method=method, effects=["allocation", "selection"])
    last = linked.row(-1, named=True)
    # Cumulative R = 0.3794, B = 0.2099, R − B = 0.1695 [S: Frongello 2004 slides].
    assert abs(last["cum_portfolio_return"] - 0.3794) <= printed_tolerance(4)
    assert abs(last["cum_policy_return"] - 0.2099) <= printed_tolerance(4)
    assert abs(last["cum_active_return"] - 0.1695) <= printed_tolerance(4)
    total = last["cum_allocation"] + last["cum_selection"]
    assert abs(total - last["cum_active_return"]) <= IDENTITY_ATOL
    # The naive sums 0.08 + 0.07 = 0.15 do not reconcile [S: Frongello 2004 slides].
    assert abs(sum(ALLOCATION) + sum(SELECTION) - last["cum_active_return"]) > 0.01


@pytest.mark.parametrize("method", LINKING_METHODS)
def test_b1_through_the_whole_engine(method: str) -> None:
    result = run(_b1_roster(), linking=method)
    assert result.exit_code == 0
    summary = result.summary.row(0, named=True)
    (alloc, sel), decimals = LINKED[method]
    tol = printed_tolerance(decimals)
    assert abs(summary["timing"]) <= IDENTITY_ATOL
    assert abs(summary["static_allocation"] - alloc) <= tol
    assert abs(summary["selection"] - sel) <= tol
    assert abs(summary["active_return"] - 0.1695) <= printed_tolerance(4)


def test_b1_intermediate_coefficients_of_the_loop_reference() -> None:
    # METHODS §10 B1 [C]: Cariño k = 0.773516, k_t = (0.862603, 0.897011); Menchero
    # M = 1.137217, α_t = (−0.008660, −0.004330); GRAP factors (1.09, 1.21); Frongello per
    # period P1 (0.06, 0.04), P2 (0.0296, 0.0399). Checks the tests' own loop version
    # (tiltaudit_testkit) against the published example before it is used as a reference.
    tol6, tol4 = printed_tolerance(6), printed_tolerance(4)
    assert abs(carino_coefficient(0.3794, 0.2099) - 0.773516) <= tol6
    k_t = [carino_coefficient(r, b) for r, b in zip(PORT, POL, strict=True)]
    assert abs(k_t[0] - 0.862603) <= tol6
    assert abs(k_t[1] - 0.897011) <= tol6
    m, alpha = menchero_coefficients(PORT, POL)
    assert abs(m - 1.137217) <= tol6
    assert abs(alpha[0] - -0.008660) <= tol6
    assert abs(alpha[1] - -0.004330) <= tol6
    factors = grap_factors(PORT, POL)
    assert abs(factors[0] - 1.09) <= printed_tolerance(2)
    assert abs(factors[1] - 1.21) <= printed_tolerance(2)
    alloc_pieces = frongello_pieces(PORT, POL, ALLOCATION)
    sel_pieces = frongello_pieces(PORT, POL, SELECTION)
    assert abs(alloc_pieces[0] - 0.06) <= tol4
    assert abs(sel_pieces[0] - 0.04) <= tol4
    assert abs(alloc_pieces[1] - 0.0296) <= tol4
    assert abs(sel_pieces[1] - 0.0399) <= tol4
