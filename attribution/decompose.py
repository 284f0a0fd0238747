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

import dataclasses
from dataclasses import dataclass

import numpy as np
import polars as pl
import pyarrow as pa

from attribution.calendar import Calendar
from attribution.kernel import Effects, Panel, decompose_panel
from attribution.linking import link_arrays
from attribution.options import RunOptions
from attribution.panel import (
    Codes,
    build_panel,
    distinct_sorted,
    encode,
    make_codes,
    run_starts,
)
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
    """What one shard produces: tables, the per-period arrays, issues and who was skipped.

    The class-level table, the largest by far, is kept as the arrays it is made of (the
    shard's panel and kernel output). :meth:`effects_table` builds it as Arrow (text columns
    dictionary-encoded, numbers straight from the arrays), which is what a Parquet writer
    wants and can be done on the writer's thread; :attr:`effects` gives it as a polars frame
    with plain text columns.
    """

    panel: Panel
    kernel: Effects
    calendar: Calendar
    series: pl.DataFrame
    periods: PeriodArrays
    issues: pl.DataFrame
    skipped: tuple[str, ...]

    def effects_table(self) -> pa.Table:
        """The class-level table as Arrow (columns :data:`EFFECTS_ORDER`)."""
        return effects_table(self.panel, self.kernel, self.calendar)

    @property
    def effects(self) -> pl.DataFrame:
        """The class-level table as a polars frame (columns :data:`EFFECTS_ORDER`)."""
        return effects_frame(self.effects_table())


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
    p_all = holdings["_p"].to_numpy()
    inside = (t_all >= 0) & (t_all < n_t)
    if not inside.all():
        t_all, p_all = t_all[inside], p_all[inside]
    has = np.zeros((n_p, n_t), dtype=bool)
    has.reshape(-1)[p_all * n_t + t_all] = True
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
    # Holdings dated only on the calendar's last period_end start no period: say so rather
    # than let the portfolio vanish from every table.
    listed = np.zeros(n_p, dtype=bool)
    listed[holdings["_p"].to_numpy()] = True
    idle = np.flatnonzero(listed & ~present)
    idle_rows = pl.DataFrame({PID: ids.gather(idle)}, schema={PID: pl.String})
    idle_issues = issue_rows(
        idle_rows,
        code="no_holdings",
        message=pl.format(
            "holdings: portfolio {}: its only holdings date is the calendar's last period_end, "
            "where no period starts; nothing to evaluate.",
            PID,
        ),
    )
    return windows, pl.concat([issues, idle_issues])


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
    runs = run_starts(holdings[PID])
    ids = distinct_sorted(holdings[PID], runs)
    codes = make_codes(ids, classes, calendar)
    enc: dict[str, pl.DataFrame | None] = {
        "holdings": encode(holdings, codes, date="as_of", holdings=True, runs=runs),
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
    ruin_issues, ruined = _ruined_records(panel, eff, codes, calendar)
    if ruined:
        # A period return of -100 % or less (possible with leverage) cannot be compounded or
        # linked: such portfolios are skipped with an error rather than reported as NaN.
        skipped |= set(ruined)
        keep = ~np.isin(
            np.arange(len(codes.portfolio_ids)), [codes.portfolio_ids.index(p) for p in ruined]
        )
        panel = dataclasses.replace(panel, active=panel.active & keep[:, None])
        eff = decompose_panel(panel, static=options.static, form=options.form)
    periods = _period_arrays(panel, eff, calendar)
    series = _series_frame(panel, eff, periods, calendar, options)
    more = _kernel_issues(panel, eff, calendar)
    all_issues = pl.concat([empty_issues(), issues, gap_issues, policy_issues, ruin_issues, *more])
    return ShardResult(
        panel=panel,
        kernel=eff,
        calendar=calendar,
        series=series,
        periods=periods,
        issues=all_issues,
        skipped=tuple(sorted(skipped)),
    )


def _ruined_records(
    panel: Panel, eff: Effects, codes: Codes, calendar: Calendar
) -> tuple[pl.DataFrame, list[str]]:
    """Portfolios with a computed, reported or policy period return of −100 % or less."""
    ruined = panel.active & ((eff.portfolio_return <= -1.0) | (eff.policy_return <= -1.0))
    bad = np.flatnonzero(ruined.any(axis=1))
    ids = [codes.portfolio_ids[p] for p in bad]
    first = np.argmax(ruined[bad], axis=1) if bad.size else np.zeros(0, dtype=np.int64)
    rows = pl.DataFrame(
        {PID: ids, "period_end": calendar.frame()["period_end"].gather(first)},
        schema={PID: pl.String, "period_end": pl.Date},
    )
    issues = issue_rows(
        rows,
        code="period_return_below_minus_100",
        message=pl.format(
            "portfolio {}: the period ending {} has a portfolio or policy return of -100 % or "
            "less (leveraged weights); the record cannot be compounded or linked.",
            PID,
            pl.col("period_end").cast(pl.String),
        ),
        period="period_end",
    )
    return issues, ids


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
    return pl.Series(values, dtype=pl.Float64, nan_to_null=True)


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
    n_p, n_t = panel.active.shape
    # Rows are the active (portfolio, period) cells in C order; when every cell is active
    # (the usual roster) the columns are flat views instead of gathers.
    flat = None if panel.active.all() else np.flatnonzero(panel.active)
    p = _spread(np.arange(n_p)[:, None], (n_p, n_t)) if flat is None else flat // n_t
    t = _spread(np.arange(n_t)[None, :], (n_p, n_t)) if flat is None else flat % n_t

    def rows(values: np.ndarray) -> np.ndarray:  # (P, T) or (P, T, J) -> rows
        cells = values.reshape(n_p * n_t, *values.shape[2:])
        return cells if flat is None else cells[flat]

    cal = calendar.frame()
    ids = pl.Series(list(panel.portfolio_ids), dtype=pl.String)
    sources = pl.Series(_return_source(panel).tolist(), dtype=pl.String)
    portfolio_return, policy_return = rows(eff.portfolio_return), rows(eff.policy_return)
    data: dict[str, pl.Series] = {
        PID: ids.gather(p),
        "period_end": cal["period_end"].gather(t),
        "period_start": cal["period_start"].gather(t),
        "return_source": sources.gather(p),
        "portfolio_return": _floats(portfolio_return),
        "computed_return": _floats(rows(eff.computed_return)),
        "policy_return": _floats(policy_return),
        "active_return": _floats(portfolio_return - policy_return),
    }
    effects = rows(periods.effects)
    for j, name in enumerate(LINKED_EFFECTS):
        data[name] = _floats(effects[:, j])
    data["is_drifted"] = pl.Series(rows(periods.is_drifted), dtype=pl.Boolean)
    cum_r, cum_b = rows(rc), rows(bc)
    data["cum_portfolio_return"] = _floats(cum_r)
    data["cum_policy_return"] = _floats(cum_b)
    data["cum_active_return"] = _floats(cum_r - cum_b)
    cum = rows(linked)
    for j, name in enumerate(LINKED_EFFECTS):
        data[f"cum_{name}"] = _floats(cum[:, j])
    return pl.DataFrame(data).select(SERIES_ORDER)


# Arrow arrays are made from numpy buffers directly: no copy, and ``pa.array`` is avoided
# because its first call imports pandas (a third of a second for nothing).


def _arrow_floats(values: np.ndarray) -> pa.Array:
    """A float64 Arrow array over ``values`` (no copy) with NaN turned into null."""
    values = np.ascontiguousarray(values, dtype=np.float64)
    nan = np.isnan(values)
    n_nan = int(np.count_nonzero(nan))
    if n_nan == len(values) and n_nan:
        return pa.nulls(len(values), pa.float64())
    valid = None if n_nan == 0 else pa.py_buffer(np.packbits(~nan, bitorder="little"))
    return pa.Array.from_buffers(
        pa.float64(), len(values), [valid, pa.py_buffer(values)], null_count=n_nan
    )


def _is_broadcast_nan(values: np.ndarray) -> bool:
    """One NaN seen through a broadcast view: an effect the form leaves unknown everywhere."""
    return values.size > 0 and not any(values.strides) and bool(np.isnan(values.flat[0]))


def _arrow_plain(values: np.ndarray, dtype: pa.DataType) -> pa.Array:
    """An Arrow array without nulls over an int32 numpy array (codes, day numbers) or a
    boolean one (packed into bits)."""
    if dtype == pa.bool_():
        data = np.packbits(np.asarray(values, dtype=bool), bitorder="little")
    else:
        data = np.ascontiguousarray(values, dtype=np.int32)
    return pa.Array.from_buffers(dtype, len(values), [None, pa.py_buffer(data)], null_count=0)


def _arrow_strings(values: tuple[str, ...]) -> pa.Array:
    encoded = [v.encode("utf-8") for v in values]
    offsets = np.zeros(len(encoded) + 1, dtype=np.int32)
    np.cumsum([len(v) for v in encoded], out=offsets[1:])
    buffers = [None, pa.py_buffer(offsets), pa.py_buffer(b"".join(encoded))]
    return pa.Array.from_buffers(pa.string(), len(values), buffers, null_count=0)


def _spread(values: np.ndarray, shape: tuple[int, ...]) -> np.ndarray:
    """``values`` broadcast to ``shape`` and laid out flat (a plain copy; ``np.repeat`` and
    ``np.tile`` do the same an order of magnitude slower)."""
    return np.broadcast_to(values, shape).reshape(-1)


def _text_codes(codes: np.ndarray, values: tuple[str, ...]) -> pa.DictionaryArray:
    return pa.DictionaryArray.from_arrays(_arrow_plain(codes, pa.int32()), _arrow_strings(values))


def effects_table(panel: Panel, eff: Effects, calendar: Calendar) -> pa.Table:
    """The class-level table for every class in the portfolio's universe (held or policy),
    as Arrow, rows ordered by portfolio, period and class.

    Built from the kernel's arrays without a detour through text: portfolio and class are
    dictionary-encoded codes, dates are day numbers, floats are the arrays themselves (a
    flat view when every cell is in the table, which is the usual case).
    """
    n_p, n_t, n_k = eff.weight.shape
    mask = panel.active[:, :, None] & panel.universe[:, None, :]
    end_days = calendar.frame()["period_end"].cast(pl.Int32).to_numpy()
    if mask.all():
        flat = None
        p = _spread(np.arange(n_p, dtype=np.int32)[:, None, None], (n_p, n_t, n_k))
        k = _spread(np.arange(n_k, dtype=np.int32)[None, None, :], (n_p, n_t, n_k))
        days = _spread(end_days[None, :, None], (n_p, n_t, n_k))
        index = _spread(panel.index[None, :, :], (n_p, n_t, n_k))
    else:
        flat = np.flatnonzero(mask)
        cell = flat // n_k
        p = cell // n_t
        days = end_days[cell % n_t]
        k = flat % n_k
        index = panel.index.reshape(-1)[flat % (n_t * n_k)]

    n_rows = n_p * n_t * n_k if flat is None else len(flat)

    def cells(values: np.ndarray) -> np.ndarray:  # (P, T, K) -> rows
        return values.reshape(-1) if flat is None else values.reshape(-1)[flat]

    def periods(values: np.ndarray) -> np.ndarray:  # (P, T) -> rows
        if flat is None:
            return _spread(values[:, :, None], (n_p, n_t, n_k))
        return values.reshape(-1)[cell]

    columns = {
        PID: _text_codes(p, panel.portfolio_ids),
        "period_end": _arrow_plain(days, pa.date32()),
        "asset_class": _text_codes(k, panel.classes),
        "weight": _arrow_floats(cells(eff.weight)),
        "static_weight": _arrow_floats(cells(eff.static_weight)),
        "policy_weight": _arrow_floats(cells(panel.policy)),
        "index_return": _arrow_floats(index),
        "segment_return": _arrow_floats(cells(panel.segment)),
        "policy_return": _arrow_floats(periods(eff.policy_return)),
        "static_allocation": _arrow_floats(cells(eff.static_allocation)),
        "timing": _arrow_floats(cells(eff.timing)),
        "selection": _arrow_floats(cells(eff.selection)),
        "interaction": (
            pa.nulls(n_rows, pa.float64())
            if _is_broadcast_nan(eff.interaction)
            else _arrow_floats(cells(eff.interaction))
        ),
        "is_drifted": _arrow_plain(periods(~panel.holding), pa.bool_()),
    }
    return pa.table(columns)


#: The effects columns the timing layer reads.
TIMING_EFFECTS_COLUMNS = (
    PID,
    "period_end",
    "asset_class",
    "weight",
    "static_weight",
    "policy_weight",
    "segment_return",
)


def timing_effects(table: pa.Table) -> pl.DataFrame:
    """The columns of an :func:`effects_table` that the timing layer reads, as polars, with
    portfolio and class as Enum columns over the table's own dictionaries: a fraction of the
    cost of :func:`effects_frame`, and the timing layer only turns them into integer codes
    (:func:`attribution.timing_inputs.book_positions`), which then never touches the text."""
    slim = table.select(list(TIMING_EFFECTS_COLUMNS))
    frame = pl.from_arrow(slim.drop_columns([PID, "asset_class"]))
    assert isinstance(frame, pl.DataFrame)
    coded = [_enum_column(name, slim.column(name)) for name in (PID, "asset_class")]
    return frame.with_columns(coded).select(TIMING_EFFECTS_COLUMNS)


def _enum_column(name: str, column: pa.ChunkedArray) -> pl.Series:
    """A dictionary-encoded Arrow column as a polars Enum over its dictionary, built from the
    integer codes so that the rows' text is never materialised.

    ``Series.cat.to`` is marked unstable in polars: if it is missing or refuses, or the
    chunks carry different dictionaries, polars' own conversion (Categorical) is used.
    """
    chunks = column.chunks
    if chunks and all(c.dictionary.equals(chunks[0].dictionary) for c in chunks[1:]):
        enum = pl.Enum(chunks[0].dictionary.to_pylist())
        codes = np.concatenate([c.indices.to_numpy(zero_copy_only=False) for c in chunks])
        physical = pl.Series([], dtype=enum).to_physical().dtype
        try:
            return pl.Series(name, codes).cast(physical).cat.to(enum)
        except (AttributeError, pl.exceptions.PolarsError):
            pass
    series = pl.Series(name, column)
    assert isinstance(series, pl.Series)
    return series


def effects_frame(table: pa.Table) -> pl.DataFrame:
    """An effects table from :func:`effects_table` as polars, text columns as plain text."""
    frame = pl.from_arrow(table)
    assert isinstance(frame, pl.DataFrame)
    return frame.with_columns(pl.col(PID, "asset_class").cast(pl.String)).select(EFFECTS_ORDER)


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
