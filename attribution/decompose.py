"""Per-period decomposition of active return into static allocation, timing and selection.

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
the tolerance are rescaled to sum to exactly 1 so the identity holds to rounding).

Between holdings dates the weights drift buy-and-hold: w_{t+1} = w_t (1 + r_t) / (1 + R_t)
with r the segment return (index return where none), so after k periods
w = w_0 Π(1 + r) / Σ_j w_{0j} Π(1 + r_j).
"""

from __future__ import annotations

from dataclasses import dataclass

import polars as pl

from attribution.calendar import Calendar
from attribution.options import RunOptions, StaticWeight
from attribution.validate import empty_issues, issue_rows

PID = "portfolio_id"

EFFECT_COLUMNS = ("static_allocation", "timing", "selection", "interaction")

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


@dataclass(frozen=True)
class Decomposition:
    """Per class-period effects, per-period totals, and the warnings raised on the way."""

    effects: pl.DataFrame
    periods: pl.DataFrame
    issues: pl.DataFrame


def holdings_windows(
    holdings: pl.DataFrame, calendar: Calendar
) -> tuple[pl.DataFrame, pl.DataFrame]:
    """Each portfolio's evaluation window and its holdings-gap warnings.

    Rule (our own convention, documented in the README): the window starts with the period
    that begins at the first holdings date. Every holdings date covers the periods up to the
    next one; the last covers the portfolio's usual spacing (the most common gap between its
    holdings dates, 1 when it has one date), cut at the calendar's end. A gap longer than the
    usual spacing is a ``holdings_gap`` warning: the weights drift through it.

    Returns ``(windows, issues)``; ``windows`` has portfolio_id, first_index, last_index,
    spacing.
    """
    cal = calendar.frame()
    dates = (
        holdings.select(PID, "as_of")
        .unique()
        .join(cal.select(pl.col("period_start").alias("as_of"), "period_index"), on="as_of")
        .sort(PID, "period_index")
        .with_columns(gap=pl.col("period_index").diff().over(PID))
    )
    spacing = dates.group_by(PID).agg(
        first_index=pl.col("period_index").min(),
        last_holding=pl.col("period_index").max(),
        spacing=pl.col("gap").drop_nulls().mode().min().fill_null(1).cast(pl.Int32),
    )
    windows = spacing.select(
        PID,
        pl.col("first_index").cast(pl.Int32),
        pl.min_horizontal(
            pl.col("last_holding") + pl.col("spacing") - 1, pl.lit(calendar.n_periods - 1)
        )
        .cast(pl.Int32)
        .alias("last_index"),
        "spacing",
    ).sort(PID)
    gaps = dates.join(spacing.select(PID, "spacing"), on=PID).filter(
        pl.col("gap") > pl.col("spacing")
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
    windows: pl.DataFrame, policy: pl.DataFrame, calendar: Calendar
) -> tuple[pl.DataFrame, pl.DataFrame]:
    """The policy row set in force for every period of every window, and the gaps.

    A row set applies to every period that starts on or after its ``effective_from``, until
    the next set (DESIGN §2). Returns ``(periods, issues)``: ``periods`` has portfolio_id,
    period_index, period_start, period_end, effective_from; ``issues`` holds one
    ``no_policy_in_force`` error per portfolio with a period no set covers.
    """
    cal = calendar.frame()
    periods = (
        windows.select(
            PID,
            pl.int_ranges("first_index", pl.col("last_index") + 1, dtype=pl.Int32).alias(
                "period_index"
            ),
        )
        .explode("period_index")
        .join(cal, on="period_index")
    )
    sets = policy.select(PID, "effective_from").unique().sort("effective_from")
    periods = periods.sort("period_start").join_asof(
        sets,
        left_on="period_start",
        right_on="effective_from",
        by=PID,
        strategy="backward",
        check_sortedness=False,  # sorted by period_start just above, hence within each group
    )
    uncovered = (
        periods.filter(pl.col("effective_from").is_null())
        .group_by(PID)
        .agg(pl.col("period_start").min(), pl.len().alias("n"))
        .sort(PID)
    )
    issues = issue_rows(
        uncovered,
        code="no_policy_in_force",
        message=pl.format(
            "policy: portfolio {}: no policy row set is in force for {} period(s), the first "
            "starting {}; a set applies to periods starting on or after its effective_from.",
            PID,
            pl.col("n"),
            pl.col("period_start").cast(pl.String),
        ),
    )
    return periods.sort(PID, "period_index"), issues


