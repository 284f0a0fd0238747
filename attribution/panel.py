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


#: Largest span of days a direct lookup table may cover (8 bytes a day); longer calendars
#: fall back to binary search.
_MAX_TABLE_DAYS = 1 << 22


def _lookup(days: np.ndarray, allowed: np.ndarray) -> np.ndarray:
    """Position of each day number in the sorted, distinct ``allowed`` array, −1 where absent.

    A table indexed by day number over the calendar's span makes this one gather per row
    (calendars span a few thousand days); binary search is kept for absurdly long spans.
    """
    if len(days) == 0:
        return np.zeros(0, dtype=np.int64)
    low = int(allowed[0])
    span = int(allowed[-1]) - low + 1
    if span > _MAX_TABLE_DAYS:
        pos = np.searchsorted(allowed, days)
        pos_c = np.minimum(pos, len(allowed) - 1)
        return np.where(allowed[pos_c] == days, pos_c, -1)
    # Slot 0 and the last slot stand for every day before and after the span (clipped there).
    table = np.full(span + 2, -1, dtype=np.int64)
    table[allowed - low + 1] = np.arange(len(allowed))
    offset = days.astype(np.int64)
    offset -= low - 1
    return np.take(table, offset, mode="clip")


def run_starts(values: pl.Series) -> np.ndarray:
    """True on the first row of every run of equal values (row 0 included)."""
    starts = np.array(values.ne_missing(values.shift(1)).to_numpy(), dtype=bool)
    if len(starts):
        starts[0] = True
    return starts


def distinct_sorted(values: pl.Series, starts: np.ndarray | None = None) -> list[str]:
    """The distinct non-null texts of ``values``, sorted; only run heads are hashed, which
    makes a column grouped by value (a file sorted by portfolio) cheap. ``starts`` is
    :func:`run_starts` of ``values`` when the caller has it."""
    starts = run_starts(values) if starts is None else starts
    heads = values.filter(pl.Series(starts)).drop_nulls()
    return sorted(heads.unique().to_list())


def _portfolio_codes(
    ids: pl.Series, book: tuple[str, ...], starts: np.ndarray | None = None
) -> pl.Series:
    """Position of each id in ``book`` (which must hold every id), as Int64.

    Only the first row of each run of equal ids is looked up; the other rows copy its code.
    """
    if ids.null_count() or len(ids) == 0:
        return ids.cast(pl.Enum(list(book))).to_physical().cast(pl.Int64).rechunk()
    starts = run_starts(ids) if starts is None else starts
    heads = ids.filter(pl.Series(starts)).cast(pl.Enum(list(book))).to_physical()
    first = np.flatnonzero(starts)
    lengths = np.diff(first, append=len(starts))
    return pl.Series(np.repeat(heads.cast(pl.Int64).to_numpy(), lengths), dtype=pl.Int64)


def encode(
    frame: pl.DataFrame,
    codes: Codes,
    *,
    date: str | None,
    holdings: bool,
    runs: np.ndarray | None = None,
) -> pl.DataFrame:
    """Add ``_p`` (portfolio), ``_t`` (period) and ``_k`` (class) integer codes.

    For holdings, ``_t`` is the period the weights are held over (as_of = its start), and
    the calendar's last period_end maps to T (weights for a period not yet in the calendar).
    For returns, ``_t`` is the period ending on ``period_end``. An empty or unknown class,
    or an empty or off-calendar date, gets −1. ``runs`` is :func:`run_starts` of the
    portfolio column when the caller already has it.
    """
    # Codes are built as one contiguous chunk each, so that every later numpy view is free.
    added: dict[str, pl.Series] = {}
    if PID in frame.columns:
        added["_p"] = _portfolio_codes(frame[PID], codes.portfolio_ids, runs)
    if "asset_class" in frame.columns:
        # A non-strict cast leaves unknown classes (and empty ones) null.
        physical = (
            frame["asset_class"].cast(pl.Enum(list(codes.classes)), strict=False).to_physical()
        )
        if physical.null_count():
            added["_k"] = physical.cast(pl.Int64).fill_null(-1).rechunk()
        else:
            added["_k"] = pl.Series(physical.rechunk().to_numpy().astype(np.int64))
    if date is not None:
        allowed = np.append(codes.start_days, codes.end_days[-1]) if holdings else codes.end_days
        days = frame[date].to_physical().fill_null(-(2**31)).to_numpy()
        added["_t"] = pl.Series(_lookup(days, allowed), dtype=pl.Int64)
    if not added:
        return frame
    return frame.with_columns(**added)


