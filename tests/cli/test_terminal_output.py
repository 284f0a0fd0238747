"""What ``run`` and ``demo`` print: progress, colour, ``--quiet`` and ``--log-format json``.

* Off a terminal (pipes, files, click's test runner) there is no progress bar and no ANSI
  escape code; ``NO_COLOR`` removes every style code even when ``FORCE_COLOR`` asks for colour
  (convention of https://no-color.org: "when present and not an empty string").
* ``--log-format json`` writes only JSON objects on stdout, one per line, each strict JSON
  (RFC 8259 has no NaN or Infinity), with the events of :data:`attribution.terminal.EVENTS`;
  the per-portfolio numbers are the ones stored in summary.parquet.
* ``--quiet`` prints nothing but errors.
* The progress callback counts portfolios up to the total; on a terminal (a fake one in a unit
  test, a real pseudo-terminal in a child process) a bar is drawn.
"""

from __future__ import annotations

import datetime as dt
import io
import json
import math
import os
import re
import select
import subprocess
import sys
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import polars as pl
import pytest
from click.testing import CliRunner, Result
from rich.console import Console
from tiny_roster import PORTFOLIOS, Workspace

from attribution.cli import main
from attribution.errors import ReadError
from attribution.options import RunOptions
from attribution.outputs import output_lock
from attribution.runner import run_roster
from attribution.terminal import (
    CAUTIONS,
    EVENTS,
    RunReporter,
    json_line,
    print_summary,
)

#: Any ANSI/VT escape sequence (CSI): colour, style, cursor movement, line erase.
ANSI = re.compile(r"\x1b\[")
#: Select Graphic Rendition, the CSI sequences that set colour and text style.
SGR = re.compile(r"\x1b\[[0-9;]*m")
#: Characters rich draws a progress bar with (heavy horizontal lines), and its count column.
BAR_CHARS = ("━", "╸", "╺")
#: Environment variables that change rich's terminal and colour detection; cleared so the
#: test machine's settings (a CI may set FORCE_COLOR) cannot decide the outcome.
TERMINAL_ENV = ("NO_COLOR", "FORCE_COLOR", "TTY_COMPATIBLE", "TTY_INTERACTIVE", "CLICOLOR_FORCE")
CLEAN_ENV: dict[str, str | None] = dict.fromkeys(TERMINAL_ENV)
#: The effect columns a portfolio event carries, compared with summary.parquet.
NUMBERS = ("active_return", "static_allocation", "timing", "selection", "interaction", "residual")


def invoke(args: Sequence[str], **env: str) -> Result:
    """The command line in-process with a clean terminal environment plus ``env``."""
    runner = CliRunner(env={**CLEAN_ENV, **env})
    return runner.invoke(main, list(args), catch_exceptions=True)


def run_args(ws: Workspace, out: Path, *extra: str, frames: Any = None) -> list[str]:
    """``run`` with the tiny roster (or ``frames``), without the --quiet of ws.run_args."""
    return ["run", *ws.input_args(ws.write(frames)), "--out", str(out), *extra]


def strict_json(line: str) -> dict[str, Any]:
    """Parse one line as strict JSON: Python's parser accepts NaN and Infinity, RFC 8259 does
    not, so those tokens are refused here."""

    def refuse(token: str) -> None:
        msg = f"non-standard JSON constant {token} in {line!r}"
        raise ValueError(msg)

    record = json.loads(line, parse_constant=refuse)
    assert isinstance(record, dict), line
    return record


def json_events(stdout: str) -> list[dict[str, Any]]:
    """Every stdout line as a JSON object (an empty or non-JSON line fails the test)."""
    lines = stdout.splitlines()
    assert lines, "no output"
    return [strict_json(line) for line in lines]


def assert_no_bar(text: str) -> None:
    assert not ANSI.search(text), repr(text[:300])
    for char in BAR_CHARS:
        assert char not in text, repr(text[:300])


# --- text output off a terminal --------------------------------------------------------------


