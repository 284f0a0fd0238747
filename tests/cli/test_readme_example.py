"""The README's Python API example runs as written and agrees with the command line."""

from __future__ import annotations

import os
import re
from pathlib import Path

import polars as pl
from click.testing import CliRunner
from polars.testing import assert_frame_equal

from attribution.cli import main

ROOT = Path(__file__).resolve().parents[2]


def _example() -> str:
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    section = text[text.index("## Python API") :]
    match = re.search(r"```python\n(.*?)```", section, flags=re.S)
    assert match, "the README's Python API section has no python code block"
    return match.group(1)


def test_readme_api_example_runs_and_matches_the_command_line(tmp_path: Path) -> None:
    here = Path.cwd()
    os.chdir(ROOT)
    try:
        code = _example().replace('"api-demo-results"', repr(str(tmp_path / "api")))
        namespace: dict[str, object] = {}
        exec(compile(code, "README.md", "exec"), namespace)
    finally:
        os.chdir(here)
    demo = ROOT / "fixtures" / "demo"
    args = ["run", "--out", str(tmp_path / "cli"), "--linking", "menchero", "--tests", "exact"]
    for table in (
        "holdings",
        "index_returns",
        "policy",
        "riskfree",
        "segment_returns",
        "portfolio_returns",
        "portfolio_values",
    ):
        args += ["--" + table.replace("_", "-"), str(demo / f"{table}.parquet")]
    outcome = CliRunner().invoke(main, args)
    assert outcome.exit_code == 0, outcome.output
    for table in ("summary", "effects", "series", "timing_tests", "data_issues", "money", "plan"):
        api = pl.read_parquet(tmp_path / "api" / f"{table}.parquet")
        cli = pl.read_parquet(tmp_path / "cli" / f"{table}.parquet")
        assert_frame_equal(api, cli, check_exact=True)
    result = namespace["result"]
    assert result.summary.height == 8  # type: ignore[attr-defined]
