"""Real data: Kenneth French's monthly market factors as shipped in ``arch.data.frenchdata``.

Source: Kenneth R. French, Data Library, Fama/French research factors (monthly, 1926-07 to
2018-11 in the copy bundled with arch 8.0), values in percent; loaded with arch's own
``arch.data.frenchdata.load()``. Two asset classes are built from it: equity (the market)
= (Mkt-RF + RF) / 100 and cash = RF / 100, so market − riskless = Mkt-RF / 100.

The checks are identities that must hold on any data, here on 1,109 real months:
(a) a constant 60/40 mix rebalanced monthly against a 60/40 policy has no timing and no
    active return, and its linked total is the compounded mix Π(1 + 0.6 e + 0.4 c) − 1;
(b) a portfolio switching between 100/0 and 20/80 on a fixed rule has timing equal to the
    two-asset identity (W − W̄)(market − riskless) every month (derivation below);
(c) a 60/40 mix reset quarterly and left to drift in between: the engine's drifted weights
    equal a loop, and each quarter's compounded return is the buy-and-hold value.
"""

from __future__ import annotations

import itertools
import math
from typing import Any

import pytest
from arch.data import frenchdata
from tiltaudit_testkit import (
    EFFECTS,
    IDENTITY_ATOL,
    LINKING_METHODS,
    LONG_RECORD_RTOL,
    month_end,
    previous_month_end,
    run,
)

pytestmark = pytest.mark.reference


def _scaled(*magnitudes: float) -> float:
    """IDENTITY_ATOL relative to the size of cumulative values (they reach ~5,000 here)."""
    return IDENTITY_ATOL * max(1.0, *(abs(m) for m in magnitudes))


