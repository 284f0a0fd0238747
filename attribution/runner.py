"""The local runner: read, validate, decompose, link and summarise a roster, shard by shard.

Portfolios are processed in shards (sorted ids, ``shard_size`` at a time): each shard's rows
are read from the inputs with a filter on ``portfolio_id``, so peak memory follows the
shard, not the roster. Tables shared by all portfolios (index_returns, riskfree) are read
and checked once. The numerics live in :mod:`attribution.kernel`,
:mod:`attribution.linking` and :mod:`attribution.summary`; this module wires them in the
order DESIGN §2–§5 asks for and records what happened.
"""

from __future__ import annotations

import dataclasses
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import polars as pl
import pyarrow as pa

from attribution.calendar import Calendar, align_dates, build_calendar
from attribution.decompose import EFFECTS_ORDER, SERIES_ORDER, run_shard
from attribution.errors import EXIT_OK, EXIT_SKIPPED, OptionError, ReadError
from attribution.load import TableReader, TableSource
from attribution.money import money_tables
from attribution.options import RunOptions
from attribution.summary import summary_frame, windows_frame
from attribution.timing import TimingOptions, TimingResult, combine_timing, evaluate_timing
from attribution.validate import (
    check_index_returns,
    check_riskfree,
    empty_issues,
    orphan_issues,
)

PID = "portfolio_id"
#: Portfolios per shard: ~1.7 GiB peak for 12 classes x 240 periods; bigger shards mostly
#: add memory (page faults on fresh arrays), not speed.
DEFAULT_SHARD_SIZE = 1000
PORTFOLIO_TABLES = ("holdings", "policy", "segment_returns", "portfolio_returns")
DATE_COLUMNS = {
    "holdings": "as_of",
    "index_returns": "period_end",
    "policy": "effective_from",
    "riskfree": "period_end",
    "segment_returns": "period_end",
    "portfolio_returns": "period_end",
    "portfolio_values": "as_of",
}


@dataclass(frozen=True)
class SharedInputs:
    """The tables every portfolio uses, checked: calendar, index returns, riskless series."""

    calendar: Calendar
    index_returns: pl.DataFrame
    riskless: pl.DataFrame | None


@dataclass(frozen=True)
class RunResult:
    """Everything one run produces, as polars frames, plus its bookkeeping.

    ``effects`` is None when the run streamed it to a file (``effects_file``) instead of
    holding the roster's largest table in memory.
    """

    effects: pl.DataFrame | None
    summary: pl.DataFrame
    summary_windows: pl.DataFrame
    series: pl.DataFrame
    data_issues: pl.DataFrame
    calendar: Calendar
    options: RunOptions
    skipped: tuple[str, ...]
    timings: dict[str, float] = field(default_factory=dict)
    extra_tables: dict[str, pl.DataFrame] = field(default_factory=dict)
    notes: tuple[str, ...] = ()
    sources: dict[str, Any] = field(default_factory=dict, repr=False)

    def with_sources(self, sources: Mapping[str, Any]) -> RunResult:
        """The same result remembering its inputs (for the manifest of :meth:`write`)."""
        return dataclasses.replace(self, sources=dict(sources))

    def write(self, out_dir: str | Path) -> Path:
        """Write every table, results.duckdb and manifest.json into ``out_dir`` atomically,
        exactly as ``tiltaudit run`` does."""
        from attribution.api import write_result

        return write_result(self, out_dir, self.sources)

    def _repr_html_(self) -> str:
        """A compact notebook view: the summary table and the data issues."""
        import html

        cols = ["portfolio_id", "n_periods", "return_source", "active_return"]
        cols += ["static_allocation", "timing", "selection", "residual"]
        cols += [c for c in ("timing_evidence",) if c in self.summary.columns]
        head = "".join(f"<th>{html.escape(c)}</th>" for c in cols)
        rows = []
        for row in self.summary.select(cols).iter_rows():
            cells = []
            for value in row:
                text = f"{value:+.4%}" if isinstance(value, float) else str(value)
                cells.append(f"<td>{html.escape(text)}</td>")
            rows.append("<tr>" + "".join(cells) + "</tr>")
        n_issues = self.data_issues.height
        return (
            f"<div><strong>tiltaudit</strong>: {self.summary.height} portfolio(s) run, "
            f"{len(self.skipped)} skipped, {n_issues} data issue(s); linking "
            f"{html.escape(self.options.linking)}."
            f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(rows)}</tbody></table>"
            "<small>Statistical evidence is not proof of skill; short records have little "
            "power; past results do not guarantee future ones; not investment advice.</small>"
            "</div>"
        )

    @property
    def exit_code(self) -> int:
        """0 when every portfolio ran (warnings allowed), 3 when any was skipped."""
        return EXIT_SKIPPED if self.skipped or self.summary.height == 0 else EXIT_OK

    def tables(self) -> dict[str, pl.DataFrame]:
        """The output tables held in memory, by their contract names (DESIGN §5)."""
        out = {} if self.effects is None else {"effects": self.effects}
        out.update(
            {
                "summary": self.summary,
                "summary_windows": self.summary_windows,
                "series": self.series,
                "data_issues": self.data_issues,
            }
        )
        out.update(self.extra_tables)
        return out


