"""The arrays the timing tests read: market excess returns, class betas, exposures, decisions.

Turns the engine's validated frames into numpy arrays and derives everything DESIGN §4 defines:

* market return m_t: the portfolio's policy return (default) or a named class's index return;
  riskless return f_t; market excess x_t = m_t − f_t;
* class betas β_i against the market, on excess returns over the whole calendar (default) or
  strictly ex-ante on an expanding window;
* exposure e_t = Σ_i w_{t,i} β_i (weights held over t, set at its start), static exposure
  Σ_i s_{t,i} β_i, or the risky weight 1 − w_cash;
* decisions: the periods whose weights come from a real holdings date (not drifted), each with
  the span of periods it governs until the next holdings date, the market excess over that span,
  the exposure change its trades caused net of passive drift, and the Grinblatt–Titman term.

Layout: per-period data are "rows" in the order of the series frame sorted by portfolio and
period (a portfolio's periods are contiguous in the calendar); class-level data are (rows, K)
matrices. Only per-portfolio series handed to the batched tests are padded to (P, N).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import polars as pl

FloatArray = np.ndarray
BoolArray = np.ndarray
IntArray = np.ndarray


@dataclass(frozen=True, slots=True, kw_only=True)
class ExposureSpec:
    """How exposure is measured (the part of the timing options this module needs).

    market : "policy" or an asset class name.
    exposure : "beta" or "risky-weight".
    cash_class : the class whose weight is not risky (needed for "risky-weight").
    beta_window : None for the whole calendar, else N for the expanding ex-ante window.
    """

    market: str
    exposure: str
    cash_class: str | None
    beta_window: int | None


@dataclass(frozen=True, slots=True, kw_only=True)
class RosterArrays:
    """Per-period arrays of the whole roster (R rows = portfolio-periods, K classes).

    portfolio_ids : the P portfolio ids, sorted; classes : the K classes, sorted;
    calendar : the calendar's period ends (datetime64[D]).
    n_periods, first_row, calendar_start : (P,) periods, first row, first calendar position.
    row_portfolio, row_time : (R,) portfolio and position within its record of each row.
    weight, static_weight : (R, K) weights held over the period and static weights.
    index_return : (R, K) class index returns; class_return : (R, K) segment return where known,
        else index return (what drift follows).
    policy_return, portfolio_return, riskless, market, exposure, static_exposure : (R,).
    drifted : (R,) True where the weights came from drift, not a holdings date.
    beta : class betas, (P, K) per portfolio (whole calendar, or the risky-weight 0/1) or
        (P or 1, C, K) per calendar period (expanding window; NaN until it fills).
    """

    portfolio_ids: list[str]
    classes: list[str]
    calendar: np.ndarray
    n_periods: IntArray
    first_row: IntArray
    calendar_start: IntArray
    row_portfolio: IntArray
    row_time: IntArray
    weight: FloatArray
    static_weight: FloatArray
    index_return: FloatArray
    class_return: FloatArray
    policy_return: FloatArray
    portfolio_return: FloatArray
    riskless: FloatArray
    market: FloatArray
    exposure: FloatArray
    static_exposure: FloatArray
    drifted: BoolArray
    beta: FloatArray

    @property
    def market_excess(self) -> FloatArray:
        """x_t = m_t − f_t over each period."""
        return self.market - self.riskless

    @property
    def mask(self) -> BoolArray:
        """(P, N) real periods in the padded layout."""
        width = int(self.n_periods.max(initial=0))
        return np.arange(width)[None, :] < self.n_periods[:, None]

    def pad(self, values: np.ndarray) -> np.ndarray:
        """Rows → (P, N[, K]) padded layout, NaN (False for booleans) beyond each record."""
        width = int(self.n_periods.max(initial=0))
        fill = False if values.dtype == bool else np.nan
        out = np.full((self.n_periods.size, width, *values.shape[1:]), fill, dtype=values.dtype)
        out[self.row_portfolio, self.row_time] = values
        return out


@dataclass(frozen=True, slots=True, kw_only=True)
class DecisionArrays:
    """Per-decision arrays, shape (P, D), decisions left-aligned in time order.

    mask : real decisions. row : the decision's row in :class:`RosterArrays`.
    span_length : periods the decision governs (until the next holdings date).
    market_excess : market excess over the span, Π(1 + m) − Π(1 + f) over its periods (exactly
        m − f for a one-period span).
    exposure, static_exposure : at the decision.
    trade_change : e(w_t) − e(w̃_t), w̃_t the previous period's weights grown buy-and-hold to the
        decision date; NaN for a portfolio's first period.
    drift_change : e(w̃_t) − e(w_{t−1}), the exposure change drift alone caused.
    pcm_term : Σ_i (w_{j,i} − w_{j−k,i}) R_{j,i}, R the class index return compounded over the
        span, k the lag in decisions; NaN for the first k decisions.
    weight_change : max_i |w_{j,i} − w_{j−k,i}| (NaN where pcm_term is).
    """

    mask: BoolArray
    row: IntArray
    span_length: IntArray
    market_excess: FloatArray
    exposure: FloatArray
    static_exposure: FloatArray
    trade_change: FloatArray
    drift_change: FloatArray
    pcm_term: FloatArray
    weight_change: FloatArray


def book_positions(values: pl.Series, book: list[str]) -> np.ndarray:
    """Position of each text of ``values`` in ``book``, which must hold every one of them.

    An Enum column (as :func:`attribution.decompose.timing_effects` gives) is translated
    through its categories: one lookup per category, then one gather over the rows, instead
    of reading every row's text.
    """
    dtype = values.dtype
    if isinstance(dtype, pl.Enum):
        categories = dtype.categories.to_list()
        physical = values.to_physical().to_numpy()
        if categories == book:
            return physical
        where = {text: i for i, text in enumerate(book)}
        lookup = np.array([where.get(text, -1) for text in categories], dtype=np.int64)
        positions = lookup[physical]
        # A category outside the book is harmless unless a row uses it.
        if lookup.min(initial=0) < 0 and (positions < 0).any():
            missing = sorted({categories[i] for i in np.unique(physical[positions < 0])})
            msg = f"timing: {values.name} values {missing[:5]} are not in {book[:5]}..."
            raise ValueError(msg)
        return positions
    return values.cast(pl.Enum(book)).to_physical().to_numpy()


def build_roster_arrays(
    effects: pl.DataFrame,
    series: pl.DataFrame,
    index_returns: pl.DataFrame,
    riskless: pl.DataFrame,
    spec: ExposureSpec,
) -> RosterArrays:
    """Decode the engine's frames into row arrays and compute betas and exposures.

    Betas are slopes of class excess returns on market excess returns,
    β_i = Cov(b_i − f, m − f) / Var(m − f), over the whole calendar of index returns; with the
    policy as market, each portfolio's market over calendar periods outside its record is its
    first (before) or last (after) policy mix applied to the index returns, so betas remain a
    property of the classes and the policy, not of the record's length. With an expanding
    window of N, the beta for calendar period c uses periods before c only and is NaN until N
    such periods exist. Exposure "risky-weight" sets β = 0 for the cash class and 1 otherwise.
    """
    calendar = np.sort(index_returns.get_column("period_end").unique().to_numpy())
    classes = sorted(index_returns.get_column("asset_class").unique().to_list())
    n_cal, n_cls = calendar.size, len(classes)
    cal_days = calendar.astype("datetime64[D]").astype(np.int64)

    idx_codes = index_returns.select(
        pl.col("asset_class").cast(pl.Enum(classes)).to_physical().cast(pl.Int64),
        pl.col("period_end").cast(pl.Int64),
    )
    bench = np.full((n_cal, n_cls), np.nan)
    bench[
        _day_positions(idx_codes.get_column("period_end").to_numpy(), cal_days),
        idx_codes.get_column("asset_class").to_numpy(),
    ] = index_returns.get_column("return").to_numpy()
    rf_cal = np.full(n_cal, np.nan)
    rf_pos = _day_positions(riskless.get_column("period_end").cast(pl.Int64).to_numpy(), cal_days)
    on_cal = rf_pos >= 0
    rf_cal[rf_pos[on_cal]] = riskless.get_column("return").to_numpy()[on_cal]

    ser = series.sort("portfolio_id", "period_end")
    portfolio_ids = ser.get_column("portfolio_id").unique(maintain_order=True).to_list()
    ser_codes = ser.select(
        pl.col("portfolio_id").cast(pl.Enum(portfolio_ids)).to_physical().cast(pl.Int64),
        pl.col("period_end").cast(pl.Int32),
    )
    row_portfolio = ser_codes.get_column("portfolio_id").to_numpy()
    ser_days = ser_codes.get_column("period_end").to_numpy()
    row_cal = _day_positions(ser_days, cal_days)
    n_port = len(portfolio_ids)
    n_periods = np.bincount(row_portfolio, minlength=n_port)
    first_row = np.concatenate([[0], np.cumsum(n_periods)[:-1]]).astype(np.int64)
    row_time = np.arange(row_portfolio.size) - first_row[row_portfolio]
    calendar_start = row_cal[first_row] if n_port else np.zeros(0, dtype=np.int64)
    if np.any(row_cal - calendar_start[row_portfolio] != row_time):
        msg = "timing: each portfolio's periods must be contiguous calendar periods"
        raise ValueError(msg)

    # Effects rows -> (row, class). Classes a portfolio never mentions keep weight 0.
    e_port = book_positions(effects.get_column("portfolio_id"), portfolio_ids)
    e_class = book_positions(effects.get_column("asset_class"), classes)
    e_days = effects.get_column("period_end").cast(pl.Int32).to_numpy()
    n_rows = row_portfolio.size
    # Sorted and complete (every class in every period, rows in series order): then the
    # effects columns reshape to (rows, K) without a scatter. Checked on the integer codes.
    in_order = effects.height == n_rows * n_cls and bool(
        np.all(e_port.reshape(n_rows, n_cls) == row_portfolio[:, None])
        and np.all(e_class.reshape(n_rows, n_cls) == np.arange(n_cls)[None, :])
        and np.all(e_days.reshape(n_rows, n_cls) == ser_days[:, None])
    )
    lin = np.zeros(0, dtype=np.int64)
    if not in_order:
        port64 = e_port.astype(np.int64)
        e_cal = _day_positions(e_days, cal_days)
        lin = (first_row[port64] + e_cal - calendar_start[port64]) * n_cls + e_class
        del port64, e_cal

    def per_class(column: str, fill: float) -> np.ndarray:
        col = effects.get_column(column)
        values = col.to_numpy()
        if in_order:
            matrix = values.reshape(n_rows, n_cls)
            return np.where(np.isnan(matrix), fill, matrix) if col.null_count() else matrix
        out = np.full(n_rows * n_cls, fill)
        out[lin] = values
        return out.reshape(n_rows, n_cls)

    weight = per_class("weight", 0.0)
    static_weight = per_class("static_weight", 0.0)
    index_return = np.take(bench, row_cal, axis=0)
    segment_col = effects.get_column("segment_return")
    if segment_col.null_count() == segment_col.len():
        class_return = index_return
    elif segment_col.null_count() == 0 and in_order:
        class_return = per_class("segment_return", np.nan)
    else:
        segment = per_class("segment_return", np.nan)
        class_return = np.where(np.isnan(segment), index_return, segment)

    policy_return = ser.get_column("policy_return").to_numpy().astype(float)
    riskless_rows = rf_cal[row_cal]
    if spec.market == "policy":
        market = policy_return
    else:
        market = index_return[:, classes.index(spec.market)].copy()

    beta_of_row = _betas(
        spec,
        bench=bench,
        rf_cal=rf_cal,
        classes=classes,
        effects=effects,
        lin=lin,
        in_order=in_order,
        n_rows=n_rows,
        policy_return=policy_return,
        row_portfolio=row_portfolio,
        row_cal=row_cal,
        first_row=first_row,
        n_periods=n_periods,
    )
    exposure = _dot_beta(weight, beta_of_row, row_portfolio, row_cal, n_periods)
    static_exposure = _dot_beta(static_weight, beta_of_row, row_portfolio, row_cal, n_periods)

    return RosterArrays(
        portfolio_ids=portfolio_ids,
        classes=classes,
        calendar=calendar.astype("datetime64[D]"),
        n_periods=n_periods,
        first_row=first_row,
        calendar_start=calendar_start,
        row_portfolio=row_portfolio,
        row_time=row_time,
        weight=weight,
        static_weight=static_weight,
        index_return=index_return,
        class_return=class_return,
        policy_return=policy_return,
        portfolio_return=ser.get_column("portfolio_return").to_numpy().astype(float),
        riskless=riskless_rows,
        market=market,
        exposure=exposure,
        static_exposure=static_exposure,
        drifted=ser.get_column("is_drifted").to_numpy().astype(bool),
        beta=beta_of_row,
    )


def _day_positions(days: np.ndarray, cal_days: np.ndarray) -> IntArray:
    """Calendar position of each day number; −1 where the day is not a calendar period end.

    A lookup table over the calendar's span of days makes this one gather per row.
    """
    days = np.asarray(days, dtype=np.int64)
    if cal_days.size == 0 or days.size == 0:
        return np.full(days.shape, -1, dtype=np.int64)
    lo = int(cal_days[0])
    table = np.full(int(cal_days[-1]) - lo + 1, -1, dtype=np.int64)
    table[cal_days - lo] = np.arange(cal_days.size)
    if days.min() >= lo and days.max() < lo + table.size:
        return table[days - lo]
    offset = days - lo
    inside = (offset >= 0) & (offset < table.size)
    return np.where(inside, table[np.where(inside, offset, 0)], -1)


def _beta_per_row(
    beta: FloatArray, row_portfolio: IntArray, row_cal: IntArray, n_periods: IntArray
) -> FloatArray:
    """(R, K) betas in force at each row from (P, K) or (P or 1, C, K) betas."""
    if beta.ndim == 2:
        return np.repeat(beta, n_periods, axis=0)
    m_rows = row_portfolio if beta.shape[0] > 1 else np.zeros_like(row_portfolio)
    return beta[m_rows, row_cal]


def _dot_beta(
    values: FloatArray,
    beta: FloatArray,
    row_portfolio: IntArray,
    row_cal: IntArray,
    n_periods: IntArray,
    *,
    times: FloatArray | None = None,
) -> FloatArray:
    """Σ_i values_{r,i} [times_{r,i}] β_i for every row r, with the beta in force at that row.

    When betas are per portfolio and every record has the same length, the rows reshape to
    (P, N, K) and neither the betas nor the product are copied to (R, K) arrays.
    """
    operands = [values] if times is None else [values, times]
    if beta.ndim == 2 and n_periods.size and np.all(n_periods == n_periods[0]):
        shape = (n_periods.size, int(n_periods[0]), values.shape[1])
        shaped = [a.reshape(shape) for a in operands]
        spec = ",".join(["pnk"] * len(shaped)) + ",pk->pn"
        return np.einsum(spec, *shaped, beta).ravel()
    spec = ",".join(["rk"] * len(operands)) + ",rk->r"
    return np.einsum(spec, *operands, _beta_per_row(beta, row_portfolio, row_cal, n_periods))


def row_max_abs_difference(
    a: FloatArray, b: FloatArray, *, chunk_rows: int = 131_072
) -> FloatArray:
    """max_i |a_{r,i} − b_{r,i}| per row, in row chunks so no full (R, K) temporary is made."""
    out = np.empty(a.shape[0])
    for start in range(0, a.shape[0], chunk_rows):
        part = slice(start, start + chunk_rows)
        out[part] = np.abs(a[part] - b[part]).max(axis=1, initial=0.0)
    return out


def _betas(
    spec: ExposureSpec,
    *,
    bench: FloatArray,
    rf_cal: FloatArray,
    classes: list[str],
    effects: pl.DataFrame,
    lin: IntArray,
    in_order: bool,
    n_rows: int,
    policy_return: FloatArray,
    row_portfolio: IntArray,
    row_cal: IntArray,
    first_row: IntArray,
    n_periods: IntArray,
) -> FloatArray:
    """Class betas: (P, K) for the whole calendar, (P or 1, C, K) for an expanding window."""
    n_port, n_cls = n_periods.size, len(classes)
    if spec.exposure == "risky-weight":
        beta = np.ones(n_cls)
        beta[classes.index(str(spec.cash_class))] = 0.0
        return np.broadcast_to(beta, (n_port, n_cls))

    excess = bench - rf_cal[:, None]
    if spec.market != "policy":
        market_ex = excess[:, classes.index(spec.market)][None, :]
    else:
        # The policy market over the whole calendar: the record's own policy returns inside it,
        # the first and last policy mixes applied to index returns before and after it.
        wanted = np.concatenate([first_row, first_row + n_periods - 1])
        if in_order:
            cells = (wanted[:, None] * n_cls + np.arange(n_cls)[None, :]).ravel()
            values = effects.get_column("policy_weight").gather(cells).to_numpy()
            mix = np.nan_to_num(values.reshape(wanted.size, n_cls))
        else:
            mix = np.zeros((2 * n_port, n_cls))
            row_of_lin = lin // n_cls
            slot = np.full(n_rows, -1)
            slot[wanted[n_port:]] = np.arange(n_port, 2 * n_port)
            slot[wanted[:n_port]] = np.arange(n_port)  # a one-period record: first wins
            pick = slot[row_of_lin] >= 0
            values = effects.get_column("policy_weight").to_numpy()
            mix[slot[row_of_lin[pick]], lin[pick] % n_cls] = np.nan_to_num(values[pick])
        lone = n_periods == 1
        mix[n_port:][lone] = mix[:n_port][lone]
        before = np.arange(bench.shape[0])[None, :] < row_cal[first_row][:, None]
        market = np.where(before, mix[:n_port] @ bench.T, mix[n_port:] @ bench.T)
        market[row_portfolio, row_cal] = policy_return
        market_ex = market - rf_cal[None, :]

    if spec.beta_window is None:
        beta = _full_sample_beta(market_ex, excess)
        return np.broadcast_to(beta, (n_port, n_cls)) if beta.shape[0] == 1 else beta
    return _expanding_beta(market_ex, excess, spec.beta_window)


def _full_sample_beta(market_ex: FloatArray, excess: FloatArray) -> FloatArray:
    """β_i = Σ_c (x_c − x̄)(y_ic − ȳ_i) / Σ_c (x_c − x̄)², per market row; shape (M, K)."""
    ok = ~np.isnan(market_ex) & ~np.isnan(excess).any(axis=1)[None, :]
    n = ok.sum(axis=1)
    x_bar = np.where(ok, market_ex, 0.0).sum(axis=1) / n
    xc = np.where(ok, market_ex - x_bar[:, None], 0.0)
    ex = np.where(np.isnan(excess), 0.0, excess)
    # Σ_c xc_c (y_c − ȳ) = Σ_c xc_c y_c because Σ_c xc_c = 0 over the periods used.
    cov = xc @ ex
    var = (xc * xc).sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return cov / var[:, None]


def _expanding_beta(market_ex: FloatArray, excess: FloatArray, window: int) -> FloatArray:
    """Ex-ante betas: for calendar period c, the slope over periods before c; (M, C, K).

    NaN until ``window`` earlier periods exist. Prefix sums of x, y, x², xy give the moments.
    """
    n_mkt, n_cal = market_ex.shape
    x = np.nan_to_num(market_ex)
    y = np.nan_to_num(excess)
    zero = np.zeros((n_mkt, 1))
    s_x = np.concatenate([zero, np.cumsum(x, axis=1)[:, :-1]], axis=1)
    s_xx = np.concatenate([zero, np.cumsum(x * x, axis=1)[:, :-1]], axis=1)
    s_y = np.concatenate([np.zeros((1, y.shape[1])), np.cumsum(y, axis=0)[:-1]], axis=0)
    xy = x[:, :, None] * y[None, :, :]
    s_xy = np.concatenate([np.zeros((n_mkt, 1, y.shape[1])), np.cumsum(xy, axis=1)[:, :-1]], 1)
    count = np.arange(n_cal, dtype=float)[None, :]
    with np.errstate(invalid="ignore", divide="ignore"):
        cov = s_xy - s_x[:, :, None] * s_y[None, :, :] / count[:, :, None]
        var = s_xx - s_x * s_x / count
        beta = cov / var[:, :, None]
    return np.where((count >= window)[:, :, None], beta, np.nan)


def build_decision_arrays(arrays: RosterArrays, *, pcm_lag: int) -> DecisionArrays:
    """Decisions (periods starting at a real holdings date) and what each one governs.

    A decision's span runs from its period to the period before the next decision (or to the
    end of the record). Over the span, the market excess return is the compounded market
    return minus the compounded riskless return, Π(1 + m_t) − Π(1 + f_t), which is exactly
    m_t − f_t for a one-period span; class returns compound the same way. Drift between
    decisions: w̃_t = w_{t−1} ⊙ (1 + r_{t−1}) / (1 + Σ_i w_{t−1,i} r_{t−1,i}), r the segment
    return where known, else the index return (DESIGN §4, Ferson & Khang 2002). The
    Grinblatt–Titman term of decision j uses the weights decided k = ``pcm_lag`` decisions
    earlier and the class returns over decision j's span.
    """
    n_rows = arrays.row_portfolio.size
    n_port = arrays.n_periods.size
    is_decision = ~arrays.drifted
    span_start = is_decision | (arrays.row_time == 0)
    starts = np.flatnonzero(span_start)
    lengths = np.diff(np.append(starts, n_rows))
    keep = is_decision[starts]
    dec_rows = starts[keep]
    dec_len = lengths[keep]

    m = arrays.market
    f = arrays.riskless
    single = dec_len == 1
    x_span = m[dec_rows] - f[dec_rows]
    r_span = arrays.index_return if dec_rows.size == n_rows else arrays.index_return[dec_rows]
    if not single.all():
        # Multi-period spans (holdings less frequent than returns): compound over the span.
        grow_m = np.multiply.reduceat(1.0 + m, starts)[keep]
        grow_f = np.multiply.reduceat(1.0 + f, starts)[keep]
        grow_b = np.multiply.reduceat(1.0 + arrays.index_return, starts, axis=0)[keep]
        x_span = np.where(single, x_span, grow_m - grow_f)
        r_span = np.where(single[:, None], r_span, grow_b - 1.0)

    # Trade- and drift-driven exposure changes, first for every row from its predecessor row
    # (aligned slices, no gathers), then read at the decisions:
    # Σ w̃ β = (Σ w β + Σ w r β) / (1 + Σ w r) with w, r of the previous period.
    w_prev, r_prev = arrays.weight[:-1], arrays.class_return[:-1]
    total_prev = np.einsum("rk,rk->r", w_prev, r_prev)
    if arrays.beta.ndim == 2:
        # Betas fixed per portfolio: the previous row's betas are the current row's, so the
        # sums reuse the previous row's exposure and one per-row dot product.
        cal = arrays.calendar_start[arrays.row_portfolio] + arrays.row_time
        grown = _dot_beta(
            arrays.weight,
            arrays.beta,
            arrays.row_portfolio,
            cal,
            arrays.n_periods,
            times=arrays.class_return,
        )
        e_prev_all = arrays.exposure[:-1]
        e_drift_all = (e_prev_all + grown[:-1]) / (1.0 + total_prev)
    else:
        beta_now = _beta_per_row(
            arrays.beta,
            arrays.row_portfolio,
            arrays.calendar_start[arrays.row_portfolio] + arrays.row_time,
            arrays.n_periods,
        )[1:]
        e_prev_all = np.einsum("rk,rk->r", w_prev, beta_now)
        e_drift_all = (e_prev_all + np.einsum("rk,rk,rk->r", w_prev, r_prev, beta_now)) / (
            1.0 + total_prev
        )
    trade_all = np.full(n_rows, np.nan)
    drift_all = np.full(n_rows, np.nan)
    trade_all[1:] = arrays.exposure[1:] - e_drift_all
    drift_all[1:] = e_drift_all - e_prev_all
    first_period = arrays.row_time == 0
    trade_all[first_period] = np.nan
    drift_all[first_period] = np.nan
    trade = trade_all[dec_rows]
    drift = drift_all[dec_rows]

    # Decision index within each portfolio, and the Grinblatt–Titman term with lag k.
    dec_port = arrays.row_portfolio[dec_rows]
    rank = np.arange(dec_rows.size) - np.searchsorted(dec_port, dec_port, side="left")
    has_lag = rank >= pcm_lag
    pcm = np.full(dec_rows.size, np.nan)
    moved = np.full(dec_rows.size, np.nan)
    if dec_rows.size > pcm_lag:
        if dec_rows.size == n_rows:
            # Every period is a decision: the lagged weights are a shifted slice.
            now, before = arrays.weight[pcm_lag:], arrays.weight[:-pcm_lag]
        else:
            now = arrays.weight[dec_rows[pcm_lag:]]
            before = arrays.weight[dec_rows[:-pcm_lag]]
        later = r_span[pcm_lag:]
        pcm[pcm_lag:] = np.einsum("rk,rk->r", now, later) - np.einsum("rk,rk->r", before, later)
        moved[pcm_lag:] = row_max_abs_difference(now, before)
    pcm = np.where(has_lag, pcm, np.nan)
    moved = np.where(has_lag, moved, np.nan)

    n_dec = np.bincount(dec_port, minlength=n_port)
    width = int(n_dec.max(initial=0))
    mask = np.zeros((n_port, width), dtype=bool)
    mask[dec_port, rank] = True

    def pad(values: np.ndarray) -> np.ndarray:
        fill = 0 if values.dtype.kind in "iu" else np.nan
        out = np.full((n_port, width), fill, dtype=values.dtype)
        out[dec_port, rank] = values
        return out

    return DecisionArrays(
        mask=mask,
        row=pad(dec_rows.astype(np.int64)),
        span_length=pad(dec_len.astype(np.int64)),
        market_excess=pad(x_span),
        exposure=pad(arrays.exposure[dec_rows]),
        static_exposure=pad(arrays.static_exposure[dec_rows]),
        trade_change=pad(trade),
        drift_change=pad(drift),
        pcm_term=pad(pcm),
        weight_change=pad(moved),
    )
