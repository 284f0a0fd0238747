"""Helpers for the SQL model tests: running the models, comparing marts, test rosters.

Imported by the modules of ``tests/sql`` as ``sql_model_checks`` (a unique name, so it
cannot clash with a helper of another test folder). All data here is invented.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Mapping

import duckdb
import numpy as np
import polars as pl

from attribution.options import RunOptions
from attribution.runner import run_roster
from attribution.simulate import simulate_roster
from attribution.sql_models import MARTS, read_marts, run_models

#: Exact identities and engine-to-engine equality: returns are O(1e-2), so an absolute
#: 1e-12 is 1e-8 basis points, rounding only (common practice, no source).
ATOL = 1e-12

#: The key of each mart: sorting by it gives a deterministic row order.
MART_KEYS: dict[str, list[str]] = {
    "effects": ["portfolio_id", "period_end", "asset_class"],
    "series": ["portfolio_id", "period_end"],
    "summary": ["portfolio_id"],
    "data_issues": ["portfolio_id", "period_end", "asset_class", "severity", "code", "message"],
}
ISSUE_KEY = ["portfolio_id", "period_end", "asset_class", "severity", "code"]


def run_sql(
    tables: Mapping[str, object], options: RunOptions | None = None
) -> dict[str, pl.DataFrame]:
    """Every model on a fresh in-memory DuckDB; returns every model's rows by name."""
    con = duckdb.connect()
    try:
        names = run_models(con, tables, options=options)  # type: ignore[arg-type]
        out = {name: con.sql(f"select * from {name}").pl() for name in names}
        out.update(read_marts(con))
    finally:
        con.close()
    return out


def python_marts(
    tables: Mapping[str, pl.DataFrame], options: RunOptions
) -> dict[str, pl.DataFrame]:
    """The local engine's tables under the marts' names (``run_roster``)."""
    result = run_roster(tables, options)
    assert result.effects is not None
    return {
        "effects": result.effects,
        "series": result.series,
        "summary": result.summary,
        "data_issues": result.data_issues,
    }


def _sorted(frame: pl.DataFrame, keys: list[str]) -> pl.DataFrame:
    return frame.sort(keys, nulls_last=True)


def assert_frames_close(
    actual: pl.DataFrame,
    expected: pl.DataFrame,
    *,
    keys: list[str],
    atol: float,
    label: str,
) -> None:
    """Same columns, dtypes and rows (after sorting by ``keys``); floats within ``atol``
    with nulls in the same places; everything else exactly equal.

    ``information_ratio`` is compared as information_ratio × tracking_error, which is the
    annualised active return: the ratio divides a return known to ~1e-16 by a tracking
    error that can be as small as 1e-3, so the ratio itself carries ~1e-13 of rounding,
    while its product with the tracking error is a return like any other.
    """
    assert actual.columns == expected.columns, f"{label}: columns differ"
    assert actual.schema == expected.schema, f"{label}: {actual.schema} != {expected.schema}"
    assert actual.height == expected.height, f"{label}: {actual.height} != {expected.height} rows"
    a = _sorted(actual, keys)
    b = _sorted(expected, keys)
    for column in a.columns:
        left, right = a[column], b[column]
        if column == "information_ratio":
            left = left * a["tracking_error"]
            right = right * b["tracking_error"]
        if left.dtype.is_float():
            assert (left.is_null() == right.is_null()).all(), f"{label}.{column}: nulls differ"
            x = left.fill_null(0.0).to_numpy()
            y = right.fill_null(0.0).to_numpy()
            assert np.isfinite(x).all(), f"{label}.{column}: NaN or infinite values"
            worst = float(np.max(np.abs(x - y))) if len(x) else 0.0
            assert worst <= atol, f"{label}.{column}: differs by {worst:.3e} > {atol:.0e}"
        else:
            assert left.equals(right), f"{label}.{column}: values differ"


