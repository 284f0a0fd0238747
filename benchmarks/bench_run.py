"""Benchmark: wall time and peak memory of `tiltaudit run` beside a DuckDB floor.

Not a test. For each roster size it makes a roster with `tiltaudit simulate`, then times, in
the same session and on the same files:

* the floor — DuckDB (default threads) joining holdings to segment returns on portfolio,
  class and period, summing weight × return per portfolio and period, writing Parquet;
* `tiltaudit run` with the decomposition, linking and outputs (``--tests none``), and
  optionally the whole run with the exact timing tests (``--tests exact``).

Each command runs in its own process under ``/usr/bin/time -v`` so peak memory (maximum
resident set size) is measured per process. Usage::

    python benchmarks/bench_run.py --portfolios 5000 --classes 12 --periods 240
"""

from __future__ import annotations

import argparse
import json
import re
import subprocess
import sys
import tempfile
import time
from pathlib import Path

FLOOR_SQL = """
copy (
    with calendar as (
        select period_end, lag(period_end) over (order by period_end) as period_start
        from (select distinct period_end from read_parquet('{d}/index_returns.parquet'))
    ),
    held as (
        select h.portfolio_id, c.period_end, h.asset_class, h.weight
        from read_parquet('{d}/holdings.parquet') as h
        inner join calendar as c on h.as_of = c.period_start
    )
    select held.portfolio_id, held.period_end, sum(held.weight * s.return) as computed_return
    from held
    inner join read_parquet('{d}/segment_returns.parquet') as s
        using (portfolio_id, period_end, asset_class)
    group by 1, 2
) to '{out}' (format parquet)
"""


def timed(cmd: list[str]) -> dict[str, float]:
    """Run a command under /usr/bin/time -v; return wall seconds and peak RSS in GiB."""
    start = time.perf_counter()
    proc = subprocess.run(
        ["/usr/bin/time", "-v", *cmd], capture_output=True, text=True, check=False
    )
    wall = time.perf_counter() - start
    rss = re.search(r"Maximum resident set size \(kbytes\): (\d+)", proc.stderr)
    if proc.returncode not in (0, 3):
        sys.stderr.write(proc.stderr[-2000:])
        msg = f"command failed ({proc.returncode}): {' '.join(cmd)}"
        raise RuntimeError(msg)
    peak = round(int(rss.group(1)) / 2**20, 2) if rss else -1.0
    return {"wall_s": round(wall, 2), "peak_gib": peak}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--portfolios", type=int, nargs="+", default=[1000, 5000])
    parser.add_argument("--classes", type=int, default=12)
    parser.add_argument("--periods", type=int, default=240)
    parser.add_argument("--with-tests", action="store_true", help="also time --tests exact")
    parser.add_argument("--workdir", type=Path, default=None)
    args = parser.parse_args()
    root = args.workdir or Path(tempfile.mkdtemp(prefix="tiltaudit-bench-"))
    results = []
    for n in args.portfolios:
        data = root / f"roster_{n}"
        if not (data / "holdings.parquet").exists():
            subprocess.run(
                [
                    "tiltaudit",
                    "simulate",
                    "--out",
                    str(data),
                    "--portfolios",
                    str(n),
                    "--classes",
                    str(args.classes),
                    "--periods",
                    str(args.periods),
                    "--no-portfolio-returns",
                ],
                check=True,
                capture_output=True,
            )
        floor_sql = FLOOR_SQL.format(d=data, out=root / f"floor_{n}.parquet")
        floor = timed([sys.executable, "-c", f"import duckdb; duckdb.sql({floor_sql!r})"])
        run_cmd = [
            "tiltaudit",
            "run",
            "--quiet",
            "--holdings",
            str(data / "holdings.parquet"),
            "--index-returns",
            str(data / "index_returns.parquet"),
            "--policy",
            str(data / "policy.parquet"),
            "--segment-returns",
            str(data / "segment_returns.parquet"),
            "--riskfree",
            str(data / "riskfree.parquet"),
        ]
        engine = timed([*run_cmd, "--tests", "none", "--out", str(root / f"out_{n}")])
        row = {
            "portfolios": n,
            "floor": floor,
            "run_no_tests": engine,
            "ratio_to_floor": round(engine["wall_s"] / floor["wall_s"], 2),
        }
        if args.with_tests:
            row["run_exact_tests"] = timed(
                [*run_cmd, "--tests", "exact", "--out", str(root / f"out_exact_{n}")]
            )
        results.append(row)
        print(json.dumps(row))


if __name__ == "__main__":
    main()
