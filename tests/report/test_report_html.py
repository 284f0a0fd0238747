"""The review pack's HTML, read back with the standard library's HTML parser.

What the page must do (issue 4 items 1 and 5, DESIGN §5): escape every user string, build
from any subset of the output tables, give the same bytes for the same tables, reference no
outside resource, show no timestamp, and carry values equal to the tables it was built
from. The expected values here are the stored tables themselves (the page must not compute
anything new); sums per class are recomputed independently with ``math.fsum``.
"""

from __future__ import annotations

import itertools
import json
import math
import os
import re
import subprocess
import sys
from html.parser import HTMLParser
from pathlib import Path
from typing import Any

import polars as pl
import pytest
import report_data
from report_data import ODD_CLASS, SHORT_ID, XSS_ID

from attribution import svg
from attribution.errors import ReadError, SchemaError
from attribution.money import money_tables
from attribution.report import (
    ROSTER_BAR_MAX,
    WEIGHT_MARK_BUDGET,
    build_report,
    build_report_from_folder,
    chart_weights,
    plain_reading,
)

# Per-class sums: the page sums with polars, the test with math.fsum (exactly rounded), so
# the two may differ in the last bits; returns are O(1e-2), 1e-12 relative is ~1e-14 absolute.
SUM_RTOL = 1e-12
SUM_ATOL = 1e-15
VOID = {"meta", "br", "img", "input", "link", "hr", "area", "base", "col", "source", "wbr"}


class Page(HTMLParser):
    """Every element with its attributes, parent and text (entities decoded)."""

    def __init__(self, text: str) -> None:
        super().__init__(convert_charrefs=True)
        self.stack: list[dict[str, Any]] = []
        self.nodes: list[dict[str, Any]] = []
        self.feed(text)
        self.close()

    def _node(self, tag: str, attrs: list[tuple[str, str | None]]) -> dict[str, Any]:
        node = {
            "tag": tag,
            "attrs": {k: (v if v is not None else "") for k, v in attrs},
            "parent": self.stack[-1] if self.stack else None,
            "text": "",
        }
        self.nodes.append(node)
        return node

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        node = self._node(tag, attrs)
        if tag not in VOID:
            self.stack.append(node)

    def handle_startendtag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self._node(tag, attrs)

    def handle_endtag(self, tag: str) -> None:
        while self.stack:
            if self.stack.pop()["tag"] == tag:
                break

    def handle_data(self, data: str) -> None:
        for node in self.stack:
            node["text"] += data

    def find(self, tag: str | None = None, **attrs: str) -> list[dict[str, Any]]:
        out = []
        for node in self.nodes:
            if tag is not None and node["tag"] != tag:
                continue
            if all(node["attrs"].get(k.replace("_", "-")) == v for k, v in attrs.items()):
                out.append(node)
        return out


def within(node: dict[str, Any], ancestor: dict[str, Any]) -> bool:
    parent = node["parent"]
    while parent is not None:
        if parent is ancestor:
            return True
        parent = parent["parent"]
    return False


def marks(page: Page, chart: dict[str, Any]) -> list[dict[str, str]]:
    return [n["attrs"] for n in page.nodes if "data-mark" in n["attrs"] and within(n, chart)]


def chart(page: Page, kind: str, pid: str | None = None) -> dict[str, Any]:
    found = [
        n
        for n in page.find("svg", data_chart=kind)
        if pid is None or n["attrs"].get("data-portfolio") == pid
    ]
    assert len(found) == 1, (kind, pid, len(found))
    return found[0]


@pytest.fixture(scope="module")
def full_html(full_tables: dict[str, pl.DataFrame]) -> str:
    return build_report(full_tables)


@pytest.fixture(scope="module")
def full_page(full_html: str) -> Page:
    return Page(full_html)


# -- escaping (issue 4 item 5) -------------------------------------------------------------


