"""The calendar, the evaluation window, policy timing and buy-and-hold drift (DESIGN §2).

Invented numbers throughout (seeded ``default_rng``). The drift is checked two ways: against
a step-by-step loop w_{t+1} = w_t (1 + r_t) / (1 + R_t), and against the value of a
buy-and-hold position, Π_t (1 + R_t) = Σ_i w_{i,0} Π_t (1 + r_{i,t}) over each holding
interval (common practice, no source: the definition of buy-and-hold).
"""

from __future__ import annotations

import datetime as dt
import math
from typing import Any

import numpy as np
import polars as pl
import pytest
from tiltaudit_testkit import (
    IDENTITY_ATOL,
    month_ends,
    previous_month_end,
    run,
    single_period_roster,
)

from attribution.calendar import build_calendar

# --- the calendar --------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("ends", "frequency", "per_year", "first_start"),
    [
        # Common practice, no source: month ends -> monthly, 12 a year; the first period
        # starts at the previous month end (DESIGN §2), across a leap-year February.
        (month_ends(2024, 3, 5), "month", 12, dt.date(2024, 2, 29)),
        (month_ends(2019, 12, 3), "month", 12, dt.date(2019, 11, 30)),
        # Quarter ends -> quarterly, 4 a year, the first period starts a quarter earlier.
        (month_ends(2020, 3, 12)[::3], "quarter", 4, dt.date(2019, 12, 31)),
        # A single date is read as one month (engine convention, DESIGN §2 silent).
        ([dt.date(2024, 1, 31)], "month", 12, dt.date(2023, 12, 31)),
    ],
)
def test_calendar_inference(
    ends: list[dt.date], frequency: str, per_year: int, first_start: dt.date
) -> None:
    calendar = build_calendar(pl.Series(ends, dtype=pl.Date))
    assert calendar.frequency == frequency
    assert calendar.periods_per_year == per_year
    assert calendar.first_start == first_start
    assert list(calendar.period_ends) == sorted(ends)
    frame = calendar.frame()
    assert frame["period_start"].to_list() == [first_start, *sorted(ends)[:-1]]


# --- a small two-class world ---------------------------------------------------------------------


def _world(
    rng: np.random.Generator, n: int, holding_positions: list[int], *, segments: bool = True
) -> dict[str, Any]:
    ends = month_ends(2022, 1, n)
    starts = [previous_month_end(ends[0]), *ends[:-1]]
    classes = ("growth", "defensive", "cash")
    index = {
        c: rng.normal(mu, sd, n)
        for c, mu, sd in zip(classes, (0.008, 0.003, 0.001), (0.05, 0.02, 0.001), strict=True)
    }
    seg = {c: index[c] + rng.normal(0.0, 0.003, n) for c in classes}
    holdings = []
    weights_at: dict[int, dict[str, float]] = {}
    for t in holding_positions:
        raw = rng.uniform(0.1, 1.0, len(classes))
        w = dict(zip(classes, (raw / raw.sum()).tolist(), strict=True))
        weights_at[t] = w
        holdings += [
            {"portfolio_id": "D", "as_of": starts[t], "asset_class": c, "weight": x}
            for c, x in w.items()
        ]
    return {
        "ends": ends,
        "starts": starts,
        "classes": classes,
        "index": index,
        "segment": seg,
        "weights_at": weights_at,
        "tables": {
            "holdings": holdings,
            "index_returns": [
                {"period_end": e, "asset_class": c, "return": float(index[c][t])}
                for t, e in enumerate(ends)
                for c in classes
            ],
            "policy": [
                {"portfolio_id": "D", "asset_class": c, "weight": q, "effective_from": starts[0]}
                for c, q in zip(classes, (0.5, 0.4, 0.1), strict=True)
            ],
            "segment_returns": [
                {"portfolio_id": "D", "period_end": e, "asset_class": c, "return": float(seg[c][t])}
                for t, e in enumerate(ends)
                for c in classes
            ]
            if segments
            else None,
        },
    }


@pytest.mark.parametrize("segments", [True, False])
def test_quarterly_holdings_drift_buy_and_hold(segments: bool) -> None:
    world = _world(np.random.default_rng(42), 12, [0, 3, 6, 9], segments=segments)
    result = run(world["tables"])
    assert result.exit_code == 0
    returns = world["segment"] if segments else world["index"]
    effects = result.effects.sort("period_end", "asset_class")
    got = {(r["period_end"], r["asset_class"]): r for r in effects.iter_rows(named=True)}
    w: dict[str, float] = {}
    for t, end in enumerate(world["ends"]):
        if t in world["weights_at"]:
            w = dict(world["weights_at"][t])
        else:  # w_t = w_{t-1} (1 + r_{t-1}) / (1 + R_{t-1})
            prev = t - 1
            big_r = sum(w[c] * returns[c][prev] for c in world["classes"])
            w = {c: w[c] * (1 + returns[c][prev]) / (1 + big_r) for c in world["classes"]}
        for c in world["classes"]:
            cell = got[(end, c)]
            assert abs(cell["weight"] - w[c]) <= IDENTITY_ATOL
            assert cell["is_drifted"] == (t not in world["weights_at"])
    # Buy-and-hold value over each quarter: Π (1 + R_t) = Σ_i w_i0 Π (1 + r_i,t).
    series = result.series.sort("period_end")["computed_return"].to_list()
    for q0 in (0, 3, 6, 9):
        grown = math.prod(1 + r for r in series[q0 : q0 + 3])
        held = sum(
            w0 * math.prod(1 + returns[c][t] for t in range(q0, q0 + 3))
            for c, w0 in world["weights_at"][q0].items()
        )
        assert abs(grown - held) <= IDENTITY_ATOL
    assert result.summary["n_drifted_periods"].item() == 8


