"""Writing a run's tables: Parquet files, one DuckDB database, a manifest — atomically.

The output folder is replaced as a whole: everything is written into a hidden sibling
folder first and swapped in with two renames, so a run that fails or is killed leaves the
previous results intact. A lock file beside the folder (``flock``, released by the kernel
when the process dies) keeps two runs from writing the same folder at once.

``results.duckdb`` holds the small tables as copies and the large ones (``effects``,
``series``, ``summary_windows``; :data:`PARQUET_VIEWS`) as views over their Parquet files,
which DESIGN §5 allows: copying the class-level table into DuckDB would cost more than
computing it. DuckDB binds a view when it is created, so the file must exist then, yet the
view has to read the file at its final place after the folder swap. Each such view therefore
reads through a table macro ``<table>_parquet(path := '<final path>')``: the macro is first
created with the staging path as its default, the views (and the ``sql/`` views on top of
them) are created and bound against it, and the macro is then replaced with the final
absolute path as its default (DuckDB does not re-bind views when a macro is replaced).
Nothing is written after the swap, so the folder stays atomic. The views follow the folder's
absolute path: after moving the folder, query ``effects_parquet('<new>/effects.parquet')``
or run again.
"""

from __future__ import annotations

import contextlib
import fcntl
import hashlib
import json
import os
import shutil
from collections.abc import Callable, Iterator, Mapping
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass
from importlib import resources
from pathlib import Path
from typing import Any

import duckdb
import polars as pl
import pyarrow as pa
import pyarrow.parquet as pq

from attribution.errors import OutputLockedError

SQL_PACKAGE = "attribution.sql"

#: Tables that ``results.duckdb`` holds as views over their Parquet files: the ones that
#: grow with the length of the record as well as with the roster. The others are copied.
PARQUET_VIEWS = ("effects", "series", "summary_windows")

#: Parquet settings of the streamed effects table. Dictionary encoding on the keys only:
#: the float columns that repeat (policy_weight, index_return) would save about 3 % of the
#: file for about 0.4 CPU-seconds per 14 M rows (measured at 5,000 portfolios), and the
#: others are nearly all distinct. LZ4 is several times faster to write than zstd for a few
#: per cent more bytes.
EFFECTS_DICTIONARY_COLUMNS = ("portfolio_id", "period_end", "asset_class")
EFFECTS_COMPRESSION = "lz4"
#: The tables written at the end (series is the large one): LZ4 for the same reason.
TABLE_COMPRESSION = "lz4"
ROW_GROUP_SIZE = 1 << 20

#: With ``--partitioned`` these tables are written as Hive-partitioned folders
#: (``<table>/period_year=YYYY/part-0.parquet``) instead of single files: the warehouse
#: layout loaders pick up by folder. The partition column is the year of period_end.
PARTITIONED_TABLES = ("effects", "series")
PARTITION_COLUMN = "period_year"


def partition_parquet(source: Path, folder: Path) -> None:
    """Rewrite one Parquet file as a Hive-partitioned folder by the year of period_end.

    Streams record batches (memory follows a batch, not the table) and keeps the rows'
    order within each partition, so a reader that goes through the partitions in year order
    and then orders by portfolio_id (stably) gets the file's row order back.
    """
    import pyarrow.compute as pc
    import pyarrow.dataset as ds

    dataset = ds.dataset(source, format="parquet")
    schema = dataset.schema.append(pa.field(PARTITION_COLUMN, pa.int32()))

    def batches() -> Iterator[pa.RecordBatch]:
        for batch in dataset.to_batches(use_threads=False):
            year = pc.cast(pc.year(batch.column("period_end")), pa.int32())
            yield pa.RecordBatch.from_arrays([*batch.columns, year], schema=schema)

    ds.write_dataset(
        pa.RecordBatchReader.from_batches(schema, batches()),
        folder,
        format="parquet",
        partitioning=ds.partitioning(pa.schema([(PARTITION_COLUMN, pa.int32())]), flavor="hive"),
        basename_template="part-{i}.parquet",
        existing_data_behavior="error",
        preserve_order=True,
        use_threads=False,
        max_rows_per_group=ROW_GROUP_SIZE,
        file_options=ds.ParquetFileFormat().make_write_options(compression=TABLE_COMPRESSION),
    )


