"""Shared helpers for the engine's unit, property and reference tests.

* named tolerances (STYLE §6: exact identities get tight, explicit ``atol``; printed examples
  are matched at the precision they are printed at);
* builders that turn plain Python rows into the input frames of DESIGN §2;
* random rosters made from a seeded ``np.random.default_rng`` (invented numbers);
* an independent re-implementation of the per-period decomposition and of the four linking
  methods with plain loops over dicts (no polars, no numpy), which the vectorised engine must
  match (STYLE §7). It follows DESIGN §2-3 and METHODS §1-2 directly, not the engine's code.

This module sits beside ``tests/conftest.py``; pytest puts ``tests/`` on ``sys.path`` when it
loads that conftest, so every test module can ``import tiltaudit_testkit``.
"""

from __future__ import annotations

import datetime as dt
import itertools
import math
from collections import defaultdict
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
import polars as pl

from attribution.options import RunOptions
from attribution.runner import RunResult, run_roster

# --- tolerances ------------------------------------------------------------------------------

#: Exact identities (effects adding up, linked totals reconciling, engine vs the loop
#: re-implementation). Returns are O(1e-2), so 1e-12 is 1e-8 basis points: only rounding.
IDENTITY_ATOL = 1e-12
#: Relative tolerance for a product over ~1,100 months (the compounded value reaches the
#: thousands, so an absolute 1e-12 would be below the float spacing there).
LONG_RECORD_RTOL = 1e-10
#: Slack added to half a printed unit, so a value printed as 0.72 accepts 0.715…0.725 and
#: binary rounding of the computed value cannot push an exact tie outside.
PRINT_SLACK = 1e-12

EFFECTS = ("static_allocation", "timing", "selection", "interaction", "residual")
LINKING_METHODS = ("carino", "menchero", "grap", "frongello")


def printed_tolerance(decimals: int) -> float:
    """Half a unit in the last printed place: the precision a printed value carries."""
    return 0.5 * 10.0**-decimals + PRINT_SLACK


# --- dates and frames ------------------------------------------------------------------------


def month_end(year: int, month: int) -> dt.date:
    """The calendar month end of ``year``-``month`` (month may run past 12)."""
    year, month = year + (month - 1) // 12, (month - 1) % 12 + 1
    return dt.date(year + (month == 12), month % 12 + 1, 1) - dt.timedelta(days=1)


def month_ends(year: int, month: int, n: int) -> list[dt.date]:
    """``n`` consecutive month ends, the first being ``year``-``month``."""
    return [month_end(year, month + k) for k in range(n)]


def previous_month_end(day: dt.date) -> dt.date:
    """The month end before ``day``'s month."""
    return day.replace(day=1) - dt.timedelta(days=1)


SCHEMAS: dict[str, dict[str, Any]] = {
    "holdings": {
        "portfolio_id": pl.String,
        "as_of": pl.Date,
        "asset_class": pl.String,
        "weight": pl.Float64,
    },
    "index_returns": {"period_end": pl.Date, "asset_class": pl.String, "return": pl.Float64},
    "policy": {
        "portfolio_id": pl.String,
        "asset_class": pl.String,
        "weight": pl.Float64,
        "effective_from": pl.Date,
    },
    "riskfree": {"period_end": pl.Date, "return": pl.Float64},
    "segment_returns": {
        "portfolio_id": pl.String,
        "period_end": pl.Date,
        "asset_class": pl.String,
        "return": pl.Float64,
    },
    "portfolio_returns": {"portfolio_id": pl.String, "period_end": pl.Date, "return": pl.Float64},
}

Rows = list[dict[str, Any]]


def to_frames(tables: Mapping[str, Rows | None]) -> dict[str, pl.DataFrame | None]:
    """Plain row dicts -> typed polars frames (``None`` stays ``None``)."""
    return {
        name: None if rows is None else pl.DataFrame(rows, schema=SCHEMAS[name], orient="row")
        for name, rows in tables.items()
    }