def test_text_run_in_process_has_no_bar_and_no_escape_codes(ws: Workspace) -> None:
    result = invoke(run_args(ws, ws.root / "out"))
    assert result.exit_code == 0, result.output + result.stderr
    assert_no_bar(result.stdout)
    assert result.stderr == ""
    for pid in PORTFOLIOS:
        assert pid in result.stdout
    assert CAUTIONS.split(";")[0] in result.stdout


def test_text_run_child_with_pipes_has_no_bar_and_no_escape_codes(
    ws: Workspace, subprocess_env: dict[str, str]
) -> None:
    """A real child whose stdout and stderr are pipes (real file descriptors, not click's
    in-memory streams)."""
    env = {k: v for k, v in subprocess_env.items() if k not in TERMINAL_ENV}
    env["TERM"] = "xterm-256color"  # a colour-capable TERM: only the pipe may turn styles off
    argv = run_args(ws, ws.root / "out")
    child = subprocess.run(
        [sys.executable, "-m", "attribution", *argv],
        capture_output=True,
        text=True,
        env=env,
        timeout=120,
        check=False,
    )
    assert child.returncode == 0, child.stderr
    assert_no_bar(child.stdout)
    assert child.stderr == ""
    for pid in PORTFOLIOS:
        assert pid in child.stdout


def test_no_color_removes_styles_even_when_colour_is_forced(ws: Workspace) -> None:
    # Control: FORCE_COLOR makes rich style a non-terminal, so the check below can see codes.
    forced = invoke(run_args(ws, ws.root / "forced"), FORCE_COLOR="1")
    assert forced.exit_code == 0, forced.output + forced.stderr
    assert ANSI.search(forced.stdout)
    plain = invoke(run_args(ws, ws.root / "plain"), FORCE_COLOR="1", NO_COLOR="1")
    assert plain.exit_code == 0, plain.output + plain.stderr
    assert_no_bar(plain.stdout + plain.stderr)
    for pid in PORTFOLIOS:
        assert pid in plain.stdout


def test_summary_table_stays_compact_on_a_large_roster(ws: Workspace) -> None:
    """Beyond ``max_rows`` portfolios the table is cut and the rest counted in one line."""
    result = run_roster(ws.write(), RunOptions.build(), effects_sink=lambda frame: None)
    buffer = io.StringIO()
    print_summary(result, Console(file=buffer, width=200, color_system=None), None, max_rows=2)
    text = buffer.getvalue()
    rows = [line.split()[0] for line in text.splitlines() if line.strip()]
    assert [r for r in rows if r in PORTFOLIOS] == ["P1", "P2"]
    assert "… and 1 more portfolio(s)" in text
    # The tally covers the whole roster, the cut rows included.
    assert f"Timing evidence over {len(PORTFOLIOS)} portfolio(s)" in text


# --- --quiet ---------------------------------------------------------------------------------


@pytest.mark.parametrize("log_format", ["text", "json"])
def test_quiet_run_prints_nothing(ws: Workspace, log_format: str) -> None:
    out = ws.root / "out"
    result = invoke(run_args(ws, out, "--quiet", "--log-format", log_format))
    assert result.exit_code == 0, result.output + result.stderr
    assert result.stdout == ""
    assert result.stderr == ""
    assert (out / "summary.parquet").is_file()


def test_quiet_json_still_reports_an_error(ws: Workspace) -> None:
    paths = ws.write()
    argv = ["run", *ws.input_args({**paths, "holdings": ws.root / "absent.parquet"})]
    result = invoke([*argv, "--out", str(ws.root / "out"), "--quiet", "--log-format", "json"])
    assert result.exit_code == 2
    events = json_events(result.stdout)
    assert [e["event"] for e in events] == ["error"]
    assert events[0]["exit_code"] == 2


def test_quiet_demo_prints_nothing(tmp_path: Path) -> None:
    out = tmp_path / "demo"
    result = invoke(["demo", "--out", str(out), "--quiet"])
    assert result.exit_code == 0, result.output + result.stderr
    assert result.stdout == ""
    assert result.stderr == ""
    assert (out / "summary.parquet").is_file()


