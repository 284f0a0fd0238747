"""Summaries: annualised figures, tracking error, information ratio, and the windows.

Standard formulas (common practice, no source): with n periods and p periods a year,
R_ann = (1 + R)^{p/n} − 1 (records shorter than a year are not annualised), tracking error
= sample standard deviation (ddof 1) of the per-period active return × √p, information
ratio = annualised active return / tracking error. ``summary_windows``: a trailing 1y/3y
window, or a calendar year, is linked as if the record were only that window (DESIGN §5),
so it must equal the loop linking of that subset of the per-period effects.
Invented data (seeded ``default_rng``).
"""

from __future__ import annotations

import datetime as dt
import math
from typing import Any

import numpy as np
import polars as pl
import pytest
from tiltaudit_testkit import (
    EFFECTS,
    IDENTITY_ATOL,
    assert_close,
    link_loops,
    month_ends,
    previous_month_end,
    run,
)

LENGTHS = {"long": 50, "year": 12, "short": 8}


def _roster(
    rng: np.random.Generator, ends: list[dt.date], first_start: dt.date, lengths: dict[str, int]
) -> dict[str, Any]:
    """Portfolios of the given lengths (all ending at the last date), holdings every period."""
    starts = [first_start, *ends[:-1]]
    classes = ("eq", "fi", "alt")
    n = len(ends)
    index = rng.normal(0.005, 0.03, (n, 3))
    tables: dict[str, Any] = {
        "index_returns": [
            {"period_end": e, "asset_class": c, "return": float(index[t, i])}
            for t, e in enumerate(ends)
            for i, c in enumerate(classes)
        ],
        "holdings": [],
        "policy": [],
        "segment_returns": [],
        "portfolio_returns": [],
    }
    for pid, length in lengths.items():
        for t in range(n - length, n):
            w = rng.dirichlet([4.0, 3.0, 1.0])
            tables["holdings"] += [
                {"portfolio_id": pid, "as_of": starts[t], "asset_class": c, "weight": float(w[i])}
                for i, c in enumerate(classes)
            ]
            tables["segment_returns"] += [
                {
                    "portfolio_id": pid,
                    "period_end": ends[t],
                    "asset_class": c,
                    "return": float(index[t, i] + rng.normal(0, 0.002)),
                }
                for i, c in enumerate(classes)
            ]
            if pid == "long":
                tables["portfolio_returns"].append(
                    {
                        "portfolio_id": pid,
                        "period_end": ends[t],
                        "return": float(rng.normal(0.005, 0.03)),
                    }
                )
        tables["policy"] += [
            {"portfolio_id": pid, "asset_class": c, "weight": q, "effective_from": first_start}
            for c, q in zip(classes, (0.5, 0.35, 0.15), strict=True)
        ]
    return tables


@pytest.fixture(scope="module")
def monthly() -> tuple[dict[str, Any], Any]:
    ends = month_ends(2019, 11, 50)  # Nov 2019 .. Dec 2023: touches five calendar years
    tables = _roster(np.random.default_rng(77), ends, previous_month_end(ends[0]), LENGTHS)
    return tables, run(tables, linking="carino")


def _series(result: Any, pid: str) -> list[dict[str, Any]]:
    return result.series.filter(pl.col("portfolio_id") == pid).sort("period_end").to_dicts()


def _expected_summary(rows: list[dict[str, Any]], per_year: int, method: str) -> dict[str, Any]:
    port = [r["portfolio_return"] for r in rows]
    pol = [r["policy_return"] for r in rows]
    n = len(rows)
    big_r = math.prod(1 + x for x in port) - 1
    big_b = math.prod(1 + x for x in pol) - 1
    linked = link_loops(method, port, pol, {e: [r[e] or 0.0 for r in rows] for e in EFFECTS})
    active = np.array(port) - np.array(pol)
    te = float(np.std(active, ddof=1)) * math.sqrt(per_year) if n > 1 else None
    out: dict[str, Any] = {
        "n_periods": n,
        "first_period": rows[0]["period_end"],
        "last_period": rows[-1]["period_end"],
        "portfolio_return": big_r,
        "policy_return": big_b,
        "active_return": big_r - big_b,
        "tracking_error": te,
        **{e: None if all(r[e] is None for r in rows) else linked[e] for e in EFFECTS},
    }
    if n >= per_year:
        r_ann = (1 + big_r) ** (per_year / n) - 1
        b_ann = (1 + big_b) ** (per_year / n) - 1
        out |= {
            "portfolio_return_ann": r_ann,
            "policy_return_ann": b_ann,
            "active_return_ann": r_ann - b_ann,
            "information_ratio": (r_ann - b_ann) / te if te else None,
        }
    else:
        out |= dict.fromkeys(
            ("portfolio_return_ann", "policy_return_ann", "active_return_ann", "information_ratio")
        )
    return out


