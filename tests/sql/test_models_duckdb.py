"""The SQL models on DuckDB: given/expected rows per model, corner cases first, then the
marts against the local engine (``attribution.runner.run_roster``) on the demo roster, a
random roster and a roster with every data issue.

Expected values come from the formulas of DESIGN §2-3 and the cited papers, evaluated here
with plain Python floats on invented numbers, or from the local engine as an independent
implementation (numpy arrays and an explicit time loop for the drift, where the SQL uses
window functions and a closed form).
"""

from __future__ import annotations

import datetime as dt
import math
from pathlib import Path

import duckdb
import polars as pl
import pytest
from sql_model_checks import (
    ATOL,
    assert_matches_python,
    broken_roster,
    python_marts,
    run_sql,
)

from attribution.calendar import build_calendar
from attribution.errors import OptionError, SharedTableError
from attribution.options import RunOptions
from attribution.runner import run_roster
from attribution.simulate import demo_roster, simulate_roster
from attribution.sql_models import (
    INPUT_TABLES,
    MARTS,
    load_models,
    read_marts,
    run_models,
)

D = dt.date
START = D(2019, 12, 31)
ENDS = [D(2020, 1, 31), D(2020, 2, 29), D(2020, 3, 31), D(2020, 4, 30)]
STARTS = [START, *ENDS[:-1]]


def _holdings(rows: list[tuple[str, dt.date, str, float]]) -> pl.DataFrame:
    return pl.DataFrame(
        rows,
        schema={
            "portfolio_id": pl.String,
            "as_of": pl.Date,
            "asset_class": pl.String,
            "weight": pl.Float64,
        },
        orient="row",
    )


def _index(returns: dict[dt.date, dict[str, float]]) -> pl.DataFrame:
    rows = [
        (day, cls, value) for day, by_class in returns.items() for cls, value in by_class.items()
    ]
    return pl.DataFrame(
        rows,
        schema={"period_end": pl.Date, "asset_class": pl.String, "return": pl.Float64},
        orient="row",
    )


def _policy(rows: list[tuple[str, str, float, dt.date]]) -> pl.DataFrame:
    return pl.DataFrame(
        rows,
        schema={
            "portfolio_id": pl.String,
            "asset_class": pl.String,
            "weight": pl.Float64,
            "effective_from": pl.Date,
        },
        orient="row",
    )


def _segments(rows: list[tuple[str, dt.date, str, float]]) -> pl.DataFrame:
    return pl.DataFrame(
        rows,
        schema={
            "portfolio_id": pl.String,
            "period_end": pl.Date,
            "asset_class": pl.String,
            "return": pl.Float64,
        },
        orient="row",
    )


def _reported(rows: list[tuple[str, dt.date, float]]) -> pl.DataFrame:
    return pl.DataFrame(
        rows,
        schema={"portfolio_id": pl.String, "period_end": pl.Date, "return": pl.Float64},
        orient="row",
    )


# Invented index returns of two classes over four months.
INDEX = {
    ENDS[0]: {"equity": 0.020, "bonds": 0.010},
    ENDS[1]: {"equity": -0.030, "bonds": 0.004},
    ENDS[2]: {"equity": 0.015, "bonds": -0.002},
    ENDS[3]: {"equity": 0.007, "bonds": 0.003},
}
POLICY = _policy([("P", "equity", 0.6, START), ("P", "bonds", 0.4, START)])


def _one_period(**extra: pl.DataFrame) -> dict[str, pl.DataFrame]:
    """Portfolio P, one holdings date (so one period), equity 0.7 / bonds 0.3."""
    return {
        "holdings": _holdings([("P", START, "equity", 0.7), ("P", START, "bonds", 0.3)]),
        "index_returns": _index({ENDS[0]: INDEX[ENDS[0]]}),
        "policy": POLICY,
        **extra,
    }


def _row(frame: pl.DataFrame, **keys: object) -> dict[str, object]:
    found = frame.filter(pl.all_horizontal(pl.col(k) == v for k, v in keys.items()))
    assert found.height == 1, f"expected one row for {keys}, found {found.height}"
    return found.row(0, named=True)


def _codes(issues: pl.DataFrame) -> set[tuple[object, str, str]]:
    return {(r["portfolio_id"], r["severity"], r["code"]) for r in issues.iter_rows(named=True)}


# --- corner cases ------------------------------------------------------------------------------


