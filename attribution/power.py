"""How long a record must be to detect timing skill, and the smallest skill a record can detect.

Three ways to state a skill, each with the test the tool runs on it:

* hit rate h — the share of periods whose direction the manager calls right, in both up and
  down markets (P1 = P2 = h). Tested by the exact hypergeometric test of ``merton_accuracy``;
  power by exact enumeration of both binomial counts.
* correlation ρ between exposure and the next period's market excess return, tested by
  ``exposure_regression``; power from Fisher's z: atanh(ρ̂)·sqrt(n − 3) ≈ N(atanh ρ · sqrt(n − 3), 1)
  (Fisher 1921; the standard sample-size rule for a correlation, e.g. Cohen 1988 [from memory]).
* mean timing return μ with volatility σ of the per-period timing effect, tested by
  ``timing_mean``; power from the information-ratio rule t ≈ IR·sqrt(years), so
  years = ((z_{1−α} + z_{power}) / IR)² (Grinold & Kahn; METHODS §9 check values: IR = 0.5 needs
  10.82 years for 50 % power, 24.73 for 80 %).

All tests one-sided at level α (default 5 %); "needed" means the target power (default 80 %).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from scipy.special import gammaln, ndtr, ndtri, xlog1py, xlogy

# scipy.special rather than scipy.stats: the same functions (norm.sf(x) is ndtr(−x),
# norm.isf(q) is −ndtri(q), norm.ppf(p) is ndtri(p)) at a fraction of the import time.


def binomial_pmf(k: np.ndarray, n: int, p: float) -> np.ndarray:
    """P(X = k) for X ~ Bin(n, p): exp(ln C(n, k) + k ln p + (n − k) ln(1 − p)), with
    0·ln 0 = 0 (so p = 0 or 1 give the degenerate law). Checked against scipy.stats.binom."""
    k = np.asarray(k, dtype=float)
    log_choose = gammaln(n + 1.0) - gammaln(k + 1.0) - gammaln(n - k + 1.0)
    return np.exp(log_choose + xlogy(k, p) + xlog1py(n - k, -p))


# Records longer than this are not searched; the answer is reported as unreachable.
MAX_PERIODS = 1_000_000
# Above this many decisions the exact enumeration (O(n²) cells) gives way to its normal limit.
EXACT_LIMIT = 4_000


def hit_rate_power(
    n_obs: int, hit_rate: float, *, alpha: float = 0.05, up_share: float = 0.5
) -> float:
    """Exact power of the one-sided hypergeometric (Henriksson–Merton) test.

    The record has N1 = round(n (1 − up_share)) down markets and N2 = n − N1 up markets. A
    manager right with probability h in each (P1 = P2 = h) makes n1 ~ Bin(N1, h) correct
    bearish calls and n2 ~ Bin(N2, 1 − h) wrong bearish calls. The test rejects when the
    hypergeometric upper tail P(X ≥ n1 | N1, N2, n1 + n2) ≤ α (Henriksson & Merton 1981,
    METHODS §5.3). Power = Σ_{n1, n2} P(n1) P(n2) 1{reject}, enumerated exactly (METHODS §9
    check values: h = 0.60 gives 0.35 / 0.68 / 0.92 / 0.996 at n = 60 / 120 / 240 / 480);
    above ``EXACT_LIMIT`` decisions, the normal limit of the same test.
    """
    n = int(n_obs)
    n_down = round(n * (1.0 - up_share))
    n_up = n - n_down
    if n_down < 1 or n_up < 1:
        return 0.0
    if n > EXACT_LIMIT:
        return _normal_hit_rate_power(n, hit_rate, alpha=alpha, up_share=up_share)
    critical = _critical_counts(n_down, n_up, alpha)
    k1 = np.arange(n_down + 1)
    k2 = np.arange(n_up + 1)
    p1 = binomial_pmf(k1, n_down, hit_rate)
    p2 = binomial_pmf(k2, n_up, 1.0 - hit_rate)
    reject = k1[:, None] >= critical[k1[:, None] + k2[None, :]]
    return float(np.clip((p1[:, None] * p2[None, :] * reject).sum(), 0.0, 1.0))


def _normal_hit_rate_power(n: int, hit_rate: float, *, alpha: float, up_share: float) -> float:
    """Large-sample power of the same test (normal limit with a continuity correction).

    With N1 down and N2 up markets, D = n1 − n N1/N (n the bearish calls) has mean
    N1 N2 (2h − 1)/N and variance h(1 − h) N1 N2 / N under the alternative; the test rejects
    when D ≥ z_{1−α} sd0 + 1/2, sd0² = n N1 N2 (N − n) / (N² (N − 1)) the null hypergeometric
    variance at the expected number of calls. Within 0.006 of exact enumeration at n = 1,000 to
    4,000 (h = 0.51 to 0.53, largest gap 0.0053 at n = 2,000, h = 0.52; tests/unit).
    """
    n_down = n * (1.0 - up_share)
    n_up = n - n_down
    calls = n_down * hit_rate + n_up * (1.0 - hit_rate)
    sd0 = math.sqrt(calls * n_down * n_up * (n - calls) / (n * n * (n - 1.0)))
    shift = n_down * n_up * (2.0 * hit_rate - 1.0) / n
    sd1 = math.sqrt(hit_rate * (1.0 - hit_rate) * n_down * n_up / n)
    critical = -ndtri(alpha) * sd0 + 0.5
    if sd1 == 0.0:
        return float(shift >= critical)
    return float(ndtr(-(critical - shift) / sd1))


@lru_cache(maxsize=256)
def _critical_counts(n_down: int, n_up: int, alpha: float) -> np.ndarray:
    """For every number of bearish calls n, the least n1 whose upper tail is ≤ α.

    Upper tails come from a reverse cumulative sum of the hypergeometric probabilities
    (computed from log-gamma terms), one row per n; n1 beyond the support never rejects.
    """
    total = n_down + n_up
    calls = np.arange(total + 1)[:, None]
    x = np.arange(n_down + 1)[None, :]
    inside = (x >= np.maximum(0, calls - n_up)) & (x <= np.minimum(n_down, calls))
    xs = np.where(inside, x, 0)
    log_pmf = (
        _log_choose(n_down, xs)
        + _log_choose(n_up, np.where(inside, calls - xs, 0))
        - _log_choose(total, calls)
    )
    pmf = np.where(inside, np.exp(log_pmf), 0.0)
    upper = np.cumsum(pmf[:, ::-1], axis=1)[:, ::-1]
    ok = inside & (upper <= alpha * (1.0 + 1e-12))
    first = np.where(ok.any(axis=1), ok.argmax(axis=1), n_down + 1)
    return first


def _log_choose(n: np.ndarray | int, k: np.ndarray | int) -> np.ndarray:
    n = np.asarray(n, dtype=float)
    k = np.asarray(k, dtype=float)
    return gammaln(n + 1.0) - gammaln(k + 1.0) - gammaln(n - k + 1.0)


@lru_cache(maxsize=256)
def periods_needed_hit_rate(
    hit_rate: float, *, power: float = 0.8, alpha: float = 0.05
) -> int | None:
    """Fewest decisions (even, half up markets) at which the exact test reaches ``power``.

    Power rises with n but not strictly (the test is discrete), so the answer is the first even
    n found by doubling then bisecting on the power curve; None when the hit rate is 0.5 or less,
    or the target needs more than ``MAX_PERIODS``.
    """
    if hit_rate <= 0.5:
        return None
    lo, hi = 2, 4
    while hit_rate_power(hi, hit_rate, alpha=alpha) < power:
        lo, hi = hi, hi * 2
        if hi > MAX_PERIODS:
            return None
    while hi - lo > 2:
        mid = (lo + hi) // 4 * 2
        if hit_rate_power(mid, hit_rate, alpha=alpha) >= power:
            hi = mid
        else:
            lo = mid
    return hi


@lru_cache(maxsize=4096)
def detectable_hit_rate(n_obs: int, *, power: float = 0.8, alpha: float = 0.05) -> float:
    """Smallest hit rate h that the exact test detects with ``power`` in ``n_obs`` decisions.

    Bisection on h in (0.5, 1] (power rises with h at fixed n) to 1e-4; NaN if even a
    perfect timer (h = 1) would not reach the power.
    """
    n = int(n_obs)
    if n < 2 or hit_rate_power(n, 1.0, alpha=alpha) < power:
        return float("nan")
    lo, hi = 0.5, 1.0
    while hi - lo > 1e-4:
        mid = 0.5 * (lo + hi)
        if hit_rate_power(n, mid, alpha=alpha) >= power:
            hi = mid
        else:
            lo = mid
    return hi


def _z_sum(power: float, alpha: float) -> float:
    # z_{1−α} + z_{power}: the drift a one-sided normal test needs to reach the power.
    return float(-ndtri(alpha) + ndtri(power))


def detectable_correlation(n_obs: np.ndarray | int, *, power: float = 0.8, alpha: float = 0.05):
    """Smallest correlation detectable in n observations: tanh((z_{1−α} + z_power)/sqrt(n − 3)).

    Fisher's z approximation; NaN for n ≤ 3.
    """
    n = np.asarray(n_obs, dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        out = np.tanh(_z_sum(power, alpha) / np.sqrt(n - 3.0))
    return np.where(n > 3, out, np.nan)


def periods_needed_correlation(
    correlation: float, *, power: float = 0.8, alpha: float = 0.05
) -> int | None:
    """Observations needed to detect correlation ρ: n = ((z_{1−α} + z_power)/atanh ρ)² + 3."""
    if not 0.0 < correlation < 1.0:
        return None
    return math.ceil((_z_sum(power, alpha) / math.atanh(correlation)) ** 2 + 3.0)


def periods_needed_timing_return(
    timing_return_ann: float,
    timing_volatility_ann: float,
    *,
    periods_per_year: int,
    power: float = 0.8,
    alpha: float = 0.05,
) -> int | None:
    """Periods needed to detect a mean timing return μ (annual) with volatility σ (annual).

    Information-ratio rule: IR = μ/σ, years = ((z_{1−α} + z_power)/IR)², periods = ⌈years ×
    periods per year⌉ (METHODS §9).
    """
    if timing_return_ann <= 0 or timing_volatility_ann <= 0:
        return None
    ir = timing_return_ann / timing_volatility_ann
    years = (_z_sum(power, alpha) / ir) ** 2
    return math.ceil(years * periods_per_year - 1e-9)


def detectable_timing_return(
    std_error: np.ndarray | float,
    *,
    periods_per_year: int,
    power: float = 0.8,
    alpha: float = 0.05,
):
    """Smallest mean timing return (annualised, arithmetic) the record can detect.

    The one-sided test of the mean timing effect rejects with the target power when the true
    per-period mean is (z_{1−α} + z_power) standard errors; ``std_error`` is the Newey–West
    error of the record's mean, so this is the information-ratio rule applied to the record at
    hand. Annualised by multiplying by the periods per year.
    """
    return _z_sum(power, alpha) * np.asarray(std_error, dtype=float) * periods_per_year


@dataclass(frozen=True, slots=True, kw_only=True)
class PowerSummary:
    """Answer of the ``tiltaudit power`` command (one-sided tests at ``alpha``).

    For a stated skill, the periods needed to detect it with ``power`` (None when not given or
    unreachable): periods_needed_hit_rate, periods_needed_correlation,
    periods_needed_timing_return. For a stated record length ``periods``, the smallest skill
    detectable with ``power``: detectable_hit_rate, detectable_correlation,
    detectable_timing_return_ann (needs the timing volatility).
    """

    periods: int | None
    power: float
    alpha: float
    periods_per_year: int
    hit_rate: float | None
    correlation: float | None
    timing_return_ann: float | None
    timing_volatility_ann: float | None
    periods_needed_hit_rate: int | None
    periods_needed_correlation: int | None
    periods_needed_timing_return: int | None
    detectable_hit_rate: float | None
    detectable_correlation: float | None
    detectable_timing_return_ann: float | None


def power_summary(
    *,
    periods: int | None = None,
    hit_rate: float | None = None,
    correlation: float | None = None,
    timing_return_ann: float | None = None,
    timing_volatility_ann: float | None = None,
    periods_per_year: int = 12,
    power: float = 0.8,
    alpha: float = 0.05,
) -> PowerSummary:
    """Periods needed for each stated skill, and the smallest skill a record of ``periods`` detects.

    Hit rate: exact enumeration of the hypergeometric test's power (balanced up and down
    markets). Correlation: Fisher's z. Timing return: the information-ratio rule, which needs
    the timing effect's annual volatility (for the record length it gives the smallest
    detectable return as (z_{1−α} + z_power) σ / sqrt(years)).
    """
    detect_ret = None
    if periods is not None and timing_volatility_ann is not None:
        years = periods / periods_per_year
        detect_ret = _z_sum(power, alpha) * timing_volatility_ann / math.sqrt(years)
    return PowerSummary(
        periods=periods,
        power=power,
        alpha=alpha,
        periods_per_year=periods_per_year,
        hit_rate=hit_rate,
        correlation=correlation,
        timing_return_ann=timing_return_ann,
        timing_volatility_ann=timing_volatility_ann,
        periods_needed_hit_rate=(
            None
            if hit_rate is None
            else periods_needed_hit_rate(hit_rate, power=power, alpha=alpha)
        ),
        periods_needed_correlation=(
            None
            if correlation is None
            else periods_needed_correlation(correlation, power=power, alpha=alpha)
        ),
        periods_needed_timing_return=(
            None
            if timing_return_ann is None or timing_volatility_ann is None
            else periods_needed_timing_return(
                timing_return_ann,
                timing_volatility_ann,
                periods_per_year=periods_per_year,
                power=power,
                alpha=alpha,
            )
        ),
        detectable_hit_rate=(
            None
            if periods is None
            else _none_if_nan(detectable_hit_rate(periods, power=power, alpha=alpha))
        ),
        detectable_correlation=(
            None
            if periods is None
            else _none_if_nan(float(detectable_correlation(periods, power=power, alpha=alpha)))
        ),
        detectable_timing_return_ann=detect_ret,
    )


def _none_if_nan(value: float) -> float | None:
    return None if math.isnan(value) else value
