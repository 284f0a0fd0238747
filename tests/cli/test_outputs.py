"""The output folder: its tables, database and manifest, the lock (exit 4) and atomicity.

DESIGN §5: one folder per run, written atomically (a failed or killed run leaves the previous
results intact), every table as Parquet and in ``results.duckdb`` with the views of ``sql/``,
and a JSON manifest of inputs (with hashes), options, version, counts and timings.
"""

from __future__ import annotations

import hashlib
import json
import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import duckdb
import polars as pl
import pytest
from tiny_roster import PORTFOLIOS, Workspace, snapshot

import attribution.outputs
from attribution import __version__
from attribution.options import RunOptions
from attribution.outputs import output_lock

SQL_DIR = Path(__file__).resolve().parents[2] / "sql"

#: Key columns per table, DESIGN §5 (the tables issue 2 writes). The summary's
#: timing_evidence and returns_holdings_disagree, and the series' exposure columns, come with
#: the timing tests and are checked there.
CONTRACT = {
    "effects": (
        "portfolio_id",
        "period_end",
        "asset_class",
        "weight",
        "static_weight",
        "policy_weight",
        "index_return",
        "segment_return",
        "policy_return",
        "static_allocation",
        "timing",
        "selection",
        "interaction",
        "is_drifted",
    ),
    "summary": (
        "portfolio_id",
        "first_period",
        "last_period",
        "n_periods",
        "return_source",
        "portfolio_return",
        "policy_return",
        "active_return",
        "static_allocation",
        "timing",
        "selection",
        "interaction",
        "residual",
        "linking",
        "portfolio_return_ann",
        "policy_return_ann",
        "active_return_ann",
        "static_allocation_ann",
        "timing_ann",
        "selection_ann",
        "interaction_ann",
        "residual_ann",
        "tracking_error",
        "information_ratio",
    ),
    "summary_windows": ("portfolio_id", "window", "n_periods", "active_return", "timing"),
    "series": (
        "portfolio_id",
        "period_end",
        "portfolio_return",
        "policy_return",
        "active_return",
        "cum_active_return",
        "cum_static_allocation",
        "cum_timing",
        "cum_selection",
        "cum_residual",
    ),
    "data_issues": ("portfolio_id", "period_end", "asset_class", "severity", "code", "message"),
}
N_CLASSES = 3
N_PERIODS = 12


def sql_view_names() -> list[str]:
    # Only sql/views/ is created inside results.duckdb; sql/models/ are the warehouse models
    # over the input tables (tests/sql).
    return sorted(p.stem for p in (SQL_DIR / "views").rglob("*.sql"))


def leftovers(out: Path) -> list[str]:
    """Staging or previous-result folders of ``out`` left beside it."""
    return sorted(
        p.name
        for p in out.parent.glob(f".{out.name}.*")
        if ".staging-" in p.name or p.name.endswith(".previous")
    )


@pytest.fixture(scope="module")
def finished(tmp_path_factory: pytest.TempPathFactory) -> tuple[Workspace, Path]:
    """One good run of the tiny roster, shared by the read-only checks below."""
    ws = Workspace(tmp_path_factory.mktemp("finished"))
    ws.good_run(ws.root / "out")
    return ws, ws.root / "out"


@pytest.mark.parametrize("table", sorted(CONTRACT))
def test_table_has_contract_columns(finished: tuple[Workspace, Path], table: str) -> None:
    _, out = finished
    frame = pl.read_parquet(out / f"{table}.parquet")
    missing = [c for c in CONTRACT[table] if c not in frame.columns]
    assert missing == []


def test_table_grains(finished: tuple[Workspace, Path]) -> None:
    _, out = finished
    effects = pl.read_parquet(out / "effects.parquet")
    assert effects.height == len(PORTFOLIOS) * N_PERIODS * N_CLASSES
    assert effects.select("portfolio_id", "period_end", "asset_class").n_unique() == effects.height
    summary = pl.read_parquet(out / "summary.parquet")
    assert sorted(summary["portfolio_id"]) == list(PORTFOLIOS)
    series = pl.read_parquet(out / "series.parquet")
    assert series.height == len(PORTFOLIOS) * N_PERIODS
    windows = pl.read_parquet(out / "summary_windows.parquet")
    # Twelve months of 2020: a trailing 1y window and the calendar year 2020.
    assert sorted(set(windows["window"])) == ["1y", "2020"]
    issues = pl.read_parquet(out / "data_issues.parquet")
    # Twelve months are too few for every timing test (24 observations, 12 decisions): the
    # only issues of the clean roster are those warnings.
    assert set(issues["code"].to_list()) == {"test_too_few_periods"}
    assert set(issues["severity"].to_list()) == {"warning"}


