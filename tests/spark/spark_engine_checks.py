"""Helpers for the Spark engine tests: comparing two runs, and a roster with planted issues.

Imported by the modules of ``tests/spark`` as ``spark_engine_checks`` (a unique name, so it
cannot clash with a helper of another test folder). All data here is invented.
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import polars as pl

from attribution.runner import RunResult
from attribution.simulate import simulate_roster

#: Engine-to-engine equality: returns are O(1e-2), so an absolute 1e-12 is 1e-8 basis
#: points, rounding only (common practice, no source).
ATOL = 1e-12


def frame_difference(actual: pl.DataFrame, expected: pl.DataFrame, *, label: str) -> float:
    """Assert two frames have the same columns, dtypes and rows in the same order, text and
    flags equal, numbers within :data:`ATOL` with nulls and NaNs in the same places; return
    the largest absolute difference of the numbers."""
    assert actual.columns == expected.columns, f"{label}: columns differ"
    assert actual.schema == expected.schema, f"{label}: {actual.schema} != {expected.schema}"
    assert actual.height == expected.height, f"{label}: {actual.height} != {expected.height} rows"
    worst = 0.0
    for column in actual.columns:
        left, right = actual[column], expected[column]
        if not left.dtype.is_float():
            assert left.equals(right), f"{label}.{column}: values differ"
            continue
        assert (left.is_null() == right.is_null()).all(), f"{label}.{column}: nulls differ"
        x = left.fill_null(0.0).to_numpy()
        y = right.fill_null(0.0).to_numpy()
        assert (np.isnan(x) == np.isnan(y)).all(), f"{label}.{column}: NaNs differ"
        finite = ~np.isnan(x)
        if finite.any():
            worst = max(worst, float(np.max(np.abs(x[finite] - y[finite]))))
        assert worst <= ATOL, f"{label}.{column}: differs by {worst:.3e} > {ATOL:.0e}"
    return worst


def result_difference(actual: RunResult, expected: RunResult) -> dict[str, float]:
    """Assert two runs give the same tables (see :func:`frame_difference`) and bookkeeping
    (skipped, notes, the names of the step timings, calendar, options); return the largest
    absolute difference per table."""
    assert actual.skipped == expected.skipped
    assert actual.notes == expected.notes
    assert sorted(actual.timings) == sorted(expected.timings)
    assert actual.calendar == expected.calendar
    assert actual.options == expected.options
    assert sorted(actual.extra_tables) == sorted(expected.extra_tables)
    assert actual.reuse == expected.reuse
    ours, theirs = actual.tables(), expected.tables()
    assert sorted(ours) == sorted(theirs)
    return {name: frame_difference(ours[name], theirs[name], label=name) for name in theirs}


def _edit(frame: pl.DataFrame, pid: str, mask: pl.Expr, **values: object) -> pl.DataFrame:
    """Set ``values`` on the rows of portfolio ``pid`` selected by ``mask``."""
    where = (pl.col("portfolio_id") == pid) & mask
    return frame.with_columns(
        **{
            name: pl.when(where).then(pl.lit(value, dtype=frame.schema[name])).otherwise(name)
            for name, value in values.items()
        }
    )


def planted_roster() -> dict[str, pl.DataFrame]:
    """A small random roster (12 portfolios, 4 classes, 24 months) with problems planted:

    sim000001 a duplicate holdings row (skipped); 02 a NaN weight (skipped); 03 weights
    summing to 1.02 on one date (skipped); 04 a segment return missing (warning); 05
    quarterly holdings (drift between dates); 06 a single holdings date (too short for the
    timing tests); 07 an off-calendar reported return (skipped); zz_orphan only in policy
    (no_holdings warning).
    """
    t = simulate_roster(n_portfolios=12, n_classes=4, n_periods=24, seed=21)
    h, p, s, r = t["holdings"], t["policy"], t["segment_returns"], t["portfolio_returns"]
    starts = sorted(h["as_of"].unique().to_list())
    ends = sorted(t["index_returns"]["period_end"].unique().to_list())
    on = pl.col("as_of") == starts[5]
    h = pl.concat([h, h.filter((pl.col("portfolio_id") == "sim000001") & on).head(1)])
    h = _edit(h, "sim000002", on & (pl.col("asset_class") == "cash"), weight=float("nan"))
    total = h.filter((pl.col("portfolio_id") == "sim000003") & on)["weight"].sum()
    h = h.with_columns(
        weight=pl.when((pl.col("portfolio_id") == "sim000003") & on)
        .then(pl.col("weight") * 1.02 / total)
        .otherwise("weight")
    )
    s = s.filter(
        ~(
            (pl.col("portfolio_id") == "sim000004")
            & (pl.col("period_end") == ends[7])
            & (pl.col("asset_class") == "cash")
        )
    )
    quarterly = [d for i, d in enumerate(starts) if i % 3 == 0]
    h = h.filter((pl.col("portfolio_id") != "sim000005") | pl.col("as_of").is_in(quarterly))
    h = h.filter((pl.col("portfolio_id") != "sim000006") | (pl.col("as_of") == starts[0]))
    r = _edit(r, "sim000007", pl.col("period_end") == ends[3], period_end=dt.date(2005, 4, 15))
    orphan = p.filter(pl.col("portfolio_id") == "sim000000").with_columns(
        portfolio_id=pl.lit("zz_orphan")
    )
    p = pl.concat([p, orphan])
    return {**t, "holdings": h, "policy": p, "segment_returns": s, "portfolio_returns": r}
