"""The ``tiltaudit`` command line: run, validate, demo, simulate.

Exit codes (DESIGN §2): 0 every portfolio ran (warnings allowed); 3 finished but at least
one portfolio was skipped; 2 a whole-input or usage error, nothing written; 4 another run
holds the output folder. Bad input is reported in one line on stderr, never a traceback.
Flags override ``--config`` TOML values; the TOML keys are the long option names with
underscores.
"""

from __future__ import annotations

import dataclasses
import functools
import sys
import tempfile
import time
import tomllib
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Any

import click
import polars as pl
from click.core import ParameterSource
from rich.console import Console
from rich.table import Table

from attribution import __version__
from attribution.errors import OptionError, ReadError, TiltauditError
from attribution.options import RunOptions
from attribution.runner import RunResult, prepare, run_roster
from attribution.terminal import CAUTIONS, LOG_FORMATS, RunReporter, make_console

INPUT_FLAGS = (
    ("holdings", "Holdings: portfolio_id, as_of, asset_class, weight (.parquet or .csv)."),
    ("index_returns", "Asset-class index returns: period_end, asset_class, return."),
    ("policy", "Policy mix: portfolio_id, asset_class, weight, effective_from."),
    ("riskfree", "Riskless returns: period_end, return (needed for timing tests)."),
    ("segment_returns", "Segment returns: portfolio_id, period_end, asset_class, return."),
    ("portfolio_returns", "Reported returns: portfolio_id, period_end, return."),
    ("portfolio_values", "Portfolio values: portfolio_id, as_of, value (money terms, plan view)."),
)
OPTION_FLAGS: tuple[tuple[str, type | click.ParamType, str], ...] = (
    ("static", str, "Static weight: window (default) | expanding | trailing:N."),
    ("form", click.Choice(["bf", "bhb"]), "Decomposition form: bf (default) | bhb."),
    (
        "linking",
        click.Choice(["carino", "menchero", "grap", "frongello"]),
        "Linking method (default carino).",
    ),
    ("align", click.Choice(["none", "month", "quarter"]), "Map dates to period ends."),
    ("weight_tolerance", float, "Allowed |Σ weights − 1| (default 1e-4)."),
    ("cash_class", str, "Asset class whose index return is the riskless return."),
    ("tests", click.Choice(["all", "exact", "none"]), "Timing tests to run (default all)."),
    ("market", str, "Market for timing tests: policy (default) or an asset class."),
    ("exposure", click.Choice(["beta", "risky-weight"]), "Exposure measure (default beta)."),
    ("beta_window", str, "Class betas: full (default) or expanding:N."),
    ("pcm_lag", int, "Lag of the portfolio-change measure in periods (default 1)."),
    ("draws", int, "Resampling draws (default 999)."),
    ("seed", int, "Seed of the resampling tests."),
    ("reference_hit_rate", float, "Hit rate of the reference timer (default 0.60)."),
    ("reference_power", float, "Power for the record-length verdict (default 0.50)."),
)


def _fail(exc: TiltauditError) -> None:
    click.echo(f"tiltaudit: error: {exc}", err=True)
    sys.exit(exc.exit_code)


def handle_errors(func: Callable[..., Any]) -> Callable[..., Any]:
    """Turn the package's exceptions into one stderr line and their exit code."""

    @functools.wraps(func)
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        try:
            return func(*args, **kwargs)
        except TiltauditError as exc:
            _fail(exc)

    return wrapper


def input_options(func: Callable[..., Any]) -> Callable[..., Any]:
    """The six input-table flags plus ``--config``."""
    for name, text in reversed(INPUT_FLAGS):
        flag = "--" + name.replace("_", "-")
        func = click.option(flag, name, type=click.Path(dir_okay=False), help=text)(func)
    return click.option(
        "--config",
        type=click.Path(dir_okay=False),
        help="TOML file; keys are long option names with underscores. Flags win.",
    )(func)


def run_options(func: Callable[..., Any]) -> Callable[..., Any]:
    """The method option flags (every one optional; the defaults live in RunOptions)."""
    for name, kind, text in reversed(OPTION_FLAGS):
        flag = "--" + name.replace("_", "-")
        func = click.option(flag, name, type=kind, default=None, help=text)(func)
    return func