def test_user_strings_never_become_markup(full_html: str, full_page: Page) -> None:
    assert "<script" not in full_html.lower()
    assert XSS_ID not in full_html
    assert "<b>fund</b>" not in full_html
    assert ODD_CLASS not in full_html
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in full_html
    assert "bonds &amp; &quot;credit&quot; &#x27;core&#x27;" in full_html
    tags = {n["tag"] for n in full_page.nodes}
    assert "script" not in tags
    # No event-handler attribute anywhere (the page has no scripts at all).
    assert not [n for n in full_page.nodes if any(k.startswith("on") for k in n["attrs"])]


def test_user_strings_read_back_as_text(full_page: Page) -> None:
    sections = full_page.find("section", data_portfolio=XSS_ID)
    assert len(sections) == 1
    heading = [
        n
        for n in full_page.find("span")
        if "pid" in n["attrs"].get("class", "") and within(n, sections[0])
    ]
    assert heading[0]["text"] == XSS_ID
    assert full_page.find("section", data_portfolio=SHORT_ID)
    rows = full_page.find("tr", data_class=ODD_CLASS)
    assert rows, "the class table has a row for the class with & and quotes"
    assert ODD_CLASS in rows[0]["text"]
    strips = full_page.find("g", data_class=ODD_CLASS)
    assert len(strips) == 3  # one weight strip per portfolio


def test_no_outside_references(full_html: str) -> None:
    assert "http://" not in full_html
    assert "https://" not in full_html
    assert "<link" not in full_html
    assert "@import" not in full_html
    assert " src=" not in full_html
    # url(...) only for in-page clip paths
    assert set(re.findall(r"url\(([^)]*)\)", full_html)) <= {
        m for m in re.findall(r"url\((#clip-[^)]*)\)", full_html)
    }
    assert "Content-Security-Policy" in full_html


def test_no_timestamps(full_tables: dict[str, pl.DataFrame]) -> None:
    manifest = {
        "finished_at": "2031-07-04T12:34:56+00:00",
        "timings_seconds": {"decompose": 0.123456789},
        "options": {"tests": "all"},
        "version": "0.1.0",
    }
    html = build_report(full_tables, manifest=manifest)
    assert "2031-07-04" not in html
    assert "0.123456789" not in html
    assert not re.search(r"\d{4}-\d{2}-\d{2}[T ]\d{2}:\d{2}", html)
    assert not re.search(r"\b\d{2}:\d{2}:\d{2}\b", html)


# -- any subset of tables ----------------------------------------------------------------------


def test_without_timing_tables_says_so(core_tables: dict[str, pl.DataFrame]) -> None:
    html = build_report(core_tables)
    page = Page(html)
    assert "The timing tests were not run for this output" in html
    assert not page.find("svg", data_chart="exposure")
    assert not page.find("svg", data_chart="payoff")
    assert len(page.find("svg", data_chart="cumulative")) == 3


@pytest.mark.parametrize(
    ("manifest", "phrase"),
    [
        ({"options": {"tests": "none"}, "inputs": {"riskfree": {}}}, "--tests none"),
        (
            {"options": {"tests": "all", "cash_class": None}, "inputs": {"holdings": {}}},
            "no riskless source was given",
        ),
        ({}, "the output folder has no timing_tests table"),
    ],
)
def test_reason_for_missing_timing_tests(
    core_tables: dict[str, pl.DataFrame], manifest: dict[str, Any], phrase: str
) -> None:
    assert phrase in build_report(core_tables, manifest=manifest)


@pytest.mark.parametrize(
    "dropped",
    [
        ("summary_windows",),
        ("series",),
        ("effects",),
        ("data_issues",),
        ("timing_tests", "roster", "power"),
        ("roster",),
        ("power",),
        ("series", "effects", "summary_windows", "data_issues", "timing_tests", "roster", "power"),
    ],
)
def test_builds_from_any_subset(full_tables: dict[str, pl.DataFrame], dropped) -> None:
    tables = {k: v for k, v in full_tables.items() if k not in dropped}
    html = build_report(tables)
    page = Page(html)
    assert len(page.find("section", **{"class": "portfolio"})) == 3
    if "series" in dropped:
        assert "No per-period series for this portfolio." in html
    if "effects" in dropped:
        assert "The effects table is not in this output." in html
    if "timing_tests" in dropped:
        assert "The timing tests were not run" in html
    if "data_issues" in dropped:
        assert "The data_issues table is not in this output." in html


