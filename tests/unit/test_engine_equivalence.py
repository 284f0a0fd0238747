"""The engine's fast paths give exactly what the straightforward code gives.

At roster scale the engine takes shortcuts: a day-number table instead of a binary search,
a sortedness check before counting duplicate keys, cheap screens before the data-issue rules,
numpy arrays written in place, and the class-level table built as Arrow from the kernel's
arrays. Each is checked here against the plain version of the same step (written out in this
file, as the engine had it before the shortcuts) on seeded random inputs built to hit the
awkward cases: inactive periods, drift between holdings dates, missing segment returns,
portfolios without segment returns, a policy left in force outside the window, duplicate and
off-calendar rows. Equality is exact (``assert_array_equal`` / ``DataFrame.equals``): the
shortcuts only change where numbers are stored, never the arithmetic — a check of our own
implementation, so common practice, no source.
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import polars as pl
import pytest

from attribution.calendar import Calendar, build_calendar
from attribution.decompose import EFFECTS_ORDER, effects_frame, effects_table
from attribution.kernel import Effects, Panel, decompose_panel
from attribution.options import StaticWeight
from attribution.panel import (
    Codes,
    _lookup,
    _portfolio_codes,
    distinct_sorted,
    duplicate_mask,
    encode,
    make_codes,
)
from attribution.validate import (
    _duplicates,
    _nonfinite,
    _not_summing,
    _null_keys,
    _off_calendar,
    _too_low,
    _unknown_class,
    check_portfolio_tables,
    empty_issues,
)

SEEDS = (1, 7, 42)
STATICS = ("window", "expanding", "trailing:1", "trailing:3")
FORMS = ("bf", "bhb")
N_P, N_T, N_K = 6, 11, 4


# --- plain versions of the steps -------------------------------------------------------


def plain_lookup(days: np.ndarray, allowed: np.ndarray) -> np.ndarray:
    pos = np.searchsorted(allowed, days)
    pos_c = np.minimum(pos, len(allowed) - 1)
    return np.where(allowed[pos_c] == days, pos_c, -1)


def plain_duplicates(key: np.ndarray, valid: np.ndarray) -> np.ndarray:
    key = np.where(valid, key, 0)
    counts = np.bincount(key[valid], minlength=int(key.max()) + 1)
    return valid & (counts[key] > 1)


def plain_drift(panel: Panel) -> np.ndarray:
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


def plain_static(weights: np.ndarray, active: np.ndarray, static: StaticWeight) -> np.ndarray:
    act = active[:, :, None]
    first_t = np.argmax(active, axis=1)
    reference = np.take_along_axis(weights, first_t[:, None, None], axis=1)
    dev = np.where(act, weights - reference, 0.0)
    count = np.cumsum(active, axis=1)[:, :, None].astype(float)
    if static.mode == "window":
        n = np.maximum(active.sum(axis=1), 1)[:, None, None]
        mean_dev = dev.sum(axis=1, keepdims=True) / n
        return np.where(act, reference + mean_dev, 0.0)
    csum = np.cumsum(dev, axis=1)
    before = csum - dev
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


def plain_decompose(panel: Panel, static: StaticWeight, form: str) -> dict[str, np.ndarray]:
    w = plain_drift(panel)
    s = plain_static(w, panel.active, static)
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
    use_reported = panel.has_reported[:, None] & ~np.isnan(panel.reported)
    portfolio_return = np.where(panel.active, np.where(use_reported, panel.reported, computed), 0)
    return {
        "weight": w,
        "static_weight": s,
        "policy_return": big_b,
        "static_allocation": static_alloc,
        "timing": timing,
        "selection": selection,
        "interaction": interaction,
        "computed_return": computed,
        "portfolio_return": portfolio_return,
        "residual": portfolio_return - computed,
        "total_static_allocation": static_alloc.sum(axis=2),
        "total_timing": timing.sum(axis=2),
        "total_selection": np.where(seg_rows, np.nansum(selection, axis=2), np.nan),
        "total_interaction": np.where(
            seg_rows & (form == "bhb"), np.nansum(interaction, axis=2), np.nan
        ),
        "n_selection_missing": missing.sum(axis=2),
        "segment_missing": missing,
    }


def plain_effects_frame(panel: Panel, eff: Effects, calendar: Calendar) -> pl.DataFrame:
    mask = panel.active[:, :, None] & panel.universe[:, None, :]
    p, t, k = np.nonzero(mask)
    ids = pl.Series(list(panel.portfolio_ids), dtype=pl.String)
    classes = pl.Series(list(panel.classes), dtype=pl.String)
    index = np.broadcast_to(panel.index[None, :, :], mask.shape)

    def floats(values: np.ndarray) -> pl.Series:
        return pl.Series(values, dtype=pl.Float64).fill_nan(None)

    return pl.DataFrame(
        {
            "portfolio_id": ids.gather(p),
            "period_end": calendar.frame()["period_end"].gather(t),
            "asset_class": classes.gather(k),
            "weight": floats(eff.weight[mask]),
            "static_weight": floats(eff.static_weight[mask]),
            "policy_weight": floats(panel.policy[mask]),
            "index_return": floats(index[mask]),
            "segment_return": floats(panel.segment[mask]),
            "policy_return": floats(eff.policy_return[p, t]),
            "static_allocation": floats(eff.static_allocation[mask]),
            "timing": floats(eff.timing[mask]),
            "selection": floats(eff.selection[mask]),
            "interaction": floats(eff.interaction[mask]),
            "is_drifted": pl.Series(~panel.holding[p, t], dtype=pl.Boolean),
        }
    ).select(EFFECTS_ORDER)


# --- random inputs -----------------------------------------------------------------------


def month_ends(n: int) -> list[dt.date]:
    out, year, month = [], 2020, 1
    for _ in range(n):
        year, month = year + (month == 12), month % 12 + 1
        out.append(dt.date(year, month, 1) - dt.timedelta(days=1))
    return out


def random_panel(rng: np.random.Generator, *, full: bool) -> Panel:
    """A shard's arrays; ``full`` makes every cell active and in the universe."""
    first = np.zeros(N_P, dtype=int) if full else rng.integers(0, 4, N_P)
    last = np.full(N_P, N_T - 1) if full else rng.integers(6, N_T, N_P)
    if not full:
        first[-1], last[-1] = N_T, -1  # a portfolio with nothing to evaluate (skipped)
    t = np.arange(N_T)
    active = (t[None, :] >= first[:, None]) & (t[None, :] <= last[:, None])
    holding = active & (rng.random((N_P, N_T)) < 0.6)
    holding[np.arange(N_P), np.minimum(first, N_T - 1)] |= active[
        np.arange(N_P), np.minimum(first, N_T - 1)
    ]
    raw = rng.random((N_P, N_T, N_K)) * (rng.random((N_P, N_T, N_K)) < 0.85)
    raw[..., 0] += 0.05  # never an all-zero date
    held = np.where(holding[:, :, None], raw / raw.sum(axis=2, keepdims=True), np.nan)
    universe = np.ones((N_P, N_K), dtype=bool) if full else rng.random((N_P, N_K)) < 0.8
    universe[:, 0] = True
    policy = rng.dirichlet(np.ones(N_K), (N_P, N_T))
    if not full:
        policy[1:] = np.where(active[1:, :, None], policy[1:], 0.0)  # row 0 keeps it outside
    index = rng.normal(0.005, 0.03, (N_T, N_K))
    segment = index[None] + rng.normal(0, 0.01, (N_P, N_T, N_K))
    segment[rng.random(segment.shape) < 0.1] = np.nan
    has_segments = rng.random(N_P) < 0.8
    segment[~has_segments] = np.nan
    reported = np.where(rng.random((N_P, N_T)) < 0.85, rng.normal(0.004, 0.02, (N_P, N_T)), np.nan)
    has_reported = rng.random(N_P) < 0.5
    reported[~has_reported] = np.nan
    return Panel(
        portfolio_ids=tuple(f"P{i}" for i in range(N_P)),
        classes=tuple(f"class_{k}" for k in range(N_K)),
        active=active,
        holding=holding,
        held=held,
        universe=universe,
        policy=policy,
        index=index,
        segment=segment,
        has_segments=has_segments,
        reported=reported,
        has_reported=has_reported,
    )