@pytest.fixture(scope="module")
def market() -> dict[str, Any]:
    data = frenchdata.load()
    # arch parses the yyyymm integers with pandas.to_datetime, i.e. as nanoseconds since
    # 1970; the int64 view gives back 192607, 192608, …
    yyyymm = [int(v) for v in data.index.astype("int64")]
    ends = [month_end(v // 100, v % 100) for v in yyyymm]
    equity = ((data["Mkt-RF"] + data["RF"]) / 100.0).tolist()
    cash = (data["RF"] / 100.0).tolist()
    excess = (data["Mkt-RF"] / 100.0).tolist()
    assert len(ends) == 1109
    assert ends[0] == month_end(1926, 7)
    assert all(previous_month_end(b) == a for a, b in itertools.pairwise(ends))
    return {
        "ends": ends,
        "starts": [previous_month_end(ends[0]), *ends[:-1]],
        "equity": equity,
        "cash": cash,
        "excess": excess,
    }


def _tables(market: dict[str, Any], w: list[float], positions: range | list[int]) -> dict[str, Any]:
    starts, ends = market["starts"], market["ends"]
    return {
        "holdings": [
            {"portfolio_id": "F", "as_of": starts[t], "asset_class": c, "weight": x}
            for t in positions
            for c, x in (("equity", w[t]), ("cash", 1.0 - w[t]))
        ],
        "index_returns": [
            {"period_end": e, "asset_class": c, "return": x}
            for t, e in enumerate(ends)
            for c, x in (("equity", market["equity"][t]), ("cash", market["cash"][t]))
        ],
        "policy": [
            {"portfolio_id": "F", "asset_class": c, "weight": q, "effective_from": starts[0]}
            for c, q in (("equity", 0.6), ("cash", 0.4))
        ],
    }


def _check_reconciles(result: Any) -> None:
    for row in result.series.iter_rows(named=True):
        linked = sum(row[f"cum_{e}"] or 0.0 for e in EFFECTS)
        tol = _scaled(row["cum_portfolio_return"], row["cum_policy_return"])
        assert abs(linked - row["cum_active_return"]) <= tol


@pytest.mark.parametrize("method", LINKING_METHODS)
def test_constant_mix_has_no_timing_and_compounds(market: dict[str, Any], method: str) -> None:
    n = len(market["ends"])
    result = run(_tables(market, [0.6] * n, range(n)), linking=method)
    assert result.exit_code == 0
    assert result.effects["timing"].abs().max() <= IDENTITY_ATOL
    assert result.series["active_return"].abs().max() <= IDENTITY_ATOL
    summary = result.summary.row(0, named=True)
    assert summary["n_periods"] == n
    mix = (
        math.prod(
            1 + 0.6 * e + 0.4 * c for e, c in zip(market["equity"], market["cash"], strict=True)
        )
        - 1
    )
    assert abs(summary["portfolio_return"] - mix) <= LONG_RECORD_RTOL * abs(mix)
    assert abs(summary["active_return"]) <= _scaled(mix)
    assert abs(summary["timing"]) <= _scaled(mix)
    _check_reconciles(result)


def _switching_weights(market: dict[str, Any]) -> list[float]:
    # Invented rule, decided at the start of each month from data known then: all equity
    # after a month the market beat cash, 20 % equity after one it did not.
    excess = market["excess"]
    return [1.0] + [1.0 if excess[t - 1] > 0 else 0.2 for t in range(1, len(excess))]


@pytest.mark.parametrize("static", ["window", "expanding"])
@pytest.mark.parametrize("form", ["bf", "bhb"])
def test_switching_timing_is_the_two_asset_identity(
    market: dict[str, Any], static: str, form: str
) -> None:
    # Two classes, risky weight W_t and cash 1 − W_t, static weights s_eq = W̄_t and
    # s_cash = 1 − W̄_t (W̄ the mean over the record for "window", over the earlier months
    # for "expanding", the first month its own weight). Timing summed over the classes:
    #   BF:  (W − W̄)(b_eq − B) + ((1 − W) − (1 − W̄))(b_cash − B) = (W − W̄)(b_eq − b_cash)
    #   BHB: (W − W̄) b_eq − (W − W̄) b_cash                       = (W − W̄)(b_eq − b_cash)
    # because the deviations sum to zero; b_eq − b_cash = Mkt-RF / 100, the market excess
    # return (DESIGN §3). Likewise static allocation = (W̄ − q)(b_eq − b_cash) with q = 0.6.
    w = _switching_weights(market)
    n = len(w)
    result = run(_tables(market, w, range(n)), static=static, form=form)
    series = result.series.sort("period_end")
    timing, static_alloc = series["timing"].to_list(), series["static_allocation"].to_list()
    for t in range(n):
        w_bar = sum(w) / n if static == "window" else (w[0] if t == 0 else sum(w[:t]) / t)
        excess = market["equity"][t] - market["cash"][t]
        assert abs(excess - market["excess"][t]) <= IDENTITY_ATOL
        assert abs(timing[t] - (w[t] - w_bar) * excess) <= IDENTITY_ATOL
        assert abs(static_alloc[t] - (w_bar - 0.6) * excess) <= IDENTITY_ATOL
    summary = result.summary.row(0, named=True)
    held = (
        math.prod(1 + w[t] * market["equity"][t] + (1 - w[t]) * market["cash"][t] for t in range(n))
        - 1
    )
    assert abs(summary["portfolio_return"] - held) <= LONG_RECORD_RTOL * abs(held)
    _check_reconciles(result)


@pytest.mark.parametrize("method", LINKING_METHODS)
def test_switching_portfolio_reconciles_with_every_method(
    market: dict[str, Any], method: str
) -> None:
    w = _switching_weights(market)
    result = run(_tables(market, w, range(len(w))), linking=method)
    _check_reconciles(result)
    summary = result.summary.row(0, named=True)
    parts = sum(summary[e] or 0.0 for e in EFFECTS)
    assert abs(parts - summary["active_return"]) <= _scaled(summary["portfolio_return"])


def test_quarterly_drifter_matches_a_loop_and_buy_and_hold(market: dict[str, Any]) -> None:
    n = len(market["ends"])
    positions = list(range(0, n, 3))
    result = run(_tables(market, [0.6] * n, positions))
    assert result.exit_code == 0
    eq, ca = market["equity"], market["cash"]
    cells = result.effects.filter(result.effects["asset_class"] == "equity").sort("period_end")
    got, drifted = cells["weight"].to_list(), cells["is_drifted"].to_list()
    assert len(got) == n
    w = 0.6
    for t in range(n):
        if t % 3 == 0:
            w = 0.6
        else:  # buy-and-hold: w_t = w_{t−1}(1 + e_{t−1}) / (1 + R_{t−1})
            big_r = w * eq[t - 1] + (1 - w) * ca[t - 1]
            w = w * (1 + eq[t - 1]) / (1 + big_r)
        assert abs(got[t] - w) <= IDENTITY_ATOL
        assert drifted[t] == (t % 3 != 0)
    # Each quarter compounds to the value of 0.6 in equity and 0.4 in cash left alone.
    computed = result.series.sort("period_end")["computed_return"].to_list()
    for q0 in positions:
        span = range(q0, min(q0 + 3, n))
        grown = math.prod(1 + computed[t] for t in span)
        held = 0.6 * math.prod(1 + eq[t] for t in span) + 0.4 * math.prod(1 + ca[t] for t in span)
        assert abs(grown - held) <= IDENTITY_ATOL
