"""The timing battery end to end against outside references: statsmodels and scipy on the same
numbers, Merton's (1981) option value of perfect timing, and exact identities on the real
monthly market factors shipped with ``arch`` (1926-07 … 2018-11)."""

from __future__ import annotations

import math

import numpy as np
import polars as pl
import pytest
import statsmodels.api as sm
from scipy.stats import chi2_contingency, hypergeom, norm
from timing_frames import french_market, roster_frames, two_asset

from attribution.inference import newey_west_lag
from attribution.timing import TimingOptions, evaluate_timing

pytestmark = pytest.mark.reference

LIBRARY_RTOL = 1e-10
IDENTITY_ATOL = 1e-12


def _evaluate(frames: dict[str, pl.DataFrame], **options):
    return evaluate_timing(
        frames["effects"],
        frames["series"],
        frames["index_returns"],
        frames["riskless"],
        options=TimingOptions(**options),
    )


def _rows(result, test: str) -> pl.DataFrame:
    return result.timing_tests.filter(pl.col("test") == test).sort("portfolio_id")


# --------------------------------------------------------------------------- Merton (1981)


@pytest.mark.parametrize(
    ("sigma", "horizon", "printed"),
    [
        (0.048, 1.0, 0.019147),
        (0.20, 1.0, 0.079656),
        (0.20, 1 / 12, 0.023030),
        (0.15, 0.25, 0.029914),
    ],
)
def test_option_value_formula_matches_the_check_values(
    sigma: float, horizon: float, printed: float
) -> None:
    # Source: BKM eq. 24.6 (METHODS §5.4), values METHODS §10 H (printed to 6 decimals).
    assert abs(2 * norm.cdf(sigma * math.sqrt(horizon) / 2) - 1 - printed) <= 0.5e-6


def test_perfect_timer_is_worth_merton_s_option() -> None:
    # Source: Merton (1981) / BKM eq. 24.6: one period of perfect timing is worth
    # 2N(σ√T/2) − 1 per $1 when the market is lognormal; under the risk-neutral drift the mean
    # discounted excess payoff of the perfect timer estimates that value. The payoff is read from
    # the tool's own series (exposure × market excess return, market = the equity class, so
    # the exposure is the equity weight) and compared within 4 Monte-Carlo standard errors.
    sigma, horizon, r = 0.20, 1 / 12, 0.03
    n = 200_000
    rng = np.random.default_rng(1981)
    z = rng.standard_normal(n)
    equity = np.exp((r - sigma**2 / 2) * horizon + sigma * math.sqrt(horizon) * z) - 1
    rf = np.full(n, math.exp(r * horizon) - 1)
    w = np.where(equity > rf, 1.0, 0.0)
    dates = np.arange("1500-01-01", n, dtype="datetime64[D]")
    frames = roster_frames(
        dates, ["cash", "equity"], np.stack([rf, equity], -1), rf, two_asset(w[None]), [1.0, 0.0]
    )
    result = _evaluate(frames, market="equity", tests="exact")
    extra = result.series_extra
    payoff = (extra["exposure"] * extra["market_excess_return"]).to_numpy() / (1 + rf)
    value = 2 * norm.cdf(sigma * math.sqrt(horizon) / 2) - 1
    mc_se = payoff.std(ddof=1) / math.sqrt(n)
    assert abs(payoff.mean() - value) <= 4 * mc_se
    # The tool's mean timing effect is the same payoff net of the static part, s̄ · mean(x).
    timing = _rows(result, "timing_mean").row(0, named=True)["estimate"]
    static_part = w.mean() * (equity - rf).mean()
    assert timing == pytest.approx((w * (equity - rf)).mean() - static_part, rel=1e-9)


# --------------------------------------------------------------------------- market factors


@pytest.fixture(scope="module")
def market():
    return french_market()


