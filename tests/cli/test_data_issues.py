"""Every portfolio-level data-issue code, triggered through the command line.

One minimal bad input per (code, table). An ``error`` must skip only the portfolio it
belongs to (the others run with the figures a clean run gives them) and make the run exit 3;
a ``warning`` must let every portfolio run and exit 0. The rules and severities are the
catalogue in :data:`attribution.validate.ISSUE_CODES` (DESIGN §2).
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import polars as pl
import pytest
from polars.testing import assert_frame_equal
from tiny_roster import FIRST_START, PORTFOLIOS, Workspace, snapshot

from attribution.validate import ISSUE_CODES

Frames = dict[str, pl.DataFrame]
BAD = "P2"  # the portfolio every case damages
MARCH = dt.date(2020, 3, 31)
OFF_DAY = dt.date(2020, 3, 15)
#: Codes of the timing layer: test_too_few_periods is checked through the command line in
#: test_timing_warning_through_the_command_line below; test_undefined (a series that never
#: moves) in tests/unit/test_timing.py.
NOT_HERE = {"test_too_few_periods", "test_undefined"}


def _key(table: str, pid: str = BAD, date: dt.date = MARCH, cls: str | None = "equity") -> pl.Expr:
    date_col = {"holdings": "as_of", "policy": "effective_from"}.get(table, "period_end")
    expr = (pl.col("portfolio_id") == pid) & (pl.col(date_col) == date)
    if cls is not None:
        expr &= pl.col("asset_class") == cls
    return expr


def set_value(table: str, column: str, value: object, **key: object) -> Callable[[Frames], Frames]:
    """Set ``column`` to ``value`` in the rows of ``table`` matching the key."""

    def mutate(frames: Frames) -> Frames:
        frame = frames[table]
        dtype = frame.schema[column]
        where = _key(table, **key)  # type: ignore[arg-type]
        new = pl.when(where).then(pl.lit(value, dtype=dtype)).otherwise(pl.col(column))
        return {**frames, table: frame.with_columns(new.alias(column))}

    return mutate


def duplicate_row(table: str, **key: object) -> Callable[[Frames], Frames]:
    """Append a second copy of the rows of ``table`` matching the key."""

    def mutate(frames: Frames) -> Frames:
        frame = frames[table]
        return {**frames, table: pl.concat([frame, frame.filter(_key(table, **key))])}  # type: ignore[arg-type]

    return mutate


def drop_rows(table: str, **key: object) -> Callable[[Frames], Frames]:
    """Remove the rows of ``table`` matching the key."""

    def mutate(frames: Frames) -> Frames:
        frame = frames[table]
        return {**frames, table: frame.filter(~_key(table, **key))}  # type: ignore[arg-type]

    return mutate


def append_null_key(table: str, column: str) -> Callable[[Frames], Frames]:
    """Append a copy of one of P2's rows with ``column`` emptied (weight 0 for weights)."""

    def mutate(frames: Frames) -> Frames:
        frame = frames[table]
        date_col = {"holdings": "as_of", "policy": "effective_from"}.get(table, "period_end")
        first = frame.filter(pl.col("portfolio_id") == BAD).sort(date_col).head(1)
        row = first.with_columns(pl.lit(None, dtype=frame.schema[column]).alias(column))
        if "weight" in row.columns:
            row = row.with_columns(weight=pl.lit(0.0))
        return {**frames, table: pl.concat([frame, row])}

    return mutate


def policy_from(date: dt.date) -> Callable[[Frames], Frames]:
    """Make P2's only policy row set start at ``date``."""

    def mutate(frames: Frames) -> Frames:
        policy = frames["policy"].with_columns(
            effective_from=pl.when(pl.col("portfolio_id") == BAD)
            .then(pl.lit(date))
            .otherwise(pl.col("effective_from"))
        )
        return {**frames, "policy": policy}

    return mutate


