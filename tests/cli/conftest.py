"""Fixtures for the command-line tests: a workspace holding the tiny valid roster."""

from __future__ import annotations

import os
import sys
from pathlib import Path

import pytest
from tiny_roster import Workspace


@pytest.fixture
def ws(tmp_path: Path) -> Workspace:
    """A workspace in ``tmp_path`` holding the tiny valid roster."""
    return Workspace(tmp_path)


@pytest.fixture
def subprocess_env() -> dict[str, str]:
    """Environment for a child ``tiltaudit``: this interpreter's bin first on PATH."""
    env = dict(os.environ)
    env["PATH"] = str(Path(sys.executable).parent) + os.pathsep + env.get("PATH", "")
    env["COLUMNS"] = "200"
    return env
