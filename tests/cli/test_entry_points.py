"""Help, version, and real child processes of ``tiltaudit`` and ``python -m attribution``."""

from __future__ import annotations

import subprocess
import sys

import polars as pl
import pytest
from tiny_roster import PORTFOLIOS, Workspace, snapshot

from attribution import __version__

INPUT_FLAGS = (
    "--holdings",
    "--index-returns",
    "--policy",
    "--riskfree",
    "--segment-returns",
    "--portfolio-returns",
    "--config",
)
OPTION_FLAGS = (
    "--out",
    "--static",
    "--form",
    "--linking",
    "--align",
    "--weight-tolerance",
    "--cash-class",
    "--tests",
    "--market",
)


def test_help(ws: Workspace) -> None:
    result = ws.invoke(["--help"])
    assert result.exit_code == 0
    for command in ("run", "validate", "demo", "simulate"):
        assert command in result.stdout


@pytest.mark.parametrize("command", ["run", "validate"])
def test_command_help_lists_its_flags(ws: Workspace, command: str) -> None:
    result = ws.invoke([command, "--help"])
    assert result.exit_code == 0
    for flag in INPUT_FLAGS:
        assert flag in result.stdout
    flags = OPTION_FLAGS if command == "run" else OPTION_FLAGS[1:]
    for flag in flags:
        assert flag in result.stdout
    assert ("--out" in result.stdout) == (command == "run")


def test_version(ws: Workspace) -> None:
    result = ws.invoke(["--version"])
    assert result.exit_code == 0
    assert result.stdout.strip() == f"tiltaudit, version {__version__}"


def _child(argv: list[str], env: dict[str, str]) -> subprocess.CompletedProcess[str]:
    return subprocess.run(argv, capture_output=True, text=True, env=env, timeout=120, check=False)


def test_console_script_runs_the_roster(ws: Workspace, subprocess_env: dict[str, str]) -> None:
    out = ws.root / "out"
    argv = [a for a in ws.run_args(ws.write(), out) if a != "--quiet"]
    child = _child(["tiltaudit", *argv], subprocess_env)
    assert child.returncode == 0, child.stderr
    assert "Traceback" not in child.stderr
    for pid in PORTFOLIOS:
        assert pid in child.stdout
    assert str(out.resolve()) in child.stdout
    assert sorted(pl.read_parquet(out / "summary.parquet")["portfolio_id"]) == list(PORTFOLIOS)


def test_console_script_version(subprocess_env: dict[str, str]) -> None:
    child = _child(["tiltaudit", "--version"], subprocess_env)
    assert child.returncode == 0
    assert child.stdout.strip() == f"tiltaudit, version {__version__}"


def test_module_reports_a_skipped_portfolio(ws: Workspace, subprocess_env: dict[str, str]) -> None:
    """``python -m attribution run``: a damaged portfolio is skipped, named, and exit is 3."""
    frames = dict(ws.frames)
    frames["holdings"] = frames["holdings"].with_columns(
        weight=pl.when(pl.col("portfolio_id") == "P3")
        .then(pl.col("weight") * 1.1)
        .otherwise(pl.col("weight"))
    )
    out = ws.root / "out"
    argv = [a for a in ws.run_args(ws.write(frames), out) if a != "--quiet"]
    child = _child([sys.executable, "-m", "attribution", *argv], subprocess_env)
    assert child.returncode == 3, child.stderr
    assert "Traceback" not in child.stderr
    assert "skipped P3" in child.stdout
    assert "weights sum to 1.1" in child.stdout
    assert sorted(pl.read_parquet(out / "summary.parquet")["portfolio_id"]) == ["P1", "P2"]


def test_module_bad_input_exits_2(ws: Workspace, subprocess_env: dict[str, str]) -> None:
    paths = ws.write()
    (ws.root / "broken.parquet").write_bytes(b"\x00garbage\x00" * 16)
    out = ws.root / "out"
    before = snapshot(ws.root / "inputs")
    argv = ws.run_args({**paths, "index_returns": ws.root / "broken.parquet"}, out)
    child = _child([sys.executable, "-m", "attribution", *argv], subprocess_env)
    assert child.returncode == 2
    assert "Traceback" not in child.stderr
    lines = [line for line in child.stderr.splitlines() if line.strip()]
    assert len(lines) == 1, child.stderr
    assert lines[0].startswith("tiltaudit: error: index_returns: cannot read")
    assert child.stdout == ""
    assert not out.exists()
    assert snapshot(ws.root / "inputs") == before