def test_missing_class_on_a_holdings_date_has_weight_zero() -> None:
    # DESIGN §2: a class missing from a portfolio's holdings on a date has weight 0 that
    # period; the class is in the universe through the policy, so it has an effects row.
    tables = _one_period()
    tables["holdings"] = _holdings([("P", START, "equity", 1.0)])
    out = run_sql(tables)
    bonds = _row(out["effects"], asset_class="bonds")
    equity = _row(out["effects"], asset_class="equity")
    b_e, b_b = INDEX[ENDS[0]]["equity"], INDEX[ENDS[0]]["bonds"]
    big_b = 0.6 * b_e + 0.4 * b_b
    assert bonds["weight"] == 0.0
    assert bonds["static_weight"] == 0.0
    # Brinson-Fachler static allocation (s - q)(b - B) with s = w over a one-period window
    assert bonds["static_allocation"] == pytest.approx((0.0 - 0.4) * (b_b - big_b), abs=ATOL)
    assert equity["static_allocation"] == pytest.approx((1.0 - 0.6) * (b_e - big_b), abs=ATOL)
    assert bonds["timing"] == 0.0
    assert out["data_issues"].height == 0


def test_single_period_effects_series_and_summary() -> None:
    # One period: the linked effects are the period's effects (every linking method gives
    # k_t / k = 1 with one period, Carino 1999), nothing is annualised (under a year), and
    # the tracking error needs two periods (sample standard deviation).
    tables = _one_period(
        segment_returns=_segments(
            [("P", ENDS[0], "equity", 0.025), ("P", ENDS[0], "bonds", 0.012)]
        ),
    )
    out = run_sql(tables)
    w, q = {"equity": 0.7, "bonds": 0.3}, {"equity": 0.6, "bonds": 0.4}
    b, r = INDEX[ENDS[0]], {"equity": 0.025, "bonds": 0.012}
    big_b = sum(q[c] * b[c] for c in q)
    for cls in ("equity", "bonds"):
        row = _row(out["effects"], asset_class=cls)
        assert row["policy_return"] == pytest.approx(big_b, abs=ATOL)
        assert row["static_allocation"] == pytest.approx(
            (w[cls] - q[cls]) * (b[cls] - big_b), abs=ATOL
        )
        assert row["timing"] == 0.0
        assert row["selection"] == pytest.approx(w[cls] * (r[cls] - b[cls]), abs=ATOL)
        assert row["interaction"] is None
        assert row["is_drifted"] is False
    computed = sum(w[c] * r[c] for c in w)
    series = _row(out["series"], portfolio_id="P")
    assert series["portfolio_return"] == pytest.approx(computed, abs=ATOL)
    assert series["residual"] == 0.0
    assert series["return_source"] == "segments"
    summary = _row(out["summary"], portfolio_id="P")
    assert summary["n_periods"] == 1
    assert summary["active_return"] == pytest.approx(computed - big_b, abs=ATOL)
    parts = summary["static_allocation"] + summary["timing"] + summary["selection"]
    assert parts == pytest.approx(computed - big_b, abs=ATOL)
    for column in ("portfolio_return_ann", "timing_ann", "tracking_error", "information_ratio"):
        assert summary[column] is None


def test_no_segment_returns_leave_selection_null() -> None:
    # DESIGN §3: without segment returns selection is unknown (null, never 0) and the
    # computed return is sum w b; return_source is 'index'.
    out = run_sql(_one_period())
    assert out["effects"]["selection"].null_count() == 2
    summary = _row(out["summary"], portfolio_id="P")
    assert summary["selection"] is None
    assert summary["return_source"] == "index"
    series = _row(out["series"], portfolio_id="P")
    b = INDEX[ENDS[0]]
    assert series["computed_return"] == pytest.approx(
        0.7 * b["equity"] + 0.3 * b["bonds"], abs=ATOL
    )


def test_null_segment_return_for_a_held_class() -> None:
    # README: selection is null for that class-period, the index return stands in for the
    # computed return, a segment_return_missing warning is raised and counted.
    tables = _one_period(segment_returns=_segments([("P", ENDS[0], "equity", 0.025)]))
    out = run_sql(tables)
    assert _row(out["effects"], asset_class="bonds")["selection"] is None
    assert _row(out["effects"], asset_class="equity")["selection"] == pytest.approx(
        0.7 * (0.025 - 0.020), abs=ATOL
    )
    series = _row(out["series"], portfolio_id="P")
    assert series["computed_return"] == pytest.approx(0.7 * 0.025 + 0.3 * 0.010, abs=ATOL)
    assert series["selection"] == pytest.approx(0.7 * 0.005, abs=ATOL)
    assert _row(out["summary"], portfolio_id="P")["n_selection_missing"] == 1
    issue = _row(out["data_issues"], code="segment_return_missing")
    assert (issue["portfolio_id"], issue["asset_class"], issue["severity"]) == (
        "P",
        "bonds",
        "warning",
    )
    assert issue["period_end"] == ENDS[0]