def _static_weight(static: StaticWeight) -> pl.Expr:
    w = pl.col("weight")
    group = [PID, "asset_class"]
    if static.mode == "window":
        return w.mean().over(group)
    if static.mode == "expanding":
        n = w.cum_count().over(group)
        earlier = (w.cum_sum().over(group) - w) / (n - 1)
        return pl.when(n > 1).then(earlier).otherwise(w)
    assert static.periods is not None
    trailing = w.rolling_mean(window_size=static.periods, min_samples=1).shift(1).over(group)
    return trailing.fill_null(w)


def decompose(
    tables: dict[str, pl.DataFrame | None],
    periods: pl.DataFrame,
    options: RunOptions,
) -> Decomposition:
    """Build the dense portfolio × period × class panel and compute every effect.

    ``periods`` comes from :func:`policy_assignment` for portfolios without errors; the
    tables are the validated inputs restricted to those portfolios.
    """
    holdings = tables["holdings"]
    policy = tables["policy"]
    index_returns = tables["index_returns"]
    assert holdings is not None
    assert policy is not None
    assert index_returns is not None
    segments = tables.get("segment_returns")
    reported = tables.get("portfolio_returns")

    held = (
        holdings.join(
            periods.select(PID, pl.col("period_start").alias("as_of"), "period_index"),
            on=[PID, "as_of"],
        )
        .with_columns(pl.col("weight") / pl.col("weight").sum().over(PID, "period_index"))
        .select(PID, "period_index", "asset_class", pl.col("weight").alias("held_weight"))
    )
    holding_periods = held.select(PID, "period_index").unique().with_columns(is_holding=True)
    classes = pl.concat(
        [held.select(PID, "asset_class"), policy.select(PID, "asset_class")]
    ).unique()
    policy_norm = policy.with_columns(
        pl.col("weight") / pl.col("weight").sum().over(PID, "effective_from")
    ).select(PID, "effective_from", "asset_class", pl.col("weight").alias("policy_weight"))

    panel = (
        periods.join(classes, on=PID)
        .join(holding_periods, on=[PID, "period_index"], how="left")
        .join(held, on=[PID, "period_index", "asset_class"], how="left")
        .join(
            index_returns.rename({"return": "index_return"}),
            on=["period_end", "asset_class"],
            how="left",
        )
        .join(policy_norm, on=[PID, "effective_from", "asset_class"], how="left")
    )
    has_segments = pl.lit(False)
    if segments is not None:
        panel = panel.join(
            segments.rename({"return": "segment_return"}),
            on=[PID, "period_end", "asset_class"],
            how="left",
        )
        seg_ids = segments[PID].unique()
        has_segments = pl.col(PID).is_in(seg_ids)
    else:
        panel = panel.with_columns(segment_return=pl.lit(None, dtype=pl.Float64))

    group = [PID, "asset_class"]
    panel = (
        panel.with_columns(
            pl.col("is_holding").fill_null(False),
            pl.col("policy_weight").fill_null(0.0),
            has_segments.alias("has_segments"),
        )
        .with_columns(
            held_weight=pl.when(pl.col("is_holding"))
            .then(pl.col("held_weight").fill_null(0.0))
            .otherwise(None),
            return_used=pl.coalesce("segment_return", "index_return"),
        )
        .sort(PID, "asset_class", "period_index")
        .with_columns(block=pl.col("is_holding").cast(pl.Int32).cum_sum().over(group))
        .with_columns(
            start_weight=pl.col("held_weight").forward_fill().over(group),
            growth=(1.0 + pl.col("return_used"))
            .shift(1)
            .fill_null(1.0)
            .cum_prod()
            .over([*group, "block"]),
        )
        .with_columns(grown=pl.col("start_weight") * pl.col("growth"))
        .with_columns(
            weight=pl.col("grown") / pl.col("grown").sum().over(PID, "period_index"),
            is_drifted=~pl.col("is_holding"),
        )
    )
    # On a holdings date the weight is the reported one as it stands (already rescaled to
    # sum to 1); dividing the grown weights by their sum would only add rounding there.
    panel = panel.with_columns(
        weight=pl.when(pl.col("is_holding")).then(pl.col("held_weight")).otherwise(pl.col("weight"))
    )
    panel = panel.with_columns(static_weight=_static_weight(options.static)).with_columns(
        policy_return=(pl.col("policy_weight") * pl.col("index_return"))
        .sum()
        .over(PID, "period_index")
    )
    w, s, q = pl.col("weight"), pl.col("static_weight"), pl.col("policy_weight")
    b, r = pl.col("index_return"), pl.col("return_used")
    # Selection is unknown where the portfolio reports segment returns but not this one and
    # the class was held; it is known to be 0 where the weight is 0.
    unknown = ~pl.col("has_segments") | (pl.col("segment_return").is_null() & (w != 0.0))
    if options.form == "bf":
        rel = b - pl.col("policy_return")
        panel = panel.with_columns(
            static_allocation=(s - q) * rel,
            timing=(w - s) * rel,
            selection=pl.when(unknown).then(None).otherwise(w * (r - b)),
            interaction=pl.lit(None, dtype=pl.Float64),
        )
    else:
        panel = panel.with_columns(
            static_allocation=(s - q) * b,
            timing=(w - s) * b,
            selection=pl.when(unknown).then(None).otherwise(q * (r - b)),
            interaction=pl.when(unknown).then(None).otherwise((w - q) * (r - b)),
        )
    panel = panel.sort(PID, "period_index", "asset_class")

    missing = panel.filter(pl.col("has_segments") & pl.col("segment_return").is_null() & (w != 0.0))
    issues = [
        issue_rows(
            missing,
            code="segment_return_missing",
            message=pl.format(
                "segment_returns: portfolio {} has no return for class {} in the period ending "
                "{} (weight {}); selection is null there and the index return stands in.",
                PID,
                "asset_class",
                pl.col("period_end").cast(pl.String),
                w.round(6).cast(pl.String),
            ),
            period="period_end",
            asset_class="asset_class",
        )
    ]
    period_totals = _period_totals(panel, options)
    period_totals, reported_issues = _attach_reported(period_totals, reported)
    issues.append(reported_issues)
    effects = panel.select(EFFECTS_ORDER)
    return Decomposition(
        effects=effects,
        periods=period_totals,
        issues=pl.concat([empty_issues(), *issues]),
    )


