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


def log_ratio_coefficient(a: pl.Expr, b: pl.Expr) -> pl.Expr:
    """Cariño's k(a, b) = [ln(1+a) − ln(1+b)] / (a − b), with its limit 1/(1+b) at a = b.

    Written as log1p(x)/x / (1+b) with x = (a − b)/(1+b), which keeps full precision when a
    and b are close (a second-order series below |x| < 1e-9).
    """
    x = (a - b) / (1.0 + b)
    ratio = pl.when(x.abs() < _SMALL).then(1.0 - x / 2.0 + x * x / 3.0).otherwise(x.log1p() / x)
    return ratio / (1.0 + b)


def _expm1(x: pl.Expr) -> pl.Expr:
    # polars has no expm1; exp(x) - 1 would lose the digits that matter near R = B.
    return x.map_batches(np.expm1, return_dtype=pl.Float64, is_elementwise=True)


def _menchero_m(rc: pl.Expr, bc: pl.Expr, n: pl.Expr) -> pl.Expr:
    """Menchero's M written with expm1 so it is exact near R = B (limit (1+B)^{(T−1)/T})."""
    lam = ((rc - bc) / (1.0 + bc)).log1p()
    shape = pl.when(lam.abs() < 1e-300).then(1.0).otherwise(_expm1(lam) / (n * _expm1(lam / n)))
    return shape * (1.0 + bc) ** ((n - 1.0) / n)


def link_cumulative(
    frame: pl.DataFrame,
    *,
    method: Linking,
    effects: Sequence[str],
    keys: Sequence[str] = ("portfolio_id",),
    order: str = "period_index",
) -> pl.DataFrame:
    """Add ``cum_<effect>`` (the effect linked from the group's first period through this one)
    and ``cum_portfolio_return``, ``cum_policy_return``, ``cum_active_return``.

    ``frame`` has one row per group × period with ``portfolio_return`` (R_t),
    ``policy_return`` (B_t) and the effect columns; a null effect stays null in its
    cumulative column (treated as 0 in the sums, which is exact when a whole column is null).
    The effects must add up to R_t − B_t per period for the totals to reconcile.
    """
    keys = list(keys)
    frame = frame.sort([*keys, order])
    r, b = pl.col("portfolio_return"), pl.col("policy_return")
    grown_r = (1.0 + r).cum_prod().over(keys)
    grown_b = (1.0 + b).cum_prod().over(keys)
    work = frame.with_columns(
        _P=grown_r,
        _Q=grown_b,
        _n=pl.int_range(1, pl.len() + 1).cast(pl.Float64).over(keys),
        _d=r - b,
    ).with_columns(_rc=pl.col("_P") - 1.0, _bc=pl.col("_Q") - 1.0)
    rc, bc, d = pl.col("_rc"), pl.col("_bc"), pl.col("_d")

    def e(name: str) -> pl.Expr:
        return pl.col(name).fill_null(0.0)

    if method == "carino":
        k_t = log_ratio_coefficient(r, b)
        k = log_ratio_coefficient(rc, bc)
        linked = {name: (k_t * e(name)).cum_sum().over(keys) / k for name in effects}
    elif method == "menchero":
        m = _menchero_m(rc, bc, pl.col("_n"))
        s1 = d.cum_sum().over(keys)
        s2 = (d * d).cum_sum().over(keys)
        c = pl.when(s2 > 0).then((rc - bc - m * s1) / s2).otherwise(0.0)
        linked = {
            name: m * e(name).cum_sum().over(keys) + c * (d * e(name)).cum_sum().over(keys)
            for name in effects
        }
    elif method in ("grap", "frongello"):
        p_before = pl.col("_P") / (1.0 + r)
        q = pl.col("_Q")
        linked = {name: q * (e(name) * p_before / q).cum_sum().over(keys) for name in effects}
    else:  # pragma: no cover - options are validated upstream
        msg = f"unknown linking method {method!r}"
        raise ValueError(msg)
    out = work.with_columns(
        **{
            f"cum_{name}": pl.when(pl.col(name).is_null()).then(None).otherwise(expr)
            for name, expr in linked.items()
        },
        cum_portfolio_return=rc,
        cum_policy_return=bc,
        cum_active_return=rc - bc,
    )
    return out.drop("_P", "_Q", "_n", "_d", "_rc", "_bc")
