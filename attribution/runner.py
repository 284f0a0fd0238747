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
from collections.abc import Callable, Iterator, Mapping
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import polars as pl
import pyarrow as pa

# Imported here, on the main thread, before any shard thread starts: importing it
# initialises Arrow's compute functions, which the Parquet writer's dictionary columns call
# ("unique"). Left to the writer threads, the first import raced with a write under way and
# intermittently failed with "No function registered with name: unique".
import pyarrow.compute

from attribution.calendar import Calendar, align_dates, build_calendar
from attribution.decompose import (
    EFFECTS_ORDER,
    SERIES_ORDER,
    ShardResult,
    effects_frame,
    run_shard,
    timing_effects,
)
from attribution.errors import EXIT_OK, EXIT_SKIPPED, OptionError, ReadError
from attribution.incremental import PreviousRun, portfolio_fingerprints, shared_fingerprint
from attribution.load import TableReader, TableSource
from attribution.money import MONEY_INPUT_COLUMNS, money_tables
from attribution.options import RunOptions
from attribution.summary import summary_frame, windows_frame

if TYPE_CHECKING:
    # The timing layer pulls in scipy.stats (about a second to import): a run without
    # timing tests never imports it.
    from attribution.timing import TimingOptions, TimingResult
from attribution.validate import (
    check_index_returns,
    check_riskfree,
    empty_issues,
    orphan_issues,
)

