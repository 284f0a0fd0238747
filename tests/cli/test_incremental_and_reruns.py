"""Nightly operation: identical reruns, incremental runs equal to full runs, --full.

The reference for an incremental run is a full run of the same inputs (our own engine,
run from scratch): every table must have the same rows in the same order with numbers equal
to 1e-12 (DESIGN §5 rerun rule; issue "nightly warehouse job" item 3).
"""

from __future__ import annotations

import json
from pathlib import Path

import duckdb
import polars as pl
import pytest
from click.testing import CliRunner
from polars.testing import assert_frame_equal

from attribution.cli import main
from attribution.incremental import load_previous, shared_fingerprint
from attribution.options import RunOptions
from attribution.outputs import PARTITIONED_TABLES, scan_output_table
from attribution.runner import prepare, run_roster
from attribution.simulate import demo_tables, simulate_roster, write_tables

ATOL = 1e-12
TABLES = (
    "effects",
    "summary",
    "summary_windows",
    "series",
    "data_issues",
    "timing_tests",
    "roster",
    "power",
    "money",
    "plan",
    "plan_total",
)


def _inputs(folder: Path, tables: dict[str, pl.DataFrame]) -> list[str]:
    paths = write_tables(tables, folder)
    args = []
    for name, path in paths.items():
        args += ["--" + name.replace("_", "-"), str(path)]
    return args


def _run(args: list[str], out: Path, *extra: str) -> dict:
    result = CliRunner().invoke(main, ["run", *args, "--out", str(out), "--quiet", *extra])
    assert result.exit_code in (0, 3), result.output
    return json.loads((out / "manifest.json").read_text())


def _assert_same_tables(a: Path, b: Path, *, exact: bool = False) -> None:
    for name in TABLES:
        left, right = pl.read_parquet(a / f"{name}.parquet"), pl.read_parquet(b / f"{name}.parquet")
        if exact:
            assert_frame_equal(left, right, check_exact=True)
        else:
            assert_frame_equal(left, right, check_exact=False, rel_tol=0, abs_tol=ATOL)


def _changed_holdings(holdings: pl.DataFrame, pid: str) -> pl.DataFrame:
    # Move two points from the first class to the second on one date: still sums to 1.
    date = holdings.filter(pl.col("portfolio_id") == pid)["as_of"].unique().sort()[30]
    rows = holdings.filter((pl.col("portfolio_id") == pid) & (pl.col("as_of") == date))
    first, second = rows["asset_class"].sort()[:2].to_list()
    hit = (pl.col("portfolio_id") == pid) & (pl.col("as_of") == date)
    return holdings.with_columns(
        weight=pl.when(hit & (pl.col("asset_class") == first))
        .then(pl.col("weight") - 0.02)
        .when(hit & (pl.col("asset_class") == second))
        .then(pl.col("weight") + 0.02)
        .otherwise(pl.col("weight"))
    )


@pytest.fixture(scope="module")
def demo() -> dict[str, pl.DataFrame]:
    return demo_tables()


def test_rerun_with_the_same_inputs_gives_identical_tables(demo, tmp_path: Path) -> None:
    args = _inputs(tmp_path / "in", demo)
    first = _run(args, tmp_path / "a", "--full")
    second = _run(args, tmp_path / "b", "--full")
    _assert_same_tables(tmp_path / "a", tmp_path / "b", exact=True)
    assert first["fingerprints"] == second["fingerprints"]
    assert len(first["fingerprints"]["portfolios"]) == 8


def test_incremental_run_re_evaluates_only_the_changed_portfolio(demo, tmp_path: Path) -> None:
    out = tmp_path / "nightly"
    _run(_inputs(tmp_path / "day1", demo), out, "--incremental")  # the first night: full
    day1 = pl.read_parquet(out / "summary.parquet")
    changed = dict(demo, holdings=_changed_holdings(demo["holdings"], "pentaloom_global"))
    day2 = _inputs(tmp_path / "day2", changed)
    manifest = _run(day2, out, "--incremental")
    assert manifest["incremental"]["mode"] == "incremental"
    assert manifest["incremental"]["evaluated"] == 1
    assert manifest["incremental"]["reused"] == 7
    # The reference: a full run of day 2's inputs in a fresh folder.
    _run(day2, tmp_path / "full")
    _assert_same_tables(out, tmp_path / "full")
    # The changed portfolio's numbers did change (so the comparison above has teeth), the
    # others' did not.
    day2 = pl.read_parquet(out / "summary.parquet")
    moved = day1.join(day2, on="portfolio_id", suffix="_2").filter(
        pl.col("timing") != pl.col("timing_2")
    )
    assert moved["portfolio_id"].to_list() == ["pentaloom_global"]


