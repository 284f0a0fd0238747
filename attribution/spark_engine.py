"""The Spark engine: the local engine's per-portfolio kernels, run on Spark's executors.

``--engine spark`` runs exactly the functions of the local engine (:mod:`attribution.runner`)
— :func:`~attribution.decompose.run_shard`, :func:`~attribution.summary.summary_frame`,
:func:`~attribution.summary.windows_frame` and :func:`~attribution.timing.evaluate_timing` —
but on a Spark cluster's executors, one group of portfolios at a time, with Spark's
grouped-map API ``GroupedData.applyInArrow`` (pyspark ≥ 4.0: each group arrives in the
Python function as one ``pyarrow.Table`` and the function returns a ``pyarrow.Table``; see
the pyspark API reference, ``pyspark.sql.GroupedData.applyInArrow``). Nothing is
re-implemented: "one numerical kernel per concern, many runners" (DESIGN §6).

A run, step by step:

1. **Driver, before Spark.** As the local engine: :func:`attribution.runner.prepare` opens the
   inputs and checks the shared tables (calendar, index_returns, riskfree); the portfolio ids
   of every table are listed for the ``no_holdings`` (orphan) check, which also fails on an
   empty holdings table or a null id. Each portfolio of holdings gets a group number: its
   rank among the sorted ids divided by ``portfolios_per_group``. A group is a run of
   consecutive portfolios, never part of one: by default the local engine's shards
   (:data:`~attribution.runner.DEFAULT_SHARD_SIZE` portfolios), so every kernel call is the
   local run's call; ``portfolios_per_group=1`` gives one group per portfolio. The id list is
   the only per-portfolio data the driver holds before the results come back.
2. **One tagged long frame.** Spark reads the four portfolio tables (holdings, policy,
   segment_returns, portfolio_returns) from their files — Parquet with its own types, CSV as
   text — or, for a table given in memory, from the driver's Arrow copy. They are unioned
   into one frame: a ``_table`` tag, the union of the tables' columns (nullable; a column
   whose type differs between tables is kept apart as ``<table>__<column>``), and the row's
   position in its source (so each group sees its rows in file order, as the local engine
   does). Rows of portfolios that have no holdings are dropped by the (broadcast) join with
   the group numbers, as the local engine never reads them either.
3. **Grouped map.** The frame is range-partitioned on the group number and grouped by it;
   ``applyInArrow`` hands each group to :func:`run_group`, which splits it by tag, types the
   columns with the local engine's rules (:func:`attribution.load.coerce_schema`), aligns the
   dates as the local engine does, and calls the kernels above. The shared tables and the
   options travel to the executors inside the function's closure (they are small).
4. **Output without collecting the roster.** Each group returns tagged rows: its effects
   (the largest table) as rows of the effects columns, and each smaller table (summary,
   summary_windows, series, data issues, skipped ids, the timing pieces, step timings) as one
   row holding that table serialised as Arrow IPC (``payload``). Spark writes the lot once,
   as Parquet, under ``work_dir``. Range partitioning keeps the groups in order across the
   part files and within each, so reading the parts in order gives the roster in sorted
   portfolio order; the driver checks this while reading and stops if it does not hold.
5. **Driver, after Spark.** The effects go to ``effects_sink`` one Parquet row group at a
   time (or are read into the result when there is no sink). The small tables are read and
   concatenated; the roster-level timing figures (Benjamini–Hochberg q-values, Storey's π0,
   verdicts) come from :func:`~attribution.timing.combine_timing` over the groups' results,
   exactly as the local engine combines its shards; data issues are sorted by the local
   engine's rule. The working folder is removed at the end.

The result equals the local engine's with the same shards (same tables, rows, order; numbers
to rounding: a group's rows reach the kernels in file order, so the arithmetic is the same).
Step timings are summed over the groups (executor seconds), under the local engine's names.
"""

from __future__ import annotations

import io
import shutil
import tempfile
import time
import uuid
import warnings
from collections.abc import Callable, Iterator, Mapping
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import polars as pl
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from attribution import errors
from attribution.calendar import Calendar
from attribution.decompose import EFFECTS_ORDER, SERIES_ORDER, run_shard, timing_effects
from attribution.errors import InputError, OptionError
from attribution.incremental import portfolio_fingerprints, shared_fingerprint
from attribution.load import FLOAT, TABLE_COLUMNS, TableReader, TableSource, coerce_schema
from attribution.money import MONEY_INPUT_COLUMNS, money_tables
from attribution.options import RunOptions
from attribution.runner import (
    DEFAULT_SHARD_SIZE,
    PORTFOLIO_TABLES,
    EffectsPart,
    Prepared,
    RunResult,
    _aligned,
    _sort_issues,
    prepare,
)
from attribution.summary import summary_frame, windows_frame
from attribution.timing import TimingOptions, TimingResult, combine_timing, evaluate_timing
from attribution.validate import empty_issues, orphan_issues