def test_summary_is_required(full_tables: dict[str, pl.DataFrame]) -> None:
    tables = {k: v for k, v in full_tables.items() if k != "summary"}
    with pytest.raises(SchemaError, match="'summary' is missing"):
        build_report(tables)


def test_missing_column_is_named(full_tables: dict[str, pl.DataFrame]) -> None:
    tables = dict(full_tables, series=full_tables["series"].drop("cum_timing"))
    with pytest.raises(SchemaError, match=r"table 'series' lacks column\(s\) \['cum_timing'\]"):
        build_report(tables)


def test_unknown_portfolio_is_named(full_tables: dict[str, pl.DataFrame]) -> None:
    with pytest.raises(SchemaError, match="nobody"):
        build_report(full_tables, portfolios=["nobody"])


def test_folder_errors(tmp_path: Path) -> None:
    with pytest.raises(ReadError, match="does not exist"):
        build_report_from_folder(tmp_path / "absent")
    with pytest.raises(ReadError, match=r"summary\.parquet"):
        build_report_from_folder(tmp_path)


# -- determinism ---------------------------------------------------------------------------------


def write_folder(tables: dict[str, pl.DataFrame], folder: Path, manifest: dict) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    for name, frame in tables.items():
        frame.write_parquet(folder / f"{name}.parquet")
    (folder / "manifest.json").write_text(json.dumps(manifest), encoding="utf-8")
    return folder


def test_same_tables_same_bytes(full_tables: dict[str, pl.DataFrame], tmp_path: Path) -> None:
    manifest = {
        "options": {"tests": "all", "linking": "carino"},
        "version": "0.1.0",
        "finished_at": "2030-01-01T00:00:00+00:00",
    }
    first = build_report(full_tables, manifest=manifest)
    assert build_report(full_tables, manifest=manifest) == first
    # Rows in another order give the same page (every table is sorted explicitly).
    shuffled = {k: v.sample(fraction=1.0, shuffle=True, seed=3) for k, v in full_tables.items()}
    assert build_report(shuffled, manifest=manifest) == first
    # Through Parquet and a fresh interpreter with other hash seeds: the same bytes.
    folder = write_folder(full_tables, tmp_path / "results", manifest)
    assert build_report_from_folder(folder) == first
    code = (
        "import sys; from pathlib import Path; from attribution.report import "
        "build_report_from_folder as b; sys.stdout.buffer.write(b(Path(sys.argv[1])).encode())"
    )
    for seed in ("1", "2"):
        env = dict(os.environ, PYTHONHASHSEED=seed)
        out = subprocess.run(
            [sys.executable, "-c", code, str(folder)], capture_output=True, env=env, check=True
        ).stdout
        assert out == first.encode()


# -- values on the page equal the tables -------------------------------------------------------


def test_cumulative_marks_equal_series(full_tables, full_page: Page) -> None:
    series = full_tables["series"]
    for pid in report_data.PORTFOLIOS:
        rows = series.filter(pl.col("portfolio_id") == pid).sort("period_end")
        got = marks(full_page, chart(full_page, "cumulative", pid))
        assert len(got) == rows.height
        assert [m["data-period"] for m in got] == [str(d) for d in rows["period_end"]]
        assert [float(m["data-value"]) for m in got] == rows["cum_active_return"].to_list()
        assert [float(m["data-timing"]) for m in got] == rows["cum_timing"].to_list()


