"""The demo roster end to end: the results reveal the behaviour each invented manager was
generated with (issue 2 "Done when" and issue 3 "The demo").

The behaviours are inputs of our own generator (attribution.simulate.demo_roster), so these
checks are about the engine reading them back, not about outside reference values.
"""

from __future__ import annotations

import polars as pl
import pytest

import attribution
from attribution.runner import RunResult
from attribution.simulate import demo_roster

TIMER = "ambrisk_multiasset"
PERVERSE = "dellowmere_dynamic"
STRUCTURAL = "korvane_balanced"
SELECTOR = "orvelle_partners"
COIN_FLIPPER = "pentaloom_global"
DRIFTER = "saltmarrow_trust"
NEWCOMER = "tibbrenn_capital"
QUARTERLY = "wistrel_advisors"


@pytest.fixture(scope="module")
def demo() -> RunResult:
    return attribution.run(**demo_roster())


def _row(result: RunResult, pid: str) -> dict:
    return result.summary.filter(pl.col("portfolio_id") == pid).row(0, named=True)


def test_every_manager_runs_and_only_the_planted_warning_appears(demo) -> None:
    assert demo.exit_code == 0
    assert demo.summary.height == 8
    codes = set(demo.data_issues["code"].to_list())
    assert "segment_return_missing" in codes
    assert not demo.data_issues.filter(pl.col("severity") == "error").height
    planted = demo.data_issues.filter(pl.col("code") == "segment_return_missing")
    assert set(planted["portfolio_id"].to_list()) == {QUARTERLY}


def test_timing_verdicts(demo) -> None:
    verdict = dict(demo.summary.select("portfolio_id", "timing_evidence").iter_rows())
    assert verdict[TIMER] == "skill"
    assert verdict[PERVERSE] == "adverse"
    assert verdict[NEWCOMER] == "record_too_short"
    for pid in (COIN_FLIPPER, SELECTOR, DRIFTER):
        assert verdict[pid] != "skill", pid


def test_structural_overweight_is_static_allocation_not_timing(demo) -> None:
    row = _row(demo, STRUCTURAL)
    assert row["timing"] == 0.0  # constant weights: exactly zero by construction
    assert abs(row["static_allocation"]) > 0.05


def test_flat_selector_earns_selection_only(demo) -> None:
    row = _row(demo, SELECTOR)
    assert row["timing"] == 0.0
    assert row["static_allocation"] == 0.0
    assert row["selection"] > 0.2


def test_timers_timing_effects_have_the_expected_sign(demo) -> None:
    assert _row(demo, TIMER)["timing"] > 0.1
    assert _row(demo, PERVERSE)["timing"] < -0.1


def test_drifter_and_quarterly_manager_have_drifted_periods(demo) -> None:
    assert _row(demo, DRIFTER)["n_drifted_periods"] == 0  # reports its drifted weights monthly
    quarterly = _row(demo, QUARTERLY)
    assert quarterly["n_drifted_periods"] == 80  # 40 quarters, two drifted months each
    assert quarterly["n_selection_missing"] == 3


def test_newcomer_record_is_18_months(demo) -> None:
    row = _row(demo, NEWCOMER)
    assert row["n_periods"] == 18
    assert row["portfolio_return_ann"] is not None  # 18 months ≥ one year: annualised