def test_segment_return_of_minus_100_percent_skips_the_portfolio() -> None:
    # The local engine rejects a return <= -100 % (DESIGN §2: error, portfolio skipped);
    # the SQL path reports it the same way and evaluates the other portfolios.
    tables = _one_period(
        segment_returns=_segments(
            [
                ("P", ENDS[0], "equity", -1.0),
                ("Q", ENDS[0], "equity", 0.01),
                ("Q", ENDS[0], "bonds", 0.0),
            ]
        )
    )
    tables["holdings"] = pl.concat(
        [tables["holdings"], tables["holdings"].with_columns(portfolio_id=pl.lit("Q"))]
    )
    tables["policy"] = pl.concat([POLICY, POLICY.with_columns(portfolio_id=pl.lit("Q"))])
    out = run_sql(tables)
    assert _codes(out["data_issues"]) == {("P", "error", "return_below_minus_100")}
    assert out["summary"]["portfolio_id"].to_list() == ["Q"]
    assert set(out["effects"]["portfolio_id"].to_list()) == {"Q"}
    python = run_roster(tables, RunOptions())
    assert python.skipped == ("P",)
    assert _codes(python.data_issues) == _codes(out["data_issues"])


def test_index_return_of_minus_100_percent_stops_everything() -> None:
    # A bad row in a table every portfolio shares stops the local run (exit 2, nothing
    # written). The SQL path cannot stop: it lists the problem as an error without a
    # portfolio and leaves every other mart empty.
    tables = _one_period()
    tables["index_returns"] = _index({ENDS[0]: {"equity": -1.0, "bonds": 0.01}})
    out = run_sql(tables)
    issue = _row(out["data_issues"], code="return_below_minus_100")
    assert issue["portfolio_id"] is None
    assert issue["severity"] == "error"
    assert (issue["period_end"], issue["asset_class"]) == (ENDS[0], "equity")
    assert out["data_issues"].height == 1
    for mart in ("effects", "series", "summary"):
        assert out[mart].height == 0
    with pytest.raises(SharedTableError, match="return"):
        run_roster(tables, RunOptions())


@pytest.mark.parametrize(
    ("edit", "code"),
    [
        (lambda t: t | {"index_returns": pl.concat([t["index_returns"]] * 2)}, "duplicate_key"),
        (
            lambda t: (
                t | {"index_returns": t["index_returns"].with_columns(**{"return": float("nan")})}
            ),
            "nonfinite_value",
        ),
        (
            lambda t: (
                t | {"index_returns": t["index_returns"].with_columns(**{"return": float("-inf")})}
            ),
            "nonfinite_value",
        ),
        (lambda t: t | {"index_returns": t["index_returns"].head(3)}, "index_return_missing"),
        (
            lambda t: t | {"riskfree": pl.DataFrame({"period_end": [ENDS[0]], "return": [0.001]})},
            "riskfree_return_missing",
        ),
        (
            lambda t: (
                t | {"policy": t["policy"].with_columns(portfolio_id=pl.lit(None, dtype=pl.String))}
            ),
            "missing_key",
        ),
        (lambda t: t | {"holdings": t["holdings"].head(0)}, "empty_table"),
        (
            lambda t: (
                t
                | {
                    "index_returns": t["index_returns"].with_columns(
                        period_end=pl.col("period_end").dt.offset_by("-14d")
                        + pl.duration(days=pl.col("period_end").dt.month() * 15)
                    )
                }
            ),
            "calendar_undefined",
        ),
    ],
    ids=[
        "index_duplicate",
        "index_nan",
        "index_minus_infinity",
        "index_class_missing_on_a_date",
        "riskfree_missing_a_date",
        "empty_portfolio_id",
        "no_holdings_rows",
        "calendar_frequency_unknown",
    ],
)
def test_whole_input_problems_empty_the_marts(edit, code: str) -> None:  # type: ignore[no-untyped-def]
    tables = {
        "holdings": _holdings(
            [("P", s, c, w) for s in STARTS for c, w in (("equity", 0.7), ("bonds", 0.3))]
        ),
        "index_returns": _index(INDEX),
        "policy": POLICY,
    }
    out = run_sql(edit(tables))
    issues = out["data_issues"]
    assert code in issues["code"].to_list()
    assert issues["portfolio_id"].null_count() == issues.height
    assert (issues["severity"] == "error").all()
    for mart in ("effects", "series", "summary"):
        assert out[mart].height == 0


@pytest.mark.parametrize(
    "options",
    [
        {"static_mode": "median", "static_periods": None, "form": "bf", "linking": "carino"},
        {"static_mode": "trailing", "static_periods": 0, "form": "bf", "linking": "carino"},
        {"static_mode": "window", "static_periods": None, "form": "xyz", "linking": "carino"},
        {"static_mode": "window", "static_periods": None, "form": "bf", "linking": "geometric"},
    ],
)
def test_bad_run_options_are_reported(options: dict[str, object]) -> None:
    row = {**options, "weight_tolerance": 1e-4}
    frame = pl.DataFrame([row], schema=run_options_schema())
    out = run_sql(_one_period(run_options=frame))
    assert out["data_issues"]["code"].to_list() == ["invalid_option"]
    assert out["summary"].height == 0


def test_run_options_must_have_one_row() -> None:
    frame = pl.concat([options_row(), options_row()])
    out = run_sql(_one_period(run_options=frame))
    assert out["data_issues"]["code"].to_list() == ["invalid_option"]
    assert out["effects"].height == 0


