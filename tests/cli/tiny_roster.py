"""A tiny valid roster for the command-line tests, and helpers to write and run it.

Imported by the test modules as ``tiny_roster`` (a unique name, so it cannot clash with
another folder's conftest); the fixtures live in ``conftest.py``.

The roster is invented test data built here with polars and a seeded generator (it does not
depend on ``attribution.simulate``): three portfolios (P1, P2, P3), three asset classes
(equity, bonds, cash), twelve calendar month ends of 2020. Holdings start at 2019-12-31, the
start of the calendar's first period, and cover every period. Every table of DESIGN §2 is
present, so each data-issue rule has something to bite on.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Sequence
from pathlib import Path

import numpy as np
import polars as pl
from click.testing import CliRunner, Result

from attribution.cli import main

PORTFOLIOS = ("P1", "P2", "P3")
CLASSES = ("equity", "bonds", "cash")
POLICY_MIX = {"equity": 0.6, "bonds": 0.3, "cash": 0.1}
FIRST_START = dt.date(2019, 12, 31)
SEED = 20240611

TABLE_FLAGS = {
    "holdings": "--holdings",
    "index_returns": "--index-returns",
    "policy": "--policy",
    "riskfree": "--riskfree",
    "segment_returns": "--segment-returns",
    "portfolio_returns": "--portfolio-returns",
    "portfolio_values": "--portfolio-values",
}


def month_ends(first: dt.date, n: int) -> list[dt.date]:
    """``n`` consecutive calendar month ends starting with the month of ``first``."""
    out = []
    year, month = first.year, first.month
    for _ in range(n):
        nxt = dt.date(year + (month == 12), month % 12 + 1, 1)
        out.append(nxt - dt.timedelta(days=1))
        year, month = nxt.year, nxt.month
    return out


def business_month_end(day: dt.date) -> dt.date:
    """The last weekday on or before a calendar month end (holidays ignored)."""
    while day.weekday() >= 5:
        day -= dt.timedelta(days=1)
    return day


PERIOD_ENDS = month_ends(dt.date(2020, 1, 1), 12)
HOLDING_DATES = [FIRST_START, *PERIOD_ENDS[:-1]]


def make_roster(seed: int = SEED) -> dict[str, pl.DataFrame]:
    """Every input table of DESIGN §2 for the tiny roster, as polars frames."""
    rng = np.random.default_rng(seed)
    n_t = len(PERIOD_ENDS)
    index = {
        c: rng.normal(mu, sd, n_t)
        for c, mu, sd in (
            ("equity", 0.008, 0.04),
            ("bonds", 0.003, 0.01),
            ("cash", 0.001, 0.0005),
        )
    }
    index_returns = pl.DataFrame(
        {
            "period_end": [d for d in PERIOD_ENDS for _ in CLASSES],
            "asset_class": [c for _ in PERIOD_ENDS for c in CLASSES],
            "return": [float(index[c][t]) for t in range(n_t) for c in CLASSES],
        }
    )
    riskfree = pl.DataFrame({"period_end": PERIOD_ENDS, "return": [0.001] * n_t})

    holdings_rows, segment_rows, reported_rows = [], [], []
    for pid in PORTFOLIOS:
        equity = np.clip(0.6 + rng.normal(0.0, 0.05, n_t), 0.4, 0.8)
        bonds = np.clip(0.3 + rng.normal(0.0, 0.03, n_t), 0.1, 0.4)
        for t, as_of in enumerate(HOLDING_DATES):
            weights = {"equity": equity[t], "bonds": bonds[t]}
            weights["cash"] = 1.0 - weights["equity"] - weights["bonds"]
            total = 0.0
            for c in CLASSES:
                seg = float(index[c][t] + rng.normal(0.0, 0.002))
                holdings_rows.append((pid, as_of, c, float(weights[c])))
                segment_rows.append((pid, PERIOD_ENDS[t], c, seg))
                total += weights[c] * seg
            # A small fee makes the reported return differ from the computed one.
            reported_rows.append((pid, PERIOD_ENDS[t], float(total - 0.0005)))
    holdings = pl.DataFrame(
        holdings_rows,
        schema={
            "portfolio_id": pl.String,
            "as_of": pl.Date,
            "asset_class": pl.String,
            "weight": pl.Float64,
        },
        orient="row",
    )
    segment_returns = pl.DataFrame(
        segment_rows,
        schema={
            "portfolio_id": pl.String,
            "period_end": pl.Date,
            "asset_class": pl.String,
            "return": pl.Float64,
        },
        orient="row",
    )
    portfolio_returns = pl.DataFrame(
        reported_rows,
        schema={"portfolio_id": pl.String, "period_end": pl.Date, "return": pl.Float64},
        orient="row",
    )
    policy = pl.DataFrame(
        {
            "portfolio_id": [p for p in PORTFOLIOS for _ in CLASSES],
            "asset_class": [c for _ in PORTFOLIOS for c in CLASSES],
            "weight": [POLICY_MIX[c] for _ in PORTFOLIOS for c in CLASSES],
            "effective_from": [FIRST_START] * (len(PORTFOLIOS) * len(CLASSES)),
        }
    )
    return {
        "holdings": holdings,
        "index_returns": index_returns,
        "policy": policy,
        "riskfree": riskfree,
        "segment_returns": segment_returns,
        "portfolio_returns": portfolio_returns,
    }


def snapshot(folder: Path) -> dict[str, bytes]:
    """Every file under ``folder`` (relative path -> bytes); empty when it does not exist."""
    if not folder.exists():
        return {}
    return {
        str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()
    }


class Workspace:
    """A temporary folder with the tiny roster and helpers to write inputs and run the CLI."""

    def __init__(self, root: Path) -> None:
        self.root = root
        self.frames = make_roster()

    def write(
        self,
        frames: dict[str, pl.DataFrame] | None = None,
        *,
        fmt: str = "parquet",
        folder: str = "inputs",
    ) -> dict[str, Path]:
        """Write the tables (default: the valid roster) as ``<table>.<fmt>``; return paths."""
        target = self.root / folder
        target.mkdir(parents=True, exist_ok=True)
        paths = {}
        for name, frame in (frames if frames is not None else self.frames).items():
            path = target / f"{name}.{fmt}"
            if fmt == "csv":
                frame.write_csv(path)
            else:
                frame.write_parquet(path)
            paths[name] = path
        return paths

    @staticmethod
    def input_args(paths: dict[str, Path]) -> list[str]:
        """The input-table flags for ``paths``."""
        args: list[str] = []
        for name, path in paths.items():
            args += [TABLE_FLAGS[name], str(path)]
        return args

    def run_args(self, paths: dict[str, Path], out: Path, *extra: str) -> list[str]:
        """``run`` with every input of ``paths``, ``--out`` and extra flags."""
        return ["run", *self.input_args(paths), "--out", str(out), "--quiet", *extra]

    @staticmethod
    def invoke(args: Sequence[str]) -> Result:
        """Run the command line in-process (stdout and stderr kept apart)."""
        return CliRunner().invoke(main, list(args), catch_exceptions=True)

    def good_run(self, out: Path) -> dict[str, bytes]:
        """Run the valid roster into ``out`` (exit 0 asserted); return the folder's bytes."""
        result = self.invoke(self.run_args(self.write(), out))
        assert result.exit_code == 0, result.output + result.stderr
        return snapshot(out)
