"""What ``tiltaudit run`` and ``tiltaudit demo`` show while they work and when they finish.

Two log formats (``--log-format``):

* ``text`` (default), for people: while the shards run, a progress bar on stderr (portfolios
  done / total, elapsed time), then a status line while the tables and the report are written;
  at the end, the summary table on stdout. The bar and the status line appear only when stderr
  is an interactive terminal (not a pipe or a file, not ``TERM=dumb``) and ``--quiet`` is not
  given, so logs and pipes never receive cursor movements.
* ``json``, for schedulers: stdout carries nothing but JSON objects, one per line, each with an
  ``event`` name and a UTC ``timestamp`` (see :data:`EVENTS`). Floats that are NaN or infinite
  are written as ``null``, so every line is strict JSON. A run ends with exactly one
  ``run_finished`` or one ``error`` line. Errors also keep their one-line message on stderr
  (for whoever reads the scheduler's error log); stdout stays pure JSON.

``--quiet`` prints nothing but errors, in both formats: in ``json`` the ``error`` line is the
only one left.

Colour: rich adds colour and text styles only on a terminal. ``NO_COLOR`` (any non-empty
value; convention of https://no-color.org) turns off every style code, bold and italic
included, even when ``FORCE_COLOR`` asks for colour on a pipe. Rich's own ``NO_COLOR`` handling
strips colours but keeps bold and italic, hence ``color_system=None`` here.
"""

from __future__ import annotations

import datetime as dt
import json
import math
import os
import sys
import time
from pathlib import Path
from types import TracebackType
from typing import Any, Literal, TextIO

import polars as pl
from rich.console import Console
from rich.progress import (
    BarColumn,
    MofNCompleteColumn,
    Progress,
    TextColumn,
    TimeElapsedColumn,
)
from rich.status import Status
from rich.table import Table

from attribution import __version__
from attribution.errors import TiltauditError
from attribution.runner import RunResult

LogFormat = Literal["text", "json"]
LOG_FORMATS: tuple[LogFormat, ...] = ("text", "json")

CAUTIONS = (
    "Cautions: statistical evidence is not proof of skill; short records have little power; "
    "past results do not guarantee future ones; this is not investment advice. Defer to the "
    "plan's governance and to licensed professionals."
)

#: The events of ``--log-format json``, in the order a run writes them, with their fields
#: (besides ``event`` and ``timestamp``).
EVENTS = {
    "run_started": ("command", "version", "out"),
    "shard_done": ("done", "total"),
    "note": ("message",),
    "portfolio": (
        "portfolio_id",
        "n_periods",
        "return_source",
        "active_return",
        "static_allocation",
        "timing",
        "selection",
        "interaction",
        "residual",
        "timing_evidence",
    ),
    "portfolio_skipped": ("portfolio_id", "reason"),
    "plan_total": (
        "first_period",
        "last_period",
        "n_periods",
        "plan_value_first",
        "active_return",
        "timing",
        "active_money",
        "static_allocation_money",
        "timing_money",
        "selection_money",
        "residual_money",
    ),
    "caution": ("message",),
    "run_finished": (
        "exit_code",
        "portfolios_run",
        "portfolios_skipped",
        "issues_error",
        "issues_warning",
        "out",
        "seconds",
    ),
    "error": ("exit_code", "message"),
}
#: Rows of the text summary table; a larger roster is summed up in one line below it (the
#: whole roster is in summary.parquet and in the report).
MAX_TABLE_ROWS = 50
#: Skipped portfolios listed by id in the text summary before the rest are counted.
MAX_SKIPPED_LINES = 20
#: Width for tables when stdout is not a terminal: rich would otherwise wrap at 80 columns.
PIPE_WIDTH = 160


def no_color_requested(environ: dict[str, str] | None = None) -> bool:
    """True when ``NO_COLOR`` is set to a non-empty value (rule of https://no-color.org)."""
    env = os.environ if environ is None else environ
    return env.get("NO_COLOR", "") != ""


def make_console(
    *, file: TextIO | None = None, stderr: bool = False, quiet: bool = False
) -> Console:
    """A rich console that never forces colour: rich detects the terminal, and ``NO_COLOR``
    removes every style code (``color_system=None``). Off a terminal, tables get
    :data:`PIPE_WIDTH` columns instead of rich's 80."""
    stream = file if file is not None else (sys.stderr if stderr else sys.stdout)
    width = None if _isatty(stream) else PIPE_WIDTH
    return Console(
        file=file,
        stderr=stderr,
        quiet=quiet,
        highlight=False,
        soft_wrap=False,
        width=width,
        color_system=None if no_color_requested() else "auto",
    )