# --- the checks ------------------------------------------------------------------------


@pytest.mark.parametrize("seed", SEEDS)
def test_day_table_lookup_matches_binary_search(seed: int) -> None:
    rng = np.random.default_rng(seed)
    allowed = np.unique(rng.integers(15_000, 20_000, 60))
    days = np.concatenate(
        [rng.choice(allowed, 200), rng.integers(14_000, 21_000, 200), [-(2**31), 2**31 - 1]]
    ).astype(np.int32)
    np.testing.assert_array_equal(_lookup(days, allowed), plain_lookup(days, allowed))


@pytest.mark.parametrize("grouped", [True, False])
@pytest.mark.parametrize("seed", SEEDS)
def test_run_coded_ids_match_a_lookup_of_every_row(seed: int, grouped: bool) -> None:
    rng = np.random.default_rng(seed)
    book = tuple(sorted(f"id{i:03d}" for i in rng.choice(500, 40, replace=False)))
    picks = rng.choice(len(book), 300)
    ids = pl.Series(np.array(book)[np.sort(picks) if grouped else picks], dtype=pl.String)
    expected = ids.cast(pl.Enum(list(book))).to_physical().cast(pl.Int64)
    assert _portfolio_codes(ids, book).equals(expected)
    assert distinct_sorted(ids) == sorted(set(ids.to_list()))