def _merged(ctx: click.Context, params: dict[str, Any]) -> dict[str, Any]:
    """Command-line values, filled from the ``--config`` TOML where a flag was not given."""
    config_path = params.pop("config", None)
    if not config_path:
        return params
    path = Path(config_path)
    try:
        config = tomllib.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError as exc:
        msg = f"config: file {str(path)!r} does not exist."
        raise ReadError(msg) from exc
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        msg = f"config: {str(path)!r} is not valid TOML ({exc})."
        raise ReadError(msg) from exc
    # One job file serves run and validate alike: validate has no --out and ignores it.
    unknown = sorted(set(config) - set(params) - {"out"})
    if unknown:
        msg = f"config: unknown key(s) {unknown} in {str(path)!r}; known keys: {sorted(params)}."
        raise OptionError(msg)
    for key, value in config.items():
        if key not in params:
            continue
        if ctx.get_parameter_source(key) in (ParameterSource.DEFAULT, None):
            if key in dict(INPUT_FLAGS) or key == "out":
                # Relative paths in a config file are read from the file's folder.
                value = str((path.parent / str(value)).resolve())
            params[key] = value
    return params


def _split(params: dict[str, Any]) -> tuple[dict[str, Any], RunOptions]:
    sources = {name: params.get(name) for name, _ in INPUT_FLAGS}
    opts = RunOptions.build(**{name: params.get(name) for name, _, _ in OPTION_FLAGS})
    return sources, opts


def _console(quiet: bool = False) -> Console:
    # Never forces colour; NO_COLOR drops every style code; 160 columns off a terminal.
    return make_console(quiet=quiet)


#: The tables a run streams to Parquet shard by shard instead of holding them.
STREAMED = ("effects", "series")


def execute_run(
    sources: dict[str, Any],
    options: RunOptions,
    out_dir: Path,
    *,
    started: float,
    write_report: bool = True,
    progress: Callable[[int, int], None] | None = None,
    incremental: bool = False,
    partitioned: bool = False,
    record_fingerprints: bool = False,
    engine: str = "local",
) -> RunResult:
    """Run the roster and write its outputs atomically under the folder's lock.

    ``incremental=True`` re-evaluates only the portfolios whose inputs changed since the
    run recorded in ``out_dir`` (:mod:`attribution.incremental`); the rest are copied.
    ``partitioned=True`` writes effects and series as Hive-partitioned folders.
    ``record_fingerprints=True`` (implied by ``incremental``) records the portfolios' input
    fingerprints in the manifest for the next incremental run. ``engine="spark"`` runs the
    kernels on Spark (:mod:`attribution.spark_engine`); incremental runs are local only.

    ``write_report=False`` leaves report.html out (``tiltaudit report`` can build it later
    from the stored tables). ``progress(done, total)`` is handed to the runner (portfolios
    counted; see :func:`attribution.runner.run_roster`).
    """
    from attribution.api import build_manifest, engine_version, file_hashes
    from attribution.decompose import EFFECTS_ORDER, SERIES_ORDER
    from attribution.incremental import load_previous, shared_fingerprint, with_incremental_note
    from attribution.outputs import ParquetAppender, StagedOutput, output_lock

    if engine == "spark" and incremental:
        msg = (
            "The 'incremental' option needs --engine local; the spark engine evaluates every "
            "portfolio (give --full, or leave --incremental out)."
        )
        raise OptionError(msg)
    prepared = prepare(sources, options)  # bad input fails here, before anything is written
    # The inputs' SHA-256 for the manifest is computed on its own thread while the roster
    # runs (hashlib releases the GIL), not after it.
    hasher = ThreadPoolExecutor(max_workers=1, thread_name_prefix="input-hashes")
    hashes = hasher.submit(file_hashes, sources)
    hasher.shutdown(wait=False)
    with output_lock(out_dir), StagedOutput(out_dir) as staged:
        previous, reason = None, ""
        if incremental:
            shared = shared_fingerprint(
                prepared.shared.index_returns, prepared.shared.riskless, options.to_dict()
            )
            previous, reason = load_previous(out_dir, shared)
        # The two roster × record tables go to Parquet shard by shard (memory stays bounded).
        effects = ParquetAppender(staged.path("effects.parquet"))
        series = ParquetAppender(staged.path("series.parquet"))
        try:
            if engine == "spark":
                from attribution.spark_engine import run_roster_spark

                result = run_roster_spark(
                    prepared,
                    options,
                    effects_sink=effects,
                    series_sink=series,
                    progress=progress,
                    fingerprints=record_fingerprints,
                )
            else:
                result = run_roster(
                    prepared,
                    options,
                    effects_sink=effects,
                    series_sink=series,
                    progress=progress,
                    previous=previous,
                    fingerprints=record_fingerprints,
                )
            result = dataclasses.replace(
                result, engine=engine, engine_version=engine_version(engine)
            )
        finally:
            effects.close(empty_schema=dict.fromkeys(EFFECTS_ORDER, pl.Float64()))
            series.close(empty_schema=dict.fromkeys(SERIES_ORDER, pl.Float64()))
        result = with_incremental_note(result, incremental=incremental, reason=reason)
        tables = result.tables()
        counts = {name: frame.height for name, frame in tables.items()}
        counts["effects"] = effects.rows
        counts["series"] = series.rows
        manifest = build_manifest(result, sources, hashes=hashes.result())
        timings = manifest["timings_seconds"]
        clock = time.perf_counter()
        timings["write_started"] = clock - started
        extra_files = {}
        if write_report:
            from attribution.report import build_report

            streamed = {name: pl.scan_parquet(staged.path(f"{name}.parquet")) for name in STREAMED}
            report = build_report({**tables, **streamed}, manifest=manifest)
            extra_files["report.html"] = report.encode("utf-8")
        staged.commit(
            tables,
            manifest=manifest,
            row_counts=counts,
            extra_files=extra_files,
            partitioned=partitioned,
        )
    return result


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="tiltaudit")
def main() -> None:
    """tiltaudit: static allocation, timing and selection, linked, with timing-skill tests."""


