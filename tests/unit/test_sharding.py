"""A roster run in shards (and streamed to sinks) equals the same roster run in one piece.

Reference: the unsharded run of our own engine (issue "nightly warehouse job" item 2:
"Results equal the unsharded run's"). Every table must have the same rows in the same
order, numbers equal to 1e-12; resampling included, since each portfolio's draws depend on
the seed and its own record only.
"""

from __future__ import annotations

import polars as pl
import pytest
from polars.testing import assert_frame_equal

from attribution.options import RunOptions
from attribution.runner import prepare, run_roster
from attribution.simulate import simulate_roster

ATOL = 1e-12


@pytest.fixture(scope="module")
def roster() -> dict[str, pl.DataFrame]:
    return simulate_roster(n_portfolios=30, n_classes=5, n_periods=72, seed=5)


@pytest.mark.parametrize("tests", ["exact", "all"])
def test_shards_and_sinks_equal_one_piece(roster, tests: str) -> None:
    options = RunOptions.build(tests=tests, draws=99, seed=3)
    whole = run_roster(prepare(roster, options), options, shard_size=10_000)
    effects_parts: list[pl.DataFrame] = []
    series_parts: list[pl.DataFrame] = []

    def keep_effects(part) -> None:  # an Arrow table, a builder of one, or a polars frame
        if callable(part):
            part = part()
        frame = part if isinstance(part, pl.DataFrame) else pl.from_arrow(part)
        assert isinstance(frame, pl.DataFrame)
        effects_parts.append(
            frame.with_columns(pl.col("portfolio_id", "asset_class").cast(pl.String))
        )

    sharded = run_roster(
        prepare(roster, options),
        options,
        shard_size=7,
        effects_sink=keep_effects,
        series_sink=series_parts.append,
    )
    assert len(series_parts) == 5  # 30 portfolios in shards of 7
    assert sharded.effects is None
    assert sharded.series is None
    streamed = {"effects": pl.concat(effects_parts), "series": pl.concat(series_parts)}
    for name, frame in whole.tables().items():
        got = streamed[name] if name in streamed else sharded.tables()[name]
        assert_frame_equal(got, frame, check_exact=False, rel_tol=0, abs_tol=ATOL)
    assert sharded.skipped == whole.skipped


def test_timing_reads_the_slim_effects_view_like_the_full_frame(roster) -> None:
    # The runner hands the timing layer a slim view with Enum ids and classes; the
    # results must equal those from the plain effects frame with text columns.
    import numpy as np

    from attribution.decompose import effects_frame, run_shard, timing_effects
    from attribution.runner import PORTFOLIO_TABLES, timing_options
    from attribution.timing import evaluate_timing

    options = RunOptions.build(tests="exact")
    prepared = prepare(roster, options)
    ids = prepared.readers["holdings"].portfolio_ids().to_list()
    tables = {
        name: prepared.readers[name].read_shard(ids) if name in prepared.readers else None
        for name in PORTFOLIO_TABLES
    }
    part = run_shard(tables, prepared.shared.calendar, prepared.shared.index_returns, options)
    table = part.effects_table()
    shared = prepared.shared
    with np.errstate(invalid="ignore", divide="ignore"):
        results = [
            evaluate_timing(
                frame,
                part.series,
                shared.index_returns,
                shared.riskless,
                options=timing_options(options),
            )
            for frame in (effects_frame(table), timing_effects(table))
        ]
    for name in ("timing_tests", "verdicts", "power", "series_extra", "issues"):
        assert_frame_equal(getattr(results[1], name), getattr(results[0], name), check_exact=True)


def test_one_portfolio_per_shard_equals_the_default_on_the_demo() -> None:
    # The demo holds a fixed-mix rebalancer (orvelle_partners) whose trades exactly undo
    # drift: its trade_regression must be undefined, not a ratio of rounding residues that
    # changes with the shard's other portfolios.
    from attribution.simulate import demo_tables

    demo = demo_tables()
    options = RunOptions.build(tests="all", draws=199)
    alone = run_roster(prepare(demo, options), options, shard_size=1)
    together = run_roster(prepare(demo, options), options)
    for name, frame in together.tables().items():
        assert_frame_equal(alone.tables()[name], frame, check_exact=False, rel_tol=0, abs_tol=ATOL)
    trade = together.extra_tables["timing_tests"].filter(
        (pl.col("portfolio_id") == "orvelle_partners") & (pl.col("test") == "trade_regression")
    )
    assert trade["p_value"].is_null().all()
    issues = together.data_issues.filter(
        (pl.col("portfolio_id") == "orvelle_partners") & (pl.col("code") == "test_undefined")
    )
    assert issues["message"].str.contains("undo drift").any()


def test_a_shard_of_one_period_records_does_not_break_the_regressions() -> None:
    # Every record in the shard is one period long: fewer observations than regressors.
    tables = simulate_roster(n_portfolios=2, n_classes=4, n_periods=24, seed=2)
    first = tables["holdings"]["as_of"].min()
    tables = dict(tables, holdings=tables["holdings"].filter(pl.col("as_of") == first))
    options = RunOptions.build(tests="exact")
    result = run_roster(prepare(tables, options), options)
    assert result.summary["n_periods"].to_list() == [1, 1]
    tests = result.extra_tables["timing_tests"]
    assert tests["p_value"].is_null().all()  # every test: too few periods
    codes = set(result.data_issues["code"].to_list())
    assert "test_too_few_periods" in codes


def test_arrow_compute_is_loaded_before_any_shard_thread_writes() -> None:
    # Two Parquet writer threads whose first write also loaded pyarrow.compute (needed by
    # dictionary columns) intermittently failed with "No function registered with name:
    # unique" (1 run in 16 at 1,000 portfolios); the runner now loads it on import, in the
    # main thread. Checked in a fresh interpreter, where nothing else has loaded it.
    import subprocess
    import sys

    code = "import sys, attribution.runner; print('pyarrow.compute' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "True"


@pytest.mark.parametrize("stage", ["finishing", "decomposing"])
def test_an_error_in_either_stage_of_the_pipeline_reaches_the_caller(
    roster, monkeypatch, stage: str
) -> None:
    # The finishing thread works on shard i - 1 while the main thread decomposes shard i: an
    # error on either side must surface from run_roster (not hang, not be lost).
    import attribution.runner as runner_module

    calls = {"n": 0}
    target = "summary_frame" if stage == "finishing" else "run_shard"
    original = getattr(runner_module, target)

    def failing(*args, **kwargs):
        calls["n"] += 1
        if calls["n"] == 2:
            raise RuntimeError(f"planted failure in the {stage} stage")
        return original(*args, **kwargs)

    monkeypatch.setattr(runner_module, target, failing)
    options = RunOptions.build(tests="exact")
    with pytest.raises(RuntimeError, match=f"planted failure in the {stage} stage"):
        run_roster(prepare(roster, options), options, shard_size=7)
    assert calls["n"] == 2