if TYPE_CHECKING:
    from pyspark.sql import DataFrame as SparkFrame
    from pyspark.sql import SparkSession

PID = "portfolio_id"
GROUP = "_group"
TAG = "_table"
KIND = "kind"
PAYLOAD = "payload"
#: The source position of a row: (block, row) — (0, row number) for Parquet files and
#: in-memory tables, (byte offset of the split, increasing id) for CSV files.
ORDER = ("_o1", "_o2")
EFFECTS_KIND = "effects"
BATCH_ROWS = 10_000
ROW_GROUP_BYTES = 32 * 2**20
#: log4j2 configuration of :func:`local_session`: errors only, on stderr.
QUIET_LOG4J = """\
rootLogger.level = error
rootLogger.appenderRef.stderr.ref = console
appender.console.type = Console
appender.console.name = console
appender.console.target = SYSTEM_ERR
appender.console.layout.type = PatternLayout
appender.console.layout.pattern = %d{yy/MM/dd HH:mm:ss} %p %c{1}: %m%n%ex
"""

#: The effects columns as Arrow types and Spark SQL types, in :data:`EFFECTS_ORDER`.
EFFECTS_TYPES: dict[str, tuple[pa.DataType, str]] = {
    name: (pa.float64(), "double") for name in EFFECTS_ORDER
}
EFFECTS_TYPES |= {
    PID: (pa.string(), "string"),
    "period_end": (pa.date32(), "date"),
    "asset_class": (pa.string(), "string"),
    "is_drifted": (pa.bool_(), "boolean"),
}
#: The rows every group returns: effects rows (``kind`` = effects, ``payload`` null) and one
#: row per smaller table (``kind`` = its name, the effects columns null).
OUTPUT_ARROW = pa.schema(
    [
        (GROUP, pa.int64()),
        (KIND, pa.string()),
        *((name, EFFECTS_TYPES[name][0]) for name in EFFECTS_ORDER),
        (PAYLOAD, pa.binary()),
    ]
)
OUTPUT_DDL = ", ".join(
    [
        f"{GROUP} bigint",
        f"{KIND} string",
        *(f"`{name}` {EFFECTS_TYPES[name][1]}" for name in EFFECTS_ORDER),
        f"{PAYLOAD} binary",
    ]
)
#: The smaller per-group tables, in the order a group returns them.
TIMING_PIECES = ("timing_tests", "verdicts", "roster", "power", "series_extra", "timing_issues")
STEP_TIMINGS = ("read_and_validate", "decompose", "summarise", "timing_tests")


def spark_version() -> str:
    """The installed pyspark's version (for the run manifest's ``engine_version``).

    Raises :class:`OptionError` (exit 2) when pyspark is not installed.
    """
    return _pyspark().__version__


def _pyspark() -> Any:
    try:
        import pyspark
    except ImportError as exc:
        msg = (
            "The 'engine' option is 'spark', but pyspark is not installed; install it "
            "(pip install 'pyspark>=4.0', with Java 17) or use --engine local."
        )
        raise OptionError(msg) from exc
    major = int(pyspark.__version__.split(".")[0])
    if major < 4:
        msg = (
            f"The spark engine needs pyspark 4.0 or later (GroupedData.applyInArrow); "
            f"found {pyspark.__version__}."
        )
        raise OptionError(msg)
    return pyspark


@contextmanager
def _quiet_pandas_notice() -> Iterator[None]:
    # pyspark 4.x warns once that it does not fully support pandas 3; this engine hands Spark
    # Arrow tables and reads Arrow back, never pandas.
    with warnings.catch_warnings():
        warnings.filterwarnings(
            "ignore", message="PySpark does not yet fully support pandas", category=FutureWarning
        )
        yield


