"""Linking per-period arithmetic effects into multi-period effects that add up exactly.

Each method turns per-period effects e_{j,t} (with Σ_j e_{j,t} = R_t − B_t) into linked
effects E_j with Σ_j E_j = R − B, where R = Π(1 + R_t) − 1 and B = Π(1 + B_t) − 1. All four
are linear in the effects, so one pass links every effect column, and the cumulative value
at every period (the prefix of the record linked on its own) is available for charts.

* Cariño (1999), logarithmic: k_t = ln((1+R_t)/(1+B_t)) / (R_t − B_t),
  k = ln((1+R)/(1+B)) / (R − B), E_j = Σ_t (k_t / k) e_{j,t}; k_t = 1/(1+R_t) when R_t = B_t.
* Menchero (2000), optimised: M = [(R − B)/T] / [(1+R)^{1/T} − (1+B)^{1/T}],
  α_t = [(R − B − M Σ_s d_s) / Σ_s d_s²] d_t with d_t = R_t − B_t, E_j = Σ_t (M + α_t) e_{j,t};
  M = (1+R)^{(T−1)/T} when R = B.
* GRAP (1997) / Bonafede, Foresti & Matheos (2002): E_j = Σ_t e_{j,t} Π_{s<t}(1+R_s)
  Π_{s>t}(1+B_s).
* Frongello (2002), recursive: G_{j,t} = e_{j,t} Π_{s<t}(1+R_s) + B_t Σ_{s<t} G_{j,s}; the
  recursion unrolls to the GRAP weights, so the cumulative totals are identical and only the
  per-period pieces differ (METHODS §2.4).

The prefix totals of GRAP/Frongello are computed in closed form:
E_j(τ) = Q_τ Σ_{t≤τ} e_{j,t} P_{t−1} / Q_t with P_t = Π_{s≤t}(1+R_s), Q_t = Π_{s≤t}(1+B_s),
which telescopes to P_τ − Q_τ when summed over the effects.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import polars as pl

from attribution._typing import Linking

_SMALL = 1e-9


def log_ratio_coefficient(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Cariño's k(a, b) = [ln(1+a) − ln(1+b)] / (a − b), with its limit 1/(1+b) at a = b.

    Written as log1p(x)/x / (1+b) with x = (a − b)/(1+b), which keeps full precision when a
    and b are close (a second-order series below |x| < 1e-9).
    """
    a = np.asarray(a, dtype=float)
    b = np.asarray(b, dtype=float)
    x = (a - b) / (1.0 + b)
    small = np.abs(x) < _SMALL
    safe = np.where(small, 1.0, x)
    ratio = np.where(small, 1.0 - x / 2.0 + x * x / 3.0, np.log1p(safe) / safe)
    return ratio / (1.0 + b)


def _menchero_m(rc: np.ndarray, bc: np.ndarray, n: np.ndarray) -> np.ndarray:
    """Menchero's M written with expm1 so it stays exact near R = B (limit (1+B)^{(T−1)/T})."""
    n = np.maximum(n, 1.0)
    lam = np.log1p((rc - bc) / (1.0 + bc))
    tiny = np.abs(lam) < 1e-300
    safe = np.where(tiny, 1.0, lam)
    shape = np.where(tiny, 1.0, np.expm1(safe) / (n * np.expm1(safe / n)))
    return shape * (1.0 + bc) ** ((n - 1.0) / n)