def test_skipped_holdings_date_drifts_through_the_gap_with_a_warning() -> None:
    world = _world(np.random.default_rng(7), 9, [0, 1, 2, 5, 6, 7, 8])
    result = run(world["tables"])
    assert result.exit_code == 0  # a warning, not an error (DESIGN §2)
    issues = result.data_issues
    assert issues["code"].to_list() == ["holdings_gap"]
    assert issues["severity"].to_list() == ["warning"]
    drifted = result.series.sort("period_end")["is_drifted"].to_list()
    assert drifted == [False, False, False, True, True, False, False, False, False]


def test_evaluation_window_follows_the_holdings() -> None:
    # Engine convention (README): the record starts with the period beginning at the first
    # holdings date; the last holdings date covers the usual spacing (3 for quarterly
    # holdings), cut at the calendar's end.
    world = _world(np.random.default_rng(1), 14, [2, 5, 8])
    result = run(world["tables"])
    summary = result.summary.row(0, named=True)
    assert summary["first_period"] == world["ends"][2]
    assert summary["last_period"] == world["ends"][10]
    assert summary["n_periods"] == 9
    world = _world(np.random.default_rng(1), 10, [2, 5, 8])
    assert run(world["tables"]).summary["last_period"].item() == world["ends"][9]


def test_missing_class_on_a_date_has_weight_zero() -> None:
    # DESIGN §2: a class missing from a portfolio's holdings on a date has weight 0 that
    # period, and the static (mean) weight counts that 0.
    world = _world(np.random.default_rng(3), 3, [0, 1, 2])
    tables = world["tables"]
    dropped = [
        r
        for r in tables["holdings"]
        if not (r["as_of"] == world["starts"][1] and r["asset_class"] == "cash")
    ]
    moved = world["weights_at"][1]["cash"]
    for r in dropped:
        if r["as_of"] == world["starts"][1] and r["asset_class"] == "growth":
            r["weight"] += moved
    result = run({**tables, "holdings": dropped})
    cash = result.effects.filter(pl.col("asset_class") == "cash").sort("period_end")
    assert cash["weight"][1] == 0.0
    expected_static = (world["weights_at"][0]["cash"] + 0.0 + world["weights_at"][2]["cash"]) / 3
    assert abs(cash["static_weight"][0] - expected_static) <= IDENTITY_ATOL


@pytest.mark.parametrize("shift_days", [0, -10])
def test_policy_set_applies_from_the_first_period_starting_on_or_after_it(shift_days: int) -> None:
    # DESIGN §2: a row set applies to every period that starts on or after effective_from.
    world = _world(np.random.default_rng(5), 4, [0, 1, 2, 3])
    switch = world["starts"][2] + dt.timedelta(days=shift_days)
    new_policy = [
        {"portfolio_id": "D", "asset_class": c, "weight": q, "effective_from": switch}
        for c, q in zip(world["classes"], (0.2, 0.2, 0.6), strict=True)
    ]
    result = run({**world["tables"], "policy": world["tables"]["policy"] + new_policy})
    cash_policy = (
        result.effects.filter(pl.col("asset_class") == "cash")
        .sort("period_end")["policy_weight"]
        .to_list()
    )
    # On a period start, or mid-month (−10 days): either way the third period is the first
    # that starts on or after the switch.
    expected = [0.1, 0.1, 0.6, 0.6]
    assert all(abs(a - b) <= IDENTITY_ATOL for a, b in zip(cash_policy, expected, strict=True))


def _business_day(day: dt.date) -> dt.date:
    while day.weekday() >= 5:
        day -= dt.timedelta(days=1)
    return day


def test_align_month_maps_business_days_to_month_ends() -> None:
    # DESIGN §2: --align month maps every date of every table to its calendar month end.
    world = _world(np.random.default_rng(9), 8, list(range(8)))
    tables = world["tables"]
    moved = {}
    for name, rows in tables.items():
        col = {"holdings": "as_of", "policy": "effective_from"}.get(name, "period_end")
        moved[name] = [{**r, col: _business_day(r[col])} for r in rows]
    assert moved["holdings"] != tables["holdings"]  # some month ends fall on weekends
    base = run(tables)
    aligned = run(moved, align="month")
    for table in ("effects", "series", "summary"):
        left, right = getattr(base, table), getattr(aligned, table)
        assert left.columns == right.columns
        for col in left.columns:
            if left.schema[col] == pl.Float64:
                diff = (left[col] - right[col]).abs().max()
                assert diff is None or diff <= IDENTITY_ATOL
            else:
                assert left[col].to_list() == right[col].to_list()


def test_portfolio_with_nothing_to_evaluate_is_reported() -> None:
    # DESIGN §1-2: bad data is reported plainly; a portfolio is either evaluated, or
    # skipped/flagged with a data_issues row. Weights as of the last period_end start no
    # period of the calendar, so there is nothing to evaluate for Q.
    tables = single_period_roster(
        weights=[0.5, 0.5], policy=[0.6, 0.4], index=[0.01, 0.02], segments=None
    )
    end = dt.date(2024, 1, 31)
    tables["holdings"] += [{"portfolio_id": "Q", "as_of": end, "asset_class": "c0", "weight": 1.0}]
    tables["policy"] += [
        {
            "portfolio_id": "Q",
            "asset_class": "c0",
            "weight": 1.0,
            "effective_from": previous_month_end(end),
        }
    ]
    result = run(tables)
    evaluated = "Q" in result.summary["portfolio_id"].to_list()
    flagged = "Q" in result.data_issues["portfolio_id"].to_list()
    assert evaluated or flagged
