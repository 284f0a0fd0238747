"""The numerical kernel: dense portfolio × period × class arrays for a shard of portfolios.

Everything here is plain numpy on arrays shaped (P, T, K) or (P, T): P portfolios of a
shard, T calendar periods, K asset classes. Periods outside a portfolio's window carry
zeros and are masked out by ``active``. The only Python loop runs over periods (the
buy-and-hold drift is a recursion in time); every step is vectorised across portfolios
and classes.

Formulas (DESIGN §3; sources in the README and in :mod:`attribution.decompose`):

* drift between holdings dates: w_{t+1} = w_t (1 + r_t) / Σ_i w_{i,t} (1 + r_{i,t});
* static weight s: the window mean, or the ex-ante expanding / trailing means;
* Brinson–Fachler: static (s − q)(b − B_t), timing (w − s)(b − B_t), selection w (r − b);
* Brinson–Hood–Beebower: static (s − q) b, timing (w − s) b, selection q (r − b),
  interaction (w − q)(r − b).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from attribution.options import StaticWeight

FloatArray = np.ndarray
BoolArray = np.ndarray


@dataclass(frozen=True)
class Panel:
    """Dense inputs of one shard (see the module docstring for shapes).

    ``held`` is the reported weight on holdings dates (rescaled to sum to 1, zero for
    classes not reported that date) and NaN elsewhere; ``segment`` is NaN where no segment
    return was given; ``reported`` is NaN where no reported return was given.
    """

    portfolio_ids: tuple[str, ...]
    classes: tuple[str, ...]
    active: BoolArray  # (P, T)
    holding: BoolArray  # (P, T)
    held: FloatArray  # (P, T, K)
    universe: BoolArray  # (P, K)
    policy: FloatArray  # (P, T, K)
    index: FloatArray  # (T, K)
    segment: FloatArray  # (P, T, K)
    has_segments: BoolArray  # (P,)
    reported: FloatArray  # (P, T)
    has_reported: BoolArray  # (P,)


@dataclass(frozen=True)
class Effects:
    """Per class-period weights and effects, and the per-period totals of a shard."""

    weight: FloatArray
    static_weight: FloatArray
    policy_return: FloatArray  # (P, T)
    static_allocation: FloatArray
    timing: FloatArray
    selection: FloatArray  # NaN where unknown
    interaction: FloatArray  # NaN where unknown or in the bf form
    computed_return: FloatArray  # (P, T)
    portfolio_return: FloatArray  # (P, T)
    residual: FloatArray  # (P, T)
    totals: dict[str, FloatArray]  # effect name -> (P, T); NaN where unknown
    n_selection_missing: np.ndarray  # (P, T) int
    segment_missing: BoolArray  # (P, T, K) held class without a segment return


def returns_used(panel: Panel) -> FloatArray:
    """The return each class earned: the segment return, the index return where none."""
    return np.where(np.isnan(panel.segment), panel.index[None, :, :], panel.segment)


def drift_weights(panel: Panel, returns: FloatArray | None = None) -> FloatArray:
    """Weights held over every period: the reported weights on holdings dates, and in
    between the buy-and-hold drift with the segment return (index return where missing).

    ``returns`` is :func:`returns_used` when the caller already has it.
    """
    n_p, n_t, n_k = panel.held.shape
    r_used = returns_used(panel) if returns is None else returns
    weights = np.zeros((n_p, n_t, n_k))
    previous = np.zeros((n_p, n_k))
    with np.errstate(invalid="ignore", divide="ignore"):
        for t in range(n_t):
            if t > 0:
                grown = previous * (1.0 + r_used[:, t - 1, :])
                total = grown.sum(axis=1, keepdims=True)
                grown = np.divide(grown, total, out=np.zeros_like(grown), where=total != 0)
            else:
                grown = previous
            current = np.where(panel.holding[:, t, None], panel.held[:, t, :], grown)
            current = np.where(panel.active[:, t, None], current, 0.0)
            weights[:, t, :] = current
            previous = current
    return weights


def static_weights(weights: FloatArray, active: BoolArray, static: StaticWeight) -> FloatArray:
    """The static weight per class and period.

    ``window``: mean over the window; ``expanding``: mean of all earlier periods;
    ``trailing:N``: mean of the previous N periods (fewer at the start). In the ex-ante
    modes the first period uses its own weight. Means are taken of the deviations from the
    first period's weight, so constant weights give a static weight equal to them exactly
    (and a timing effect of exactly zero). Outside the window the static weight is 0.
    """
    # Written in place on one or two (P, T, K) buffers: at roster scale every fresh array
    # costs more in page faults than the arithmetic on it.
    outside = ~active[:, :, None]
    first_t = np.argmax(active, axis=1)  # (P,)
    reference = np.take_along_axis(weights, first_t[:, None, None], axis=1)  # (P, 1, K)
    dev = np.subtract(weights, reference)
    np.copyto(dev, 0.0, where=outside)
    if static.mode == "window":
        n = np.maximum(active.sum(axis=1), 1)[:, None, None]
        mean_dev = dev.sum(axis=1, keepdims=True) / n
        np.copyto(dev, reference + mean_dev)
        np.copyto(dev, 0.0, where=outside)
        return dev
    count = np.cumsum(active, axis=1)[:, :, None].astype(float)
    before = np.cumsum(dev, axis=1)
    before -= dev  # sum over earlier periods of the window
    del dev
    if static.mode == "expanding":
        n_before = count - 1.0
    else:
        assert static.periods is not None
        lag = static.periods
        if lag < before.shape[1]:
            # Drop the sums from more than `lag` periods back (a copy: the ranges overlap).
            before[:, lag:, :] -= before[:, :-lag, :].copy()
        n_before = np.minimum(count - 1.0, float(lag))
    has_before = n_before > 0
    with np.errstate(invalid="ignore", divide="ignore"):
        np.divide(before, n_before, out=before, where=has_before)
    before += reference
    np.copyto(before, weights, where=~has_before)
    np.copyto(before, 0.0, where=outside)
    return before


def _nansum_classes(values: FloatArray, scratch: FloatArray) -> FloatArray:
    """``np.nansum(values, axis=2)`` computed in ``scratch`` (same values, same order)."""
    np.copyto(scratch, values)
    np.copyto(scratch, 0.0, where=np.isnan(scratch))
    return scratch.sum(axis=2)


def decompose_panel(panel: Panel, *, static: StaticWeight, form: str) -> Effects:
    """Weights, static weights and every effect for a shard (DESIGN §3).

    The formulas are those of the module docstring; the arrays are built in place on as few
    (P, T, K) buffers as the outputs need, plus one scratch buffer for the sums.
    """
    act3 = panel.active[:, :, None]
    outside = ~act3
    r = panel.segment
    r_missing = np.isnan(r)
    b = np.broadcast_to(panel.index[None, :, :], r.shape)
    r_used = np.where(r_missing, b, r)
    w = drift_weights(panel, r_used)
    s = static_weights(w, panel.active, static)
    q = np.where(act3, panel.policy, 0.0)
    scratch = np.multiply(q, b)
    big_b = np.where(panel.active, scratch.sum(axis=2), 0.0)
    missing = panel.has_segments[:, None, None] & r_missing & (w != 0.0) & act3
    del r_missing
    unknown = ~panel.has_segments[:, None, None] | missing
    if form == "bf":
        rel = np.subtract(b, big_b[:, :, None], out=scratch)
        static_alloc = np.subtract(s, q)
        static_alloc *= rel
        timing = np.subtract(w, s)
        timing *= rel
        selection = np.subtract(r_used, b)
        selection *= w
        np.copyto(selection, np.nan, where=unknown)
        # Unknown everywhere in this form: one NaN seen through a broadcast (read-only) view.
        interaction = np.broadcast_to(np.nan, w.shape)
    else:
        static_alloc = np.subtract(s, q)
        static_alloc *= b
        timing = np.subtract(w, s)
        timing *= b
        excess = np.subtract(r_used, b)
        selection = np.multiply(q, excess)
        np.copyto(selection, np.nan, where=unknown)
        interaction = np.subtract(w, q)
        interaction *= excess
        del excess
        np.copyto(interaction, np.nan, where=unknown)
    del unknown
    np.copyto(static_alloc, 0.0, where=outside)
    np.copyto(timing, 0.0, where=outside)
    np.multiply(w, r_used, out=scratch)
    computed = np.where(panel.active, scratch.sum(axis=2), 0.0)
    del r_used
    seg_rows = panel.has_segments[:, None]
    totals = {
        "static_allocation": static_alloc.sum(axis=2),
        "timing": timing.sum(axis=2),
        "selection": np.where(seg_rows, _nansum_classes(selection, scratch), np.nan),
        "interaction": (
            np.where(seg_rows, _nansum_classes(interaction, scratch), np.nan)
            if form == "bhb"
            else np.full(big_b.shape, np.nan)
        ),
    }
    del scratch
    use_reported = panel.has_reported[:, None] & ~np.isnan(panel.reported)
    portfolio_return = np.where(use_reported, panel.reported, computed)
    portfolio_return = np.where(panel.active, portfolio_return, 0.0)
    residual = portfolio_return - computed
    totals["residual"] = residual
    return Effects(
        weight=w,
        static_weight=s,
        policy_return=big_b,
        static_allocation=static_alloc,
        timing=timing,
        selection=selection,
        interaction=interaction,
        computed_return=computed,
        portfolio_return=portfolio_return,
        residual=residual,
        totals=totals,
        n_selection_missing=missing.sum(axis=2),
        segment_missing=missing,
    )
