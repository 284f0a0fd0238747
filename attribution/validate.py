"""Validation of the input tables: whole-input errors raise, portfolio problems become rows.

Two kinds of bad input (DESIGN §2):

* a problem in a table every portfolio shares (index_returns, riskfree) raises
  :class:`~attribution.errors.SharedTableError` and nothing is written (exit code 2);
* a problem in rows that belong to one portfolio becomes a ``data_issues`` row with a stable
  ``code`` and a ``severity``. ``error`` skips that portfolio; ``warning`` lets it run with the
  affected figures null or flagged. The rest of the roster completes.

:data:`ISSUE_CODES` is the catalogue of codes (the README lists it).
"""

from __future__ import annotations

import numpy as np
import polars as pl

from attribution.calendar import Calendar
from attribution.errors import SharedTableError, examples
from attribution.panel import Codes, duplicate_mask

ISSUE_SCHEMA: dict[str, pl.DataType] = {
    "portfolio_id": pl.String(),
    "period_end": pl.Date(),
    "asset_class": pl.String(),
    "severity": pl.String(),
    "code": pl.String(),
    "message": pl.String(),
}

#: code -> (severity, what it means). Stable: other tools key on these strings.
ISSUE_CODES: dict[str, tuple[str, str]] = {
    "missing_key": ("error", "a row with an empty date or asset_class"),
    "duplicate_key": ("error", "the same key appears more than once in a portfolio's table"),
    "nonfinite_value": ("error", "a weight or return that is empty, NaN or infinite"),
    "return_below_minus_100": ("error", "a return of -100 % or less"),
    "off_calendar_date": (
        "error",
        "a date that is not a calendar period_end (or the first period's start, for holdings)",
    ),
    "unknown_asset_class": ("error", "an asset class that index_returns does not carry"),
    "weights_not_summing": (
        "error",
        "holdings or policy weights of one date not summing to 1 within --weight-tolerance",
    ),
    "no_policy_in_force": ("error", "no policy row set in force for a period of the record"),
    "period_return_below_minus_100": (
        "error",
        "a computed, reported or policy period return of -100 % or less (leveraged weights): "
        "the record cannot be compounded or linked",
    ),
    "no_holdings": (
        "warning",
        "rows for a portfolio that has no usable holdings; nothing to evaluate",
    ),
    "segment_return_missing": (
        "warning",
        "no segment return for a class-period with a non-zero weight: selection is null there",
    ),
    "holdings_gap": (
        "warning",
        "holdings dates further apart than the portfolio's usual spacing: weights drifted",
    ),
    "reported_return_missing": (
        "warning",
        "no reported return for a period: the computed return is used for it",
    ),
    "value_invalid": (
        "warning",
        "a portfolio value that is empty, not finite or not positive: the row is ignored",
    ),
    "value_duplicate": (
        "warning",
        "a portfolio and date given twice in portfolio_values: those rows are ignored",
    ),
    "value_missing": (
        "warning",
        "periods with no portfolio value on or before their start: no money figures for them",
    ),
    "test_too_few_periods": ("warning", "too few decisions or periods for a timing test"),
    "test_undefined": (
        "warning",
        "a timing test cannot be computed: nothing varies (constant weights, a market that "
        "never changed sign, a singular design, trades that only undo drift)",
    ),
}


def empty_issues() -> pl.DataFrame:
    """An empty ``data_issues`` frame with the contract's schema."""
    return pl.DataFrame(schema=ISSUE_SCHEMA)


def issue_rows(
    frame: pl.DataFrame,
    *,
    code: str,
    message: pl.Expr,
    period: str | None = None,
    asset_class: str | None = None,
) -> pl.DataFrame:
    """Turn the offending rows of ``frame`` into ``data_issues`` rows for ``code``."""
    severity = ISSUE_CODES[code][0]
    if frame.height == 0:
        return empty_issues()
    return frame.select(
        pl.col("portfolio_id").cast(pl.String),
        (pl.col(period) if period else pl.lit(None)).cast(pl.Date).alias("period_end"),
        (pl.col(asset_class) if asset_class else pl.lit(None)).cast(pl.String).alias("asset_class"),
        pl.lit(severity).alias("severity"),
        pl.lit(code).alias("code"),
        message.cast(pl.String).alias("message"),
    )