def run(tables: Mapping[str, Rows | pl.DataFrame | None], **options: Any) -> RunResult:
    """Run the engine on row dicts or frames with the given options."""
    frames = {
        name: to_frames({name: value})[name] if isinstance(value, list) else value
        for name, value in tables.items()
    }
    return run_roster(frames, RunOptions.build(**options))


def single_period_roster(
    *,
    weights: Sequence[float],
    policy: Sequence[float],
    index: Sequence[float],
    segments: Sequence[float] | None,
    classes: Sequence[str] | None = None,
    end: dt.date = dt.date(2024, 1, 31),
) -> dict[str, Rows | None]:
    """One portfolio, one month: holdings and policy as of the previous month end."""
    names = list(classes) if classes is not None else [f"c{i}" for i in range(len(weights))]
    start = previous_month_end(end)
    return {
        "holdings": [
            {"portfolio_id": "P", "as_of": start, "asset_class": c, "weight": w}
            for c, w in zip(names, weights, strict=True)
        ],
        "index_returns": [
            {"period_end": end, "asset_class": c, "return": b}
            for c, b in zip(names, index, strict=True)
        ],
        "policy": [
            {"portfolio_id": "P", "asset_class": c, "weight": q, "effective_from": start}
            for c, q in zip(names, policy, strict=True)
        ],
        "segment_returns": None
        if segments is None
        else [
            {"portfolio_id": "P", "period_end": end, "asset_class": c, "return": r}
            for c, r in zip(names, segments, strict=True)
        ],
    }


# --- random rosters (invented numbers) ----------------------------------------------------------