def run_options_schema() -> dict[str, pl.DataType]:
    from attribution.sql_models import INPUT_SCHEMAS

    return INPUT_SCHEMAS["run_options"]


def options_row() -> pl.DataFrame:
    from attribution.sql_models import options_frame

    return options_frame(RunOptions())


# --- given / expected rows per model -----------------------------------------------------------


@pytest.mark.parametrize(
    "period_ends",
    [
        [D(2020, 1, 31), D(2020, 2, 29), D(2020, 3, 31)],
        [D(2020, 3, 31), D(2020, 6, 30), D(2020, 9, 30), D(2020, 12, 31)],
        [D(2021, 2, 28)],
        [D(2020, 1, 15), D(2020, 2, 15), D(2020, 3, 15)],
        [D(2020, 1, 3), D(2020, 1, 10), D(2020, 1, 17)],
        [D(2019, 6, 30), D(2019, 12, 31), D(2020, 6, 30)],
        [D(2018, 12, 31), D(2019, 12, 31), D(2020, 12, 31)],
        [D(2020, 1, 2), D(2020, 1, 3), D(2020, 1, 6), D(2020, 1, 7)],
    ],
    ids=[
        "month_ends",
        "quarter_ends",
        "single_date",
        "mid_month",
        "weekly",
        "half_years",
        "years",
        "days",
    ],
)
def test_int_calendar_inferred_matches_the_calendar_module(period_ends: list[dt.date]) -> None:
    # Reference: attribution.calendar.build_calendar (the engine's own rule, written in
    # Python date arithmetic; the model uses SQL interval arithmetic).
    tables = {
        "holdings": _holdings([("P", period_ends[0], "equity", 1.0)]),
        "index_returns": _index({day: {"equity": 0.01} for day in period_ends}),
        "policy": _policy([("P", "equity", 1.0, period_ends[0])]),
    }
    got = run_sql(tables)["int_calendar_inferred"].sort("period_index")
    reference = build_calendar(pl.Series(period_ends))
    expected = reference.frame()
    assert got["period_index"].to_list() == expected["period_index"].to_list()
    assert got["period_start"].to_list() == expected["period_start"].to_list()
    assert got["period_end"].to_list() == expected["period_end"].to_list()
    assert set(got["frequency"].to_list()) == {reference.frequency}
    assert set(got["periods_per_year"].to_list()) == {reference.periods_per_year}


def test_int_holdings_placed_on_calendar() -> None:
    # as_of = the first period's start -> 0; = a period_end -> the period starting there;
    # = the last period_end -> n_periods (a period not in the calendar); else null.
    tables = {
        "holdings": _holdings(
            [
                ("P", START, "equity", 1.0),
                ("P", ENDS[0], "equity", 1.0),
                ("P", ENDS[3], "equity", 1.0),
                ("P", D(2020, 2, 14), "equity", 1.0),
                ("P", ENDS[1], "gold", 0.0),
            ]
        ),
        "index_returns": _index(INDEX),
        "policy": POLICY,
    }
    got = run_sql(tables)["int_holdings_placed_on_calendar"]
    placed = {(r["as_of"], r["asset_class"]): r for r in got.iter_rows(named=True)}
    assert placed[(START, "equity")]["period_index"] == 0
    assert placed[(ENDS[0], "equity")]["period_index"] == 1
    assert placed[(ENDS[3], "equity")]["period_index"] == 4
    assert placed[(D(2020, 2, 14), "equity")]["period_index"] is None
    assert placed[(ENDS[1], "gold")]["is_known_class"] is False
    assert placed[(START, "equity")]["is_known_class"] is True


def _monthly_ends(n: int) -> list[dt.date]:
    out, year, month = [], 2020, 1
    for _ in range(n):
        nxt = D(year + (month == 12), month % 12 + 1, 1)
        out.append(nxt - dt.timedelta(days=1))
        year, month = nxt.year, nxt.month
    return out


@pytest.mark.parametrize(
    ("holding_periods", "first", "last", "spacing", "gaps"),
    [
        ([0], 0, 0, 1, []),
        ([0, 2, 4, 5], 0, 6, 2, []),  # gaps 2, 2, 1: spacing 2, the last date covers 2
        ([0, 1, 3], 0, 3, 1, [3]),  # gaps 1, 2: a tie, the smaller wins; gap 2 > 1 warns
        ([2, 5], 2, 7, 3, []),  # the window is cut at the calendar's end (8 periods)
    ],
)
def test_int_portfolio_windows_spanned(
    holding_periods: list[int], first: int, last: int, spacing: int, gaps: list[int]
) -> None:
    # README "Evaluation window" (the engine's own convention).
    ends = _monthly_ends(8)
    starts = [START, *ends[:-1]]
    tables = {
        "holdings": _holdings([("P", starts[t], "equity", 1.0) for t in holding_periods]),
        "index_returns": _index({day: {"equity": 0.01} for day in ends}),
        "policy": _policy([("P", "equity", 1.0, START)]),
    }
    out = run_sql(tables)
    window = _row(out["int_portfolio_windows_spanned"], portfolio_id="P")
    assert (window["first_index"], window["last_index"], window["spacing"]) == (
        first,
        last,
        spacing,
    )
    gap_rows = out["data_issues"].filter(pl.col("code") == "holdings_gap")
    assert sorted(gap_rows["period_end"].to_list()) == [starts[t] for t in gaps]
    assert out["series"].height == last - first + 1