def test_class_marks_equal_effect_sums(full_tables, full_page: Page) -> None:
    effects = full_tables["effects"]
    for pid in report_data.PORTFOLIOS:
        got = marks(full_page, chart(full_page, "classes", pid))
        assert len(got) == len(report_data.CLASSES) * 3  # static, timing, selection
        for m in got:
            rows = effects.filter(
                (pl.col("portfolio_id") == pid) & (pl.col("asset_class") == m["data-class"])
            )
            expected = math.fsum(rows[m["data-effect"]].drop_nulls().to_list())
            assert math.isclose(
                float(m["data-value"]), expected, rel_tol=SUM_RTOL, abs_tol=SUM_ATOL
            )


def test_weight_marks_equal_effects(full_tables, full_page: Page) -> None:
    effects = full_tables["effects"]
    for pid in report_data.PORTFOLIOS:
        svg_node = chart(full_page, "weights", pid)
        assert svg_node["attrs"]["data-periods-per-mark"] == "1"
        got = marks(full_page, svg_node)
        rows = effects.filter(pl.col("portfolio_id") == pid)
        assert len(got) == rows.height
        strips = [
            n for n in full_page.find("g") if "data-class" in n["attrs"] and within(n, svg_node)
        ]
        for strip in strips:
            cls = strip["attrs"]["data-class"]
            mine = rows.filter(pl.col("asset_class") == cls).sort("period_end")
            in_strip = [
                n["attrs"]
                for n in full_page.nodes
                if "data-mark" in n["attrs"] and within(n, strip)
            ]
            assert [float(m["data-value"]) for m in in_strip] == mine["weight"].to_list()
            assert [float(m["data-policy"]) for m in in_strip] == mine["policy_weight"].to_list()


def test_roster_marks_equal_summary(full_tables, full_page: Page) -> None:
    summary = full_tables["summary"].sort("portfolio_id")
    got = marks(full_page, chart(full_page, "roster"))
    assert [m["data-portfolio"] for m in got] == summary["portfolio_id"].to_list()
    assert [float(m["data-value"]) for m in got] == summary["active_return"].to_list()


def test_scatter_marks_equal_series(full_tables, full_page: Page) -> None:
    series = full_tables["series"]
    for pid in report_data.PORTFOLIOS:
        rows = series.filter(pl.col("portfolio_id") == pid).sort("period_end")
        exposure = marks(full_page, chart(full_page, "exposure", pid))
        assert [float(m["data-value"]) for m in exposure] == rows["exposure"].to_list()
        assert [float(m["data-x"]) for m in exposure] == rows["market_excess_return"].to_list()
        payoff = marks(full_page, chart(full_page, "payoff", pid))
        excess = [
            p - r for p, r in zip(rows["portfolio_return"], rows["riskless_return"], strict=True)
        ]
        assert [float(m["data-value"]) for m in payoff] == excess


def test_fitted_curves_use_the_stored_coefficients(full_tables, full_page: Page) -> None:
    tests = full_tables["timing_tests"]
    for pid in report_data.PORTFOLIOS:
        payoff = chart(full_page, "payoff", pid)
        for name in ("treynor_mazuy", "henriksson_merton"):
            row = tests.filter((pl.col("portfolio_id") == pid) & (pl.col("test") == name)).row(
                0, named=True
            )
            line = [n for n in full_page.find("polyline", data_series=name) if within(n, payoff)]
            assert len(line) == 1
            attrs = line[0]["attrs"]
            assert float(attrs["data-alpha"]) == row["alpha"]
            assert float(attrs["data-beta"]) == row["beta"]
            assert float(attrs["data-gamma"]) == row["estimate"]
        exposure = chart(full_page, "exposure", pid)
        fit = [n for n in full_page.find("line", data_series="fit") if within(n, exposure)]
        row = tests.filter(
            (pl.col("portfolio_id") == pid) & (pl.col("test") == "exposure_regression")
        ).row(0, named=True)
        assert float(fit[0]["attrs"]["data-slope"]) == row["estimate"]
        assert float(fit[0]["attrs"]["data-alpha"]) == row["alpha"]


