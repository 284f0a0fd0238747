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


def write_results(
    tables: Mapping[str, pl.DataFrame],
    out_dir: Path,
    *,
    manifest: dict[str, Any],
    extra_files: Mapping[str, bytes] | None = None,
) -> Path:
    """Write the tables as Parquet and DuckDB plus ``manifest.json`` into ``out_dir``.

    The caller holds :func:`output_lock`. ``extra_files`` (e.g. the report) are written as
    they are. Returns the folder.
    """
    out_dir = out_dir.resolve()
    _, staging, previous = _siblings(out_dir)
    if staging.exists():
        shutil.rmtree(staging)
    staging.mkdir(parents=True)
    try:
        paths = {}
        for name, frame in tables.items():
            path = staging / f"{name}.parquet"
            frame.write_parquet(path, compression="zstd", statistics=True)
            paths[name] = path
        views = write_duckdb(staging / "results.duckdb", paths)
        for name, content in (extra_files or {}).items():
            (staging / name).write_bytes(content)
        manifest = dict(manifest)
        manifest["outputs"] = {
            name: {"file": f"{name}.parquet", "rows": frame.height}
            for name, frame in tables.items()
        }
        manifest["duckdb_views"] = views
        (staging / "manifest.json").write_text(
            json.dumps(manifest, indent=2, sort_keys=True, default=str) + "\n", encoding="utf-8"
        )
        if out_dir.exists():
            out_dir.rename(previous)
        staging.rename(out_dir)
        shutil.rmtree(previous, ignore_errors=True)
    except BaseException:
        shutil.rmtree(staging, ignore_errors=True)
        if previous.exists() and not out_dir.exists():
            previous.rename(out_dir)
        raise
    return out_dir
