"""Comparison implementation for the benchmark: pandas + per-portfolio statsmodels.

Not part of the package and not a test. It is what a competent analyst would write without
tiltaudit — pandas merges and groupbys for the decomposition and linking, and a Python loop
over portfolios fitting statsmodels OLS with Newey–West errors — so that
``benchmarks/bench_run.py`` can time it beside ``tiltaudit run`` on the same files. It is
deliberately neither slowed down nor tuned.

What it computes, for a roster written by ``tiltaudit simulate`` (DESIGN §3, METHODS §1.2, §2.1,
§5.1, §5.2, §8.1):

* per portfolio p, period t, class i, with w the weight held over t (holdings ``as_of`` the
  period's start), q the policy weight in force at the period's start, s the portfolio's mean
  weight per class over its record (static weight), b the index return, r the segment return,
  B_t = Σ_i q·b the policy return, R_t = Σ_i w·r the portfolio return (Brinson–Fachler form,
  interaction folded into selection; Brinson & Fachler 1985):
  static allocation (s − q)(b − B_t), timing (w − s)(b − B_t), selection w (r − b);
* Carino (1999) logarithmic linking over each portfolio's record:
  k_t = [ln(1+R_t) − ln(1+B_t)] / (R_t − B_t) (1/(1+R_t) when R_t = B_t), k the same on the
  cumulative returns, linked effect E = Σ_t (k_t / k) e_t, so Σ E = Π(1+R_t) − Π(1+B_t);
* per portfolio, with y_t = R_t − rf_t and the market excess x_t = B_t − rf_t (market = the
  portfolio's policy return), two OLS regressions with Newey–West HAC errors (Bartlett kernel,
  lag ⌊4 (T/100)^(2/9)⌋, no small-sample correction; Newey & West 1987, METHODS §8.1):
  Treynor & Mazuy (1966) y = α + βx + γx² + ε, and Henriksson & Merton (1981)
  y = α + βx + γ max(0, −x) + ε; one-sided p-value for γ > 0 from the normal law (``norm.sf``).

Assumptions, all true of ``tiltaudit simulate`` output: monthly period ends; holdings every
period for every class (dense, so no drift and no densifying); every policy set lists every
class; segment returns for every held class. Nothing is validated.

Writes ``effects.parquet``, ``summary.parquet`` and ``regressions.parquet`` into ``--out``.
With ``--compare DIR`` (a ``tiltaudit run --tests exact`` output folder on the same roster) it
then prints, as one JSON line, the largest differences to tiltaudit's ``summary``, ``effects``
and ``timing_tests`` — a sanity check of the numbers, not a test.

Usage::

    python benchmarks/pandas_baseline.py --roster ROSTER_DIR --out OUT_DIR [--compare RUN_DIR]
"""

from __future__ import annotations

import argparse
import json
import math
from pathlib import Path

import numpy as np
import pandas as pd
import statsmodels.api as sm
from scipy import stats

EFFECTS = ("static_allocation", "timing", "selection")


def load(roster: Path) -> dict[str, pd.DataFrame]:
    """Read the roster's Parquet tables; dates become datetime64 so merges are fast."""
    tables = {}
    for name in ("holdings", "index_returns", "policy", "segment_returns", "riskfree"):
        frame = pd.read_parquet(roster / f"{name}.parquet")
        for col in ("as_of", "period_end", "effective_from"):
            if col in frame:
                frame[col] = pd.to_datetime(frame[col])
        tables[name] = frame
    return tables


def calendar(index_returns: pd.DataFrame) -> pd.DataFrame:
    """Periods (period_start, period_end): period t runs from period_end[t-1] to period_end[t];
    the first starts one month end before the first period_end (DESIGN §2, monthly calendar)."""
    ends = pd.Series(np.sort(index_returns["period_end"].unique()), name="period_end")
    starts = ends.shift(1)
    starts.iloc[0] = ends.iloc[0] - pd.offsets.MonthEnd(1)
    return pd.DataFrame({"period_start": starts, "period_end": ends})