def _period_totals(panel: pl.DataFrame, options: RunOptions) -> pl.DataFrame:
    """Sum the class effects per portfolio-period, with the computed return Σ w·r."""
    has_seg = pl.col("has_segments").first()
    totals = panel.group_by(PID, "period_index", maintain_order=True).agg(
        pl.col("period_start").first(),
        pl.col("period_end").first(),
        (pl.col("weight") * pl.col("return_used")).sum().alias("computed_return"),
        pl.col("policy_return").first(),
        pl.col("static_allocation").sum(),
        pl.col("timing").sum(),
        pl.when(has_seg).then(pl.col("selection").sum()).otherwise(None).alias("selection"),
        pl.when(has_seg & pl.lit(options.form == "bhb"))
        .then(pl.col("interaction").sum())
        .otherwise(None)
        .alias("interaction"),
        pl.col("is_drifted").first(),
        has_seg.alias("has_segments"),
        (pl.col("selection").is_null() & pl.col("has_segments"))
        .sum()
        .cast(pl.Int64)
        .alias("n_selection_missing"),
    )
    return totals


def _attach_reported(
    totals: pl.DataFrame, reported: pl.DataFrame | None
) -> tuple[pl.DataFrame, pl.DataFrame]:
    """Choose the return that is linked: reported where given, else the computed one.

    ``residual`` = reported − computed (fees, cash flows, intra-period trading), linked as
    its own effect; 0 where the computed return is used.
    """
    if reported is None:
        totals = totals.with_columns(reported_return=pl.lit(None, dtype=pl.Float64))
        has_rep = pl.lit(False)
    else:
        totals = totals.join(
            reported.select(PID, "period_end", pl.col("return").alias("reported_return")),
            on=[PID, "period_end"],
            how="left",
        )
        has_rep = pl.col(PID).is_in(reported[PID].unique())
    totals = totals.with_columns(has_reported=has_rep)
    gaps = totals.filter(pl.col("has_reported") & pl.col("reported_return").is_null())
    issues = issue_rows(
        gaps,
        code="reported_return_missing",
        message=pl.format(
            "portfolio_returns: portfolio {} has no reported return for the period ending {}; "
            "the computed return is used for it.",
            PID,
            pl.col("period_end").cast(pl.String),
        ),
        period="period_end",
    )
    totals = totals.with_columns(
        portfolio_return=pl.coalesce("reported_return", "computed_return"),
        return_source=pl.when(pl.col("has_reported"))
        .then(pl.lit("reported"))
        .when(pl.col("has_segments"))
        .then(pl.lit("segments"))
        .otherwise(pl.lit("index")),
    ).with_columns(
        residual=pl.col("portfolio_return") - pl.col("computed_return"),
        active_return=pl.col("portfolio_return") - pl.col("policy_return"),
    )
    return totals.sort(PID, "period_index"), issues
