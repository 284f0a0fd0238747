"""Size and power of the timing tests on real market data (issue 3).

Data: the monthly Fama–French factors shipped with ``arch`` (``arch.data.frenchdata``,
1926-07 … 2018-11, 1,109 months). Two asset classes: equity = Mkt-RF + RF and cash = RF; policy
60 % equity / 40 % cash; the market is the policy benchmark (the default), so the market excess
return is 0.6 (Mkt-RF). Every timer is a two-asset portfolio holding 50 % or 70 % equity each
month, decided at the start of the month; the static weight is its mean weight.

* Coin-flippers choose 50 % or 70 % with probability 1/2, independently of everything. No test
  may call them skilled or adverse more often than the nominal 5 %: each test's rejection rate,
  on each side, must lie in the 99 % binomial band around 5 % for the number of timers (band:
  ``scipy.stats.binom.ppf(0.005 / 0.995, n, 0.05) / n``, common practice, no source).
* The control shows the band can fail: textbook Treynor–Mazuy with Newey–West errors
  (``tests='exact'``, where that is the method) rejects far more often (the issue measured about
  15 %).
* Persistent coin-flippers (the tilt switches with probability 0.1 a month, so it lasts ten
  months on average, as real tilts do) must stay in the band for the tests built to allow for
  persistence: the placebo-calibrated regressions, the timing placebo, and the Newey–West
  means. (The exact hypergeometric test, Pesaran–Timmermann and the returns-based regressions
  assume serially independent calls or betas; with persistent tilts they reject about 7–9 %
  of these timers on this data — measured and reported, not asserted.)
* Timers right 60 % of the time (they hold 70 % when the month's market excess will be positive
  with probability 0.6, else 50 %): the primary tests must detect at least 90 % of them.

Resampling draws are shared by all portfolios of one run (one index matrix and one sign matrix
per run, by design, for speed). Within one run the timers' rejections are therefore not
independent: the Monte-Carlo error of the shared draws moves every timer's p-value together, and
the binomial band, which assumes independent trials, would be too narrow. The coin-flippers are
therefore evaluated in ``BATCHES`` runs with different seeds; a Monte-Carlo test's size is
exact over data and draws together (Davison & Hinkley 1997, §4.2.5 [from memory]).
"""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest
from scipy.stats import binom
from timing_frames import (
    coin_flip_weights,
    french_market,
    hit_rate_weights,
    roster_frames,
    sticky_coin_weights,
    two_asset,
)

from attribution.timing import TEST_CODES, TimingOptions, evaluate_timing

pytestmark = pytest.mark.slow

N_COIN = 2000
BATCHES = 20
N_SKILLED = 500
N_STICKY = 2000
STICKY_BATCHES = 10
PERSISTENCE_ROBUST = (
    "exposure_regression",
    "trade_regression",
    "portfolio_change",
    "timing_mean",
    "timing_placebo",
)
LEVEL = 0.05
LOW, HIGH = 0.5, 0.7
POLICY = np.array([0.4, 0.6])  # (cash, equity), classes in sorted order
DRAWS = 999
BASE_SEED = 7_000


def _band(n: int) -> tuple[float, float]:
    """99 % binomial band of the rejection rate of n independent 5 %-level tests."""
    return binom.ppf(0.005, n, LEVEL) / n, binom.ppf(0.995, n, LEVEL) / n


def _run(weights: np.ndarray, seed: int, tests: str) -> pl.DataFrame:
    dates, equity, rf = french_market()
    frames = roster_frames(
        dates, ["cash", "equity"], np.stack([rf, equity], axis=-1), rf, two_asset(weights), POLICY
    )
    result = evaluate_timing(
        frames["effects"],
        frames["series"],
        frames["index_returns"],
        frames["riskless"],
        options=TimingOptions(tests=tests, draws=DRAWS, seed=seed),  # type: ignore[arg-type]
    )
    return result.timing_tests


def _rates(tests: pl.DataFrame) -> pl.DataFrame:
    return tests.group_by("test").agg(
        pl.len().alias("n"),
        (pl.col("p_value") <= LEVEL).mean().alias("skill"),
        (pl.col("p_value_adverse") <= LEVEL).mean().alias("adverse"),
        pl.col("p_method").first(),
    )


