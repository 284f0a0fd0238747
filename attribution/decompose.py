"""One shard of portfolios from validated rows to effects, per-period totals and issues.

For portfolio p, period t, class i — actual weight w, policy weight q, static weight s,
index return b, segment return r, policy return B_t = Σ_i q·b (DESIGN §3):

Brinson–Fachler form (default; Brinson & Fachler 1985, with the allocation effect split into
a static and a dynamic part as in Hsu, Kalesnik & Myers 2010)::

    static allocation  (s − q)(b − B_t)
    timing             (w − s)(b − B_t)
    selection          w (r − b)               (interaction folded in)

Brinson–Hood–Beebower form (``form="bhb"``; Brinson, Hood & Beebower 1986)::

    static (s − q) b,  timing (w − s) b,  selection q (r − b),  interaction (w − q)(r − b)

Summed over classes both equal Σ w·r − B_t exactly because Σw = Σs = Σq = 1 (weights within
the tolerance are rescaled to sum to exactly 1 so the identity holds to rounding). Between
holdings dates the weights drift buy-and-hold (:func:`attribution.kernel.drift_weights`).
The array work is in :mod:`attribution.kernel`; this module chooses windows and policies,
calls it, and turns the arrays back into the contract's tables.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import polars as pl

from attribution.calendar import Calendar
from attribution.kernel import Effects, Panel, decompose_panel
from attribution.linking import link_arrays
from attribution.options import RunOptions
from attribution.panel import Codes, build_panel, encode, make_codes
from attribution.summary import LINKED_EFFECTS, PeriodArrays
from attribution.validate import (
    check_portfolio_tables,
    empty_issues,
    issue_rows,
    skipped_portfolios,
)

PID = "portfolio_id"

EFFECTS_ORDER = (
    "portfolio_id",
    "period_end",
    "asset_class",
    "weight",
    "static_weight",
    "policy_weight",
    "index_return",
    "segment_return",
    "policy_return",
    "static_allocation",
    "timing",
    "selection",
    "interaction",
    "is_drifted",
)
SERIES_ORDER = (
    "portfolio_id",
    "period_end",
    "period_start",
    "return_source",
    "portfolio_return",
    "computed_return",
    "policy_return",
    "active_return",
    *LINKED_EFFECTS,
    "is_drifted",
    "cum_portfolio_return",
    "cum_policy_return",
    "cum_active_return",
    *(f"cum_{e}" for e in LINKED_EFFECTS),
)


@dataclass(frozen=True)
class ShardResult:
    """What one shard produces: tables, the per-period arrays, issues and who was skipped."""

    effects: pl.DataFrame
    series: pl.DataFrame
    periods: PeriodArrays
    issues: pl.DataFrame
    skipped: tuple[str, ...]


def holdings_windows(
    holdings: pl.DataFrame, codes: Codes, calendar: Calendar
) -> tuple[pl.DataFrame, pl.DataFrame]:
    """Each portfolio's evaluation window and its holdings-gap warnings.

    Rule (our own convention, documented in the README): the window starts with the period
    that begins at the first holdings date. Every holdings date covers the periods up to the
    next one; the last covers the portfolio's usual spacing (the most common gap between its
    holdings dates, the smallest on a tie, 1 when it has one date), cut at the calendar's
    end. A gap longer than the usual spacing is a ``holdings_gap`` warning: the weights
    drift through it. Returns ``(windows, issues)``; ``windows`` has ``_p``,
    ``first_index``, ``last_index``, ``spacing``.
    """
    n_p, n_t = len(codes.portfolio_ids), codes.n_periods
    t_all = holdings["_t"].to_numpy()
    inside = (t_all >= 0) & (t_all < n_t)
    has = np.zeros((n_p, n_t), dtype=bool)
    has[holdings["_p"].to_numpy()[inside], t_all[inside]] = True
    p, t = np.nonzero(has)  # sorted by portfolio, then period
    same = np.zeros(len(p), dtype=bool)
    same[1:] = p[1:] == p[:-1]
    gap = np.zeros(len(p), dtype=np.int64)
    gap[1:] = t[1:] - t[:-1]
    counts = np.bincount(p[same] * (n_t + 1) + gap[same], minlength=n_p * (n_t + 1))
    counts = counts.reshape(n_p, n_t + 1)
    spacing = np.where(counts.any(axis=1), np.argmax(counts, axis=1), 1)
    present = has.any(axis=1)
    first = np.argmax(has, axis=1)
    last_holding = n_t - 1 - np.argmax(has[:, ::-1], axis=1)
    last = np.minimum(last_holding + spacing - 1, n_t - 1)
    rows = np.flatnonzero(present)
    windows = pl.DataFrame(
        {
            "_p": rows.astype(np.int64),
            "first_index": first[rows].astype(np.int64),
            "last_index": last[rows].astype(np.int64),
            "spacing": spacing[rows].astype(np.int64),
        }
    )
    wide = same & (gap > spacing[p])
    starts = calendar.frame()["period_start"]
    ids = pl.Series(list(codes.portfolio_ids), dtype=pl.String)
    gaps = pl.DataFrame(
        {
            PID: ids.gather(p[wide]),
            "as_of": starts.gather(t[wide]),
            "gap": gap[wide],
            "spacing": spacing[p[wide]],
        }
    )
    issues = issue_rows(
        gaps,
        code="holdings_gap",
        message=pl.format(
            "holdings: portfolio {}: {} periods between holdings dates up to {} (usual spacing "
            "{}); the weights drifted buy-and-hold through the gap.",
            PID,
            pl.col("gap"),
            pl.col("as_of").cast(pl.String),
            pl.col("spacing"),
        ),
        period="as_of",
    )
    return windows, issues


def policy_assignment(
    windows: pl.DataFrame, policy: pl.DataFrame, codes: Codes
) -> tuple[np.ndarray, np.ndarray, pl.DataFrame]:
    """The policy row set in force for every period of every window.

    A row set applies to every period that starts on or after its ``effective_from``, until
    the next set (DESIGN §2). Returns ``(policy_set, policy_weights, issues)``:
    ``policy_set`` (P, T) indexes the rows of ``policy_weights`` (sets × K, each row rescaled
    to sum to 1), −1 where no set is in force; ``issues`` holds one ``no_policy_in_force``
    error per portfolio with an uncovered period.
    """
    n_p, n_t, n_k = len(codes.portfolio_ids), codes.n_periods, len(codes.classes)
    policy = policy.with_columns(_day=pl.col("effective_from").cast(pl.Int32).cast(pl.Int64))
    sets = policy.select("_p", "_day").unique().sort("_p", "_day").with_row_index("_set")
    rows = policy.join(sets, on=["_p", "_day"])
    weights = np.zeros((sets.height, n_k))
    np.add.at(weights, (rows["_set"].to_numpy(), rows["_k"].to_numpy()), rows["weight"].to_numpy())
    totals = weights.sum(axis=1, keepdims=True)
    weights = np.divide(weights, totals, out=np.zeros_like(weights), where=totals != 0)

    offset = np.int64(1) << 32
    set_keys = sets["_p"].to_numpy() * (offset << 1) + sets["_day"].to_numpy() + offset
    p_idx = np.arange(n_p)[:, None]
    query = p_idx * (offset << 1) + codes.start_days[None, :] + offset
    found = np.searchsorted(set_keys, query.ravel(), side="right").reshape(n_p, n_t) - 1
    set_p = sets["_p"].to_numpy()
    valid = (
        (found >= 0) & (set_p[np.maximum(found, 0)] == p_idx)
        if sets.height
        else (np.zeros((n_p, n_t), dtype=bool))
    )
    first = np.full(n_p, n_t)
    last = np.full(n_p, -1)
    first[windows["_p"].to_numpy()] = windows["first_index"].to_numpy()
    last[windows["_p"].to_numpy()] = windows["last_index"].to_numpy()
    t_range = np.arange(n_t)
    active = (t_range[None, :] >= first[:, None]) & (t_range[None, :] <= last[:, None])
    uncovered = active & ~valid
    bad_p = np.flatnonzero(uncovered.any(axis=1))
    starts = pl.Series(codes.start_days[np.argmax(uncovered[bad_p], axis=1)]).cast(pl.Date)
    bad = pl.DataFrame(
        {
            PID: [codes.portfolio_ids[p] for p in bad_p],
            "n": uncovered[bad_p].sum(axis=1),
            "period_start": starts,
        },
        schema={PID: pl.String, "n": pl.Int64, "period_start": pl.Date},
    )
    issues = issue_rows(
        bad,
        code="no_policy_in_force",
        message=pl.format(
            "policy: portfolio {}: no policy row set is in force for {} period(s), the first "
            "starting {}; a set applies to periods starting on or after its effective_from.",
            PID,
            pl.col("n"),
            pl.col("period_start").cast(pl.String),
        ),
    )
    return np.where(valid & active, found, -1), weights, issues


def _drop(frame: pl.DataFrame | None, codes_out: list[int]) -> pl.DataFrame | None:
    if frame is None or not codes_out:
        return frame
    return frame.filter(~pl.col("_p").is_in(codes_out))


def run_shard(
    tables: dict[str, pl.DataFrame | None],
    calendar: Calendar,
    index_returns: pl.DataFrame,
    options: RunOptions,
) -> ShardResult:
    """Validate, decompose and tabulate one shard of portfolios.

    ``tables`` hold the shard's rows of holdings, policy, segment_returns and
    portfolio_returns (already typed); rows of portfolios without holdings must have been
    removed (they are reported once for the roster by the runner).
    """
    holdings = tables["holdings"]
    assert holdings is not None
    policy = tables["policy"]
    assert policy is not None
    classes = sorted(index_returns["asset_class"].unique().to_list())
    ids = sorted(holdings[PID].unique().to_list())
    codes = make_codes(ids, classes, calendar)
    enc: dict[str, pl.DataFrame | None] = {
        "holdings": encode(holdings, codes, date="as_of", holdings=True),
        "policy": encode(policy, codes, date=None, holdings=False),
        "segment_returns": None,
        "portfolio_returns": None,
    }
    for name in ("segment_returns", "portfolio_returns"):
        frame = tables.get(name)
        if frame is not None:
            enc[name] = encode(frame, codes, date="period_end", holdings=False)
    issues = check_portfolio_tables(enc, calendar, codes, weight_tolerance=options.weight_tolerance)
    skipped = set(skipped_portfolios(issues).to_list())
    out = [codes.portfolio_ids.index(p) for p in skipped]
    enc = {name: _drop(frame, out) for name, frame in enc.items()}
    h_enc = enc["holdings"]
    p_enc = enc["policy"]
    assert h_enc is not None
    assert p_enc is not None
    windows, gap_issues = holdings_windows(h_enc, codes, calendar)
    policy_set, policy_weights, policy_issues = policy_assignment(windows, p_enc, codes)
    no_policy = policy_issues[PID].to_list()
    if no_policy:
        skipped |= set(no_policy)
        out = [codes.portfolio_ids.index(p) for p in no_policy]
        windows = windows.filter(~pl.col("_p").is_in(out))
        enc = {name: _drop(frame, out) for name, frame in enc.items()}
    index_enc = encode(index_returns, codes, date="period_end", holdings=False)
    panel = build_panel(
        codes,
        holdings=enc["holdings"],  # type: ignore[arg-type]
        policy=enc["policy"],  # type: ignore[arg-type]
        index_returns=index_enc,
        segments=enc["segment_returns"],
        reported=enc["portfolio_returns"],
        windows=windows,
        policy_set=policy_set,
        policy_weights=policy_weights,
    )
    eff = decompose_panel(panel, static=options.static, form=options.form)
    periods = _period_arrays(panel, eff, calendar)
    series = _series_frame(panel, eff, periods, calendar, options)
    effects = _effects_frame(panel, eff, calendar)
    more = _kernel_issues(panel, eff, calendar)
    all_issues = pl.concat([empty_issues(), issues, gap_issues, policy_issues, *more])
    return ShardResult(
        effects=effects,
        series=series,
        periods=periods,
        issues=all_issues,
        skipped=tuple(sorted(skipped)),
    )


def _return_source(panel: Panel) -> np.ndarray:
    return np.where(
        panel.has_reported, "reported", np.where(panel.has_segments, "segments", "index")
    )


def _period_arrays(panel: Panel, eff: Effects, calendar: Calendar) -> PeriodArrays:
    stacked = np.stack([eff.totals[name] for name in LINKED_EFFECTS], axis=2)
    return PeriodArrays(
        portfolio_ids=panel.portfolio_ids,
        period_ends=calendar.frame()["period_end"],
        active=panel.active,
        portfolio_return=eff.portfolio_return,
        policy_return=eff.policy_return,
        effects=stacked,
        is_drifted=panel.active & ~panel.holding,
        n_selection_missing=eff.n_selection_missing,
        return_source=_return_source(panel),
    )


def _floats(values: np.ndarray) -> pl.Series:
    return pl.Series(values, dtype=pl.Float64).fill_nan(None)


def _series_frame(
    panel: Panel, eff: Effects, periods: PeriodArrays, calendar: Calendar, options: RunOptions
) -> pl.DataFrame:
    """The per-period table: returns, effects and the cumulative linked effects."""
    known = ~np.isnan(periods.effects)
    linked, rc, bc = link_arrays(
        periods.portfolio_return,
        periods.policy_return,
        np.where(known, periods.effects, 0.0),
        periods.active,
        options.linking,
    )
    linked = np.where(known, linked, np.nan)
    p, t = np.nonzero(panel.active)
    cal = calendar.frame()
    ids = pl.Series(list(panel.portfolio_ids), dtype=pl.String)
    data: dict[str, pl.Series] = {
        PID: ids.gather(p),
        "period_end": cal["period_end"].gather(t),
        "period_start": cal["period_start"].gather(t),
        "return_source": pl.Series(_return_source(panel)[p], dtype=pl.String),
        "portfolio_return": _floats(eff.portfolio_return[p, t]),
        "computed_return": _floats(eff.computed_return[p, t]),
        "policy_return": _floats(eff.policy_return[p, t]),
        "active_return": _floats(eff.portfolio_return[p, t] - eff.policy_return[p, t]),
    }
    for j, name in enumerate(LINKED_EFFECTS):
        data[name] = _floats(periods.effects[p, t, j])
    data["is_drifted"] = pl.Series(periods.is_drifted[p, t], dtype=pl.Boolean)
    data["cum_portfolio_return"] = _floats(rc[p, t])
    data["cum_policy_return"] = _floats(bc[p, t])
    data["cum_active_return"] = _floats(rc[p, t] - bc[p, t])
    for j, name in enumerate(LINKED_EFFECTS):
        data[f"cum_{name}"] = _floats(linked[p, t, j])
    return pl.DataFrame(data).select(SERIES_ORDER)


def _effects_frame(panel: Panel, eff: Effects, calendar: Calendar) -> pl.DataFrame:
    """The class-level table for every class in the portfolio's universe (held or policy)."""
    mask = panel.active[:, :, None] & panel.universe[:, None, :]
    p, t, k = np.nonzero(mask)
    ids = pl.Series(list(panel.portfolio_ids), dtype=pl.String)
    classes = pl.Series(list(panel.classes), dtype=pl.String)
    index = np.broadcast_to(panel.index[None, :, :], mask.shape)
    data = {
        PID: ids.gather(p),
        "period_end": calendar.frame()["period_end"].gather(t),
        "asset_class": classes.gather(k),
        "weight": _floats(eff.weight[mask]),
        "static_weight": _floats(eff.static_weight[mask]),
        "policy_weight": _floats(panel.policy[mask]),
        "index_return": _floats(index[mask]),
        "segment_return": _floats(panel.segment[mask]),
        "policy_return": _floats(eff.policy_return[p, t]),
        "static_allocation": _floats(eff.static_allocation[mask]),
        "timing": _floats(eff.timing[mask]),
        "selection": _floats(eff.selection[mask]),
        "interaction": _floats(eff.interaction[mask]),
        "is_drifted": pl.Series(~panel.holding[p, t], dtype=pl.Boolean),
    }
    return pl.DataFrame(data).select(EFFECTS_ORDER)


