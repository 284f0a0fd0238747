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


def drift_weights(panel: Panel) -> FloatArray:
    """Weights held over every period: the reported weights on holdings dates, and in
    between the buy-and-hold drift with the segment return (index return where missing)."""
    n_p, n_t, n_k = panel.held.shape
    growth = 1.0 + np.where(np.isnan(panel.segment), panel.index[None, :, :], panel.segment)
    weights = np.zeros((n_p, n_t, n_k))
    previous = np.zeros((n_p, n_k))
    with np.errstate(invalid="ignore", divide="ignore"):
        for t in range(n_t):
            if t > 0:
                grown = previous * growth[:, t - 1, :]
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
    (and a timing effect of exactly zero).
    """
    act = active[:, :, None]
    first_t = np.argmax(active, axis=1)  # (P,)
    reference = np.take_along_axis(weights, first_t[:, None, None], axis=1)  # (P, 1, K)
    dev = np.where(act, weights - reference, 0.0)
    count = np.cumsum(active, axis=1)[:, :, None].astype(float)
    if static.mode == "window":
        n = np.maximum(active.sum(axis=1), 1)[:, None, None]
        mean_dev = dev.sum(axis=1, keepdims=True) / n
        return np.where(act, reference + mean_dev, 0.0)
    csum = np.cumsum(dev, axis=1)
    before = csum - dev  # sum over earlier periods of the window
    if static.mode == "expanding":
        n_before = count - 1.0
    else:
        assert static.periods is not None
        lag = static.periods
        shifted = np.zeros_like(before)
        if lag < before.shape[1]:
            shifted[:, lag:, :] = before[:, :-lag, :]
        before = before - shifted
        n_before = np.minimum(count - 1.0, float(lag))
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_before = np.divide(before, n_before, out=np.zeros_like(before), where=n_before > 0)
    static_w = np.where(n_before > 0, reference + mean_before, weights)
    return np.where(act, static_w, 0.0)


def decompose_panel(panel: Panel, *, static: StaticWeight, form: str) -> Effects:
    """Weights, static weights and every effect for a shard (DESIGN §3)."""
    w = drift_weights(panel)
    s = static_weights(w, panel.active, static)
    act3 = panel.active[:, :, None]
    q = np.where(act3, panel.policy, 0.0)
    b = np.broadcast_to(panel.index[None, :, :], w.shape)
    r = panel.segment
    r_used = np.where(np.isnan(r), b, r)
    big_b = np.where(panel.active, (q * b).sum(axis=2), 0.0)
    missing = panel.has_segments[:, None, None] & np.isnan(r) & (w != 0.0) & act3
    unknown = ~panel.has_segments[:, None, None] | missing
    if form == "bf":
        rel = b - big_b[:, :, None]
        static_alloc = (s - q) * rel
        timing = (w - s) * rel
        selection = np.where(unknown, np.nan, w * (r_used - b))
        interaction = np.full(w.shape, np.nan)
    else:
        static_alloc = (s - q) * b
        timing = (w - s) * b
        selection = np.where(unknown, np.nan, q * (r_used - b))
        interaction = np.where(unknown, np.nan, (w - q) * (r_used - b))
    static_alloc = np.where(act3, static_alloc, 0.0)
    timing = np.where(act3, timing, 0.0)
    computed = np.where(panel.active, (w * r_used).sum(axis=2), 0.0)
    seg_rows = panel.has_segments[:, None]
    totals = {
        "static_allocation": static_alloc.sum(axis=2),
        "timing": timing.sum(axis=2),
        "selection": np.where(seg_rows, np.nansum(selection, axis=2), np.nan),
        "interaction": np.where(seg_rows & (form == "bhb"), np.nansum(interaction, axis=2), np.nan),
    }
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