def local_session(
    *,
    cores: int = 2,
    memory: str = "4g",
    warehouse: Path | None = None,
    app_name: str = "tiltaudit",
) -> SparkSession:
    """A Spark session on this machine (``local[cores]``) for runs without a cluster.

    Small shuffles (two partitions per core), ``memory`` of JVM heap (in local mode the
    executors share the driver's JVM; Spark's default of 1g runs out writing groups of
    1,000 portfolios × 240 months), Arrow transfers on, no web UI or console progress bar,
    logs at ERROR, UTC session time zone (so a timestamp column becomes the same date as in
    the local engine, which reads it in UTC). ``warehouse`` is where tables created in the
    session go (Spark's default is ``./spark-warehouse``; this engine creates none, the SQL
    models of :func:`attribution.sql_models.run_models_on_spark` do). Returns the active
    session instead when one exists (Spark allows one per process).
    """
    _pyspark()
    from pyspark.sql import SparkSession

    # A log configuration at ERROR for the JVM from its first line (setLogLevel acts only
    # once the context is up, after the start-up warnings); read once at start-up.
    quiet = Path(tempfile.mkdtemp(prefix="tiltaudit-log4j-")) / "log4j2.properties"
    quiet.write_text(QUIET_LOG4J, encoding="utf-8")
    builder = SparkSession.builder
    if warehouse is not None:
        builder = builder.config("spark.sql.warehouse.dir", str(Path(warehouse).resolve()))
    try:
        with _quiet_pandas_notice():
            session = (
                builder.master(f"local[{cores}]")
                .appName(app_name)
                .config("spark.sql.shuffle.partitions", str(2 * cores))
                .config("spark.default.parallelism", str(cores))
                .config("spark.driver.memory", memory)
                .config("spark.driver.extraJavaOptions", f"-Dlog4j2.configurationFile={quiet}")
                .config("spark.sql.execution.arrow.pyspark.enabled", "true")
                .config("spark.sql.session.timeZone", "UTC")
                .config("spark.ui.enabled", "false")
                .config("spark.ui.showConsoleProgress", "false")
                .getOrCreate()
            )
    finally:
        shutil.rmtree(quiet.parent, ignore_errors=True)
    session.sparkContext.setLogLevel("ERROR")
    return session


# --------------------------------------------------------------------------- executor side


@dataclass(frozen=True)
class GroupContext:
    """What every group needs besides its own rows; shipped to the executors with the
    grouped-map function.

    layout : per portfolio table given, ``{contract column: column of the tagged frame}``.
    calendar, index_returns, riskless : the checked shared tables (``Prepared.shared``).
    options : the run's options; timing : the timing options, or None when the timing tests
        do not run; fingerprints : whether to fingerprint each portfolio's inputs.
    """

    layout: dict[str, dict[str, str]]
    calendar: Calendar
    index_returns: pl.DataFrame
    riskless: pl.DataFrame | None
    options: RunOptions
    timing: TimingOptions | None
    fingerprints: bool = False


def _ipc(frame: pl.DataFrame) -> bytes:
    buffer = io.BytesIO()
    frame.write_ipc_stream(buffer)
    return buffer.getvalue()


def _from_ipc(payload: bytes) -> pl.DataFrame:
    return pl.read_ipc_stream(io.BytesIO(payload))


def _group_tables(frame: pl.DataFrame, context: GroupContext) -> dict[str, pl.DataFrame | None]:
    """The group's rows of each portfolio table, typed and aligned as ``read_shard`` and
    ``runner._aligned`` give them to the local engine (None for a table not given)."""
    tables: dict[str, pl.DataFrame | None] = {}
    for name in PORTFOLIO_TABLES:
        columns = context.layout.get(name)
        if columns is None:
            tables[name] = None
            continue
        rows = (
            frame.filter(pl.col(TAG) == name)
            .sort(*ORDER)
            .select(pl.col(source).alias(column) for column, source in columns.items())
        )
        typed = coerce_schema(rows, name)
        # One chunk per number column, as TableReader.read_shard leaves them.
        numbers = [c for c, kind in TABLE_COLUMNS[name].items() if kind == FLOAT]
        typed = typed.with_columns([typed[c].rechunk() for c in numbers])
        tables[name] = _aligned(typed, name, context.options)
    return tables


def _plain_effects(table: pa.Table) -> pa.Table:
    """The kernel's effects table with plain text instead of dictionary codes."""
    return pa.table(
        [
            table.column(name).combine_chunks().cast(EFFECTS_TYPES[name][0])
            for name in EFFECTS_ORDER
        ],
        names=list(EFFECTS_ORDER),
    )


def _chunks(frame: pl.DataFrame) -> list[pl.DataFrame]:
    """A frame cut into pieces of at most :data:`BATCH_ROWS` rows (one piece when empty)."""
    if frame.height <= BATCH_ROWS:
        return [frame]
    return [frame.slice(start, BATCH_ROWS) for start in range(0, frame.height, BATCH_ROWS)]


