"""Closed-form inference kernels batched across a roster: least squares with Newey–West errors,
exact and asymptotic sign tests, multiple-testing control. (Resampling: :mod:`attribution.
resampling`.)

Every function works on padded arrays: one row per portfolio, observations left-aligned in
time order, and a boolean ``mask`` (or a count ``n_obs``) saying which entries are real. Padding
entries may hold anything (NaN included); they never reach a result. Nothing here loops over
portfolios in Python: loops run over lags only.

Sources are named in each docstring; the check values are in ``METHODS.md`` §10 and the tests.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.special import gammaln, ndtr

FloatArray = np.ndarray
BoolArray = np.ndarray
IntArray = np.ndarray

# Below this relative size a pivot of the least-squares factorisation counts as zero: the design
# has no variation left in that column (common practice, no source).
_RANK_TOL = 1e-10


def newey_west_lag(n_obs: IntArray | int) -> IntArray:
    """Bartlett-kernel truncation lag ⌊4 (T/100)^(2/9)⌋.

    Source: the Newey & West (1994) rule of thumb as coded in A. Patton's public HAC routine
    (METHODS §8.1); check values METHODS §10 J (T = 24 → 2, 60 → 3, 120 → 4, 360 → 5).
    """
    n = np.asarray(n_obs, dtype=float)
    lag = np.floor(4.0 * (np.maximum(n, 0.0) / 100.0) ** (2.0 / 9.0))
    return lag.astype(np.int64)


@dataclass(frozen=True, slots=True, kw_only=True)
class OlsFit:
    """Batched least-squares fit with Newey–West (Bartlett) standard errors.

    Fields (P portfolios, N padded observations, k regressors):

    coef : (P, k) coefficients; NaN where the design is rank deficient.
    std_error : (P, k) Newey–West standard errors, no small-sample correction.
    residual : (P, N) residuals, 0 on padding.
    n_obs : (P,) observations used.
    lag : (P,) Bartlett truncation lag used.
    xtx_inv : (P, k, k) (X'X)^{-1}.
    """

    coef: FloatArray
    std_error: FloatArray
    residual: FloatArray
    n_obs: IntArray
    lag: IntArray
    xtx_inv: FloatArray


def ols_newey_west(
    y: FloatArray, x: FloatArray, mask: BoolArray, *, lag: IntArray | None = None
) -> OlsFit:
    """Least squares per portfolio on stacked arrays, with Newey–West HAC errors.

    Model y_t = x_t'b + u_t. Coefficients b = (X'X)^{-1}X'y, computed through a batched QR
    factorisation for accuracy. Covariance (Newey & West 1987; METHODS §8.1):

        V = (X'X)^{-1} [Σ_t g_t g_t' + Σ_{j=1..L} (1 − j/(L+1)) (Γ_j + Γ_j')] (X'X)^{-1},
        g_t = x_t û_t,  Γ_j = Σ_{t>j} g_t g_{t−j}',

    with L = ⌊4 (T/100)^(2/9)⌋ per portfolio unless ``lag`` is given, and no small-sample
    correction; this is what statsmodels ``OLS(...).fit(cov_type='HAC', cov_kwds={'maxlags': L,
    'use_correction': False})`` computes (checked in the tests).

    ``y`` is (P, N), ``x`` is (P, N, k), ``mask`` (P, N) marks real observations; each
    portfolio's real observations must be a left-aligned run so that lags pair neighbours.
    """
    mask = np.asarray(mask, dtype=bool)
    width = mask.shape[1]
    n_reg = np.shape(x)[-1]
    if width < n_reg:
        # Fewer padded observations than regressors (every record of the call that short):
        # pad with empty rows so the factorisation stays square; such fits are rank
        # deficient and come out NaN.
        extra = n_reg - width
        x = np.concatenate(
            [np.asarray(x, dtype=float), np.zeros((mask.shape[0], extra, n_reg))], axis=1
        )
        y = np.concatenate([np.asarray(y, dtype=float), np.zeros((mask.shape[0], extra))], axis=1)
        mask = np.concatenate([mask, np.zeros((mask.shape[0], extra), dtype=bool)], axis=1)
    xm = np.where(mask[..., None], x, 0.0)
    ym = np.where(mask, y, 0.0)
    n_obs = mask.sum(axis=1)
    if lag is None:
        lag = newey_west_lag(n_obs)
    lag = np.asarray(lag, dtype=np.int64)

    q, r = np.linalg.qr(xm)
    diag = np.abs(np.diagonal(r, axis1=1, axis2=2))
    scale = np.sqrt((xm * xm).sum(axis=1))
    full_rank = np.all(diag > _RANK_TOL * np.maximum(scale, np.finfo(float).tiny), axis=1)
    # Rank-deficient portfolios get an identity R so the solve is harmless; their outputs are NaN.
    eye = np.eye(r.shape[1])
    r_safe = np.where(full_rank[:, None, None], r, eye)
    qty = (np.swapaxes(q, 1, 2) @ ym[..., None])[..., 0]
    coef = np.linalg.solve(r_safe, qty[..., None])[..., 0]
    r_inv = np.linalg.inv(r_safe)
    xtx_inv = r_inv @ np.swapaxes(r_inv, 1, 2)

    resid = np.where(mask, ym - (xm @ coef[..., None])[..., 0], 0.0)
    g = xm * resid[..., None]
    g_t = np.swapaxes(g, 1, 2)
    meat = g_t @ g
    for j in range(1, int(lag.max(initial=0)) + 1):
        weight = np.where(lag >= j, 1.0 - j / (lag + 1.0), 0.0)
        gamma = g_t[:, :, j:] @ g[:, :-j]
        meat += weight[:, None, None] * (gamma + np.swapaxes(gamma, 1, 2))
    cov = xtx_inv @ meat @ xtx_inv
    se = np.sqrt(np.maximum(np.diagonal(cov, axis1=1, axis2=2), 0.0))

    nan = np.where(full_rank, 0.0, np.nan)[:, None]
    return OlsFit(
        coef=coef + nan,
        std_error=se + nan,
        residual=resid[:, :width],
        n_obs=n_obs,
        lag=lag,
        xtx_inv=xtx_inv + nan[..., None],
    )


def normal_pvalues(statistic: FloatArray) -> tuple[FloatArray, FloatArray]:
    """One-sided p-values from the standard normal: (P(Z ≥ s), P(Z ≤ s)) = (Φ(−s), Φ(s)),
    with Φ = ``scipy.special.ndtr`` (what ``scipy.stats.norm.sf`` evaluates)."""
    s = np.asarray(statistic, dtype=float)
    return ndtr(-s), ndtr(s)


def hypergeometric_tails(
    successes: IntArray, good: IntArray, bad: IntArray, draws: IntArray
) -> tuple[FloatArray, FloatArray]:
    """Exact tails P(X ≥ k) and P(X ≤ k) of the hypergeometric law, batched.

    X is the number of "good" items among ``draws`` taken without replacement from ``good`` +
    ``bad`` items: P(X = x) = C(good, x) C(bad, draws − x) / C(good + bad, draws).
    Henriksson & Merton (1981) use it for the number n1 of correct bearish calls among the n
    bearish calls, given N1 down markets and N2 up markets (METHODS §5.3): the skill p-value is
    P(X ≥ n1), the adverse one P(X ≤ n1). Summed in probability space from log-gamma terms
    over the whole support (at most N + 1 points per portfolio), so tiny tails keep their
    precision; the tail is never taken as 1 − cdf.
    """
    k = np.asarray(successes, dtype=np.int64)
    n_good = np.asarray(good, dtype=np.int64)
    n_bad = np.asarray(bad, dtype=np.int64)
    n_draw = np.asarray(draws, dtype=np.int64)
    if k.size == 0:
        return np.zeros(0), np.zeros(0)
    support = np.arange(int(np.max(np.minimum(n_good, n_draw), initial=0)) + 1)
    xs = support[None, :]
    lo = np.maximum(0, n_draw - n_bad)[:, None]
    hi = np.minimum(n_good, n_draw)[:, None]
    inside = (xs >= lo) & (xs <= hi)
    xs_safe = np.where(inside, xs, lo)
    log_pmf = (
        _log_choose(n_good[:, None], xs_safe)
        + _log_choose(n_bad[:, None], n_draw[:, None] - xs_safe)
        - _log_choose((n_good + n_bad)[:, None], n_draw[:, None])
    )
    pmf = np.where(inside, np.exp(log_pmf), 0.0)
    upper = np.where(xs >= k[:, None], pmf, 0.0).sum(axis=1)
    lower = np.where(xs <= k[:, None], pmf, 0.0).sum(axis=1)
    return np.minimum(upper, 1.0), np.minimum(lower, 1.0)


def _log_choose(n: IntArray, k: IntArray) -> FloatArray:
    return gammaln(n + 1.0) - gammaln(k + 1.0) - gammaln(n - k + 1.0)


@dataclass(frozen=True, slots=True, kw_only=True)
class SignTestCounts:
    """Up/down table of forecasts against outcomes, per portfolio.

    n_down_markets (N1), n_up_markets (N2), n_bearish (n = n1 + n2 calls of "down"),
    correct_bearish (n1), correct_bullish (up calls in up markets, N2 − n2), n_obs (N).
    """

    n_down_markets: IntArray
    n_up_markets: IntArray
    n_bearish: IntArray
    correct_bearish: IntArray
    correct_bullish: IntArray
    n_obs: IntArray


def sign_counts(bullish: BoolArray, up: BoolArray, mask: BoolArray) -> SignTestCounts:
    """Count the 2×2 table of bullish/bearish calls against up/down outcomes per portfolio."""
    bull = np.asarray(bullish, dtype=bool) & mask
    upm = np.asarray(up, dtype=bool) & mask
    down = ~np.asarray(up, dtype=bool) & mask
    bear = ~np.asarray(bullish, dtype=bool) & mask
    return SignTestCounts(
        n_down_markets=down.sum(axis=1),
        n_up_markets=upm.sum(axis=1),
        n_bearish=bear.sum(axis=1),
        correct_bearish=(bear & down).sum(axis=1),
        correct_bullish=(bull & upm).sum(axis=1),
        n_obs=mask.sum(axis=1),
    )


def merton_accuracy(counts: SignTestCounts) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Merton's P1 + P2 − 1 with its exact conditional p-values (skill, adverse).

    P1 = n1/N1 (share of down markets called down), P2 = (N2 − n2)/N2 (share of up markets
    called up); under no skill n1 given the margins is hypergeometric (Henriksson & Merton
    1981, METHODS §5.3; equal to Fisher's exact test, one-sided). NaN estimate where N1 or N2 is
    0 (then the p-values are 1: a one-sided market leaves nothing to test).
    """
    n1 = counts.correct_bearish
    big_n1 = counts.n_down_markets
    big_n2 = counts.n_up_markets
    with np.errstate(invalid="ignore", divide="ignore"):
        p1 = n1 / big_n1
        p2 = counts.correct_bullish / big_n2
    estimate = np.where((big_n1 > 0) & (big_n2 > 0), p1 + p2 - 1.0, np.nan)
    p_skill, p_adverse = hypergeometric_tails(n1, big_n1, big_n2, counts.n_bearish)
    return estimate, p_skill, p_adverse


def pesaran_timmermann(counts: SignTestCounts) -> tuple[FloatArray, FloatArray]:
    """Pesaran & Timmermann (1992) directional-accuracy statistic S_n, batched.

    With P the hit rate, P_y the share of up outcomes, P_x the share of up (bullish) calls and
    n the number of observations (METHODS §6):

        P* = P_y P_x + (1 − P_y)(1 − P_x)
        V(P) = P*(1 − P*)/n
        V(P*) = (2P_y − 1)² P_x(1 − P_x)/n + (2P_x − 1)² P_y(1 − P_y)/n
                + 4 P_y P_x (1 − P_y)(1 − P_x)/n²
        S_n = (P − P*) / sqrt(V(P) − V(P*))  ~ N(0, 1) under independent signs.

    Returns (P − P*, S_n); S_n is NaN where all outcomes or all calls share a sign (the
    variance is then zero). Check value METHODS §10 I: S_n = 1.968340.
    """
    n = counts.n_obs.astype(float)
    with np.errstate(invalid="ignore", divide="ignore"):
        hits = (counts.correct_bearish + counts.correct_bullish) / n
        p_y = counts.n_up_markets / n
        p_x = (counts.n_obs - counts.n_bearish) / n
        p_star = p_y * p_x + (1.0 - p_y) * (1.0 - p_x)
        v_p = p_star * (1.0 - p_star) / n
        v_pstar = (
            (2.0 * p_y - 1.0) ** 2 * p_x * (1.0 - p_x) / n
            + (2.0 * p_x - 1.0) ** 2 * p_y * (1.0 - p_y) / n
            + 4.0 * p_y * p_x * (1.0 - p_y) * (1.0 - p_x) / n**2
        )
        denom = v_p - v_pstar
        degenerate = (p_y <= 0) | (p_y >= 1) | (p_x <= 0) | (p_x >= 1) | ~(denom > 0)
        stat = np.where(
            degenerate, np.nan, (hits - p_star) / np.sqrt(np.where(degenerate, 1, denom))
        )
    return hits - p_star, stat


def benjamini_hochberg(p_values: FloatArray) -> FloatArray:
    """Benjamini & Hochberg (1995) adjusted p-values (q-values); NaN entries stay NaN.

    Sorted p_(1) ≤ … ≤ p_(m): q_(i) = min_{j ≥ i} min(1, m p_(j) / j), m = number of non-NaN
    p-values (METHODS §8.3). Rejecting q ≤ α is the BH step-up rule at FDR α; equal to
    statsmodels ``multipletests(p, method='fdr_bh')[1]`` (checked in the tests, with the
    METHODS §10 K example).
    """
    p = np.asarray(p_values, dtype=float)
    out = np.full(p.shape, np.nan)
    ok = ~np.isnan(p)
    m = int(ok.sum())
    if m == 0:
        return out
    vals = p[ok]
    order = np.argsort(vals, kind="stable")
    ranked = vals[order] * m / np.arange(1, m + 1)
    adjusted = np.minimum(np.minimum.accumulate(ranked[::-1])[::-1], 1.0)
    back = np.empty(m)
    back[order] = adjusted
    out[ok] = back
    return out


def storey_pi0(p_values: FloatArray, *, lam: float = 0.5) -> float:
    """Storey (2002) estimate of the share of true nulls: π0 = #{p > λ} / (m (1 − λ)), ≤ 1.

    NaN entries are ignored; NaN when there is no p-value. Check value METHODS §10 K:
    0.5333 at λ = 0.5 on the Benjamini–Hochberg example p-values.
    """
    p = np.asarray(p_values, dtype=float)
    p = p[~np.isnan(p)]
    if p.size == 0:
        return float("nan")
    return float(min(1.0, np.count_nonzero(p > lam) / (p.size * (1.0 - lam))))


def compact(valid: BoolArray, *arrays: FloatArray) -> tuple[BoolArray, list[FloatArray]]:
    """Left-align the valid entries of each row, keeping their order.

    Returns the new mask and each array re-laid so that row p holds its valid entries in
    positions 0..n_p − 1 (padding filled with NaN, or False for booleans). Arrays may carry
    trailing dimensions after (P, N).
    """
    valid = np.asarray(valid, dtype=bool)
    n_rows = valid.shape[0]
    n_new = valid.sum(axis=1)
    new_width = int(n_new.max(initial=0))
    rows, cols = np.nonzero(valid)
    new_cols = np.cumsum(valid, axis=1)[rows, cols] - 1
    mask = np.zeros((n_rows, new_width), dtype=bool)
    mask[rows, new_cols] = True
    out = []
    for arr in arrays:
        a = np.asarray(arr)
        fill = False if a.dtype == bool else np.nan
        dtype = a.dtype if a.dtype == bool else float
        new = np.full((n_rows, new_width, *a.shape[2:]), fill, dtype=dtype)
        new[rows, new_cols] = a[rows, cols]
        out.append(new)
    return mask, out
