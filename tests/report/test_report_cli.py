"""The review pack through the command line: written by a run, rebuilt by ``tiltaudit report``.

Issue 4: ``tiltaudit run`` writes report.html into the output folder and
``tiltaudit report --results DIR`` rebuilds it from the stored tables (computing nothing
new), so the two must be the same bytes.
"""

from __future__ import annotations

from pathlib import Path

from click.testing import CliRunner

from attribution.cli import main
from attribution.report import build_report_from_folder


def test_run_writes_the_report_it_would_rebuild(demo_dir: Path) -> None:
    written = demo_dir / "report.html"
    assert written.read_text(encoding="utf-8") == build_report_from_folder(demo_dir)


def test_report_command_rebuilds_the_same_bytes(demo_dir: Path, tmp_path: Path) -> None:
    out = tmp_path / "rebuilt.html"
    result = CliRunner().invoke(main, ["report", "--results", str(demo_dir), "--out", str(out)])
    assert result.exit_code == 0, result.output
    assert out.read_text(encoding="utf-8") == build_report_from_folder(demo_dir)


def test_report_command_names_a_missing_folder(tmp_path: Path) -> None:
    result = CliRunner().invoke(main, ["report", "--results", str(tmp_path / "absent")])
    assert result.exit_code == 2
    assert "absent" in result.output + (result.stderr or "")