def _output(group: int, effects: pa.Table | None, pieces: dict[str, pl.DataFrame]) -> pa.Table:
    """A group's rows in :data:`OUTPUT_ARROW`: its effects, then its smaller tables, each as
    one or more rows holding up to :data:`BATCH_ROWS` of its rows (large binary values cost
    the Parquet writer several copies of themselves in the JVM heap)."""
    blobs = [(kind, _ipc(chunk)) for kind, frame in pieces.items() for chunk in _chunks(frame)]
    n_effects = 0 if effects is None else effects.num_rows
    n_rows = n_effects + len(blobs)
    kinds = pa.array([kind for kind, _ in blobs], pa.string())
    columns: list[pa.Array] = [
        pa.array(np.full(n_rows, group, dtype=np.int64)),
        pa.concat_arrays([pa.repeat(EFFECTS_KIND, n_effects), kinds]),
    ]
    for name in EFFECTS_ORDER:
        kind = EFFECTS_TYPES[name][0]
        head = pa.nulls(0, kind) if effects is None else effects.column(name).combine_chunks()
        columns.append(pa.concat_arrays([head, pa.nulls(len(blobs), kind)]))
    payloads = pa.array([payload for _, payload in blobs], pa.binary())
    columns.append(pa.concat_arrays([pa.nulls(n_effects, pa.binary()), payloads]))
    out = pa.Table.from_arrays(columns, schema=OUTPUT_ARROW)
    # Spark's own batch size (spark.sql.execution.arrow.maxRecordsPerBatch): a group of many
    # portfolios then reaches the JVM in pieces, not as one buffer of its whole effects.
    return pa.Table.from_batches(out.to_batches(max_chunksize=BATCH_ROWS), schema=OUTPUT_ARROW)


def run_group(table: pa.Table, context: GroupContext) -> pa.Table:
    """Run one group of portfolios through the local engine's kernels (the grouped-map
    function ``applyInArrow`` calls, with the context bound).

    The same steps, in the same order and under the same ``np.errstate``, as one shard of
    :func:`attribution.runner.run_roster`: read and type the rows, ``run_shard``, the
    summaries, the timing battery, the timing columns joined to the group's series. A
    whole-input problem found in the group's rows (a value that cannot be typed) is
    returned as an ``error`` row, raised on the driver.
    """
    frame = pl.from_arrow(table)
    assert isinstance(frame, pl.DataFrame)
    group = int(frame.get_column(GROUP)[0])
    seconds = dict.fromkeys(STEP_TIMINGS, 0.0)
    try:
        clock = time.perf_counter()
        tables = _group_tables(frame, context)
        pieces: dict[str, pl.DataFrame] = {}
        if context.fingerprints:
            holdings = tables["holdings"]
            assert holdings is not None
            ids = holdings.get_column(PID).unique().sort().to_list()
            pieces["fingerprints"] = portfolio_fingerprints(tables, ids)
        seconds["read_and_validate"] = time.perf_counter() - clock
        clock = time.perf_counter()
        part = run_shard(tables, context.calendar, context.index_returns, context.options)
        seconds["decompose"] = time.perf_counter() - clock
        clock = time.perf_counter()
        ppy = context.calendar.periods_per_year
        linking = context.options.linking
        pieces["summary"] = summary_frame(part.periods, linking=linking, periods_per_year=ppy)
        pieces["summary_windows"] = windows_frame(
            part.periods, linking=linking, periods_per_year=ppy
        )
        seconds["summarise"] = time.perf_counter() - clock
        pieces["issues"] = part.issues
        pieces["skipped"] = pl.DataFrame({PID: list(part.skipped)}, schema={PID: pl.String})
        series = part.series.select(SERIES_ORDER)
        clock = time.perf_counter()
        effects = part.effects_table()  # built once: the output and the timing layer read it
        seconds["decompose"] += time.perf_counter() - clock
        if context.timing is not None:
            assert context.riskless is not None
            clock = time.perf_counter()
            # As in run_roster: NaN marks "not available" in the battery's padded arrays, and
            # every such row is reported through its own issue code.
            with np.errstate(invalid="ignore", divide="ignore"):
                found = evaluate_timing(
                    timing_effects(effects),
                    part.series,
                    context.index_returns,
                    context.riskless,
                    options=context.timing,
                )
            seconds["timing_tests"] = time.perf_counter() - clock
            # The timing columns of series are per portfolio: joined group by group, as the
            # local engine joins them shard by shard.
            series = series.join(found.series_extra, on=[PID, "period_end"], how="left")
            pieces |= {
                "timing_tests": found.timing_tests,
                "verdicts": found.verdicts,
                "roster": found.roster,
                "power": found.power,
                "series_extra": found.series_extra.clear(),
                "timing_issues": found.issues,
            }
        pieces["series"] = series
        pieces["timings"] = pl.DataFrame({name: [value] for name, value in seconds.items()})
        return _output(group, _plain_effects(effects), pieces)
    except InputError as exc:
        error = pl.DataFrame({"error": [type(exc).__name__], "message": [str(exc)]})
        return _output(group, None, {"error": error})