def test_perfect_timer_on_the_market_factors_is_exact(market) -> None:
    # Source: METHODS §5.2 / §10 E1: r_p − r_f = max(x, 0) regressed on (1, x, max(x, 0))
    # gives γ = 1 (and α = β_down = 0) exactly; the timer calls every month right, so
    # P1 + P2 − 1 = 1 exactly.
    dates, equity, rf = market
    w = np.where(equity - rf > 0, 1.0, 0.0)
    frames = roster_frames(
        dates, ["cash", "equity"], np.stack([rf, equity], -1), rf, two_asset(w[None]), [0.4, 0.6]
    )
    result = _evaluate(frames, market="equity", draws=199)
    hm = _rows(result, "henriksson_merton").row(0, named=True)
    assert hm["estimate"] == pytest.approx(1.0, abs=IDENTITY_ATOL)
    assert hm["alpha"] == pytest.approx(0.0, abs=IDENTITY_ATOL)
    assert hm["beta"] == pytest.approx(0.0, abs=IDENTITY_ATOL)
    merton = _rows(result, "merton_accuracy").row(0, named=True)
    assert merton["estimate"] == 1.0
    assert merton["n_obs"] == len(dates)
    assert result.verdicts.row(0, named=True)["timing_evidence"] == "skill"


@pytest.fixture(scope="module")
def coin_roster(market):
    dates, equity, rf = market
    rng = np.random.default_rng(2024)
    n_port = 6
    w = np.where(rng.random((n_port, len(dates))) < 0.5, 0.5, 0.7)
    lengths = np.array([1109, 1109, 600, 240, 120, 60])
    starts = np.array([0, 0, 300, 700, 900, 1000])
    weights = np.full_like(w, np.nan)
    for p in range(n_port):
        weights[p, : lengths[p]] = w[p, starts[p] : starts[p] + lengths[p]]
    frames = roster_frames(
        dates,
        ["cash", "equity"],
        np.stack([rf, equity], -1),
        rf,
        two_asset(np.nan_to_num(weights)),
        [0.4, 0.6],
        start=starts,
        n_periods=lengths,
    )
    result = _evaluate(frames, tests="exact")
    return {
        "equity": equity,
        "rf": rf,
        "weights": weights,
        "starts": starts,
        "lengths": lengths,
        "result": result,
    }