def _isatty(stream: TextIO) -> bool:
    try:
        return stream.isatty()
    except (AttributeError, ValueError):  # closed or stream-like objects without a tty
        return False


def interactive_terminal(stream: TextIO) -> bool:
    """True when ``stream`` is a terminal that can redraw a line (a tty, ``TERM`` not dumb)."""
    term = os.environ.get("TERM", "")
    return _isatty(stream) and term.lower() not in ("dumb", "unknown")


def utc_timestamp() -> str:
    """Now, in UTC, ISO 8601 with milliseconds (e.g. ``2024-06-11T08:15:02.125+00:00``)."""
    return dt.datetime.now(dt.UTC).isoformat(timespec="milliseconds")


def json_value(value: Any) -> Any:
    """A value as strict JSON allows it: NaN and ±inf become None (null); dates and paths
    become ISO / plain strings; containers are converted element by element."""
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, dt.date | dt.datetime):
        return value.isoformat()
    if isinstance(value, Path):
        return str(value)
    if isinstance(value, dict):
        return {str(k): json_value(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [json_value(v) for v in value]
    return value


def json_line(event: str, *, timestamp: str | None = None, **fields: Any) -> str:
    """One event as one line of strict JSON: ``{"event": …, "timestamp": …, **fields}``
    (timestamp: now, unless given)."""
    stamp = utc_timestamp() if timestamp is None else timestamp
    record = {"event": event, "timestamp": stamp, **fields}
    return json.dumps(json_value(record), allow_nan=False)


def _issue_counts(issues: pl.DataFrame) -> pl.DataFrame:
    return (
        issues.group_by("portfolio_id")
        .agg(pl.len().alias("n_issues"))
        .with_columns(pl.col("portfolio_id").cast(pl.String))
    )


def skipped_reasons(result: RunResult) -> pl.DataFrame:
    """portfolio_id and reason (the first error message of data_issues) per skipped portfolio."""
    skipped = pl.DataFrame(
        {"portfolio_id": list(result.skipped)}, schema={"portfolio_id": pl.String}
    )
    first = (
        result.data_issues.filter(pl.col("severity") == "error")
        .group_by("portfolio_id", maintain_order=True)
        .agg(pl.col("message").first().alias("reason"))
        .with_columns(pl.col("portfolio_id").cast(pl.String))
    )
    return skipped.join(
        first, on="portfolio_id", how="left", validate="1:1", maintain_order="left"
    ).with_columns(pl.col("reason").fill_null("error"))


def run_counts(result: RunResult) -> dict[str, int]:
    """The manifest's counts: portfolios run and skipped, issues by severity."""
    severity = result.data_issues["severity"]
    return {
        "portfolios_run": result.summary.height,
        "portfolios_skipped": len(result.skipped),
        "issues_error": int((severity == "error").sum()),
        "issues_warning": int((severity == "warning").sum()),
    }


def _pct(value: Any) -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "—"
    return f"{100 * value:+.2f}%"


def plan_line(result: RunResult) -> str | None:
    """One line on the plan in money (``plan_total``), when portfolio values were given."""
    total = result.extra_tables.get("plan_total")
    if total is None or total.height != 1:
        return None
    row = total.row(0, named=True)
    parts = []
    for name, label in (
        ("timing", "timing"),
        ("static_allocation", "static allocation"),
        ("selection", "selection"),
        ("active", "all effects together"),
    ):
        amount = row.get(f"{name}_money")
        if amount is not None and math.isfinite(amount):
            verb = "added" if amount >= 0 else "cost"
            parts.append(f"{label} {verb} {abs(amount):,.0f}")
    if not parts:
        return None
    return (
        f"The plan in money ({row['first_period']} to {row['last_period']}, value-weighted): "
        + "; ".join(parts)
        + "."
    )


def print_summary(
    result: RunResult,
    console: Console,
    out_dir: Path | None,
    *,
    max_rows: int = MAX_TABLE_ROWS,
) -> None:
    """A compact per-portfolio table: cumulative active return, its linked split, the timing
    evidence and the number of data issues; then skipped portfolios, notes and the cautions.

    Only the first ``max_rows`` portfolios (by id) are listed; the rest are counted in one
    line, with the evidence tally of the whole roster.
    """
    # Join keys as strings: an empty frame (every portfolio skipped) may type its ids Null.
    summary = (
        result.summary.with_columns(pl.col("portfolio_id").cast(pl.String))
        .join(
            _issue_counts(result.data_issues),
            on="portfolio_id",
            how="left",
            validate="1:1",
            maintain_order="left",
        )
        .with_columns(pl.col("n_issues").fill_null(0))
    )
    has_evidence = "timing_evidence" in summary.columns
    table = Table(title="tiltaudit — linked effects over each portfolio's record", box=None)
    columns = ["portfolio", "periods", "source", "active", "static", "timing", "selection"]
    columns += ["residual", "issues"] + (["evidence"] if has_evidence else [])
    for col in columns:
        table.add_column(
            col, justify="left" if col in ("portfolio", "source", "evidence") else "right"
        )
    for row in summary.head(max_rows).iter_rows(named=True):
        cells = [
            row["portfolio_id"],
            str(row["n_periods"]),
            row["return_source"],
            _pct(row["active_return"]),
            _pct(row["static_allocation"]),
            _pct(row["timing"]),
            _pct(row["selection"]),
            _pct(row["residual"]),
            str(row["n_issues"]) if row["n_issues"] else "",
        ]
        if has_evidence:
            cells.append(row["timing_evidence"] or "")
        table.add_row(*cells)
    console.print(table)
    if summary.height > max_rows:
        console.print(
            f"… and {summary.height - max_rows} more portfolio(s): every one is in "
            "summary.parquet and the report."
        )
    if has_evidence and summary.height:
        tally = summary["timing_evidence"].fill_null("not tested").value_counts(sort=True)
        text = ", ".join(f"{n} {label}" for label, n in tally.iter_rows())
        console.print(f"Timing evidence over {summary.height} portfolio(s): {text}.")
    reasons = skipped_reasons(result)
    for pid, reason in reasons.head(MAX_SKIPPED_LINES).iter_rows():
        console.print(f"skipped {pid}: {reason}")
    if reasons.height > MAX_SKIPPED_LINES:
        console.print(f"… and {reasons.height - MAX_SKIPPED_LINES} more skipped (see data_issues).")
    n_warn = run_counts(result)["issues_warning"]
    if n_warn:
        console.print(f"{n_warn} warning(s) in data_issues.")
    plan = plan_line(result)
    if plan:
        console.print(plan)
    for note in result.notes:
        console.print(note)
    if out_dir is not None:
        console.print(f"Results in {out_dir}")
    console.print(CAUTIONS)


def portfolio_records(summary: pl.DataFrame) -> list[dict[str, Any]]:
    """One record per portfolio for the ``portfolio`` events: the fields of
    ``EVENTS["portfolio"]`` that the summary carries, values exactly as stored (NaN → None)."""
    cols = [c for c in EVENTS["portfolio"] if c in summary.columns]
    return list(summary.select(cols).iter_rows(named=True))


class RunReporter:
    """The progress display and end-of-run output of one ``run`` or ``demo``.

    Use it as a context manager around the work, pass :meth:`progress` to the runner, and call
    :meth:`finished` with the result. Leaving the block stops any live display; leaving it with
    a :class:`TiltauditError` writes the ``error`` event in ``json`` format (the one-line stderr
    message is the command line's job).

    ``stdout``/``stderr`` default to ``sys.stdout``/``sys.stderr`` looked up at each write (so
    click's test runner, which swaps them, sees everything). ``interactive`` overrides the
    terminal detection of stderr (None: detect).
    """

    def __init__(
        self,
        *,
        command: str,
        log_format: LogFormat = "text",
        quiet: bool = False,
        started: float | None = None,
        stdout: TextIO | None = None,
        stderr: TextIO | None = None,
        interactive: bool | None = None,
    ) -> None:
        if log_format not in LOG_FORMATS:
            msg = f"The 'log_format' option must be one of {list(LOG_FORMATS)}. Got {log_format!r}."
            raise ValueError(msg)
        self.command = command
        self.log_format: LogFormat = log_format
        self.quiet = quiet
        self.started = time.perf_counter() if started is None else started
        self._stdout = stdout
        self._stderr = stderr
        self._interactive = interactive
        self._progress: Progress | None = None
        self._task: Any = None
        self._status: Status | None = None

    # --- streams and modes ----------------------------------------------------------------

    @property
    def stdout(self) -> TextIO:
        return self._stdout if self._stdout is not None else sys.stdout

    @property
    def stderr(self) -> TextIO:
        return self._stderr if self._stderr is not None else sys.stderr

    @property
    def json(self) -> bool:
        return self.log_format == "json"

    @property
    def live(self) -> bool:
        """Whether a progress bar and status line are drawn: text format, not quiet, stderr an
        interactive terminal."""
        if self.json or self.quiet:
            return False
        if self._interactive is not None:
            return self._interactive
        return interactive_terminal(self.stderr)

    def emit(self, event: str, **fields: Any) -> None:
        """Write one JSON event line on stdout (json format only) and flush it at once, so a
        scheduler sees each event as it happens."""
        self.emit_many(event, [fields])

    def emit_many(self, event: str, records: list[dict[str, Any]]) -> None:
        """Write one ``event`` line per record (json format only), flushed once at the end."""
        if not self.json or not records:
            return
        stamp = utc_timestamp()  # one batch, one moment
        stream = self.stdout
        stream.write("".join(json_line(event, timestamp=stamp, **r) + "\n" for r in records))
        stream.flush()

    # --- the run's life -------------------------------------------------------------------

    def __enter__(self) -> RunReporter:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.stop_live()
        if isinstance(exc, TiltauditError):
            self.error(exc)

    def run_started(self, out: Path | str) -> None:
        """``run_started`` event (json, not quiet)."""
        if not self.quiet:
            self.emit(
                "run_started",
                command=self.command,
                version=__version__,
                out=str(Path(out).resolve()),
            )

    def progress(self, done: int, total: int) -> None:
        """The runner's callback: ``done`` of ``total`` portfolios finished.

        done = 0 opens the bar (a terminal) and writes nothing in json; every later call moves
        the bar or writes a ``shard_done`` event. When done reaches total the bar is closed
        (its last state stays on screen) and a status line covers the writing of the outputs.
        """
        if self.json:
            if done > 0 and not self.quiet:
                self.emit("shard_done", done=done, total=total)
            return
        if not self.live:
            return
        if done == 0 or self._progress is None:
            self.stop_live()
            self._progress = Progress(
                TextColumn("[progress.description]{task.description}"),
                BarColumn(),
                MofNCompleteColumn(),
                TextColumn("portfolios"),
                TimeElapsedColumn(),
                console=make_console(file=self.stderr),
            )
            self._task = self._progress.add_task(self.command, total=total)
            self._progress.start()
        self._progress.update(self._task, completed=done, total=total)
        if done >= total:
            self._progress.stop()
            self._progress = None
            self._status = Status(
                "writing the output tables", console=make_console(file=self.stderr)
            )
            self._status.start()

    def stop_live(self) -> None:
        """Stop a running progress bar or status line (safe to call at any time)."""
        if self._progress is not None:
            self._progress.stop()
            self._progress = None
        if self._status is not None:
            self._status.stop()
            self._status = None

    def note(self, message: str) -> None:
        """A line of information: printed in text, a ``note`` event in json (not when quiet)."""
        if self.quiet:
            return
        if self.json:
            self.emit("note", message=message)
        else:
            self.stop_live()
            make_console().print(message)

    def finished(self, result: RunResult, out: Path | str) -> None:
        """The end of a run: the summary table (text) or the portfolio, caution and
        ``run_finished`` events (json); nothing with ``--quiet``."""
        self.stop_live()
        if self.quiet:
            return
        out_dir = Path(out).resolve()
        if not self.json:
            print_summary(result, make_console(), out_dir)
            return
        for note in result.notes:
            self.emit("note", message=note)
        total = result.extra_tables.get("plan_total")
        if total is not None and total.height == 1:
            fields = [c for c in EVENTS["plan_total"] if c in total.columns]
            row = total.select(fields).with_columns(pl.col(pl.Date).cast(pl.String))
            self.emit_many("plan_total", row.to_dicts())
        self.emit_many("portfolio", portfolio_records(result.summary))
        self.emit_many("portfolio_skipped", skipped_reasons(result).to_dicts())
        self.emit("caution", message=CAUTIONS)
        self.emit(
            "run_finished",
            exit_code=result.exit_code,
            **run_counts(result),
            out=str(out_dir),
            seconds=round(time.perf_counter() - self.started, 3),
        )

    def error(self, exc: TiltauditError) -> None:
        """The ``error`` event (json only, also when quiet: errors are always reported)."""
        self.emit("error", exit_code=exc.exit_code, message=str(exc))