# --------------------------------------------------------------------------- driver side


def _reader_source(reader: TableReader) -> Path | pl.DataFrame:
    """A reader's file (Parquet or CSV), or its table, typed, when it was given in memory."""
    # TableReader keeps the path it was opened on as its description (``_where``); a table
    # given in memory is already on the driver, so it is typed there and sent to Spark.
    where = Path(str(getattr(reader, "_where", "")))
    if where.suffix.lower() in (".parquet", ".pq", ".csv") and where.is_file():
        return where
    return reader.read_all()


def _spark_table(spark: SparkSession, reader: TableReader, name: str) -> SparkFrame:
    """One portfolio table as a Spark frame: its contract columns (as stored), the source
    position columns :data:`ORDER`, the tag, and ``_pid`` (the id as text, to join on)."""
    from pyspark.sql import functions as F

    spec = list(TABLE_COLUMNS[name])
    source = _reader_source(reader)
    if isinstance(source, Path) and source.suffix.lower() == ".csv":
        # As the local engine reads CSV: every column as text, typed later by our own rules.
        raw = (
            spark.read.option("header", "true")
            .option("inferSchema", "false")
            .option("escape", '"')
            .csv(str(source.resolve()))
        )
        order = [
            F.col("_metadata.file_block_start").alias(ORDER[0]),
            F.monotonically_increasing_id().alias(ORDER[1]),
        ]
    elif isinstance(source, Path):
        raw = spark.read.parquet(str(source.resolve()))
        order = [
            F.lit(0).cast("long").alias(ORDER[0]),
            F.col("_metadata.row_index").alias(ORDER[1]),
        ]
    else:
        numbered = source.with_row_index(ORDER[1]).with_columns(
            pl.lit(0, dtype=pl.Int64).alias(ORDER[0]), pl.col(ORDER[1]).cast(pl.Int64)
        )
        raw = spark.createDataFrame(numbered.to_arrow())
        order = [F.col(ORDER[0]), F.col(ORDER[1])]
    return raw.select(
        *(F.col(f"`{c}`") for c in spec),
        *order,
        F.lit(name).alias(TAG),
        F.col(PID).cast("string").alias("_pid"),
    )


def _tagged_frame(
    spark: SparkSession, readers: Mapping[str, TableReader]
) -> tuple[SparkFrame, dict[str, dict[str, str]]]:
    """The portfolio tables unioned into one tagged long frame, and its layout."""
    frames = {
        name: _spark_table(spark, readers[name], name)
        for name in PORTFOLIO_TABLES
        if name in readers
    }
    types: dict[str, set[str]] = {}
    for frame in frames.values():
        for field in frame.schema.fields:
            types.setdefault(field.name, set()).add(field.dataType.simpleString())
    layout: dict[str, dict[str, str]] = {}
    renamed = []
    for name, frame in frames.items():
        columns = {}
        for column in TABLE_COLUMNS[name]:
            # A column typed differently in two tables (text in a CSV, a number in Parquet)
            # is kept apart, so each table reaches the kernels with its own stored values.
            columns[column] = column if len(types[column]) == 1 else f"{name}__{column}"
            if columns[column] != column:
                frame = frame.withColumnRenamed(column, columns[column])
        layout[name] = columns
        renamed.append(frame)
    tagged = renamed[0]
    for frame in renamed[1:]:
        tagged = tagged.unionByName(frame, allowMissingColumns=True)
    return tagged, layout


def _part_files(folder: Path) -> list[Path]:
    """Spark's part files in partition order (``part-<partition>-…``)."""
    files = [p for p in folder.glob("part-*") if p.suffix == ".parquet"]
    return sorted(files, key=lambda p: int(p.name.split("-")[1]))


def _row_groups(files: list[Path], columns: list[str]) -> Iterator[pa.Table]:
    """Every row group of the part files, in order, with ``columns`` only."""
    for path in files:
        parquet = pq.ParquetFile(path)
        for index in range(parquet.num_row_groups):
            yield parquet.read_row_group(index, columns=columns)


