"""Input frames for the timing tests, built from plain arrays (tests only).

``roster_frames`` turns class index returns, a riskless series and per-portfolio weight paths
into the four frames :func:`attribution.timing.evaluate_timing` reads — ``effects``,
``series``, ``index_returns`` and ``riskless`` — with the engine's columns (DESIGN §5) and the
Brinson–Fachler formulas of DESIGN §3 written out directly:

    B_t = Σ_i q_i b_{t,i}
    static allocation (s_i − q_i)(b_{t,i} − B_t),  timing (w_{t,i} − s_i)(b_{t,i} − B_t),
    selection w_{t,i}(r_{t,i} − b_{t,i}),  R_t = Σ_i w_{t,i} r_{t,i},

with the static weight s the mean weight over the portfolio's own periods (the default window
mode) and segment returns equal to index returns unless given. ``french_market`` reads the
monthly Fama–French factors shipped with ``arch`` (1926-07 … 2018-11): equity = Mkt-RF + RF and
cash = RF, in decimals, with month-end dates rebuilt from the yyyymm integers in the index
(pandas 3 parses that index as nanoseconds since 1970).
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Sequence

import numpy as np
import polars as pl


def month_ends(first_year: int, first_month: int, n: int) -> list[dt.date]:
    """n consecutive calendar month ends starting at first_year-first_month."""
    out = []
    for k in range(n):
        year = first_year + (first_month - 1 + k) // 12
        month = (first_month - 1 + k) % 12 + 1
        nxt = dt.date(year + (month == 12), month % 12 + 1, 1)
        out.append(nxt - dt.timedelta(days=1))
    return out


def french_market() -> tuple[list[dt.date], np.ndarray, np.ndarray]:
    """(month ends, equity return, riskless return) from ``arch.data.frenchdata``, decimals."""
    from arch.data import frenchdata

    data = frenchdata.load()
    yyyymm = np.asarray(data.index.asi8, dtype=np.int64)
    dates = [_month_end(int(v) // 100, int(v) % 100) for v in yyyymm]
    excess = data["Mkt-RF"].to_numpy() / 100.0
    rf = data["RF"].to_numpy() / 100.0
    return dates, excess + rf, rf


def _month_end(year: int, month: int) -> dt.date:
    return month_ends(year, month, 1)[0]


def drift_between(decided: np.ndarray, is_decision: np.ndarray, returns: np.ndarray) -> np.ndarray:
    """Weights held each period: decided at holdings dates, buy-and-hold drifted in between.

    decided : (P, T, K) weights (read only where ``is_decision``); is_decision : (P, T) or (T,);
    returns : (T, K) class returns. w_t = w_{t−1} (1 + r_{t−1}) / (1 + Σ w_{t−1} r_{t−1}).
    """
    w = np.array(decided, dtype=float)
    dec = np.broadcast_to(is_decision, w.shape[:2])
    for t in range(1, w.shape[1]):
        grown = w[:, t - 1] * (1.0 + returns[t - 1])
        grown = grown / grown.sum(axis=1, keepdims=True)
        w[:, t] = np.where(dec[:, t, None], w[:, t], grown)
    return w


def roster_frames(
    dates: Sequence[dt.date],
    classes: Sequence[str],
    index_returns: np.ndarray,
    riskless: np.ndarray,
    weights: np.ndarray,
    policy: np.ndarray,
    *,
    start: Sequence[int] | None = None,
    n_periods: Sequence[int] | None = None,
    is_decision: np.ndarray | None = None,
    segment_returns: np.ndarray | None = None,
    portfolio_ids: Sequence[str] | None = None,
) -> dict[str, pl.DataFrame]:
    """The four frames for a roster of P portfolios over a calendar of C periods.

    index_returns : (C, K); riskless : (C,); weights : (P, T, K) held over each of the
    portfolio's periods (period j is calendar period start[p] + j); policy : (K,) or (P, K);
    is_decision : (P, T) True at real holdings dates (default all True); segment_returns :
    (P, T, K) or None (then equal to the index returns).
    """
    dates = list(dates)
    b_cal = np.asarray(index_returns, dtype=float)
    rf_cal = np.asarray(riskless, dtype=float)
    w_all = np.asarray(weights, dtype=float)
    n_port, width, n_cls = w_all.shape
    start_a = np.zeros(n_port, dtype=int) if start is None else np.asarray(start, dtype=int)
    n_a = np.full(n_port, width) if n_periods is None else np.asarray(n_periods, dtype=int)
    ids = [f"P{p:05d}" for p in range(n_port)] if portfolio_ids is None else list(portfolio_ids)
    q = np.broadcast_to(np.asarray(policy, dtype=float), (n_port, n_cls))
    decision = (
        np.ones((n_port, width), dtype=bool)
        if is_decision is None
        else np.broadcast_to(np.asarray(is_decision, dtype=bool), (n_port, width))
    )

    t_idx = np.arange(width)
    mask = t_idx[None, :] < n_a[:, None]
    cal = np.where(mask, start_a[:, None] + t_idx[None, :], 0)
    b = b_cal[cal]  # (P, T, K)
    r = b if segment_returns is None else np.asarray(segment_returns, dtype=float)
    big_b = np.einsum("pk,ptk->pt", q, b)
    s = (np.where(mask[..., None], w_all, 0.0).sum(axis=1) / n_a[:, None])[:, None, :]
    s = np.broadcast_to(s, w_all.shape)
    rel = b - big_b[..., None]
    static_eff = (s - q[:, None, :]) * rel
    timing_eff = (w_all - s) * rel
    selection = w_all * (r - b)
    port = np.einsum("ptk,ptk->pt", w_all, r)

    pp, tt = np.nonzero(mask)
    date_arr = np.array(dates, dtype="datetime64[D]")
    period_end = date_arr[cal[pp, tt]]
    prev_cal = cal[pp, tt] - 1
    first_gap = date_arr[1] - date_arr[0] if date_arr.size > 1 else np.timedelta64(31, "D")
    period_start = np.where(
        prev_cal >= 0, date_arr[np.maximum(prev_cal, 0)], date_arr[0] - first_gap
    )
    id_arr = np.array(ids, dtype=object)

    eff = pl.DataFrame(
        {
            "portfolio_id": np.repeat(id_arr[pp], n_cls).tolist(),
            "period_end": np.repeat(period_end, n_cls),
            "asset_class": np.tile(np.array(classes, dtype=object), pp.size).tolist(),
            "weight": w_all[pp, tt].ravel(),
            "static_weight": s[pp, tt].ravel(),
            "policy_weight": q[pp][:, :].ravel(),
            "index_return": b[pp, tt].ravel(),
            "segment_return": r[pp, tt].ravel(),
            "policy_return": np.repeat(big_b[pp, tt], n_cls),
            "static_allocation": static_eff[pp, tt].ravel(),
            "timing": timing_eff[pp, tt].ravel(),
            "selection": selection[pp, tt].ravel(),
            "interaction": pl.Series([None] * (pp.size * n_cls), dtype=pl.Float64),
            "is_drifted": np.repeat(~decision[pp, tt], n_cls),
        }
    ).with_columns(pl.col("period_end").cast(pl.Date))

    series = pl.DataFrame(
        {
            "portfolio_id": id_arr[pp].tolist(),
            "period_end": period_end,
            "period_start": period_start,
            "portfolio_return": port[pp, tt],
            "computed_return": port[pp, tt],
            "policy_return": big_b[pp, tt],
            "active_return": port[pp, tt] - big_b[pp, tt],
            "static_allocation": static_eff[pp, tt].sum(axis=1),
            "timing": timing_eff[pp, tt].sum(axis=1),
            "selection": selection[pp, tt].sum(axis=1),
            "interaction": pl.Series([None] * pp.size, dtype=pl.Float64),
            "residual": np.zeros(pp.size),
            "is_drifted": ~decision[pp, tt],
        }
    ).with_columns(pl.col("period_end", "period_start").cast(pl.Date))

    index_frame = pl.DataFrame(
        {
            "period_end": np.repeat(date_arr, n_cls),
            "asset_class": np.tile(np.array(classes, dtype=object), date_arr.size).tolist(),
            "return": b_cal.ravel(),
        }
    ).with_columns(pl.col("period_end").cast(pl.Date))
    riskless_frame = pl.DataFrame({"period_end": date_arr, "return": rf_cal}).with_columns(
        pl.col("period_end").cast(pl.Date)
    )
    return {
        "effects": eff,
        "series": series,
        "index_returns": index_frame,
        "riskless": riskless_frame,
    }


def coin_flip_weights(
    rng: np.random.Generator, n_port: int, n_periods: int, *, low: float, high: float
) -> np.ndarray:
    """Equity weights drawn low/high with probability 1/2 each period, independently."""
    return np.where(rng.random((n_port, n_periods)) < 0.5, low, high)


def sticky_coin_weights(
    rng: np.random.Generator, n_port: int, n_periods: int, *, low: float, high: float, switch: float
) -> np.ndarray:
    """Coin-flippers with persistent tilts: a random start, then each period the weight switches
    between low and high with probability ``switch`` (mean tilt length 1/switch periods),
    independently of everything."""
    start = rng.random((n_port, 1)) < 0.5
    flips = rng.random((n_port, n_periods)) < switch
    flips[:, 0] = False
    state = start ^ (np.cumsum(flips, axis=1) % 2 == 1)
    return np.where(state, high, low)


def hit_rate_weights(
    rng: np.random.Generator,
    market_up: np.ndarray,
    n_port: int,
    *,
    hit_rate: float,
    low: float,
    high: float,
) -> np.ndarray:
    """Equity weights of timers who call the market's direction right with probability h."""
    right = rng.random((n_port, market_up.size)) < hit_rate
    bullish = np.where(right, market_up[None, :], ~market_up[None, :])
    return np.where(bullish, high, low)


def two_asset(equity_weight: np.ndarray) -> np.ndarray:
    """(P, T) equity weights → (P, T, 2) weights over (cash, equity), in sorted class order."""
    w = np.asarray(equity_weight, dtype=float)
    return np.stack([1.0 - w, w], axis=-1)