def decompose(tables: dict[str, pd.DataFrame]) -> pd.DataFrame:
    """Per portfolio × period × class Brinson–Fachler effects with a static weight.

    static allocation (s − q)(b − B_t), timing (w − s)(b − B_t), selection w (r − b), with s
    the portfolio's mean weight per class over its record and B_t = Σ q·b (DESIGN §3).
    """
    cal = calendar(tables["index_returns"])
    held = tables["holdings"].merge(cal, left_on="as_of", right_on="period_start")
    held = held.drop(columns=["as_of"])
    held = held.merge(
        tables["index_returns"].rename(columns={"return": "index_return"}),
        on=["period_end", "asset_class"],
    )
    held = held.merge(
        tables["segment_returns"].rename(columns={"return": "segment_return"}),
        on=["portfolio_id", "period_end", "asset_class"],
        how="left",
    )
    # The policy set in force at the period's start: the last one effective on or before it.
    policy = tables["policy"].rename(columns={"weight": "policy_weight"})
    held = pd.merge_asof(
        held.sort_values("period_start"),
        policy.sort_values("effective_from"),
        left_on="period_start",
        right_on="effective_from",
        by=["portfolio_id", "asset_class"],
    ).drop(columns=["effective_from"])
    held = held.sort_values(["portfolio_id", "period_end", "asset_class"], ignore_index=True)

    held["policy_contribution"] = held["policy_weight"] * held["index_return"]
    held["policy_return"] = held.groupby(["portfolio_id", "period_end"])[
        "policy_contribution"
    ].transform("sum")
    held["static_weight"] = held.groupby(["portfolio_id", "asset_class"])["weight"].transform(
        "mean"
    )
    relative = held["index_return"] - held["policy_return"]
    held["static_allocation"] = (held["static_weight"] - held["policy_weight"]) * relative
    held["timing"] = (held["weight"] - held["static_weight"]) * relative
    held["selection"] = held["weight"] * (held["segment_return"] - held["index_return"])
    held["contribution"] = held["weight"] * held["segment_return"]
    return held.drop(columns=["policy_contribution", "period_start"])


def per_period(effects: pd.DataFrame, riskfree: pd.DataFrame) -> pd.DataFrame:
    """Per portfolio × period: portfolio return R_t = Σ w·r, policy return B_t, summed effects,
    and the riskless return rf_t."""
    periods = (
        effects.groupby(["portfolio_id", "period_end"])
        .agg(
            portfolio_return=("contribution", "sum"),
            policy_return=("policy_return", "first"),
            static_allocation=("static_allocation", "sum"),
            timing=("timing", "sum"),
            selection=("selection", "sum"),
        )
        .reset_index()
    )
    rf = riskfree.rename(columns={"return": "riskless_return"})
    return periods.merge(rf, on="period_end", how="left")


def carino_factor(r: pd.Series | np.ndarray, b: pd.Series | np.ndarray) -> np.ndarray:
    """Carino (1999): k = [ln(1+R) − ln(1+B)] / (R − B), and 1/(1+R) where R = B."""
    r = np.asarray(r, dtype=float)
    b = np.asarray(b, dtype=float)
    diff = r - b
    same = diff == 0.0
    with np.errstate(divide="ignore", invalid="ignore"):
        k = (np.log1p(r) - np.log1p(b)) / np.where(same, 1.0, diff)
    return np.where(same, 1.0 / (1.0 + r), k)


def link(periods: pd.DataFrame) -> pd.DataFrame:
    """Carino-linked effects per portfolio: E = Σ_t (k_t / k) e_t, with cumulative returns
    Π(1+R_t) − 1 and Π(1+B_t) − 1 and their difference, the active return."""
    periods = periods.copy()
    periods["growth_r"] = 1.0 + periods["portfolio_return"]
    periods["growth_b"] = 1.0 + periods["policy_return"]
    totals = periods.groupby("portfolio_id").agg(
        growth_r=("growth_r", "prod"),
        growth_b=("growth_b", "prod"),
        n_periods=("period_end", "size"),
    )
    totals["portfolio_return"] = totals["growth_r"] - 1.0
    totals["policy_return"] = totals["growth_b"] - 1.0
    totals["active_return"] = totals["portfolio_return"] - totals["policy_return"]
    totals["k"] = carino_factor(totals["portfolio_return"], totals["policy_return"])
    periods["k_t"] = carino_factor(periods["portfolio_return"], periods["policy_return"])
    periods = periods.merge(totals[["k"]], left_on="portfolio_id", right_index=True)
    scale = periods["k_t"] / periods["k"]
    for name in EFFECTS:
        periods[name] = periods[name] * scale
    linked = periods.groupby("portfolio_id")[list(EFFECTS)].sum()
    summary = totals[["n_periods", "portfolio_return", "policy_return", "active_return"]]
    return summary.join(linked).reset_index()


def newey_west_lag(n_obs: int) -> int:
    """Bartlett truncation lag ⌊4 (T/100)^(2/9)⌋ (METHODS §8.1, common rule of thumb)."""
    return math.floor(4.0 * (n_obs / 100.0) ** (2.0 / 9.0))