def test_int_weights_drifted_follows_buy_and_hold() -> None:
    # DESIGN §2: between holdings dates w_{t+1} = w_t (1 + r_t) / sum_j w_{j,t} (1 + r_{j,t}),
    # r the segment return, else the index return. Expected values by that recursion.
    segments = _segments([("P", ENDS[0], "equity", 0.031), ("P", ENDS[2], "bonds", -0.004)])
    tables = {
        "holdings": _holdings(
            [
                ("P", START, "equity", 0.55),
                ("P", START, "bonds", 0.45),
                ("P", ENDS[1], "equity", 0.65),
                ("P", ENDS[1], "bonds", 0.35),
            ]
        ),
        "index_returns": _index(INDEX),
        "policy": POLICY,
        "segment_returns": segments,
    }
    out = run_sql(tables)
    growth = {
        (ENDS[0], "equity"): 0.031,
        (ENDS[0], "bonds"): INDEX[ENDS[0]]["bonds"],
        (ENDS[2], "equity"): INDEX[ENDS[2]]["equity"],
        (ENDS[2], "bonds"): -0.004,
    }
    expected = {}
    for start_t, (w_e, w_b) in ((0, (0.55, 0.45)), (2, (0.65, 0.35))):
        r_e, r_b = growth[(ENDS[start_t], "equity")], growth[(ENDS[start_t], "bonds")]
        total = w_e * (1 + r_e) + w_b * (1 + r_b)
        expected[(ENDS[start_t], "equity")] = w_e
        expected[(ENDS[start_t + 1], "equity")] = w_e * (1 + r_e) / total
        expected[(ENDS[start_t + 1], "bonds")] = w_b * (1 + r_b) / total
    for (day, cls), value in expected.items():
        row = _row(out["effects"], period_end=day, asset_class=cls)
        assert row["weight"] == pytest.approx(value, abs=ATOL)
    drifted = out["effects"].filter(pl.col("is_drifted"))["period_end"].unique().sort()
    assert drifted.to_list() == [ENDS[1], ENDS[3]]
    assert _row(out["summary"], portfolio_id="P")["n_drifted_periods"] == 2


@pytest.mark.parametrize(
    ("static", "expected"),
    [
        ("window", [0.65, 0.65, 0.65, 0.65]),
        ("expanding", [0.5, 0.5, 0.6, 0.6]),
        ("trailing:1", [0.5, 0.5, 0.7, 0.6]),
        ("trailing:2", [0.5, 0.5, 0.6, 0.65]),
    ],
)
def test_int_weights_static_averaged(static: str, expected: list[float]) -> None:
    # DESIGN §3: window = mean over the window; expanding = mean of earlier periods;
    # trailing:N = mean of the previous N (fewer at the start); the first period of the
    # ex-ante modes uses its own weight. Equity weights 0.5, 0.7, 0.6, 0.8 (mean 0.65).
    weights = [0.5, 0.7, 0.6, 0.8]
    tables = {
        "holdings": _holdings(
            [("P", s, "equity", w) for s, w in zip(STARTS, weights, strict=True)]
            + [("P", s, "bonds", 1 - w) for s, w in zip(STARTS, weights, strict=True)]
        ),
        "index_returns": _index(INDEX),
        "policy": POLICY,
    }
    out = run_sql(tables, RunOptions.build(static=static))
    got = out["effects"].filter(pl.col("asset_class") == "equity").sort("period_end")
    assert got["static_weight"].to_list() == pytest.approx(expected, abs=ATOL)
    timing = got["timing"].to_list()
    for t, w in enumerate(weights):
        b, big_b = (
            INDEX[ENDS[t]]["equity"],
            0.6 * INDEX[ENDS[t]]["equity"] + 0.4 * INDEX[ENDS[t]]["bonds"],
        )
        assert timing[t] == pytest.approx((w - expected[t]) * (b - big_b), abs=ATOL)


