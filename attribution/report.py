"""The review pack: one self-contained HTML page built from a run's stored tables.

``build_report`` turns the output tables (DESIGN §5) into ``report.html``; nothing new is
computed beyond presentation — sums of stored per-period effects per class (the same sums as
the ``class_contributions`` view), block means of stored weights where a chart would have too
many marks (said on the chart), and the stored regression coefficients evaluated along the
x-axis to draw their fitted curves. ``build_report_from_folder`` reads the Parquet files of an
output folder (and its manifest) and calls ``build_report``.

Rules the page keeps:

* one file, no network: no scripts at all, no external fonts, images or style sheets; a
  Content-Security-Policy forbids anything else; charts are inline SVG written by
  :mod:`attribution.svg`;
* every user-supplied string (portfolio ids, class names, messages, notes) goes through
  ``html.escape`` in text and attributes alike;
* no timestamps or wall-clock values (they belong to the manifest); the same tables give the
  same bytes: every table is sorted explicitly and numbers are formatted with fixed rules;
* every chart mark carries ``data-*`` attributes with the exact stored value (Python's
  round-tripping float repr), so a test can read values back from the page;
* colour-blind-safe palette (Okabe & Ito 2008, see :mod:`attribution.svg`) with dash
  patterns and text labels, so no reading depends on colour alone; a print style sheet.

Tables used when present: ``summary`` (required), ``summary_windows``, ``series``,
``effects``, ``data_issues``, ``timing_tests``, ``roster``, ``power`` and the optional money
tables (:data:`MONEY_TABLES`). Any subset works; a missing part is said plainly on the page.
"""

from __future__ import annotations

import datetime as dt
import json
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import polars as pl

from attribution import svg
from attribution.errors import ReadError, SchemaError
from attribution.svg import esc, exact

PID = "portfolio_id"
Q_LEVEL = 0.05
DEFAULT_MAX_DETAIL = 50
ROSTER_BAR_MAX = 60
WEIGHT_MARK_BUDGET = 1000
ISSUES_SHOWN_ROSTER = 200
ISSUES_SHOWN_PORTFOLIO = 25
# Below this a weight difference is rounding, not a decision (weights are rescaled to sum
# to 1 by the engine, which leaves differences of order 1e-16).
WEIGHT_EPS = 1e-9
MINUS = "\u2212"
DASH = "\u2014"

TABLE_FILES = (
    "summary",
    "summary_windows",
    "series",
    "effects",
    "data_issues",
    "timing_tests",
    "roster",
    "power",
)
# Optional tables of money terms (issue 4 item 2). Shown, when present, as a section of
# their own; their columns are rendered as they come (amounts with thousands separators).
MONEY_TABLES = ("plan_total", "money")

REQUIRED_COLUMNS: dict[str, tuple[str, ...]] = {
    "summary": (
        PID,
        "first_period",
        "last_period",
        "n_periods",
        "return_source",
        "portfolio_return",
        "policy_return",
        "active_return",
        "static_allocation",
        "timing",
        "selection",
        "residual",
    ),
    "summary_windows": (PID, "window", "n_periods", "active_return"),
    "series": (
        PID,
        "period_end",
        "cum_active_return",
        "cum_static_allocation",
        "cum_timing",
        "cum_selection",
        "cum_residual",
    ),
    "effects": (
        PID,
        "period_end",
        "asset_class",
        "weight",
        "static_weight",
        "policy_weight",
        "static_allocation",
        "timing",
        "selection",
    ),
    "data_issues": (PID, "period_end", "asset_class", "severity", "code", "message"),
    "timing_tests": (PID, "test", "estimate", "p_value", "q_value"),
    "roster": ("test", "n_portfolios", "n_skill_q05", "n_adverse_q05", "pi0"),
    "power": (PID, "periods_needed"),
}

# (column, label, colour, dash pattern). Colours: Okabe & Ito (2008), see attribution.svg.
EFFECTS = (
    ("static_allocation", "static allocation", svg.BLUE, "none"),
    ("timing", "timing", svg.VERMILLION, "7 3"),
    ("selection", "selection", svg.BLUISH_GREEN, "2 2"),
    ("interaction", "interaction", svg.REDDISH_PURPLE, "9 3 2 3"),
    ("residual", "residual", "#8c8c8c", "1 3"),
)
EFFECT_LABEL = {name: label for name, label, _, _ in EFFECTS}
SHORT_LABEL = {
    "static_allocation": "Static",
    "timing": "Timing",
    "selection": "Selection",
    "interaction": "Interaction",
    "residual": "Residual",
}

PRIMARY_TESTS = ("exposure_regression", "merton_accuracy", "timing_placebo")
# test code -> (plain label, what it is based on, how the estimate is shown)
TESTS: dict[str, tuple[str, str, str]] = {
    "exposure_regression": ("Exposure against the next period's market", "holdings", "num"),
    "trade_regression": ("Trades against the next period's market", "holdings", "num"),
    "portfolio_change": ("Portfolio-change measure (Grinblatt–Titman)", "holdings", "pct"),
    "merton_accuracy": ("Direction calls, P1 + P2 − 1 (Henriksson–Merton)", "holdings", "num"),
    "pesaran_timmermann": ("Direction calls (Pesaran–Timmermann)", "holdings", "num"),
    "timing_mean": ("Mean timing effect per period", "holdings", "pct"),
    "timing_placebo": ("Timing effect against random timers", "holdings", "pct"),
    "treynor_mazuy": ("Curvature of the payoff (Treynor–Mazuy γ)", "returns", "num"),
    "henriksson_merton": ("Option-like payoff (Henriksson–Merton γ)", "returns", "num"),
    "jensen_alpha": ("Jensen's alpha per period (not a timing measure)", "returns", "pct"),
}
TEST_ORDER = {name: i for i, name in enumerate(TESTS)}

VERDICTS = {
    "skill": ("evidence of skill", "v-skill"),
    "adverse": ("timing hurt", "v-adverse"),
    "record_too_short": ("too short a record to tell", "v-short"),
    "no_evidence": ("consistent with no skill", "v-none"),
}
NOT_RUN = ("timing tests not run", "v-notrun")
VERDICT_COLOURS = {
    "skill": svg.BLUISH_GREEN,
    "adverse": svg.VERMILLION,
    "record_too_short": svg.ORANGE,
    "no_evidence": "#8c8c8c",
    None: "#c9cdd3",
}

CAUTIONS = (
    "Statistical evidence is not proof of skill, and its absence is not proof of no skill.",
    "Short records have little power: a real timer can look like a coin-flipper for many "
    "years, and a lucky one like a skilled one.",
    "Past results do not guarantee future ones.",
    "Nothing in this pack is investment advice.",
    "Decisions about managers and mandates belong to the plan's governance, taken with "
    "licensed professionals; this pack is one input to them.",
)


# --------------------------------------------------------------------------------------
# Formatting
# --------------------------------------------------------------------------------------


def _finite(value: object) -> bool:
    return isinstance(value, int | float) and not isinstance(value, bool) and math.isfinite(value)


def fmt_pct(value: object, *, digits: int = 2, signed: bool = True) -> str:
    """A fraction as a percentage ("+1.23%", "−0.40%"); a missing value as a dash."""
    if not _finite(value):
        return DASH
    number = 100 * float(value)
    text = f"{number:+.{digits}f}%" if signed else f"{number:.{digits}f}%"
    return text.replace("-", MINUS)


def fmt_num(value: object, *, digits: int = 3) -> str:
    """A plain number with fixed decimals; a missing value as a dash."""
    if not _finite(value):
        return DASH
    return f"{float(value):.{digits}f}".replace("-", MINUS)


def fmt_p(value: object) -> str:
    """A p- or q-value with four decimals, "<0.0001" below that."""
    if not _finite(value):
        return DASH
    v = float(value)
    return "<0.0001" if v < 0.0001 else f"{v:.4f}"


def fmt_int(value: object) -> str:
    if value is None:
        return DASH
    return f"{int(value):,}"


def fmt_amount(value: object) -> str:
    """A money amount with thousands separators and two decimals."""
    if not _finite(value):
        return DASH
    return f"{float(value):,.2f}".replace("-", MINUS)


def fmt_date(value: object) -> str:
    return DASH if value is None else str(value)


def short(text: str, limit: int = 30) -> str:
    """Cut a raw (unescaped) label to ``limit`` characters with an ellipsis; escape after."""
    return text if len(text) <= limit else text[: limit - 1] + "\u2026"


def _pct_tick(step: float):
    decimals = min(3, max(0, math.ceil(-math.log10(step * 100)))) if step > 0 else 0

    def label(value: float) -> str:
        return f"{100 * value:.{decimals}f}%".replace("-", MINUS)

    return label


def _num_tick(step: float):
    decimals = min(4, max(0, math.ceil(-math.log10(step)))) if step > 0 else 0

    def label(value: float) -> str:
        return f"{value:.{decimals}f}".replace("-", MINUS)

    return label


def _step(ticks: Sequence[float]) -> float:
    return ticks[1] - ticks[0] if len(ticks) > 1 else 0.01


# --------------------------------------------------------------------------------------
# Reading the tables
# --------------------------------------------------------------------------------------


@dataclass(frozen=True)
class ReportData:
    """The tables the page is drawn from, checked and sorted (None where absent)."""

    summary: pl.DataFrame
    summary_windows: pl.DataFrame | None
    series: pl.DataFrame | None
    effects: pl.DataFrame | None
    data_issues: pl.DataFrame | None
    timing_tests: pl.DataFrame | None
    roster: pl.DataFrame | None
    power: pl.DataFrame | None
    money: tuple[tuple[str, pl.DataFrame], ...]
    manifest: Mapping[str, Any]
    detail_ids: tuple[str, ...]
    anchors: Mapping[str, str] = field(default_factory=dict)


def _check_columns(name: str, frame: pl.DataFrame | pl.LazyFrame) -> None:
    have = set(frame.collect_schema().names())
    missing = [c for c in REQUIRED_COLUMNS.get(name, ()) if c not in have]
    if missing:
        msg = (
            f"report: table {name!r} lacks column(s) {missing}; expected the columns of the "
            f"{name} output table (DESIGN §5), e.g. {list(REQUIRED_COLUMNS[name])}."
        )
        raise SchemaError(msg)


def _eager(frame: pl.DataFrame | pl.LazyFrame) -> pl.DataFrame:
    return frame.collect() if isinstance(frame, pl.LazyFrame) else frame


def collect_tables(
    tables: Mapping[str, pl.DataFrame | pl.LazyFrame],
    *,
    manifest: Mapping[str, Any] | None = None,
    portfolios: Sequence[str] | None = None,
    max_detail: int = DEFAULT_MAX_DETAIL,
) -> ReportData:
    """Check the tables, sort them, and cut the large ones to the portfolios shown in detail.

    ``effects`` may be a LazyFrame (a scan of a large Parquet file): only the rows of the
    portfolios shown in detail are collected. Raises :class:`SchemaError` naming the table
    and column when a present table lacks a column the page needs, and when ``summary`` is
    missing or a requested portfolio is not in it.
    """
    if "summary" not in tables:
        msg = "report: table 'summary' is missing; the review pack needs at least the summary."
        raise SchemaError(msg)
    for name, frame in tables.items():
        if frame is not None:
            _check_columns(name, frame)
    summary = _eager(tables["summary"]).sort(PID)
    ids = summary[PID].to_list()
    if portfolios is not None:
        unknown = sorted(set(portfolios) - set(ids))
        if unknown:
            msg = (
                f"report: portfolio(s) {unknown[:3]} not in table 'summary' (column "
                f"portfolio_id); expected ids of portfolios that ran."
            )
            raise SchemaError(msg)
        detail = tuple(sorted(set(portfolios)))
    else:
        if max_detail < 0:
            msg = f"report: max_detail must be >= 0; got {max_detail!r}."
            raise SchemaError(msg)
        detail = tuple(ids[:max_detail])
    detail_filter = pl.col(PID).is_in(list(detail))

    def get(name: str, keys: Sequence[str], *, only_detail: bool = False) -> pl.DataFrame | None:
        frame = tables.get(name)
        if frame is None:
            return None
        if only_detail:
            frame = frame.filter(detail_filter)
        return _eager(frame).sort(list(keys))

    money = tuple(
        (name, _eager(tables[name]))
        for name in MONEY_TABLES
        if name in tables and tables[name] is not None
    )
    issues = get("data_issues", [PID, "severity", "code", "period_end", "asset_class"])
    if issues is not None:
        issues = issues.sort(
            [PID, "severity", "code", "period_end", "asset_class", "message"], nulls_last=True
        )
    return ReportData(
        summary=summary,
        summary_windows=get("summary_windows", [PID, "window"]),
        series=get("series", [PID, "period_end"], only_detail=True),
        effects=get("effects", [PID, "asset_class", "period_end"], only_detail=True),
        data_issues=issues,
        timing_tests=get("timing_tests", [PID, "test"]),
        roster=get("roster", ["test"]),
        power=get("power", [PID]),
        money=money,
        manifest=dict(manifest or {}),
        detail_ids=detail,
        anchors={pid: f"pf-{i + 1}" for i, pid in enumerate(ids)},
    )


def read_manifest(results_dir: Path) -> dict[str, Any]:
    """The folder's manifest.json, or an empty mapping when there is none."""
    path = results_dir / "manifest.json"
    if not path.exists():
        return {}
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        msg = f"report: {str(path)!r} is not valid JSON ({exc})."
        raise ReadError(msg) from exc


