"""The local runner: read, validate, decompose, link and summarise a roster in one pass.

The numerics live in their own modules (:mod:`~attribution.decompose`,
:mod:`~attribution.linking`, :mod:`~attribution.summary`); this module only wires them
together in the order DESIGN §2–§5 asks for and records what happened.
"""

from __future__ import annotations

import time
from collections.abc import Mapping
from dataclasses import dataclass, field

import polars as pl

from attribution.calendar import Calendar, align_dates, build_calendar
from attribution.decompose import decompose, holdings_windows, policy_assignment
from attribution.errors import EXIT_OK, EXIT_SKIPPED, OptionError, ReadError
from attribution.load import TableSource, read_inputs
from attribution.options import RunOptions
from attribution.summary import summarise, summarise_windows
from attribution.validate import (
    check_index_returns,
    check_portfolio_tables,
    check_riskfree,
    empty_issues,
    skipped_portfolios,
)

PID = "portfolio_id"
_DATE_COLUMNS = {
    "holdings": "as_of",
    "index_returns": "period_end",
    "policy": "effective_from",
    "riskfree": "period_end",
    "segment_returns": "period_end",
    "portfolio_returns": "period_end",
}
SERIES_ORDER = (
    "portfolio_id",
    "period_end",
    "period_start",
    "return_source",
    "portfolio_return",
    "computed_return",
    "policy_return",
    "active_return",
    "static_allocation",
    "timing",
    "selection",
    "interaction",
    "residual",
    "is_drifted",
    "cum_portfolio_return",
    "cum_policy_return",
    "cum_active_return",
    "cum_static_allocation",
    "cum_timing",
    "cum_selection",
    "cum_interaction",
    "cum_residual",
)


@dataclass(frozen=True)
class Checked:
    """Validated inputs: the tables, the calendar, the issues and who is skipped."""

    tables: dict[str, pl.DataFrame | None]
    calendar: Calendar
    riskless: pl.DataFrame | None
    periods: pl.DataFrame
    issues: pl.DataFrame
    skipped: tuple[str, ...]
    portfolios: tuple[str, ...]


@dataclass(frozen=True)
class RunResult:
    """Everything one run produces, as polars frames, plus its bookkeeping."""

    effects: pl.DataFrame
    summary: pl.DataFrame
    summary_windows: pl.DataFrame
    series: pl.DataFrame
    data_issues: pl.DataFrame
    calendar: Calendar
    options: RunOptions
    skipped: tuple[str, ...]
    timings: dict[str, float] = field(default_factory=dict)
    extra_tables: dict[str, pl.DataFrame] = field(default_factory=dict)

    @property
    def exit_code(self) -> int:
        """0 when every portfolio ran (warnings allowed), 3 when any was skipped."""
        return EXIT_SKIPPED if self.skipped or self.summary.height == 0 else EXIT_OK

    def tables(self) -> dict[str, pl.DataFrame]:
        """The output tables by their contract names (DESIGN §5)."""
        out = {
            "effects": self.effects,
            "summary": self.summary,
            "summary_windows": self.summary_windows,
            "series": self.series,
            "data_issues": self.data_issues,
        }
        out.update(self.extra_tables)
        return out


def _sort_issues(issues: pl.DataFrame) -> pl.DataFrame:
    return issues.unique(maintain_order=True).sort(
        PID, "severity", "code", "period_end", "asset_class", "message", nulls_last=True
    )


def check_inputs(sources: Mapping[str, TableSource | None], options: RunOptions) -> Checked:
    """Read and validate the inputs; raise on whole-input problems (exit 2).

    Returns the tables restricted to the portfolios that can run, the calendar, the
    riskless series (from ``riskfree`` or the ``cash_class`` index) and every data issue.
    """
    tables = read_inputs(sources)
    if options.align != "none":
        tables = {
            name: None
            if frame is None
            else frame.with_columns(align_dates(_DATE_COLUMNS[name], options.align))
            for name, frame in tables.items()
        }
    index_returns = tables["index_returns"]
    holdings = tables["holdings"]
    assert index_returns is not None
    assert holdings is not None
    if holdings.height == 0:
        msg = "holdings: the table has no rows; expected at least one portfolio's weights."
        raise ReadError(msg)
    check_index_returns(index_returns)
    calendar = build_calendar(index_returns["period_end"])
    riskless = None
    if tables["riskfree"] is not None:
        riskless = check_riskfree(tables["riskfree"], calendar)
    classes = set(index_returns["asset_class"].to_list())
    if options.cash_class is not None:
        if options.cash_class not in classes:
            msg = (
                f"The 'cash_class' option names {options.cash_class!r}, which index_returns "
                f"does not carry; its classes are {sorted(classes)}."
            )
            raise OptionError(msg)
        if riskless is None:
            riskless = index_returns.filter(pl.col("asset_class") == options.cash_class).select(
                "period_end", "return"
            )
    if options.market != "policy" and options.market not in classes:
        msg = (
            f"The 'market' option must be 'policy' or an asset class of index_returns "
            f"({sorted(classes)}). Got {options.market!r} instead."
        )
        raise OptionError(msg)
    issues = check_portfolio_tables(tables, calendar, weight_tolerance=options.weight_tolerance)
    skipped = set(skipped_portfolios(issues).to_list())

    def keep(frame: pl.DataFrame | None) -> pl.DataFrame | None:
        if frame is None or PID not in frame.columns:
            return frame
        return frame.filter(~pl.col(PID).is_in(list(skipped)))

    kept = {name: keep(frame) for name, frame in tables.items()}
    assert kept["holdings"] is not None
    assert kept["policy"] is not None
    windows, gap_issues = holdings_windows(kept["holdings"], calendar)
    periods, policy_issues = policy_assignment(windows, kept["policy"], calendar)
    more = set(policy_issues[PID].to_list())
    skipped |= more
    kept = {name: keep(frame) for name, frame in kept.items()}
    periods = periods.filter(~pl.col(PID).is_in(list(more)))
    all_issues = pl.concat([empty_issues(), issues, gap_issues, policy_issues])
    portfolios = tuple(sorted(set(periods[PID].unique().to_list())))
    return Checked(
        tables=kept,
        calendar=calendar,
        riskless=riskless,
        periods=periods,
        issues=all_issues,
        skipped=tuple(sorted(skipped)),
        portfolios=portfolios,
    )


def run_roster(sources: Mapping[str, TableSource | None], options: RunOptions) -> RunResult:
    """Run the decomposition, linking and summaries for every portfolio that can run."""
    timings: dict[str, float] = {}
    clock = time.perf_counter()
    checked = check_inputs(sources, options)
    timings["read_and_validate"] = time.perf_counter() - clock

    clock = time.perf_counter()
    parts = decompose(checked.tables, checked.periods, options)
    timings["decompose"] = time.perf_counter() - clock

    clock = time.perf_counter()
    ppy = checked.calendar.periods_per_year
    series, summary = summarise(parts.periods, linking=options.linking, periods_per_year=ppy)
    windows = summarise_windows(parts.periods, linking=options.linking, periods_per_year=ppy)
    timings["link_and_summarise"] = time.perf_counter() - clock

    issues = _sort_issues(pl.concat([checked.issues, parts.issues]))
    return RunResult(
        effects=parts.effects,
        summary=summary,
        summary_windows=windows,
        series=series.select(SERIES_ORDER),
        data_issues=issues,
        calendar=checked.calendar,
        options=options,
        skipped=checked.skipped,
        timings=timings,
    )
