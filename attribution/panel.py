"""From long input rows to the dense arrays of :class:`~attribution.kernel.Panel`.

Rows are first given integer codes — portfolio ``_p``, calendar period ``_t`` and asset
class ``_k`` — so that validation (duplicate keys, weight sums) and the array fill are
integer operations rather than joins on text and dates. ``_t`` / ``_k`` are −1 where a
date is off the calendar or a class is unknown; such rows are reported by
:mod:`attribution.validate` and never reach the arrays.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import polars as pl

from attribution.calendar import Calendar
from attribution.kernel import Panel

PID = "portfolio_id"


@dataclass(frozen=True)
class Codes:
    """The code books of one shard: its portfolios, the classes, and calendar day numbers."""

    portfolio_ids: tuple[str, ...]
    classes: tuple[str, ...]
    start_days: np.ndarray  # (T,) day number of each period's start
    end_days: np.ndarray  # (T,) day number of each period's end

    @property
    def n_periods(self) -> int:
        return len(self.end_days)


def make_codes(portfolio_ids: list[str], classes: list[str], calendar: Calendar) -> Codes:
    """Code books for a shard; ids and classes are sorted so codes follow text order."""
    frame = calendar.frame()
    return Codes(
        portfolio_ids=tuple(sorted(portfolio_ids)),
        classes=tuple(sorted(classes)),
        start_days=frame["period_start"].cast(pl.Int32).to_numpy().astype(np.int64),
        end_days=frame["period_end"].cast(pl.Int32).to_numpy().astype(np.int64),
    )


def _lookup(days: np.ndarray, allowed: np.ndarray) -> np.ndarray:
    """Position of each day number in the sorted ``allowed`` array, −1 where absent."""
    if len(days) == 0:
        return np.zeros(0, dtype=np.int64)
    pos = np.searchsorted(allowed, days)
    pos_c = np.minimum(pos, len(allowed) - 1)
    return np.where(allowed[pos_c] == days, pos_c, -1)


def encode(frame: pl.DataFrame, codes: Codes, *, date: str | None, holdings: bool) -> pl.DataFrame:
    """Add ``_p`` (portfolio), ``_t`` (period) and ``_k`` (class) integer codes.

    For holdings, ``_t`` is the period the weights are held over (as_of = its start), and
    the calendar's last period_end maps to T (weights for a period not yet in the calendar).
    For returns, ``_t`` is the period ending on ``period_end``.
    """
    out = frame
    if PID in frame.columns:
        out = out.with_columns(
            _p=pl.col(PID).cast(pl.Enum(list(codes.portfolio_ids))).to_physical().cast(pl.Int64)
        )
    if "asset_class" in frame.columns:
        known = pl.col("asset_class").is_in(list(codes.classes))
        out = out.with_columns(
            _k=pl.when(known)
            .then(
                pl.col("asset_class")
                .cast(pl.Enum(list(codes.classes)), strict=False)
                .to_physical()
                .cast(pl.Int64)
            )
            .otherwise(-1)
        )
    if date is not None:
        allowed = np.append(codes.start_days, codes.end_days[-1]) if holdings else codes.end_days
        days = out[date].cast(pl.Int32).fill_null(-(2**31)).to_numpy().astype(np.int64)
        out = out.with_columns(_t=pl.Series(_lookup(days, allowed), dtype=pl.Int64))
    return out


def duplicate_mask(frame: pl.DataFrame, n_t: int, n_k: int, *, with_class: bool) -> np.ndarray:
    """Rows whose (portfolio, period[, class]) key occurs more than once.

    Counting on a dense integer key (``np.bincount``) is linear in the rows, which is what
    keeps the duplicate check cheap on millions of holdings rows.
    """
    p = frame["_p"].to_numpy()
    t = frame["_t"].to_numpy()
    valid = t >= 0
    key = p * n_t + t
    if with_class:
        k = frame["_k"].to_numpy()
        valid &= k >= 0
        key = key * n_k + k
    key = np.where(valid, key, 0)
    if len(key) == 0:
        return np.zeros(0, dtype=bool)
    counts = np.bincount(key[valid], minlength=int(key.max()) + 1)
    return valid & (counts[key] > 1)


def build_panel(
    codes: Codes,
    *,
    holdings: pl.DataFrame,
    policy: pl.DataFrame,
    index_returns: pl.DataFrame,
    segments: pl.DataFrame | None,
    reported: pl.DataFrame | None,
    windows: pl.DataFrame,
    policy_set: np.ndarray,
    policy_weights: np.ndarray,
) -> Panel:
    """Fill the dense arrays of a shard from validated, encoded rows.

    ``windows`` has ``_p``, ``first_index``, ``last_index``; ``policy_set`` (P, T) holds the
    row of ``policy_weights`` (sets × K) in force each period (−1 where none).
    """
    n_p, n_t, n_k = len(codes.portfolio_ids), codes.n_periods, len(codes.classes)
    active = np.zeros((n_p, n_t), dtype=bool)
    wp = windows["_p"].to_numpy()
    first = np.full(n_p, n_t, dtype=np.int64)
    last = np.full(n_p, -1, dtype=np.int64)
    first[wp] = windows["first_index"].to_numpy()
    last[wp] = windows["last_index"].to_numpy()
    t_range = np.arange(n_t)
    active = (t_range[None, :] >= first[:, None]) & (t_range[None, :] <= last[:, None])

    h = holdings.filter(pl.col("_t") < n_t)
    hp, ht, hk = h["_p"].to_numpy(), h["_t"].to_numpy(), h["_k"].to_numpy()
    hw = h["weight"].to_numpy()
    cell = hp * n_t + ht
    sums = np.bincount(cell, weights=hw, minlength=n_p * n_t)
    holding = np.zeros((n_p, n_t), dtype=bool)
    holding[hp, ht] = True
    holding &= active
    held = np.full((n_p, n_t, n_k), np.nan)
    held[holding] = 0.0
    keep = holding[hp, ht]
    held[hp[keep], ht[keep], hk[keep]] = hw[keep] / sums[cell[keep]]

    universe = np.zeros((n_p, n_k), dtype=bool)
    universe[hp, hk] = True
    universe[policy["_p"].to_numpy(), policy["_k"].to_numpy()] = True

    q = np.zeros((n_p, n_t, n_k))
    in_force = policy_set >= 0
    q[in_force] = policy_weights[policy_set[in_force]]

    index = np.zeros((n_t, n_k))
    index[index_returns["_t"].to_numpy(), index_returns["_k"].to_numpy()] = index_returns[
        "return"
    ].to_numpy()

    segment = np.full((n_p, n_t, n_k), np.nan)
    has_segments = np.zeros(n_p, dtype=bool)
    if segments is not None and segments.height:
        sp = segments["_p"].to_numpy()
        segment[sp, segments["_t"].to_numpy(), segments["_k"].to_numpy()] = segments[
            "return"
        ].to_numpy()
        has_segments[sp] = True
    rep = np.full((n_p, n_t), np.nan)
    has_reported = np.zeros(n_p, dtype=bool)
    if reported is not None and reported.height:
        rp = reported["_p"].to_numpy()
        rep[rp, reported["_t"].to_numpy()] = reported["return"].to_numpy()
        has_reported[rp] = True
    return Panel(
        portfolio_ids=codes.portfolio_ids,
        classes=codes.classes,
        active=active,
        holding=holding,
        held=held,
        universe=universe,
        policy=q,
        index=index,
        segment=segment,
        has_segments=has_segments,
        reported=rep,
        has_reported=has_reported,
    )