@pytest.mark.parametrize("seed", SEEDS)
def test_duplicate_mask_matches_counting(seed: int) -> None:
    rng = np.random.default_rng(seed)
    p = np.repeat(np.arange(4), 12)
    t = np.tile(np.repeat(np.arange(4), 3), 4)
    k = np.tile(np.arange(3), 16)
    sorted_rows = pl.DataFrame({"_p": p, "_t": t, "_k": k})
    assert not duplicate_mask(sorted_rows, 5, 3, with_class=True).any()  # sorted, distinct
    rows = pl.concat([sorted_rows, sorted_rows.sample(5, seed=seed)]).sample(
        fraction=1.0, shuffle=True, seed=seed
    )
    rows = rows.with_columns(
        _t=pl.when(pl.Series(rng.random(rows.height) < 0.1)).then(-1).otherwise(pl.col("_t"))
    )
    got = duplicate_mask(rows, 5, 3, with_class=True)
    key = (rows["_p"].to_numpy() * 5 + rows["_t"].to_numpy()) * 3 + rows["_k"].to_numpy()
    valid = (rows["_t"].to_numpy() >= 0) & (rows["_k"].to_numpy() >= 0)
    np.testing.assert_array_equal(got, plain_duplicates(key, valid))
    assert got.any()


@pytest.mark.parametrize("full", [True, False])
@pytest.mark.parametrize("form", FORMS)
@pytest.mark.parametrize("static", STATICS)
@pytest.mark.parametrize("seed", SEEDS)
def test_kernel_matches_plain_formulas(seed: int, static: str, form: str, full: bool) -> None:
    panel = random_panel(np.random.default_rng(seed), full=full)
    mode = StaticWeight.parse(static)
    eff = decompose_panel(panel, static=mode, form=form)
    plain = plain_decompose(panel, mode, form)
    for name in (
        "weight",
        "static_weight",
        "policy_return",
        "static_allocation",
        "timing",
        "selection",
        "interaction",
        "computed_return",
        "portfolio_return",
        "residual",
        "n_selection_missing",
        "segment_missing",
    ):
        np.testing.assert_array_equal(getattr(eff, name), plain[name], err_msg=name)
    for name in ("static_allocation", "timing", "selection", "interaction"):
        np.testing.assert_array_equal(eff.totals[name], plain[f"total_{name}"], err_msg=name)
    np.testing.assert_array_equal(eff.totals["residual"], plain["residual"])