def _kernel_issues(panel: Panel, eff: Effects, calendar: Calendar) -> list[pl.DataFrame]:
    cal = calendar.frame()
    ids = pl.Series(list(panel.portfolio_ids), dtype=pl.String)
    p, t, k = np.nonzero(eff.segment_missing)
    missing = pl.DataFrame(
        {
            PID: ids.gather(p),
            "period_end": cal["period_end"].gather(t),
            "asset_class": pl.Series(list(panel.classes), dtype=pl.String).gather(k),
            "weight": eff.weight[p, t, k],
        }
    )
    rp, rt = np.nonzero(panel.has_reported[:, None] & np.isnan(panel.reported) & panel.active)
    no_report = pl.DataFrame({PID: ids.gather(rp), "period_end": cal["period_end"].gather(rt)})
    return [
        issue_rows(
            missing,
            code="segment_return_missing",
            message=pl.format(
                "segment_returns: portfolio {} has no return for class {} in the period ending "
                "{} (weight {}); selection is null there and the index return stands in.",
                PID,
                "asset_class",
                pl.col("period_end").cast(pl.String),
                pl.col("weight").round(6).cast(pl.String),
            ),
            period="period_end",
            asset_class="asset_class",
        ),
        issue_rows(
            no_report,
            code="reported_return_missing",
            message=pl.format(
                "portfolio_returns: portfolio {} has no reported return for the period ending "
                "{}; the computed return is used for it.",
                PID,
                pl.col("period_end").cast(pl.String),
            ),
            period="period_end",
        ),
    ]