def orphan_policy(frames: Frames) -> Frames:
    """Policy rows for a portfolio P4 that has no holdings."""
    extra = (
        frames["policy"]
        .filter(pl.col("portfolio_id") == "P1")
        .with_columns(portfolio_id=pl.lit("P4"))
    )
    return {**frames, "policy": pl.concat([frames["policy"], extra])}


def rename_class(table: str, date: dt.date | None, new: str) -> Callable[[Frames], Frames]:
    """Call P2's ``cash`` rows ``new`` (on ``date`` only, or on every date when None)."""

    def mutate(frames: Frames) -> Frames:
        frame = frames[table]
        where = (pl.col("portfolio_id") == BAD) & (pl.col("asset_class") == "cash")
        if date is not None:
            date_col = "as_of" if table == "holdings" else "period_end"
            where &= pl.col(date_col) == date
        renamed = pl.when(where).then(pl.lit(new)).otherwise(pl.col("asset_class"))
        return {**frames, table: frame.with_columns(renamed.alias("asset_class"))}

    return mutate


def move_date(table: str, old: dt.date, new: dt.date) -> Callable[[Frames], Frames]:
    """Move every P2 row of ``table`` dated ``old`` to ``new``."""

    def mutate(frames: Frames) -> Frames:
        frame = frames[table]
        date_col = "as_of" if table == "holdings" else "period_end"
        where = (pl.col("portfolio_id") == BAD) & (pl.col(date_col) == old)
        moved = pl.when(where).then(pl.lit(new)).otherwise(pl.col(date_col))
        return {**frames, table: frame.with_columns(moved.alias(date_col))}

    return mutate


def shift_weight(table: str, delta: float) -> Callable[[Frames], Frames]:
    """Add ``delta`` to P2's equity weight (in March for holdings, in its only set for policy)."""

    def mutate(frames: Frames) -> Frames:
        frame = frames[table]
        if table == "holdings":
            where = _key("holdings")
        else:
            where = (pl.col("portfolio_id") == BAD) & (pl.col("asset_class") == "equity")
        new = pl.when(where).then(pl.col("weight") + delta).otherwise(pl.col("weight"))
        return {**frames, table: frame.with_columns(new.alias("weight"))}

    return mutate


def drop_holdings_dates(dates: tuple[dt.date, ...]) -> Callable[[Frames], Frames]:
    """Remove P2's holdings on ``dates`` (weights must then drift through the gap)."""

    def mutate(frames: Frames) -> Frames:
        frame = frames["holdings"]
        gone = (pl.col("portfolio_id") == BAD) & pl.col("as_of").is_in(list(dates))
        return {**frames, "holdings": frame.filter(~gone)}

    return mutate


# --- checks of the figures behind a warning -----------------------------------------------


def selection_null_where_missing(out: Path) -> None:
    effects = pl.read_parquet(out / "effects.parquet")
    row = effects.filter(_key("effects", cls="bonds"))
    assert row.height == 1
    assert row["selection"][0] is None  # never silently zero
    others = effects.filter(pl.col("portfolio_id") == BAD).drop_nulls("selection")
    assert others.height == effects.filter(pl.col("portfolio_id") == BAD).height - 1
    summary = pl.read_parquet(out / "summary.parquet").filter(pl.col("portfolio_id") == BAD)
    assert summary["n_selection_missing"][0] == 1


GAP = (dt.date(2020, 4, 30), dt.date(2020, 5, 31))


def drifted_through_gap(out: Path) -> None:
    series = pl.read_parquet(out / "series.parquet").filter(pl.col("portfolio_id") == BAD)
    drifted = series.filter(pl.col("is_drifted"))["period_start"].to_list()
    assert drifted == list(GAP)
    summary = pl.read_parquet(out / "summary.parquet").filter(pl.col("portfolio_id") == BAD)
    assert summary["n_drifted_periods"][0] == len(GAP)