@main.command()
@input_options
@click.option("--out", "out", type=click.Path(file_okay=False), help="Output folder.")
@run_options
@click.option(
    "--incremental",
    is_flag=True,
    default=None,
    help="Re-evaluate only portfolios whose inputs changed since the run in --out.",
)
@click.option(
    "--full", is_flag=True, default=None, help="Evaluate every portfolio (wins over --incremental)."
)
@click.option(
    "--engine",
    type=click.Choice(["local", "spark"]),
    default=None,
    help="local (default): this machine, shard by shard; spark: the same kernels on Spark's "
    "executors (pyspark >= 4, Java 17; the active session, else local[2]).",
)
@click.option(
    "--partitioned",
    is_flag=True,
    default=None,
    help="Write effects and series as Hive-partitioned folders (period_year=YYYY/).",
)
@click.option(
    "--report/--no-report",
    "write_report",
    default=True,
    help="Write report.html (default) or leave it to `tiltaudit report`.",
)
@click.option("--quiet", is_flag=True, help="Print nothing but errors.")
@click.option(
    "--log-format",
    type=click.Choice(LOG_FORMATS),
    default="text",
    show_default=True,
    help="text: progress on a terminal and a summary table; json: one JSON event per line.",
)
@click.pass_context
@handle_errors
def run(
    ctx: click.Context, quiet: bool, write_report: bool, log_format: str, **params: Any
) -> None:
    """Evaluate a roster and write every table into --out."""
    started = time.perf_counter()
    # The reporter draws the progress bar (a terminal only), prints the summary or the JSON
    # events, and on an error stops the bar and writes the JSON error event.
    reporter = RunReporter(command="run", log_format=log_format, quiet=quiet, started=started)
    with reporter:
        params = _merged(ctx, params)
        out = params.pop("out", None)
        if not out:
            raise OptionError("The 'out' option is required: give the output folder with --out.")
        reporter.run_started(out)
        full = bool(params.pop("full", None))
        incremental = bool(params.pop("incremental", None)) and not full
        partitioned = bool(params.pop("partitioned", None))
        engine = params.pop("engine", None) or "local"
        sources, options = _split(params)
        result = execute_run(
            sources,
            options,
            Path(out),
            started=started,
            write_report=write_report,
            progress=reporter.progress,
            incremental=incremental,
            partitioned=partitioned,
            record_fingerprints=incremental or full,
            engine=engine,
        )
        reporter.finished(result, out)
    sys.exit(result.exit_code)


