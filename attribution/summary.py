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

import polars as pl

from attribution.linking import link_cumulative, log_ratio_coefficient

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


def _totals(linked: pl.DataFrame, keys: list[str], periods_per_year: int) -> pl.DataFrame:
    """Collapse linked cumulative rows (sorted by period) to one row per group."""
    ppy = float(periods_per_year)
    agg = linked.group_by(keys, maintain_order=True).agg(
        pl.col("period_end").first().alias("first_period"),
        pl.col("period_end").last().alias("last_period"),
        pl.len().alias("n_periods"),
        pl.col("return_source").first(),
        pl.col("cum_portfolio_return").last().alias("portfolio_return"),
        pl.col("cum_policy_return").last().alias("policy_return"),
        pl.col("cum_active_return").last().alias("active_return"),
        *(pl.col(f"cum_{e}").last().alias(e) for e in LINKED_EFFECTS),
        (pl.col("active_return").std(ddof=1) * ppy**0.5).alias("tracking_error"),
        pl.col("is_drifted").sum().alias("n_drifted_periods"),
        pl.col("n_selection_missing").sum(),
    )
    n = pl.col("n_periods").cast(pl.Float64)
    long_enough = pl.col("n_periods") >= periods_per_year
    r_ann = (1.0 + pl.col("portfolio_return")) ** (ppy / n) - 1.0
    b_ann = (1.0 + pl.col("policy_return")) ** (ppy / n) - 1.0
    agg = agg.with_columns(
        portfolio_return_ann=pl.when(long_enough).then(r_ann),
        policy_return_ann=pl.when(long_enough).then(b_ann),
    ).with_columns(
        active_return_ann=pl.col("portfolio_return_ann") - pl.col("policy_return_ann"),
    )
    scale = (
        log_ratio_coefficient(pl.col("portfolio_return"), pl.col("policy_return"))
        * (ppy / n)
        / log_ratio_coefficient(pl.col("portfolio_return_ann"), pl.col("policy_return_ann"))
    )
    agg = agg.with_columns(
        *((pl.col(e) * scale).alias(f"{e}_ann") for e in LINKED_EFFECTS),
        information_ratio=pl.when(pl.col("tracking_error") > 0).then(
            pl.col("active_return_ann") / pl.col("tracking_error")
        ),
    )
    return agg


def summarise(
    periods: pl.DataFrame, *, linking: str, periods_per_year: int
) -> tuple[pl.DataFrame, pl.DataFrame]:
    """Link the per-period totals over each portfolio's whole record.

    Returns ``(series, summary)``: ``series`` is ``periods`` with the cumulative linked
    columns; ``summary`` has one row per portfolio in :data:`SUMMARY_ORDER`.
    """
    series = link_cumulative(periods, method=linking, effects=LINKED_EFFECTS)  # type: ignore[arg-type]
    summary = _totals(series, [PID], periods_per_year).with_columns(linking=pl.lit(linking))
    return series, summary.select(SUMMARY_ORDER).sort(PID)


def summarise_windows(
    periods: pl.DataFrame, *, linking: str, periods_per_year: int
) -> pl.DataFrame:
    """Summaries over trailing 1, 3, 5 and 10 years (where the record covers them) and over
    each calendar year the record touches (partial years included; ``n_periods`` tells).

    Each window is linked on its own, as if the record were only that window; the static
    weights stay those of the whole run (the decomposition is not redone per window).
    """
    ppy = periods_per_year
    ranked = periods.with_columns(
        _from_end=pl.len().over(PID) - pl.int_range(pl.len()).over(PID, order_by="period_index"),
        _n=pl.len().over(PID),
    )
    parts = []
    for years in (1, 3, 5, 10):
        size = years * ppy
        parts.append(
            ranked.filter((pl.col("_n") >= size) & (pl.col("_from_end") <= size)).with_columns(
                window=pl.lit(f"{years}y")
            )
        )
    parts.append(ranked.with_columns(window=pl.col("period_end").dt.year().cast(pl.String)))
    stacked = pl.concat(parts).drop("_from_end", "_n")
    keys = [PID, "window"]
    linked = link_cumulative(stacked, method=linking, effects=LINKED_EFFECTS, keys=keys)  # type: ignore[arg-type]
    out = _totals(linked, keys, ppy).with_columns(linking=pl.lit(linking))
    order = [PID, "window", *[c for c in SUMMARY_ORDER if c != PID]]
    trailing_first = pl.col("window").str.ends_with("y")
    return (
        out.select(order)
        .with_columns(_kind=trailing_first.not_(), _len=pl.col("window").str.len_chars())
        .sort(PID, "_kind", "_len", "window")
        .drop("_kind", "_len")
    )