def assert_matches_python(sql: dict[str, pl.DataFrame], python: dict[str, pl.DataFrame]) -> None:
    """The SQL marts equal the local engine's tables: effects, series and summary to
    :data:`ATOL`; data_issues on (portfolio_id, period_end, asset_class, severity, code).

    Messages are worded alike but not compared: the SQL models print numbers with a fixed
    number of decimals, the local engine in polars' shortest form.
    """
    for name in ("effects", "series", "summary"):
        expected = python[name].select(sql[name].columns)
        assert_frames_close(sql[name], expected, keys=MART_KEYS[name], atol=ATOL, label=name)
    codes = sql["data_issues"]["code"].unique().to_list()
    ours = sql["data_issues"].select(ISSUE_KEY).unique()
    theirs = python["data_issues"].filter(pl.col("code").is_in(codes)).select(ISSUE_KEY).unique()
    missing = theirs.join(ours, on=ISSUE_KEY, how="anti", nulls_equal=True)
    extra = ours.join(theirs, on=ISSUE_KEY, how="anti", nulls_equal=True)
    assert missing.height == 0, f"data_issues missing in SQL: {missing}"
    assert extra.height == 0, f"data_issues only in SQL: {extra}"
    # The timing tests are not part of the SQL models; their warnings are the engine's alone.
    timing_codes = ["test_too_few_periods", "test_undefined"]
    other = python["data_issues"].filter(
        ~pl.col("code").is_in(codes) & ~pl.col("code").is_in(timing_codes)
    )
    assert other.height == 0, f"issue codes the SQL path did not report: {other}"


def assert_marts_equal(actual: dict[str, pl.DataFrame], expected: dict[str, pl.DataFrame]) -> None:
    """Two runs of the SQL models (e.g. Spark and DuckDB) give the same marts: every column,
    messages included, numbers to :data:`ATOL`."""
    for name in MARTS:
        assert_frames_close(
            actual[name], expected[name], keys=MART_KEYS[name], atol=ATOL, label=name
        )


# --- a roster with every corner case and data issue ------------------------------------------


def _edit(frame: pl.DataFrame, pid: str, mask: pl.Expr, **values: object) -> pl.DataFrame:
    """Set ``values`` on the rows of portfolio ``pid`` selected by ``mask``."""
    where = (pl.col("portfolio_id") == pid) & mask
    return frame.with_columns(
        **{
            name: pl.when(where).then(pl.lit(value, dtype=frame.schema[name])).otherwise(name)
            for name, value in values.items()
        }
    )