@main.command()
@input_options
@run_options
@click.pass_context
@handle_errors
def validate(ctx: click.Context, **params: Any) -> None:
    """Check the inputs only: list the data issues and exit with the code a run would give.

    Nothing is written. The portfolios are put through the same steps as a run (the
    decomposition included, since some warnings only show there) and the results dropped;
    the timing tests are not run, so their warnings (test_too_few_periods, test_undefined)
    appear only in a run.
    """
    params = _merged(ctx, params)
    sources, options = _split(params)
    # Inputs only: the timing tests (and their warnings) are left to the run.
    options = dataclasses.replace(options, tests="none")
    result = run_roster(
        sources, options, effects_sink=lambda part: None, series_sink=lambda part: None
    )
    console = _console()
    issues = result.data_issues
    if issues.height:
        table = Table(title="data issues", box=None)
        for col in ("portfolio_id", "severity", "code", "message"):
            table.add_column(col)
        for row in issues.iter_rows(named=True):
            table.add_row(row["portfolio_id"], row["severity"], row["code"], row["message"])
        console.print(table)
    console.print(
        f"{result.summary.height} portfolio(s) would run, {len(result.skipped)} would be "
        f"skipped; {issues.height} issue(s)."
    )
    sys.exit(result.exit_code)


@main.command()
@click.option(
    "--out",
    type=click.Path(file_okay=False),
    default="tiltaudit-demo",
    show_default=True,
    help="Output folder.",
)
@click.option("--quiet", is_flag=True, help="Print nothing but errors.")
@click.option(
    "--log-format",
    type=click.Choice(LOG_FORMATS),
    default="text",
    show_default=True,
    help="text: progress on a terminal and a summary table; json: one JSON event per line.",
)
@handle_errors
def demo(out: str, quiet: bool, log_format: str) -> None:
    """Run the bundled, invented demo roster end to end."""
    from attribution.simulate import demo_tables, write_tables

    started = time.perf_counter()
    reporter = RunReporter(command="demo", log_format=log_format, quiet=quiet, started=started)
    with reporter, tempfile.TemporaryDirectory(prefix="tiltaudit-demo-") as tmp:
        reporter.run_started(out)
        paths = write_tables(demo_tables(), Path(tmp))
        sources = {name: str(path) for name, path in paths.items()}
        options = RunOptions.build()
        result = execute_run(
            sources, options, Path(out), started=started, progress=reporter.progress
        )
        reporter.finished(result, out)
    sys.exit(result.exit_code)


@main.command()
@click.option("--out", required=True, type=click.Path(file_okay=False), help="Folder.")
@click.option("--portfolios", "n_portfolios", type=click.IntRange(1), default=1000)
@click.option("--classes", "n_classes", type=click.IntRange(2), default=12)
@click.option("--periods", "n_periods", type=click.IntRange(2), default=240)
@click.option("--seed", type=click.IntRange(0), default=0)
@click.option("--segment-returns/--no-segment-returns", default=True)
@click.option("--portfolio-returns/--no-portfolio-returns", default=True)
@handle_errors
def simulate(out: str, **params: Any) -> None:
    """Write a random roster of any size (Parquet) for tests and benchmarks."""
    from attribution.simulate import write_simulated_roster

    paths = write_simulated_roster(Path(out), **params)
    for name, path in paths.items():
        click.echo(f"{name}: {path}")


