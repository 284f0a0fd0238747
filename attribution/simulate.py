"""Seeded, invented input data: the bundled demo roster and random rosters of any size.

Everything here is made up. Index returns come from a small factor model with
realistic monthly volatilities; portfolios follow simple, known behaviours (structural
tilts, timers with a chosen hit rate, coin-flippers, flat-weight selectors, buy-and-hold
drifters), so that the engine's results can be checked against what the generator put in.

Tables follow the input contract (DESIGN §2): long format, dates ``pl.Date``, returns and
weights ``pl.Float64``, names ``pl.String``. Period t runs from ``period_end[t-1]`` to
``period_end[t]``; its weights are the holdings ``as_of = period_end[t-1]``; the first
period starts one month before the first ``period_end``.

Randomness: one ``np.random.default_rng`` stream for the shared tables (index returns,
riskless return) and one per fixed-size block of portfolios, so a portfolio's rows depend
only on the seed, its number and the calendar/class sizes, never on how many portfolios are
made at once or on the shard size used to write them.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date, timedelta
from pathlib import Path
from typing import Literal

import numpy as np
import polars as pl
import pyarrow as pa
import pyarrow.parquet as pq

from attribution.errors import OptionError

__all__ = [
    "CATALOGUE",
    "DEMO_MANAGERS",
    "DEMO_PLAN",
    "DEMO_POLICY",
    "DEMO_SEED",
    "TABLES",
    "AssetClassSpec",
    "asset_classes",
    "demo_portfolio_values",
    "demo_roster",
    "demo_tables",
    "factor_index_returns",
    "hold_between_rebalances",
    "month_ends",
    "previous_month_end",
    "riskless_path",
    "shift_weights",
    "simulate_roster",
    "timing_signs",
    "write_simulated_roster",
    "write_tables",
]

TABLES = (
    "holdings",
    "index_returns",
    "policy",
    "riskfree",
    "segment_returns",
    "portfolio_returns",
)

Group = Literal["risky", "defensive", "other"]
TableFormat = Literal["parquet", "csv"]


# --------------------------------------------------------------------------------------
# Asset classes and the market
# --------------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True, kw_only=True)
class AssetClassSpec:
    """One invented asset class of the factor model.

    Fields: ``name``; ``group`` (``risky`` classes receive a timer's shifts, funded from the
    ``defensive`` ones; ``other`` classes are left alone); ``premium`` (expected monthly
    return over the riskless rate); ``loadings`` on the four factors (equity, rates, credit,
    commodity); ``idio`` (monthly standard deviation of the class's own noise).
    """

    name: str
    group: Group
    premium: float
    loadings: tuple[float, float, float, float]
    idio: float


# The order is the order in which classes are taken for a roster of n classes, so the first
# two already hold one risky and one defensive class. Invented numbers (common practice, no
# source): equities 4-5.5 %/month, bonds 1.5-2 %/month, cash = riskless + 0.01 %/month noise.
_CATALOGUE_ROWS: tuple[tuple[str, Group, float, tuple[float, float, float, float], float], ...] = (
    # name, group, premium, loadings on (equity, rates, credit, commodity), idio
    ("domestic_equity", "risky", 0.0060, (1.00, 0.0, 0.0, 0.0), 0.008),
    ("cash", "defensive", 0.0, (0.0, 0.0, 0.0, 0.0), 0.0001),
    ("government_bonds", "defensive", 0.0015, (-0.05, 1.0, 0.0, 0.0), 0.002),
    ("foreign_equity", "risky", 0.0050, (0.95, 0.0, 0.0, 0.0), 0.018),
    ("credit", "other", 0.0025, (0.12, 0.7, 1.0, 0.0), 0.003),
    ("emerging_equity", "risky", 0.0060, (1.15, 0.0, 0.0, 0.1), 0.025),
    ("real_estate", "other", 0.0045, (0.75, 0.4, 0.0, 0.0), 0.030),
    ("commodities", "other", 0.0020, (0.30, -0.2, 0.0, 1.0), 0.010),
    ("inflation_linked_bonds", "defensive", 0.0015, (0.0, 0.8, 0.0, 0.1), 0.004),
    ("high_yield", "other", 0.0040, (0.35, 0.3, 1.5, 0.0), 0.006),
    ("small_cap_equity", "risky", 0.0065, (1.15, 0.0, 0.0, 0.0), 0.022),
    ("infrastructure", "other", 0.0040, (0.60, 0.3, 0.0, 0.0), 0.020),
)
CATALOGUE: tuple[AssetClassSpec, ...] = tuple(
    AssetClassSpec(name=n, group=g, premium=p, loadings=ld, idio=i)
    for n, g, p, ld, i in _CATALOGUE_ROWS
)

# Monthly factor volatilities: equity, rates (duration), credit spread, commodity.
FACTOR_VOLS = np.array([0.040, 0.015, 0.008, 0.040])
# Equity shocks are Student-t with 5 degrees of freedom (fat tails), scaled to unit variance.
EQUITY_T_DF = 5.0


def asset_classes(n_classes: int) -> tuple[AssetClassSpec, ...]:
    """The first ``n_classes`` classes of the catalogue, sorted by name.

    Beyond the twelve named classes, extra classes ``extra_class_NNN`` cycle through a
    risky, an other and a defensive profile (invented numbers; common practice, no source).
    """
    specs = list(CATALOGUE[:n_classes])
    profiles: tuple[tuple[Group, float, tuple[float, float, float, float], float], ...] = (
        ("risky", 0.0055, (1.0, 0, 0, 0), 0.03),
        ("other", 0.0035, (0.4, 0.4, 0.5, 0.2), 0.015),
        ("defensive", 0.0015, (0, 0.8, 0, 0), 0.004),
    )
    for k in range(len(CATALOGUE), n_classes):
        group, premium, loadings, idio = profiles[(k - len(CATALOGUE)) % len(profiles)]
        specs.append(
            AssetClassSpec(
                name=f"extra_class_{k + 1:03d}",
                group=group,
                premium=premium,
                loadings=loadings,
                idio=idio,
            )
        )
    return tuple(sorted(specs, key=lambda s: s.name))


def month_ends(first: date, n_periods: int) -> list[date]:
    """``n_periods`` consecutive calendar month ends, the first in the month of ``first``."""
    ends = []
    for k in range(1, n_periods + 1):
        months = first.year * 12 + first.month - 1 + k
        ends.append(date(months // 12, months % 12 + 1, 1) - timedelta(days=1))
    return ends


def previous_month_end(day: date) -> date:
    """The month end before the month of ``day``: the start of a monthly calendar's first period."""
    return date(day.year, day.month, 1) - timedelta(days=1)


def riskless_path(n_periods: int, rng: np.random.Generator) -> np.ndarray:
    """Monthly riskless returns from a random walk in the annual rate, kept within 0-6 %.

    ``a_t = clip(0.01 + Σ_{s≤t} ε_s, 0, 0.06)``, ε ~ N(0, 0.15 %); monthly return
    ``(1 + a_t)^(1/12) − 1``. Invented (common practice, no source).
    """
    annual = np.clip(0.01 + np.cumsum(rng.normal(0.0, 0.0015, n_periods)), 0.0, 0.06)
    return (1.0 + annual) ** (1.0 / 12.0) - 1.0


def factor_index_returns(
    specs: tuple[AssetClassSpec, ...], riskless: np.ndarray, rng: np.random.Generator
) -> np.ndarray:
    """Index returns (periods × classes) from a linear factor model.

    ``b_{t,i} = rf_t + premium_i + Σ_f L_{i,f} F_{t,f} + σ_i ε_{t,i}``, with an equity factor
    drawn from a unit-variance Student-t (5 d.f.), normal rate, credit and commodity factors,
    and normal class noise. A textbook linear factor model (common practice, no source).
    """
    n_periods = riskless.shape[0]
    df = EQUITY_T_DF
    equity = rng.standard_t(df, n_periods) * np.sqrt((df - 2.0) / df)
    others = rng.normal(size=(n_periods, 3))
    factors = np.column_stack([equity, others]) * FACTOR_VOLS
    loadings = np.array([s.loadings for s in specs], dtype=np.float64)
    premium = np.array([s.premium for s in specs])
    idio = np.array([s.idio for s in specs])
    noise = rng.normal(size=(n_periods, len(specs))) * idio
    return riskless[:, None] + premium + factors @ loadings.T + noise


# --------------------------------------------------------------------------------------
# Weight rules shared by the demo and the random rosters
# --------------------------------------------------------------------------------------


def shift_weights(
    base: np.ndarray, shift: np.ndarray, risky: np.ndarray, defensive: np.ndarray
) -> np.ndarray:
    """Move ``shift`` of the portfolio from the defensive classes into the risky ones.

    With risky share ``R = Σ_risky q`` and defensive share ``D = Σ_defensive q`` of the base
    weights q, the shift d is capped to ``[−0.9 R, 0.9 D]`` (no weight turns negative); risky
    weights are scaled by ``(R + d)/R``, defensive ones by ``(D − d)/D``, the others kept, and
    the row divided by its sum so it adds to 1 in floating point. Pro-rata funding of a tilt
    (common practice, no source).

    ``base`` has shape (..., K), ``shift`` shape (...), the masks shape (K,).
    """
    share_risky = (base * risky).sum(axis=-1)
    share_defensive = (base * defensive).sum(axis=-1)
    d = np.clip(shift, -0.9 * share_risky, 0.9 * share_defensive)
    scale_risky = ((share_risky + d) / share_risky)[..., None]
    scale_defensive = ((share_defensive - d) / share_defensive)[..., None]
    scale = np.where(risky, scale_risky, np.where(defensive, scale_defensive, 1.0))
    weights = base * scale
    return weights / weights.sum(axis=-1, keepdims=True)


def hold_between_rebalances(
    targets: np.ndarray, rebalance: np.ndarray, returns: np.ndarray
) -> np.ndarray:
    """Weights held each period: reset to the target at rebalancing dates, else drifted.

    ``w_t = target_t`` where ``rebalance[t]``, else the buy-and-hold drift
    ``w_t = w_{t−1} (1 + r_{t−1}) / (1 + R_{t−1})`` with ``R_{t−1} = Σ_i w_{t−1,i} r_{t−1,i}``
    (DESIGN §2; METHODS §0, drifted weights). ``targets`` and ``returns`` have shape
    (n, T, K), ``rebalance`` shape (T,) with ``rebalance[0]`` true. Loops over periods only;
    every step is vectorised over portfolios.
    """
    weights = np.empty_like(targets)
    weights[:, 0] = targets[:, 0]
    for t in range(1, targets.shape[1]):
        if rebalance[t]:
            weights[:, t] = targets[:, t]
            continue
        prev = weights[:, t - 1]
        growth = 1.0 + returns[:, t - 1]
        total = 1.0 + (prev * returns[:, t - 1]).sum(axis=-1, keepdims=True)
        weights[:, t] = prev * growth / total
    return weights


def timing_signs(excess: np.ndarray, correct: np.ndarray) -> np.ndarray:
    """Shift directions ±1: the sign of the coming excess return where ``correct``, else reversed.

    A forecaster right with probability p in up and in down markets alike has
    p1 = p2 = p in the notation of Henriksson & Merton (1981); p = 0.5 is a coin-flipper.
    """
    up = np.where(excess > 0.0, 1.0, -1.0)
    return np.where(correct, up, -up)


# --------------------------------------------------------------------------------------
# Frames
# --------------------------------------------------------------------------------------


def _repeat_strings(values: pl.Series, index: np.ndarray) -> pl.Series:
    """``values[index]`` as a String series.

    Gathering through a Categorical and casting back is several times faster than gathering
    strings directly on tables of millions of rows (measured with polars 2.1).
    """
    return values.cast(pl.Categorical).gather(index).cast(pl.String)


def _date_column(dates: list[date], index: np.ndarray) -> pl.Series:
    """``dates[index]`` as a Date series, gathered on the integer day numbers."""
    days = pl.Series(dates, dtype=pl.Date).to_physical().to_numpy()
    return pl.Series(days[index]).cast(pl.Date)


@dataclass(frozen=True, slots=True, kw_only=True)
class _Grid:
    """Key columns of an (n, T, K) array flattened in row-major order.

    Built once and shared by the holdings and segment-return frames (polars columns are
    reference-counted, so sharing costs nothing).
    """

    portfolio_id: pl.Series
    asset_class: pl.Series
    date_index: np.ndarray
    shape: tuple[int, int, int]


def _grid(ids: pl.Series, n_dates: int, classes: list[str]) -> _Grid:
    n, n_classes = ids.len(), len(classes)
    per_portfolio = n_dates * n_classes
    return _Grid(
        portfolio_id=_repeat_strings(
            ids.alias("portfolio_id"), np.repeat(np.arange(n, dtype=np.uint32), per_portfolio)
        ),
        asset_class=_repeat_strings(
            pl.Series("asset_class", classes, dtype=pl.String),
            np.tile(np.arange(n_classes, dtype=np.uint32), n * n_dates),
        ),
        date_index=np.tile(np.repeat(np.arange(n_dates, dtype=np.uint32), n_classes), n),
        shape=(n, n_dates, n_classes),
    )


def _long_frame(
    grid: _Grid,
    dates: list[date],
    values: np.ndarray,
    *,
    date_column: str,
    value_column: str,
    keep: np.ndarray | None = None,
) -> pl.DataFrame:
    """Rows (portfolio_id, date, asset_class, value) from an (n, T, K) array on ``grid``."""
    if values.shape != grid.shape:
        msg = f"values of shape {values.shape} do not match the grid {grid.shape}"
        raise ValueError(msg)
    frame = pl.DataFrame(
        [
            grid.portfolio_id,
            _date_column(dates, grid.date_index).alias(date_column),
            grid.asset_class,
            pl.Series(value_column, values.reshape(-1)),
        ]
    )
    if keep is not None:
        frame = frame.filter(pl.Series(keep.reshape(-1)))
    return frame


def _portfolio_frame(
    ids: pl.Series, dates: list[date], values: np.ndarray, *, keep: np.ndarray | None = None
) -> pl.DataFrame:
    """Rows (portfolio_id, period_end, return) from an (n, T) array."""
    n, n_dates = values.shape
    frame = pl.DataFrame(
        [
            _repeat_strings(
                ids.alias("portfolio_id"), np.repeat(np.arange(n, dtype=np.uint32), n_dates)
            ),
            _date_column(dates, np.tile(np.arange(n_dates), n)).alias("period_end"),
            pl.Series("return", values.reshape(-1)),
        ]
    )
    if keep is not None:
        frame = frame.filter(pl.Series(keep.reshape(-1)))
    return frame


def _shared_frames(
    period_ends: list[date], classes: list[str], index_returns: np.ndarray, riskless: np.ndarray
) -> dict[str, pl.DataFrame]:
    n_dates, n_classes = index_returns.shape
    index_frame = pl.DataFrame(
        {
            "period_end": pl.Series(period_ends, dtype=pl.Date).gather(
                np.repeat(np.arange(n_dates), n_classes)
            ),
            "asset_class": pl.Series(classes, dtype=pl.String).gather(
                np.tile(np.arange(n_classes), n_dates)
            ),
            "return": index_returns.reshape(-1),
        }
    )
    riskfree = pl.DataFrame(
        {"period_end": pl.Series(period_ends, dtype=pl.Date), "return": riskless}
    )
    return {"index_returns": index_frame, "riskfree": riskfree}


def _policy_frame(
    ids: pl.Series,
    classes: list[str],
    weights: np.ndarray,
    effective: list[date],
    keep: np.ndarray,
) -> pl.DataFrame:
    """Rows (portfolio_id, asset_class, weight, effective_from) from (n, S, K) policy sets.

    ``keep`` (n, S) says which of the S candidate sets a portfolio actually has.
    """
    _, n_sets, n_classes = weights.shape
    frame = _long_frame(
        _grid(ids, n_sets, classes),
        effective,
        weights,
        date_column="effective_from",
        value_column="weight",
        keep=np.repeat(keep[:, :, None], n_classes, axis=2),
    )
    return frame.select("portfolio_id", "asset_class", "weight", "effective_from")


# --------------------------------------------------------------------------------------
# The demo roster
# --------------------------------------------------------------------------------------

DEMO_SEED = 20150194
DEMO_PLAN = "Lanternfield County Employees' Retirement Plan"
DEMO_FIRST_PERIOD_END = date(2015, 1, 31)
DEMO_N_PERIODS = 120
DEMO_N_CLASSES = 8

# The plan's strategic mix (invented), in the order of asset_classes(8).
DEMO_POLICY = {
    "cash": 0.05,
    "commodities": 0.05,
    "credit": 0.14,
    "domestic_equity": 0.24,
    "emerging_equity": 0.06,
    "foreign_equity": 0.16,
    "government_bonds": 0.22,
    "real_estate": 0.08,
}
# The policy adopted for the quarterly-reporting mandate from 2019-12-31 onward.
DEMO_POLICY_2020 = {**DEMO_POLICY, "government_bonds": 0.16, "credit": 0.17, "real_estate": 0.11}
DEMO_POLICY_CHANGE = date(2019, 12, 31)
DEMO_NEW_MANAGER_MONTHS = 18
DEMO_MISSING_SEGMENT_CLASS = "real_estate"
DEMO_MISSING_SEGMENT_MONTHS = (date(2018, 10, 31), date(2018, 11, 30), date(2018, 12, 31))

DEMO_MANAGERS: dict[str, str] = {
    "ambrisk_multiasset": "genuine timer: equity shifted ±10-15 points, right with p = 0.72",
    "dellowmere_dynamic": "perverse timer: the same shifts, right with p = 0.28",
    "korvane_balanced": "structural overweight: equities +10 points, rebalanced monthly",
    "orvelle_partners": "flat weights equal to policy; +0.15 %/month selection per class",
    "pentaloom_global": "coin-flipper: the same shifts in random directions",
    "saltmarrow_trust": "drifter: starts at policy on 2014-12-31, never rebalances",
    "tibbrenn_capital": "new manager: 18 months of record, mild timer (p = 0.6)",
    "wistrel_advisors": "quarterly holdings, +5 points equity target, policy change, "
    "real_estate segment returns missing for three months",
}


@dataclass(frozen=True, slots=True, kw_only=True)
class _DemoManager:
    """Parameters of one invented demo manager (annual fee, monthly alpha and tracking noise)."""

    name: str
    tilt: float = 0.0
    hit_rate: float | None = None
    alpha: float = 0.0
    tracking: float = 0.001
    fee: float = 0.004
    rebalance: Literal["monthly", "quarterly", "never"] = "monthly"


_DEMO_MANAGER_PARAMS = (
    _DemoManager(name="ambrisk_multiasset", hit_rate=0.72, fee=0.0045),
    _DemoManager(name="dellowmere_dynamic", hit_rate=0.28, fee=0.0050),
    _DemoManager(name="korvane_balanced", tilt=0.10, fee=0.0030),
    _DemoManager(name="orvelle_partners", alpha=0.0015, tracking=0.005, fee=0.0060),
    _DemoManager(name="pentaloom_global", hit_rate=0.5, fee=0.0040),
    _DemoManager(name="saltmarrow_trust", rebalance="never", fee=0.0020),
    _DemoManager(name="tibbrenn_capital", hit_rate=0.6, fee=0.0050),
    _DemoManager(
        name="wistrel_advisors",
        tilt=0.05,
        alpha=0.0005,
        tracking=0.002,
        fee=0.0040,
        rebalance="quarterly",
    ),
)
#: Invented mandate sizes (plan currency) at the start of each manager's record.
DEMO_MANDATES = {
    "ambrisk_multiasset": 640e6,
    "dellowmere_dynamic": 410e6,
    "korvane_balanced": 880e6,
    "orvelle_partners": 350e6,
    "pentaloom_global": 520e6,
    "saltmarrow_trust": 300e6,
    "tibbrenn_capital": 120e6,
    "wistrel_advisors": 460e6,
}
DEMO_SHIFT_RANGE = (0.10, 0.15)
DEMO_REPORTING_NOISE = 0.0002


def demo_roster(*, seed: int = DEMO_SEED) -> dict[str, pl.DataFrame]:
    """The bundled demo: an invented plan with eight balanced managers over ten years.

    Calendar: 120 month ends from 2015-01-31 to 2024-12-31 (the first period starts
    2014-12-31); eight asset classes; index returns from :func:`factor_index_returns`.
    Every manager is measured against the plan policy ``DEMO_POLICY`` (one of them against
    a changed policy from 2019-12-31). Behaviours (``DEMO_MANAGERS``):

    * timers: at each start of month the equity share is moved by s ~ U(10, 15) points
      (funded from government bonds and cash, :func:`shift_weights`) in the direction of the
      coming month's policy excess return ``x_t = Σ q b_t − rf_t`` with probability p, else
      against it (p = 0.72 genuine, 0.28 perverse, 0.5 coin-flipper, 0.6 for the new manager);
    * structural: a constant +10-point equity tilt, rebalanced monthly (timing exactly 0);
    * flat selector: weights equal to policy, segment returns ``b + 0.15 %`` per month plus
      noise in every class but cash;
    * drifter: policy weights on 2014-12-31, then buy-and-hold drift
      (:func:`hold_between_rebalances`) with its own segment returns;
    * new manager: holdings, segment and reported returns for the last 18 months only;
    * quarterly: holdings at quarter ends only (weights drift in between), a +5-point equity
      tilt, a policy change on 2019-12-31, and real_estate segment returns missing for
      October-December 2018 (a warning-level data issue, never an error).

    Segment returns are ``b + alpha + tracking noise``; the reported return is
    ``Σ w r − fee/12 + N(0, 0.02 %)`` with the weights actually held (drifted between
    quarterly holdings). All numbers are invented; see ``fixtures/demo/README.md``. The
    behaviours hold in expectation for any ``seed``; the default seed's realised sample is
    the one the committed files and their tests describe.
    """
    if isinstance(seed, bool) or not isinstance(seed, int | np.integer) or seed < 0:
        msg = f"The 'seed' parameter must be an integer >= 0. Got {seed!r} instead."
        raise OptionError(msg)
    market_rng = np.random.default_rng([seed, 0])
    specs = asset_classes(DEMO_N_CLASSES)
    classes = [s.name for s in specs]
    period_ends = month_ends(DEMO_FIRST_PERIOD_END, DEMO_N_PERIODS)
    starts = [previous_month_end(DEMO_FIRST_PERIOD_END), *period_ends[:-1]]
    riskless = riskless_path(DEMO_N_PERIODS, market_rng)
    index_returns = factor_index_returns(specs, riskless, market_rng)

    n_periods, n_classes = index_returns.shape
    risky = np.array([s.group == "risky" for s in specs])
    defensive = np.array([s.group == "defensive" for s in specs])
    is_cash = np.array([s.name == "cash" for s in specs])
    plan_policy = np.array([DEMO_POLICY[c] for c in classes])
    later_policy = np.array([DEMO_POLICY_2020[c] for c in classes])
    policy_excess = index_returns @ plan_policy - riskless

    managers = _DEMO_MANAGER_PARAMS
    n = len(managers)
    rng = np.random.default_rng([seed, 1])
    # Draws in a fixed order, one array per kind of randomness, for every manager alike.
    sizes = rng.uniform(*DEMO_SHIFT_RANGE, size=(n, n_periods))
    uniforms = rng.random((n, n_periods))
    tracking_noise = rng.normal(size=(n, n_periods, n_classes))
    reporting_noise = rng.normal(0.0, DEMO_REPORTING_NOISE, size=(n, n_periods))

    quarterly = next(i for i, m in enumerate(managers) if m.rebalance == "quarterly")
    policy = np.broadcast_to(plan_policy, (n, n_periods, n_classes)).copy()
    policy_changed = np.array([s >= DEMO_POLICY_CHANGE for s in starts])
    policy[quarterly, policy_changed] = later_policy

    tilt = np.array([m.tilt for m in managers])[:, None]
    hit = np.array([np.nan if m.hit_rate is None else m.hit_rate for m in managers])[:, None]
    is_timer = ~np.isnan(hit)
    signs = timing_signs(policy_excess[None, :], uniforms < hit)
    shift = tilt + np.where(is_timer, signs * sizes, 0.0)
    targets = shift_weights(policy, shift, risky, defensive)

    alpha = np.array([m.alpha for m in managers])[:, None, None]
    tracking = np.array([m.tracking for m in managers])[:, None, None]
    # Cash is held as cash: no selection and a tenth of the tracking noise.
    segment = index_returns + np.where(is_cash, 0.0, alpha)
    segment = segment + np.where(is_cash, 0.1, 1.0) * tracking * tracking_noise

    quarter_start = np.array([s.month % 3 == 0 for s in starts])
    weights = targets.copy()
    for i, m in enumerate(managers):
        if m.rebalance == "monthly":
            continue
        rebalance = quarter_start if m.rebalance == "quarterly" else np.arange(n_periods) == 0
        weights[i : i + 1] = hold_between_rebalances(
            targets[i : i + 1], rebalance, segment[i : i + 1]
        )

    fee = np.array([m.fee for m in managers])[:, None] / 12.0
    reported = (weights * segment).sum(axis=-1) - fee + reporting_noise

    # What each manager reports.
    record = np.ones((n, n_periods), dtype=bool)
    newcomer = next(i for i, m in enumerate(managers) if m.name == "tibbrenn_capital")
    record[newcomer, : n_periods - DEMO_NEW_MANAGER_MONTHS] = False
    holdings_kept = record.copy()
    holdings_kept[quarterly] = quarter_start
    segment_kept = np.repeat(record[:, :, None], n_classes, axis=2)
    missing_t = [period_ends.index(d) for d in DEMO_MISSING_SEGMENT_MONTHS]
    segment_kept[quarterly, missing_t, classes.index(DEMO_MISSING_SEGMENT_CLASS)] = False

    ids = pl.Series("portfolio_id", [m.name for m in managers], dtype=pl.String)
    tables = _shared_frames(period_ends, classes, index_returns, riskless)
    grid = _grid(ids, n_periods, classes)
    tables["holdings"] = _long_frame(
        grid,
        starts,
        weights,
        date_column="as_of",
        value_column="weight",
        keep=np.repeat(holdings_kept[:, :, None], n_classes, axis=2),
    )
    tables["segment_returns"] = _long_frame(
        grid,
        period_ends,
        segment,
        date_column="period_end",
        value_column="return",
        keep=segment_kept,
    )
    tables["portfolio_returns"] = _portfolio_frame(ids, period_ends, reported, keep=record)

    policy_rows = []
    for i, m in enumerate(managers):
        # Eight managers: a per-manager loop here is over a fixed, tiny list.
        first_start = starts[n_periods - DEMO_NEW_MANAGER_MONTHS] if i == newcomer else starts[0]
        sets = [(first_start, plan_policy)]
        if i == quarterly:
            sets.append((DEMO_POLICY_CHANGE, later_policy))
        for effective, mix in sets:
            policy_rows.append(
                pl.DataFrame(
                    {
                        "portfolio_id": [m.name] * n_classes,
                        "asset_class": classes,
                        "weight": mix,
                        "effective_from": [effective] * n_classes,
                    },
                    schema={
                        "portfolio_id": pl.String,
                        "asset_class": pl.String,
                        "weight": pl.Float64,
                        "effective_from": pl.Date,
                    },
                )
            )
    tables["policy"] = pl.concat(policy_rows)
    return {name: tables[name] for name in TABLES}


def demo_portfolio_values(portfolio_returns: pl.DataFrame) -> pl.DataFrame:
    """The demo's ``portfolio_values``: each mandate grown by its reported returns.

    V at the start of a manager's first period is ``DEMO_MANDATES`` (invented); then
    V_t = V_{t-1} (1 + R_t) at every period end, with no contributions or withdrawals. The
    as_of dates are the first period's start and every period end of the record.
    """
    rows = portfolio_returns.sort("portfolio_id", "period_end").with_columns(
        value=pl.col("portfolio_id").replace_strict(DEMO_MANDATES, return_dtype=pl.Float64)
        * (1.0 + pl.col("return")).cum_prod().over("portfolio_id")
    )
    first = (
        rows.group_by("portfolio_id", maintain_order=True)
        .agg(pl.col("period_end").first())
        .select(
            "portfolio_id",
            pl.col("period_end").map_elements(previous_month_end, return_dtype=pl.Date),
            pl.col("portfolio_id")
            .replace_strict(DEMO_MANDATES, return_dtype=pl.Float64)
            .alias("value"),
        )
    )
    return (
        pl.concat([first, rows.select("portfolio_id", "period_end", "value")])
        .rename({"period_end": "as_of"})
        .sort("portfolio_id", "as_of")
    )


def demo_tables(*, seed: int = DEMO_SEED) -> dict[str, pl.DataFrame]:
    """The demo roster's input tables with its ``portfolio_values`` (what ``tiltaudit demo``
    runs and ``fixtures/demo`` holds)."""
    tables = demo_roster(seed=seed)
    return {**tables, "portfolio_values": demo_portfolio_values(tables["portfolio_returns"])}


# --------------------------------------------------------------------------------------
# Random rosters of any size
# --------------------------------------------------------------------------------------

# Portfolios are drawn in blocks of this many; a portfolio's draws depend only on its block.
BLOCK_SIZE = 250
DEFAULT_START = date(2005, 1, 31)

# Behaviour mix of a random roster (invented): flat, structural, timer, coin-flipper,
# perverse timer, drifter.
BEHAVIOURS = ("flat", "structural", "timer", "coin", "perverse", "drifter")
BEHAVIOUR_SHARES = np.array([0.15, 0.20, 0.15, 0.30, 0.05, 0.15])


@dataclass(frozen=True, slots=True, kw_only=True)
class _Market:
    """The shared part of a random roster: calendar, classes, riskless and index returns."""

    specs: tuple[AssetClassSpec, ...]
    period_ends: list[date]
    starts: list[date]
    riskless: np.ndarray
    index_returns: np.ndarray
    seed: int

    @property
    def classes(self) -> list[str]:
        return [s.name for s in self.specs]

    @property
    def switch_period(self) -> int:
        """Index of the first period under the second policy of portfolios that change policy."""
        return len(self.period_ends) // 2


@dataclass(frozen=True, slots=True, kw_only=True)
class _Portfolios:
    """Arrays for a run of consecutive portfolios (first portfolio number ``first``)."""

    first: int
    policies: np.ndarray  # (n, 2, K): the first and the second policy set
    has_second_policy: np.ndarray  # (n,)
    weights: np.ndarray  # (n, T, K)
    segment: np.ndarray  # (n, T, K)
    reported: np.ndarray  # (n, T)


def _market(*, n_classes: int, n_periods: int, seed: int, start: date) -> _Market:
    rng = np.random.default_rng([seed, 0])
    specs = asset_classes(n_classes)
    period_ends = month_ends(start, n_periods)
    riskless = riskless_path(n_periods, rng)
    return _Market(
        specs=specs,
        period_ends=period_ends,
        starts=[previous_month_end(period_ends[0]), *period_ends[:-1]],
        riskless=riskless,
        index_returns=factor_index_returns(specs, riskless, rng),
        seed=seed,
    )


def _random_policies(
    specs: tuple[AssetClassSpec, ...], n: int, rng: np.random.Generator
) -> np.ndarray:
    """(n, K) random strategic mixes: base shares scaled by Gamma(4) draws, normalised.

    Base shares: 1 for risky and defensive classes, 0.5 for the others, 0.3 for cash.
    """
    shares = {"risky": 1.0, "defensive": 1.0, "other": 0.5}
    base = np.array([0.3 if s.name == "cash" else shares[s.group] for s in specs])
    raw = base * rng.gamma(4.0, size=(n, len(specs)))
    return raw / raw.sum(axis=1, keepdims=True)


def _portfolio_block(market: _Market, block: int) -> _Portfolios:
    """All arrays of portfolios ``block * BLOCK_SIZE`` … ``(block + 1) * BLOCK_SIZE − 1``."""
    rng = np.random.default_rng([market.seed, 1, block])
    n = BLOCK_SIZE
    specs = market.specs
    b = market.index_returns
    n_periods, n_classes = b.shape
    risky = np.array([s.group == "risky" for s in specs])
    defensive = np.array([s.group == "defensive" for s in specs])
    is_cash = np.array([s.name == "cash" for s in specs])

    # Every draw happens for every portfolio, in a fixed order, so the stream never depends
    # on the behaviours drawn.
    kind = rng.choice(len(BEHAVIOURS), size=n, p=BEHAVIOUR_SHARES)
    first_policy = _random_policies(specs, n, rng)
    second_policy = 0.5 * first_policy + 0.5 * _random_policies(specs, n, rng)
    has_second = rng.random(n) < 0.1
    tilt = rng.uniform(-0.10, 0.10, n)
    hit_skill = rng.uniform(0.55, 0.80, n)
    hit_perverse = rng.uniform(0.20, 0.45, n)
    sizes = rng.uniform(0.05, 0.15, (n, n_periods))
    uniforms = rng.random((n, n_periods))
    alpha = rng.normal(0.0, 0.001, n)
    tracking = rng.uniform(0.0005, 0.005, n)
    tracking_noise = rng.normal(size=(n, n_periods, n_classes))
    fee = rng.uniform(0.002, 0.008, n) / 12.0
    reporting_noise = rng.normal(0.0, 0.0002, (n, n_periods))

    name = np.array(BEHAVIOURS)[kind]
    second_from = np.arange(n_periods) >= market.switch_period
    use_second = has_second[:, None] & second_from[None, :]
    policy = np.where(use_second[:, :, None], second_policy[:, None, :], first_policy[:, None, :])

    hit = np.select(
        [name == "timer", name == "coin", name == "perverse"], [hit_skill, 0.5, hit_perverse], 0.0
    )
    is_timer = np.isin(name, ["timer", "coin", "perverse"])
    has_tilt = np.isin(name, ["structural", "timer", "coin", "perverse"])
    excess = (policy * b).sum(axis=-1) - market.riskless
    signs = timing_signs(excess, uniforms < hit[:, None])
    shift = np.where(has_tilt, tilt, 0.0)[:, None] + np.where(is_timer[:, None], signs * sizes, 0.0)
    weights = shift_weights(policy, shift, risky, defensive)

    segment = b + np.where(is_cash, 0.0, alpha[:, None, None])
    segment = segment + np.where(is_cash, 0.1, 1.0) * tracking[:, None, None] * tracking_noise

    drifters = np.flatnonzero(name == "drifter")
    if drifters.size:
        never = np.arange(n_periods) == 0
        weights[drifters] = hold_between_rebalances(weights[drifters], never, segment[drifters])

    reported = (weights * segment).sum(axis=-1) - fee[:, None] + reporting_noise
    return _Portfolios(
        first=block * BLOCK_SIZE,
        policies=np.stack([first_policy, second_policy], axis=1),
        has_second_policy=has_second,
        weights=weights,
        segment=segment,
        reported=reported,
    )


def _portfolio_range(market: _Market, first: int, stop: int) -> _Portfolios:
    """Arrays for portfolios ``first`` … ``stop − 1``, cut from whole blocks."""
    blocks = [
        _portfolio_block(market, k) for k in range(first // BLOCK_SIZE, -(-stop // BLOCK_SIZE))
    ]
    lo = first - blocks[0].first
    hi = lo + (stop - first)

    def cut(field: str) -> np.ndarray:
        return np.concatenate([getattr(blk, field) for blk in blocks])[lo:hi]

    return _Portfolios(
        first=first,
        policies=cut("policies"),
        has_second_policy=cut("has_second_policy"),
        weights=cut("weights"),
        segment=cut("segment"),
        reported=cut("reported"),
    )


def _portfolio_ids(first: int, stop: int, n_portfolios: int) -> pl.Series:
    """Ids ``sim000000``, ``sim000001``, …: zero-padded so text order is number order."""
    width = max(6, len(str(n_portfolios - 1)))
    numbers = pl.Series("portfolio_id", np.arange(first, stop, dtype=np.int64))
    return ("sim" + numbers.cast(pl.String).str.zfill(width)).alias("portfolio_id")


def _portfolio_tables(
    market: _Market,
    first: int,
    stop: int,
    *,
    n_portfolios: int,
    segment_returns: bool,
    portfolio_returns: bool,
) -> dict[str, pl.DataFrame]:
    data = _portfolio_range(market, first, stop)
    ids = _portfolio_ids(first, stop, n_portfolios)
    classes = market.classes
    grid = _grid(ids, len(market.period_ends), classes)
    tables = {
        "holdings": _long_frame(
            grid, market.starts, data.weights, date_column="as_of", value_column="weight"
        ),
        "policy": _policy_frame(
            ids,
            classes,
            data.policies,
            [market.starts[0], market.starts[market.switch_period]],
            np.column_stack([np.ones(stop - first, dtype=bool), data.has_second_policy]),
        ),
    }
    if segment_returns:
        tables["segment_returns"] = _long_frame(
            grid, market.period_ends, data.segment, date_column="period_end", value_column="return"
        )
    if portfolio_returns:
        tables["portfolio_returns"] = _portfolio_frame(ids, market.period_ends, data.reported)
    return tables


def _check_sizes(
    *,
    n_portfolios: int,
    n_classes: int,
    n_periods: int,
    seed: int,
    shard_size: int | None = None,
) -> None:
    """Refuse sizes and seeds the generator cannot use, naming the parameter."""
    limits = {"n_portfolios": (n_portfolios, 1), "n_classes": (n_classes, 2)}
    limits["n_periods"] = (n_periods, 2)
    limits["seed"] = (seed, 0)
    if shard_size is not None:
        limits["shard_size"] = (shard_size, 1)
    for name, (value, low) in limits.items():
        if isinstance(value, bool) or not isinstance(value, int | np.integer) or value < low:
            msg = f"The {name!r} parameter must be an integer >= {low}. Got {value!r} instead."
            raise OptionError(msg)


def simulate_roster(
    *,
    n_portfolios: int,
    n_classes: int = 12,
    n_periods: int = 240,
    seed: int = 0,
    segment_returns: bool = True,
    portfolio_returns: bool = True,
    start: date = DEFAULT_START,
) -> dict[str, pl.DataFrame]:
    """A random roster: monthly holdings of ``n_portfolios`` invented balanced portfolios.

    Calendar: ``n_periods`` month ends, the first in the month of ``start``; classes: the
    first ``n_classes`` of :data:`CATALOGUE` (then ``extra_class_NNN``). Each portfolio draws a
    random policy (10 % change it half-way, at ``period_end[T//2 − 1]``) and one behaviour of
    :data:`BEHAVIOURS` with shares :data:`BEHAVIOUR_SHARES`: flat weights; a structural tilt
    t ~ U(−10, 10) points of risky against defensive classes; timers right with probability
    p ~ U(0.55, 0.80), coin-flippers (p = 0.5) and perverse timers (p ~ U(0.20, 0.45)) that
    shift s ~ U(5, 15) points in the direction of their policy's coming excess return
    (on top of a tilt); or a buy-and-hold drifter. Segment returns are
    ``b + α + σ ε`` with α ~ N(0, 0.1 %) and σ ~ U(0.05, 0.5) % per month; the reported
    return is ``Σ w r`` less a fee of 0.2-0.8 % a year, plus N(0, 0.02 %) noise.

    Returns the six tables of DESIGN §2 (``segment_returns``/``portfolio_returns`` left out
    when switched off), sorted by portfolio_id, date, asset_class. A portfolio's rows depend
    only on ``seed``, its number and the calendar/class sizes (blocks of
    :data:`BLOCK_SIZE` portfolios share one random stream).
    """
    _check_sizes(n_portfolios=n_portfolios, n_classes=n_classes, n_periods=n_periods, seed=seed)
    market = _market(n_classes=n_classes, n_periods=n_periods, seed=seed, start=start)
    tables = _shared_frames(
        market.period_ends, market.classes, market.index_returns, market.riskless
    )
    tables.update(
        _portfolio_tables(
            market,
            0,
            n_portfolios,
            n_portfolios=n_portfolios,
            segment_returns=segment_returns,
            portfolio_returns=portfolio_returns,
        )
    )
    return {name: tables[name] for name in TABLES if name in tables}


def _parquet_writer(path: Path, schema: pa.Schema) -> pq.ParquetWriter:
    """A zstd Parquet writer: dictionary encoding for keys, byte-stream split for floats.

    Trying a dictionary on random floats only to fall back wastes time; byte-stream split
    compresses them better (measured here: about twice as fast, slightly smaller files).
    """
    floats = [f.name for f in schema if pa.types.is_floating(f.type)]
    keys = [f.name for f in schema if f.name not in floats]
    return pq.ParquetWriter(
        path,
        schema,
        compression="zstd",
        use_dictionary=keys,
        use_byte_stream_split=floats,
    )


def write_simulated_roster(
    out_dir: Path,
    *,
    n_portfolios: int,
    n_classes: int = 12,
    n_periods: int = 240,
    seed: int = 0,
    segment_returns: bool = True,
    portfolio_returns: bool = True,
    shard_size: int = 2000,
    start: date = DEFAULT_START,
) -> dict[str, Path]:
    """Write :func:`simulate_roster`'s tables as Parquet files in ``out_dir``, shard by shard.

    Portfolios are generated ``shard_size`` at a time and appended to one Parquet file per
    table (``pyarrow.parquet.ParquetWriter``), so memory stays bounded by the shard, not the
    roster. The files hold exactly the rows of :func:`simulate_roster` with the same
    arguments, whatever the shard size. Returns ``{table: path}``.
    """
    _check_sizes(
        n_portfolios=n_portfolios,
        n_classes=n_classes,
        n_periods=n_periods,
        seed=seed,
        shard_size=shard_size,
    )
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    market = _market(n_classes=n_classes, n_periods=n_periods, seed=seed, start=start)
    paths = write_tables(
        _shared_frames(market.period_ends, market.classes, market.index_returns, market.riskless),
        out_dir,
    )
    writers: dict[str, pq.ParquetWriter] = {}
    try:
        for first in range(0, n_portfolios, shard_size):
            stop = min(first + shard_size, n_portfolios)
            shard = _portfolio_tables(
                market,
                first,
                stop,
                n_portfolios=n_portfolios,
                segment_returns=segment_returns,
                portfolio_returns=portfolio_returns,
            )
            for name, frame in shard.items():
                # String views pass to Arrow without a copy; Parquet stores them as UTF-8.
                table: pa.Table = frame.to_arrow(compat_level=pl.CompatLevel.newest())
                if name not in writers:
                    paths[name] = out_dir / f"{name}.parquet"
                    writers[name] = _parquet_writer(paths[name], table.schema)
                writers[name].write_table(table)
    finally:
        for writer in writers.values():
            writer.close()
    return {name: paths[name] for name in TABLES if name in paths}


def write_tables(
    tables: dict[str, pl.DataFrame], out_dir: Path, *, fmt: TableFormat = "parquet"
) -> dict[str, Path]:
    """Write each table to ``out_dir/<name>.<fmt>`` (Parquet, or CSV with ISO dates).

    Returns ``{table: path}``; creates ``out_dir`` if needed.
    """
    if fmt not in ("parquet", "csv"):
        msg = f"The 'fmt' parameter must be 'parquet' or 'csv'. Got {fmt!r} instead."
        raise OptionError(msg)
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    paths = {}
    for name, frame in tables.items():
        path = out_dir / f"{name}.{fmt}"
        if fmt == "parquet":
            frame.write_parquet(path)
        else:
            frame.write_csv(path)
        paths[name] = path
    return paths