def computed_return_stands_in(out: Path) -> None:
    series = pl.read_parquet(out / "series.parquet")
    row = series.filter((pl.col("portfolio_id") == BAD) & (pl.col("period_end") == MARCH))
    assert row["portfolio_return"][0] == row["computed_return"][0]
    assert row["residual"][0] == 0.0
    summary = pl.read_parquet(out / "summary.parquet").filter(pl.col("portfolio_id") == BAD)
    assert summary["return_source"][0] == "reported"


def orphan_not_evaluated(out: Path) -> None:
    summary = pl.read_parquet(out / "summary.parquet")
    assert "P4" not in summary["portfolio_id"].to_list()


def leveraged_ruin(frames: Frames) -> Frames:
    """P2 holds 300 % equity financed by −200 % cash over March, when its equity segment loses
    60 %: a computed period return of about −180 % (negative weights are allowed)."""
    out = dict(frames)
    feb = dt.date(2020, 2, 29)
    weights = {"equity": 3.0, "bonds": 0.0, "cash": -2.0}
    out["holdings"] = frames["holdings"].with_columns(
        weight=pl.when((pl.col("portfolio_id") == BAD) & (pl.col("as_of") == feb))
        .then(pl.col("asset_class").replace_strict(weights, return_dtype=pl.Float64))
        .otherwise(pl.col("weight"))
    )
    out["segment_returns"] = frames["segment_returns"].with_columns(
        **{
            "return": pl.when(_key("segment_returns")).then(-0.6).otherwise(pl.col("return")),
        }
    )
    out["portfolio_returns"] = frames["portfolio_returns"].filter(pl.col("portfolio_id") != BAD)
    return out


def with_values(extra: list[tuple[str, dt.date, float | None]], *, skip_bad_first: bool = False):
    """A portfolio_values table (every portfolio valued at 1e6 from the first start) plus
    ``extra`` rows; with ``skip_bad_first`` the damaged portfolio's first value is left out."""

    def mutate(frames: Frames) -> Frames:
        rows = [
            (pid, FIRST_START, 1e6) for pid in PORTFOLIOS if not (skip_bad_first and pid == BAD)
        ]
        values = pl.DataFrame(
            rows + extra,
            schema={"portfolio_id": pl.String, "as_of": pl.Date, "value": pl.Float64},
            orient="row",
        )
        return {**frames, "portfolio_values": values}

    return mutate


@dataclass(frozen=True)
class IssueCase:
    """One minimal bad input and what the data_issues row must say about it."""

    code: str
    table: str
    mutate: Callable[[Frames], Frames]
    words: tuple[str, ...]  # the message must name these (table, column, key, …)
    period_end: dt.date | None = None
    asset_class: str | None = None
    portfolio: str = BAD
    check: Callable[[Path], None] | None = field(default=None)

    @property
    def id(self) -> str:
        return f"{self.code}-{self.table}"