def test_int_effects_decomposed_bhb_form() -> None:
    # Brinson, Hood & Beebower (1986): static (s - q) b, timing (w - s) b, selection
    # q (r - b), interaction (w - q)(r - b); the four add up to w r - q b per class.
    tables = _one_period(
        segment_returns=_segments([("P", ENDS[0], "equity", 0.025), ("P", ENDS[0], "bonds", 0.012)])
    )
    out = run_sql(tables, RunOptions.build(form="bhb"))
    for cls, w, q, r in (("equity", 0.7, 0.6, 0.025), ("bonds", 0.3, 0.4, 0.012)):
        b = INDEX[ENDS[0]][cls]
        row = _row(out["effects"], asset_class=cls)
        assert row["static_allocation"] == pytest.approx((w - q) * b, abs=ATOL)
        assert row["timing"] == 0.0
        assert row["selection"] == pytest.approx(q * (r - b), abs=ATOL)
        assert row["interaction"] == pytest.approx((w - q) * (r - b), abs=ATOL)


def test_int_periods_totalled_reported_return_and_residual() -> None:
    # DESIGN §3: with a reported return the residual is reported - computed; a period
    # without one uses the computed return (reported_return_missing warning).
    tables = {
        "holdings": _holdings(
            [("P", s, c, w) for s in STARTS[:2] for c, w in (("equity", 0.7), ("bonds", 0.3))]
        ),
        "index_returns": _index(INDEX),
        "policy": POLICY,
        "portfolio_returns": _reported([("P", ENDS[0], 0.0150)]),
    }
    out = run_sql(tables)
    series = out["series"].sort("period_end")
    first, second = series.row(0, named=True), series.row(1, named=True)
    computed0 = 0.7 * 0.020 + 0.3 * 0.010
    assert first["portfolio_return"] == 0.0150
    assert first["residual"] == pytest.approx(0.0150 - computed0, abs=ATOL)
    assert second["residual"] == 0.0
    assert first["return_source"] == "reported"
    issue = _row(out["data_issues"], code="reported_return_missing")
    assert (issue["period_end"], issue["severity"]) == (ENDS[1], "warning")


def _linking_case() -> tuple[dict[str, pl.DataFrame], list[float], list[float]]:
    """Four monthly periods with weights moving around the policy; returns the tables and
    the per-period portfolio and policy returns (index returns only)."""
    weights = [0.5, 0.7, 0.6, 0.8]
    tables = {
        "holdings": _holdings(
            [("P", s, "equity", w) for s, w in zip(STARTS, weights, strict=True)]
            + [("P", s, "bonds", 1 - w) for s, w in zip(STARTS, weights, strict=True)]
        ),
        "index_returns": _index(INDEX),
        "policy": POLICY,
    }
    r = [
        w * INDEX[e]["equity"] + (1 - w) * INDEX[e]["bonds"]
        for w, e in zip(weights, ENDS, strict=True)
    ]
    b = [0.6 * INDEX[e]["equity"] + 0.4 * INDEX[e]["bonds"] for e in ENDS]
    return tables, r, b


def _carino(r: float, b: float) -> float:
    # Carino (1999): k = [ln(1 + R) - ln(1 + B)] / (R - B), and its limit 1/(1 + B) at R = B
    # (the third period of _linking_case holds the policy weights, so R_t = B_t there)
    if r == b:
        return 1 / (1 + b)
    return (math.log1p(r) - math.log1p(b)) / (r - b)


@pytest.mark.parametrize("linking", ["carino", "menchero", "grap", "frongello"])
def test_int_periods_linked_follows_the_published_formulas(linking: str) -> None:
    # Carino (1999), JPM 3(4); Menchero (2000), JPM Fall 2000; GRAP (1997) / Bonafede,
    # Foresti & Matheos (2002) and Frongello (2002), JPM 6(3) for the GRAP totals. Each
    # formula written out below with plain floats over the per-period totals of the model.
    tables, r, b = _linking_case()
    out = run_sql(tables, RunOptions.build(linking=linking))
    series = out["series"].sort("period_end")
    timing = series["timing"].to_list()
    static = series["static_allocation"].to_list()
    assert series["portfolio_return"].to_list() == pytest.approx(r, abs=ATOL)
    for tau in range(1, 5):
        rr, bb = r[:tau], b[:tau]
        big_r = math.prod(1 + x for x in rr) - 1
        big_b = math.prod(1 + x for x in bb) - 1
        if linking == "carino":
            k = _carino(big_r, big_b)
            weights = [_carino(x, y) / k for x, y in zip(rr, bb, strict=True)]
        elif linking == "menchero":
            n = tau
            m = ((big_r - big_b) / n) / ((1 + big_r) ** (1 / n) - (1 + big_b) ** (1 / n))
            d = [x - y for x, y in zip(rr, bb, strict=True)]
            c = (big_r - big_b - m * sum(d)) / sum(x * x for x in d)
            weights = [m + c * x for x in d]
        else:
            weights = [
                math.prod(1 + x for x in rr[:t]) * math.prod(1 + y for y in bb[t + 1 :])
                for t in range(tau)
            ]
        row = series.row(tau - 1, named=True)
        assert row["cum_timing"] == pytest.approx(
            sum(w * e for w, e in zip(weights, timing, strict=False)), abs=ATOL
        )
        assert row["cum_static_allocation"] == pytest.approx(
            sum(w * e for w, e in zip(weights, static, strict=False)), abs=ATOL
        )
        assert row["cum_active_return"] == pytest.approx(big_r - big_b, abs=ATOL)
        total = row["cum_timing"] + row["cum_static_allocation"] + row["cum_residual"]
        assert total == pytest.approx(big_r - big_b, abs=ATOL)