def _strictly_increasing(key: np.ndarray) -> bool:
    return bool(np.all(key[1:] > key[:-1]))


def _held_cells(holding: np.ndarray, n_k: int) -> np.ndarray:
    """(P, T, K) weights to fill: 0 in held periods (classes not listed hold nothing), NaN
    elsewhere."""
    held = np.full((*holding.shape, n_k), np.nan)
    held[holding] = 0.0
    return held


def _is_every_position(target: np.ndarray, size: int) -> bool:
    """Whether ``target`` is exactly 0, 1, …, size − 1: then a scatter into an array of
    ``size`` cells is a reshape (strictly increasing from 0 with ``size`` entries)."""
    return (
        len(target) == size
        and size > 0
        and int(target[0]) == 0
        and int(target[-1]) == size - 1
        and _strictly_increasing(target)
    )


def duplicate_mask(frame: pl.DataFrame, n_t: int, n_k: int, *, with_class: bool) -> np.ndarray:
    """Rows whose (portfolio, period[, class]) key occurs more than once.

    Counting on a dense integer key (``np.bincount``) is linear in the rows, which is what
    keeps the duplicate check cheap on millions of holdings rows; rows already in strictly
    increasing key order (the usual sorted file) cannot repeat a key and skip the count.
    """
    p = frame["_p"].to_numpy()
    t = frame["_t"].to_numpy()
    valid = t >= 0
    key = p * n_t
    key += t
    if with_class:
        k = frame["_k"].to_numpy()
        valid &= k >= 0
        key *= n_k
        key += k
    if len(key) == 0:
        return np.zeros(0, dtype=bool)
    if valid.all() and _strictly_increasing(key):
        return np.zeros(len(key), dtype=bool)
    key = np.where(valid, key, 0)
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

    # Holdings dated on the calendar's last period_end (_t == T) start a period not in it.
    hp, ht, hk = holdings["_p"].to_numpy(), holdings["_t"].to_numpy(), holdings["_k"].to_numpy()
    hw = holdings["weight"].to_numpy()
    inside = ht < n_t
    if not inside.all():
        hp, ht, hk, hw = hp[inside], ht[inside], hk[inside], hw[inside]
    cell = hp * n_t
    cell += ht
    sums = np.bincount(cell, weights=hw, minlength=n_p * n_t)
    holding = np.zeros((n_p, n_t), dtype=bool)
    holding.reshape(-1)[cell] = True
    holding &= active
    shape = (n_p, n_t, n_k)
    keep = holding.reshape(-1)[cell]
    if keep.all():
        target = cell * n_k
        target += hk
        share = sums[cell].astype(np.float64, copy=False)  # bincount of nothing is int
        np.divide(hw, share, out=share)
        if _is_every_position(target, n_p * n_t * n_k):
            # Every cell once, in order (a complete file sorted by portfolio, date, class).
            held = share.reshape(shape)
        else:
            held = _held_cells(holding, n_k)
            held.reshape(-1)[target] = share
    else:
        held = _held_cells(holding, n_k)
        kept = cell[keep]
        held.reshape(-1)[kept * n_k + hk[keep]] = hw[keep] / sums[kept]

    universe = np.zeros((n_p, n_k), dtype=bool)
    universe.reshape(-1)[hp * n_k + hk] = True
    universe[policy["_p"].to_numpy(), policy["_k"].to_numpy()] = True

    in_force = policy_set >= 0
    if in_force.all():
        q = policy_weights[policy_set]
    else:
        q = np.zeros((n_p, n_t, n_k))
        q[in_force] = policy_weights[policy_set[in_force]]

    index = np.zeros((n_t, n_k))
    index[index_returns["_t"].to_numpy(), index_returns["_k"].to_numpy()] = index_returns[
        "return"
    ].to_numpy()

    segment = np.full((n_p, n_t, n_k), np.nan)
    has_segments = np.zeros(n_p, dtype=bool)
    if segments is not None and segments.height:
        sp = segments["_p"].to_numpy()
        flat = sp * n_t
        flat += segments["_t"].to_numpy()
        flat *= n_k
        flat += segments["_k"].to_numpy()
        values = segments["return"].to_numpy()
        if _is_every_position(flat, segment.size):
            segment = np.array(values, dtype=np.float64).reshape(segment.shape)
        else:
            segment.reshape(-1)[flat] = values
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
