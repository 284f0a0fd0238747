"""The per-period decomposition against the independent loop re-implementation.

``tiltaudit_testkit.loop_decompose`` walks DESIGN §2-3 with plain loops over dicts; the
engine must match it to 1e-12 on invented random rosters (seeded ``default_rng``): several
portfolios of different lengths, monthly / two-monthly / quarterly holdings with a skipped
date (drift), classes left out on a date, short positions, a mid-record policy change,
segment returns with gaps and reported returns with gaps — for every static-weight mode and
both forms, and then linked with every method.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import polars as pl
import pytest
from tiltaudit_testkit import (
    EFFECTS,
    IDENTITY_ATOL,
    LINKING_METHODS,
    assert_close,
    frame_cells,
    link_loops,
    loop_decompose,
    random_roster,
    run,
    to_frames,
)

STATIC_MODES = ("window", "expanding", "trailing:1", "trailing:4")
FORMS = ("bf", "bhb")
SEEDS = (3, 17, 2024)


def _compare(engine: dict[tuple, dict[str, Any]], loops: dict[tuple, dict[str, Any]]) -> None:
    assert set(engine) == set(loops)
    for key, expected in loops.items():
        got = engine[key]
        for name, value in expected.items():
            if isinstance(value, bool | str):
                assert got[name] == value, (key, name)
            else:
                assert_close(got[name], value, atol=IDENTITY_ATOL, what=f"{key} {name}")


@pytest.fixture(scope="module", params=SEEDS)
def roster(request: pytest.FixtureRequest) -> dict[str, Any]:
    return random_roster(np.random.default_rng(request.param), n_portfolios=5, n_periods=30)


@pytest.mark.parametrize("form", FORMS)
@pytest.mark.parametrize("static", STATIC_MODES)
def test_engine_matches_loops(roster: dict[str, Any], static: str, form: str) -> None:
    result = run(roster, static=static, form=form)
    assert result.skipped == ()
    cells, totals = loop_decompose(roster, static=static, form=form)
    _compare(frame_cells(result.effects, ["portfolio_id", "period_end", "asset_class"]), cells)
    _compare(frame_cells(result.series, ["portfolio_id", "period_end"]), totals)


@pytest.mark.parametrize("method", LINKING_METHODS)
def test_summary_matches_loop_linking(roster: dict[str, Any], method: str) -> None:
    result = run(roster, linking=method, static="expanding")
    _, totals = loop_decompose(roster, static="expanding")
    by_portfolio: dict[str, list[dict[str, Any]]] = {}
    for (pid, end), row in sorted(totals.items()):
        by_portfolio.setdefault(pid, []).append({"period_end": end, **row})
    summary = frame_cells(result.summary, ["portfolio_id"])
    assert set(summary) == {(pid,) for pid in by_portfolio}
    for pid, rows in by_portfolio.items():
        port = [r["portfolio_return"] for r in rows]
        pol = [r["policy_return"] for r in rows]
        linked = link_loops(method, port, pol, {e: [r[e] or 0.0 for r in rows] for e in EFFECTS})
        got = summary[(pid,)]
        assert got["n_periods"] == len(rows)
        assert got["linking"] == method
        for e in EFFECTS:
            expected = None if all(r[e] is None for r in rows) else linked[e]
            assert_close(got[e], expected, atol=IDENTITY_ATOL, what=f"{pid} {e}")
        active = got["active_return"]
        parts = sum(got[e] or 0.0 for e in EFFECTS)
        assert abs(parts - active) <= IDENTITY_ATOL


def test_the_random_roster_exercises_every_path(roster: dict[str, Any]) -> None:
    # Guard for the comparison above: the roster must reach the branches it claims to.
    result = run(roster)
    codes = set(result.data_issues["code"].to_list())
    assert {"segment_return_missing", "holdings_gap"} <= codes
    assert result.effects["is_drifted"].any()
    assert (result.effects["weight"] < 0).any()
    assert result.effects["selection"].null_count() > 0
    sources = set(result.summary["return_source"].to_list())
    assert sources == {"reported", "segments"}


def test_without_segment_returns_selection_is_null_and_residual_carries_it() -> None:
    # DESIGN §3: without segment returns the computed return is Σ w·b, selection is null;
    # with a reported return the residual = reported − Σ w·b carries selection and the rest.
    tables = random_roster(np.random.default_rng(8), n_portfolios=4, segments=False)
    result = run(tables)
    assert result.effects["selection"].null_count() == result.effects.height
    assert result.summary["selection"].null_count() == result.summary.height
    cells, totals = loop_decompose(tables)
    _compare(frame_cells(result.effects, ["portfolio_id", "period_end", "asset_class"]), cells)
    _compare(frame_cells(result.series, ["portfolio_id", "period_end"]), totals)
    sources = dict(result.summary.select("portfolio_id", "return_source").iter_rows())
    reported = {r["portfolio_id"] for r in tables["portfolio_returns"] or []}
    for pid, source in sources.items():
        assert source == ("reported" if pid in reported else "index")
    index_only = result.series.filter(pl.col("return_source") == "index")
    assert index_only["residual"].abs().max() == 0.0


def test_input_forms_give_the_same_result(tmp_path: Path) -> None:
    # STYLE §7: inputs as eager frames, lazy frames, Parquet files and CSV files.
    tables = random_roster(np.random.default_rng(99), n_portfolios=3, n_periods=14)
    frames = to_frames(tables)
    parquet, csv = {}, {}
    for name, frame in frames.items():
        if frame is None:
            continue
        parquet[name] = tmp_path / f"{name}.parquet"
        csv[name] = tmp_path / f"{name}.csv"
        frame.write_parquet(parquet[name])
        frame.write_csv(csv[name])
    lazy = {name: None if f is None else f.lazy() for name, f in frames.items()}
    base = run(frames)
    for other in (run(lazy), run(parquet), run(csv)):
        for table in ("effects", "series", "summary", "data_issues"):
            left, right = getattr(base, table), getattr(other, table)
            assert left.columns == right.columns
            assert left.height == right.height
            for col in left.columns:
                if left.schema[col] == pl.Float64:
                    diff = (left[col] - right[col]).abs().max()
                    assert diff is None or diff <= IDENTITY_ATOL, (table, col)
                else:
                    assert left[col].to_list() == right[col].to_list(), (table, col)