def test_tables_on_the_page_equal_the_stored_tables(full_tables, full_page: Page) -> None:
    summary = full_tables["summary"]
    for r in summary.iter_rows(named=True):
        row = full_page.find("tr", data_portfolio=r["portfolio_id"])[0]
        cells = [n["attrs"].get("data-value") for n in full_page.find("td") if n["parent"] is row]
        assert int(cells[1]) == r["n_periods"]
        expected = [
            r[c] for c in ("active_return", "static_allocation", "timing", "selection", "residual")
        ]
        assert [float(c) for c in cells[2:7]] == expected
    tests = full_tables["timing_tests"]
    for r in tests.iter_rows(named=True):
        section = full_page.find("section", data_portfolio=r["portfolio_id"])[0]
        row = next(n for n in full_page.find("tr", data_test=r["test"]) if within(n, section))
        cells = [n for n in full_page.find("td") if n["parent"] is row]
        q_cell = cells[5]["attrs"].get("data-value")
        assert (float(q_cell) if q_cell else None) == r["q_value"]


def test_readings_and_verdicts(full_page: Page) -> None:
    def reading(pid: str, test: str) -> str:
        section = full_page.find("section", data_portfolio=pid)[0]
        row = next(n for n in full_page.find("tr", data_test=test) if within(n, section))
        return [n for n in full_page.find("td") if n["parent"] is row][-1]["text"]

    assert reading("aster_fund", "exposure_regression") == "evidence of skill at q < 0.05"
    assert reading("aster_fund", "trade_regression") == "consistent with no skill"
    assert reading(XSS_ID, "merton_accuracy").startswith("timing hurt")
    # 60 periods needed (power table) with 14 decisions on record: 46 more.
    assert reading(SHORT_ID, "exposure_regression") == (
        "too short a record to tell: about 46 more periods needed"
    )
    assert reading(SHORT_ID, "pesaran_timmermann").startswith("not computed")
    for pid, verdict in report_data.VERDICTS.items():
        section = full_page.find("section", data_portfolio=pid)[0]
        badge = [
            n for n in full_page.find("span") if "data-verdict" in n["attrs"] and within(n, section)
        ]
        assert badge[0]["attrs"]["data-verdict"] == verdict


@pytest.mark.parametrize(
    ("kwargs", "expected"),
    [
        ({"p_value": 0.001, "q_value": 0.01, "q_value_adverse": 0.99}, "evidence of skill"),
        ({"p_value": 0.99, "q_value": 0.99, "q_value_adverse": 0.02}, "timing hurt"),
        ({"p_value": None, "q_value": None, "q_value_adverse": None}, "not computed"),
        (
            {
                "p_value": 0.4,
                "q_value": 0.6,
                "q_value_adverse": 0.7,
                "verdict": "record_too_short",
                "n_obs": 18,
                "periods_needed": 100.2,
            },
            "too short a record to tell: about 83 more",
        ),
        (
            {
                "p_value": 0.4,
                "q_value": 0.6,
                "q_value_adverse": 0.7,
                "verdict": "no_evidence",
                "n_obs": 18,
                "periods_needed": 100.0,
            },
            "consistent with no skill",
        ),
        # Exactly at the level is not below it.
        ({"p_value": 0.01, "q_value": 0.05, "q_value_adverse": 0.9}, "consistent with no skill"),
    ],
)
def test_plain_reading_rules(kwargs: dict[str, Any], expected: str) -> None:
    args = {"verdict": None, "n_obs": None, "periods_needed": None, **kwargs}
    assert plain_reading(**args).startswith(expected)


def test_cautions_and_sources(full_html: str) -> None:
    for phrase in (
        "not proof of skill",
        "Short records have little power",
        "Past results do not guarantee future ones",
        "not investment advice",
        "licensed professionals",
    ):
        assert phrase in full_html
    for source in (
        "Brinson, G.P., Fachler, N. (1985)",
        "Cariño, D. (1999)",
        "Treynor, J.L., Mazuy, K.K. (1966)",
        "Henriksson, R.D., Merton, R.C. (1981)",
        "Pesaran, M.H., Timmermann, A. (1992)",
        "Benjamini, Y., Hochberg, Y. (1995)",
        "Storey, J.D. (2002)",
        "Politis, D.N., Romano, J.P. (1994)",
        "Newey, W.K., West, K.D.",
        "Grinblatt, M., Titman, S. (1993)",
    ):
        assert source in full_html