def link_arrays(
    portfolio_return: np.ndarray,
    policy_return: np.ndarray,
    effects: np.ndarray,
    active: np.ndarray,
    method: Linking,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Cumulative linked effects for arrays shaped (G, T) and (G, T, J).

    Periods outside ``active`` must carry zero returns and zero effects: they then leave
    every cumulative value unchanged. Returns ``(linked, cum_R, cum_B)`` with ``linked``
    shaped like ``effects``; ``linked[:, t, j]`` is effect j linked from each group's first
    active period through t.
    """
    r = np.where(active, portfolio_return, 0.0)
    b = np.where(active, policy_return, 0.0)
    e = np.where(active[:, :, None], effects, 0.0)
    grown_r = np.cumprod(1.0 + r, axis=1)
    grown_b = np.cumprod(1.0 + b, axis=1)
    rc, bc = grown_r - 1.0, grown_b - 1.0
    if method == "carino":
        k_t = log_ratio_coefficient(r, b)
        k = log_ratio_coefficient(rc, bc)
        linked = np.cumsum(k_t[:, :, None] * e, axis=1) / k[:, :, None]
    elif method == "menchero":
        n = np.cumsum(active, axis=1).astype(float)
        m = _menchero_m(rc, bc, n)
        d = r - b
        s1 = np.cumsum(d, axis=1)
        s2 = np.cumsum(d * d, axis=1)
        with np.errstate(invalid="ignore", divide="ignore"):
            c = np.where(s2 > 0, (rc - bc - m * s1) / np.where(s2 > 0, s2, 1.0), 0.0)
        linked = m[:, :, None] * np.cumsum(e, axis=1) + c[:, :, None] * np.cumsum(
            d[:, :, None] * e, axis=1
        )
    elif method in ("grap", "frongello"):
        before = grown_r / (1.0 + r)
        linked = grown_b[:, :, None] * np.cumsum(e * (before / grown_b)[:, :, None], axis=1)
    else:  # pragma: no cover - options are validated upstream
        msg = f"unknown linking method {method!r}"
        raise ValueError(msg)
    return linked, rc, bc


def link_cumulative(
    frame: pl.DataFrame,
    *,
    method: Linking,
    effects: Sequence[str],
    keys: Sequence[str] = ("portfolio_id",),
    order: str = "period_index",
) -> pl.DataFrame:
    """Frame form of :func:`link_arrays`: add ``cum_<effect>`` and the cumulative returns.

    ``frame`` has one row per group × period with ``portfolio_return`` (R_t),
    ``policy_return`` (B_t) and the effect columns. A null effect stays null in its
    cumulative column and counts as 0 in the sums (exact when a whole column is null).
    Adds ``cum_portfolio_return``, ``cum_policy_return`` and ``cum_active_return``.
    """
    keys = list(keys)
    frame = frame.sort([*keys, order])
    if frame.height == 0:
        return frame.with_columns(
            *(pl.lit(None, dtype=pl.Float64).alias(f"cum_{e}") for e in effects),
            *(
                pl.lit(None, dtype=pl.Float64).alias(c)
                for c in ("cum_portfolio_return", "cum_policy_return", "cum_active_return")
            ),
        )
    pos = frame.select(
        g=pl.struct(keys).rank("dense").cast(pl.Int64) - 1,
        t=pl.int_range(pl.len()).over(keys),
    )
    g = pos["g"].to_numpy()
    t = pos["t"].to_numpy()
    shape = (int(g.max()) + 1, int(t.max()) + 1)
    active = np.zeros(shape, dtype=bool)
    active[g, t] = True
    r = np.zeros(shape)
    b = np.zeros(shape)
    r[g, t] = frame["portfolio_return"].to_numpy()
    b[g, t] = frame["policy_return"].to_numpy()
    e = np.zeros((*shape, len(effects)))
    for j, name in enumerate(effects):
        e[g, t, j] = frame[name].fill_null(0.0).to_numpy()
    linked, rc, bc = link_arrays(r, b, e, active, method)
    cols = {f"cum_{name}": pl.Series(linked[g, t, j]) for j, name in enumerate(effects)}
    out = frame.with_columns(
        **{
            name: pl.when(pl.col(src).is_null()).then(None).otherwise(series)
            for (name, series), src in zip(cols.items(), effects, strict=True)
        },
        cum_portfolio_return=pl.Series(rc[g, t]),
        cum_policy_return=pl.Series(bc[g, t]),
        cum_active_return=pl.Series(rc[g, t] - bc[g, t]),
    )
    return out