def scan_output_table(folder: Path, name: str) -> pl.LazyFrame | None:
    """An output table of a results folder, lazily: ``<name>.parquet`` or, when written
    with ``--partitioned``, the ``<name>/`` folder (its partition column dropped, rows in the
    file's order when ordered stably by portfolio_id). None when the run did not write it."""
    path = folder / f"{name}.parquet"
    if path.is_file():
        return pl.scan_parquet(path)
    part = folder / name
    if part.is_dir():
        files = sorted(part.glob(f"{PARTITION_COLUMN}=*/*.parquet"))
        if not files:
            return None
        return (
            pl.scan_parquet(files, hive_partitioning=True)
            .drop(PARTITION_COLUMN)
            .sort("portfolio_id", maintain_order=True)
        )
    return None


def sha256_of(path: Path) -> str:
    """Hex SHA-256 of a file, read in 1 MiB chunks."""
    digest = hashlib.sha256()
    with path.open("rb") as handle:
        for chunk in iter(lambda: handle.read(1 << 20), b""):
            digest.update(chunk)
    return digest.hexdigest()


def _siblings(out_dir: Path) -> tuple[Path, Path, Path]:
    parent = out_dir.parent
    return (
        parent / f".{out_dir.name}.lock",
        parent / f".{out_dir.name}.staging-{os.getpid()}",
        parent / f".{out_dir.name}.previous",
    )