def broken_roster() -> dict[str, pl.DataFrame]:
    """A small random roster (20 portfolios, 4 classes, 24 months) with one corner case or
    data problem planted per portfolio, and one portfolio that has no holdings.

    sim000000 clean; 01 a class missing on one date (its weight moved to another class:
    weight 0 there); 02 duplicate holdings row; 03 NaN weight; 04 off-calendar as_of;
    05 unknown class; 06 weights summing to 1.01; 07 weights summing to 1 + 5e-5 (within
    the tolerance: rescaled); 08 empty asset_class; 09 policy starting after the first
    period; 10 duplicate policy row; 11 a segment return of -100 %; 12 a segment return
    missing for a held class; 13 an infinite segment return and an off-calendar one; 14 a
    reported return missing; 15 a reported return of -120 % and a duplicate one;
    16 quarterly holdings with a six-month gap (drift, holdings_gap); 17 a single holdings
    date and no segment returns; 18 neither segment nor reported returns, short cash;
    19 a second policy set with a class it never holds; zz_orphan only in policy.
    """
    t = simulate_roster(n_portfolios=20, n_classes=4, n_periods=24, seed=11)
    h, p, s, r = t["holdings"], t["policy"], t["segment_returns"], t["portfolio_returns"]
    starts = sorted(h["as_of"].unique().to_list())
    ends = sorted(t["index_returns"]["period_end"].unique().to_list())
    on = pl.col("as_of") == starts[3]

    # 01: cash absent on one date, its weight added to government bonds
    cash = h.filter(
        (pl.col("portfolio_id") == "sim000001") & on & (pl.col("asset_class") == "cash")
    )
    h = h.with_columns(
        weight=pl.when(
            (pl.col("portfolio_id") == "sim000001")
            & on
            & (pl.col("asset_class") == "government_bonds")
        )
        .then(pl.col("weight") + cash["weight"][0])
        .otherwise("weight")
    ).join(cash, on=list(cash.columns), how="anti")
    h = pl.concat([h, h.filter((pl.col("portfolio_id") == "sim000002") & on).head(1)])
    h = _edit(h, "sim000003", on & (pl.col("asset_class") == "cash"), weight=float("nan"))
    h = _edit(h, "sim000004", on, as_of=dt.date(2005, 3, 15))
    extra = h.filter((pl.col("portfolio_id") == "sim000005") & on).head(1)
    h = pl.concat([h, extra.with_columns(asset_class=pl.lit("crypto"), weight=pl.lit(0.0))])
    h = _edit(h, "sim000006", on & (pl.col("asset_class") == "cash"), weight=0.25)
    h = h.with_columns(
        weight=pl.when((pl.col("portfolio_id").is_in(["sim000006", "sim000007"])) & on)
        .then(
            pl.col("weight")
            * pl.when(pl.col("portfolio_id") == "sim000006").then(1.0).otherwise(1.00005)
        )
        .otherwise("weight")
    )
    # 06: make the total exactly 1.01 whatever cash weighed
    total6 = h.filter((pl.col("portfolio_id") == "sim000006") & on)["weight"].sum()
    h = h.with_columns(
        weight=pl.when((pl.col("portfolio_id") == "sim000006") & on)
        .then(pl.col("weight") * 1.01 / total6)
        .otherwise("weight")
    )
    h = _edit(h, "sim000008", on & (pl.col("asset_class") == "cash"), asset_class=None)
    p = _edit(p, "sim000009", pl.lit(True), effective_from=starts[2])
    p = pl.concat([p, p.filter(pl.col("portfolio_id") == "sim000010").head(1)])
    s = _edit(
        s,
        "sim000011",
        (pl.col("period_end") == ends[5]) & (pl.col("asset_class") == "cash"),
        **{"return": -1.0},
    )
    s = s.filter(
        ~(
            (pl.col("portfolio_id") == "sim000012")
            & (pl.col("period_end") == ends[7])
            & (pl.col("asset_class") == "domestic_equity")
        )
    )
    s = _edit(
        s,
        "sim000013",
        (pl.col("period_end") == ends[2]) & (pl.col("asset_class") == "cash"),
        **{"return": float("inf")},
    )
    s = _edit(
        s,
        "sim000013",
        (pl.col("period_end") == ends[3]) & (pl.col("asset_class") == "cash"),
        period_end=dt.date(2005, 4, 15),
    )
    r = r.filter(~((pl.col("portfolio_id") == "sim000014") & (pl.col("period_end") == ends[10])))
    r = _edit(r, "sim000015", pl.col("period_end") == ends[4], **{"return": -1.2})
    r = pl.concat([r, r.filter(pl.col("portfolio_id") == "sim000015").head(1)])
    quarterly = [d for i, d in enumerate(starts) if i % 3 == 0 and not 6 <= i < 12]
    h = h.filter((pl.col("portfolio_id") != "sim000016") | pl.col("as_of").is_in(quarterly))
    h = h.filter((pl.col("portfolio_id") != "sim000017") | (pl.col("as_of") == starts[0]))
    s = s.filter(~pl.col("portfolio_id").is_in(["sim000017", "sim000018"]))
    r = r.filter(pl.col("portfolio_id") != "sim000018")
    short = (pl.col("portfolio_id") == "sim000018") & (pl.col("asset_class") == "cash")
    long_ = (pl.col("portfolio_id") == "sim000018") & (pl.col("asset_class") == "domestic_equity")
    h = h.with_columns(
        weight=pl.when(short)
        .then(pl.col("weight") - 0.3)
        .when(long_)
        .then(pl.col("weight") + 0.3)
        .otherwise("weight")
    )
    # 19: never holds cash (its weight goes to bonds); a second policy set from month 12
    cash19 = (pl.col("portfolio_id") == "sim000019") & (pl.col("asset_class") == "cash")
    moved = h.filter(cash19).select("as_of", pl.col("weight").alias("moved"))
    h = (
        h.join(
            moved.with_columns(portfolio_id=pl.lit("sim000019")),
            on=["portfolio_id", "as_of"],
            how="left",
        )
        .with_columns(
            weight=pl.when(
                (pl.col("portfolio_id") == "sim000019")
                & (pl.col("asset_class") == "government_bonds")
            )
            .then(pl.col("weight") + pl.col("moved"))
            .otherwise("weight")
        )
        .drop("moved")
        .filter(~cash19)
    )
    second = p.filter(pl.col("portfolio_id") == "sim000019").with_columns(
        effective_from=pl.lit(starts[12])
    )
    p = pl.concat([p, second.with_columns(weight=pl.lit(0.25))])
    orphan = p.filter(pl.col("portfolio_id") == "sim000000").with_columns(
        portfolio_id=pl.lit("zz_orphan")
    )
    p = pl.concat([p, orphan])
    return {**t, "holdings": h, "policy": p, "segment_returns": s, "portfolio_returns": r}
