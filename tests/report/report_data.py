"""Test tables for the review-pack tests: a tiny roster run through the engine, plus timing tables.

Imported by the report tests as ``report_data`` (a unique module name). Everything here is
invented test data built with a seeded generator:

* ``tiny_inputs`` — three portfolios over 36 month ends of 2021-2023, three asset classes.
  One portfolio id is an HTML script element and one class name carries ``&`` and both
  kinds of quotes, so the tests can check that user strings are escaped everywhere; the
  third portfolio (an id with markup and an apostrophe) reports only the last 14 months.
* ``engine_tables`` — those inputs through :func:`attribution.runner.run_roster`: the real
  summary, summary_windows, series, effects and data_issues.
* ``with_timing`` — adds the timing tables of issue 3 (timing_tests, roster, power) and the
  extra series and summary columns, with values chosen to produce each verdict and each
  reading. Regression rows carry least-squares coefficients fitted here with numpy on the
  series they describe, so fitted lines and clouds belong together; p- and q-values are
  set by hand (they are presentation inputs here, not results under test).
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import polars as pl

from attribution.options import RunOptions
from attribution.runner import run_roster

XSS_ID = "<script>alert(1)</script>"
SHORT_ID = "brief & 'new' <b>fund</b>"
PORTFOLIOS = ("aster_fund", XSS_ID, SHORT_ID)
ODD_CLASS = "bonds & \"credit\" 'core'"
CLASSES = ("equity", ODD_CLASS, "cash")
POLICY = {"equity": 0.6, ODD_CLASS: 0.3, "cash": 0.1}
BETAS = {"equity": 1.0, ODD_CLASS: 0.2, "cash": 0.0}  # invented class betas
RISKLESS = 0.001
N_PERIODS = 36
SHORT_PERIODS = 14
SEED = 7_2024
TESTS = (
    "exposure_regression",
    "trade_regression",
    "portfolio_change",
    "merton_accuracy",
    "pesaran_timmermann",
    "timing_mean",
    "timing_placebo",
    "treynor_mazuy",
    "henriksson_merton",
    "jensen_alpha",
)


def month_ends(first: dt.date, n: int) -> list[dt.date]:
    """``n`` consecutive calendar month ends from the month of ``first``."""
    out = []
    year, month = first.year, first.month
    for _ in range(n):
        nxt = dt.date(year + (month == 12), month % 12 + 1, 1)
        out.append(nxt - dt.timedelta(days=1))
        year, month = nxt.year, nxt.month
    return out


PERIOD_ENDS = month_ends(dt.date(2021, 1, 1), N_PERIODS)
FIRST_START = dt.date(2020, 12, 31)


def tiny_inputs(seed: int = SEED) -> dict[str, pl.DataFrame]:
    """The input tables of the tiny roster (invented)."""
    rng = np.random.default_rng(seed)
    n = N_PERIODS
    index = {
        "equity": rng.normal(0.007, 0.04, n),
        ODD_CLASS: rng.normal(0.003, 0.01, n),
        "cash": np.full(n, RISKLESS),
    }
    index_rows = [(PERIOD_ENDS[t], c, float(index[c][t])) for t in range(n) for c in CLASSES]
    holdings, segments, policy = [], [], []
    dates = [FIRST_START, *PERIOD_ENDS[:-1]]
    for k, pid in enumerate(PORTFOLIOS):
        first = n - SHORT_PERIODS if pid == SHORT_ID else 0
        shift = np.clip(rng.normal(0.0, 0.06, n), -0.12, 0.12)
        for t in range(first, n):
            w = {"equity": 0.6 + shift[t], ODD_CLASS: 0.3 - shift[t] * 0.7}
            w["cash"] = 1.0 - w["equity"] - w[ODD_CLASS]
            for c in CLASSES:
                holdings.append((pid, dates[t], c, float(w[c])))
                noise = 0.0 if c == "cash" else rng.normal(0.0005 * k, 0.002)
                segments.append((pid, PERIOD_ENDS[t], c, float(index[c][t] + noise)))
        policy += [(pid, c, POLICY[c], FIRST_START) for c in CLASSES]
    date_schema = {
        "portfolio_id": pl.String,
        "as_of": pl.Date,
        "asset_class": pl.String,
        "weight": pl.Float64,
    }
    return {
        "holdings": pl.DataFrame(holdings, schema=date_schema, orient="row"),
        "index_returns": pl.DataFrame(
            index_rows,
            schema={"period_end": pl.Date, "asset_class": pl.String, "return": pl.Float64},
            orient="row",
        ),
        "policy": pl.DataFrame(
            policy,
            schema={
                "portfolio_id": pl.String,
                "asset_class": pl.String,
                "weight": pl.Float64,
                "effective_from": pl.Date,
            },
            orient="row",
        ),
        "riskfree": pl.DataFrame({"period_end": PERIOD_ENDS, "return": [RISKLESS] * n}),
        "segment_returns": pl.DataFrame(
            segments,
            schema={
                "portfolio_id": pl.String,
                "period_end": pl.Date,
                "asset_class": pl.String,
                "return": pl.Float64,
            },
            orient="row",
        ),
    }


CORE_TABLES = ("summary", "summary_windows", "series", "effects", "data_issues")


def engine_tables(seed: int = SEED) -> dict[str, pl.DataFrame]:
    """The tiny roster's decomposition tables, from the real engine (timing tables dropped,
    so the result is the same whether or not the engine already runs the timing tests)."""
    result = run_roster(tiny_inputs(seed), RunOptions.build(tests="none"))
    tables = result.tables()
    out = {name: tables[name] for name in CORE_TABLES}
    drop = [
        c for c in ("timing_evidence", "returns_holdings_disagree") if c in out["summary"].columns
    ]
    out["summary"] = out["summary"].drop(drop)
    keep = [c for c in out["series"].columns if c not in SERIES_EXTRA]
    out["series"] = out["series"].select(keep)
    return out


SERIES_EXTRA = (
    "riskless_return",
    "market_return",
    "market_excess_return",
    "exposure",
    "static_exposure",
    "trade_exposure_change",
)
VERDICTS = {"aster_fund": "skill", XSS_ID: "adverse", SHORT_ID: "record_too_short"}
PERIODS_NEEDED = {"aster_fund": 150.0, XSS_ID: 150.0, SHORT_ID: 60.0}


def _lstsq(columns: list[np.ndarray], y: np.ndarray) -> np.ndarray:
    design = np.column_stack([np.ones_like(y), *columns])
    return np.linalg.lstsq(design, y, rcond=None)[0]


def with_timing(tables: dict[str, pl.DataFrame], seed: int = SEED) -> dict[str, pl.DataFrame]:
    """The tables plus timing_tests, roster, power and the timing columns of series/summary."""
    rng = np.random.default_rng([seed, 1])
    effects = tables["effects"].with_columns(
        pl.col("asset_class").replace_strict(BETAS, return_dtype=pl.Float64).alias("_beta")
    )
    exposure = effects.group_by("portfolio_id", "period_end").agg(
        (pl.col("weight") * pl.col("_beta")).sum().alias("exposure"),
        (pl.col("static_weight") * pl.col("_beta")).sum().alias("static_exposure"),
    )
    series = (
        tables["series"]
        .join(exposure, on=["portfolio_id", "period_end"], how="left")
        .sort("portfolio_id", "period_end")
        .with_columns(
            pl.lit(RISKLESS).alias("riskless_return"),
            pl.col("policy_return").alias("market_return"),
            (pl.col("policy_return") - RISKLESS).alias("market_excess_return"),
            pl.col("exposure").diff().over("portfolio_id").alias("trade_exposure_change"),
        )
    )
    rows = []
    for pid in PORTFOLIOS:
        part = series.filter(pl.col("portfolio_id") == pid)
        x = part["market_excess_return"].to_numpy()
        e = part["exposure"].to_numpy()
        ex = (part["portfolio_return"] - part["riskless_return"]).to_numpy()
        fits = {
            "exposure_regression": (_lstsq([x], e), 1),
            "treynor_mazuy": (_lstsq([x, x * x], ex), 2),
            "henriksson_merton": (_lstsq([x, np.maximum(x, 0.0)], ex), 2),
            "jensen_alpha": (_lstsq([x], ex), 0),
        }
        for test in TESTS:
            p = float(rng.uniform(0.2, 0.9))
            row = {
                "portfolio_id": pid,
                "test": test,
                "estimate": float(rng.normal(0.0, 0.01)),
                "std_error": float(rng.uniform(0.005, 0.02)),
                "statistic": None,
                "p_value": p,
                "p_value_adverse": 1.0 - p,
                "q_value": min(1.0, p * 1.2),
                "q_value_adverse": min(1.0, (1.0 - p) * 1.2),
                "p_method": "hac_newey_west",
                "n_obs": part.height,
                "ci_low": None,
                "ci_high": None,
                "alpha": None,
                "beta": None,
            }
            if test in fits:
                coef, which = fits[test]
                row["estimate"] = float(coef[which])
                row["alpha"] = float(coef[0])
                if test in ("treynor_mazuy", "henriksson_merton"):
                    row["beta"] = float(coef[1])
            row["statistic"] = row["estimate"] / row["std_error"]
            if pid == "aster_fund" and test == "exposure_regression":
                row.update(
                    p_value=0.0004, q_value=0.0012, p_value_adverse=0.9996, q_value_adverse=0.9996
                )
            if pid == XSS_ID and test == "merton_accuracy":
                row.update(
                    p_value=0.995,
                    q_value=0.995,
                    p_value_adverse=0.005,
                    q_value_adverse=0.015,
                    p_method="exact_hypergeometric",
                )
            if pid == SHORT_ID and test == "pesaran_timmermann":
                row.update(
                    estimate=None,
                    std_error=None,
                    statistic=None,
                    p_value=None,
                    q_value=None,
                    p_value_adverse=None,
                    q_value_adverse=None,
                )
            rows.append(row)
    timing = pl.DataFrame(
        rows,
        schema={
            "portfolio_id": pl.String,
            "test": pl.String,
            "estimate": pl.Float64,
            "std_error": pl.Float64,
            "statistic": pl.Float64,
            "p_value": pl.Float64,
            "p_value_adverse": pl.Float64,
            "q_value": pl.Float64,
            "q_value_adverse": pl.Float64,
            "p_method": pl.String,
            "n_obs": pl.Int64,
            "ci_low": pl.Float64,
            "ci_high": pl.Float64,
            "alpha": pl.Float64,
            "beta": pl.Float64,
        },
        orient="row",
    )
    roster = (
        timing.group_by("test")
        .agg(
            pl.len().alias("n_portfolios"),
            (pl.col("q_value") < 0.05).sum().alias("n_skill_q05"),
            (pl.col("q_value_adverse") < 0.05).sum().alias("n_adverse_q05"),
            pl.lit(0.6667).alias("pi0"),
        )
        .sort("test")
    )
    power = pl.DataFrame(
        {
            "portfolio_id": list(PORTFOLIOS),
            "periods_needed": [PERIODS_NEEDED[p] for p in PORTFOLIOS],
            "detectable_hit_rate": [0.68, 0.68, 0.79],
            "detectable_correlation": [0.31, 0.31, 0.52],
            "detectable_timing_return_ann": [0.021, 0.021, 0.044],
        }
    )
    summary = tables["summary"].with_columns(
        pl.col("portfolio_id").replace_strict(VERDICTS).alias("timing_evidence"),
        (pl.col("portfolio_id") == "aster_fund").alias("returns_holdings_disagree"),
    )
    return {
        **tables,
        "summary": summary,
        "series": series,
        "timing_tests": timing,
        "roster": roster,
        "power": power,
    }