def _aligned(frame: pl.DataFrame, table: str, options: RunOptions) -> pl.DataFrame:
    if options.align == "none":
        return frame
    return frame.with_columns(align_dates(DATE_COLUMNS[table], options.align))


def load_shared(readers: Mapping[str, TableReader], options: RunOptions) -> SharedInputs:
    """Read and check index_returns and riskfree; build the calendar (exit 2 on problems)."""
    index_returns = _aligned(readers["index_returns"].read_all(), "index_returns", options)
    check_index_returns(index_returns)
    calendar = build_calendar(index_returns["period_end"])
    riskless = None
    if "riskfree" in readers:
        rf = _aligned(readers["riskfree"].read_all(), "riskfree", options)
        riskless = check_riskfree(rf, calendar)
    classes = sorted(index_returns["asset_class"].unique().to_list())
    if options.cash_class is not None:
        if options.cash_class not in classes:
            msg = (
                f"The 'cash_class' option names {options.cash_class!r}, which index_returns "
                f"does not carry; its classes are {classes}."
            )
            raise OptionError(msg)
        if riskless is None:
            riskless = (
                index_returns.filter(pl.col("asset_class") == options.cash_class)
                .select("period_end", "return")
                .sort("period_end")
            )
    if options.market != "policy" and options.market not in classes:
        msg = (
            f"The 'market' option must be 'policy' or an asset class of index_returns "
            f"({classes}). Got {options.market!r} instead."
        )
        raise OptionError(msg)
    return SharedInputs(calendar=calendar, index_returns=index_returns, riskless=riskless)


def open_readers(sources: Mapping[str, TableSource | None]) -> dict[str, TableReader]:
    """A reader per given table; the three required tables must be present."""
    for table in ("holdings", "index_returns", "policy"):
        if sources.get(table) is None:
            flag = "--" + table.replace("_", "-")
            msg = f"{table}: this table is required (give it with {flag})."
            raise ReadError(msg)
    return {name: TableReader(src, name) for name, src in sources.items() if src is not None}


def _sort_issues(issues: pl.DataFrame) -> pl.DataFrame:
    return issues.unique(maintain_order=True).sort(
        PID, "severity", "code", "period_end", "asset_class", "message", nulls_last=True
    )


@dataclass(frozen=True)
class Prepared:
    """Opened readers and the checked shared tables: what is known before any shard runs.

    ``timing`` holds the validated timing-test options, or None with ``timing_note`` saying
    why the timing tests will not run.
    """

    readers: dict[str, TableReader]
    shared: SharedInputs
    timing: TimingOptions | None = None
    timing_note: str | None = None
    values: pl.DataFrame | None = None


def timing_options(options: RunOptions) -> TimingOptions:
    """The timing layer's options, taken from the run's options (validated on creation)."""
    return TimingOptions(
        market=options.market,
        exposure=options.exposure,
        cash_class=options.cash_class,
        beta_window=options.beta_window,
        pcm_lag=options.pcm_lag,
        tests="exact" if options.tests == "exact" else "all",
        draws=options.draws,
        seed=options.seed,
        reference_hit_rate=options.reference_hit_rate,
        reference_power=options.reference_power,
    )


def prepare(sources: Mapping[str, TableSource | None], options: RunOptions) -> Prepared:
    """Open every input and check the shared tables; raises on whole-input problems.

    Done before the output folder is touched, so bad input (exit 2) writes nothing.
    """
    readers = open_readers(sources)
    shared = load_shared(readers, options)
    timing = timing_options(options)  # bad timing options fail here too (exit 2)
    note = None
    if options.tests == "none":
        timing, note = None, "timing tests not run: --tests none"
    elif shared.riskless is None:
        timing = None
        note = "timing tests not run: no riskless source (give --riskfree or --cash-class)"
    values = None
    if "portfolio_values" in readers:
        values = _aligned(readers["portfolio_values"].read_all(), "portfolio_values", options)
    return Prepared(readers=readers, shared=shared, timing=timing, timing_note=note, values=values)