@pytest.mark.parametrize("full", [True, False])
@pytest.mark.parametrize("form", FORMS)
@pytest.mark.parametrize("seed", SEEDS)
def test_effects_table_matches_plain_frame(seed: int, form: str, full: bool) -> None:
    panel = random_panel(np.random.default_rng(seed), full=full)
    calendar = build_calendar(pl.Series(month_ends(N_T), dtype=pl.Date))
    eff = decompose_panel(panel, static=StaticWeight(), form=form)
    table = effects_table(panel, eff, calendar)
    frame = effects_frame(table)
    expected = plain_effects_frame(panel, eff, calendar)
    assert frame.schema == expected.schema
    assert frame.equals(expected)
    assert table.num_rows == expected.height


# --- data-issue screens ------------------------------------------------------------------


def all_rules(
    tables: dict[str, pl.DataFrame | None], calendar: Calendar, codes: Codes
) -> pl.DataFrame:
    """Every portfolio rule applied unconditionally (what the screens may skip)."""
    holdings, policy, segments = tables["holdings"], tables["policy"], tables["segment_returns"]
    assert holdings is not None
    assert policy is not None
    assert segments is not None
    n_t, n_k = codes.n_periods + 1, len(codes.classes)
    h_keys = ["as_of", "asset_class"]
    p_keys = ["effective_from", "asset_class"]
    s_keys = ["period_end", "asset_class"]
    hint = "a period_end or the first period's start " + str(calendar.first_start)
    found = [
        _null_keys(holdings, "holdings", h_keys),
        _duplicates(holdings, "holdings", h_keys, "as_of", "asset_class", n_t, n_k),
        _nonfinite(holdings, "holdings", "weight", "as_of", "asset_class"),
        _off_calendar(holdings, "holdings", "as_of", hint),
        _unknown_class(holdings, "holdings", codes.classes),
        _not_summing(holdings, "holdings", "as_of", 1e-4),
        _null_keys(policy, "policy", p_keys),
        _duplicates(policy, "policy", p_keys, "effective_from", "asset_class", n_t, n_k),
        _nonfinite(policy, "policy", "weight", "effective_from", "asset_class"),
        _unknown_class(policy, "policy", codes.classes),
        _not_summing(policy, "policy", "effective_from", 1e-4),
        _null_keys(segments, "segment_returns", s_keys),
        _duplicates(segments, "segment_returns", s_keys, "period_end", "asset_class", n_t, n_k),
        _nonfinite(segments, "segment_returns", "return", "period_end", "asset_class"),
        _too_low(segments, "segment_returns", "asset_class"),
        _off_calendar(segments, "segment_returns", "period_end", "a period_end"),
        _unknown_class(segments, "segment_returns", codes.classes),
    ]
    return pl.concat([empty_issues(), *found])


def clean_tables(n_p: int, calendar: Calendar, classes: list[str]) -> dict[str, pl.DataFrame]:
    ends = list(calendar.period_ends)
    starts = [calendar.first_start, *ends[:-1]]
    ids = [f"P{i}" for i in range(n_p)]
    grid = (
        pl.DataFrame({"portfolio_id": ids})
        .join(pl.DataFrame({"as_of": starts}), how="cross")
        .join(pl.DataFrame({"asset_class": classes}), how="cross")
    )
    holdings = grid.with_columns(weight=pl.lit(1.0 / len(classes)))
    segments = (
        pl.DataFrame({"portfolio_id": ids})
        .join(pl.DataFrame({"period_end": ends}), how="cross")
        .join(pl.DataFrame({"asset_class": classes}), how="cross")
        .with_columns(pl.lit(0.01).alias("return"))
    )
    policy = (
        pl.DataFrame({"portfolio_id": ids})
        .join(pl.DataFrame({"asset_class": classes}), how="cross")
        .with_columns(weight=pl.lit(1.0 / len(classes)), effective_from=pl.lit(starts[0]))
    )
    return {"holdings": holdings, "policy": policy, "segment_returns": segments}