# --- whole-input checks -------------------------------------------------------------------


def _raise_if(frame: pl.DataFrame, table: str, rule: str, keys: list[str]) -> None:
    if frame.height:
        found = [tuple(str(v) for v in row) for row in frame.select(keys).rows()]
        key_text = examples([k[0] if len(k) == 1 else k for k in found])
        msg = f"{table}: {rule}; key ({', '.join(keys)}) at {key_text}."
        raise SharedTableError(msg)


def check_shared_returns(frame: pl.DataFrame, table: str, keys: list[str]) -> None:
    """Reject null keys, duplicate keys, non-finite returns and returns ≤ −100 %.

    A bad row in a table every portfolio uses cannot be confined to one portfolio, so it
    stops the run (DESIGN §2).
    """
    for key in keys:
        _raise_if(frame.filter(pl.col(key).is_null()), table, f"column {key!r} is empty", keys)
    dup = frame.filter(pl.len().over(keys) > 1).unique(keys).sort(keys)
    _raise_if(dup, table, "duplicate key (each key must appear once)", keys)
    bad = frame.filter(~pl.col("return").is_finite() | pl.col("return").is_null()).sort(keys)
    _raise_if(bad, table, "column 'return' must be a finite number", keys)
    low = frame.filter(pl.col("return") <= -1.0).sort(keys)
    _raise_if(low, table, "column 'return' must be above -1 (a loss of 100 % or more)", keys)


def check_index_returns(index_returns: pl.DataFrame) -> None:
    """Whole-input rules for index_returns; every class must carry every calendar date."""
    check_shared_returns(index_returns, "index_returns", ["period_end", "asset_class"])
    dates = index_returns["period_end"].unique()
    classes = index_returns["asset_class"].unique()
    if index_returns.height != dates.len() * classes.len():
        full = pl.DataFrame({"period_end": dates}).join(
            pl.DataFrame({"asset_class": classes}), how="cross"
        )
        gaps = full.join(index_returns, on=["period_end", "asset_class"], how="anti").sort(
            "period_end", "asset_class"
        )
        _raise_if(
            gaps,
            "index_returns",
            "an asset class has no return on a calendar date (every class needs every date)",
            ["period_end", "asset_class"],
        )


def check_riskfree(riskfree: pl.DataFrame, calendar: Calendar) -> pl.DataFrame:
    """Whole-input rules for riskfree; it must cover every calendar date. Returns it trimmed."""
    check_shared_returns(riskfree, "riskfree", ["period_end"])
    cal = pl.DataFrame({"period_end": list(calendar.period_ends)}, schema={"period_end": pl.Date})
    missing = cal.join(riskfree, on="period_end", how="anti")
    _raise_if(missing, "riskfree", "no riskless return for a calendar period_end", ["period_end"])
    return cal.join(riskfree, on="period_end", how="left")


# --- portfolio-level checks ----------------------------------------------------------------


def _null_keys(frame: pl.DataFrame, table: str, keys: list[str]) -> pl.DataFrame:
    cond = pl.any_horizontal([pl.col(k).is_null() for k in keys])
    rows = frame.filter(cond).unique("portfolio_id", keep="first")
    return issue_rows(
        rows,
        code="missing_key",
        message=pl.format(
            "{}: portfolio {} has a row with an empty {}.",
            pl.lit(table),
            "portfolio_id",
            pl.lit(" or ".join(keys)),
        ),
    )