# --- --log-format json -----------------------------------------------------------------------


@pytest.fixture(scope="module")
def json_run(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Result]:
    """One ``run --log-format json`` of the tiny roster, shared by the checks below."""
    ws = Workspace(tmp_path_factory.mktemp("json_run"))
    out = ws.root / "out"
    result = invoke(run_args(ws, out, "--log-format", "json"))
    assert result.exit_code == 0, result.output + result.stderr
    return out, result


def test_json_every_line_is_a_strict_json_event(json_run: tuple[Path, Result]) -> None:
    _, result = json_run
    assert result.stderr == ""
    assert not ANSI.search(result.stdout)
    for event in json_events(result.stdout):
        assert event["event"] in EVENTS
        stamp = dt.datetime.fromisoformat(event["timestamp"])
        assert stamp.utcoffset() == dt.timedelta(0)


def test_json_events_come_in_order(json_run: tuple[Path, Result]) -> None:
    out, result = json_run
    events = json_events(result.stdout)
    names = [e["event"] for e in events]
    assert names[0] == "run_started"
    assert names[-1] == "run_finished"
    assert names.count("run_finished") == 1
    assert "error" not in names
    assert events[0]["command"] == "run"
    assert events[0]["out"] == str(out.resolve())
    shards = [e for e in events if e["event"] == "shard_done"]
    assert shards
    assert shards[-1]["done"] == shards[-1]["total"] == len(PORTFOLIOS)
    # The portfolio events come after the last shard and before the caution.
    first_portfolio = names.index("portfolio")
    assert names.index("shard_done") < first_portfolio < names.index("caution")
    caution = [e for e in events if e["event"] == "caution"]
    assert [c["message"] for c in caution] == [CAUTIONS]


def test_json_portfolio_numbers_equal_the_summary_table(json_run: tuple[Path, Result]) -> None:
    out, result = json_run
    events = [e for e in json_events(result.stdout) if e["event"] == "portfolio"]
    summary = pl.read_parquet(out / "summary.parquet")
    assert sorted(e["portfolio_id"] for e in events) == sorted(summary["portfolio_id"])
    stored = {row["portfolio_id"]: row for row in summary.iter_rows(named=True)}
    for event in events:
        row = stored[event["portfolio_id"]]
        assert event["n_periods"] == row["n_periods"]
        assert event["return_source"] == row["return_source"]
        assert event["timing_evidence"] == row["timing_evidence"]
        for col in NUMBERS:
            expected = row[col]
            if expected is None or math.isnan(expected):
                assert event[col] is None, (col, event)
            else:
                # Exact: json writes float repr, the shortest string that reads back as the
                # same double (Python >= 3.1, "What's New In Python 3.1", float repr).
                assert event[col] == expected, (col, event[col], expected)


def test_json_run_finished_matches_the_manifest(json_run: tuple[Path, Result]) -> None:
    out, result = json_run
    finished = json_events(result.stdout)[-1]
    manifest = json.loads((out / "manifest.json").read_text(encoding="utf-8"))
    assert finished["exit_code"] == manifest["exit_code"] == 0
    for key, value in manifest["counts"].items():
        assert finished[key] == value, key
    assert finished["out"] == str(out.resolve())
    assert isinstance(finished["seconds"], float)
    assert finished["seconds"] > 0.0


def test_json_skipped_portfolio_exits_3(ws: Workspace) -> None:
    frames = dict(ws.frames)
    frames["holdings"] = frames["holdings"].with_columns(
        weight=pl.when(pl.col("portfolio_id") == "P3")
        .then(pl.col("weight") * 1.1)
        .otherwise(pl.col("weight"))
    )
    result = invoke(run_args(ws, ws.root / "out", "--log-format", "json", frames=frames))
    assert result.exit_code == 3, result.output + result.stderr
    events = json_events(result.stdout)
    assert sorted(e["portfolio_id"] for e in events if e["event"] == "portfolio") == ["P1", "P2"]
    skipped = [e for e in events if e["event"] == "portfolio_skipped"]
    assert [e["portfolio_id"] for e in skipped] == ["P3"]
    assert "weights sum to 1.1" in skipped[0]["reason"]
    finished = events[-1]
    assert finished["event"] == "run_finished"
    assert finished["exit_code"] == 3
    assert finished["portfolios_run"] == 2
    assert finished["portfolios_skipped"] == 1
    assert finished["issues_error"] >= 1