def read_results(results_dir: Path) -> dict[str, pl.DataFrame | pl.LazyFrame]:
    """The output tables of a folder: small ones read, ``effects`` scanned lazily."""
    folder = Path(results_dir)
    if not folder.is_dir():
        msg = f"report: results folder {str(folder)!r} does not exist or is not a folder."
        raise ReadError(msg)
    from attribution.outputs import scan_output_table

    if not (folder / "summary.parquet").exists():
        msg = (
            f"report: {str(folder / 'summary.parquet')!r} not found; expected the output "
            "folder of a tiltaudit run (it holds summary.parquet)."
        )
        raise ReadError(msg)
    tables: dict[str, pl.DataFrame | pl.LazyFrame] = {}
    for name in (*TABLE_FILES, *MONEY_TABLES):
        path = folder / f"{name}.parquet"
        lazy = scan_output_table(folder, name)  # a file, or a --partitioned folder
        if lazy is None:
            continue
        try:
            # The two roster × record tables stay lazy: the report reads a few portfolios.
            tables[name] = lazy if name in ("effects", "series") else lazy.collect()
        except (OSError, pl.exceptions.ComputeError) as exc:
            msg = f"report: cannot read {str(path)!r} ({exc})."
            raise ReadError(msg) from exc
    return tables


def build_report_from_folder(
    results_dir: Path,
    *,
    title: str | None = None,
    portfolios: Sequence[str] | None = None,
    max_detail: int = DEFAULT_MAX_DETAIL,
) -> str:
    """The review pack of an output folder, rebuilt from its stored Parquet tables.

    Reads the tables listed in :data:`TABLE_FILES` and :data:`MONEY_TABLES` that exist and
    ``manifest.json`` (for the run's settings and notes; never its timestamps), and returns
    the HTML text of :func:`build_report`. Nothing is recomputed from the inputs.
    """
    folder = Path(results_dir)
    tables = read_results(folder)
    return build_report(
        tables,
        title=title,
        manifest=read_manifest(folder),
        portfolios=portfolios,
        max_detail=max_detail,
    )


# --------------------------------------------------------------------------------------
# Plain-language readings
# --------------------------------------------------------------------------------------


def plain_reading(
    *,
    p_value: float | None,
    q_value: float | None,
    q_value_adverse: float | None,
    verdict: str | None,
    n_obs: int | None,
    periods_needed: float | None,
    reason: str | None = None,
    level: float = Q_LEVEL,
) -> str:
    """The plain-language reading of one test row.

    Rule (our presentation of DESIGN §4): q < level → "evidence of skill at q < 0.05";
    adverse q < level → "timing hurt"; no p-value → "not computed" with the ``reason`` the
    run recorded in data_issues, when there is one; a non-significant test of a portfolio
    whose verdict is ``record_too_short`` → "too short a record to tell: about N more periods
    needed" with N = periods_needed − n_obs (the power table's record length for the
    reference timer); otherwise "consistent with no skill".
    """
    if not _finite(p_value) and not _finite(q_value):
        if reason:
            return f"not computed: {reason}"
        return "not computed (too few periods, nothing to test, or no resampling run)"
    if _finite(q_value) and q_value < level:
        return f"evidence of skill at q < {level:g}"
    if _finite(q_value_adverse) and q_value_adverse < level:
        return f"timing hurt (adverse side, q < {level:g})"
    if verdict == "record_too_short":
        more = _more_periods(periods_needed, n_obs)
        if more is not None:
            return f"too short a record to tell: about {more} more periods needed"
        return "too short a record to tell"
    return "consistent with no skill"


def _more_periods(periods_needed: object, n_obs: object) -> int | None:
    if not _finite(periods_needed) or not _finite(n_obs):
        return None
    more = math.ceil(float(periods_needed) - float(n_obs))
    return more if more > 0 else None


def verdict_badge(verdict: str | None) -> str:
    label, cls = VERDICTS.get(verdict or "", NOT_RUN)
    return f'<span class="verdict {cls}" data-verdict="{esc(verdict or "")}">{esc(label)}</span>'


# --------------------------------------------------------------------------------------
# Small HTML helpers
# --------------------------------------------------------------------------------------


def td_num(value: object, text: str, *, extra: str = "") -> str:
    """A numeric cell showing ``text`` and carrying the exact value in ``data-value``."""
    data = f' data-value="{esc(exact(value))}"' if _finite(value) else ""
    return f'<td class="num"{data}{extra}>{esc(text)}</td>'


def td_text(text: object, *, cls: str = "") -> str:
    klass = f' class="{cls}"' if cls else ""
    return f"<td{klass}>{esc(DASH if text is None else text)}</td>"


def th_row(headers: Sequence[tuple[str, bool]]) -> str:
    cells = "".join(
        f'<th class="num">{esc(h)}</th>' if numeric else f"<th>{esc(h)}</th>"
        for h, numeric in headers
    )
    return f"<thead><tr>{cells}</tr></thead>"


def figure(chart: str, caption: str, *, cls: str = "") -> str:
    """A chart (markup) with its caption (plain text, escaped here)."""
    klass = f' class="{cls}"' if cls else ""
    return f"<figure{klass}>{chart}<figcaption>{esc(caption)}</figcaption></figure>"


def legend_html(items: Sequence[tuple[str, str, str]]) -> str:
    """An HTML legend: (colour, dash, label) with a small line sample each."""
    out = []
    for colour, dash, label in items:
        sample = (
            f'<svg class="key" viewBox="0 0 22 8" aria-hidden="true"><line x1="1" y1="4" '
            f'x2="21" y2="4" stroke="{colour}" stroke-width="2.4"'
            + ("" if dash == "none" else f' stroke-dasharray="{dash}"')
            + "/></svg>"
        )
        out.append(f'<span class="key-item">{sample}{esc(label)}</span>')
    return f'<div class="legend">{"".join(out)}</div>'


def swatch_legend(items: Sequence[tuple[str, str]]) -> str:
    out = [
        f'<span class="key-item"><span class="swatch" style="background:{c}"></span>'
        f"{esc(label)}</span>"
        for c, label in items
    ]
    return f'<div class="legend">{"".join(out)}</div>'


def _dash(dash: str) -> str | None:
    return None if dash == "none" else dash


# --------------------------------------------------------------------------------------
# Time axis
# --------------------------------------------------------------------------------------


def time_ticks(periods: Sequence[dt.date], xs: Sequence[float]) -> list[tuple[float, str]]:
    """Tick positions for a period axis: each new year for long records, months otherwise."""
    n = len(periods)
    if n == 0:
        return []
    if n >= 24:
        starts = [i for i in range(n) if i == 0 or periods[i].year != periods[i - 1].year]
        if len(starts) > 1 and starts[1] - starts[0] < 3:
            starts = starts[1:]  # a stub first year would crowd the next label
        every = max(1, math.ceil(len(starts) / 12))
        return [(xs[i], str(periods[i].year)) for i in starts[::every]]
    every = max(1, math.ceil(n / 6))
    return [(xs[i], f"{periods[i]:%Y-%m}") for i in range(0, n, every)]


def _period_xs(n: int, frame: svg.Frame) -> list[float]:
    if n == 1:
        return [(frame.x0 + frame.x1) / 2]
    scale = svg.Scale(0, n - 1, frame.x0 + 4, frame.x1 - 4)
    return [scale(i) for i in range(n)]


# --------------------------------------------------------------------------------------
# Charts
# --------------------------------------------------------------------------------------


def _present_effects(frame: pl.DataFrame, prefix: str = "") -> list[tuple[str, str, str, str]]:
    """The effects with at least one known value in ``frame`` (columns ``prefix + name``)."""
    out = []
    for name, label, colour, dash in EFFECTS:
        col = prefix + name
        if col in frame.columns and frame[col].is_not_null().any():
            out.append((name, label, colour, dash))
    return out


def chart_cumulative(pid: str, series: pl.DataFrame) -> str:
    """Cumulative linked effects over time: one line per effect, one mark per period on the
    active-return line (the linked total) carrying every effect's value."""
    frame = svg.Frame(width=760, height=290, left=58, right=14, top=12, bottom=28)
    periods = series["period_end"].to_list()
    n = len(periods)
    xs = _period_xs(n, frame)
    effects = _present_effects(series, "cum_")
    columns = ["cum_active_return", *[f"cum_{name}" for name, *_ in effects]]
    values = [v for c in columns for v in series[c].to_list() if _finite(v)]
    ticks = svg.nice_ticks(*svg.padded_range(values, include=[0.0]), count=6)
    y = svg.Scale(ticks[0], ticks[-1], frame.y1, frame.y0)
    label = _pct_tick(_step(ticks))
    out = [
        svg.svg_open(
            frame,
            chart="cumulative",
            label=f"Cumulative linked effects of {pid}",
            extra={"data-portfolio": pid},
        ),
        svg.y_axis(frame, y, ticks, label),
        svg.x_axis(frame, time_ticks(periods, xs)),
    ]
    for name, _, colour, dash in reversed(effects):
        col = series[f"cum_{name}"].to_list()
        points = [None if not _finite(v) else (xs[i], y(v)) for i, v in enumerate(col)]
        for run in svg.segments(points):
            out.append(
                svg.polyline(
                    run,
                    {
                        "stroke": colour,
                        "stroke-width": 1.8,
                        "stroke-dasharray": _dash(dash),
                        "data-series": name,
                    },
                )
            )
    active = series["cum_active_return"].to_list()
    points = [None if not _finite(v) else (xs[i], y(v)) for i, v in enumerate(active)]
    for run in svg.segments(points):
        out.append(
            svg.polyline(
                run, {"stroke": svg.BLACK, "stroke-width": 2.6, "data-series": "active_return"}
            )
        )
    effect_cols = {name: series[f"cum_{name}"].to_list() for name, *_ in effects}
    marks = []
    for i, period in enumerate(periods):
        value = active[i]
        if not _finite(value):
            continue
        data: dict[str, object | None] = {
            "cx": xs[i],
            "cy": y(value),
            "r": 2.1,
            "fill": svg.BLACK,
            "class": "mark",
            "data-mark": "",
            "data-period": str(period),
            "data-value": exact(value),
        }
        tip = [f"{period}: active {fmt_pct(value)}"]
        for name, col in effect_cols.items():
            data[f"data-{name.replace('_', '-')}"] = exact(col[i]) if _finite(col[i]) else None
            tip.append(f"{EFFECT_LABEL[name]} {fmt_pct(col[i])}")
        marks.append(svg.element("circle", data, svg.tooltip(", ".join(tip))))
    out.append(f'<g class="marks">{"".join(marks)}</g>')
    out.append("</svg>")
    legend = legend_html(
        [(svg.BLACK, "none", "active return (linked total)")]
        + [(colour, dash, label) for _, label, colour, dash in effects]
    )
    return legend + "".join(out)


def chart_classes(pid: str, by_class: pl.DataFrame, effects: list[tuple[str, str, str, str]]):
    """Per-class contributions: one bar per class and effect (sums over the periods)."""
    classes = by_class["asset_class"].to_list()
    n_eff = len(effects)
    bar, gap = 7.0, 1.5
    row = n_eff * (bar + gap) + 10
    frame = svg.Frame(
        width=760, height=20 + len(classes) * row + 26, left=160, right=20, top=14, bottom=26
    )
    values = [v for name, *_ in effects for v in by_class[name].to_list() if _finite(v)]
    ticks = svg.nice_ticks(*svg.padded_range(values, include=[0.0]), count=6)
    x = svg.Scale(ticks[0], ticks[-1], frame.x0, frame.x1)
    out = [
        svg.svg_open(
            frame,
            chart="classes",
            label=f"Contributions per asset class of {pid}",
            extra={"data-portfolio": pid},
        ),
        svg.x_value_axis(frame, x, ticks, _pct_tick(_step(ticks))),
    ]
    for k, cls_name in enumerate(classes):
        top = frame.y0 + 4 + k * row
        out.append(
            svg.element(
                "text",
                {
                    "x": frame.x0 - 8,
                    "y": top + n_eff * (bar + gap) / 2 + 3.5,
                    "text-anchor": "end",
                    "class": "label",
                },
                esc(short(cls_name, 26)) + svg.tooltip(cls_name),
            )
        )
        for j, (name, label, colour, _) in enumerate(effects):
            value = by_class[name][k]
            if not _finite(value):
                continue
            x0, x1 = sorted((x(0.0), x(value)))
            out.append(
                svg.element(
                    "rect",
                    {
                        "x": x0,
                        "y": top + j * (bar + gap),
                        "width": max(x1 - x0, 0.5),
                        "height": bar,
                        "fill": colour,
                        "class": "mark",
                        "data-mark": "",
                        "data-class": cls_name,
                        "data-effect": name,
                        "data-value": exact(value),
                    },
                    svg.tooltip(f"{cls_name}: {label} {fmt_pct(value)}"),
                )
            )
    out.append("</svg>")
    legend = swatch_legend([(colour, label) for _, label, colour, _ in effects])
    return legend + "".join(out)


def _weight_blocks(n: int, n_classes: int) -> int:
    """Periods per bar so that a portfolio's weight chart stays within the mark budget."""
    return max(1, math.ceil(n * n_classes / WEIGHT_MARK_BUDGET))