def _window(case, p: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    s, n = case["starts"][p], case["lengths"][p]
    return case["weights"][p, :n], case["equity"][s : s + n], case["rf"][s : s + n]


def _hac(y: np.ndarray, x: np.ndarray):
    lag = int(newey_west_lag(len(y)))
    return sm.OLS(y, x).fit(cov_type="HAC", cov_kwds={"maxlags": lag, "use_correction": False})


@pytest.mark.parametrize("p", range(6))
def test_exposure_regression_equals_statsmodels(coin_roster, p: int) -> None:
    # Source: statsmodels 0.15 OLS HAC (Bartlett, lag ⌊4(T/100)^(2/9)⌋, no correction) of the
    # exposure w/0.6 (equity beta to a 60/40 policy with a riskless cash class is 1/0.6) on the
    # policy excess return 0.6 (equity − rf), computed here from the factors directly.
    w, equity, rf = _window(coin_roster, p)
    ref = _hac(w / 0.6, sm.add_constant(0.6 * (equity - rf)))
    row = _rows(coin_roster["result"], "exposure_regression").row(p, named=True)
    np.testing.assert_allclose(row["estimate"], ref.params[1], rtol=1e-9)
    np.testing.assert_allclose(row["std_error"], ref.bse[1], rtol=1e-9)
    np.testing.assert_allclose(row["alpha"], ref.params[0], rtol=1e-9)
    assert row["n_obs"] == len(w)


@pytest.mark.parametrize("p", range(6))
def test_returns_based_regressions_equal_statsmodels(coin_roster, p: int) -> None:
    # Source: statsmodels 0.15 OLS HAC on y = r_p − r_f with regressors (1, x, x²),
    # (1, x, max(x, 0)) and (1, x); x the policy excess return.
    w, equity, rf = _window(coin_roster, p)
    x = 0.6 * (equity - rf)
    y = w * equity + (1 - w) * rf - rf
    result = coin_roster["result"]
    for test, extra, slot in (
        ("treynor_mazuy", x * x, 2),
        ("henriksson_merton", np.maximum(x, 0), 2),
        ("jensen_alpha", None, 0),
    ):
        cols = [np.ones_like(x), x] + ([] if extra is None else [extra])
        ref = _hac(y, np.column_stack(cols))
        row = _rows(result, test).row(p, named=True)
        np.testing.assert_allclose(row["estimate"], ref.params[slot], rtol=1e-8)
        np.testing.assert_allclose(row["std_error"], ref.bse[slot], rtol=1e-8)
        np.testing.assert_allclose(row["beta"], ref.params[1], rtol=1e-8)


@pytest.mark.parametrize("p", range(6))
def test_timing_mean_and_portfolio_change_equal_statsmodels(coin_roster, p: int) -> None:
    # Source: statsmodels OLS HAC of a constant: the per-period timing effect (w − w̄)(equity −
    # rf) (two classes, cash = riskless), and the Grinblatt–Titman term (w_t − w_{t−1})(equity_t
    # − rf_t) (lag 1; the cash leg cancels because the weight changes sum to zero).
    w, equity, rf = _window(coin_roster, p)
    result = coin_roster["result"]
    effect = (w - w.mean()) * (equity - rf)
    ref = _hac(effect, np.ones((len(w), 1)))
    row = _rows(result, "timing_mean").row(p, named=True)
    np.testing.assert_allclose(row["estimate"], ref.params[0], rtol=1e-9, atol=1e-16)
    np.testing.assert_allclose(row["std_error"], ref.bse[0], rtol=1e-9)
    pcm = (w[1:] - w[:-1]) * (equity[1:] - rf[1:])
    ref = _hac(pcm, np.ones((len(pcm), 1)))
    row = _rows(result, "portfolio_change").row(p, named=True)
    np.testing.assert_allclose(row["estimate"], ref.params[0], rtol=1e-9, atol=1e-16)
    np.testing.assert_allclose(row["std_error"], ref.bse[0], rtol=1e-9)


@pytest.mark.parametrize("p", range(6))
def test_sign_tests_equal_scipy(coin_roster, p: int) -> None:
    # Source: scipy.stats.hypergeom for Merton's exact test; Pesaran–Timmermann S_n² =
    # n/(n − 1) · Pearson χ² (METHODS §6) with scipy.stats.chi2_contingency, no correction.
    w, equity, rf = _window(coin_roster, p)
    bullish = w > w.mean()
    up = equity - rf > 0
    n_down, n_up = int((~up).sum()), int(up.sum())
    n1 = int((~bullish & ~up).sum())
    calls = int((~bullish).sum())
    result = coin_roster["result"]
    merton = _rows(result, "merton_accuracy").row(p, named=True)
    np.testing.assert_allclose(
        merton["p_value"], hypergeom.sf(n1 - 1, n_down + n_up, n_down, calls), rtol=1e-9
    )
    np.testing.assert_allclose(
        merton["p_value_adverse"], hypergeom.cdf(n1, n_down + n_up, n_down, calls), rtol=1e-9
    )
    assert merton["estimate"] == pytest.approx(
        n1 / n_down + (bullish & up).sum() / n_up - 1, abs=1e-15
    )
    table = [[(bullish & up).sum(), (bullish & ~up).sum()], [(~bullish & up).sum(), n1]]
    chi2 = chi2_contingency(table, correction=False)[0]
    pt = _rows(result, "pesaran_timmermann").row(p, named=True)
    n = len(w)
    np.testing.assert_allclose(pt["statistic"] ** 2, n / (n - 1) * chi2, rtol=LIBRARY_RTOL)