@pytest.mark.parametrize("log_format", ["text", "json"])
def test_every_portfolio_skipped(ws: Workspace, log_format: str) -> None:
    """An empty summary (every portfolio skipped) still ends with the summary or the events.
    --tests none keeps the check on the terminal layer alone."""
    frames = dict(ws.frames)
    frames["holdings"] = frames["holdings"].with_columns(weight=pl.col("weight") * 1.1)
    flags = ("--tests", "none", "--log-format", log_format)
    result = invoke(run_args(ws, ws.root / "out", *flags, frames=frames))
    assert result.exit_code == 3, result.output + result.stderr
    if log_format == "text":
        for pid in PORTFOLIOS:
            assert f"skipped {pid}: " in result.stdout
        return
    events = json_events(result.stdout)
    assert "portfolio" not in [e["event"] for e in events]
    skipped = [e["portfolio_id"] for e in events if e["event"] == "portfolio_skipped"]
    assert skipped == list(PORTFOLIOS)
    assert events[-1]["portfolios_run"] == 0
    assert events[-1]["portfolios_skipped"] == len(PORTFOLIOS)
    assert events[-1]["exit_code"] == 3


def test_json_bad_input_exits_2_with_an_error_event(ws: Workspace) -> None:
    paths = ws.write()
    (ws.root / "broken.parquet").write_bytes(b"\x00garbage\x00" * 16)
    out = ws.root / "out"
    argv = ["run", *ws.input_args({**paths, "index_returns": ws.root / "broken.parquet"})]
    result = invoke([*argv, "--out", str(out), "--log-format", "json"])
    assert result.exit_code == 2
    events = json_events(result.stdout)
    assert [e["event"] for e in events] == ["run_started", "error"]
    assert events[-1]["exit_code"] == 2
    assert events[-1]["message"].startswith("index_returns: cannot read")
    # The one-line message stays on stderr as in text format.
    lines = [line for line in result.stderr.splitlines() if line.strip()]
    assert len(lines) == 1
    assert lines[0] == f"tiltaudit: error: {events[-1]['message']}"
    assert "Traceback" not in result.stderr
    assert not out.exists()


def test_json_missing_out_is_an_error_event(ws: Workspace) -> None:
    result = invoke(["run", *ws.input_args(ws.write()), "--log-format", "json"])
    assert result.exit_code == 2
    events = json_events(result.stdout)
    assert [e["event"] for e in events] == ["error"]
    assert "'out' option is required" in events[0]["message"]


def test_json_locked_folder_exits_4_with_an_error_event(ws: Workspace) -> None:
    out = ws.root / "out"
    out.mkdir()
    with output_lock(out):
        result = invoke(run_args(ws, out, "--log-format", "json"))
    assert result.exit_code == 4, result.output + result.stderr
    events = json_events(result.stdout)
    assert events[-1]["event"] == "error"
    assert events[-1]["exit_code"] == 4
    assert "in use by another run" in events[-1]["message"]


def test_json_demo(tmp_path: Path) -> None:
    out = tmp_path / "demo"
    result = invoke(["demo", "--out", str(out), "--log-format", "json"])
    assert result.exit_code == 0, result.output + result.stderr
    events = json_events(result.stdout)
    assert events[0]["event"] == "run_started"
    assert events[0]["command"] == "demo"
    assert events[-1]["event"] == "run_finished"
    summary = pl.read_parquet(out / "summary.parquet")
    portfolios = {e["portfolio_id"]: e for e in events if e["event"] == "portfolio"}
    assert sorted(portfolios) == sorted(summary["portfolio_id"])
    for row in summary.iter_rows(named=True):
        assert portfolios[row["portfolio_id"]]["active_return"] == row["active_return"]


