"""Per-portfolio summaries: linked totals, annualised figures, tracking error, windows.

Annualising (common practice, no source): a record of n periods with p periods a year gives
R_ann = (1 + R)^{p/n} − 1 (likewise B_ann), active_ann = R_ann − B_ann. The linked effects
are carried onto the annualised active return with Cariño's logarithmic scaling,
E_ann = E · k(R, B) · (p/n) / k(R_ann, B_ann) with k(a, b) = ln((1+a)/(1+b))/(a − b), which
keeps them adding up to active_ann exactly. Records shorter than one year are not annualised
(the ``_ann`` columns are null), following the usual rule of not extrapolating partial years.
Tracking error = sample standard deviation of R_t − B_t × √p; information ratio =
active_ann / tracking_error (Grinold & Kahn's definition with the arithmetic annualised
active return).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import polars as pl

from attribution.linking import link_arrays, log_ratio_coefficient

PID = "portfolio_id"
LINKED_EFFECTS = ("static_allocation", "timing", "selection", "interaction", "residual")
RETURN_COLUMNS = ("portfolio_return", "policy_return", "active_return")
SUMMARY_ORDER = (
    "portfolio_id",
    "first_period",
    "last_period",
    "n_periods",
    "return_source",
    *RETURN_COLUMNS,
    *LINKED_EFFECTS,
    "linking",
    *(f"{c}_ann" for c in (*RETURN_COLUMNS, *LINKED_EFFECTS)),
    "tracking_error",
    "information_ratio",
    "n_drifted_periods",
    "n_selection_missing",
)


@dataclass(frozen=True)
class PeriodArrays:
    """Per-period totals of a shard as (P, T) arrays; ``effects`` is (P, T, 5) in the order
    of :data:`LINKED_EFFECTS` with NaN where an effect is unknown."""

    portfolio_ids: tuple[str, ...]
    period_ends: pl.Series  # (T,) dates
    active: np.ndarray
    portfolio_return: np.ndarray
    policy_return: np.ndarray
    effects: np.ndarray
    is_drifted: np.ndarray
    n_selection_missing: np.ndarray
    return_source: np.ndarray  # (P,) str


def window_totals(
    arrays: PeriodArrays, mask: np.ndarray, *, linking: str, periods_per_year: int
) -> dict[str, np.ndarray]:
    """Link every portfolio's periods inside ``mask`` (P, T) on their own and summarise.

    Returns column name -> (P,) array; rows with an empty mask are meaningless and must be
    dropped by the caller.
    """
    ppy = float(periods_per_year)
    columns = np.flatnonzero(mask.any(axis=0))
    if len(columns) and (columns[0] > 0 or columns[-1] < mask.shape[1] - 1):
        # Only the window's span of periods matters; slicing keeps per-year passes cheap.
        span = slice(int(columns[0]), int(columns[-1]) + 1)
        arrays = PeriodArrays(
            portfolio_ids=arrays.portfolio_ids,
            period_ends=arrays.period_ends[span],
            active=arrays.active[:, span],
            portfolio_return=arrays.portfolio_return[:, span],
            policy_return=arrays.policy_return[:, span],
            effects=arrays.effects[:, span],
            is_drifted=arrays.is_drifted[:, span],
            n_selection_missing=arrays.n_selection_missing[:, span],
            return_source=arrays.return_source,
        )
        mask = mask[:, span]
    known = ~np.isnan(arrays.effects)
    effects = np.where(known, arrays.effects, 0.0)
    linked, rc, bc = link_arrays(
        arrays.portfolio_return,
        arrays.policy_return,
        effects,
        mask,
        linking,  # type: ignore[arg-type]
    )
    n = mask.sum(axis=1)
    n_f = np.maximum(n, 1).astype(float)
    last_col = linked[:, -1, :]
    # An effect is null for a portfolio when it is unknown in every period of the window.
    any_known = (known & mask[:, :, None]).any(axis=1)
    totals = np.where(any_known, last_col, np.nan)
    r_cum, b_cum = rc[:, -1], bc[:, -1]
    active = arrays.portfolio_return - arrays.policy_return
    mean = np.where(mask, active, 0.0).sum(axis=1) / n_f
    sq = np.where(mask, (active - mean[:, None]) ** 2, 0.0).sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        te = np.where(n > 1, np.sqrt(sq / np.maximum(n - 1, 1)) * np.sqrt(ppy), np.nan)
        long_enough = n >= periods_per_year
        r_ann = np.where(long_enough, (1.0 + r_cum) ** (ppy / n_f) - 1.0, np.nan)
        b_ann = np.where(long_enough, (1.0 + b_cum) ** (ppy / n_f) - 1.0, np.nan)
        scale = (
            log_ratio_coefficient(r_cum, b_cum)
            * (ppy / n_f)
            / log_ratio_coefficient(np.nan_to_num(r_ann), np.nan_to_num(b_ann))
        )
        a_ann = r_ann - b_ann
        ir = np.where(te > 0, a_ann / np.where(te > 0, te, 1.0), np.nan)
    offset = int(columns[0]) if len(columns) else 0
    first = offset + np.argmax(mask, axis=1)
    last = offset + mask.shape[1] - 1 - np.argmax(mask[:, ::-1], axis=1)
    out: dict[str, np.ndarray] = {
        "_first": first,
        "_last": last,
        "n_periods": n,
        "portfolio_return": r_cum,
        "policy_return": b_cum,
        "active_return": r_cum - b_cum,
    }
    for j, name in enumerate(LINKED_EFFECTS):
        out[name] = totals[:, j]
    out["portfolio_return_ann"] = r_ann
    out["policy_return_ann"] = b_ann
    out["active_return_ann"] = a_ann
    for j, name in enumerate(LINKED_EFFECTS):
        out[f"{name}_ann"] = np.where(long_enough, totals[:, j] * scale, np.nan)
    out["tracking_error"] = te
    out["information_ratio"] = ir
    out["n_drifted_periods"] = (mask & arrays.is_drifted).sum(axis=1)
    out["n_selection_missing"] = np.where(mask, arrays.n_selection_missing, 0).sum(axis=1)
    return out


def _pick(cols: dict[str, np.ndarray], rows: np.ndarray) -> dict[str, np.ndarray]:
    return {name: values[rows] for name, values in cols.items()}


def _frame(
    arrays: PeriodArrays, picked: dict[str, np.ndarray], rows: np.ndarray, linking: str
) -> pl.DataFrame:
    """The summary table for portfolios ``rows`` from their already picked column values."""
    ids = pl.Series(PID, list(arrays.portfolio_ids), dtype=pl.String)
    # Text columns are gathered from short lists: converting numpy text arrays is slow.
    sources = pl.Series(arrays.return_source.tolist(), dtype=pl.String)
    data: dict[str, pl.Series] = {
        PID: ids.gather(rows),
        "first_period": arrays.period_ends.gather(picked["_first"]).alias("first_period"),
        "last_period": arrays.period_ends.gather(picked["_last"]).alias("last_period"),
        "n_periods": pl.Series(picked["n_periods"], dtype=pl.Int64),
        "return_source": sources.gather(rows),
        "linking": pl.Series([linking] * len(rows), dtype=pl.String),
    }
    for name in SUMMARY_ORDER:
        if name not in data:
            values = picked[name]
            if name.startswith("n_"):
                data[name] = pl.Series(values, dtype=pl.Int64)
            else:
                data[name] = pl.Series(values, dtype=pl.Float64, nan_to_null=True)
    return pl.DataFrame(data).select(SUMMARY_ORDER)


def summary_frame(arrays: PeriodArrays, *, linking: str, periods_per_year: int) -> pl.DataFrame:
    """One row per portfolio: its whole record linked (columns :data:`SUMMARY_ORDER`)."""
    cols = window_totals(arrays, arrays.active, linking=linking, periods_per_year=periods_per_year)
    rows = np.flatnonzero(cols["n_periods"] > 0)
    return _frame(arrays, _pick(cols, rows), rows, linking)


def windows_frame(arrays: PeriodArrays, *, linking: str, periods_per_year: int) -> pl.DataFrame:
    """Summaries over trailing 1, 3, 5 and 10 years (where the record covers them) and over
    each calendar year the record touches (partial years included; ``n_periods`` tells).

    Each window is linked on its own, as if the record were only that window; the static
    weights stay those of the whole run (the decomposition is not redone per window).
    """
    active = arrays.active
    n_active = active.sum(axis=1)
    from_end = np.cumsum(active[:, ::-1], axis=1)[:, ::-1]  # 1 = the last active period
    masks: list[tuple[str, np.ndarray]] = []
    for years in (1, 3, 5, 10):
        size = years * periods_per_year
        masks.append((f"{years}y", active & (from_end <= size) & (n_active[:, None] >= size)))
    year = arrays.period_ends.dt.year().to_numpy()
    for y in np.unique(year):
        masks.append((str(y), active & (year == y)[None, :]))
    labels, picked, rows = [], [], []
    for label, mask in masks:
        cols = window_totals(arrays, mask, linking=linking, periods_per_year=periods_per_year)
        kept = np.flatnonzero(cols["n_periods"] > 0)
        labels.append(label)
        picked.append(_pick(cols, kept))
        rows.append(kept)
    # One table for all windows: building a frame per window costs more than the windows.
    window = pl.Series("window", labels, dtype=pl.String).gather(
        np.repeat(np.arange(len(labels)), [len(r) for r in rows])
    )
    out = _frame(
        arrays,
        {name: np.concatenate([p[name] for p in picked]) for name in picked[0]},
        np.concatenate(rows),
        linking,
    ).with_columns(window=window)
    order = [PID, "window", *[c for c in SUMMARY_ORDER if c != PID]]
    return (
        out.select(order)
        .with_columns(
            _calendar=~pl.col("window").str.ends_with("y"), _len=pl.col("window").str.len_chars()
        )
        .sort(PID, "_calendar", "_len", "window")
        .drop("_calendar", "_len")
    )