PID = "portfolio_id"
#: What an effects sink receives for a shard (see :func:`run_roster`).
EffectsPart = pa.Table | pl.DataFrame | Callable[[], pa.Table]
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

    ``effects`` and ``series`` are None when the run streamed them to files instead of
    holding the roster's two largest tables in memory.
    """

    effects: pl.DataFrame | None
    summary: pl.DataFrame
    summary_windows: pl.DataFrame
    series: pl.DataFrame | None
    data_issues: pl.DataFrame
    calendar: Calendar
    options: RunOptions
    skipped: tuple[str, ...]
    timings: dict[str, float] = field(default_factory=dict)
    extra_tables: dict[str, pl.DataFrame] = field(default_factory=dict)
    notes: tuple[str, ...] = ()
    sources: dict[str, Any] = field(default_factory=dict, repr=False)
    engine: str = "local"
    engine_version: str | None = None
    fingerprints: pl.DataFrame | None = field(default=None, repr=False)
    shared_fingerprint: str | None = None
    reuse: dict[str, Any] = field(default_factory=dict)

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
        out.update({"summary": self.summary, "summary_windows": self.summary_windows})
        if self.series is not None:
            out["series"] = self.series
        out["data_issues"] = self.data_issues
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
    from attribution.timing import TimingOptions

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
    note = None
    timing = None
    if options.tests == "none":
        # Not validated either: with --tests none the timing options are not used.
        note = "timing tests not run: --tests none"
    else:
        timing = timing_options(options)  # bad timing options fail here (exit 2)
        if shared.riskless is None:
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
    effects_sink: Callable[[EffectsPart], None] | None = None,
    progress: Callable[[int, int], None] | None = None,
    previous: PreviousRun | None = None,
    fingerprints: bool = False,
    series_sink: Callable[[pl.DataFrame], None] | None = None,
) -> RunResult:
    """Run the decomposition, linking and summaries for every portfolio that can run.

    Whole-input problems raise (exit 2); portfolio problems become ``data_issues`` rows.
    With ``effects_sink`` each shard's effects table is handed over and not kept: as the
    function that builds it (pyarrow; the sink may call it on its own thread), as the built
    Arrow table (when the timing tests needed it anyway), or as a polars frame (an
    incremental run's merged rows).
    ``progress(done, total)`` is called once before the first shard (done = 0) and after
    every shard, with portfolios counted. With ``previous`` (an incremental run, see
    :mod:`attribution.incremental`) portfolios whose fingerprint is unchanged are copied from
    the previous run's tables instead of being evaluated; roster-level figures are always
    recomputed. ``fingerprints`` records each portfolio's input fingerprint (implied by
    ``previous``) for the next incremental run. With ``series_sink`` each shard's finished
    ``series`` rows (timing columns included) are handed over and not kept, like the effects:
    the two tables that grow with roster × record then never sit in memory whole.
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
    fingerprint_parts: list[pl.DataFrame] = []
    money_parts: list[pl.DataFrame] = []
    n_reused = 0

    def finish(start: int, kept: list[str], part: ShardResult | None) -> None:
        """Everything after the decomposition of one shard: summaries, timing tests, the
        merge with a previous run, the sinks. Runs on the finishing thread, one shard at a
        time and in shard order, while the caller decomposes the next shard."""
        if previous is None:
            assert part is not None
            clock = time.perf_counter()
            summary_parts.append(
                summary_frame(part.periods, linking=options.linking, periods_per_year=ppy)
            )
            window_parts.append(
                windows_frame(part.periods, linking=options.linking, periods_per_year=ppy)
            )
            timings["summarise"] += time.perf_counter() - clock
            shard_series = part.series
            issues.append(part.issues)
            skipped.extend(part.skipped)
            shard_timing = None
            if prepared.timing is None:
                # The sink builds the Arrow table on its writer thread.
                if effects_sink is not None:
                    effects_sink(part.effects_table)
                else:
                    effects_parts.append(part.effects)
            else:
                # Built once here: the timing layer reads a slim view of it, the sink or the
                # in-memory frame the whole.
                clock = time.perf_counter()
                table = part.effects_table()
                if effects_sink is not None:
                    effects_sink(table)
                else:
                    effects_parts.append(effects_frame(table))
                timings["summarise"] += time.perf_counter() - clock
                clock = time.perf_counter()
                shard_timing = _timing_of(timing_effects(table), part.series, prepared)
                timings["timing_tests"] += time.perf_counter() - clock
        else:
            clock = time.perf_counter()
            merged = _merge_with_previous(part, previous, kept, prepared, options, ppy)
            timings["summarise"] += time.perf_counter() - clock
            summary_parts.append(merged["summary"])
            window_parts.append(merged["summary_windows"])
            shard_series = merged["series"]
            issues.append(merged["data_issues"])
            skipped.extend(merged["skipped"])
            if effects_sink is not None:
                effects_sink(merged["effects"])
            else:
                effects_parts.append(merged["effects"])
            shard_timing = merged["timing"]
        # The timing columns of series are per portfolio: join them shard by shard.
        shard_series = shard_series.select(SERIES_ORDER)
        if shard_timing is not None:
            shard_series = _attach_series_extra(shard_series, shard_timing.series_extra)
            timing_parts.append(
                dataclasses.replace(shard_timing, series_extra=shard_timing.series_extra.clear())
            )
        if prepared.values is not None:
            money_parts.append(shard_series.select(MONEY_INPUT_COLUMNS))
        if series_sink is not None:
            series_sink(shard_series)
        else:
            series_parts.append(shard_series)
        if progress is not None:
            progress(min(start + shard_size, len(ids)), len(ids))

    if prepared.timing is not None:
        timings["timing_tests"] = 0.0
    # Two stages overlap: this thread decomposes shard i while the finishing thread works on
    # shard i - 1 (numpy, polars and pyarrow release the GIL in their loops). The finishing
    # thread takes one shard at a time in order, so every table is appended in shard order.
    with ThreadPoolExecutor(max_workers=1, thread_name_prefix="shard-finish") as finisher:
        finishing: Future[None] | None = None
        if prepared.timing is not None:
            # Loading the timing layer (scipy.special and friends, about 0.3 s) overlaps with
            # the first shard's decomposition instead of delaying its finishing.
            finishing = finisher.submit(_load_timing_layer)
        for start, shard, tables in _read_ahead(readers, ids, shard_size, options, timings):
            clock = time.perf_counter()
            kept = []
            if fingerprints or previous is not None:
                found_prints = portfolio_fingerprints(tables, shard)
                fingerprint_parts.append(found_prints)
                kept = previous.unchanged(found_prints) if previous is not None else []
            if kept:
                tables = {
                    name: None if frame is None else frame.filter(~pl.col(PID).is_in(kept))
                    for name, frame in tables.items()
                }
                n_reused += len(kept)
            timings["read_and_validate"] += time.perf_counter() - clock
            clock = time.perf_counter()
            new = tables["holdings"] is not None and tables["holdings"].height > 0
            part = (
                run_shard(tables, shared.calendar, shared.index_returns, options) if new else None
            )
            del tables
            timings["decompose"] += time.perf_counter() - clock
            if finishing is not None:
                finishing.result()
            finishing = finisher.submit(finish, start, kept, part)
            del part
        if finishing is not None:
            finishing.result()
    effects = (
        pl.concat(effects_parts)
        if effects_parts
        else None
        if effects_sink is not None
        else pl.DataFrame(schema={c: pl.Float64 for c in EFFECTS_ORDER})
    )
    summary = pl.concat(summary_parts)
    series = None if series_sink is not None else pl.concat(series_parts)
    extra: dict[str, pl.DataFrame] = {}
    notes = () if prepared.timing_note is None else (prepared.timing_note,)
    if prepared.timing is not None and timing_parts:
        from attribution.timing import combine_timing

        found = combine_timing(timing_parts, prepared.timing)
        summary = summary.join(found.verdicts, on=PID, how="left")
        issues.append(found.issues)
        extra = {
            "timing_tests": found.timing_tests,
            "roster": found.roster,
            "power": found.power,
        }
    if prepared.values is not None:
        clock = time.perf_counter()
        money = money_tables(pl.concat(money_parts), prepared.values, linking=options.linking)
        extra.update(money.tables())
        issues.append(money.issues)
        timings["money"] = time.perf_counter() - clock
    return RunResult(
        fingerprints=pl.concat(fingerprint_parts) if fingerprint_parts else None,
        shared_fingerprint=shared_fingerprint(
            shared.index_returns, shared.riskless, options.to_dict()
        )
        if fingerprint_parts
        else None,
        reuse={"reused": n_reused, "evaluated": len(ids) - n_reused},
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


def _load_timing_layer() -> None:
    import attribution.timing  # noqa: F401


def _attach_series_extra(series: pl.DataFrame, extra: pl.DataFrame) -> pl.DataFrame:
    """``series`` left-joined with the timing layer's per-period columns on portfolio and
    period. Both come sorted by portfolio and period, so when their keys are equal row for
    row the columns are put side by side without hashing the text keys."""
    keys = [PID, "period_end"]
    if extra.height == series.height and series.select(keys).equals(extra.select(keys)):
        return series.hstack(extra.drop(keys))
    return series.join(extra, on=keys, how="left")


def _read_ahead(
    readers: Mapping[str, TableReader],
    ids: list[str],
    shard_size: int,
    options: RunOptions,
    timings: dict[str, float],
) -> Iterator[tuple[int, list[str], dict[str, pl.DataFrame | None]]]:
    """The shards in order, each with its portfolio tables, the next one read on a
    background thread while the caller computes the current one.

    Reading (Parquet decoding in polars' own threads) and the numpy kernels (one core) then
    overlap; memory holds one shard of input more. The time spent waiting for a shard is
    added to ``timings["read_and_validate"]``.
    """

    def read(start: int) -> dict[str, pl.DataFrame | None]:
        shard = ids[start : start + shard_size]
        return {
            name: _aligned(readers[name].read_shard(shard), name, options)
            if name in readers
            else None
            for name in PORTFOLIO_TABLES
        }

    starts = list(range(0, len(ids), shard_size))
    if not starts:
        return
    with ThreadPoolExecutor(max_workers=1, thread_name_prefix="shard-reader") as pool:
        pending = pool.submit(read, starts[0])
        for i, start in enumerate(starts):
            clock = time.perf_counter()
            tables = pending.result()
            timings["read_and_validate"] += time.perf_counter() - clock
            if i + 1 < len(starts):
                pending = pool.submit(read, starts[i + 1])
            yield start, ids[start : start + shard_size], tables


def _timing_of(effects: pl.DataFrame, series: pl.DataFrame, prepared: Prepared) -> TimingResult:
    """The timing battery of one shard's evaluated portfolios."""
    from attribution.timing import evaluate_timing

    shared = prepared.shared
    assert shared.riskless is not None
    assert prepared.timing is not None
    # The battery works on padded arrays where NaN marks "not available" (periods outside a
    # record, undefined tests); numpy's warnings about NaN arithmetic there are expected,
    # and every such row is reported through its own issue code.
    with np.errstate(invalid="ignore", divide="ignore"):
        return evaluate_timing(
            effects, series, shared.index_returns, shared.riskless, options=prepared.timing
        )


#: Issue codes recomputed for the whole roster in every run (never copied from a previous
#: run): the money checks, which read portfolio_values (outside the fingerprints).
RECOMPUTED_ISSUE_PREFIX = "value_"
#: Columns that the roster-level timing step adds to summary and series.
VERDICT_COLUMNS = ("timing_evidence", "returns_holdings_disagree")


def _previous_rows(previous: PreviousRun, name: str, kept: list[str]) -> pl.DataFrame | None:
    lazy = previous.table(name)
    if lazy is None:
        return None
    # The range filter lets the Parquet reader skip row groups by their statistics.
    lo, hi = min(kept), max(kept)
    return lazy.filter(
        pl.col(PID).is_between(pl.lit(lo), pl.lit(hi)) & pl.col(PID).is_in(kept)
    ).collect()


def _stable_by_portfolio(*frames: pl.DataFrame | None) -> pl.DataFrame:
    parts = [f for f in frames if f is not None and f.height]
    if not parts:
        first = next(f for f in frames if f is not None)
        return first.clear()
    # A shard's rows come portfolio by portfolio in sorted id order; copied and new rows are
    # put back in that order, each portfolio's rows keeping their own order.
    return pl.concat(parts, how="vertical_relaxed").sort(PID, maintain_order=True)


def _merge_with_previous(
    part: ShardResult | None,
    previous: PreviousRun,
    kept: list[str],
    prepared: Prepared,
    options: RunOptions,
    ppy: int,
) -> dict[str, Any]:
    """One shard of an incremental run: the evaluated portfolios' new rows merged, in the
    full run's order, with the unchanged portfolios' rows copied from the previous run."""
    new: dict[str, pl.DataFrame | None] = dict.fromkeys(
        ("effects", "series", "summary", "summary_windows", "data_issues")
    )
    timing_new: TimingResult | None = None
    skipped: list[str] = list(part.skipped) if part is not None else []
    if part is not None:
        new["effects"] = part.effects
        new["series"] = part.series
        new["summary"] = summary_frame(part.periods, linking=options.linking, periods_per_year=ppy)
        new["summary_windows"] = windows_frame(
            part.periods, linking=options.linking, periods_per_year=ppy
        )
        new["data_issues"] = part.issues
        if prepared.timing is not None:
            timing_new = _timing_of(part.effects, part.series, prepared)
    old: dict[str, pl.DataFrame | None] = dict.fromkeys(new)
    timing_old: dict[str, pl.DataFrame | None] = {}
    if kept:
        for name in new:
            old[name] = _previous_rows(previous, name, kept)
        issues = old["data_issues"]
        assert issues is not None
        old["data_issues"] = issues.filter(~pl.col("code").str.starts_with(RECOMPUTED_ISSUE_PREFIX))
        skipped += issues.filter(pl.col("severity") == "error")[PID].unique().to_list()
        summary = old["summary"]
        assert summary is not None
        old["summary"] = summary.drop([c for c in VERDICT_COLUMNS if c in summary.columns])
        series = old["series"]
        assert series is not None
        extra_cols = [c for c in series.columns if c not in SERIES_ORDER]
        timing_old["series_extra"] = series.select(PID, "period_end", *extra_cols)
        old["series"] = series.select(SERIES_ORDER)
        if prepared.timing is not None:
            timing_old["timing_tests"] = _previous_rows(previous, "timing_tests", kept)
            timing_old["power"] = _previous_rows(previous, "power", kept)
    merged: dict[str, Any] = {name: _stable_by_portfolio(old[name], new[name]) for name in new}
    if merged["effects"].height:
        merged["effects"] = merged["effects"].select(EFFECTS_ORDER)
    merged["skipped"] = sorted(set(skipped))
    merged["timing"] = None
    if prepared.timing is not None:
        pieces = [p for p in (timing_new,) if p is not None]
        tests_old, power_old = timing_old.get("timing_tests"), timing_old.get("power")
        if kept and (tests_old is None or power_old is None):
            msg = "incremental: the previous run has no timing tables to copy"
            raise ReadError(msg)
        from attribution.timing import TimingResult

        merged["timing"] = TimingResult(
            timing_tests=_stable_by_portfolio(tests_old, *(p.timing_tests for p in pieces)),
            verdicts=pieces[0].verdicts if pieces else pl.DataFrame(),
            roster=pieces[0].roster if pieces else pl.DataFrame(),
            power=_stable_by_portfolio(power_old, *(p.power for p in pieces)),
            series_extra=_stable_by_portfolio(
                timing_old.get("series_extra"), *(p.series_extra for p in pieces)
            ),
            issues=pl.concat([p.issues for p in pieces]) if pieces else empty_issues(),
        )
    return merged