@contextlib.contextmanager
def output_lock(out_dir: Path) -> Iterator[None]:
    """Hold an exclusive, non-blocking lock on ``out_dir`` for the duration of the block.

    Raises :class:`OutputLockedError` (exit code 4) when another run holds it. Also
    restores the previous results if an earlier run died between its two renames.
    """
    out_dir = out_dir.resolve()
    out_dir.parent.mkdir(parents=True, exist_ok=True)
    lock_path, _, previous = _siblings(out_dir)
    handle = lock_path.open("a+")
    try:
        try:
            fcntl.flock(handle.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError as exc:
            msg = (
                f"output folder {str(out_dir)!r} is in use by another run (lock file "
                f"{str(lock_path)!r}); wait for it to finish or choose another --out."
            )
            raise OutputLockedError(msg) from exc
        if previous.exists() and not out_dir.exists():
            previous.rename(out_dir)
        elif previous.exists():
            shutil.rmtree(previous, ignore_errors=True)
        for stale in out_dir.parent.glob(f".{out_dir.name}.staging-*"):
            shutil.rmtree(stale, ignore_errors=True)
        yield
    finally:
        with contextlib.suppress(OSError):
            fcntl.flock(handle.fileno(), fcntl.LOCK_UN)
        handle.close()


def sql_files() -> list[tuple[str, str]]:
    """The view definitions over the output tables, shipped in ``sql/views/``, in order.

    Only ``sql/views`` is read: ``sql/models`` holds the warehouse models over the *input*
    tables (see :mod:`attribution.sql_models`), which do not belong in results.duckdb.
    """
    checkout = Path(__file__).resolve().parent.parent / "sql"
    # A source checkout or editable install reads sql/ in place; a wheel carries it as the
    # data package attribution.sql.
    root: Any = checkout if checkout.is_dir() else resources.files(SQL_PACKAGE)
    found: list[tuple[str, str]] = []

    def walk(node: Any, prefix: str) -> None:
        for child in sorted(node.iterdir(), key=lambda c: c.name):
            if child.is_dir():
                walk(child, f"{prefix}{child.name}/")
            elif child.name.endswith(".sql"):
                found.append((child.name[:-4], child.read_text(encoding="utf-8")))

    walk(root / "views", "")
    return found


@dataclass(frozen=True)
class ParquetView:
    """A Parquet file to expose in DuckDB as a view: where it is now, where it will be read.

    ``partitioned``: the path is a Hive-partitioned folder (``--partitioned``)."""

    staged: Path
    final: Path
    partitioned: bool = False

    def reader(self) -> str:
        """The DuckDB table function call reading ``path`` (the macro's parameter)."""
        if self.partitioned:
            return (
                f"read_parquet(path || '/{PARTITION_COLUMN}=*/*.parquet', hive_partitioning = true)"
            )
        return "read_parquet(path)"


def _sql_text(value: object) -> str:
    return "'" + str(value).replace("'", "''") + "'"


def write_duckdb(db_path: Path, parquet: Mapping[str, Path | ParquetView]) -> list[str]:
    """Build ``results.duckdb``: a table per plain path, a view per :class:`ParquetView`
    (read through the table macro ``<name>_parquet``, see the module docstring), then the
    views from ``sql/``. Returns the names of the ``sql/`` views."""
    views: list[str] = []
    con = duckdb.connect(str(db_path))
    try:
        for name, source in parquet.items():
            if isinstance(source, ParquetView):
                con.execute(
                    f"create macro {name}_parquet(path := {_sql_text(source.staged)}) as table "
                    f"select * from {source.reader()}"
                )
                con.execute(f"create view {name} as select * from {name}_parquet()")
            else:
                con.execute(f"create table {name} as select * from read_parquet(?)", [str(source)])
        for name, text in sql_files():
            con.execute(f"create or replace view {name} as {text.strip().rstrip(';')}")
            views.append(name)
        for name, source in parquet.items():
            if isinstance(source, ParquetView):
                # Re-pointing the macro does not re-bind the views built on it.
                con.execute(
                    f"create or replace macro {name}_parquet(path := {_sql_text(source.final)}) "
                    f"as table select * from {source.reader()}"
                )
    finally:
        con.close()
    return views


EffectsPart = pl.DataFrame | pa.Table | Callable[[], pa.Table]


class ParquetAppender:
    """Append tables to one Parquet file, one row group per million rows.

    A part is a pyarrow table, a polars frame, or a function that builds the pyarrow table
    (then it is built on the writer's thread too). Building and writing run on a background
    thread — numpy and pyarrow release the GIL while they work — so the next shard is
    computed meanwhile. At most one part is in the writer's hands while the caller builds the
    next: a call waits for the previous part first. Errors of the writer surface on the next
    call or on :meth:`close`.
    """

    def __init__(self, path: Path) -> None:
        self.path = path
        self._writer: pq.ParquetWriter | None = None
        self._pool: ThreadPoolExecutor | None = None
        self._pending: Future[None] | None = None
        self.rows = 0

    def _wait(self) -> None:
        if self._pending is not None:
            pending, self._pending = self._pending, None
            pending.result()

    def __call__(self, part: EffectsPart) -> None:
        self._wait()
        if self._pool is None:
            self._pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="parquet-writer")
        self._pending = self._pool.submit(self._write, part)

    def _write(self, part: EffectsPart) -> None:
        if isinstance(part, pl.DataFrame):
            table = part.to_arrow()
        elif isinstance(part, pa.Table):
            table = part
        else:
            table = part()
        if self._writer is None:
            dictionary = [c for c in EFFECTS_DICTIONARY_COLUMNS if c in table.column_names]
            self._writer = pq.ParquetWriter(
                self.path,
                table.schema,
                compression=EFFECTS_COMPRESSION,
                use_dictionary=dictionary,
                # Min/max statistics on the keys only: they let readers skip row groups by
                # portfolio and period; on the float columns they cost CPU and prune nothing.
                write_statistics=dictionary,
                # Text columns may arrive dictionary-encoded; without the stored Arrow schema
                # every reader sees them as plain strings.
                store_schema=False,
            )
        self._writer.write_table(table, row_group_size=ROW_GROUP_SIZE)
        self.rows += table.num_rows

    def close(self, empty_schema: dict[str, pl.DataType] | None = None) -> None:
        """Finish the pending part and the file (an empty table with ``empty_schema`` when
        nothing was appended)."""
        try:
            self._wait()
        finally:
            if self._pool is not None:
                self._pool.shutdown(wait=True)
                self._pool = None
        if self._writer is not None:
            self._writer.close()
        elif empty_schema is not None:
            pl.DataFrame(schema=empty_schema).write_parquet(self.path)