def _raise_group_error(error: pl.DataFrame) -> None:
    first = error.row(0, named=True)
    kind = getattr(errors, first["error"], InputError)
    raise (kind if isinstance(kind, type) and issubclass(kind, InputError) else InputError)(
        first["message"]
    )


@dataclass
class _Gathered:
    """The smaller tables read back: per kind, each group's frame in group order (series
    only when there is no series sink); step timings summed over the groups; the money
    columns of series."""

    frames: dict[str, list[pl.DataFrame]]
    seconds: dict[str, float]
    money: list[pl.DataFrame]


def _gather(
    files: list[Path],
    *,
    series_sink: Callable[[pl.DataFrame], None] | None,
    money: bool,
) -> _Gathered:
    """Read every non-effects row in group order; hand series to ``series_sink`` one row group
    at a time; raise the first group's whole-input error, as the local engine raises at the
    first shard that has one.

    Groups must arrive in non-decreasing order (the range partitioning's promise); this is
    checked rather than assumed.
    """
    chunks: dict[str, list[list[pl.DataFrame]]] = {}
    owner: dict[str, int] = {}
    series_parts: list[pl.DataFrame] = []
    seconds = dict.fromkeys(STEP_TIMINGS, 0.0)
    money_parts: list[pl.DataFrame] = []
    first_series: pl.DataFrame | None = None
    handed = False
    last = -1
    for rows in _row_groups(files, [GROUP, KIND, PAYLOAD]):
        groups = rows.column(GROUP).to_numpy()
        if groups.size and (groups[0] < last or np.any(np.diff(groups) < 0)):
            msg = (
                "Spark returned the groups out of order; the spark engine relies on range "
                "partitioning to keep them sorted."
            )
            raise RuntimeError(msg)
        last = int(groups[-1]) if groups.size else last
        small = rows.filter(pc.not_equal(rows.column(KIND), EFFECTS_KIND))
        series: list[pl.DataFrame] = []
        for group, kind, payload in zip(
            small.column(GROUP).to_pylist(),
            small.column(KIND).to_pylist(),
            small.column(PAYLOAD).to_pylist(),
            strict=True,
        ):
            frame = _from_ipc(payload)
            if kind == "error":
                _raise_group_error(frame)
            elif kind == "timings":
                for name in STEP_TIMINGS:
                    seconds[name] += float(frame.get_column(name)[0])
            elif kind == "series":
                series.append(frame)
            elif owner.get(kind) == group:
                chunks[kind][-1].append(frame)  # the next piece of this group's table
            else:
                chunks.setdefault(kind, []).append([frame])
                owner[kind] = group
        if first_series is None and series:
            first_series = series[0]
        if money:
            money_parts += [frame.select(MONEY_INPUT_COLUMNS) for frame in series]
        if series_sink is None:
            series_parts.extend(series)
        elif any(frame.height for frame in series):
            series_sink(_concat(series))
            handed = True
    if series_sink is not None and not handed and first_series is not None:
        series_sink(first_series)  # an empty table, so the file still gets its columns
    frames = {kind: [pl.concat(pieces) for pieces in lists] for kind, lists in chunks.items()}
    if series_sink is None:
        frames["series"] = series_parts
    return _Gathered(frames=frames, seconds=seconds, money=money_parts)


def _effects_parts(files: list[Path]) -> Iterator[pa.Table]:
    """The effects rows, one Parquet row group at a time, in group order."""
    schema = pa.schema([(name, EFFECTS_TYPES[name][0]) for name in EFFECTS_ORDER])
    for rows in _row_groups(files, [KIND, *EFFECTS_ORDER]):
        rows = rows.filter(pc.equal(rows.column(KIND), EFFECTS_KIND)).drop_columns([KIND])
        if rows.num_rows:
            yield rows.cast(schema)


def _empty_effects() -> pa.Table:
    return pa.table({name: pa.array([], EFFECTS_TYPES[name][0]) for name in EFFECTS_ORDER})


def _concat(frames: list[pl.DataFrame]) -> pl.DataFrame:
    """Concatenate in order, leaving out empty frames (a group whose portfolios were all
    skipped), unless every one is empty."""
    filled = [frame for frame in frames if frame.height]
    return pl.concat(filled) if filled else frames[0]