def chart_weights(pid: str, effects: pl.DataFrame, classes: Sequence[str]) -> tuple[str, int]:
    """The weight path against the policy mix: one strip per class, one bar per period from
    the policy weight to the weight held (blue above policy, vermillion below), the policy
    weight dashed and the static (average) weight dotted. Returns (svg, periods per bar)."""
    periods = sorted(set(effects["period_end"].to_list()))
    block = _weight_blocks(len(periods), len(classes))
    # Block means of stored weights (presentation only) when the record is long.
    index = {p: i // block for i, p in enumerate(periods)}
    framed = (
        effects.filter(pl.col("asset_class").is_in(list(classes)))
        .with_columns(
            pl.col("period_end").replace_strict(index, return_dtype=pl.Int64).alias("_block")
        )
        .group_by("asset_class", "_block")
        .agg(
            pl.col("period_end").max().alias("period_end"),
            pl.col("period_end").min().alias("first_period"),
            pl.col("weight").mean(),
            pl.col("policy_weight").mean(),
            pl.col("static_weight").mean(),
            (
                pl.col("is_drifted").all()
                if "is_drifted" in effects.columns
                else pl.lit(False).alias("is_drifted")
            ),
        )
        .sort("asset_class", "_block")
    )
    n_blocks = max(index.values()) + 1 if index else 0
    strip, gap = 40.0, 22.0
    frame = svg.Frame(
        width=760,
        height=8 + len(classes) * (strip + gap) + 22,
        left=172,
        right=46,
        top=8,
        bottom=24,
    )
    # Band layout: each bar owns an equal slot of the axis and sits in its middle.
    slot = (frame.x1 - frame.x0) / max(n_blocks, 1)
    xs = [frame.x0 + slot * (b + 0.5) for b in range(n_blocks)]
    width = max(0.8, 0.78 * slot) if slot < 12 else 0.6 * slot
    ends = [periods[min(len(periods) - 1, (b + 1) * block - 1)] for b in range(n_blocks)]
    out = [
        svg.svg_open(
            frame,
            chart="weights",
            label=f"Weights against the policy mix of {pid}",
            extra={
                "data-portfolio": pid,
                "data-periods-per-mark": block,
            },
        )
    ]
    by_class = framed.partition_by("asset_class", as_dict=True, maintain_order=True)
    for k, cls_name in enumerate(classes):
        rows = by_class.get((cls_name,))
        top = frame.y0 + k * (strip + gap) + 14
        bottom = top + strip
        if rows is None:
            continue
        w = rows["weight"].to_list()
        q = rows["policy_weight"].to_list()
        s = rows["static_weight"].to_list()
        drift = rows["is_drifted"].to_list()
        slots = rows["_block"].to_list()  # a class's bars sit in their own period's slot
        lo, hi = svg.padded_range([*w, *q, *s], pad=0.08)
        if hi - lo < 0.01:  # at least one percentage point of height, so noise stays small
            mid = (hi + lo) / 2
            lo, hi = mid - 0.005, mid + 0.005
        y = svg.Scale(lo, hi, bottom, top)
        mean_w = sum(w) / len(w)
        mean_q = sum(q) / len(q)
        out.append(
            svg.element(
                "text",
                {"x": frame.x0 - 10, "y": top + 12, "text-anchor": "end", "class": "label"},
                esc(short(cls_name, 26)) + svg.tooltip(cls_name),
            )
        )
        out.append(
            svg.element(
                "text",
                {"x": frame.x0 - 10, "y": top + 26, "text-anchor": "end", "class": "sublabel"},
                esc(
                    f"held {fmt_pct(mean_w, digits=1, signed=False)} · policy "
                    f"{fmt_pct(mean_q, digits=1, signed=False)}"
                ),
            )
        )
        out.append(
            svg.element(
                "rect",
                {
                    "x": frame.x0,
                    "y": top,
                    "width": frame.x1 - frame.x0,
                    "height": strip,
                    "fill": "#f6f7f9",
                },
            )
        )
        for tick_value in (lo, hi):
            out.append(
                svg.element(
                    "text",
                    {
                        "x": frame.x1 + 4,
                        "y": y(tick_value) + (8 if tick_value == hi else -1),
                        "text-anchor": "start",
                        "class": "tick",
                    },
                    esc(fmt_pct(tick_value, digits=1, signed=False)),
                )
            )
        bars = []
        for i, b in enumerate(slots):
            y0, y1 = sorted((y(w[i]), y(q[i])))
            bars.append(
                # One decimal of a pixel is plenty for a bar; fill by class keeps it short.
                f'<rect class="{"wo" if w[i] >= q[i] else "wu"}{" wd" if drift[i] else ""}" '
                f'x="{xs[b] - width / 2:.1f}" y="{y0:.1f}" width="{width:.1f}" '
                f'height="{max(y1 - y0, 0.6):.1f}" data-mark="" data-period="{ends[b]}" '
                f'data-value="{exact(w[i])}" data-policy="{exact(q[i])}"/>'
            )
        centres = [xs[b] for b in slots]
        out.append(
            f'<g class="strip" data-class="{esc(cls_name)}">'
            + "".join(bars)
            + _step_line(centres, slot, q, y, svg.INK, "5 3")
            + _step_line(centres, slot, s, y, svg.MUTED, "1.5 2")
            + "</g>"
        )
    out.append(svg.x_axis(frame, time_ticks(ends, xs)))
    out.append("</svg>")
    return "".join(out), block


def _step_line(xs, slot, values, y, colour, dash) -> str:
    """A horizontal segment across each bar's slot at the value (a step line)."""
    if not values:
        return ""
    half = slot / 2
    points: list[tuple[float, float]] = []
    for i, v in enumerate(values):
        points.extend([(xs[i] - half, y(v)), (xs[i] + half, y(v))])
    return svg.polyline(points, {"stroke": colour, "stroke-width": 1.2, "stroke-dasharray": dash})


def _scatter_frame() -> svg.Frame:
    return svg.Frame(width=380, height=300, left=52, right=12, top=12, bottom=40)


def chart_exposure(pid: str, anchor: str, series: pl.DataFrame, fit: Mapping | None) -> str:
    """Exposure held in each period against that period's market excess return (the return
    that followed the decision), with the fitted line of the ``exposure_regression`` row."""
    rows = series.filter(
        pl.col("exposure").is_not_null()
        & pl.col("market_excess_return").is_not_null()
        & pl.col("exposure").is_finite()
        & pl.col("market_excess_return").is_finite()
    )
    frame = _scatter_frame()
    xv = rows["market_excess_return"].to_list()
    yv = rows["exposure"].to_list()
    static = (
        rows["static_exposure"].drop_nulls().to_list() if "static_exposure" in rows.columns else []
    )
    x_ticks = svg.nice_ticks(*svg.padded_range(xv, include=[0.0]), count=5)
    y_ticks = svg.nice_ticks(*svg.padded_range([*yv, *static]), count=5)
    x = svg.Scale(x_ticks[0], x_ticks[-1], frame.x0, frame.x1)
    y = svg.Scale(y_ticks[0], y_ticks[-1], frame.y1, frame.y0)
    clip = f"clip-{anchor}-exposure"
    out = [
        svg.svg_open(
            frame,
            chart="exposure",
            label=f"Exposure against the next period's market excess return, {pid}",
            extra={"data-portfolio": pid},
        ),
        svg.clip_rect(frame, clip),
        svg.y_axis(frame, y, y_ticks, _num_tick(_step(y_ticks))),
        svg.x_value_axis(frame, x, x_ticks, _pct_tick(_step(x_ticks))),
        svg.axis_title(
            (frame.x0 + frame.x1) / 2,
            frame.height - 6,
            "market excess return in the period that followed",
        ),
        svg.axis_title(12, (frame.y0 + frame.y1) / 2, "market exposure held", rotate=True),
    ]
    lines = []
    if static and max(static) - min(static) < 1e-12:
        lines.append(
            svg.element(
                "line",
                {
                    "x1": frame.x0,
                    "x2": frame.x1,
                    "y1": y(static[0]),
                    "y2": y(static[0]),
                    "stroke": svg.MUTED,
                    "stroke-width": 1.2,
                    "stroke-dasharray": "1.5 2",
                    "data-series": "static_exposure",
                    "data-value": exact(static[0]),
                },
            )
        )
    if fit is not None and _finite(fit.get("alpha")) and _finite(fit.get("estimate")):
        a, b = float(fit["alpha"]), float(fit["estimate"])
        lo, hi = x_ticks[0], x_ticks[-1]
        lines.append(
            svg.element(
                "line",
                {
                    "x1": x(lo),
                    "x2": x(hi),
                    "y1": y(a + b * lo),
                    "y2": y(a + b * hi),
                    "stroke": svg.VERMILLION,
                    "stroke-width": 2.0,
                    "data-series": "fit",
                    "data-alpha": exact(a),
                    "data-slope": exact(b),
                },
            )
        )
    out.append(f'<g clip-path="url(#{esc(clip)})">{"".join(lines)}</g>')
    drift = rows["is_drifted"].to_list() if "is_drifted" in rows.columns else [False] * rows.height
    marks = []
    for period, xi, yi, d in zip(rows["period_end"].to_list(), xv, yv, drift, strict=True):
        marks.append(
            svg.element(
                "circle",
                {
                    "cx": x(xi),
                    "cy": y(yi),
                    "r": 2.6,
                    "fill": "none" if d else svg.BLUE,
                    "stroke": svg.BLUE,
                    "stroke-width": 1.0,
                    "fill-opacity": 0.75,
                    "data-mark": "",
                    "data-period": str(period),
                    "data-x": exact(xi),
                    "data-value": exact(yi),
                },
                svg.tooltip(f"{period}: exposure {fmt_num(yi)}, market {fmt_pct(xi)}"),
            )
        )
    out.append(f'<g class="marks">{"".join(marks)}</g></svg>')
    return "".join(out)


def _curve(x, y, lo: float, hi: float, func, steps: int = 80) -> list[tuple[float, float]]:
    return [(x(v), y(func(v))) for v in (lo + (hi - lo) * i / steps for i in range(steps + 1))]


def chart_payoff(
    pid: str, anchor: str, series: pl.DataFrame, tm: Mapping | None, hm: Mapping | None
) -> str:
    """The payoff picture: portfolio excess return against market excess return per period,
    with the Treynor–Mazuy fit α + βx + γx², the Henriksson–Merton fit α + βx + γ·max(x, 0)
    (coefficients from their ``timing_tests`` rows) and the perfect-timing frontier max(x, 0)."""
    rows = series.with_columns(
        (pl.col("portfolio_return") - pl.col("riskless_return")).alias("_excess")
    ).filter(
        pl.col("_excess").is_not_null()
        & pl.col("market_excess_return").is_not_null()
        & pl.col("_excess").is_finite()
        & pl.col("market_excess_return").is_finite()
    )
    frame = _scatter_frame()
    xv = rows["market_excess_return"].to_list()
    yv = rows["_excess"].to_list()
    lo_x, hi_x = svg.padded_range(xv, include=[0.0])
    x_ticks = svg.nice_ticks(lo_x, hi_x, count=5)
    y_ticks = svg.nice_ticks(*svg.padded_range([*yv, max(0.0, hi_x)], include=[0.0]), count=5)
    x = svg.Scale(x_ticks[0], x_ticks[-1], frame.x0, frame.x1)
    y = svg.Scale(y_ticks[0], y_ticks[-1], frame.y1, frame.y0)
    clip = f"clip-{anchor}-payoff"
    out = [
        svg.svg_open(
            frame,
            chart="payoff",
            label=f"Portfolio excess return against market excess return, {pid}",
            extra={"data-portfolio": pid},
        ),
        svg.clip_rect(frame, clip),
        svg.y_axis(frame, y, y_ticks, _pct_tick(_step(y_ticks))),
        svg.x_value_axis(frame, x, x_ticks, _pct_tick(_step(x_ticks))),
        svg.axis_title((frame.x0 + frame.x1) / 2, frame.height - 6, "market excess return"),
        svg.axis_title(12, (frame.y0 + frame.y1) / 2, "portfolio excess return", rotate=True),
    ]
    lo, hi = x_ticks[0], x_ticks[-1]
    curves = [
        svg.polyline(
            [(x(lo), y(0.0)), (x(0.0), y(0.0)), (x(hi), y(hi))],
            {
                "stroke": svg.BLACK,
                "stroke-width": 1.4,
                "stroke-dasharray": "4 3",
                "data-series": "perfect_timing",
            },
        )
    ]
    for row, name, colour, dash, shape in (
        (tm, "treynor_mazuy", svg.VERMILLION, "none", lambda v: v * v),
        (hm, "henriksson_merton", svg.BLUISH_GREEN, "7 3", lambda v: max(v, 0.0)),
    ):
        if row is None or not all(_finite(row.get(k)) for k in ("alpha", "beta", "estimate")):
            continue
        a, b, g = float(row["alpha"]), float(row["beta"]), float(row["estimate"])
        curves.append(
            svg.polyline(
                _curve(x, y, lo, hi, lambda v, a=a, b=b, g=g, f=shape: a + b * v + g * f(v)),
                {
                    "stroke": colour,
                    "stroke-width": 2.0,
                    "stroke-dasharray": _dash(dash),
                    "data-series": name,
                    "data-alpha": exact(a),
                    "data-beta": exact(b),
                    "data-gamma": exact(g),
                },
            )
        )
    out.append(f'<g clip-path="url(#{esc(clip)})">{"".join(curves)}</g>')
    marks = []
    for period, xi, yi in zip(rows["period_end"].to_list(), xv, yv, strict=True):
        marks.append(
            svg.element(
                "circle",
                {
                    "cx": x(xi),
                    "cy": y(yi),
                    "r": 2.4,
                    "fill": svg.SKY_BLUE,
                    "stroke": svg.BLUE,
                    "stroke-width": 0.6,
                    "data-mark": "",
                    "data-period": str(period),
                    "data-x": exact(xi),
                    "data-value": exact(yi),
                },
                svg.tooltip(f"{period}: portfolio {fmt_pct(yi)}, market {fmt_pct(xi)}"),
            )
        )
    out.append(f'<g class="marks">{"".join(marks)}</g></svg>')
    return "".join(out)


def chart_roster(data: ReportData, verdicts: Mapping[str, str | None]) -> str:
    """The roster at a glance: one row per portfolio with its linked effects stacked away
    from zero (gains right, losses left) and a diamond at the active return; above
    :data:`ROSTER_BAR_MAX` portfolios, one dot per portfolio (static against timing)."""
    summary = data.summary
    if summary.height > ROSTER_BAR_MAX:
        return _roster_scatter(data, verdicts)
    effects = _present_effects(summary)
    row = 24.0
    frame = svg.Frame(
        width=760, height=14 + summary.height * row + 30, left=190, right=78, top=10, bottom=28
    )
    lows, highs = [0.0], [0.0]
    for r in summary.iter_rows(named=True):
        vals = [r[name] for name, *_ in effects if _finite(r[name])]
        lows.append(sum(v for v in vals if v < 0))
        highs.append(sum(v for v in vals if v > 0))
        if _finite(r["active_return"]):
            lows.append(r["active_return"])
            highs.append(r["active_return"])
    ticks = svg.nice_ticks(*svg.padded_range([*lows, *highs]), count=7)
    x = svg.Scale(ticks[0], ticks[-1], frame.x0, frame.x1)
    out = [
        svg.svg_open(
            frame,
            chart="roster",
            label="Linked effects of every portfolio",
            extra=None,
        ),
        svg.x_value_axis(frame, x, ticks, _pct_tick(_step(ticks))),
    ]
    for k, r in enumerate(summary.iter_rows(named=True)):
        pid = r[PID]
        top = frame.y0 + 4 + k * row
        pieces = []
        pos, neg = 0.0, 0.0
        for name, label, colour, _ in effects:
            value = r[name]
            if not _finite(value) or value == 0:
                continue
            start = pos if value > 0 else neg
            end = start + value
            if value > 0:
                pos = end
            else:
                neg = end
            x0, x1 = sorted((x(start), x(end)))
            pieces.append(
                svg.element(
                    "rect",
                    {
                        "x": x0,
                        "y": top + 3,
                        "width": max(x1 - x0, 0.4),
                        "height": row - 10,
                        "fill": colour,
                        "data-effect": name,
                        "data-value": exact(value),
                    },
                    svg.tooltip(f"{pid}: {label} {fmt_pct(value)}"),
                )
            )
        active = r["active_return"]
        if _finite(active):
            cx, cy = x(active), top + (row - 4) / 2
            pieces.append(
                svg.element(
                    "path",
                    {
                        "d": f"M{svg.num(cx)} {svg.num(cy - 6)}l5 6l-5 6l-5 -6z",
                        "fill": svg.BLACK,
                        "stroke": "#ffffff",
                        "stroke-width": 1.0,
                        "data-series": "active_return",
                    },
                    svg.tooltip(f"{pid}: active return {fmt_pct(active)}"),
                )
            )
            pieces.append(
                svg.element(
                    "text",
                    {"x": frame.x1 + 6, "y": cy + 4, "class": "value"},
                    esc(fmt_pct(active)),
                )
            )
        anchor = data.anchors[pid]
        name_text = svg.element(
            "text",
            {
                "x": frame.x0 - 10,
                "y": top + (row - 4) / 2 + 4,
                "text-anchor": "end",
                "class": "label",
            },
            esc(short(pid, 28)) + svg.tooltip(pid),
        )
        if pid in data.detail_ids:
            name_text = f'<a href="#{anchor}">{name_text}</a>'
        verdict = verdicts.get(pid)
        dot = svg.element(
            "circle",
            {
                "cx": frame.x0 - 180 + 4,
                "cy": top + (row - 4) / 2,
                "r": 4,
                "fill": VERDICT_COLOURS.get(verdict, VERDICT_COLOURS[None]),
            },
            svg.tooltip(VERDICTS.get(verdict or "", NOT_RUN)[0]),
        )
        out.append(
            f'<g class="mark" data-mark="" data-portfolio="{esc(pid)}" '
            f'data-value="{esc(exact(active) if _finite(active) else "")}">'
            + dot
            + name_text
            + "".join(pieces)
            + "</g>"
        )
    out.append("</svg>")
    legend = swatch_legend([(colour, label) for _, label, colour, _ in effects])
    return legend + "".join(out)


def _roster_scatter(data: ReportData, verdicts: Mapping[str, str | None]) -> str:
    summary = data.summary
    frame = svg.Frame(width=760, height=420, left=64, right=16, top=14, bottom=42)
    xv = summary["static_allocation"].to_list()
    yv = summary["timing"].to_list()
    x_ticks = svg.nice_ticks(*svg.padded_range(xv, include=[0.0]), count=7)
    y_ticks = svg.nice_ticks(*svg.padded_range(yv, include=[0.0]), count=6)
    x = svg.Scale(x_ticks[0], x_ticks[-1], frame.x0, frame.x1)
    y = svg.Scale(y_ticks[0], y_ticks[-1], frame.y1, frame.y0)
    out = [
        svg.svg_open(
            frame,
            chart="roster",
            label="Static allocation against timing, one dot per portfolio",
            extra=None,
        ),
        svg.y_axis(frame, y, y_ticks, _pct_tick(_step(y_ticks))),
        svg.x_value_axis(frame, x, x_ticks, _pct_tick(_step(x_ticks))),
        svg.axis_title(
            (frame.x0 + frame.x1) / 2, frame.height - 6, "static allocation (linked, whole record)"
        ),
        svg.axis_title(14, (frame.y0 + frame.y1) / 2, "timing (linked, whole record)", rotate=True),
    ]
    marks = []
    for pid, xi, yi, active in zip(
        summary[PID].to_list(), xv, yv, summary["active_return"].to_list(), strict=True
    ):
        if not (_finite(xi) and _finite(yi)):
            continue
        marks.append(
            svg.element(
                "circle",
                {
                    "cx": x(xi),
                    "cy": y(yi),
                    "r": 2.4,
                    "fill": VERDICT_COLOURS.get(verdicts.get(pid), VERDICT_COLOURS[None]),
                    "fill-opacity": 0.8,
                    "data-mark": "",
                    "data-portfolio": pid,
                    "data-x": exact(xi),
                    "data-value": exact(yi),
                    "data-active": exact(active) if _finite(active) else None,
                },
                svg.tooltip(f"{pid}: static {fmt_pct(xi)}, timing {fmt_pct(yi)}"),
            )
        )
    out.append(f'<g class="marks">{"".join(marks)}</g></svg>')
    return "".join(out)


# --------------------------------------------------------------------------------------
# Sections
# --------------------------------------------------------------------------------------


def _verdicts(data: ReportData) -> dict[str, str | None]:
    if "timing_evidence" not in data.summary.columns:
        return dict.fromkeys(data.summary[PID].to_list())
    return dict(
        zip(data.summary[PID].to_list(), data.summary["timing_evidence"].to_list(), strict=True)
    )


def timing_absence(manifest: Mapping[str, Any]) -> str:
    """Why the timing tests are missing, from the manifest where it says."""
    options = manifest.get("options") or {}
    inputs = manifest.get("inputs") or {}
    notes = [str(n) for n in manifest.get("notes") or [] if "timing" in str(n).lower()]
    base = "The timing tests were not run for this output"
    if options.get("tests") == "none":
        reason = "the run was made with --tests none."
    elif manifest and "riskfree" not in inputs and not options.get("cash_class"):
        reason = (
            "no riskless source was given (neither --riskfree nor --cash-class), so there is "
            "no market excess return to test the weight shifts against. The decomposition "
            "does not need one and is complete."
        )
    else:
        reason = "the output folder has no timing_tests table."
    text = f"{base}: {reason}"
    if notes:
        text += " The run noted: " + " ".join(notes)
    return text


def _summary_table(data: ReportData, verdicts: Mapping[str, str | None]) -> str:
    summary = data.summary
    effects = _present_effects(summary)
    has_timing = data.timing_tests is not None
    best: dict[str, tuple[float | None, str, float | None, str]] = {}
    if has_timing:
        primary = data.timing_tests.filter(pl.col("test").is_in(list(PRIMARY_TESTS)))
        for pid, part in primary.partition_by(PID, as_dict=True, maintain_order=True).items():
            best[pid[0]] = (*_lowest(part, "q_value"), *_lowest(part, "q_value_adverse"))
    issue_counts: dict[str, tuple[int, int]] = {}
    if data.data_issues is not None and data.data_issues.height:
        counts = data.data_issues.group_by(PID).agg(
            (pl.col("severity") == "error").sum().alias("e"),
            (pl.col("severity") == "warning").sum().alias("w"),
        )
        issue_counts = {r[PID]: (r["e"], r["w"]) for r in counts.iter_rows(named=True)}
    headers = [("Portfolio", False), ("Periods", True), ("Active", True)]
    headers += [(SHORT_LABEL[name], True) for name, *_ in effects]
    headers += [("Active / year", True)]
    if has_timing:
        headers += [
            ("Timing evidence", False),
            ("q, skill", True),
            ("q, adverse", True),
        ]
    headers += [("Data issues", True)]
    body = []
    for r in summary.iter_rows(named=True):
        pid = r[PID]
        name = esc(pid)
        if pid in data.detail_ids:
            name = f'<a href="#{data.anchors[pid]}">{name}</a>'
        cells = [f'<td class="pid">{name}</td>', td_num(r["n_periods"], fmt_int(r["n_periods"]))]
        cells.append(td_num(r["active_return"], fmt_pct(r["active_return"])))
        cells += [td_num(r[n], fmt_pct(r[n])) for n, *_ in effects]
        cells.append(td_num(r.get("active_return_ann"), fmt_pct(r.get("active_return_ann"))))
        if has_timing:
            cells.append(f"<td>{verdict_badge(verdicts.get(pid))}</td>")
            q, q_test, qa, qa_test = best.get(pid, (None, "", None, ""))
            cells.append(td_num(q, fmt_p(q), extra=f' title="{esc(q_test)}"' if q_test else ""))
            cells.append(td_num(qa, fmt_p(qa), extra=f' title="{esc(qa_test)}"' if qa_test else ""))
        errors, warnings = issue_counts.get(pid, (0, 0))
        text = ", ".join(
            part
            for part in (
                f"{errors} error{'s' if errors != 1 else ''}" if errors else "",
                f"{warnings} warning{'s' if warnings != 1 else ''}" if warnings else "",
            )
            if part
        )
        cells.append(f'<td class="issues-cell">{esc(text)}</td>')
        body.append(f'<tr data-portfolio="{esc(pid)}">{"".join(cells)}</tr>')
    return (
        '<div class="scroll"><table class="roster-table" data-table="summary">'
        + th_row(headers)
        + "<tbody>"
        + "".join(body)
        + "</tbody></table></div>"
    )


def _lowest(part: pl.DataFrame, column: str) -> tuple[float | None, str]:
    if column not in part.columns:
        return None, ""
    rows = part.filter(pl.col(column).is_not_null() & pl.col(column).is_not_nan())
    if rows.height == 0:
        return None, ""
    best = rows.sort([column, "test"]).row(0, named=True)
    return best[column], TESTS.get(best["test"], (best["test"],))[0]


def _roster_tests_table(roster: pl.DataFrame) -> str:
    rows = sorted(
        roster.iter_rows(named=True), key=lambda r: (TEST_ORDER.get(r["test"], 99), r["test"])
    )
    headers = [
        ("Test", False),
        ("Based on", False),
        ("Portfolios", True),
        ("Skill at q < 0.05", True),
        ("Timing hurt at q < 0.05", True),
        ("Share consistent with no skill (π0)", True),
    ]
    body = []
    for r in rows:
        label, basis, _ = TESTS.get(r["test"], (r["test"], "", ""))
        body.append(
            f'<tr data-test="{esc(r["test"])}">'
            f"<td>{esc(label)}</td><td>{esc(basis)}</td>"
            + td_num(r["n_portfolios"], fmt_int(r["n_portfolios"]))
            + td_num(r["n_skill_q05"], fmt_int(r["n_skill_q05"]))
            + td_num(r["n_adverse_q05"], fmt_int(r["n_adverse_q05"]))
            + td_num(r["pi0"], fmt_pct(r["pi0"], digits=0, signed=False))
            + "</tr>"
        )
    return (
        '<table data-table="roster">'
        + th_row(headers)
        + "<tbody>"
        + "".join(body)
        + "</tbody></table>"
    )


def _issues_table(issues: pl.DataFrame, limit: int, *, with_portfolio: bool) -> str:
    headers = ([("Portfolio", False)] if with_portfolio else []) + [
        ("Severity", False),
        ("Code", False),
        ("Period", False),
        ("Asset class", False),
        ("Message", False),
    ]
    body = []
    for r in issues.head(limit).iter_rows(named=True):
        cells = [td_text(r[PID], cls="pid")] if with_portfolio else []
        cells += [
            f'<td><span class="sev sev-{esc(r["severity"])}">{esc(r["severity"])}</span></td>',
            td_text(r["code"], cls="code"),
            td_text(fmt_date(r["period_end"])),
            td_text(r["asset_class"]),
            td_text(r["message"], cls="message"),
        ]
        body.append(f"<tr>{''.join(cells)}</tr>")
    more = issues.height - limit
    tail = (
        f'<p class="note">… and {more:,} more rows in the data_issues table.</p>'
        if more > 0
        else ""
    )
    return (
        '<div class="scroll"><table class="issues" data-table="data_issues">'
        + th_row(headers)
        + "<tbody>"
        + "".join(body)
        + "</tbody></table></div>"
        + tail
    )


def _issue_counts_table(issues: pl.DataFrame) -> str:
    counts = (
        issues.group_by("severity", "code")
        .agg(pl.len().alias("rows"), pl.col(PID).n_unique().alias("portfolios"))
        .sort("severity", "code")
    )
    body = "".join(
        f'<tr><td><span class="sev sev-{esc(r["severity"])}">{esc(r["severity"])}</span></td>'
        f'<td class="code">{esc(r["code"])}</td>'
        + td_num(r["rows"], fmt_int(r["rows"]))
        + td_num(r["portfolios"], fmt_int(r["portfolios"]))
        + "</tr>"
        for r in counts.iter_rows(named=True)
    )
    return (
        '<table class="compact">'
        + th_row([("Severity", False), ("Code", False), ("Rows", True), ("Portfolios", True)])
        + f"<tbody>{body}</tbody></table>"
    )


@dataclass(frozen=True)
class PortfolioFacts:
    """What the plain sentences say about one portfolio, read off the stored tables."""

    held_at_policy: bool | None
    held_at_average: bool | None
    more_periods: int | None


def portfolio_facts(data: ReportData) -> dict[str, PortfolioFacts]:
    """Per portfolio: weights equal to the policy (or to their average) in every period and
    class, within :data:`WEIGHT_EPS`; and the periods still needed for the reference timer
    (the power table's periods_needed less the decisions on record: the exposure
    regression's n_obs, else the number of periods)."""
    flags: dict[str, tuple[bool, bool]] = {}
    if data.effects is not None and data.effects.height:
        held = data.effects.group_by(PID).agg(
            ((pl.col("weight") - pl.col("policy_weight")).abs().max() < WEIGHT_EPS).alias("p"),
            ((pl.col("weight") - pl.col("static_weight")).abs().max() < WEIGHT_EPS).alias("a"),
        )
        flags = {r[PID]: (r["p"], r["a"]) for r in held.iter_rows(named=True)}
    needed: dict[str, Any] = {}
    if data.power is not None:
        needed = dict(zip(data.power[PID], data.power["periods_needed"], strict=True))
    decisions = dict(zip(data.summary[PID], data.summary["n_periods"], strict=True))
    if data.timing_tests is not None and "n_obs" in data.timing_tests.columns:
        exp = data.timing_tests.filter(
            (pl.col("test") == "exposure_regression") & pl.col("n_obs").is_not_null()
        )
        decisions.update(zip(exp[PID], exp["n_obs"], strict=True))
    return {
        pid: PortfolioFacts(
            held_at_policy=flags.get(pid, (None, None))[0],
            held_at_average=flags.get(pid, (None, None))[1],
            more_periods=_more_periods(needed.get(pid), decisions.get(pid)),
        )
        for pid in data.summary[PID].to_list()
    }


def brief_line(
    r: Mapping[str, Any], verdict: str | None, facts: PortfolioFacts, *, timing_run: bool
) -> str:
    """One line for the overview: active return, its largest part, the tilt, the verdict."""
    parts = [f"active {fmt_pct(r['active_return'])}"]
    found = [
        (abs(r[n]), EFFECT_LABEL[n], r[n])
        for n in ("static_allocation", "timing", "selection", "interaction")
        if _finite(r.get(n))
    ]
    if found:
        _, label, value = max(found, key=lambda p: (p[0], p[1]))
        parts.append(f"largest part {label} {fmt_pct(value)}")
    if facts.held_at_policy:
        parts.append("weights held at the policy mix")
    elif facts.held_at_average:
        parts.append("a structural tilt only (weights never moved around their average)")
    if not timing_run:
        parts.append("timing tests not run")
    else:
        label = VERDICTS.get(verdict or "", NOT_RUN)[0]
        more = (
            f", about {facts.more_periods} more periods needed"
            if verdict == "record_too_short" and facts.more_periods
            else ""
        )
        parts.append(f"timing: {label}{more}")
    return "; ".join(parts) + "."


def section_overview(
    data: ReportData, verdicts: Mapping[str, str | None], facts: Mapping[str, PortfolioFacts]
) -> str:
    summary = data.summary
    calendar = data.manifest.get("calendar") or {}
    first = calendar.get("first_period") or fmt_date(summary["first_period"].min())
    last = calendar.get("last_period") or fmt_date(summary["last_period"].max())
    frequency = calendar.get("frequency")
    skipped: list[str] = []
    if data.data_issues is not None:
        errs = data.data_issues.filter(pl.col("severity") == "error")
        ran = set(summary[PID].to_list())
        skipped = sorted(set(errs[PID].drop_nulls().to_list()) - ran)
    parts = ['<section id="overview"><h2>Roster overview</h2>']
    intro = (
        f"{summary.height:,} portfolio(s) evaluated against their policy mix on a calendar "
        f"from {first} to {last}"
        + (f" ({frequency} periods)" if frequency else "")
        + ". Every figure is linked over each portfolio's own record, so the effects add up "
        "to its active return."
    )
    parts.append(f"<p>{esc(intro)}</p>")
    if skipped:
        parts.append(
            '<p class="warn">'
            + esc(
                f"{len(skipped)} portfolio(s) were skipped because of errors in their inputs "
                f"(see the data issues below): "
                + ", ".join(skipped[:20])
                + (" …" if len(skipped) > 20 else "")
            )
            + "</p>"
        )
    if data.timing_tests is not None and "timing_evidence" in summary.columns:
        counts = summary.group_by("timing_evidence").len()
        found = {r["timing_evidence"]: r["len"] for r in counts.iter_rows(named=True)}
        chips = []
        for code, (label, cls) in VERDICTS.items():
            n = found.get(code, 0)
            chips.append(
                f'<span class="chip"><span class="verdict {cls}">{esc(label)}</span> '
                f'<b data-count="{code}">{n:,}</b></span>'
            )
        parts.append(f'<div class="chips">{"".join(chips)}</div>')
    caption = (
        "Each row is one portfolio: its linked effects stacked away from zero (gains to the "
        "right, losses to the left) and a black diamond at its active return, which the "
        "effects add up to. The dot before the name is the timing verdict."
        if summary.height <= ROSTER_BAR_MAX
        else f"One dot per portfolio ({summary.height:,}): the linked static allocation "
        "against the linked timing effect, coloured by the timing verdict. Above "
        f"{ROSTER_BAR_MAX} portfolios the per-row bars give way to this summary."
    )
    parts.append(figure(chart_roster(data, verdicts), caption))
    if summary.height <= ROSTER_BAR_MAX and data.timing_tests is not None:
        parts.append(
            swatch_legend(
                [(VERDICT_COLOURS[c], label) for c, (label, _) in VERDICTS.items()]
                + [(VERDICT_COLOURS[None], NOT_RUN[0])]
            )
        )
    if data.detail_ids and len(data.detail_ids) <= ROSTER_BAR_MAX:
        by_id = {r[PID]: r for r in summary.iter_rows(named=True)}
        timing_run = data.timing_tests is not None
        items = "".join(
            f'<li data-portfolio="{esc(pid)}"><a class="pid" href="#{data.anchors[pid]}">'
            f"{esc(pid)}</a>: "
            + esc(brief_line(by_id[pid], verdicts.get(pid), facts[pid], timing_run=timing_run))
            + "</li>"
            for pid in data.detail_ids
        )
        parts.append(f'<h3>In brief</h3><ul class="brief">{items}</ul>')
    parts.append("<h3>Every portfolio</h3>")
    parts.append(
        '<p class="note">Cumulative linked figures over each record; "a year" is annualised '
        "(empty for records shorter than a year). q, skill and q, adverse: the lowest q-values "
        "of the primary holdings-based tests (exposure regression, direction calls, "
        "random-timer test).</p>"
    )
    parts.append(_summary_table(data, verdicts))
    parts.append("<h3>Timing evidence across the roster</h3>")
    if data.timing_tests is None:
        parts.append(f'<p class="absent">{esc(timing_absence(data.manifest))}</p>')
    elif data.roster is not None and data.roster.height:
        parts.append(
            '<p class="note">q-values are Benjamini–Hochberg adjusted across the roster, per '
            "test; π0 is Storey's estimate (λ = 0.5) of the share of portfolios with no "
            "skill.</p>"
        )
        parts.append(_roster_tests_table(data.roster))
    else:
        parts.append('<p class="absent">The roster table is not in this output.</p>')
    parts.append("<h3>Data issues</h3>")
    if data.data_issues is None:
        parts.append('<p class="absent">The data_issues table is not in this output.</p>')
    elif data.data_issues.height == 0:
        parts.append("<p>No data issues: every portfolio's inputs passed every check.</p>")
    else:
        parts.append(_issue_counts_table(data.data_issues))
        parts.append(_issues_table(data.data_issues, ISSUES_SHOWN_ROSTER, with_portfolio=True))
    if data.money:
        parts.append(section_money(data))
    notes = [str(n) for n in data.manifest.get("notes") or []]
    if notes:
        parts.append("<h3>Notes of this run</h3><ul>")
        parts.extend(f"<li>{esc(n)}</li>" for n in notes)
        parts.append("</ul>")
    if len(data.detail_ids) < summary.height:
        parts.append(
            '<p class="note">'
            + esc(
                f"Detailed pages follow for {len(data.detail_ids):,} of {summary.height:,} "
                "portfolios (the first by id, or those asked for); every portfolio's figures "
                "are in the tables of the output folder."
            )
            + "</p>"
        )
    parts.append("</section>")
    return "".join(parts)


def _plan_sentence(total: pl.DataFrame) -> str:
    """Plain words for the one-row plan_total table: what each effect added or cost."""
    if total.height != 1:
        return ""
    row = total.row(0, named=True)

    def said(name: str, label: str) -> str | None:
        amount = row.get(f"{name}_money")
        if not _finite(amount):
            return None
        verb = "added" if float(amount) >= 0 else "cost"
        return (
            f'{label} {verb} <span data-money="{esc(name)}" data-value="{esc(exact(amount))}">'
            f"{esc(fmt_whole_amount(abs(float(amount))))}</span>"
        )

    pieces = [
        said("timing", "timing"),
        said("static_allocation", "static allocation"),
        said("selection", "selection"),
        said("interaction", "interaction"),
        said("residual", "the residual (fees, trading, data differences)"),
    ]
    active = row.get("active_money")
    return (
        f"<p>Across the plan, from the period ending {esc(fmt_date(row['first_period']))} to "
        f"{esc(fmt_date(row['last_period']))} ({esc(row['n_periods'])} periods; "
        f"{esc(fmt_whole_amount(row['plan_value_first']))} at the start): "
        + "; ".join(p for p in pieces if p)
        + f". In all the managers {'added' if _finite(active) and float(active) >= 0 else 'cost'} "
        f"{esc(fmt_whole_amount(abs(float(active))) if _finite(active) else DASH)} against the "
        f"policy mixes; as returns, the plan's active return was "
        f"{esc(fmt_pct(row['active_return']))}, of which timing "
        f"{esc(fmt_pct(row['timing']))} (linked).</p>"
    )


def section_money(data: ReportData) -> str:
    parts = ['<h3 id="money">What it came to in money</h3>']
    parts.append(
        "<p class=\"note\">Each period's effect times the portfolio's value at the start of "
        "the period, summed over the record (value added); the plan rows weight the roster "
        "by value period by period. The per-period plan figures are in plan.parquet.</p>"
    )
    tables = dict(data.money)
    total = tables.get("plan_total")
    if total is not None and total.height == 1:
        parts.append(_plan_sentence(total))
        parts.append("<h4>The plan, weighted by value</h4>")
        parts.append(_money_figures_table("plan_total", total.row(0, named=True), returns=True))
    money = tables.get("money")
    if money is not None and money.height:
        parts.append("<h4>Each portfolio, in money</h4>")
        parts.append(_money_roster_table(money))
    return "".join(parts)


#: The money figures shown, in order: (column stem, label).
MONEY_FIGURE_LABELS = (
    ("active", "Active (portfolio − policy)"),
    ("static_allocation", "Static allocation"),
    ("timing", "Timing"),
    ("selection", "Selection"),
    ("interaction", "Interaction"),
    ("residual", "Residual"),
)


def fmt_whole_amount(value: object) -> str:
    """A money amount rounded to whole units, with thousands separators."""
    if not _finite(value):
        return DASH
    return f"{float(value):,.0f}".replace("-", MINUS)


def _money_figures_table(name: str, row: Mapping[str, Any], *, returns: bool) -> str:
    """One row of money figures set out vertically: figure, (linked return), amount."""
    headers = [("figure", False)] + ([("as a return", True)] if returns else [])
    headers.append(("in money", True))
    body = []
    for stem, label in MONEY_FIGURE_LABELS:
        amount = row.get(f"{stem}_money")
        if amount is None and stem == "interaction":
            continue
        cells = [td_text(label)]
        if returns:
            value = row.get("active_return" if stem == "active" else stem)
            cells.append(td_num(value, fmt_pct(value)))
        cells.append(td_num(amount, fmt_whole_amount(amount), extra=f' data-col="{stem}_money"'))
        body.append(f'<tr data-figure="{esc(stem)}">{"".join(cells)}</tr>')
    return (
        f'<div class="scroll"><table data-table="{esc(name)}">'
        + th_row(headers)
        + "<tbody>"
        + "".join(body)
        + "</tbody></table></div>"
    )


def _money_roster_table(money: pl.DataFrame) -> str:
    """Per portfolio: value at the start and each effect in money (whole units)."""
    shown = [
        (stem, label)
        for stem, label in MONEY_FIGURE_LABELS
        if money[f"{stem}_money"].is_not_null().any()
    ]
    headers = [("portfolio", False), ("periods", True), ("value at start", True)]
    headers += [(label.split(" (")[0].lower(), True) for _, label in shown]
    body = []
    for r in money.sort(PID).iter_rows(named=True):
        cells = [td_text(r[PID]), td_num(r["n_periods_valued"], fmt_int(r["n_periods_valued"]))]
        cells.append(td_num(r["value_first"], fmt_whole_amount(r["value_first"])))
        for stem, _ in shown:
            v = r[f"{stem}_money"]
            cells.append(td_num(v, fmt_whole_amount(v), extra=f' data-col="{stem}_money"'))
        body.append(f'<tr data-portfolio="{esc(r[PID])}">{"".join(cells)}</tr>')
    return (
        '<div class="scroll"><table data-table="money">'
        + th_row(headers)
        + "<tbody>"
        + "".join(body)
        + "</tbody></table></div>"
    )


def _kpis(r: Mapping[str, Any], effects: list[tuple[str, str, str, str]]) -> str:
    items = [
        ("portfolio_return", "Portfolio return", svg.INK),
        ("policy_return", "Policy return", svg.MUTED),
        ("active_return", "Active return", svg.BLACK),
    ] + [(name, label.capitalize(), colour) for name, label, colour, _ in effects]
    cards = []
    for name, label, colour in items:
        value, ann = r.get(name), r.get(f"{name}_ann")
        cards.append(
            f'<div class="kpi" style="border-left-color:{colour}" data-kpi="{name}">'
            f'<div class="kpi-label">{esc(label)}</div>'
            f'<div class="kpi-value" data-value="{esc(exact(value) if _finite(value) else "")}">'
            f"{esc(fmt_pct(value))}</div>"
            f'<div class="kpi-ann">{esc(fmt_pct(ann) + " a year" if _finite(ann) else "")}</div>'
            "</div>"
        )
    return f'<div class="kpis">{"".join(cards)}</div>'


def lede(
    r: Mapping[str, Any],
    verdict: str | None,
    *,
    held_at_policy: bool | None,
    held_at_average: bool | None,
    more_periods: int | None,
    timing_run: bool,
) -> str:
    """A few plain sentences: the active return, its largest part, the timing verdict."""
    sentences = [
        f"Active return {fmt_pct(r['active_return'])} against the policy mix over "
        f"{r['n_periods']} periods ({r['first_period']} to {r['last_period']})."
    ]
    parts = [
        (abs(r[n]), EFFECT_LABEL[n], r[n])
        for n in ("static_allocation", "timing", "selection", "interaction")
        if _finite(r.get(n))
    ]
    if parts:
        _, label, value = max(parts, key=lambda p: (p[0], p[1]))
        sentences.append(f"The largest part is {label}, {fmt_pct(value)}.")
    if held_at_policy:
        sentences.append(
            "The weights stayed at the policy mix: no allocation effect, static or timing."
        )
    elif held_at_average:
        sentences.append(
            "The weights never moved around their average: a structural tilt only, with no "
            "timing effect."
        )
    if _finite(r.get("residual")) and r.get("return_source") == "reported":
        sentences.append(
            f"The residual, {fmt_pct(r['residual'])}, is the reported return less the one "
            "computed from weights and returns (fees, cash flows, trading within periods)."
        )
    if r.get("return_source") == "index":
        sentences.append(
            "Selection is unknown: no segment returns were given (never counted as zero)."
        )
    if not timing_run:
        sentences.append("The timing tests were not run.")
    elif verdict == "skill":
        sentences.append("The timing tests show evidence of skill (q < 0.05).")
    elif verdict == "adverse":
        sentences.append("The timing tests show that timing hurt (q < 0.05, adverse side).")
    elif verdict == "record_too_short":
        tail = f": about {more_periods} more periods needed" if more_periods else ""
        sentences.append(f"The record is too short to tell{tail}.")
    elif verdict == "no_evidence":
        sentences.append("The timing tests are consistent with no skill.")
    if r.get("returns_holdings_disagree") is True:
        sentences.append(
            "Returns-based and holdings-based evidence disagree: read the returns-based "
            "tests with care (option-like holdings or trading between holdings dates can "
            "create or hide timing in returns)."
        )
    return " ".join(sentences)


def empty_test_reasons(issues: pl.DataFrame | None, pid: str) -> dict[str, str]:
    """Why a test row of a portfolio is empty, from its data_issues rows about tests.

    The timing layer writes messages that start with the test code ("exposure_regression
    needs at least 24 decisions…", "merton_accuracy: the exposure never departs…"); the
    text after the code is the reason.
    """
    if issues is None:
        return {}
    rows = issues.filter((pl.col(PID) == pid) & pl.col("code").str.starts_with("test_"))
    reasons: dict[str, str] = {}
    for message in rows["message"].to_list():
        for test in TESTS:
            if message.startswith(test) and test not in reasons:
                reasons[test] = message[len(test) :].lstrip(": ").strip()
    return reasons


def _tests_table(
    tests: pl.DataFrame, verdict: str | None, periods_needed, reasons: Mapping[str, str]
) -> str:
    rows = sorted(
        tests.iter_rows(named=True), key=lambda r: (TEST_ORDER.get(r["test"], 99), r["test"])
    )
    headers = [
        ("Test", False),
        ("Based on", False),
        ("Estimate", True),
        ("Std. error", True),
        ("p, skill", True),
        ("q, skill", True),
        ("p, adverse", True),
        ("q, adverse", True),
        ("n", True),
        ("p-value from", False),
        ("Reading", False),
    ]
    body = []
    for r in rows:
        label, basis, unit = TESTS.get(r["test"], (r["test"], "", "num"))
        fmt = fmt_pct if unit == "pct" else (lambda v: fmt_num(v, digits=4))
        primary = r["test"] in PRIMARY_TESTS
        reading = plain_reading(
            p_value=r.get("p_value"),
            q_value=r.get("q_value"),
            q_value_adverse=r.get("q_value_adverse"),
            verdict=verdict,
            n_obs=r.get("n_obs"),
            periods_needed=periods_needed,
            reason=reasons.get(r["test"]),
        )
        cls = (
            "r-skill"
            if reading.startswith("evidence")
            else "r-adverse"
            if reading.startswith("timing hurt")
            else "r-short"
            if reading.startswith("too short")
            else ""
        )
        body.append(
            f'<tr data-test="{esc(r["test"])}">'
            f"<td>{esc(label)}{' <span class=primary>primary</span>' if primary else ''}</td>"
            f"<td>{esc(basis)}</td>"
            + td_num(r.get("estimate"), fmt(r.get("estimate")))
            + td_num(r.get("std_error"), fmt(r.get("std_error")))
            + td_num(r.get("p_value"), fmt_p(r.get("p_value")))
            + td_num(r.get("q_value"), fmt_p(r.get("q_value")))
            + td_num(r.get("p_value_adverse"), fmt_p(r.get("p_value_adverse")))
            + td_num(r.get("q_value_adverse"), fmt_p(r.get("q_value_adverse")))
            + td_num(r.get("n_obs"), fmt_int(r.get("n_obs")))
            + td_text(_breakable(r.get("p_method")), cls="code")
            + f'<td class="reading {cls}">{esc(reading)}</td></tr>'
        )
    return (
        '<div class="scroll"><table class="tests" data-table="timing_tests">'
        + th_row(headers)
        + "<tbody>"
        + "".join(body)
        + "</tbody></table></div>"
    )


def _breakable(code: object) -> object:
    """A snake_case code that may wrap after its underscores (zero-width spaces)."""
    return code.replace("_", "_\u200b") if isinstance(code, str) else code


def _power_text(row: Mapping[str, Any] | None, manifest: Mapping[str, Any]) -> str:
    if row is None:
        return ""
    hit = (manifest.get("options") or {}).get("reference_hit_rate")
    reference = (
        f"a manager right {fmt_pct(hit, digits=0, signed=False)} of the time"
        if _finite(hit)
        else "the reference timer"
    )
    parts = []
    if _finite(row.get("periods_needed")):
        parts.append(
            f"To detect {reference} with 80 % power at the 5 % level takes about "
            f"{math.ceil(row['periods_needed']):,} periods of decisions."
        )
    small = [
        (
            row.get("detectable_hit_rate"),
            "a hit rate of {}",
            lambda v: fmt_pct(v, digits=1, signed=False),
        ),
        (row.get("detectable_correlation"), "a correlation of {}", lambda v: fmt_num(v, digits=2)),
        (
            row.get("detectable_timing_return_ann"),
            "a timing return of {} a year",
            lambda v: fmt_pct(v, digits=2, signed=False),
        ),
    ]
    found = [text.format(f(v)) for v, text, f in small if _finite(v)]
    if found:
        parts.append(
            "With the record at hand, the smallest skill detectable is " + ", or ".join(found) + "."
        )
    return f'<p class="power" data-table="power">{esc(" ".join(parts))}</p>' if parts else ""


def _windows_tables(windows: pl.DataFrame, effects) -> str:
    trailing = windows.filter(pl.col("window").str.ends_with("y"))
    years = windows.filter(~pl.col("window").str.ends_with("y")).sort("window")
    out = []
    if trailing.height:
        trailing = trailing.with_columns(
            pl.col("window").str.strip_suffix("y").cast(pl.Int64, strict=False).alias("_n")
        ).sort("_n")
        headers = [
            ("Window", False),
            ("Periods", True),
            ("Portfolio", True),
            ("Policy", True),
            ("Active", True),
        ]
        headers += [(label.capitalize(), True) for _, label, _, _ in effects]
        headers += [("Tracking error", True), ("Info. ratio", True)]
        body = []
        for r in trailing.iter_rows(named=True):
            cells = [
                td_text(f"last {r['window'][:-1]} year(s)"),
                td_num(r["n_periods"], fmt_int(r["n_periods"])),
            ]
            for col in (
                "portfolio_return_ann",
                "policy_return_ann",
                "active_return_ann",
                *[f"{n}_ann" for n, *_ in effects],
            ):
                cells.append(td_num(r.get(col), fmt_pct(r.get(col))))
            cells.append(
                td_num(r.get("tracking_error"), fmt_pct(r.get("tracking_error"), signed=False))
            )
            cells.append(
                td_num(r.get("information_ratio"), fmt_num(r.get("information_ratio"), digits=2))
            )
            body.append(f'<tr data-window="{esc(r["window"])}">{"".join(cells)}</tr>')
        out.append(
            "<h4>Trailing windows (annualised)</h4>"
            '<div class="scroll"><table data-table="summary_windows">'
            + th_row(headers)
            + "<tbody>"
            + "".join(body)
            + "</tbody></table></div>"
        )
    if years.height:
        headers = [
            ("Year", False),
            ("Periods", True),
            ("Portfolio", True),
            ("Policy", True),
            ("Active", True),
        ]
        headers += [(label.capitalize(), True) for _, label, _, _ in effects]
        body = []
        for r in years.iter_rows(named=True):
            cells = [td_text(r["window"]), td_num(r["n_periods"], fmt_int(r["n_periods"]))]
            for col in (
                "portfolio_return",
                "policy_return",
                "active_return",
                *[n for n, *_ in effects],
            ):
                cells.append(td_num(r.get(col), fmt_pct(r.get(col))))
            body.append(f'<tr data-window="{esc(r["window"])}">{"".join(cells)}</tr>')
        out.append(
            "<h4>Calendar years (cumulative within the year; a part year where the record "
            "starts or ends)</h4>"
            '<div class="scroll"><table data-table="summary_windows">'
            + th_row(headers)
            + "<tbody>"
            + "".join(body)
            + "</tbody></table></div>"
        )
    return "".join(out)


def _class_sums(effects: pl.DataFrame, names: Sequence[str]) -> pl.DataFrame:
    """Per class: the stored per-period effects summed over the record (as the
    ``class_contributions`` view does) and the mean weights; sorted by mean policy weight."""
    return (
        effects.group_by("asset_class")
        .agg(
            pl.col("weight").mean().alias("mean_weight"),
            pl.col("static_weight").mean().alias("mean_static_weight"),
            pl.col("policy_weight").mean().alias("mean_policy_weight"),
            (pl.col("weight") != 0).any().alias("held"),
            ((pl.col("weight") - pl.col("policy_weight")).abs().max() < WEIGHT_EPS).alias(
                "at_policy"
            ),
            (pl.col("policy_weight") != 0).any().alias("in_policy"),
            *[pl.when(pl.col(n).is_not_null().any()).then(pl.col(n).sum()).alias(n) for n in names],
            pl.col("selection").is_null().sum().alias("n_selection_missing"),
        )
        .sort(["mean_policy_weight", "asset_class"], descending=[True, False])
    )


def section_portfolio(
    data: ReportData, r: Mapping[str, Any], verdict: str | None, facts: PortfolioFacts
) -> str:
    pid = r[PID]
    anchor = data.anchors[pid]
    effects_summary = _present_effects(pl.DataFrame([r]))
    series = data.series.filter(pl.col(PID) == pid) if data.series is not None else None
    eff = data.effects.filter(pl.col(PID) == pid) if data.effects is not None else None
    tests = data.timing_tests.filter(pl.col(PID) == pid) if data.timing_tests is not None else None
    power_row = None
    if data.power is not None:
        found = data.power.filter(pl.col(PID) == pid)
        power_row = found.row(0, named=True) if found.height else None
    periods_needed = power_row.get("periods_needed") if power_row else None
    parts = [
        f'<section class="portfolio" id="{anchor}" data-portfolio="{esc(pid)}">',
        f'<h2><span class="pid">{esc(pid)}</span> '
        f"{verdict_badge(verdict if tests is not None else None)}</h2>",
        '<p class="facts">'
        + esc(
            f"{r['n_periods']} periods, {r['first_period']} to {r['last_period']} · return "
            f"linked: {r['return_source']}"
            + (f" · linking: {r['linking']}" if r.get("linking") else "")
            + (
                f" · {r['n_drifted_periods']} period(s) with drifted weights"
                if r.get("n_drifted_periods")
                else ""
            )
        )
        + "</p>",
        '<p class="lede">'
        + esc(
            lede(
                r,
                verdict,
                held_at_policy=facts.held_at_policy,
                held_at_average=facts.held_at_average,
                more_periods=facts.more_periods,
                timing_run=tests is not None,
            )
        )
        + "</p>",
        _kpis(r, effects_summary),
    ]
    # Cumulative effects
    parts.append("<h3>Cumulative linked effects</h3>")
    if series is not None and series.height:
        parts.append(
            figure(
                chart_cumulative(pid, series),
                "Each line is one effect linked from the start of the record to that period; "
                "the black line is their total, the active return (one dot per period). "
                "Lines that end above zero added to the return.",
            )
        )
    else:
        parts.append('<p class="absent">No per-period series for this portfolio.</p>')
    # Classes and weights
    parts.append("<h3>Where it came from: asset classes</h3>")
    if eff is not None and eff.height:
        class_effects = _present_effects(eff)
        class_effects = [e for e in class_effects if e[0] != "residual"]
        sums = _class_sums(eff, [n for n, *_ in class_effects])
        shown = sums.filter(pl.col("held") | pl.col("in_policy"))
        parts.append(
            figure(
                chart_classes(pid, shown, class_effects),
                "Per asset class, each effect summed over the periods (simple sums of the "
                "per-period effects, not linked: the linked totals are in the figures above; "
                "the residual belongs to no class).",
            )
        )
        parts.append(_class_table(shown, class_effects))
        parts.append("<h3>Weights against the policy mix</h3>")
        moved = shown.filter(~pl.col("at_policy"))["asset_class"].to_list()
        still = shown.filter(pl.col("at_policy"))["asset_class"].to_list()
        still_note = (
            " Held at the policy weight in every period (no strip drawn): " + ", ".join(still) + "."
            if still
            else ""
        )
        if moved:
            chart, block = chart_weights(pid, eff, moved)
            note = (
                f" Each bar is the mean of {block} consecutive periods, to keep the page small."
                if block > 1
                else " One bar per period."
            )
            parts.append(
                figure(
                    chart,
                    "Per class: each bar runs from the policy weight (dashed line) to the "
                    "weight held (blue above policy, vermillion below); the dotted line is "
                    "the static weight, the average the timing effect is measured from. "
                    "Paler bars are periods whose weights drifted between holdings dates."
                    + note
                    + still_note,
                )
            )
        else:
            parts.append(
                '<p class="absent">The weights equal the policy mix in every period and '
                "class: nothing to draw.</p>"
            )
    else:
        parts.append('<p class="absent">The effects table is not in this output.</p>')
    # Timing pictures
    parts.append("<h3>Did the weight shifts anticipate the market?</h3>")
    pictures = []
    if series is not None and {"exposure", "market_excess_return"} <= set(series.columns):
        fit = _test_row(tests, "exposure_regression")
        pictures.append(
            figure(
                chart_exposure(pid, anchor, series, fit),
                "Each dot is one period: the market exposure held (set at the start) against "
                "the market excess return that followed. Hollow dots: weights drifted, not a "
                "decision. Vermillion line: the exposure regression's fit; rising means "
                "exposure was higher before better months. Dotted: static exposure."
                + (
                    " The regression pairs each decision with the market excess return up to "
                    "the next holdings date, so its line need not run through these "
                    "one-period dots."
                    if r.get("n_drifted_periods")
                    else ""
                ),
            )
        )
    if series is not None and {
        "riskless_return",
        "market_excess_return",
        "portfolio_return",
    } <= set(series.columns):
        pictures.append(
            figure(
                chart_payoff(
                    pid,
                    anchor,
                    series,
                    _test_row(tests, "treynor_mazuy"),
                    _test_row(tests, "henriksson_merton"),
                ),
                "Each dot is one period's portfolio excess return against the market's. "
                "Dashed black: perfect timing, max(x, 0) — all market when it beats the "
                "riskless asset, none otherwise. Vermillion: Treynor–Mazuy fit; green dashed: "
                "Henriksson–Merton fit. A fit that bends upward like the frontier suggests "
                "timing.",
            )
        )
    if pictures:
        parts.append(f'<div class="pair">{"".join(pictures)}</div>')
        if len(pictures) == 2:
            parts.append(
                legend_html(
                    [
                        (svg.VERMILLION, "none", "Treynor–Mazuy fit / exposure regression"),
                        (svg.BLUISH_GREEN, "7 3", "Henriksson–Merton fit"),
                        (svg.BLACK, "4 3", "perfect timing, max(x, 0)"),
                    ]
                )
            )
    else:
        parts.append(
            '<p class="absent">The exposure and market excess return series are not in this '
            "output (they come with the timing tests).</p>"
        )
    parts.append("<h3>Timing tests</h3>")
    if tests is None:
        parts.append(f'<p class="absent">{esc(timing_absence(data.manifest))}</p>')
    elif tests.height == 0:
        parts.append('<p class="absent">No timing test rows for this portfolio.</p>')
    else:
        parts.append(
            '<p class="note">p-values are one-sided: "skill" tests for timing that helped, '
            '"adverse" for timing that hurt; q-values adjust them for the number of portfolios '
            "(Benjamini–Hochberg). The verdict rests on the primary tests.</p>"
        )
        reasons = empty_test_reasons(data.data_issues, pid)
        parts.append(_tests_table(tests, verdict, periods_needed, reasons))
    parts.append(_power_text(power_row, data.manifest))
    # Windows
    if data.summary_windows is not None:
        windows = data.summary_windows.filter(pl.col(PID) == pid)
        if windows.height:
            parts.append("<h3>Over time windows</h3>")
            parts.append(_windows_tables(windows, effects_summary))
    money = dict(data.money).get("money")
    mine = None if money is None else money.filter(pl.col(PID) == pid)
    if mine is not None and mine.height == 1:
        r = mine.row(0, named=True)
        parts.append("<h3>In money</h3>")
        parts.append(
            f"<p>Valued over {esc(r['n_periods_valued'])} periods "
            f"({esc(fmt_date(r['first_period']))} to {esc(fmt_date(r['last_period']))}), "
            f"{esc(fmt_whole_amount(r['value_first']))} at the start: each period's effect "
            "times the value at its start, summed.</p>"
        )
        parts.append(_money_figures_table("money", r, returns=False))
    if data.data_issues is not None:
        mine = data.data_issues.filter(pl.col(PID) == pid)
        if mine.height:
            parts.append("<h3>Data issues</h3>")
            parts.append(_issues_table(mine, ISSUES_SHOWN_PORTFOLIO, with_portfolio=False))
    parts.append('<p class="back"><a href="#overview">Back to the roster overview</a></p>')
    parts.append("</section>")
    return "".join(parts)


def _test_row(tests: pl.DataFrame | None, name: str) -> dict[str, Any] | None:
    if tests is None:
        return None
    found = tests.filter(pl.col("test") == name)
    return found.row(0, named=True) if found.height else None


def _class_table(shown: pl.DataFrame, effects) -> str:
    headers = [
        ("Asset class", False),
        ("Mean weight", True),
        ("Static weight", True),
        ("Policy weight", True),
    ]
    headers += [(f"{label.capitalize()} (sum)", True) for _, label, _, _ in effects]
    body = []
    for r in shown.iter_rows(named=True):
        cells = [td_text(r["asset_class"])]
        for col in ("mean_weight", "mean_static_weight", "mean_policy_weight"):
            cells.append(td_num(r[col], fmt_pct(r[col], digits=1, signed=False)))
        cells += [td_num(r[n], fmt_pct(r[n])) for n, *_ in effects]
        body.append(f'<tr data-class="{esc(r["asset_class"])}">{"".join(cells)}</tr>')
    missing = int(shown["n_selection_missing"].sum())
    note = (
        f'<p class="note">Selection is unknown for {missing} class-period(s) '
        "(no segment return); the sums leave them out.</p>"
        if missing and any(n == "selection" for n, *_ in effects)
        else ""
    )
    return (
        '<div class="scroll"><table class="compact" data-table="classes">'
        + th_row(headers)
        + "<tbody>"
        + "".join(body)
        + "</tbody></table></div>"
        + note
    )


def section_cautions() -> str:
    items = "".join(f"<li>{esc(c)}</li>" for c in CAUTIONS)
    return f'<section id="cautions"><h2>Cautions</h2><ul class="cautions">{items}</ul></section>'


# The published sources of every method on the page (who, what, what for). Citations as in
# README's methods section and ../shared/METHODS.md; from memory (not checked against the
# original in this task): the full titles of Newey & West (1987, 1994) and of Benjamini &
# Hochberg (1995), the pages of Politis & White (2004), the issue and pages of Storey (2002),
# Jensen (1968), and the title of Okabe & Ito (2008).
SOURCES = (
    (
        "Brinson, G.P., Fachler, N. (1985)",
        "Measuring non-U.S. equity portfolio performance. "
        "Journal of Portfolio Management 11(3), 73–76.",
        "the default decomposition form",
    ),
    (
        "Brinson, G.P., Hood, L.R., Beebower, G.L. (1986)",
        "Determinants of portfolio performance. Financial Analysts Journal 42(4), 39–44.",
        "the form with a separate interaction",
    ),
    (
        "Hsu, J.C., Kalesnik, V., Myers, B.W. (2010)",
        "Performance attribution: measuring "
        "dynamic allocation skill. Financial Analysts Journal 66(6), 17–26.",
        "static and dynamic (timing) allocation",
    ),
    (
        "Lo, A.W. (2008)",
        "Where do alphas come from? A measure of the value of active "
        "investment management. Journal of Investment Management 6(2), 1–29.",
        "average weights against weight–return covariance",
    ),
    (
        "Cariño, D. (1999)",
        "Combining attribution effects over time. Journal of Performance Measurement 3(4).",
        "logarithmic linking (default)",
    ),
    (
        "Menchero, J.G. (2000)",
        "An optimized approach to linking attribution effects over "
        "time. Journal of Performance Measurement, Fall 2000.",
        "optimized linking",
    ),
    (
        "GRAP (1997); Bonafede, J.K., Foresti, S.J., Matheos, P. (2002)",
        "Synthèse des modèles "
        "d'attribution de performance; A multi-period linking algorithm that has stood the test "
        "of time. Journal of Performance Measurement, Fall 2002.",
        "GRAP linking",
    ),
    (
        "Frongello, A.S.B. (2002)",
        "Linking single period attribution results. Journal of Performance Measurement 6(3).",
        "recursive linking",
    ),
    (
        "Jiang, G.J., Yao, T., Yu, T. (2007)",
        "Do mutual funds time the market? Evidence from "
        "portfolio holdings. Journal of Financial Economics 86(3), 724–758.",
        "holdings-based exposure regressions",
    ),
    (
        "Grinblatt, M., Titman, S. (1993)",
        "Performance measurement without benchmarks: an "
        "examination of mutual fund returns. Journal of Business 66(1), 47–68.",
        "the portfolio-change measure",
    ),
    (
        "Henriksson, R.D., Merton, R.C. (1981)",
        "On market timing and investment performance. "
        "II. Statistical procedures for evaluating forecasting skills. Journal of Business 54(4), "
        "513–533.",
        "direction calls P1 + P2 − 1, the exact test, the option-like regression",
    ),
    (
        "Merton, R.C. (1981)",
        "On market timing and investment performance. I. An equilibrium "
        "theory of value for market forecasts. Journal of Business 54(3), 363–406.",
        "perfect timing as an option, the frontier max(x, 0)",
    ),
    (
        "Pesaran, M.H., Timmermann, A. (1992)",
        "A simple nonparametric test of predictive "
        "performance. Journal of Business & Economic Statistics 10(4), 461–465.",
        "the directional-accuracy test",
    ),
    (
        "Treynor, J.L., Mazuy, K.K. (1966)",
        "Can mutual funds outguess the market? Harvard Business Review 44(4), 131–136.",
        "the quadratic payoff regression",
    ),
    (
        "Jensen, M.C. (1968)",
        "The performance of mutual funds in the period 1945–1964. Journal "
        "of Finance 23(2), 389–416.",
        "Jensen's alpha",
    ),
    (
        "Jagannathan, R., Korajczyk, R.A. (1986)",
        "Assessing the market timing performance of "
        "managed portfolios. Journal of Business 59(2), 217–235.",
        "artificial timing in returns-based tests",
    ),
    (
        "Newey, W.K., West, K.D. (1987, 1994)",
        "A simple, positive semi-definite, "
        "heteroskedasticity and autocorrelation consistent covariance matrix. Econometrica 55(3), "
        "703–708; Automatic lag selection in covariance matrix estimation. Review of Economic "
        "Studies 61(4), 631–653.",
        "regression standard errors",
    ),
    (
        "Politis, D.N., Romano, J.P. (1994)",
        "The stationary bootstrap. Journal of the American "
        "Statistical Association 89(428), 1303–1313.",
        "the random-timer resampling",
    ),
    (
        "Politis, D.N., White, H. (2004); Patton, A., Politis, D.N., White, H. (2009)",
        "Automatic block-length selection for the dependent bootstrap. Econometric Reviews 23(1), "
        "53–70; Correction. Econometric Reviews 28(4), 372–375.",
        "the mean block length",
    ),
    (
        "Benjamini, Y., Hochberg, Y. (1995)",
        "Controlling the false discovery rate: a practical "
        "and powerful approach to multiple testing. Journal of the Royal Statistical Society B "
        "57(1), 289–300.",
        "q-values across the roster",
    ),
    (
        "Storey, J.D. (2002)",
        "A direct approach to false discovery rates. Journal of the Royal "
        "Statistical Society B 64(3), 479–498.",
        "π0, the share consistent with no skill",
    ),
    (
        "Okabe, M., Ito, K. (2008)",
        "Color Universal Design (CUD): how to make figures and "
        "presentations that are friendly to colorblind people.",
        "the colours of this pack",
    ),
)


def section_methods(manifest: Mapping[str, Any]) -> str:
    """How the figures were made, the settings of the run and the published sources."""
    options = manifest.get("options") or {}
    methods = [
        "Per period and asset class, with w the weight held (set at the start of the period), "
        "q the policy weight, s the static weight, b the index return, r the segment return "
        "and B the policy return: static allocation (s − q)(b − B), timing (w − s)(b − B), "
        "selection w(r − b) (Brinson–Fachler form, interaction folded into selection; the "
        "Brinson–Hood–Beebower form uses raw returns and a separate interaction (w − q)(r − b)). "
        "The static weight is by default the portfolio's mean weight over its record "
        "(the static/dynamic split of Hsu, Kalesnik & Myers and of Lo).",
        "Effects are linked over periods so that they add up to the cumulative active return "
        "exactly; the residual is the reported return less the computed one, linked as its "
        "own effect. Annualised figures scale the linked effects onto the annualised active "
        "return.",
        "Timing tests pair the exposure decided at the start of each period with the market "
        "excess return realised over it. Holdings-based tests use decisions only (periods "
        "that start at a real holdings date); returns-based tests use every period. Every "
        "p-value is one-sided, for skill and separately for timing that hurt; q-values are "
        "Benjamini–Hochberg adjusted across the roster, per test.",
        "Verdict: 'evidence of skill' when a primary holdings-based test (exposure "
        "regression, direction calls, random-timer test) has q < 0.05 on the skill side and "
        "none on the adverse side; 'timing hurt' the other way round; 'too short a record to "
        "tell' when the record has fewer decisions than needed for even odds of detecting "
        "the reference timer; otherwise 'consistent with no skill'.",
        "Regression standard errors are Newey–West (Bartlett kernel, lag ⌊4(T/100)^(2/9)⌋) "
        "unless a calibrated method replaced them; the test table names the method behind "
        "each p-value.",
    ]
    out = ['<section id="methods"><h2>Methods and sources</h2>']
    out.extend(f"<p>{esc(m)}</p>" for m in methods)
    if options:
        items = "".join(
            f"<tr><td class=code>{esc(k)}</td><td>{esc(DASH if v is None else v)}</td></tr>"
            for k, v in sorted(options.items())
        )
        version = manifest.get("version")
        out.append(
            "<h3>Settings of this run</h3>"
            + (f"<p>{esc(f'tiltaudit {version}')}</p>" if version else "")
            + f'<table class="compact settings"><tbody>{items}</tbody></table>'
        )
    refs = "".join(
        f"<li><b>{esc(who)}</b> {esc(what)} <span class=use>({esc(use)})</span></li>"
        for who, what, use in SOURCES
    )
    out.append(f'<h3>Published sources</h3><ol class="sources">{refs}</ol></section>')
    return "".join(out)


STYLE = """
:root{--ink:#1f2328;--muted:#5b636e;--rule:#d9dde3;--paper:#f7f6f2;--panel:#fff}
*{box-sizing:border-box}
html{background:var(--paper)}
body{margin:0;color:var(--ink);font:14px/1.5 system-ui,-apple-system,"Segoe UI",Roboto,
"Helvetica Neue",Arial,sans-serif}
header.masthead{background:var(--panel);border-bottom:3px solid var(--ink);padding:22px 0 14px}
header.masthead .inner,main,nav.toc .inner{max-width:1100px;margin:0 auto;padding:0 28px}
header.masthead h1{margin:0;font-size:26px;letter-spacing:.2px}
header.masthead p{margin:4px 0 0;color:var(--muted)}
.caution-box{margin:16px 0 0;border-left:5px solid #E69F00;background:#fff8e8;padding:8px 14px;
font-size:13px}
nav.toc{background:var(--panel);border-bottom:1px solid var(--rule);padding:8px 0;font-size:13px}
nav.toc .inner{display:flex;flex-wrap:wrap;gap:2px 14px}
nav.toc a{color:var(--ink);white-space:nowrap}
h2{font-size:21px;margin:0 0 6px}
h3{font-size:16px;margin:22px 0 6px;padding-left:8px;border-left:3px solid var(--ink)}
h4{font-size:14px;margin:14px 0 4px}
section{margin:30px 0}
section.portfolio{background:var(--panel);border:1px solid var(--rule);border-top:4px solid
var(--ink);padding:16px 22px}
.pid{font-family:ui-monospace,SFMono-Regular,Menlo,Consolas,monospace;overflow-wrap:anywhere}
td.pid{white-space:nowrap}
.facts{color:var(--muted);margin:0 0 6px}
.lede{font-size:15px;max-width:75ch}
.verdict{display:inline-block;padding:0 10px;border-radius:999px;font-size:12px;font-weight:600;
border:1.5px solid;vertical-align:middle;line-height:20px;white-space:nowrap}
.v-skill{color:#005c43;border-color:#009E73;background:#e3f4ee}
.v-adverse{color:#8f3f00;border-color:#D55E00;background:#fbe9de}
.v-short{color:#6b4b00;border-color:#E69F00;background:#fdf1d8}
.v-none{color:#4a525c;border-color:#9aa1ab;background:#eef0f2}
.v-notrun{color:#5b636e;border-color:#b9bec5;background:#fff;border-style:dashed}
.chips{display:flex;flex-wrap:wrap;gap:14px;margin:8px 0 4px}
.chip b{font-size:16px;margin-left:4px}
.kpis{display:grid;grid-template-columns:repeat(auto-fit,minmax(118px,1fr));gap:8px;margin:10px 0}
.kpi{border:1px solid var(--rule);border-left:5px solid var(--ink);padding:5px 9px;background:#fff}
.kpi-label{font-size:11.5px;color:var(--muted)}
.kpi-value{font-size:18px;font-weight:650;font-variant-numeric:tabular-nums}
.kpi-ann{font-size:11.5px;color:var(--muted);min-height:1em}
figure{margin:12px 0;background:#fff;border:1px solid var(--rule);padding:10px 12px}
figcaption{font-size:12.5px;color:var(--muted);margin-top:4px}
.pair{display:grid;grid-template-columns:1fr 1fr;gap:12px}
.pair figure{margin:0}
@media (max-width:860px){.pair{grid-template-columns:1fr}}
svg.chart{display:block;width:100%;height:auto}
svg.chart text{fill:var(--ink);font-size:11px}
svg.chart .tick{fill:var(--muted);font-size:10px}
svg.chart .label{font-size:11px}
svg.chart .sublabel{fill:var(--muted);font-size:9.5px}
svg.chart .value{font-size:10.5px;font-weight:600}
svg.chart .axis-title{fill:var(--muted);font-size:10.5px}
svg.chart .wo{fill:#0072B2}svg.chart .wu{fill:#D55E00}svg.chart .wd{fill-opacity:.45}
svg.chart a .label{text-decoration:underline}
.legend{display:flex;flex-wrap:wrap;gap:4px 16px;font-size:12px;margin:2px 0 6px}
.key-item{display:inline-flex;align-items:center;gap:5px}
svg.key{width:22px;height:8px}
.swatch{display:inline-block;width:11px;height:11px;border-radius:2px}
table{border-collapse:collapse;width:100%;font-size:12.5px;font-variant-numeric:tabular-nums;
background:#fff}
table.compact{width:auto;min-width:50%}
th{text-align:left;font-weight:600;border-bottom:1.5px solid var(--ink);padding:4px 7px;
vertical-align:bottom}
td{border-bottom:1px solid var(--rule);padding:3px 7px;vertical-align:top}
th.num,td.num{text-align:right;white-space:nowrap}
td.code,.code{font-family:ui-monospace,SFMono-Regular,Menlo,Consolas,monospace;font-size:11.5px}
td.message{min-width:18em}
.scroll{overflow-x:auto}
.reading{font-weight:600;min-width:11em}
table.tests td:first-child{min-width:13em}
table.roster-table{font-size:12px}
td .verdict{font-size:11px;line-height:17px;padding:0 7px}
table.roster-table td,table.roster-table th{padding:3px 5px}
td.issues-cell{text-align:right;font-size:11.5px}
table.roster-table th{font-size:11.5px}
.r-skill{color:#005c43}.r-adverse{color:#8f3f00}.r-short{color:#6b4b00}
.primary{font-size:10.5px;border:1px solid var(--muted);border-radius:3px;padding:0 3px;
color:var(--muted);font-weight:400}
.sev{font-size:11px;padding:0 5px;border-radius:3px;border:1px solid}
.sev-error{color:#8f3f00;border-color:#D55E00}.sev-warning{color:#6b4b00;border-color:#E69F00}
.note{font-size:12.5px;color:var(--muted)}
.absent{border:1px dashed #b9bec5;padding:8px 12px;background:#fbfbfc}
.warn{border-left:4px solid #D55E00;padding:4px 10px;background:#fdf0e8}
.power{font-size:13px}
ul.cautions li{margin:4px 0}
ul.brief{padding-left:18px}ul.brief li{margin:3px 0}
ol.sources{font-size:12.5px}
.use{color:var(--muted)}
.back{font-size:12.5px}
@media print{
@page{size:A4;margin:13mm 11mm}
html,body{background:#fff}
body{font-size:10pt}
*{-webkit-print-color-adjust:exact;print-color-adjust:exact}
nav.toc,.back{display:none}
header.masthead{border-bottom-width:2px;padding-top:0}
header.masthead .inner,main{max-width:none;padding:0}
section.portfolio{break-before:page;border:none;padding:0}
figure,.kpis,tr,.pair{break-inside:avoid}
h3,h4{break-after:avoid}
.scroll{overflow:visible}
table,table.roster-table,table.roster-table th,td.issues-cell{font-size:7pt}
td .verdict{white-space:normal;border-radius:4px;font-size:7pt;line-height:1.2;padding:1px 4px}
td.num,th.num{white-space:normal}
th,td,table.roster-table td,table.roster-table th{padding:2px 3px}
td.code,.code{font-size:7pt}
table.tests td:first-child{min-width:9em}
.reading{min-width:8em}
svg.chart text{font-size:10px}
a{color:inherit;text-decoration:none}
}
"""

CSP = "default-src 'none'; style-src 'unsafe-inline'; img-src data:"


def build_report(
    tables: Mapping[str, pl.DataFrame | pl.LazyFrame],
    *,
    title: str | None = None,
    manifest: Mapping[str, Any] | None = None,
    portfolios: Sequence[str] | None = None,
    max_detail: int = DEFAULT_MAX_DETAIL,
) -> str:
    """The review pack as one self-contained HTML text, from a run's output tables.

    ``tables`` maps output-table names (DESIGN §5) to frames; ``summary`` is required, every
    other table is optional (a missing one is said on the page). ``effects`` may be a
    LazyFrame. ``manifest`` (the run's manifest.json as a mapping) supplies the calendar,
    the settings, the run's notes and why timing tests are missing; its timestamps and
    timings are never shown. Detailed portfolio pages are drawn for ``portfolios`` (ids) or
    else for the first ``max_detail`` ids in sorted order; the overview lists every one.

    Deterministic: the same tables (and manifest) give the same text, byte for byte.
    """
    data = collect_tables(tables, manifest=manifest, portfolios=portfolios, max_detail=max_detail)
    verdicts = _verdicts(data)
    heading = title or "tiltaudit review pack"
    summary = data.summary
    nav = ['<a href="#overview">Roster overview</a>']
    nav += [f'<a href="#{data.anchors[p]}">{esc(p)}</a>' for p in data.detail_ids]
    nav += ['<a href="#cautions">Cautions</a>', '<a href="#methods">Methods and sources</a>']
    subtitle = (
        f"{summary.height:,} portfolio(s) · static allocation, timing and selection against "
        "the policy mix, linked over each record"
        + ("" if data.timing_tests is not None else " · timing tests not run")
    )
    by_id = {r[PID]: r for r in summary.iter_rows(named=True)}
    facts = portfolio_facts(data)
    sections = [
        section_portfolio(data, by_id[pid], verdicts.get(pid), facts[pid])
        for pid in data.detail_ids
    ]
    return "".join(
        [
            "<!DOCTYPE html>\n",
            '<html lang="en"><head><meta charset="utf-8">',
            f'<meta http-equiv="Content-Security-Policy" content="{CSP}">',
            '<meta name="viewport" content="width=device-width, initial-scale=1">',
            f"<title>{esc(heading)}</title><style>{STYLE}</style></head><body>",
            '<header class="masthead"><div class="inner">',
            f"<h1>{esc(heading)}</h1><p>{esc(subtitle)}</p>",
            '<div class="caution-box"><b>Before reading:</b> statistical evidence is not proof '
            "of skill; short records have little power; past results do not guarantee future "
            'ones; this is not investment advice. See the <a href="#cautions">cautions</a>.'
            "</div></div></header>",
            f'<nav class="toc"><div class="inner">{"".join(nav)}</div></nav>',
            "<main>",
            section_overview(data, verdicts, facts),
            *sections,
            section_cautions(),
            section_methods(data.manifest),
            "</main></body></html>\n",
        ]
    )