def test_duckdb_holds_the_tables_and_views(finished: tuple[Workspace, Path]) -> None:
    _, out = finished
    con = duckdb.connect(str(out / "results.duckdb"), read_only=True)
    try:
        for table in CONTRACT:
            (count,) = con.execute(f"select count(*) from {table}").fetchone()
            assert count == pl.read_parquet(out / f"{table}.parquet").height, table
        names = {
            row[0]
            for row in con.execute(
                "select table_name from information_schema.tables where table_type = 'VIEW'"
            ).fetchall()
        }
        assert set(sql_view_names()) <= names
        for view in sql_view_names():
            con.execute(f"select * from {view}").fetchall()  # every view runs
        (gaps,) = con.execute("select count(*) from period_reconciliation").fetchone()
        assert gaps == 0
    finally:
        con.close()


def test_manifest(finished: tuple[Workspace, Path]) -> None:
    ws, out = finished
    manifest = json.loads((out / "manifest.json").read_text(encoding="utf-8"))
    assert manifest["version"] == __version__
    assert set(manifest["inputs"]) == set(ws.frames)  # all six tables were given
    for name, entry in manifest["inputs"].items():
        recorded = Path(entry["path"])
        assert entry["sha256"] == hashlib.sha256(recorded.read_bytes()).hexdigest(), name
    assert manifest["options"] == RunOptions.build().to_dict()
    for table in CONTRACT:
        rows = pl.read_parquet(out / f"{table}.parquet").height
        assert manifest["outputs"][table]["rows"] == rows
    assert manifest["counts"]["portfolios_run"] == len(PORTFOLIOS)
    assert manifest["counts"]["portfolios_skipped"] == 0
    assert manifest["exit_code"] == 0
    timings = manifest["timings_seconds"]
    assert timings
    assert all(isinstance(v, float) and v >= 0.0 for v in timings.values())


# --- lock: exit 4 ---------------------------------------------------------------------------


def test_locked_folder_exits_4_in_process(ws: Workspace) -> None:
    out = ws.root / "out"
    before = ws.good_run(out)
    with output_lock(out):
        result = ws.invoke(ws.run_args(ws.write(), out, "--linking", "grap"))
    assert result.exit_code == 4, result.output + result.stderr
    lines = [line for line in result.stderr.splitlines() if line.strip()]
    assert len(lines) == 1
    assert "in use by another run" in lines[0]
    assert str(out.resolve()) in lines[0]
    assert "Traceback" not in result.stderr
    assert snapshot(out) == before
    # Released: the next run goes through.
    assert ws.invoke(ws.run_args(ws.write(), out)).exit_code == 0


HOLD_LOCK = textwrap.dedent(
    """
    import sys
    from pathlib import Path
    from attribution.outputs import output_lock

    with output_lock(Path(sys.argv[1])):
        print("locked", flush=True)
        sys.stdin.readline()
    """
)


def test_locked_folder_exits_4_across_processes(
    ws: Workspace, subprocess_env: dict[str, str]
) -> None:
    """A second ``tiltaudit`` process finds the folder held by another process."""
    out = ws.root / "out"
    before = ws.good_run(out)
    holder = subprocess.Popen(
        [sys.executable, "-c", HOLD_LOCK, str(out)],
        stdin=subprocess.PIPE,
        stdout=subprocess.PIPE,
        text=True,
        env=subprocess_env,
    )
    try:
        assert holder.stdout is not None
        assert holder.stdout.readline().strip() == "locked"
        child = subprocess.run(
            ["tiltaudit", *ws.run_args(ws.write(), out)],
            capture_output=True,
            text=True,
            env=subprocess_env,
            timeout=120,
            check=False,
        )
    finally:
        holder.communicate("\n", timeout=60)
    assert child.returncode == 4, child.stderr
    assert "Traceback" not in child.stderr
    assert "in use by another run" in child.stderr
    assert snapshot(out) == before


# --- atomicity ------------------------------------------------------------------------------