def test_summary_annualises_a_year_or_more() -> None:
    # README (common practice, no source): R_ann = (1 + R)^(p/n) - 1 for n >= p periods;
    # the linked effects scaled by Carino's k so they add up to R_ann - B_ann; tracking
    # error = sample standard deviation of R_t - B_t times sqrt(p).
    ends = _monthly_ends(13)
    starts = [START, *ends[:-1]]
    weights = [0.55 + 0.01 * (t % 5) for t in range(13)]
    returns = {
        e: {"equity": 0.01 * ((t * 7) % 5 - 2), "bonds": 0.002 * (t % 3)}
        for t, e in enumerate(ends)
    }
    tables = {
        "holdings": _holdings(
            [("P", s, "equity", w) for s, w in zip(starts, weights, strict=True)]
            + [("P", s, "bonds", 1 - w) for s, w in zip(starts, weights, strict=True)]
        ),
        "index_returns": _index(returns),
        "policy": POLICY,
    }
    summary = _row(run_sql(tables)["summary"], portfolio_id="P")
    r = [
        w * returns[e]["equity"] + (1 - w) * returns[e]["bonds"]
        for w, e in zip(weights, ends, strict=True)
    ]
    b = [0.6 * returns[e]["equity"] + 0.4 * returns[e]["bonds"] for e in ends]
    big_r, big_b = math.prod(1 + x for x in r) - 1, math.prod(1 + x for x in b) - 1
    r_ann, b_ann = (1 + big_r) ** (12 / 13) - 1, (1 + big_b) ** (12 / 13) - 1
    active = [x - y for x, y in zip(r, b, strict=True)]
    mean = sum(active) / 13
    te = math.sqrt(sum((a - mean) ** 2 for a in active) / 12) * math.sqrt(12)
    assert summary["portfolio_return_ann"] == pytest.approx(r_ann, abs=ATOL)
    assert summary["active_return_ann"] == pytest.approx(r_ann - b_ann, abs=ATOL)
    assert summary["tracking_error"] == pytest.approx(te, abs=ATOL)
    assert summary["information_ratio"] * te == pytest.approx(r_ann - b_ann, abs=ATOL)
    scale = _carino(big_r, big_b) * (12 / 13) / _carino(r_ann, b_ann)
    assert summary["timing_ann"] == pytest.approx(summary["timing"] * scale, abs=ATOL)
    parts = summary["static_allocation_ann"] + summary["timing_ann"] + summary["residual_ann"]
    assert parts == pytest.approx(r_ann - b_ann, abs=ATOL)


def test_policy_in_force_and_rescaled() -> None:
    # DESIGN §2: a policy row set applies to every period starting on or after its
    # effective_from until the next set; weights within the tolerance are rescaled to 1.
    tables = {
        "holdings": _holdings(
            [("P", s, c, w) for s in STARTS for c, w in (("equity", 0.7), ("bonds", 0.3))]
        ),
        "index_returns": _index(INDEX),
        "policy": _policy(
            [
                ("P", "equity", 0.6, START),
                ("P", "bonds", 0.4, START),
                ("P", "equity", 0.50002, D(2020, 2, 15)),
                ("P", "bonds", 0.50002, D(2020, 2, 15)),
            ]
        ),
    }
    out = run_sql(tables)
    equity = out["effects"].filter(pl.col("asset_class") == "equity").sort("period_end")
    assert equity["policy_weight"].to_list() == pytest.approx([0.6, 0.6, 0.5, 0.5], abs=ATOL)
    assert out["data_issues"].height == 0


def test_no_policy_in_force_skips_the_portfolio() -> None:
    tables = {
        "holdings": _holdings(
            [("P", s, c, w) for s in STARTS for c, w in (("equity", 0.7), ("bonds", 0.3))]
        ),
        "index_returns": _index(INDEX),
        "policy": POLICY.with_columns(effective_from=pl.lit(ENDS[0])),
    }
    out = run_sql(tables)
    assert _codes(out["data_issues"]) == {("P", "error", "no_policy_in_force")}
    assert out["summary"].height == 0
    assert _codes(run_roster(tables, RunOptions()).data_issues) == _codes(out["data_issues"])


# --- the runner ----------------------------------------------------------------------------------


def test_models_are_created_after_what_they_read() -> None:
    seen: set[str] = set(INPUT_TABLES)
    for model in load_models():
        assert set(model.depends_on) | set(model.reads_inputs) <= seen, model.name
        seen.add(model.name)
    assert set(MARTS) <= seen


