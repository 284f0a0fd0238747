"""Writing a run's tables: Parquet files, one DuckDB database, a manifest — atomically.

The output folder is replaced as a whole: everything is written into a hidden sibling
folder first and swapped in with two renames, so a run that fails or is killed leaves the
previous results intact. A lock file beside the folder (``flock``, released by the kernel
when the process dies) keeps two runs from writing the same folder at once.
"""

from __future__ import annotations

import contextlib
import fcntl
import hashlib
import json
import os
import shutil
from collections.abc import Iterator, Mapping
from importlib import resources
from pathlib import Path
from typing import Any

import duckdb
import polars as pl
import pyarrow.parquet as pq

from attribution.errors import OutputLockedError

SQL_PACKAGE = "attribution.sql"


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
    """The view definitions shipped in ``sql/`` as ``(view_name, select_text)``, in order."""
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

    walk(root, "")
    return found


def write_duckdb(db_path: Path, parquet: Mapping[str, Path]) -> list[str]:
    """Load every table into ``results.duckdb`` and create the views from ``sql/``."""
    views: list[str] = []
    con = duckdb.connect(str(db_path))
    try:
        for name, path in parquet.items():
            con.execute(f"create table {name} as select * from read_parquet(?)", [str(path)])
        for name, text in sql_files():
            con.execute(f"create or replace view {name} as {text.strip().rstrip(';')}")
            views.append(name)
    finally:
        con.close()
    return views


class ParquetAppender:
    """Append polars frames to one Parquet file (one row group per frame or more)."""

    def __init__(self, path: Path) -> None:
        self.path = path
        self._writer: pq.ParquetWriter | None = None
        self.rows = 0

    def __call__(self, frame: pl.DataFrame) -> None:
        table = frame.to_arrow()
        if self._writer is None:
            self._writer = pq.ParquetWriter(self.path, table.schema, compression="zstd")
        self._writer.write_table(table, row_group_size=1 << 20)
        self.rows += frame.height

    def close(self, empty_schema: dict[str, pl.DataType] | None = None) -> None:
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
    ) -> Path:
        """Write the remaining tables, the DuckDB file and the manifest, then swap folders.

        Parquet files already in the staging folder (streamed tables) are kept and loaded
        into DuckDB with the rest.
        """
        for name, frame in tables.items():
            frame.write_parquet(self.staging / f"{name}.parquet", compression="zstd")
        parquet = {p.stem: p for p in sorted(self.staging.glob("*.parquet"))}
        views = write_duckdb(self.staging / "results.duckdb", parquet)
        for name, content in (extra_files or {}).items():
            (self.staging / name).write_bytes(content)
        manifest = dict(manifest)
        manifest["outputs"] = {
            name: {"file": f"{name}.parquet", "rows": int(row_counts[name])}
            for name in sorted(parquet)
        }
        manifest["duckdb_views"] = views
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