def test_a_shared_table_change_re_evaluates_everyone(demo, tmp_path: Path) -> None:
    out = tmp_path / "nightly"
    _run(_inputs(tmp_path / "day1", demo), out, "--incremental")
    bumped = demo["index_returns"].with_columns(
        pl.when(pl.int_range(pl.len()) == 5)
        .then(pl.col("return") + 1e-4)
        .otherwise(pl.col("return"))
    )
    day2 = _inputs(tmp_path / "day2", dict(demo, index_returns=bumped))
    manifest = _run(day2, out, "--incremental")
    assert manifest["incremental"]["evaluated"] == 8
    assert manifest["incremental"]["reused"] == 0
    assert any("shared input" in note for note in manifest["notes"])
    _run(day2, tmp_path / "full")
    _assert_same_tables(out, tmp_path / "full", exact=True)


def test_full_wins_over_incremental(demo, tmp_path: Path) -> None:
    args = _inputs(tmp_path / "in", demo)
    out = tmp_path / "nightly"
    plain = _run(args, out)
    assert plain["fingerprints"] is None  # a plain run does not pay for fingerprints
    after_plain = _run(args, out, "--incremental")
    assert after_plain["incremental"]["evaluated"] == 8
    assert any("no usable fingerprints" in note for note in after_plain["notes"])
    manifest = _run(args, out, "--incremental", "--full")
    assert manifest["incremental"] == {"mode": "full", "evaluated": 8, "reused": 0}
    unchanged = _run(args, out, "--incremental")
    assert unchanged["incremental"]["evaluated"] == 0
    assert unchanged["incremental"]["reused"] == 8


def test_incremental_over_many_shards_equals_a_full_run(tmp_path: Path) -> None:
    # A random roster in shards of 7 portfolios: copied and new rows interleave in shards.
    tables = simulate_roster(n_portfolios=40, n_classes=5, n_periods=60, seed=11)
    options = RunOptions.build(tests="exact")
    first = run_roster(prepare(tables, options), options, shard_size=7, fingerprints=True)
    first.with_sources(tables).write(tmp_path / "out")
    ids = sorted(tables["holdings"]["portfolio_id"].unique().to_list())
    changed = dict(tables)
    for pid in (ids[3], ids[17], ids[38]):
        changed["holdings"] = _changed_holdings(changed["holdings"], pid)
    prepared = prepare(changed, options)
    shared = shared_fingerprint(
        prepared.shared.index_returns, prepared.shared.riskless, options.to_dict()
    )
    previous, reason = load_previous(tmp_path / "out", shared)
    assert previous is not None, reason
    incremental = run_roster(prepared, options, shard_size=7, previous=previous)
    full = run_roster(prepare(changed, options), options, shard_size=7)
    assert incremental.reuse == {"reused": 37, "evaluated": 3}
    for name, frame in full.tables().items():
        assert_frame_equal(
            incremental.tables()[name], frame, check_exact=False, rel_tol=0, abs_tol=ATOL
        )
    assert incremental.skipped == full.skipped


def test_partitioned_output_holds_the_same_rows(demo, tmp_path: Path) -> None:
    args = _inputs(tmp_path / "in", demo)
    _run(args, tmp_path / "files")
    manifest = _run(args, tmp_path / "parts", "--partitioned", "--full")
    parts = tmp_path / "parts"
    for name in PARTITIONED_TABLES:
        assert not (parts / f"{name}.parquet").exists()
        years = sorted(p.name for p in (parts / name).iterdir())
        assert years == [f"period_year={y}" for y in range(2015, 2025)]
        assert manifest["outputs"][name]["partitioned_by"] == "period_year"
        # Each partition holds exactly its year's rows.
        one = pl.read_parquet(parts / name / "period_year=2019")
        assert set(one["period_end"].dt.year().to_list()) == {2019}
        got = scan_output_table(parts, name)
        assert got is not None
        assert_frame_equal(
            got.collect(), pl.read_parquet(tmp_path / "files" / f"{name}.parquet"), check_exact=True
        )
    con = duckdb.connect(str(parts / "results.duckdb"), read_only=True)
    try:
        n = con.execute("select count(*) from effects").fetchone()
    finally:
        con.close()
    assert n is not None
    assert n[0] == manifest["outputs"]["effects"]["rows"]
    # An incremental run over a partitioned previous run equals a full run.
    changed = dict(demo, holdings=_changed_holdings(demo["holdings"], "korvane_balanced"))
    day2 = _inputs(tmp_path / "day2", changed)
    again = _run(day2, parts, "--partitioned", "--incremental")
    assert again["incremental"]["evaluated"] == 1
    _run(day2, tmp_path / "full2")
    for name in TABLES:
        got = scan_output_table(parts, name)
        assert got is not None
        assert_frame_equal(
            got.collect(),
            pl.read_parquet(tmp_path / "full2" / f"{name}.parquet"),
            check_exact=False,
            rel_tol=0,
            abs_tol=ATOL,
        )
