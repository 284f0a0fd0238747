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

    def keep_effects(part) -> None:  # the sink gets a builder of an Arrow table
        frame = pl.from_arrow(part())
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