def _duplicates(
    frame: pl.DataFrame,
    table: str,
    keys: list[str],
    date_col: str,
    class_col: str | None,
    n_t: int,
    n_k: int,
) -> pl.DataFrame:
    full = ["portfolio_id", *keys]
    if "_t" in frame.columns:
        mask = duplicate_mask(frame, n_t, n_k, with_class=class_col is not None)
        if not mask.any():
            return empty_issues()
        dup = frame.filter(pl.Series(mask)).unique(full).sort(full)
    else:
        dup = frame.drop_nulls(full).filter(pl.len().over(full) > 1).unique(full).sort(full)
    return issue_rows(
        dup,
        code="duplicate_key",
        message=pl.format(
            "{}: duplicate row for portfolio {} on {}{}; each ({}) must appear once.",
            pl.lit(table),
            "portfolio_id",
            pl.col(date_col).cast(pl.String),
            (pl.lit(" class ") + pl.col(class_col)) if class_col else pl.lit(""),
            pl.lit(", ".join(full)),
        ),
        period=date_col if date_col != "effective_from" else None,
        asset_class=class_col,
    )


def _nonfinite(
    frame: pl.DataFrame, table: str, value: str, date_col: str, class_col: str | None
) -> pl.DataFrame:
    bad = frame.filter(pl.col(value).is_null() | ~pl.col(value).is_finite())
    return issue_rows(
        bad,
        code="nonfinite_value",
        message=pl.format(
            "{}: portfolio {} on {}{}: column {} is {}; expected a finite number.",
            pl.lit(table),
            "portfolio_id",
            pl.col(date_col).cast(pl.String),
            (pl.lit(" class ") + pl.col(class_col)) if class_col else pl.lit(""),
            pl.lit(repr(value)),
            pl.col(value).cast(pl.String).fill_null("empty"),
        ),
        period=date_col if date_col != "effective_from" else None,
        asset_class=class_col,
    )


def _too_low(frame: pl.DataFrame, table: str, class_col: str | None) -> pl.DataFrame:
    bad = frame.filter(pl.col("return") <= -1.0)
    return issue_rows(
        bad,
        code="return_below_minus_100",
        message=pl.format(
            "{}: portfolio {} on {}{}: return {} is -100 % or less; expected a return above -1.",
            pl.lit(table),
            "portfolio_id",
            pl.col("period_end").cast(pl.String),
            (pl.lit(" class ") + pl.col(class_col)) if class_col else pl.lit(""),
            pl.col("return").cast(pl.String),
        ),
        period="period_end",
        asset_class=class_col,
    )


def _off_calendar(frame: pl.DataFrame, table: str, date_col: str, hint: str) -> pl.DataFrame:
    bad = frame.filter(pl.col(date_col).is_not_null() & (pl.col("_t") < 0))
    bad = bad.unique(["portfolio_id", date_col]).sort("portfolio_id", date_col)
    return issue_rows(
        bad,
        code="off_calendar_date",
        message=pl.format(
            "{}: portfolio {}: {} {} is not on the calendar of index_returns; expected {}.",
            pl.lit(table),
            "portfolio_id",
            pl.lit(date_col),
            pl.col(date_col).cast(pl.String),
            pl.lit(hint),
        ),
        period=date_col,
    )


def _unknown_class(frame: pl.DataFrame, table: str, classes: tuple[str, ...]) -> pl.DataFrame:
    bad = frame.filter(pl.col("asset_class").is_not_null() & (pl.col("_k") < 0))
    bad = bad.unique(["portfolio_id", "asset_class"]).sort("portfolio_id", "asset_class")
    return issue_rows(
        bad,
        code="unknown_asset_class",
        message=pl.format(
            "{}: portfolio {}: asset_class {} is not in index_returns (which carries {}).",
            pl.lit(table),
            "portfolio_id",
            pl.col("asset_class"),
            pl.lit(", ".join(classes)),
        ),
        asset_class="asset_class",
    )


