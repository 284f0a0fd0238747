"""Money terms and the plan view: effects in currency, and the roster rolled up by value.

Given a ``portfolio_values`` table (portfolio_id, as_of, value — the portfolio's value in the
plan's currency at that date), every per-period effect of a portfolio becomes an amount:

    money_{e,t} = V_{t-1} · e_t

with V_{t-1} the value at the start of period t (the latest value with ``as_of`` on or before
the period's start, so a value given at each month end serves the following month; values
given less often are carried forward). This is the dollar value added of Berk & van
Binsbergen (2015, "Measuring skill in the mutual fund industry", J. Financial Economics 118,
eq. for S_i = Σ_t q_{i,t−1} R^a_{it}) [from memory], applied to each effect: because the
effects of a period add up to its active return, the amounts of a period add up to
V_{t-1}·(R_t − B_t), and over a record the amounts add up (no linking is needed for sums of
money; amounts earned early are not grown to the end of the record).

The plan view weights the roster by value, period by period, over the portfolios valued in
that period:

    R^plan_t = Σ_i V_{i,t-1} R_{i,t} / Σ_i V_{i,t-1}   (and the same for B_t and every effect)

and links the plan's per-period effects over the plan's periods with the run's linking
method (:func:`attribution.linking.link_arrays`), so the linked plan effects add up to the
plan's compounded active return. A portfolio counts in the periods it is valued in only.

Outputs: ``money`` (one row per portfolio: amounts over its valued periods), ``plan`` (one
row per period: value-weighted returns and effects, summed amounts) and ``plan_total`` (one
row: the plan's record compounded and linked, with the summed amounts).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import polars as pl

from attribution._typing import Linking
from attribution.linking import link_arrays
from attribution.summary import LINKED_EFFECTS
from attribution.validate import empty_issues, issue_rows

PID = "portfolio_id"
#: The per-period figures turned into money, in output order.
MONEY_FIGURES = ("active_return", *LINKED_EFFECTS)
MONEY_COLUMNS = tuple(f"{name.removesuffix('_return')}_money" for name in MONEY_FIGURES)
PLAN_RETURNS = ("portfolio_return", "policy_return", "active_return")
#: The columns of ``series`` the money tables read.
MONEY_INPUT_COLUMNS = (PID, "period_end", "period_start", *PLAN_RETURNS, *LINKED_EFFECTS)


@dataclass(frozen=True)
class MoneyTables:
    """The three money tables and the data issues found in ``portfolio_values``."""

    money: pl.DataFrame
    plan: pl.DataFrame
    plan_total: pl.DataFrame
    issues: pl.DataFrame

    def tables(self) -> dict[str, pl.DataFrame]:
        """The tables by their output names."""
        return {"money": self.money, "plan": self.plan, "plan_total": self.plan_total}


def _money_name(figure: str) -> str:
    return f"{figure.removesuffix('_return')}_money"


def clean_values(values: pl.DataFrame) -> tuple[pl.DataFrame, pl.DataFrame]:
    """Drop unusable rows of ``portfolio_values``; return (clean rows, their issues).

    A value that is empty, not finite or not positive is ignored (``value_invalid``); a
    portfolio and date given twice is ignored in both rows (``value_duplicate``), since
    neither can be preferred.
    """
    bad = values.filter(
        pl.col("as_of").is_null()
        | pl.col("value").is_null()
        | ~pl.col("value").is_finite()
        | (pl.col("value") <= 0)
    )
    usable = values.filter(
        pl.col("as_of").is_not_null() & pl.col("value").is_finite() & (pl.col("value") > 0)
    )
    twice = pl.struct(PID, "as_of").is_duplicated()
    dupes = usable.filter(twice)
    clean = usable.filter(~twice).sort(PID, "as_of")
    issues = pl.concat(
        [
            issue_rows(
                bad,
                code="value_invalid",
                period="as_of",
                message=pl.format(
                    "portfolio_values: portfolio {} has value {} as of {}; expected a positive "
                    "amount. The row is ignored.",
                    PID,
                    pl.col("value").cast(pl.String).fill_null("empty"),
                    pl.col("as_of").cast(pl.String).fill_null("an empty date"),
                ),
            ),
            issue_rows(
                dupes.unique([PID, "as_of"], keep="first", maintain_order=True),
                code="value_duplicate",
                period="as_of",
                message=pl.format(
                    "portfolio_values: portfolio {} has more than one value as of {}; expected "
                    "one. Those rows are ignored.",
                    PID,
                    pl.col("as_of").cast(pl.String),
                ),
            ),
        ]
    )
    return clean, issues


def value_at_period_start(series: pl.DataFrame, values: pl.DataFrame) -> pl.DataFrame:
    """Add ``value_start``: the latest value with as_of ≤ period_start (null if none)."""
    left = series.with_row_index("_row").sort(PID, "period_start")
    joined = left.join_asof(
        values.select(PID, pl.col("as_of").alias("period_start"), pl.col("value")),
        on="period_start",
        by=PID,
        strategy="backward",
        check_sortedness=False,
    )
    return joined.sort("_row").drop("_row").rename({"value": "value_start"})


def money_tables(series: pl.DataFrame, values: pl.DataFrame, *, linking: Linking) -> MoneyTables:
    """The money, plan and plan_total tables (module docstring) from the run's ``series``.

    ``series`` is the engine's portfolio × period table (period_start, the three returns and
    the per-period effects); ``values`` is the coerced ``portfolio_values`` table.
    """
    clean, issues = clean_values(values)
    valued = value_at_period_start(series, clean)
    missing = (
        valued.filter(pl.col("value_start").is_null())
        .group_by(PID, maintain_order=True)
        .agg(pl.len().alias("n"), pl.col("period_end").min().alias("first"))
    )
    issues = pl.concat(
        [
            issues,
            issue_rows(
                missing,
                code="value_missing",
                period="first",
                message=pl.format(
                    "portfolio_values: portfolio {} has no value on or before the start of {} "
                    "period(s) of its record (the first ends {}); expected a value as of each "
                    "period's start or earlier. No money figures for those periods.",
                    PID,
                    "n",
                    pl.col("first").cast(pl.String),
                ),
            ),
        ]
    )
    rows = valued.filter(pl.col("value_start").is_not_null())
    amounts = [(pl.col("value_start") * pl.col(f)).alias(_money_name(f)) for f in MONEY_FIGURES]
    rows = rows.with_columns(amounts)
    money = (
        rows.group_by(PID, maintain_order=True)
        .agg(
            pl.len().alias("n_periods_valued"),
            pl.col("period_end").min().alias("first_period"),
            pl.col("period_end").max().alias("last_period"),
            pl.col("value_start").first().alias("value_first"),
            pl.col("value_start").last().alias("value_last"),
            *(_sum_keep_null(_money_name(f)) for f in MONEY_FIGURES),
        )
        .sort(PID)
    )
    plan = _plan_periods(rows)
    return MoneyTables(
        money=money,
        plan=plan,
        plan_total=_plan_total(plan, linking),
        issues=issues if issues.height else empty_issues(),
    )


def _sum_keep_null(name: str) -> pl.Expr:
    # interaction is null throughout under Brinson–Fachler and selection may be null in a
    # period without segment returns: a sum over nothing but nulls stays null, not 0.
    return pl.when(pl.col(name).is_not_null().any()).then(pl.col(name).sum()).alias(name)


def _plan_periods(rows: pl.DataFrame) -> pl.DataFrame:
    """Value-weighted returns and effects per period, and the summed amounts."""
    weighted = [
        (pl.col("value_start") * pl.col(name)).sum() / pl.col("value_start").sum()
        for name in ("portfolio_return", "policy_return")
    ]
    effect_weighted = [
        pl.when(pl.col(name).is_not_null().any())
        .then((pl.col("value_start") * pl.col(name)).sum() / pl.col("value_start").sum())
        .alias(name)
        for name in LINKED_EFFECTS
    ]
    plan = (
        rows.group_by("period_end")
        .agg(
            pl.col("period_start").first(),
            pl.len().alias("n_portfolios"),
            pl.col("value_start").sum().alias("plan_value_start"),
            weighted[0].alias("portfolio_return"),
            weighted[1].alias("policy_return"),
            *effect_weighted,
            *(_sum_keep_null(_money_name(f)) for f in MONEY_FIGURES),
        )
        .sort("period_end")
        .with_columns(active_return=pl.col("portfolio_return") - pl.col("policy_return"))
    )
    order = ["period_end", "period_start", "n_portfolios", "plan_value_start"]
    order += [*PLAN_RETURNS, *LINKED_EFFECTS, *MONEY_COLUMNS]
    return plan.select(order)


def _plan_total(plan: pl.DataFrame, linking: Linking) -> pl.DataFrame:
    """The plan's record: compounded returns, effects linked with ``linking``, amounts."""
    schema = {
        "first_period": pl.Date(),
        "last_period": pl.Date(),
        "n_periods": pl.Int64(),
        "plan_value_first": pl.Float64(),
        **{name: pl.Float64() for name in (*PLAN_RETURNS, *LINKED_EFFECTS, *MONEY_COLUMNS)},
    }
    if plan.height == 0:
        return pl.DataFrame(schema=schema)
    r = plan["portfolio_return"].to_numpy()[None, :]
    b = plan["policy_return"].to_numpy()[None, :]
    present = [plan[name].is_not_null().any() for name in LINKED_EFFECTS]
    e = np.stack([plan[name].fill_null(0.0).to_numpy() for name in LINKED_EFFECTS], axis=-1)
    linked, rc, bc = link_arrays(r, b, e[None], np.ones_like(r, dtype=bool), linking)
    row: dict[str, object] = {
        "first_period": plan["period_end"][0],
        "last_period": plan["period_end"][-1],
        "n_periods": plan.height,
        "plan_value_first": plan["plan_value_start"][0],
        "portfolio_return": float(rc[0, -1]),
        "policy_return": float(bc[0, -1]),
        "active_return": float(rc[0, -1] - bc[0, -1]),
    }
    for j, name in enumerate(LINKED_EFFECTS):
        row[name] = float(linked[0, -1, j]) if present[j] else None
    for name in MONEY_COLUMNS:
        row[name] = plan[name].sum() if plan[name].is_not_null().any() else None
    return pl.DataFrame([row], schema=schema)