@pytest.fixture(scope="module")
def coin_flippers() -> dict[str, pl.DataFrame]:
    rng = np.random.default_rng(BASE_SEED)
    _, equity, _ = french_market()
    per_batch = N_COIN // BATCHES
    all_runs, exact_runs = [], []
    for batch in range(BATCHES):
        w = coin_flip_weights(rng, per_batch, equity.size, low=LOW, high=HIGH)
        tests = _run(w, BASE_SEED + batch, "all")
        all_runs.append(tests.with_columns(pl.col("portfolio_id") + f"-{batch}"))
        if batch < 4:
            # The Newey–West control is closed-form (no shared draws): one run per batch is
            # independent anyway; four batches give 400 timers, plenty to show the failure.
            exact_runs.append(_run(w, BASE_SEED + batch, "exact"))
    return {"all": pl.concat(all_runs), "exact": pl.concat(exact_runs)}


@pytest.fixture(scope="module")
def sticky_flippers() -> pl.DataFrame:
    rng = np.random.default_rng(BASE_SEED + 2)
    _, equity, _ = french_market()
    per_batch = N_STICKY // STICKY_BATCHES
    runs = []
    for batch in range(STICKY_BATCHES):
        w = sticky_coin_weights(rng, per_batch, equity.size, low=LOW, high=HIGH, switch=0.1)
        tests = _run(w, BASE_SEED + 500 + batch, "all")
        runs.append(tests.with_columns(pl.col("portfolio_id") + f"-{batch}"))
    return pl.concat(runs)


@pytest.fixture(scope="module")
def skilled_timers() -> pl.DataFrame:
    rng = np.random.default_rng(BASE_SEED + 1)
    _, equity, rf = french_market()
    market_up = 0.6 * (equity - rf) > 0
    w = hit_rate_weights(rng, market_up, N_SKILLED, hit_rate=0.6, low=LOW, high=HIGH)
    return _run(w, BASE_SEED + 99, "all")


@pytest.mark.parametrize("test", TEST_CODES)
def test_coin_flippers_are_rejected_at_the_nominal_rate(
    coin_flippers: dict[str, pl.DataFrame], test: str
) -> None:
    rates = _rates(coin_flippers["all"]).filter(pl.col("test") == test).row(0, named=True)
    lo, hi = _band(int(rates["n"]))
    assert rates["n"] == N_COIN
    assert lo <= rates["skill"] <= hi, f"{test} skill-side rate {rates['skill']:.4f}"
    assert lo <= rates["adverse"] <= hi, f"{test} adverse-side rate {rates['adverse']:.4f}"


@pytest.mark.parametrize("test", PERSISTENCE_ROBUST)
def test_persistent_coin_flippers_are_rejected_at_the_nominal_rate(
    sticky_flippers: pl.DataFrame, test: str
) -> None:
    rates = _rates(sticky_flippers).filter(pl.col("test") == test).row(0, named=True)
    lo, hi = _band(int(rates["n"]))
    assert rates["n"] == N_STICKY
    assert lo <= rates["skill"] <= hi, f"{test} skill-side rate {rates['skill']:.4f}"
    assert lo <= rates["adverse"] <= hi, f"{test} adverse-side rate {rates['adverse']:.4f}"


def test_textbook_treynor_mazuy_fails_the_band(coin_flippers: dict[str, pl.DataFrame]) -> None:
    """The control: Newey–West t-tests of the x² coefficient over-reject coin-flippers."""
    rates = _rates(coin_flippers["exact"]).filter(pl.col("test") == "treynor_mazuy")
    row = rates.row(0, named=True)
    assert row["p_method"] == "newey_west"
    _, hi = _band(int(row["n"]))
    assert row["skill"] > hi
    assert row["adverse"] > hi


@pytest.mark.parametrize("test", ["exposure_regression", "merton_accuracy", "timing_placebo"])
def test_sixty_percent_timers_are_detected(skilled_timers: pl.DataFrame, test: str) -> None:
    rate = _rates(skilled_timers).filter(pl.col("test") == test).row(0, named=True)
    assert rate["skill"] >= 0.90, f"{test} detects {rate['skill']:.3f}"


def test_sixty_percent_timers_are_never_called_adverse(skilled_timers: pl.DataFrame) -> None:
    rates = _rates(skilled_timers)
    assert rates.get_column("adverse").max() <= LEVEL