def _not_summing(frame: pl.DataFrame, table: str, date_col: str, tolerance: float) -> pl.DataFrame:
    sums = (
        frame.drop_nulls(["portfolio_id", date_col])
        .filter(pl.col("weight").is_finite())
        .group_by("portfolio_id", date_col)
        .agg(pl.col("weight").sum().alias("total"))
        .filter((pl.col("total") - 1.0).abs() > tolerance)
        .sort("portfolio_id", date_col)
    )
    return issue_rows(
        sums,
        code="weights_not_summing",
        message=pl.format(
            "{}: portfolio {} on {}: weights sum to {}; expected 1 within {}.",
            pl.lit(table),
            "portfolio_id",
            pl.col(date_col).cast(pl.String),
            pl.col("total").round(8).cast(pl.String),
            pl.lit(f"{tolerance:g}"),
        ),
        period=date_col if date_col != "effective_from" else None,
    )


# --- cheap screens -------------------------------------------------------------------------
# Each screen answers "could this rule find anything?" in one vectorised pass over arrays the
# encoding already holds. A screen may answer yes when the rule then finds nothing, never the
# reverse; the rule itself (above) runs only on a yes, so clean tables — the usual case on a
# large roster — cost a few array passes instead of a filter per rule.


def _may_have_null_keys(frame: pl.DataFrame, keys: list[str]) -> bool:
    return any(frame[k].null_count() > 0 for k in keys)


def _may_be_nonfinite(frame: pl.DataFrame, value: str) -> bool:
    column = frame[value]
    return column.null_count() > 0 or not bool(np.isfinite(column.to_numpy()).all())


def _may_be_too_low(frame: pl.DataFrame) -> bool:
    values = frame["return"].to_numpy()
    # fmin skips NaN (empty cells), as the rule's filter does.
    return len(values) > 0 and bool(np.fmin.reduce(values) <= -1.0)


def _may_be_negative(frame: pl.DataFrame, code: str) -> bool:
    values = frame[code].to_numpy()
    return len(values) > 0 and bool(values.min() < 0)


#: Slack of the weight-sum screen: far above the rounding difference between two summation
#: orders of one date's weights, far below any tolerance a user would set.
_SUM_SLACK = 1e-9


def _may_not_sum(frame: pl.DataFrame, n_t: int, tolerance: float) -> bool:
    """Screen for :func:`_not_summing` on coded holdings: sums per (portfolio, period code).

    Only valid when every row has a calendar code (then a code stands for exactly one date);
    otherwise it answers yes. A group is flagged when its sum is off by more than the
    tolerance less a slack that covers summing in another order.
    """
    t = frame["_t"].to_numpy()
    if len(t) == 0:
        return False
    if (t < 0).any():
        return True
    weight = frame["weight"].to_numpy()
    key = frame["_p"].to_numpy() * n_t + t
    finite = np.isfinite(weight)
    if not finite.all():
        key, weight = key[finite], weight[finite]
    if len(key) == 0:
        return False
    size = int(key.max()) + 1
    sums = np.bincount(key, weights=weight, minlength=size)
    magnitude = np.bincount(key, weights=np.abs(weight), minlength=size)
    present = np.zeros(size, dtype=bool)
    present[key] = True
    off = np.abs(sums - 1.0) > tolerance - _SUM_SLACK * (1.0 + magnitude)
    return bool((off & present).any())