def damage_weights(h: pl.DataFrame, rng: np.random.Generator) -> pl.DataFrame:
    """Weights off on some dates: far off, within the tolerance, and right at it."""
    hi = rng.choice(h.height, 4, replace=False)
    return (
        h.with_row_index("_i")
        .with_columns(
            weight=pl.when(pl.col("_i") == hi[0])
            .then(float("nan"))
            .when(pl.col("_i") == hi[1])
            .then(pl.col("weight") + 0.3)
            .when(pl.col("_i") == hi[2])
            .then(pl.col("weight") + 5e-5)
            .when(pl.col("_i") == hi[3])
            .then(pl.col("weight") + 1e-4)
            .otherwise(pl.col("weight")),
        )
        .drop("_i")
    )


def damage(tables: dict[str, pl.DataFrame], rng: np.random.Generator) -> dict[str, pl.DataFrame]:
    """Break a few random rows in ways each rule looks for."""
    h, s = damage_weights(tables["holdings"], rng), tables["segment_returns"]
    hi = rng.integers(0, h.height, 6)
    h = h.with_row_index("_i").with_columns(
        asset_class=pl.when(pl.col("_i") == hi[2])
        .then(pl.lit("unknown"))
        .when(pl.col("_i") == hi[3])
        .then(pl.lit(None, dtype=pl.String))
        .otherwise(pl.col("asset_class")),
        as_of=pl.when(pl.col("_i") == hi[4])
        .then(pl.lit(dt.date(2020, 6, 15)))
        .otherwise(pl.col("as_of")),
    )
    h = pl.concat([h, h.filter(pl.col("_i") == int(rng.integers(0, h.height)))]).drop("_i")
    si = rng.integers(0, s.height, 3)
    s = s.with_row_index("_i").with_columns(
        pl.when(pl.col("_i") == si[0])
        .then(-1.2)
        .when(pl.col("_i") == si[1])
        .then(float("inf"))
        .otherwise(pl.col("return"))
        .alias("return"),
        period_end=pl.when(pl.col("_i") == si[2])
        .then(pl.lit(dt.date(2020, 3, 3)))
        .otherwise(pl.col("period_end")),
    )
    s = pl.concat([s, s.filter(pl.col("_i") == int(rng.integers(0, s.height)))]).drop("_i")
    return {**tables, "holdings": h, "segment_returns": s}


@pytest.mark.parametrize("broken", ["none", "weights", "all"])
@pytest.mark.parametrize("seed", SEEDS)
def test_screened_rules_find_what_every_rule_finds(seed: int, broken: str) -> None:
    rng = np.random.default_rng(seed)
    classes = ["bonds", "cash", "equity"]
    calendar = build_calendar(pl.Series(month_ends(8), dtype=pl.Date))
    tables = clean_tables(4, calendar, classes)
    if broken == "weights":  # every date on the calendar: the weight-sum screen itself decides
        tables = {**tables, "holdings": damage_weights(tables["holdings"], rng)}
    elif broken == "all":
        tables = damage(tables, rng)
    codes = make_codes([f"P{i}" for i in range(4)], classes, calendar)
    enc: dict[str, pl.DataFrame | None] = {
        "holdings": encode(tables["holdings"], codes, date="as_of", holdings=True),
        "policy": encode(tables["policy"], codes, date=None, holdings=False),
        "segment_returns": encode(
            tables["segment_returns"], codes, date="period_end", holdings=False
        ),
        "portfolio_returns": None,
    }
    got = check_portfolio_tables(enc, calendar, codes, weight_tolerance=1e-4)
    expected = all_rules(enc, calendar, codes)
    order = ["portfolio_id", "code", "message"]
    assert got.sort(order).equals(expected.sort(order))
    assert (got.height > 0) == (broken != "none")