# -- large rosters and long records ------------------------------------------------------------


def test_large_roster_uses_one_dot_per_portfolio(full_tables) -> None:
    base = full_tables["summary"].filter(pl.col("portfolio_id") == "aster_fund")
    n = ROSTER_BAR_MAX + 10
    summary = pl.concat(
        [base.with_columns(pl.lit(f"fund_{i:03d}").alias("portfolio_id")) for i in range(n)]
    )
    html = build_report({"summary": summary}, max_detail=5)
    page = Page(html)
    got = marks(page, chart(page, "roster"))
    assert len(got) == n
    assert [m["data-portfolio"] for m in got] == sorted(summary["portfolio_id"].to_list())
    assert len(page.find("section", **{"class": "portfolio"})) == 5
    assert f"Detailed pages follow for 5 of {n}" in html
    # Every portfolio is still in the overview table.
    assert len([n for n in page.nodes if n["tag"] == "tr" and "data-portfolio" in n["attrs"]]) == n


def test_long_record_weights_are_block_means() -> None:
    # 300 periods x 6 classes = 1800 bars would exceed the budget: bars become 2-period means.
    periods = report_data.month_ends(report_data.PERIOD_ENDS[0], 300)
    classes = [f"class_{k}" for k in range(6)]
    weights = [0.1 + 0.01 * ((t * 7 + k * 3) % 11) for t in range(300) for k in range(6)]
    effects = pl.DataFrame(
        {
            "portfolio_id": "p",
            "period_end": [d for d in periods for _ in classes],
            "asset_class": [c for _ in periods for c in classes],
            "weight": weights,
            "static_weight": 0.15,
            "policy_weight": 0.15,
            "is_drifted": False,
        }
    )
    text, block = chart_weights("p", effects, classes)
    assert block == 2
    page = Page(text)
    got = marks(page, page.find("svg")[0])
    assert len(got) == 150 * 6 <= WEIGHT_MARK_BUDGET
    first = [m for m in got if m["data-period"] == str(periods[1])]
    expected = [(weights[k] + weights[6 + k]) / 2 for k in range(6)]
    assert [float(m["data-value"]) for m in first] == pytest.approx(expected, rel=1e-15)


def test_money_section_only_when_present(full_tables) -> None:
    assert 'id="money"' not in build_report(full_tables)
    series = full_tables["series"]
    ids = sorted(series["portfolio_id"].unique().to_list())
    # Invented values: one amount per portfolio at the first period's start, carried forward.
    first = series.group_by("portfolio_id").agg(pl.col("period_start").min().alias("as_of"))
    values = first.with_columns(
        value=pl.col("portfolio_id").replace_strict(
            {pid: 1_000_000.0 * (k + 1) for k, pid in enumerate(ids)}, return_dtype=pl.Float64
        )
    )
    money = money_tables(series, values, linking="carino")
    html = build_report({**full_tables, **money.tables()})
    assert 'id="money"' in html
    page = Page(html)
    # The roster's money table: one row per portfolio, cells carry the stored amounts.
    roster_money = page.find("table", data_table="money")[0]
    rows = [
        n
        for n in page.find("tr")
        if n["attrs"].get("data-portfolio") is not None and within(n, roster_money)
    ]
    assert sorted(n["attrs"]["data-portfolio"] for n in rows) == sorted(ids)
    stored = money.money.row(0, named=True)
    pid = stored["portfolio_id"]
    section = page.find("section", data_portfolio=pid)[0]
    cells = [
        n
        for n in page.find("td")
        if within(n, section) and n["attrs"].get("data-col") == "timing_money"
    ]
    assert len(cells) == 1
    assert float(cells[0]["attrs"]["data-value"]) == stored["timing_money"]
    # The plan sentence states the stored plan total.
    total = money.plan_total.row(0, named=True)
    spans = [n for n in page.find("span") if n["attrs"].get("data-money") == "timing"]
    assert float(spans[0]["attrs"]["data-value"]) == total["timing_money"]
    # A user-supplied id is text in the money table too.
    assert "<script>alert(1)</script>" not in html
    assert XSS_ID in ids