@main.command()
@click.option(
    "--results",
    required=True,
    type=click.Path(file_okay=False),
    help="Output folder of an earlier run.",
)
@click.option("--out", "out_file", type=click.Path(dir_okay=False), help="Default DIR/report.html.")
@click.option("--portfolio", "portfolios", multiple=True, help="Detail pages for these ids only.")
@click.option("--max-detail", type=click.IntRange(0), default=50, show_default=True)
@handle_errors
def report(
    results: str, out_file: str | None, portfolios: tuple[str, ...], max_detail: int
) -> None:
    """Rebuild report.html from the stored tables of a run (nothing is recomputed)."""
    import os

    from attribution.outputs import output_lock
    from attribution.report import build_report_from_folder

    folder = Path(results)
    if not folder.is_dir():
        msg = f"report: results folder {str(folder)!r} does not exist."
        raise ReadError(msg)
    target = Path(out_file) if out_file else folder / "report.html"
    with output_lock(folder):
        html = build_report_from_folder(
            folder, portfolios=list(portfolios) or None, max_detail=max_detail
        )
        partial = target.with_name(f".{target.name}.partial")
        partial.write_text(html, encoding="utf-8")
        os.replace(partial, target)
    click.echo(f"report: {target}")


@main.command()
@click.option("--periods", type=click.IntRange(2), help="Record length in periods.")
@click.option("--hit-rate", type=float, help="A timer's hit rate (share of right calls).")
@click.option("--correlation", type=float, help="Correlation of exposure with the market.")
@click.option("--timing-return", type=float, help="Annual timing return (0.01 = 1 %).")
@click.option("--timing-volatility", type=float, help="Annual volatility of the timing return.")
@click.option("--periods-per-year", type=click.IntRange(1), default=12, show_default=True)
@click.option("--power", "power_level", type=float, default=0.8, show_default=True)
@click.option("--alpha", type=float, default=0.05, show_default=True)
@handle_errors
def power(
    periods: int | None,
    hit_rate: float | None,
    correlation: float | None,
    timing_return: float | None,
    timing_volatility: float | None,
    periods_per_year: int,
    power_level: float,
    alpha: float,
) -> None:
    """How long a record must be to detect a timing skill, and the smallest skill a record
    of --periods can detect (one-sided tests at --alpha with --power)."""
    from attribution.power import power_summary

    if all(v is None for v in (periods, hit_rate, correlation, timing_return)):
        msg = (
            "power: give a record length (--periods) and/or a skill (--hit-rate, "
            "--correlation, --timing-return with --timing-volatility)."
        )
        raise OptionError(msg)
    answer = power_summary(
        periods=periods,
        hit_rate=hit_rate,
        correlation=correlation,
        timing_return_ann=timing_return,
        timing_volatility_ann=timing_volatility,
        periods_per_year=periods_per_year,
        power=power_level,
        alpha=alpha,
    )
    console = _console()
    table = Table(title=f"power {answer.power:.0%} at one-sided {answer.alpha:g}", box=None)
    table.add_column("question")
    table.add_column("answer", justify="right")

    def show(value: object, fmt: str) -> str:
        return "not reachable / not given" if value is None else format(value, fmt)

    if hit_rate is not None:
        table.add_row(
            f"periods needed, hit rate {hit_rate:.0%}", show(answer.periods_needed_hit_rate, "d")
        )
    if correlation is not None:
        table.add_row(
            f"periods needed, correlation {correlation:g}",
            show(answer.periods_needed_correlation, "d"),
        )
    if timing_return is not None:
        table.add_row(
            f"periods needed, timing return {timing_return:.2%}/yr",
            show(answer.periods_needed_timing_return, "d"),
        )
    if periods is not None:
        table.add_row(
            f"smallest hit rate detectable in {periods} periods",
            show(answer.detectable_hit_rate, ".3f"),
        )
        table.add_row(
            f"smallest correlation detectable in {periods} periods",
            show(answer.detectable_correlation, ".3f"),
        )
        table.add_row(
            f"smallest timing return detectable in {periods} periods (per year)",
            show(answer.detectable_timing_return_ann, ".2%"),
        )
    console.print(table)
    console.print(CAUTIONS)


def entry() -> None:  # pragma: no cover - thin wrapper for python -m
    main(prog_name="tiltaudit")


if __name__ == "__main__":  # pragma: no cover
    entry()