CASES = (
    IssueCase(
        "value_invalid",
        "portfolio_values",
        with_values([(BAD, dt.date(2020, 2, 29), -5.0)]),
        ("portfolio_values", BAD, "-5.0", "2020-02-29", "positive"),
        dt.date(2020, 2, 29),
    ),
    IssueCase(
        "value_duplicate",
        "portfolio_values",
        with_values([(BAD, dt.date(2020, 2, 29), 2e6), (BAD, dt.date(2020, 2, 29), 3e6)]),
        ("portfolio_values", BAD, "2020-02-29", "more than one"),
        dt.date(2020, 2, 29),
    ),
    IssueCase(
        "value_missing",
        "portfolio_values",
        with_values([(BAD, dt.date(2020, 2, 29), 2e6)], skip_bad_first=True),
        ("portfolio_values", BAD, "2 period(s)", "2020-01-31"),
        dt.date(2020, 1, 31),
    ),
    IssueCase(
        "period_return_below_minus_100",
        "holdings",
        leveraged_ruin,
        (BAD, "2020-03-31", "-100 %"),
        MARCH,
    ),
    IssueCase(
        "missing_key", "holdings", append_null_key("holdings", "as_of"), ("holdings", BAD, "as_of")
    ),
    IssueCase(
        "missing_key",
        "policy",
        append_null_key("policy", "asset_class"),
        ("policy", BAD, "asset_class"),
    ),
    IssueCase(
        "missing_key",
        "segment_returns",
        append_null_key("segment_returns", "period_end"),
        ("segment_returns", BAD, "period_end"),
    ),
    IssueCase(
        "missing_key",
        "portfolio_returns",
        append_null_key("portfolio_returns", "period_end"),
        ("portfolio_returns", BAD, "period_end"),
    ),
    IssueCase(
        "duplicate_key",
        "holdings",
        duplicate_row("holdings"),
        ("holdings", BAD, "2020-03-31", "equity", "as_of"),
        MARCH,
        "equity",
    ),
    IssueCase(
        "duplicate_key",
        "policy",
        duplicate_row("policy", date=FIRST_START),
        ("policy", BAD, "2019-12-31", "equity", "effective_from"),
        None,
        "equity",
    ),
    IssueCase(
        "duplicate_key",
        "segment_returns",
        duplicate_row("segment_returns"),
        ("segment_returns", BAD, "2020-03-31", "equity", "period_end"),
        MARCH,
        "equity",
    ),
    IssueCase(
        "duplicate_key",
        "portfolio_returns",
        duplicate_row("portfolio_returns", cls=None),
        ("portfolio_returns", BAD, "2020-03-31", "period_end"),
        MARCH,
    ),
    IssueCase(
        "nonfinite_value",
        "holdings",
        set_value("holdings", "weight", float("nan")),
        ("holdings", BAD, "2020-03-31", "equity", "'weight'", "NaN"),
        MARCH,
        "equity",
    ),
    IssueCase(
        "nonfinite_value",
        "policy",
        set_value("policy", "weight", float("inf"), date=FIRST_START),
        ("policy", BAD, "equity", "'weight'", "inf"),
        None,
        "equity",
    ),
    IssueCase(
        "nonfinite_value",
        "segment_returns",
        set_value("segment_returns", "return", float("nan")),
        ("segment_returns", BAD, "2020-03-31", "equity", "'return'", "NaN"),
        MARCH,
        "equity",
    ),
    IssueCase(
        "nonfinite_value",
        "portfolio_returns",
        set_value("portfolio_returns", "return", None, cls=None),
        ("portfolio_returns", BAD, "2020-03-31", "'return'", "empty"),
        MARCH,
    ),
    IssueCase(
        "return_below_minus_100",
        "segment_returns",
        set_value("segment_returns", "return", -1.0),
        ("segment_returns", BAD, "2020-03-31", "equity", "-1.0", "above -1"),
        MARCH,
        "equity",
    ),
    IssueCase(
        "return_below_minus_100",
        "portfolio_returns",
        set_value("portfolio_returns", "return", -1.5, cls=None),
        ("portfolio_returns", BAD, "2020-03-31", "-1.5", "above -1"),
        MARCH,
    ),
    IssueCase(
        "off_calendar_date",
        "holdings",
        move_date("holdings", MARCH, OFF_DAY),
        ("holdings", BAD, "as_of", "2020-03-15", "calendar"),
        OFF_DAY,
    ),
    IssueCase(
        "off_calendar_date",
        "segment_returns",
        move_date("segment_returns", MARCH, OFF_DAY),
        ("segment_returns", BAD, "period_end", "2020-03-15", "calendar"),
        OFF_DAY,
    ),
    IssueCase(
        "off_calendar_date",
        "portfolio_returns",
        move_date("portfolio_returns", MARCH, OFF_DAY),
        ("portfolio_returns", BAD, "period_end", "2020-03-15", "calendar"),
        OFF_DAY,
    ),
    IssueCase(
        "unknown_asset_class",
        "holdings",
        rename_class("holdings", MARCH, "gold"),
        ("holdings", BAD, "asset_class", "gold", "index_returns"),
        None,
        "gold",
    ),
    IssueCase(
        "unknown_asset_class",
        "policy",
        rename_class("policy", None, "gold"),
        ("policy", BAD, "asset_class", "gold", "index_returns"),
        None,
        "gold",
    ),
    IssueCase(
        "unknown_asset_class",
        "segment_returns",
        rename_class("segment_returns", MARCH, "gold"),
        ("segment_returns", BAD, "asset_class", "gold", "index_returns"),
        None,
        "gold",
    ),
    IssueCase(
        "weights_not_summing",
        "holdings",
        shift_weight("holdings", 0.01),
        ("holdings", BAD, "2020-03-31", "1.01", "expected 1 within 0.0001"),
        MARCH,
    ),
    IssueCase(
        "weights_not_summing",
        "policy",
        shift_weight("policy", -0.05),
        ("policy", BAD, "2019-12-31", "0.95", "expected 1 within 0.0001"),
    ),
    IssueCase(
        "no_policy_in_force",
        "policy",
        policy_from(dt.date(2020, 6, 30)),
        ("policy", BAD, "6 period(s)", "2019-12-31", "effective_from"),
    ),
    IssueCase(
        "no_holdings",
        "policy",
        orphan_policy,
        ("P4", "holdings"),
        portfolio="P4",
        check=orphan_not_evaluated,
    ),
    IssueCase(
        "segment_return_missing",
        "segment_returns",
        drop_rows("segment_returns", cls="bonds"),
        ("segment_returns", BAD, "bonds", "2020-03-31", "selection is null"),
        MARCH,
        "bonds",
        check=selection_null_where_missing,
    ),
    IssueCase(
        "holdings_gap",
        "holdings",
        drop_holdings_dates(GAP),
        ("holdings", BAD, "3 periods", "2020-06-30", "drifted"),
        dt.date(2020, 6, 30),
        check=drifted_through_gap,
    ),
    IssueCase(
        "reported_return_missing",
        "portfolio_returns",
        drop_rows("portfolio_returns", cls=None),
        ("portfolio_returns", BAD, "2020-03-31", "computed return"),
        MARCH,
        check=computed_return_stands_in,
    ),
)