def test_failure_mid_write_keeps_previous_results(
    ws: Workspace, monkeypatch: pytest.MonkeyPatch
) -> None:
    out = ws.root / "out"
    before = ws.good_run(out)

    def broken(db_path: Path, parquet: object) -> list[str]:
        db_path.write_bytes(b"half a database")
        raise OSError("disk full (simulated)")

    with monkeypatch.context() as patch:
        patch.setattr(attribution.outputs, "write_duckdb", broken)
        result = ws.invoke(ws.run_args(ws.write(), out, "--linking", "menchero"))
    assert result.exit_code != 0
    assert isinstance(result.exception, OSError)
    assert snapshot(out) == before
    assert leftovers(out) == []
    assert ws.invoke(ws.run_args(ws.write(), out)).exit_code == 0
    assert leftovers(out) == []


def test_failure_in_the_swap_restores_previous_results(
    ws: Workspace, monkeypatch: pytest.MonkeyPatch
) -> None:
    """The second rename (staging -> out) fails: the first one is undone."""
    out = ws.root / "out"
    before = ws.good_run(out)
    real_rename = Path.rename
    calls: list[str] = []

    def rename(self: Path, target: Path) -> Path:
        calls.append(Path(self).name)
        if ".staging-" in Path(self).name:
            raise OSError("rename refused (simulated)")
        return real_rename(self, target)

    with monkeypatch.context() as patch:
        patch.setattr(Path, "rename", rename)
        result = ws.invoke(ws.run_args(ws.write(), out, "--linking", "menchero"))
    assert isinstance(result.exception, OSError)
    assert calls[0] == "out"  # out -> previous happened before the failure
    assert snapshot(out) == before
    assert leftovers(out) == []


SLOW_WRITE = textwrap.dedent(
    """
    import sys, time
    from pathlib import Path
    import attribution.outputs as outputs

    real = outputs.write_duckdb
    marker = Path(sys.argv[1])

    def slow(db_path, parquet):
        views = real(db_path, parquet)
        marker.write_text("writing")
        time.sleep(120)
        return views

    outputs.write_duckdb = slow
    from attribution.cli import main
    main(sys.argv[2:], prog_name="tiltaudit")
    """
)

DIE_BETWEEN_RENAMES = textwrap.dedent(
    """
    import os, signal, sys
    from pathlib import Path

    real = Path.rename

    def rename(self, target):
        result = real(self, target)
        if Path(target).name.endswith(".previous"):
            os.kill(os.getpid(), signal.SIGKILL)
        return result

    Path.rename = rename
    from attribution.cli import main
    main(sys.argv[1:], prog_name="tiltaudit")
    """
)


def _wait_for(path: Path, proc: subprocess.Popen[str], seconds: float = 60.0) -> None:
    deadline = time.monotonic() + seconds
    while not path.exists():
        assert proc.poll() is None, proc.communicate()
        assert time.monotonic() < deadline, "the child never reached the write"
        time.sleep(0.05)


def test_killed_while_writing_keeps_previous_results(
    ws: Workspace, subprocess_env: dict[str, str]
) -> None:
    """SIGKILL while the new tables are being written (the child pauses inside the write)."""
    out = ws.root / "out"
    before = ws.good_run(out)
    marker = ws.root / "writing"
    argv = ws.run_args(ws.write(), out, "--linking", "frongello")
    child = subprocess.Popen(
        [sys.executable, "-c", SLOW_WRITE, str(marker), *argv],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        env=subprocess_env,
    )
    _wait_for(marker, child)
    os.kill(child.pid, signal.SIGKILL)
    child.communicate(timeout=60)
    assert child.returncode == -signal.SIGKILL
    assert snapshot(out) == before
    assert any(".staging-" in name for name in leftovers(out))  # it died mid-write
    # The next run cleans up after the dead one.
    assert ws.invoke(ws.run_args(ws.write(), out)).exit_code == 0
    assert leftovers(out) == []


def test_killed_between_the_renames_is_recovered(
    ws: Workspace, subprocess_env: dict[str, str]
) -> None:
    """SIGKILL after out -> previous and before staging -> out: the next run restores."""
    out = ws.root / "out"
    before = ws.good_run(out)
    argv = ws.run_args(ws.write(), out, "--linking", "frongello")
    child = subprocess.run(
        [sys.executable, "-c", DIE_BETWEEN_RENAMES, *argv],
        capture_output=True,
        text=True,
        env=subprocess_env,
        timeout=120,
        check=False,
    )
    assert child.returncode == -signal.SIGKILL, child.stderr
    previous = out.parent / f".{out.name}.previous"
    assert snapshot(previous) == before  # the earlier results survive beside the folder
    with output_lock(out):  # the next run, on taking the lock, puts them back
        assert snapshot(out) == before
    assert ws.invoke(ws.run_args(ws.write(), out)).exit_code == 0
    assert leftovers(out) == []