def test_inputs_from_files_and_reruns_on_one_connection(tmp_path: Path) -> None:
    tables = _linking_case()[0]
    for name, frame in tables.items():
        suffix = "csv" if name == "policy" else "parquet"
        if suffix == "csv":
            frame.write_csv(tmp_path / f"{name}.csv")
        else:
            frame.write_parquet(tmp_path / f"{name}.parquet")
    paths = {n: tmp_path / f"{n}.{'csv' if n == 'policy' else 'parquet'}" for n in tables}
    con = duckdb.connect()
    run_models(con, tables)
    from_frames = read_marts(con)
    run_models(con, paths)
    from_files = read_marts(con)
    run_models(con, tables)
    again = read_marts(con)
    for name in ("effects", "series", "summary"):
        assert from_files[name].sort(pl.all()).equals(from_frames[name].sort(pl.all())), name
        assert again[name].sort(pl.all()).equals(from_frames[name].sort(pl.all())), name


@pytest.mark.parametrize(
    ("tables", "message"),
    [
        ({"holdings": None}, "holdings: this table is required"),
        ({"positions": pl.DataFrame()}, "unknown input table"),
    ],
)
def test_runner_refuses_bad_inputs(tables: dict[str, object], message: str) -> None:
    given = {**_one_period(), **tables}
    with pytest.raises(OptionError, match=message):
        run_models(duckdb.connect(), given)  # type: ignore[arg-type]


def test_runner_refuses_date_alignment() -> None:
    with pytest.raises(OptionError, match="'align' option must be 'none'"):
        run_models(duckdb.connect(), _one_period(), options=RunOptions.build(align="month"))


# --- equality with the local engine ------------------------------------------------------------


DEMO_OPTIONS = [
    {},
    {"linking": "menchero"},
    {"linking": "grap"},
    {"linking": "frongello"},
    {"static": "expanding"},
    {"static": "trailing:12", "form": "bhb"},
]


@pytest.fixture(scope="module")
def demo() -> dict[str, pl.DataFrame]:
    return demo_roster()


@pytest.mark.parametrize("options", DEMO_OPTIONS, ids=lambda o: "-".join(o.values()) or "default")
def test_demo_roster_matches_the_local_engine(
    demo: dict[str, pl.DataFrame], options: dict[str, str]
) -> None:
    # The demo holds every behaviour of the generator, quarterly holdings with drift and
    # missing segment returns (attribution.simulate.demo_roster).
    opts = RunOptions.build(**options)
    assert_matches_python(run_sql(demo, opts), python_marts(demo, opts))


@pytest.mark.parametrize(
    ("seed", "options"),
    [(20240611, {}), (7, {"linking": "menchero", "static": "expanding", "form": "bhb"})],
)
def test_random_roster_matches_the_local_engine(seed: int, options: dict[str, str]) -> None:
    tables = simulate_roster(n_portfolios=50, n_classes=5, n_periods=36, seed=seed)
    opts = RunOptions.build(**options)
    assert_matches_python(run_sql(tables, opts), python_marts(tables, opts))


def test_random_roster_without_optional_tables_matches_the_local_engine() -> None:
    tables = simulate_roster(
        n_portfolios=30,
        n_classes=4,
        n_periods=30,
        seed=3,
        segment_returns=False,
        portfolio_returns=False,
    )
    opts = RunOptions()
    assert_matches_python(run_sql(tables, opts), python_marts(tables, opts))


@pytest.mark.parametrize("linking", ["carino", "menchero"])
def test_roster_with_every_data_issue_matches_the_local_engine(linking: str) -> None:
    opts = RunOptions.build(linking=linking)
    tables = broken_roster()
    sql = run_sql(tables, opts)
    assert_matches_python(sql, python_marts(tables, opts))
    codes = set(sql["data_issues"]["code"].to_list())
    assert codes == {
        "duplicate_key",
        "nonfinite_value",
        "off_calendar_date",
        "unknown_asset_class",
        "weights_not_summing",
        "missing_key",
        "no_policy_in_force",
        "return_below_minus_100",
        "segment_return_missing",
        "reported_return_missing",
        "holdings_gap",
        "no_holdings",
    }


def test_long_drift_stays_within_the_tolerance() -> None:
    # The drift is a closed form exp(sum ln(1 + r)) in SQL and a step-by-step recursion in
    # the engine; holdings every 60 months over 240 months drift up to 59 steps.
    tables = simulate_roster(n_portfolios=10, n_classes=6, n_periods=240, seed=5)
    starts = sorted(tables["holdings"]["as_of"].unique().to_list())
    tables["holdings"] = tables["holdings"].filter(pl.col("as_of").is_in(starts[::60]))
    opts = RunOptions()
    sql = run_sql(tables, opts)
    assert sql["summary"]["n_drifted_periods"].to_list() == [236] * 10
    assert_matches_python(sql, python_marts(tables, opts))