def check_portfolio_tables(
    tables: dict[str, pl.DataFrame | None],
    calendar: Calendar,
    codes: Codes,
    *,
    weight_tolerance: float,
) -> pl.DataFrame:
    """Apply every portfolio-level rule to encoded tables and return the issues found.

    The tables carry the ``_p``/``_t``/``_k`` codes of :func:`attribution.panel.encode`.
    Rules and codes are listed in :data:`ISSUE_CODES`. Holdings dates must be calendar
    period ends or the first period's start; return dates must be calendar period ends.
    Portfolios that appear only outside holdings are found by :func:`orphan_issues`.
    A rule's issue rows are built only when its cheap screen says the table may break it.
    """
    holdings = tables["holdings"]
    policy = tables["policy"]
    assert holdings is not None
    assert policy is not None
    n_t, n_k = codes.n_periods + 1, len(codes.classes)
    found: list[pl.DataFrame] = []
    h_keys = ["as_of", "asset_class"]
    if _may_have_null_keys(holdings, h_keys):
        found.append(_null_keys(holdings, "holdings", h_keys))
    found.append(_duplicates(holdings, "holdings", h_keys, "as_of", "asset_class", n_t, n_k))
    if _may_be_nonfinite(holdings, "weight"):
        found.append(_nonfinite(holdings, "holdings", "weight", "as_of", "asset_class"))
    if _may_be_negative(holdings, "_t"):
        found.append(
            _off_calendar(
                holdings,
                "holdings",
                "as_of",
                "a period_end or the first period's start " + str(calendar.first_start),
            )
        )
    if _may_be_negative(holdings, "_k"):
        found.append(_unknown_class(holdings, "holdings", codes.classes))
    if _may_not_sum(holdings, n_t, weight_tolerance):
        found.append(_not_summing(holdings, "holdings", "as_of", weight_tolerance))
    p_keys = ["effective_from", "asset_class"]
    found += [
        _null_keys(policy, "policy", p_keys),
        _duplicates(policy, "policy", p_keys, "effective_from", "asset_class", n_t, n_k),
        _nonfinite(policy, "policy", "weight", "effective_from", "asset_class"),
        _unknown_class(policy, "policy", codes.classes),
        _not_summing(policy, "policy", "effective_from", weight_tolerance),
    ]
    segments = tables.get("segment_returns")
    if segments is not None:
        found += _return_table_issues(segments, "segment_returns", "asset_class", n_t, n_k, codes)
    reported = tables.get("portfolio_returns")
    if reported is not None:
        found += _return_table_issues(reported, "portfolio_returns", None, n_t, n_k, codes)
    return pl.concat([empty_issues(), *found], how="vertical")


def _return_table_issues(
    frame: pl.DataFrame,
    table: str,
    class_col: str | None,
    n_t: int,
    n_k: int,
    codes: Codes,
) -> list[pl.DataFrame]:
    """The rules for segment_returns (``class_col`` given) and portfolio_returns."""
    keys = ["period_end", class_col] if class_col else ["period_end"]
    found: list[pl.DataFrame] = []
    if _may_have_null_keys(frame, keys):
        found.append(_null_keys(frame, table, keys))
    found.append(_duplicates(frame, table, keys, "period_end", class_col, n_t, n_k))
    if _may_be_nonfinite(frame, "return"):
        found.append(_nonfinite(frame, table, "return", "period_end", class_col))
    if _may_be_too_low(frame):
        found.append(_too_low(frame, table, class_col))
    if _may_be_negative(frame, "_t"):
        found.append(_off_calendar(frame, table, "period_end", "a period_end"))
    if class_col is not None and _may_be_negative(frame, "_k"):
        found.append(_unknown_class(frame, table, codes.classes))
    return found


def orphan_issues(held: pl.Series, others: list[pl.Series]) -> pl.DataFrame:
    """``no_holdings`` warnings for portfolios present in other tables but not in holdings."""
    if not others:
        return empty_issues()
    orphans = (
        pl.concat([o.alias("portfolio_id") for o in others])
        .unique()
        .to_frame()
        .filter(~pl.col("portfolio_id").is_in(held.implode()))
        .sort("portfolio_id")
    )
    return issue_rows(
        orphans,
        code="no_holdings",
        message=pl.format(
            "portfolio {} appears in other tables but has no holdings; it is not evaluated.",
            "portfolio_id",
        ),
    )


def skipped_portfolios(issues: pl.DataFrame) -> pl.Series:
    """Portfolios with at least one ``error``-severity issue (they are not evaluated)."""
    return issues.filter(pl.col("severity") == "error")["portfolio_id"].unique().sort()
