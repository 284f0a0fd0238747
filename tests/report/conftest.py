"""Fixtures for the review-pack tests: test tables, the demo's output folder, a browser.

The test tables come from ``report_data`` (the tiny roster through the real engine, plus
timing tables); the demo folder is written once per session by the real command line. The
``chromium`` fixture finds Debian's ``chromium``; without one the browser tests skip, except
under ``CI=true``, where a missing browser fails the run (issue 4).
"""

from __future__ import annotations

import os
from pathlib import Path

import polars as pl
import pytest
import report_data
from chromium_cdp import find_chromium
from click.testing import CliRunner

from attribution.cli import main


def on_ci() -> bool:
    return os.environ.get("CI", "").strip().lower() in ("true", "1", "yes")


@pytest.fixture(scope="session")
def core_tables() -> dict[str, pl.DataFrame]:
    """The tiny roster's decomposition tables (no timing tables)."""
    return report_data.engine_tables()


@pytest.fixture(scope="session")
def full_tables(core_tables: dict[str, pl.DataFrame]) -> dict[str, pl.DataFrame]:
    """The tiny roster's tables with timing_tests, roster, power and the timing columns."""
    return report_data.with_timing(core_tables)


@pytest.fixture(scope="session")
def demo_dir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The output folder of ``tiltaudit demo`` (run once per session)."""
    out = tmp_path_factory.mktemp("demo") / "tiltaudit-demo"
    result = CliRunner().invoke(main, ["demo", "--out", str(out), "--quiet"])
    assert result.exit_code == 0, result.output
    return out


@pytest.fixture(scope="session")
def chromium() -> str:
    """Path of the Chromium binary; skip without one, fail without one under CI=true."""
    binary = find_chromium()
    if binary is None:
        message = (
            "no Chromium found (install Debian's package: apt-get install -y chromium, or "
            "name a binary in TILTAUDIT_CHROMIUM)"
        )
        if on_ci():
            pytest.fail("CI=true and " + message)
        pytest.skip(message)
    return binary