def run_roster(
    sources: Mapping[str, TableSource | None] | Prepared,
    options: RunOptions,
    *,
    shard_size: int = DEFAULT_SHARD_SIZE,
    effects_sink: Callable[[Callable[[], pa.Table]], None] | None = None,
    progress: Callable[[int, int], None] | None = None,
) -> RunResult:
    """Run the decomposition, linking and summaries for every portfolio that can run.

    Whole-input problems raise (exit 2); portfolio problems become ``data_issues`` rows.
    With ``effects_sink`` each shard's effects table is handed over, as the function that
    builds it (pyarrow; the sink may call it on its own thread), and not kept.
    ``progress(done, total)`` is called once before the first shard (done = 0) and after
    every shard, with portfolios counted.
    """
    timings: dict[str, float] = {"read_and_validate": 0.0, "decompose": 0.0, "summarise": 0.0}
    clock = time.perf_counter()
    prepared = sources if isinstance(sources, Prepared) else prepare(sources, options)
    readers, shared = prepared.readers, prepared.shared
    held = readers["holdings"].portfolio_ids()
    if held.len() == 0:
        msg = "holdings: the table has no rows; expected at least one portfolio's weights."
        raise ReadError(msg)
    others = [readers[n].portfolio_ids() for n in PORTFOLIO_TABLES[1:] if n in readers]
    if prepared.values is not None:
        others.append(prepared.values.get_column(PID).drop_nulls().unique())
    issues = [empty_issues(), orphan_issues(held, others)]
    timings["read_and_validate"] += time.perf_counter() - clock

    ids = held.to_list()
    effects_parts: list[pl.DataFrame] = []
    series_parts, summary_parts, window_parts = [], [], []
    timing_parts: list[TimingResult] = []
    skipped: list[str] = []
    ppy = shared.calendar.periods_per_year
    if progress is not None:
        progress(0, len(ids))
    for start in range(0, len(ids), shard_size):
        shard = ids[start : start + shard_size]
        clock = time.perf_counter()
        tables = {
            name: _aligned(readers[name].read_shard(shard), name, options)
            if name in readers
            else None
            for name in PORTFOLIO_TABLES
        }
        timings["read_and_validate"] += time.perf_counter() - clock
        clock = time.perf_counter()
        part = run_shard(tables, shared.calendar, shared.index_returns, options)
        timings["decompose"] += time.perf_counter() - clock
        clock = time.perf_counter()
        summary_parts.append(
            summary_frame(part.periods, linking=options.linking, periods_per_year=ppy)
        )
        window_parts.append(
            windows_frame(part.periods, linking=options.linking, periods_per_year=ppy)
        )
        timings["summarise"] += time.perf_counter() - clock
        series_parts.append(part.series)
        issues.append(part.issues)
        skipped.extend(part.skipped)
        shard_effects = None if effects_sink is not None else part.effects
        if effects_sink is not None:
            effects_sink(part.effects_table)
        else:
            effects_parts.append(part.effects)
        if prepared.timing is not None:
            clock = time.perf_counter()
            assert shared.riskless is not None
            # The battery works on padded arrays where NaN marks "not available" (periods
            # outside a record, undefined tests); numpy's warnings about NaN arithmetic there
            # are expected, and every such row is reported through its own issue code.
            with np.errstate(invalid="ignore", divide="ignore"):
                found = evaluate_timing(
                    part.effects if shard_effects is None else shard_effects,
                    part.series,
                    shared.index_returns,
                    shared.riskless,
                    options=prepared.timing,
                )
            timing_parts.append(found)
            timings["timing_tests"] = timings.get("timing_tests", 0.0) + (
                time.perf_counter() - clock
            )
        if progress is not None:
            progress(min(start + shard_size, len(ids)), len(ids))
    effects = (
        pl.concat(effects_parts)
        if effects_parts
        else None
        if effects_sink is not None
        else pl.DataFrame(schema={c: pl.Float64 for c in EFFECTS_ORDER})
    )
    summary = pl.concat(summary_parts)
    series = pl.concat(series_parts).select(SERIES_ORDER)
    extra: dict[str, pl.DataFrame] = {}
    notes = () if prepared.timing_note is None else (prepared.timing_note,)
    if prepared.timing is not None and timing_parts:
        found = combine_timing(timing_parts, prepared.timing)
        summary = summary.join(found.verdicts, on=PID, how="left")
        series = series.join(found.series_extra, on=[PID, "period_end"], how="left")
        issues.append(found.issues)
        extra = {
            "timing_tests": found.timing_tests,
            "roster": found.roster,
            "power": found.power,
        }
    if prepared.values is not None:
        clock = time.perf_counter()
        money = money_tables(series, prepared.values, linking=options.linking)
        extra.update(money.tables())
        issues.append(money.issues)
        timings["money"] = time.perf_counter() - clock
    return RunResult(
        effects=effects,
        summary=summary,
        summary_windows=pl.concat(window_parts),
        series=series,
        data_issues=_sort_issues(pl.concat(issues)),
        calendar=shared.calendar,
        options=options,
        skipped=tuple(sorted(skipped)),
        timings=timings,
        extra_tables=extra,
        notes=notes,
    )