# -- chart primitives ----------------------------------------------------------------------------


@pytest.mark.parametrize(("lo", "hi"), [(-0.437, 0.29), (0.0, 1.0), (0.0123, 0.0125), (5.0, 5.0)])
def test_nice_ticks_cover_the_range(lo: float, hi: float) -> None:
    ticks = svg.nice_ticks(lo, hi, count=6)
    assert ticks[0] <= lo
    assert ticks[-1] >= hi
    steps = {round(b - a, 12) for a, b in itertools.pairwise(ticks)}
    assert len(steps) == 1  # evenly spaced
    step = steps.pop()
    mantissa = step / 10 ** math.floor(math.log10(step))
    # Heckbert (1990): steps are 1, 2 or 5 times a power of ten (from memory).
    assert any(math.isclose(mantissa, m, rel_tol=1e-9) for m in (1.0, 2.0, 5.0, 10.0))


def test_exact_round_trips() -> None:
    for value in (0.1 + 0.2, -1e-300, 0.2230432109876543, 12345.678):
        assert float(svg.exact(value)) == value
    assert svg.esc("a&b \"c\" 'd' <e>") == "a&amp;b &quot;c&quot; &#x27;d&#x27; &lt;e&gt;"


def test_roster_with_every_portfolio_skipped(full_tables) -> None:
    empty = {name: frame.clear() for name, frame in full_tables.items()}
    issues = pl.DataFrame(
        {
            "portfolio_id": ["x&y <z>"],
            "period_end": [None],
            "asset_class": [None],
            "severity": ["error"],
            "code": ["duplicate_key"],
            "message": ["holdings: duplicate <row> & more"],
        },
        schema=full_tables["data_issues"].schema,
    )
    html = build_report({**empty, "data_issues": issues})
    page = Page(html)
    assert "1 portfolio(s) were skipped because of errors in their inputs" in html
    assert "x&amp;y &lt;z&gt;" in html
    assert "holdings: duplicate &lt;row&gt; &amp; more" in html
    assert not page.find("section", **{"class": "portfolio"})
    assert marks(page, chart(page, "roster")) == []


def test_one_period_records(full_tables) -> None:
    first = full_tables["series"]["period_end"].min()
    tables = {
        name: frame.filter(pl.col("period_end") == first)
        if name in ("series", "effects")
        else frame
        for name, frame in full_tables.items()
    }
    page = Page(build_report(tables))
    for pid in ("aster_fund", XSS_ID):  # the third portfolio starts later: no rows left
        assert len(marks(page, chart(page, "cumulative", pid))) == 1
        assert len(marks(page, chart(page, "exposure", pid))) == 1


def test_separate_interaction_is_drawn() -> None:
    # The Brinson-Hood-Beebower form carries a separate interaction effect (DESIGN §3).
    from attribution.options import RunOptions
    from attribution.runner import run_roster

    result = run_roster(report_data.tiny_inputs(), RunOptions.build(form="bhb", tests="none"))
    tables = {name: result.tables()[name] for name in report_data.CORE_TABLES}
    page = Page(build_report(tables))
    series = tables["series"]
    for pid in report_data.PORTFOLIOS:
        cumulative = chart(page, "cumulative", pid)
        lines = [
            n for n in page.find("polyline", data_series="interaction") if within(n, cumulative)
        ]
        assert lines
        rows = series.filter(pl.col("portfolio_id") == pid).sort("period_end")
        got = marks(page, cumulative)
        assert [float(m["data-interaction"]) for m in got] == rows["cum_interaction"].to_list()
        effects = {m["data-effect"] for m in marks(page, chart(page, "classes", pid))}
        assert effects == {"static_allocation", "timing", "selection", "interaction"}
