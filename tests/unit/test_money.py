"""Money terms and the plan view (attribution.money) checked against plain re-computations.

Reference formulas:
* value added of a period = value at the period's start × the period's return difference,
  summed over periods — Berk & van Binsbergen (2015), "Measuring skill in the mutual fund
  industry", J. Financial Economics 118 (from memory), applied to each effect;
* the plan's return of a period = Σ_i V_i R_i / Σ_i V_i, the value-weighted mean of its
  portfolios (the standard composite/aggregate return: common practice, no source);
* the plan's linked effects add up to its compounded active return (METHODS §2.4 linking).
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import polars as pl
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import attribution
from attribution.money import MONEY_COLUMNS, money_tables
from attribution.simulate import demo_tables
from attribution.summary import LINKED_EFFECTS

ATOL = 1e-12  # returns and effects
RTOL_MONEY = 1e-12  # amounts are sums of products of numbers around 1e8


@pytest.fixture(scope="module")
def demo() -> dict[str, pl.DataFrame]:
    return demo_tables()


@pytest.fixture(scope="module")
def demo_result(demo: dict[str, pl.DataFrame]) -> attribution.runner.RunResult:
    return attribution.run(**demo)


def _plain_value_at(values: pl.DataFrame, pid: str, start: dt.date) -> float | None:
    """The latest value of ``pid`` dated on or before ``start``, by a plain scan."""
    best = None
    for row in values.filter(pl.col("portfolio_id") == pid).iter_rows(named=True):
        if row["as_of"] <= start and (best is None or row["as_of"] > best[0]):
            best = (row["as_of"], row["value"])
    return None if best is None else best[1]


def test_money_equals_effects_times_values(demo, demo_result) -> None:
    money = demo_result.extra_tables["money"]
    series = demo_result.series
    values = demo["portfolio_values"]
    for pid in ["ambrisk_multiasset", "tibbrenn_capital", "wistrel_advisors"]:
        rows = series.filter(pl.col("portfolio_id") == pid).sort("period_end")
        expected = dict.fromkeys(("active_return", *LINKED_EFFECTS), 0.0)
        for row in rows.iter_rows(named=True):
            value = _plain_value_at(values, pid, row["period_start"])
            assert value is not None
            for name in expected:
                expected[name] += value * (row[name] or 0.0)
        got = money.filter(pl.col("portfolio_id") == pid).row(0, named=True)
        assert got["n_periods_valued"] == rows.height
        for name, amount in expected.items():
            key = f"{name.removesuffix('_return')}_money"
            if name == "interaction":  # Brinson–Fachler has no interaction: null, not 0
                assert got[key] is None
                continue
            assert got[key] == pytest.approx(amount, rel=RTOL_MONEY, abs=1e-6)


def test_money_effects_add_up_to_active_money(demo_result) -> None:
    money = demo_result.extra_tables["money"]
    parts = money.select(
        pl.sum_horizontal([f"{e}_money" for e in LINKED_EFFECTS]).alias("sum"), "active_money"
    )
    np.testing.assert_allclose(parts["sum"], parts["active_money"], rtol=RTOL_MONEY)


def test_plan_is_the_value_weighted_roster(demo, demo_result) -> None:
    plan = demo_result.extra_tables["plan"]
    series = demo_result.series
    values = demo["portfolio_values"]
    for period_end in [dt.date(2015, 1, 31), dt.date(2023, 9, 30), dt.date(2024, 12, 31)]:
        rows = series.filter(pl.col("period_end") == period_end)
        v = np.array(
            [
                _plain_value_at(values, r["portfolio_id"], r["period_start"])
                for r in rows.iter_rows(named=True)
            ]
        )
        got = plan.filter(pl.col("period_end") == period_end).row(0, named=True)
        assert got["n_portfolios"] == rows.height
        assert got["plan_value_start"] == pytest.approx(v.sum(), rel=RTOL_MONEY)
        for name in ("portfolio_return", "policy_return", "timing", "selection"):
            expected = float((v * rows[name].to_numpy()).sum() / v.sum())
            assert got[name] == pytest.approx(expected, abs=ATOL)
        assert got["timing_money"] == pytest.approx(
            float((v * rows["timing"].to_numpy()).sum()), rel=RTOL_MONEY
        )


def test_plan_total_compounds_links_and_sums(demo_result) -> None:
    plan = demo_result.extra_tables["plan"]
    total = demo_result.extra_tables["plan_total"].row(0, named=True)
    r = np.prod(1.0 + plan["portfolio_return"].to_numpy()) - 1.0
    b = np.prod(1.0 + plan["policy_return"].to_numpy()) - 1.0
    assert total["portfolio_return"] == pytest.approx(r, abs=ATOL)
    assert total["policy_return"] == pytest.approx(b, abs=ATOL)
    linked = sum(total[e] for e in LINKED_EFFECTS if total[e] is not None)
    assert linked == pytest.approx(r - b, abs=ATOL)
    money = demo_result.extra_tables["money"]
    for name in MONEY_COLUMNS:
        if name == "interaction_money":
            assert total[name] is None
            continue
        assert total[name] == pytest.approx(money[name].sum(), rel=RTOL_MONEY)
        assert total[name] == pytest.approx(plan[name].sum(), rel=RTOL_MONEY)


def test_values_given_less_often_are_carried_forward(demo, demo_result) -> None:
    # Keep only year-end values (and each record's first): months in between use the
    # latest earlier value, so the amounts change but still equal value × effect.
    values = demo["portfolio_values"]
    sparse = values.filter(
        (pl.col("as_of").dt.month() == 12)
        | (pl.col("as_of") == pl.col("as_of").min().over("portfolio_id"))
    )
    found = money_tables(demo_result.series, sparse, linking="carino")
    row = demo_result.series.filter(
        (pl.col("portfolio_id") == "korvane_balanced")
        & (pl.col("period_end") == dt.date(2017, 6, 30))
    ).row(0, named=True)
    assert _plain_value_at(sparse, "korvane_balanced", row["period_start"]) == (
        values.filter(
            (pl.col("portfolio_id") == "korvane_balanced")
            & (pl.col("as_of") == dt.date(2016, 12, 31))
        )["value"].item()
    )
    assert found.issues.height == 0
    assert found.money.height == 8


def test_bad_values_become_warnings(demo_result) -> None:
    values = pl.DataFrame(
        {
            "portfolio_id": ["korvane_balanced"] * 3 + ["orvelle_partners"] * 2,
            "as_of": [
                dt.date(2014, 12, 31),
                dt.date(2014, 12, 31),
                dt.date(2015, 12, 31),
                dt.date(2016, 12, 31),
                dt.date(2017, 12, 31),
            ],
            "value": [1e8, 2e8, 3e8, -5.0, 4e8],
        }
    )
    found = money_tables(demo_result.series, values, linking="carino")
    codes = sorted(zip(found.issues["portfolio_id"], found.issues["code"], strict=True))
    assert ("korvane_balanced", "value_duplicate") in codes
    assert ("korvane_balanced", "value_missing") in codes  # 2015 months before the 2015-12-31 value
    assert ("orvelle_partners", "value_invalid") in codes
    assert ("orvelle_partners", "value_missing") in codes
    assert set(found.issues["severity"]) == {"warning"}
    korvane = found.money.filter(pl.col("portfolio_id") == "korvane_balanced").row(0, named=True)
    assert korvane["n_periods_valued"] == 120 - 12  # valued from 2016-01 on
    assert korvane["value_first"] == 3e8


@settings(max_examples=25, deadline=None)
@given(
    values=st.lists(
        st.floats(min_value=1e3, max_value=1e10, allow_nan=False), min_size=8, max_size=8
    ),
    period=st.integers(min_value=0, max_value=119),
)
def test_amounts_always_add_up(demo_result, values: list[float], period: int) -> None:
    series = demo_result.series
    ids = sorted(series["portfolio_id"].unique().to_list())
    start = sorted(series["period_start"].unique().to_list())[period]
    table = pl.DataFrame(
        {"portfolio_id": ids, "as_of": [start] * len(ids), "value": values},
        schema={"portfolio_id": pl.String, "as_of": pl.Date, "value": pl.Float64},
    )
    found = money_tables(series, table, linking="menchero")
    money = found.money
    total = money.select(pl.sum_horizontal([f"{e}_money" for e in LINKED_EFFECTS]))
    np.testing.assert_allclose(total.to_series(), money["active_money"], rtol=1e-10, atol=1e-6)
    plan = found.plan_total.row(0, named=True)
    linked = sum(plan[e] for e in LINKED_EFFECTS if plan[e] is not None)
    assert linked == pytest.approx(plan["active_return"], abs=ATOL)


def test_api_accepts_pandas_and_arrow_tables(demo, demo_result) -> None:
    as_pandas = {name: frame.to_pandas() for name, frame in demo.items()}
    as_arrow = {name: frame.to_arrow() for name, frame in demo.items()}
    for tables in (as_pandas, as_arrow):
        got = attribution.run(**tables)
        for name in ("summary", "money", "plan_total"):
            assert got.tables()[name].equals(demo_result.tables()[name]), name