def _timing_parts(frames: dict[str, list[pl.DataFrame]]) -> list[TimingResult]:
    """Each group's timing result as the local engine keeps a shard's (series_extra emptied,
    its columns being in series already); groups without a tested portfolio are left out,
    unless no group has one."""
    parts = [
        TimingResult(
            timing_tests=tests,
            verdicts=verdicts,
            roster=roster,
            power=power,
            series_extra=extra,
            issues=issues,
        )
        for tests, verdicts, roster, power, extra, issues in zip(
            *(frames[name] for name in TIMING_PIECES), strict=True
        )
    ]
    filled = [part for part in parts if part.power.height]
    return filled or parts[:1]


def _group_numbers(n_portfolios: int, portfolios_per_group: int) -> np.ndarray:
    if isinstance(portfolios_per_group, bool) or not isinstance(portfolios_per_group, int):
        portfolios_per_group = 0
    if portfolios_per_group < 1:
        msg = (
            "The 'portfolios_per_group' parameter must be an integer >= 1. "
            f"Got {portfolios_per_group!r} instead."
        )
        raise OptionError(msg)
    return np.arange(n_portfolios, dtype=np.int64) // portfolios_per_group


def run_roster_spark(
    prepared: Prepared | Mapping[str, TableSource | None],
    options: RunOptions,
    *,
    spark: SparkSession | None = None,
    effects_sink: Callable[[EffectsPart], None] | None = None,
    series_sink: Callable[[pl.DataFrame], None] | None = None,
    work_dir: Path | None = None,
    progress: Callable[[int, int], None] | None = None,
    fingerprints: bool = False,
    portfolios_per_group: int = DEFAULT_SHARD_SIZE,
    partitions: int | None = None,
) -> RunResult:
    """Run the roster on Spark: :func:`attribution.runner.run_roster`'s result, computed on
    the executors (module docstring: how the work is split and brought back).

    ``prepared`` is :func:`attribution.runner.prepare`'s result (or the sources, prepared
    here). ``spark`` is the session to use, else the process's active one, else a
    :func:`local_session` started (and stopped at the end) by this call. Dates stored as
    timestamps become dates in the session's time zone (the local engine reads them in UTC,
    as :func:`local_session` sets).

    ``effects_sink`` and ``series_sink`` work as in the local engine: the effects are handed
    over one Parquet row group of Spark's output at a time, as functions returning a pyarrow
    table (read before the call, so the sink may build it on another thread), the series as
    polars frames; without a sink the table is read into the result. ``fingerprints`` records
    each portfolio's input fingerprint for a later incremental run (computed on the
    executors, whose polars version must be the driver's). Incremental runs themselves (the
    local engine's ``previous``) are not offered here.

    ``work_dir`` is where Spark writes its output (a fresh subfolder, removed at the end; a
    temporary folder by default); on a cluster it must be a path that the executors and the
    driver both see. ``progress(done, total)`` is called before the Spark job (done = 0) and
    after it, with portfolios counted.

    ``portfolios_per_group`` consecutive portfolios (in sorted order) go to one call of the
    kernels. The default, the local engine's shard size, makes every call the local run's
    own, and spreads the kernels' set-up (about 80 ms a call here, against about 8 ms a
    portfolio in a call of 1,000); a group of 1,000 portfolios × 12 classes × 240 months
    needs about 2 GiB in its Python worker, so use smaller groups on small executors, or 1 to
    group by portfolio. Every per-portfolio figure depends on that portfolio's rows only, so
    the grouping changes numbers at the rounding level only (one known exception: the
    ``trade_regression`` row of a fixed-mix rebalancer, whose trades exactly undo drift, is a
    ratio of rounding residues in the local engine too).
    ``partitions`` is the number of range partitions (default ``spark.sql.shuffle.partitions``,
    at most one per group).

    Whole-input problems raise as in the local engine (exit 2); portfolio problems become
    ``data_issues`` rows.
    """
    _pyspark()
    timings: dict[str, float] = {"read_and_validate": 0.0, "decompose": 0.0, "summarise": 0.0}
    clock = time.perf_counter()
    prepared = prepared if isinstance(prepared, Prepared) else prepare(prepared, options)
    readers, shared = prepared.readers, prepared.shared
    held = readers["holdings"].portfolio_ids()
    if held.len() == 0:
        msg = "holdings: the table has no rows; expected at least one portfolio's weights."
        raise errors.ReadError(msg)
    others = [readers[n].portfolio_ids() for n in PORTFOLIO_TABLES[1:] if n in readers]
    if prepared.values is not None:
        others.append(prepared.values.get_column(PID).drop_nulls().unique())
    issues = [empty_issues(), orphan_issues(held, others)]
    group_numbers = _group_numbers(held.len(), portfolios_per_group)
    timings["read_and_validate"] += time.perf_counter() - clock
    n_portfolios = held.len()
    if progress is not None:
        progress(0, n_portfolios)

    from pyspark.sql import SparkSession
    from pyspark.sql import functions as F

    # A session of the caller's (given, or active in this process) is used as it is.
    active = spark if spark is not None else SparkSession.getActiveSession()
    started_here = active is None
    session = active if active is not None else local_session()
    parent = Path(tempfile.mkdtemp(prefix="tiltaudit-spark-")) if work_dir is None else work_dir
    job_dir = Path(parent) / f"spark-output-{uuid.uuid4().hex}"
    effects: pl.DataFrame | None = None
    try:
        with _quiet_pandas_notice():
            tagged, layout = _tagged_frame(session, readers)
            context = GroupContext(
                layout=layout,
                calendar=shared.calendar,
                index_returns=shared.index_returns,
                riskless=shared.riskless,
                options=options,
                timing=prepared.timing,
                fingerprints=fingerprints,
            )
            mapping = session.createDataFrame(
                pa.table({"_pid": held.to_arrow().cast(pa.string()), GROUP: group_numbers})
            )
            n_groups = int(group_numbers[-1]) + 1
            if partitions is None:
                partitions = int(session.conf.get("spark.sql.shuffle.partitions") or "200")
            grouped = (
                tagged.join(F.broadcast(mapping), on="_pid", how="inner")
                .drop("_pid")
                .repartitionByRange(max(1, min(partitions, n_groups)), GROUP)
                .groupBy(GROUP)
            )

            def kernel(table: pa.Table) -> pa.Table:
                return run_group(table, context)

            output = grouped.applyInArrow(kernel, OUTPUT_DDL)
            # Row groups of 32 MiB: less JVM heap per writing task, and the effects reach the
            # sink in parts of about that size.
            output.write.option("parquet.block.size", ROW_GROUP_BYTES).parquet(
                job_dir.resolve().as_uri()
            )
        files = _part_files(job_dir)
        gathered = _gather(files, series_sink=series_sink, money=prepared.values is not None)
        if effects_sink is not None:
            handed = False
            for part in _effects_parts(files):
                effects_sink(lambda part=part: part)
                handed = True
            if not handed:
                effects_sink(_empty_effects)
        else:
            found_effects = pl.from_arrow(
                pa.concat_tables(list(_effects_parts(files)) or [_empty_effects()])
            )
            assert isinstance(found_effects, pl.DataFrame)
            effects = found_effects
    finally:
        shutil.rmtree(job_dir, ignore_errors=True)
        if work_dir is None:
            shutil.rmtree(parent, ignore_errors=True)
        if started_here:
            session.stop()
    if progress is not None:
        progress(n_portfolios, n_portfolios)
    for name, value in gathered.seconds.items():
        if name != "timing_tests" or prepared.timing is not None:
            timings[name] = timings.get(name, 0.0) + value

    frames = gathered.frames
    summary = _concat(frames["summary"])
    issues.extend(frames["issues"])
    extra: dict[str, pl.DataFrame] = {}
    notes = () if prepared.timing_note is None else (prepared.timing_note,)
    if prepared.timing is not None:
        found = combine_timing(_timing_parts(frames), prepared.timing)
        summary = summary.join(found.verdicts, on=PID, how="left")
        issues.append(found.issues)
        extra = {"timing_tests": found.timing_tests, "roster": found.roster, "power": found.power}
    if prepared.values is not None:
        clock = time.perf_counter()
        money = money_tables(pl.concat(gathered.money), prepared.values, linking=options.linking)
        extra.update(money.tables())
        issues.append(money.issues)
        timings["money"] = time.perf_counter() - clock
    prints = _concat(frames["fingerprints"]) if fingerprints else None
    return RunResult(
        fingerprints=prints,
        shared_fingerprint=shared_fingerprint(
            shared.index_returns, shared.riskless, options.to_dict()
        )
        if fingerprints
        else None,
        reuse={"reused": 0, "evaluated": n_portfolios},
        effects=effects,
        summary=summary,
        summary_windows=_concat(frames["summary_windows"]),
        series=None if series_sink is not None else _concat(frames["series"]),
        data_issues=_sort_issues(pl.concat(issues)),
        calendar=shared.calendar,
        options=options,
        skipped=tuple(sorted(_concat(frames["skipped"]).get_column(PID).to_list())),
        timings=timings,
        extra_tables=extra,
        notes=notes,
    )
