"""The Python API: run a roster from paths or in-memory tables and get frames back.

>>> from attribution import run  # doctest: +SKIP
>>> result = run(holdings=h, index_returns=ir, policy=pol, linking="menchero")  # doctest: +SKIP
>>> result.summary  # a polars DataFrame  # doctest: +SKIP
>>> result.write("results/")  # the same folder the command line writes  # doctest: +SKIP
"""

from __future__ import annotations

import dataclasses
import datetime as dt
from pathlib import Path
from typing import Any

import polars as pl

from attribution import __version__
from attribution.errors import OptionError
from attribution.load import TableSource
from attribution.options import RunOptions
from attribution.runner import RunResult, run_roster


def build_manifest(
    result: RunResult,
    sources: dict[str, Any],
    *,
    engine: str | None = None,
    hashes: dict[str, dict[str, str]] | None = None,
) -> dict[str, Any]:
    """The run's manifest: inputs (with SHA-256 for files), options, version, counts, timings."""
    issues = result.data_issues
    inputs: dict[str, Any] = dict(hashes or {})
    for name, src in sources.items():
        if name not in inputs and src is not None and not isinstance(src, str | Path):
            inputs[name] = {"path": None, "in_memory": type(src).__name__}
    return {
        "tool": "tiltaudit",
        "version": __version__,
        "engine": engine or result.engine,
        "engine_version": result.engine_version or engine_version(engine or result.engine),
        "inputs": inputs,
        "options": result.options.to_dict(),
        "calendar": {
            "first_period": str(result.calendar.period_ends[0]),
            "last_period": str(result.calendar.period_ends[-1]),
            "frequency": result.calendar.frequency,
            "periods_per_year": result.calendar.periods_per_year,
        },
        "counts": {
            "portfolios_run": result.summary.height,
            "portfolios_skipped": len(result.skipped),
            "issues_error": issues.filter(pl.col("severity") == "error").height,
            "issues_warning": issues.filter(pl.col("severity") == "warning").height,
        },
        "exit_code": result.exit_code,
        "notes": list(result.notes),
        "finished_at": dt.datetime.now(dt.UTC).isoformat(timespec="seconds"),
        "incremental": {"mode": "full", **result.reuse},
        "fingerprints": None
        if result.fingerprints is None
        else {
            "shared": result.shared_fingerprint,
            "portfolios": dict(result.fingerprints.sort("portfolio_id").iter_rows()),
        },
        "timings_seconds": dict(result.timings),
    }


def engine_version(engine: str) -> str:
    """What ran the kernels: ``polars <v>`` for the local engine, ``pyspark <v>`` on Spark."""
    if engine == "spark":
        from attribution.spark_engine import spark_version

        return f"pyspark {spark_version()}"
    return f"polars {pl.__version__}"


def file_hashes(sources: dict[str, Any]) -> dict[str, dict[str, str]]:
    """Path and SHA-256 of every input given as a file."""
    from attribution.outputs import sha256_of

    out = {}
    for name, src in sources.items():
        if isinstance(src, str | Path):
            path = Path(src)
            out[name] = {"path": str(path.resolve()), "sha256": sha256_of(path)}
    return out


def write_result(result: RunResult, out_dir: str | Path, sources: dict[str, Any]) -> Path:
    """Write an in-memory result as the command line would: atomically, under the lock."""
    from attribution.outputs import StagedOutput, output_lock
    from attribution.report import build_report

    out = Path(out_dir)
    manifest = build_manifest(result, sources, hashes=file_hashes(sources))
    tables = result.tables()
    with output_lock(out), StagedOutput(out) as staged:
        return staged.commit(
            tables,
            manifest=manifest,
            row_counts={name: frame.height for name, frame in tables.items()},
            extra_files={"report.html": build_report(tables, manifest=manifest).encode("utf-8")},
        )


def run(
    *,
    holdings: TableSource,
    index_returns: TableSource,
    policy: TableSource,
    riskfree: TableSource | None = None,
    segment_returns: TableSource | None = None,
    portfolio_returns: TableSource | None = None,
    portfolio_values: TableSource | None = None,
    engine: str = "local",
    spark: Any = None,
    **options: Any,
) -> RunResult:
    """Run a roster in memory. Tables are paths (Parquet/CSV) or polars, pandas or Arrow
    tables; ``options`` are the command line's long options with underscores
    (``linking="menchero"``, ``static="trailing:12"``, ``tests="exact"``, …).

    ``engine="spark"`` runs the same kernels on Spark's executors
    (:func:`attribution.spark_engine.run_roster_spark`; ``spark`` is the session to use, else
    the active one, else a local one).

    Returns the frozen :class:`~attribution.runner.RunResult`: every output table as a
    polars frame, ``.write(dir)`` and a notebook view. Bad input raises
    :class:`attribution.errors.InputError` with the same message the command line prints.
    """
    sources = {
        "holdings": holdings,
        "index_returns": index_returns,
        "policy": policy,
        "riskfree": riskfree,
        "segment_returns": segment_returns,
        "portfolio_returns": portfolio_returns,
        "portfolio_values": portfolio_values,
    }
    opts = RunOptions.build(**options)
    if engine == "local":
        result = run_roster(sources, opts)
    elif engine == "spark":
        from attribution.spark_engine import run_roster_spark

        result = run_roster_spark(sources, opts, spark=spark)
    else:
        msg = f"The 'engine' option must be 'local' or 'spark'. Got {engine!r} instead."
        raise OptionError(msg)
    result = dataclasses.replace(result, engine=engine, engine_version=engine_version(engine))
    return result.with_sources(sources)