@pytest.fixture(scope="module")
def clean_summary(tmp_path_factory: pytest.TempPathFactory) -> pl.DataFrame:
    """The summary of the undamaged roster, for comparing the portfolios left alone."""
    ws = Workspace(tmp_path_factory.mktemp("clean"))
    ws.good_run(ws.root / "out")
    return pl.read_parquet(ws.root / "out" / "summary.parquet")


def test_every_code_has_a_case() -> None:
    covered = {case.code for case in CASES}
    assert covered == set(ISSUE_CODES) - NOT_HERE


@pytest.mark.parametrize("case", CASES, ids=lambda c: c.id)
def test_issue_code(ws: Workspace, case: IssueCase, clean_summary: pl.DataFrame) -> None:
    out = ws.root / "out"
    result = ws.invoke(ws.run_args(ws.write(case.mutate(ws.frames)), out))
    assert "Traceback" not in result.stderr
    assert result.stderr == ""

    severity = ISSUE_CODES[case.code][0]
    issues = pl.read_parquet(out / "data_issues.parquet")
    rows = issues.filter(pl.col("code") == case.code)
    assert rows.height >= 1, issues
    assert set(rows["portfolio_id"]) == {case.portfolio}
    assert set(rows["severity"]) == {severity}
    for message in rows["message"]:
        for word in case.words:
            assert word in message, (word, message)
    if case.period_end is not None:
        assert case.period_end in rows["period_end"].to_list()
    if case.asset_class is not None:
        assert case.asset_class in rows["asset_class"].to_list()

    summary = pl.read_parquet(out / "summary.parquet")
    ran = set(summary["portfolio_id"])
    untouched = [p for p in PORTFOLIOS if p != case.portfolio]
    if severity == "error":
        assert result.exit_code == 3, result.output
        assert ran == set(untouched)
        effects = pl.read_parquet(out / "effects.parquet")
        assert case.portfolio not in set(effects["portfolio_id"])
    else:
        assert result.exit_code == 0, result.output
        assert ran == set(PORTFOLIOS)
    # The portfolios left alone get exactly the figures of a clean run.
    assert_frame_equal(
        summary.filter(pl.col("portfolio_id").is_in(untouched)),
        clean_summary.filter(pl.col("portfolio_id").is_in(untouched)),
    )
    if case.check is not None:
        case.check(out)