def random_roster(
    rng: np.random.Generator,
    *,
    n_portfolios: int = 4,
    n_periods: int = 30,
    n_classes: int = 4,
    segments: bool = True,
    reported: bool = True,
) -> dict[str, Rows | None]:
    """A roster exercising every path of DESIGN §2-3 at once.

    Portfolios differ in start, length and holdings spacing (monthly, every 2 months,
    quarterly); some skip a holdings date (a drifted gap), leave a class out on a date
    (weight 0), short the last class (leverage), hold weights summing to 1 within the
    tolerance but not exactly, switch policy mid-record (at a period start or mid-month,
    with a different class set) and miss a few segment and reported returns.
    """
    classes = [f"k{i}" for i in range(n_classes)]
    ends = month_ends(2015, 1, n_periods)
    starts = [previous_month_end(ends[0]), *ends[:-1]]
    index = rng.normal(0.006, 0.03, size=(n_periods, n_classes))
    tables: dict[str, Rows] = defaultdict(list)
    for t, end in enumerate(ends):
        for i, c in enumerate(classes):
            tables["index_returns"].append(
                {"period_end": end, "asset_class": c, "return": float(index[t, i])}
            )
    tables["riskfree"] = [{"period_end": e, "return": 0.001} for e in ends]
    for p in range(n_portfolios):
        pid = f"port{p:02d}"
        spacing = int(rng.choice([1, 1, 2, 3]))
        first = int(rng.integers(0, max(1, n_periods // 3)))
        last = int(rng.integers(first, n_periods))
        dates = list(range(first, last + 1, spacing))
        if len(dates) > 4 and rng.random() < 0.5:
            dates.pop(len(dates) // 2)  # one missing holdings date: weights drift through it
        held_classes = classes if n_classes == 1 else list(rng.permutation(classes)[:-1])
        if rng.random() < 0.5:
            held_classes = classes
        for t in dates:
            raw = rng.uniform(0.05, 1.0, size=len(held_classes))
            w = raw / raw.sum()
            if len(held_classes) > 1 and rng.random() < 0.2:
                w[-1] -= 0.2  # a short position, financed by the first class
                w[0] += 0.2
            w[0] += float(rng.uniform(-5e-5, 5e-5))  # within the default 1e-4 tolerance
            on_date = dict(zip(held_classes, w.tolist(), strict=True))
            if len(held_classes) > 1 and rng.random() < 0.15:
                on_date[held_classes[0]] += on_date.pop(held_classes[-1])  # a class left out
            for c, weight in on_date.items():
                tables["holdings"].append(
                    {"portfolio_id": pid, "as_of": starts[t], "asset_class": c, "weight": weight}
                )
        policy_sets = [(starts[0], classes)]
        if last - first > 3 and n_classes > 1:
            switch = starts[int(rng.integers(first + 1, last))]
            if rng.random() < 0.5:
                switch = switch - dt.timedelta(days=10)  # mid-month: the next period start
            policy_sets.append((switch, classes[1:] if rng.random() < 0.5 else classes))
        for eff, cls in policy_sets:
            q = rng.uniform(0.1, 1.0, size=len(cls))
            q = q / q.sum()
            for c, qi in zip(cls, q, strict=True):
                tables["policy"].append(
                    {
                        "portfolio_id": pid,
                        "asset_class": c,
                        "weight": float(qi),
                        "effective_from": eff,
                    }
                )
        window_end = min(last + spacing, n_periods)
        for t in range(first, window_end):
            for i, c in enumerate(classes):
                if segments and rng.random() > 0.04:
                    tables["segment_returns"].append(
                        {
                            "portfolio_id": pid,
                            "period_end": ends[t],
                            "asset_class": c,
                            "return": float(index[t, i] + rng.normal(0.0, 0.004)),
                        }
                    )
            if reported and p % 2 == 0 and rng.random() > 0.1:
                tables["portfolio_returns"].append(
                    {
                        "portfolio_id": pid,
                        "period_end": ends[t],
                        "return": float(rng.normal(0.005, 0.03)),
                    }
                )
    out: dict[str, Rows | None] = dict(tables)
    out.setdefault("segment_returns", None)
    out.setdefault("portfolio_returns", None)
    if not segments:
        out["segment_returns"] = None
    if not reported:
        out["portfolio_returns"] = None
    return out


# --- the loop re-implementation ------------------------------------------------------------------


def _mean(values: Sequence[float]) -> float:
    return sum(values) / len(values)


def _static(weights: list[dict[str, float]], k: int, c: str, static: str) -> float:
    """Static weight of class ``c`` at window position ``k`` (DESIGN §3)."""
    if static == "window":
        return _mean([w[c] for w in weights])
    if k == 0:  # both ex-ante modes: the first period uses its own weight
        return weights[0][c]
    n = k if static == "expanding" else int(static.split(":")[1])
    return _mean([w[c] for w in weights[max(0, k - n) : k]])


def loop_decompose(
    tables: Mapping[str, Rows | None], *, static: str = "window", form: str = "bf"
) -> tuple[dict[tuple, dict[str, Any]], dict[tuple, dict[str, Any]]]:
    """Per (portfolio, period_end, class) cells and per (portfolio, period_end) totals.

    Plain loops straight from DESIGN §2-3: weights at the period start, buy-and-hold drift
    w_{t+1} ∝ w_t (1 + r_t) between holdings dates (r the segment return, else the index
    return), static weight window / expanding / trailing:N, BF or BHB effects, selection
    unknown where a held class has no segment return, reported return and residual.
    Monthly calendars only (the first period starts at the previous month end).
    """
    ends = sorted({r["period_end"] for r in tables["index_returns"] or []})
    starts = [previous_month_end(ends[0]), *ends[:-1]]
    position = {d: t for t, d in enumerate(starts)}
    index = {(r["period_end"], r["asset_class"]): r["return"] for r in tables["index_returns"]}
    seg_rows, rep_rows = tables.get("segment_returns") or [], tables.get("portfolio_returns") or []
    cells: dict[tuple, dict[str, Any]] = {}
    totals: dict[tuple, dict[str, Any]] = {}
    for pid in sorted({r["portfolio_id"] for r in tables["holdings"]}):
        held: dict[int, dict[str, float]] = defaultdict(dict)
        for r in tables["holdings"]:
            if r["portfolio_id"] == pid:
                held[position[r["as_of"]]][r["asset_class"]] = r["weight"]
        sets: dict[dt.date, dict[str, float]] = defaultdict(dict)
        for r in tables["policy"]:
            if r["portfolio_id"] == pid:
                sets[r["effective_from"]][r["asset_class"]] = r["weight"]
        seg = {
            (r["period_end"], r["asset_class"]): r["return"]
            for r in seg_rows
            if r["portfolio_id"] == pid
        }
        rep = {r["period_end"]: r["return"] for r in rep_rows if r["portfolio_id"] == pid}
        has_seg = any(r["portfolio_id"] == pid for r in seg_rows)
        has_rep = any(r["portfolio_id"] == pid for r in rep_rows)
        classes = sorted(
            {c for w in held.values() for c in w} | {c for s in sets.values() for c in s}
        )
        dates = sorted(held)
        gaps = [b - a for a, b in itertools.pairwise(dates)]
        top = max((gaps.count(g) for g in gaps), default=0)
        spacing = min((g for g in gaps if gaps.count(g) == top), default=1)
        window = list(range(dates[0], min(dates[-1] + spacing - 1, len(ends) - 1) + 1))
        weights: list[dict[str, float]] = []
        used: list[dict[str, float]] = []
        for t in window:
            if t in held:  # a holdings date: the reported weights, rescaled to sum to 1
                total = sum(held[t].values())
                w = {c: held[t].get(c, 0.0) / total for c in classes}
            else:  # buy-and-hold drift from the previous period
                grown = {c: weights[-1][c] * (1.0 + used[-1][c]) for c in classes}
                w = {c: grown[c] / sum(grown.values()) for c in classes}
            weights.append(w)
            used.append({c: seg.get((ends[t], c), index[(ends[t], c)]) for c in classes})
        for k, t in enumerate(window):
            eff = max(d for d in sets if d <= starts[t])
            q = {c: sets[eff].get(c, 0.0) / sum(sets[eff].values()) for c in classes}
            big_b = sum(q[c] * index[(ends[t], c)] for c in classes)
            row_totals = dict.fromkeys(
                ("static_allocation", "timing", "selection", "interaction"), 0.0
            )
            for c in classes:
                w, s, b, r = (
                    weights[k][c],
                    _static(weights, k, c, static),
                    index[(ends[t], c)],
                    used[k][c],
                )
                known = has_seg and ((ends[t], c) in seg or w == 0.0)
                base = b - big_b if form == "bf" else b
                cell = {
                    "weight": w,
                    "static_weight": s,
                    "policy_weight": q[c],
                    "policy_return": big_b,
                    "static_allocation": (s - q[c]) * base,
                    "timing": (w - s) * base,
                    "selection": None if not known else (w if form == "bf" else q[c]) * (r - b),
                    "interaction": None if not known or form == "bf" else (w - q[c]) * (r - b),
                    "is_drifted": t not in held,
                }
                cells[(pid, ends[t], c)] = cell
                for name in row_totals:
                    row_totals[name] += cell[name] or 0.0
            computed = sum(weights[k][c] * used[k][c] for c in classes)
            portfolio = rep.get(ends[t], computed) if has_rep else computed
            totals[(pid, ends[t])] = {
                "portfolio_return": portfolio,
                "computed_return": computed,
                "policy_return": big_b,
                "active_return": portfolio - big_b,
                "static_allocation": row_totals["static_allocation"],
                "timing": row_totals["timing"],
                "selection": row_totals["selection"] if has_seg else None,
                "interaction": row_totals["interaction"] if has_seg and form == "bhb" else None,
                "residual": portfolio - computed,
                "is_drifted": t not in held,
                "return_source": "reported" if has_rep else "segments" if has_seg else "index",
            }
    return cells, totals


def carino_coefficient(a: float, b: float) -> float:
    """k(a, b) = [ln(1+a) − ln(1+b)] / (a − b), 1/(1+b) at a = b (Cariño 1999, METHODS §2.1)."""
    if a == b:
        return 1.0 / (1.0 + b)
    return math.log1p((a - b) / (1.0 + b)) / (a - b)


def menchero_coefficients(port: Sequence[float], pol: Sequence[float]) -> tuple[float, list[float]]:
    """Menchero (2000) M and α_t (METHODS §2.2); M = (1+R)^{(T−1)/T} when R = B."""
    n = len(port)
    big_r = math.prod(1.0 + x for x in port) - 1.0
    big_b = math.prod(1.0 + x for x in pol) - 1.0
    if big_r == big_b:
        m = (1.0 + big_r) ** ((n - 1) / n)
    else:
        m = (big_r - big_b) / n / ((1.0 + big_r) ** (1 / n) - (1.0 + big_b) ** (1 / n))
    d = [port[t] - pol[t] for t in range(n)]
    s2 = sum(x * x for x in d)
    c = (big_r - big_b - m * sum(d)) / s2 if s2 > 0 else 0.0
    return m, [c * x for x in d]


def grap_factors(port: Sequence[float], pol: Sequence[float]) -> list[float]:
    """GRAP factor of period t: Π_{s<t}(1+R_s) Π_{s>t}(1+B_s) (METHODS §2.3)."""
    n = len(port)
    return [
        math.prod(1.0 + port[s] for s in range(t))
        * math.prod(1.0 + pol[s] for s in range(t + 1, n))
        for t in range(n)
    ]


def frongello_pieces(
    port: Sequence[float], pol: Sequence[float], e: Sequence[float]
) -> list[float]:
    """Frongello's recursion G_t = e_t Π_{s<t}(1+R_s) + B_t Σ_{s<t} G_s (METHODS §2.4)."""
    pieces: list[float] = []
    for t in range(len(port)):
        pieces.append(e[t] * math.prod(1.0 + port[s] for s in range(t)) + pol[t] * sum(pieces))
    return pieces


def link_loops(
    method: str, port: Sequence[float], pol: Sequence[float], effects: Mapping[str, Sequence[float]]
) -> dict[str, float]:
    """Linked totals of each effect over the whole record, by plain loops (METHODS §2)."""
    n = len(port)
    if method == "carino":
        big_r = math.prod(1.0 + x for x in port) - 1.0
        big_b = math.prod(1.0 + x for x in pol) - 1.0
        k = carino_coefficient(big_r, big_b)
        k_t = [carino_coefficient(port[t], pol[t]) for t in range(n)]
        return {j: sum(k_t[t] / k * e[t] for t in range(n)) for j, e in effects.items()}
    if method == "menchero":
        m, alpha = menchero_coefficients(port, pol)
        return {j: sum((m + alpha[t]) * e[t] for t in range(n)) for j, e in effects.items()}
    if method == "grap":
        f = grap_factors(port, pol)
        return {j: sum(f[t] * e[t] for t in range(n)) for j, e in effects.items()}
    if method == "frongello":
        return {j: sum(frongello_pieces(port, pol, e)) for j, e in effects.items()}
    raise ValueError(method)


def frame_cells(frame: pl.DataFrame, keys: Sequence[str]) -> dict[tuple, dict[str, Any]]:
    """Index a frame's rows by the tuple of ``keys``."""
    return {tuple(row[k] for k in keys): row for row in frame.iter_rows(named=True)}


def assert_close(actual: float | None, expected: float | None, *, atol: float, what: str) -> None:
    """Both null, or both finite and within ``atol`` (absolute, rtol 0)."""
    if expected is None or actual is None:
        assert actual is None, f"{what}: {actual!r} vs {expected!r}"
        assert expected is None, f"{what}: {actual!r} vs {expected!r}"
        return
    assert math.isfinite(actual), f"{what}: not finite ({actual!r})"
    assert abs(actual - expected) <= atol, f"{what}: {actual!r} vs {expected!r}"