def test_json_line_writes_strict_json() -> None:
    line = json_line(
        "probe",
        nan=float("nan"),
        inf=float("inf"),
        minus_inf=float("-inf"),
        day=dt.date(2020, 1, 31),
        path=Path("a") / "b",
        nested={"x": [1.5, float("nan")]},
    )
    record = strict_json(line)
    assert record["event"] == "probe"
    assert record["nan"] is None
    assert record["inf"] is None
    assert record["minus_inf"] is None
    assert record["day"] == "2020-01-31"
    assert record["path"] == str(Path("a") / "b")
    assert record["nested"] == {"x": [1.5, None]}
    assert "\n" not in line


# --- the progress callback and the bar -------------------------------------------------------


class FakeTerminal(io.StringIO):
    """A text stream that says it is a terminal."""

    def isatty(self) -> bool:
        return True


@pytest.mark.parametrize(("shard_size", "expected"), [(1, [1, 2, 3]), (2, [2, 3])])
def test_progress_counts_rise_to_the_total(
    ws: Workspace, shard_size: int, expected: list[int]
) -> None:
    calls: list[tuple[int, int]] = []
    stdout = io.StringIO()
    reporter = RunReporter(command="run", log_format="json", stdout=stdout, stderr=io.StringIO())

    def record(done: int, total: int) -> None:
        calls.append((done, total))
        reporter.progress(done, total)

    run_roster(
        ws.write(),
        RunOptions.build(tests="none"),
        shard_size=shard_size,
        effects_sink=lambda frame: None,
        progress=record,
    )
    assert calls == [(0, len(PORTFOLIOS))] + [(n, len(PORTFOLIOS)) for n in expected]
    events = json_events(stdout.getvalue())
    assert [e["event"] for e in events] == ["shard_done"] * len(expected)
    assert [e["done"] for e in events] == expected
    assert all(e["total"] == len(PORTFOLIOS) for e in events)


def test_bar_is_drawn_on_a_terminal_only(monkeypatch: pytest.MonkeyPatch) -> None:
    for name in TERMINAL_ENV:
        monkeypatch.delenv(name, raising=False)
    monkeypatch.setenv("TERM", "xterm-256color")

    def drive(reporter: RunReporter) -> None:
        with reporter:
            for done in (0, 1, 2, 3):
                reporter.progress(done, 3)

    terminal = FakeTerminal()
    drive(RunReporter(command="run", stdout=io.StringIO(), stderr=terminal))
    drawn = terminal.getvalue()
    assert "3/3" in drawn
    assert "portfolios" in drawn
    assert "writing the output tables" in drawn  # the status line after the last shard
    assert ANSI.search(drawn)  # a terminal gets cursor control

    for stream, kwargs in (
        (io.StringIO(), {}),  # not a terminal
        (FakeTerminal(), {"quiet": True}),
        (FakeTerminal(), {"log_format": "json"}),
    ):
        stdout = io.StringIO()
        drive(RunReporter(command="run", stdout=stdout, stderr=stream, **kwargs))
        assert stream.getvalue() == "", kwargs
        if kwargs.get("log_format") != "json":
            assert stdout.getvalue() == ""

    monkeypatch.setenv("TERM", "dumb")
    dumb = FakeTerminal()
    drive(RunReporter(command="run", stdout=io.StringIO(), stderr=dumb))
    assert dumb.getvalue() == ""


def _fail_midway(reporter: RunReporter) -> None:
    with reporter:
        reporter.progress(0, 10)
        raise ReadError("holdings: cannot read")