@pytest.mark.parametrize("case", CASES, ids=lambda c: c.id)
def test_validate_matches_run(ws: Workspace, case: IssueCase) -> None:
    """``validate`` lists the codes a run would record and exits as the run would."""
    paths = ws.write(case.mutate(ws.frames))
    before = snapshot(ws.root)
    checked = ws.invoke(["validate", *ws.input_args(paths)])
    assert snapshot(ws.root) == before  # validate writes nothing
    assert "Traceback" not in checked.stderr

    out = ws.root / "out"
    ran = ws.invoke(ws.run_args(paths, out))
    assert checked.exit_code == ran.exit_code
    run_codes = set(pl.read_parquet(out / "data_issues.parquet")["code"])
    assert case.code in run_codes
    # validate checks inputs only: the timing layer's warnings come from the run alone.
    for code in run_codes - NOT_HERE:
        assert code in checked.stdout, (code, checked.stdout)


def test_validate_clean_roster(ws: Workspace) -> None:
    paths = ws.write()
    before = snapshot(ws.root)
    result = ws.invoke(["validate", *ws.input_args(paths)])
    assert result.exit_code == 0
    assert f"{len(PORTFOLIOS)} portfolio(s) would run, 0 would be skipped; 0 issue(s)" in (
        result.stdout
    )
    assert snapshot(ws.root) == before


def test_every_portfolio_skipped_exits_3(ws: Workspace) -> None:
    """When no portfolio can run, the run still finishes, writes its issues and exits 3."""
    frames = dict(ws.frames)
    frames["holdings"] = frames["holdings"].with_columns(weight=pl.col("weight") * 2.0)
    out = ws.root / "out"
    result = ws.invoke(ws.run_args(ws.write(frames), out))
    assert result.exit_code == 3, result.output + result.stderr
    assert pl.read_parquet(out / "summary.parquet").height == 0
    issues = pl.read_parquet(out / "data_issues.parquet")
    assert set(issues["portfolio_id"]) == set(PORTFOLIOS)
    assert set(issues["code"]) == {"weights_not_summing"}
    # One issue per portfolio and holdings date, each date summing to 2.
    assert issues.height == ws.frames["holdings"].select("portfolio_id", "as_of").n_unique()


def test_timing_warning_through_the_command_line(ws) -> None:
    """The tiny roster has 12 months and a riskless series: every timing test needs more
    (24 observations, 12 decisions for merton_accuracy), so each portfolio gets
    ``test_too_few_periods`` warnings, the run still exits 0 and the rows are null."""
    out = ws.root / "out"
    result = ws.invoke(ws.run_args(ws.write(), out))
    assert result.exit_code == 0, result.output + result.stderr
    issues = pl.read_parquet(out / "data_issues.parquet").filter(
        pl.col("code") == "test_too_few_periods"
    )
    assert issues.height > 0
    assert set(issues["severity"].to_list()) == {"warning"}
    assert set(issues["portfolio_id"].to_list()) == {"P1", "P2", "P3"}
    assert issues["message"].str.contains("exposure_regression").any()
    tests = pl.read_parquet(out / "timing_tests.parquet")
    short = tests.filter(pl.col("test") == "exposure_regression")
    assert short["p_value"].null_count() == short.height