def _check(got: dict[str, Any], expected: dict[str, Any], what: str) -> None:
    for key, value in expected.items():
        if isinstance(value, float) or (value is None and key not in ("first_period",)):
            assert_close(got[key], value, atol=IDENTITY_ATOL, what=f"{what} {key}")
        else:
            assert got[key] == value, (what, key)


@pytest.mark.parametrize("pid", list(LENGTHS))
def test_summary_annualised_figures_and_tracking_error(monthly: Any, pid: str) -> None:
    _, result = monthly
    got = result.summary.filter(pl.col("portfolio_id") == pid).row(0, named=True)
    _check(got, _expected_summary(_series(result, pid), 12, "carino"), pid)
    if got["active_return_ann"] is None:
        assert all(got[f"{e}_ann"] is None for e in EFFECTS)
    else:  # the annualised effects still add up to the annualised active return
        parts = sum(got[f"{e}_ann"] or 0.0 for e in EFFECTS)
        assert abs(parts - got["active_return_ann"]) <= IDENTITY_ATOL


@pytest.mark.parametrize("method", ["carino", "menchero", "grap"])
def test_trailing_windows_are_linked_on_their_own(monthly: Any, method: str) -> None:
    tables, _ = monthly
    result = run(tables, linking=method)
    windows = result.summary_windows
    for pid, length in LENGTHS.items():
        rows = _series(result, pid)
        mine = windows.filter(pl.col("portfolio_id") == pid)
        trailing = {w for w in mine["window"].to_list() if w.endswith("y")}
        assert trailing == {f"{y}y" for y in (1, 3, 5, 10) if length >= 12 * y}
        for label in sorted(trailing):
            size = 12 * int(label[:-1])
            got = mine.filter(pl.col("window") == label).row(0, named=True)
            _check(got, _expected_summary(rows[-size:], 12, method), f"{pid} {label}")
            assert got["linking"] == method


def test_calendar_year_windows(monthly: Any) -> None:
    _, result = monthly
    rows = _series(result, "long")
    mine = result.summary_windows.filter(pl.col("portfolio_id") == "long")
    years = sorted(w for w in mine["window"].to_list() if not w.endswith("y"))
    assert years == ["2019", "2020", "2021", "2022", "2023"]
    for year in years:
        subset = [r for r in rows if r["period_end"].year == int(year)]
        got = mine.filter(pl.col("window") == year).row(0, named=True)
        _check(got, _expected_summary(subset, 12, "carino"), f"long {year}")
    # A partial year (two months of 2019) is reported but not annualised.
    partial = mine.filter(pl.col("window") == "2019").row(0, named=True)
    assert partial["n_periods"] == 2
    assert partial["portfolio_return_ann"] is None


def test_quarterly_calendar_annualises_with_four_periods_a_year() -> None:
    ends = month_ends(2015, 3, 36)[::3]  # 12 quarter ends
    lengths = {"long": 12, "short": 3}  # 3 quarters: less than a year, not annualised
    tables = _roster(np.random.default_rng(12), ends, dt.date(2014, 12, 31), lengths)
    result = run(tables)
    assert result.calendar.periods_per_year == 4
    for pid in lengths:
        got = result.summary.filter(pl.col("portfolio_id") == pid).row(0, named=True)
        _check(got, _expected_summary(_series(result, pid), 4, "carino"), pid)