class StagedOutput:
    """An output folder written atomically: a hidden staging folder, swapped in at the end.

    Use as a context manager under :func:`output_lock`; call :meth:`commit` once everything
    is written. Leaving the block without committing (an error, a kill) leaves the previous
    contents of the folder as they were.
    """

    def __init__(self, out_dir: Path) -> None:
        self.out_dir = out_dir.resolve()
        _, self.staging, self._previous = _siblings(self.out_dir)
        self._committed = False

    def __enter__(self) -> StagedOutput:
        if self.staging.exists():
            shutil.rmtree(self.staging)
        self.staging.mkdir(parents=True)
        return self

    def __exit__(self, *exc: object) -> None:
        if not self._committed:
            shutil.rmtree(self.staging, ignore_errors=True)

    def path(self, name: str) -> Path:
        return self.staging / name

    def commit(
        self,
        tables: Mapping[str, pl.DataFrame],
        *,
        manifest: dict[str, Any],
        row_counts: Mapping[str, int],
        extra_files: Mapping[str, bytes] | None = None,
        partitioned: bool = False,
    ) -> Path:
        """Write the remaining tables, the DuckDB file and the manifest, then swap folders.

        Parquet files already in the staging folder (streamed tables) are kept and put in
        DuckDB with the rest (:data:`PARQUET_VIEWS` as views over the files, the others as
        copies). With ``partitioned`` the :data:`PARTITIONED_TABLES` become Hive-partitioned
        folders (:func:`partition_parquet`).
        """
        for name, frame in tables.items():
            frame.write_parquet(self.staging / f"{name}.parquet", compression=TABLE_COMPRESSION)
        files = sorted(self.staging.glob("*.parquet"))
        parquet: dict[str, Path | ParquetView] = {}
        for p in files:
            if partitioned and p.stem in PARTITIONED_TABLES:
                folder = self.staging / p.stem
                partition_parquet(p, folder)
                p.unlink()
                parquet[p.stem] = ParquetView(
                    staged=folder, final=self.out_dir / p.stem, partitioned=True
                )
            elif p.stem in PARQUET_VIEWS:
                parquet[p.stem] = ParquetView(staged=p, final=self.out_dir / p.name)
            else:
                parquet[p.stem] = p
        views = write_duckdb(self.staging / "results.duckdb", parquet)
        for name, content in (extra_files or {}).items():
            (self.staging / name).write_bytes(content)
        manifest = dict(manifest)
        manifest["outputs"] = {
            name: {"file": f"{name}.parquet", "rows": int(row_counts[name])}
            if not (isinstance(source, ParquetView) and source.partitioned)
            else {
                "folder": f"{name}/",
                "partitioned_by": PARTITION_COLUMN,
                "rows": int(row_counts[name]),
            }
            for name, source in sorted(parquet.items())
        }
        manifest["duckdb_views"] = views
        manifest["duckdb_parquet_views"] = sorted(n for n in parquet if n in PARQUET_VIEWS)
        (self.staging / "manifest.json").write_text(
            json.dumps(manifest, indent=2, sort_keys=True, default=str) + "\n", encoding="utf-8"
        )
        if self.out_dir.exists():
            self.out_dir.rename(self._previous)
        try:
            self.staging.rename(self.out_dir)
        except BaseException:
            if self._previous.exists() and not self.out_dir.exists():
                self._previous.rename(self.out_dir)
            raise
        self._committed = True
        shutil.rmtree(self._previous, ignore_errors=True)
        return self.out_dir
