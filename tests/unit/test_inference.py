"""Inference and resampling kernels (attribution.inference, attribution.resampling) against
reference libraries, published or computed check values (METHODS.md §10), and naive loop
re-implementations."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from scipy.stats import chi2_contingency, fisher_exact, hypergeom
from statsmodels.stats.multitest import multipletests

from attribution import inference as inf
from attribution import resampling as rs

# Exact identities and library agreement: only floating-point rounding separates the two.
LIBRARY_RTOL = 1e-10
IDENTITY_ATOL = 1e-12


def _ragged(rng: np.random.Generator, n_port: int, width: int, lo: int) -> np.ndarray:
    n = rng.integers(lo, width + 1, n_port)
    return np.arange(width)[None, :] < n[:, None]


# --------------------------------------------------------------------------- Newey–West OLS


def test_newey_west_lag_rule_matches_the_check_values() -> None:
    # Source: METHODS §10 J (rule ⌊4(T/100)^(2/9)⌋, values computed there).
    expected = {24: 2, 36: 3, 60: 3, 120: 4, 240: 4, 360: 5, 600: 5}
    got = inf.newey_west_lag(np.array(list(expected)))
    assert got.tolist() == list(expected.values())


@pytest.mark.parametrize("k", [1, 2, 3])
def test_ols_newey_west_equals_statsmodels_hac(k: int) -> None:
    # Source: statsmodels 0.15 OLS(...).fit(cov_type='HAC', maxlags=L, use_correction=False).
    rng = np.random.default_rng(11 + k)
    n_port, width = 12, 150
    mask = _ragged(rng, n_port, width, 40)
    x1 = rng.standard_normal((n_port, width))
    cols = [np.ones((n_port, width)), x1, x1**2][:k]
    design = np.stack(cols, axis=-1)
    noise = rng.standard_normal((n_port, width)) * (1 + np.abs(x1))
    y = design @ np.arange(1.0, k + 1.0) + np.cumsum(noise, axis=1) * 0.1
    fit = inf.ols_newey_west(np.where(mask, y, np.nan), design, mask)
    for p in range(n_port):
        n = int(mask[p].sum())
        ref = sm.OLS(y[p, :n], design[p, :n]).fit(
            cov_type="HAC", cov_kwds={"maxlags": int(fit.lag[p]), "use_correction": False}
        )
        assert int(fit.lag[p]) == int(inf.newey_west_lag(n))
        np.testing.assert_allclose(fit.coef[p], ref.params, rtol=LIBRARY_RTOL, atol=0)
        np.testing.assert_allclose(fit.std_error[p], ref.bse, rtol=LIBRARY_RTOL, atol=0)


def test_hac_error_of_a_mean_matches_the_check_value() -> None:
    # Source: METHODS §10 J: Bartlett L = 2, HAC se(mean) = 0.089656 (printed to 6 decimals),
    # equal to statsmodels; iid se 0.273896 is not what HAC gives.
    x = np.array([1.2, -0.4, 0.8, 2.1, -1.0, 0.3, 1.7, -0.6, 0.9, 0.4, -0.2, 1.1])
    fit = inf.ols_newey_west(
        x[None], np.ones((1, 12, 1)), np.ones((1, 12), bool), lag=np.array([2])
    )
    assert abs(fit.std_error[0, 0] - 0.089656) <= 0.5e-6
    ref = sm.OLS(x, np.ones(12)).fit(
        cov_type="HAC", cov_kwds={"maxlags": 2, "use_correction": False}
    )
    np.testing.assert_allclose(fit.std_error[0, 0], ref.bse[0], rtol=LIBRARY_RTOL)


def test_henriksson_merton_regression_of_a_perfect_timer_is_exact() -> None:
    # Source: METHODS §10 E1 (C): r_p = max(r_m, r_f) gives, on (1, x, max(x, 0)), (0, 0, 1);
    # Treynor–Mazuy on the same data gives (0.438646, 0.529601, 0.110109) in % units.
    r_m = np.array([2, -1, 3, -4, 1.5, -0.5, 2.5, -2, 0.8, -3])
    x = r_m - 0.2
    y = np.maximum(r_m, 0.2) - 0.2
    mask = np.ones((1, 10), bool)
    hm = inf.ols_newey_west(y[None], np.stack([np.ones(10), x, np.maximum(x, 0)], -1)[None], mask)
    np.testing.assert_allclose(hm.coef[0], [0.0, 0.0, 1.0], atol=IDENTITY_ATOL)
    tm = inf.ols_newey_west(y[None], np.stack([np.ones(10), x, x * x], -1)[None], mask)
    np.testing.assert_allclose(tm.coef[0], [0.438646, 0.529601, 0.110109], atol=0.5e-6)


def test_rank_deficient_design_gives_nan_not_noise() -> None:
    x = np.ones((1, 30))
    fit = inf.ols_newey_west(np.arange(30.0)[None], np.stack([x, x], -1), np.ones((1, 30), bool))
    assert np.isnan(fit.coef).all()
    assert np.isnan(fit.std_error).all()


# --------------------------------------------------------------------------- sign tests


def test_hypergeometric_tails_equal_scipy() -> None:
    # Source: scipy.stats.hypergeom (M = N1 + N2 items, n = N1 good, N = calls drawn).
    rng = np.random.default_rng(5)
    good = rng.integers(1, 200, 300)
    bad = rng.integers(1, 200, 300)
    draws = np.array([rng.integers(0, g + b + 1) for g, b in zip(good, bad, strict=True)])
    lo = np.maximum(0, draws - bad)
    hi = np.minimum(good, draws)
    k = np.array([rng.integers(a, b + 1) for a, b in zip(lo, hi, strict=True)])
    upper, lower = inf.hypergeometric_tails(k, good, bad, draws)
    ref_upper = hypergeom.sf(k - 1, good + bad, good, draws)
    ref_lower = hypergeom.cdf(k, good + bad, good, draws)
    np.testing.assert_allclose(upper, ref_upper, rtol=1e-9, atol=1e-15)
    np.testing.assert_allclose(lower, ref_lower, rtol=1e-9, atol=1e-15)


@pytest.mark.parametrize(
    ("big_n1", "big_n2", "n1", "n2", "expected"),
    [(40, 80, 18, 17, 0.007050), (10, 14, 7, 3, 0.024431), (30, 30, 20, 10, 0.009692)],
)
def test_merton_exact_p_values_match_the_check_table(
    big_n1: int, big_n2: int, n1: int, n2: int, expected: float
) -> None:
    # Source: METHODS §10 G (computed with scipy.stats.hypergeom; equal to Fisher's exact test,
    # one-sided 'greater', on [[n1, N1 − n1], [n2, N2 − n2]]). Printed to 6 decimals.
    counts = inf.SignTestCounts(
        n_down_markets=np.array([big_n1]),
        n_up_markets=np.array([big_n2]),
        n_bearish=np.array([n1 + n2]),
        correct_bearish=np.array([n1]),
        correct_bullish=np.array([big_n2 - n2]),
        n_obs=np.array([big_n1 + big_n2]),
    )
    estimate, p_skill, _ = inf.merton_accuracy(counts)
    assert abs(p_skill[0] - expected) <= 0.5e-6
    fisher = fisher_exact([[n1, big_n1 - n1], [n2, big_n2 - n2]], alternative="greater")
    np.testing.assert_allclose(p_skill[0], fisher.pvalue, rtol=1e-9)
    np.testing.assert_allclose(estimate[0], n1 / big_n1 + (1 - n2 / big_n2) - 1, atol=1e-15)


PT_Y = np.array([23, -2, 56, 51, 4, -45, -12, -24, -51, 78, -6, -7, -39, 31, 35])
PT_X = np.array([14, 3, 45, 23, -5, -56, 4, -11, -34, 29, 3, -11, -12, 24, 3])


def test_pesaran_timmermann_matches_the_check_value() -> None:
    # Source: METHODS §10 I (data from a public worked example; S_n = 1.968340, one-sided
    # p = 0.024514, P = 0.733333, P* = 0.493333; printed to 6 decimals).
    mask = np.ones((1, PT_Y.size), bool)
    counts = inf.sign_counts((PT_X > 0)[None], (PT_Y > 0)[None], mask)
    excess, s_n = inf.pesaran_timmermann(counts)
    p_skill, _ = inf.normal_pvalues(s_n)
    assert abs(s_n[0] - 1.968340) <= 0.5e-6
    assert abs(p_skill[0] - 0.024514) <= 0.5e-6
    assert abs(excess[0] - (0.733333 - 0.493333)) <= 1e-6


def test_pesaran_timmermann_square_is_the_scaled_chi_square() -> None:
    # Source: METHODS §6 / §10 I: S_n² = n/(n − 1) · Pearson χ² (no continuity correction) on
    # the up/down table, checked against scipy.stats.chi2_contingency; in a large sample the
    # two-sided p-values then agree.
    rng = np.random.default_rng(3)
    n = 20_000
    up = rng.random(n) < 0.55
    call = np.where(rng.random(n) < 0.52, up, ~up)
    counts = inf.sign_counts(call[None], up[None], np.ones((1, n), bool))
    _, s_n = inf.pesaran_timmermann(counts)
    table = np.array(
        [[np.sum(call & up), np.sum(call & ~up)], [np.sum(~call & up), np.sum(~call & ~up)]]
    )
    chi2, p_chi2, _, _ = chi2_contingency(table, correction=False)
    np.testing.assert_allclose(s_n[0] ** 2, n / (n - 1) * chi2, rtol=LIBRARY_RTOL)
    p_two = 2 * min(inf.normal_pvalues(s_n)[0][0], inf.normal_pvalues(s_n)[1][0])
    np.testing.assert_allclose(p_two, p_chi2, rtol=1e-3)


def test_pesaran_timmermann_is_undefined_when_calls_never_change() -> None:
    mask = np.ones((1, 10), bool)
    counts = inf.sign_counts(np.ones((1, 10), bool), (np.arange(10) % 2 == 0)[None], mask)
    assert np.isnan(inf.pesaran_timmermann(counts)[1][0])


# --------------------------------------------------------------------------- multiple testing

BH_P = np.array(
    [0.0001, 0.0004, 0.0019, 0.0095, 0.0201, 0.0278, 0.0298, 0.0344, 0.0459, 0.3240, 0.4262,
     0.5719, 0.6528, 0.7590, 1.0]
)  # fmt: skip


def test_benjamini_hochberg_matches_the_check_values_and_statsmodels() -> None:
    # Source: METHODS §10 K (p-values from the BH 1995 example, from memory; adjusted values
    # computed there) and statsmodels multipletests(method='fdr_bh').
    expected = [0.0015, 0.003, 0.0095, 0.03562, 0.0603, 0.06386, 0.06386, 0.0645, 0.0765,
                0.486, 0.58118, 0.71487, 0.75323, 0.81321, 1.0]  # fmt: skip
    q = inf.benjamini_hochberg(BH_P)
    np.testing.assert_allclose(q, expected, atol=0.5e-5)
    assert int(np.sum(q <= 0.05)) == 4
    ref = multipletests(BH_P, alpha=0.05, method="fdr_bh")[1]
    np.testing.assert_allclose(q, ref, rtol=LIBRARY_RTOL)


def test_benjamini_hochberg_ignores_missing_p_values() -> None:
    # Source: statsmodels multipletests on the non-missing values.
    rng = np.random.default_rng(9)
    p = rng.random(50) ** 2
    p[[3, 17, 40]] = np.nan
    q = inf.benjamini_hochberg(p)
    assert np.isnan(q[[3, 17, 40]]).all()
    ok = ~np.isnan(p)
    np.testing.assert_allclose(q[ok], multipletests(p[ok], method="fdr_bh")[1], rtol=LIBRARY_RTOL)


@pytest.mark.parametrize(("lam", "expected"), [(0.5, 0.5333), (0.6, 0.5000)])
def test_storey_pi0_matches_the_check_values(lam: float, expected: float) -> None:
    # Source: METHODS §10 K (computed there, printed to 4 decimals).
    assert abs(inf.storey_pi0(BH_P, lam=lam) - expected) <= 0.5e-4


# --------------------------------------------------------------------------- resampling


def test_stationary_bootstrap_indices_have_geometric_blocks() -> None:
    # Source: Politis & Romano (1994) definition: a block continues (next index = previous + 1
    # mod n) with probability 1 − 1/b and restarts at a uniform index otherwise. The observed
    # continuation share must lie within 4 binomial standard errors of its expectation,
    # 1 − 1/b + (1/b)(1/n) (a restart can land on the next index by chance).
    rng = np.random.default_rng(21)
    n, b, draws = 200, 5.0, 2000
    idx = rs.stationary_bootstrap_indices(n, b, draws, rng)
    assert idx.shape == (draws, n)
    assert idx.min() >= 0
    assert idx.max() < n
    cont = (idx[:, 1:] == (idx[:, :-1] + 1) % n).mean()
    expected = (1 - 1 / b) + (1 / b) / n
    se = np.sqrt(expected * (1 - expected) / (draws * (n - 1)))
    assert abs(cont - expected) <= 4 * se
    # Marginally every index is equally likely (stationarity): chi-square-free check on the mean.
    assert abs(idx.mean() - (n - 1) / 2) <= 4 * np.sqrt((n * n - 1) / 12 / idx.size) * np.sqrt(b)


def test_politis_white_block_length_equals_arch_per_row() -> None:
    # Source: arch 8.0 arch.bootstrap.optimal_block_length (stationary column) on each row's
    # own observations; the batched wrapper must pass exactly those values, padding excluded.
    # (METHODS §10 M quotes 9.296369 for x_t = 0.6 x_{t−1} + sin(t²), t = 1..300; from that
    # description arch 8.0.0 gives 9.184110 here, so the printed value is not used.)
    from arch.bootstrap import optimal_block_length

    x = np.zeros(301)
    for t in range(1, 301):
        x[t] = 0.6 * x[t - 1] + np.sin(t * t)
    rng = np.random.default_rng(2)
    series = np.full((3, 320), np.nan)
    series[0, :300] = x[1:]
    series[1, :250] = x[1:251]
    series[2, :300] = rng.standard_normal(300)
    n = np.array([300, 250, 300])
    got = rs.politis_white_block_length(series, n)
    for p in range(3):
        ref = optimal_block_length(series[p, : n[p]])["stationary"].to_numpy()[0]
        np.testing.assert_allclose(got[p], ref, rtol=LIBRARY_RTOL)


def _naive_indices(seed: int, stream: int, n: int, b: int, draws: int) -> np.ndarray:
    return rs.stationary_bootstrap_indices(n, b, draws, np.random.default_rng([seed, stream, n, b]))


def test_bootstrap_means_equal_a_loop() -> None:
    # Source: naive re-implementation (STYLE §7): the mean of series[π] for each draw.
    rng = np.random.default_rng(4)
    mask = _ragged(rng, 7, 60, 30)
    n = mask.sum(axis=1)
    series = np.where(mask, rng.standard_normal(mask.shape), np.nan)
    block = np.array([1, 2, 3, 2, 1, 3, 2])
    got = rs.bootstrap_means(series, n, block, draws=40, seed=8, stream=2)
    for p in range(7):
        idx = _naive_indices(8, 2, int(n[p]), int(block[p]), 40)
        np.testing.assert_allclose(got[p], series[p, idx].mean(axis=1), atol=IDENTITY_ATOL)


@pytest.mark.parametrize("shared", [True, False])
def test_placebo_means_equal_a_loop(shared: bool) -> None:
    # Source: naive re-implementation: (1/n) Σ_t Σ_i d[t, i] r[π(t), i], for both evaluation
    # routes (portfolios sharing their return rows, and the per-portfolio route).
    rng = np.random.default_rng(6)
    n_port, width, n_cls = 9, 50, 3
    n = np.full(n_port, width)
    n[:3] = 41
    dev = rng.standard_normal((n_port, width, n_cls))
    base = rng.standard_normal((width, n_cls))
    rel = np.broadcast_to(base, dev.shape).copy() if shared else rng.standard_normal(dev.shape)
    key = np.zeros(n_port, int) if shared else np.arange(n_port)
    block = np.full(n_port, 2)
    got = rs.placebo_means(dev, rel, n, block, share_key=key, draws=30, seed=3, stream=1)
    for p in range(n_port):
        idx = _naive_indices(3, 1, int(n[p]), 2, 30)
        expect = [np.sum(dev[p, : n[p]] * rel[p, : n[p]][idx[j]]) / n[p] for j in range(30)]
        np.testing.assert_allclose(got[p], expect, atol=IDENTITY_ATOL)


def test_placebo_slopes_equal_a_loop_of_least_squares() -> None:
    # Source: naive re-implementation with numpy.linalg.lstsq on (1, x[π], control).
    rng = np.random.default_rng(12)
    n_port, width = 6, 45
    n = np.array([45, 45, 45, 40, 40, 45])
    y = rng.standard_normal((n_port, width))
    x = np.broadcast_to(rng.standard_normal(width), (n_port, width)).copy()
    x[5] = rng.standard_normal(width)
    ctrl = rng.standard_normal((n_port, width, 1))
    key = rs.row_keys(n, x)
    block = np.full(n_port, 3)
    obs, reps = rs.placebo_slopes(y, x, ctrl, n, block, share_key=key, draws=25, seed=5, stream=4)
    for p in range(n_port):
        m = int(n[p])
        design = np.column_stack([np.ones(m), x[p, :m], ctrl[p, :m, 0]])
        np.testing.assert_allclose(
            obs[p], np.linalg.lstsq(design, y[p, :m], rcond=None)[0][1], rtol=LIBRARY_RTOL
        )
        idx = _naive_indices(5, 4, m, 3, 25)
        for j in range(25):
            design[:, 1] = x[p, :m][idx[j]]
            slope = np.linalg.lstsq(design, y[p, :m], rcond=None)[0][1]
            np.testing.assert_allclose(reps[p, j], slope, rtol=1e-9)


def test_resampling_p_values_count_the_observed_draw() -> None:
    # Source: the (1 + #{T* ≥ t}) / (1 + B) rule (Davison & Hinkley 1997 [from memory]).
    reps = np.array([[0.1, 0.5, 0.9, 0.3]])
    up, down = rs.resampling_pvalues(np.array([0.5]), reps)
    assert up[0] == pytest.approx(3 / 5, abs=1e-15)
    assert down[0] == pytest.approx(4 / 5, abs=1e-15)


def test_wild_bootstrap_test_equals_a_loop_of_refits() -> None:
    # Source: naive re-implementation: for each draw, u* = σ̂ η, refit the null model, and
    # t* = c'u* / sqrt(Σ c² û*²); observed t = c'ũ / sqrt(Σ c² ũ²), with σ̂² the fit of ũ² on
    # (1, x²); the coefficient equals statsmodels OLS.
    rng = np.random.default_rng(31)
    n_port, width, draws = 4, 60, 20
    mask = _ragged(rng, n_port, width, 45)
    x = rng.standard_normal((n_port, width)) * 0.05
    y = 0.6 * x + rng.standard_normal((n_port, width)) * 0.01 * (1 + 10 * np.abs(x))
    design = np.stack([np.ones_like(x), x, x * x], -1)
    sked = np.stack([np.ones_like(x), x * x], -1)
    got = rs.wild_bootstrap_test(
        y, design, mask, column=2, skedastic=sked, draws=draws, rng=np.random.default_rng(2)
    )
    signs = np.where(np.random.default_rng(2).random((width, draws)) < 0.5, -1.0, 1.0)
    for p in range(n_port):
        m = int(mask[p].sum())
        xd, yp = design[p, :m], y[p, :m]
        np.testing.assert_allclose(got.estimate[p], sm.OLS(yp, xd).fit().params[2], rtol=1e-9)
        c = np.linalg.pinv(xd)[2]
        xr = xd[:, :2]
        u_r = yp - xr @ np.linalg.lstsq(xr, yp, rcond=None)[0]
        t_obs = c @ u_r / np.sqrt(np.sum(c * c * u_r * u_r))
        np.testing.assert_allclose(got.statistic[p], t_obs, rtol=1e-9)
        zs = sked[p, :m]
        sigma = np.sqrt(np.maximum(zs @ np.linalg.lstsq(zs, u_r**2, rcond=None)[0], 0))
        for j in range(draws):
            u_star = sigma * signs[:m, j]
            res = u_star - xr @ np.linalg.lstsq(xr, u_star, rcond=None)[0]
            t_star = c @ u_star / np.sqrt(np.sum(c * c * res * res))
            np.testing.assert_allclose(got.replicates[p, j], t_star, rtol=1e-8)


def test_compact_left_aligns_valid_entries() -> None:
    valid = np.array([[True, False, True, True], [False, False, True, False]])
    values = np.array([[1.0, 2.0, 3.0, 4.0], [5.0, 6.0, 7.0, 8.0]])
    mask, (out,) = inf.compact(valid, values)
    assert mask.tolist() == [[True, True, True], [True, False, False]]
    np.testing.assert_array_equal(out[0], [1.0, 3.0, 4.0])
    assert out[1, 0] == 7.0
    assert np.isnan(out[1, 1:]).all()


def test_row_keys_group_identical_rows() -> None:
    a = np.array([[1.0, np.nan], [1.0, np.nan], [1.0, 2.0]])
    keys = rs.row_keys(np.array([3, 3, 3]), a)
    assert keys[0] == keys[1]
    assert keys[0] != keys[2]


@pytest.mark.parametrize(
    ("n", "p"), [(1, 0.3), (60, 0.6), (240, 0.4), (480, 0.72), (30, 0.0), (30, 1.0)]
)
def test_binomial_pmf_matches_scipy(n: int, p: float) -> None:
    # Reference: scipy.stats.binom.pmf (scipy's own binomial law).
    from scipy.stats import binom

    from attribution.power import binomial_pmf

    k = np.arange(n + 1)
    np.testing.assert_allclose(binomial_pmf(k, n, p), binom.pmf(k, n, p), rtol=1e-10, atol=1e-300)