def regressions(periods: pd.DataFrame) -> pd.DataFrame:
    """Treynor–Mazuy and Henriksson–Merton per portfolio, statsmodels OLS with HAC errors.

    y = R_t − rf_t, x = B_t − rf_t; TM extra regressor x², HM extra regressor max(0, −x);
    γ is the extra regressor's coefficient, p_value = P(Z > γ/se) (one-sided for timing skill).
    """
    rows = []
    for portfolio_id, group in periods.groupby("portfolio_id", sort=True):
        y = (group["portfolio_return"] - group["riskless_return"]).to_numpy()
        x = (group["policy_return"] - group["riskless_return"]).to_numpy()
        lag = newey_west_lag(len(y))
        for test, extra in (("treynor_mazuy", x * x), ("henriksson_merton", np.maximum(0.0, -x))):
            design = sm.add_constant(np.column_stack([x, extra]), has_constant="add")
            fit = sm.OLS(y, design).fit(
                cov_type="HAC", cov_kwds={"maxlags": lag, "use_correction": False}
            )
            rows.append(
                {
                    "portfolio_id": portfolio_id,
                    "test": test,
                    "alpha": fit.params[0],
                    "beta": fit.params[1],
                    "gamma": fit.params[2],
                    "std_error": fit.bse[2],
                    "statistic": fit.tvalues[2],
                    "p_value": stats.norm.sf(fit.tvalues[2]),
                    "n_obs": int(fit.nobs),
                }
            )
    return pd.DataFrame(rows)


def compare(out: Path, run_dir: Path) -> dict[str, float]:
    """Largest absolute differences to a ``tiltaudit run --tests exact`` folder (sanity only).

    Definitions match for every figure compared: Carino-linked totals and effects, per-row
    effects, and the regressions' γ, its Newey–West error and α (HM's α and γ are the same
    whether the extra regressor is max(0, −x) or max(x, 0), since max(x, 0) = x + max(0, −x)).
    """
    ours = pd.read_parquet(out / "summary.parquet")
    theirs = pd.read_parquet(run_dir / "summary.parquet")
    both = ours.merge(theirs, on="portfolio_id", suffixes=("", "_engine"))
    result: dict[str, float] = {
        "portfolios_compared": float(len(both)),
        "portfolios_engine": float(len(theirs)),
    }
    for col in ("portfolio_return", "policy_return", "active_return", *EFFECTS):
        result[f"summary_{col}"] = float((both[col] - both[f"{col}_engine"]).abs().max())
    result["sum_of_linked_effects_vs_engine_active_return"] = float(
        (both[list(EFFECTS)].sum(axis=1) - both["active_return_engine"]).abs().max()
    )

    keys = ["portfolio_id", "period_end", "asset_class"]
    cols = [*keys, "static_weight", "policy_weight", *EFFECTS]
    mine = pd.read_parquet(out / "effects.parquet", columns=cols)
    engine = pd.read_parquet(run_dir / "effects.parquet", columns=cols)
    engine["period_end"] = pd.to_datetime(engine["period_end"])
    rows = mine.merge(engine, on=keys, suffixes=("", "_engine"))
    result["effects_rows_compared"] = float(len(rows))
    for col in ("static_weight", "policy_weight", *EFFECTS):
        result[f"effects_{col}"] = float((rows[col] - rows[f"{col}_engine"]).abs().max())

    regs = pd.read_parquet(out / "regressions.parquet")
    tests = pd.read_parquet(run_dir / "timing_tests.parquet")
    tests = tests[tests["test"].isin(["treynor_mazuy", "henriksson_merton"])]
    reg = regs.merge(tests, on=["portfolio_id", "test"], suffixes=("", "_engine"))
    result["regression_rows_compared"] = float(len(reg))
    result["regression_gamma"] = float((reg["gamma"] - reg["estimate"]).abs().max())
    result["regression_std_error"] = float((reg["std_error"] - reg["std_error_engine"]).abs().max())
    result["regression_alpha"] = float((reg["alpha"] - reg["alpha_engine"]).abs().max())
    return result


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--roster", type=Path, required=True, help="tiltaudit simulate folder")
    parser.add_argument("--out", type=Path, required=True, help="folder for the Parquet outputs")
    parser.add_argument("--compare", type=Path, default=None, help="tiltaudit run output folder")
    args = parser.parse_args()

    tables = load(args.roster)
    effects = decompose(tables)
    periods = per_period(effects, tables["riskfree"])
    summary = link(periods)
    regs = regressions(periods)

    args.out.mkdir(parents=True, exist_ok=True)
    effects.drop(columns=["contribution"]).to_parquet(args.out / "effects.parquet", index=False)
    summary.to_parquet(args.out / "summary.parquet", index=False)
    regs.to_parquet(args.out / "regressions.parquet", index=False)
    if args.compare is not None:
        print(json.dumps(compare(args.out, args.compare)))


if __name__ == "__main__":
    main()