def test_reporter_stops_the_bar_and_reports_an_error() -> None:
    terminal, stdout = FakeTerminal(), io.StringIO()
    reporter = RunReporter(command="run", stdout=stdout, stderr=terminal, interactive=True)
    with pytest.raises(ReadError):
        _fail_midway(reporter)
    drawn = terminal.getvalue()
    assert "0/10" in drawn  # the bar had been drawn
    # ... and was stopped: the last cursor command shows the cursor again (DEC private mode
    # 25, "\x1b[?25h" show / "\x1b[?25l" hide; xterm control sequences, from memory).
    assert drawn.rfind("\x1b[?25h") > drawn.rfind("\x1b[?25l")
    assert stdout.getvalue() == ""  # text format: the message is the command line's stderr line

    stdout = io.StringIO()
    with pytest.raises(ReadError):
        _fail_midway(RunReporter(command="run", log_format="json", stdout=stdout))
    (event,) = json_events(stdout.getvalue())
    assert event["event"] == "error"
    assert event["exit_code"] == ReadError.exit_code
    assert event["message"] == "holdings: cannot read"


def _read_pty(master: int, child: subprocess.Popen[bytes], timeout: float) -> bytes:
    """Everything the child writes to the pseudo-terminal until it exits (or ``timeout``)."""
    chunks: list[bytes] = []
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        ready, _, _ = select.select([master], [], [], 0.1)
        if ready:
            try:
                data = os.read(master, 65536)
            except OSError:  # Linux: EIO once the child has closed its end
                break
            if not data:
                break
            chunks.append(data)
        elif child.poll() is not None:
            break
    return b"".join(chunks)


def test_bar_on_a_real_pseudo_terminal(ws: Workspace, subprocess_env: dict[str, str]) -> None:
    """stderr on a pseudo-terminal, stdout on a pipe: the bar goes to the terminal, the
    table to the pipe without codes; NO_COLOR keeps colour off the bar too."""
    pty = pytest.importorskip("pty")
    env = {k: v for k, v in subprocess_env.items() if k not in TERMINAL_ENV}
    env.update(TERM="xterm-256color", NO_COLOR="1")
    master, slave = pty.openpty()
    argv = run_args(ws, ws.root / "out")
    child = subprocess.Popen(
        [sys.executable, "-m", "attribution", *argv],
        stdin=subprocess.DEVNULL,
        stdout=subprocess.PIPE,
        stderr=slave,
        env=env,
    )
    os.close(slave)
    try:
        drawn = _read_pty(master, child, timeout=120.0).decode("utf-8", "replace")
        stdout, _ = child.communicate(timeout=120)
    finally:
        os.close(master)
        if child.poll() is None:
            child.kill()
            child.wait()
    assert child.returncode == 0, drawn
    assert f"{len(PORTFOLIOS)}/{len(PORTFOLIOS)}" in drawn
    assert "portfolios" in drawn
    assert not SGR.search(drawn), repr(drawn[:300])
    text = stdout.decode("utf-8")
    assert_no_bar(text)
    for pid in PORTFOLIOS:
        assert pid in text


def test_plan_in_money_line_and_event(ws: Workspace) -> None:
    # Invented values for the tiny roster: 1e6 per portfolio from the first period's start.
    first = ws.frames["holdings"]["as_of"].min()
    values = pl.DataFrame(
        {"portfolio_id": list(PORTFOLIOS), "as_of": [first] * len(PORTFOLIOS)},
        schema={"portfolio_id": pl.String, "as_of": pl.Date},
    ).with_columns(value=pl.lit(1e6))
    paths = ws.write({**ws.frames, "portfolio_values": values})
    out = ws.root / "out"
    args = [a for a in ws.run_args(paths, out) if a != "--quiet"]
    text = CliRunner().invoke(main, args, env={"NO_COLOR": "1"})
    assert text.exit_code == 0, text.output
    total = pl.read_parquet(out / "plan_total.parquet").row(0, named=True)
    timing = total["timing_money"]
    verb = "added" if timing >= 0 else "cost"
    assert f"timing {verb} {abs(timing):,.0f}" in text.output
    as_json = CliRunner().invoke(main, [*args, "--log-format", "json"])
    assert as_json.exit_code == 0, as_json.output
    events = [json.loads(line) for line in as_json.output.splitlines()]
    plan = [e for e in events if e["event"] == "plan_total"]
    assert len(plan) == 1
    assert plan[0]["timing_money"] == timing
    assert plan[0]["first_period"] == str(total["first_period"])
