"""Whole-input problems: exit code 2, one line on stderr, nothing written (DESIGN §2).

Each case damages one shared thing (a file, a column, a table every portfolio uses, an
option, the config) and the run must stop before writing: the output folder stays absent,
or, when it held earlier results, unchanged byte for byte.
"""

from __future__ import annotations

import datetime as dt
import shutil
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import polars as pl
import pytest
from click.testing import Result
from tiny_roster import Workspace, snapshot

MARCH = dt.date(2020, 3, 31)
Argv = Callable[[Workspace, Path], list[str]]


def _bad_folder(ws: Workspace) -> Path:
    folder = ws.root / "bad"
    folder.mkdir(exist_ok=True)
    return folder


def with_frame(table: str, change: Callable[[pl.DataFrame], pl.DataFrame], fmt: str = "parquet"):
    """The valid roster with ``table`` replaced by ``change(table)`` written as ``fmt``."""

    def argv(ws: Workspace, out: Path) -> list[str]:
        paths = ws.write()
        path = _bad_folder(ws) / f"{table}.{fmt}"
        frame = change(ws.frames[table])
        if fmt == "csv":
            frame.write_csv(path)
        else:
            frame.write_parquet(path)
        return ws.run_args({**paths, table: path}, out)

    return argv


def with_file(table: str, name: str, content: bytes | None) -> Argv:
    """The valid roster with ``table`` pointing at a file ``name`` holding ``content``
    (``None``: the file does not exist)."""

    def argv(ws: Workspace, out: Path) -> list[str]:
        paths = ws.write()
        path = _bad_folder(ws) / name
        if content is not None:
            path.write_bytes(content)
        return ws.run_args({**paths, table: path}, out)

    return argv


def with_options(*extra: str) -> Argv:
    def argv(ws: Workspace, out: Path) -> list[str]:
        return ws.run_args(ws.write(), out, *extra)

    return argv


def without(table: str) -> Argv:
    def argv(ws: Workspace, out: Path) -> list[str]:
        paths = ws.write()
        del paths[table]
        return ws.run_args(paths, out)

    return argv


def with_config(text: str | None) -> Argv:
    """The valid roster by flags plus ``--config`` holding ``text`` (None: no such file)."""

    def argv(ws: Workspace, out: Path) -> list[str]:
        path = _bad_folder(ws) / "job.toml"
        if text is not None:
            path.write_text(text, encoding="utf-8")
        return [*ws.run_args(ws.write(), out), "--config", str(path)]

    return argv


def set_at(column: str, value: object, *, cls: str | None = "equity", date: dt.date = MARCH):
    """Set ``column`` on the shared table's row for (``date``, ``cls``)."""

    def change(frame: pl.DataFrame) -> pl.DataFrame:
        where = pl.col("period_end") == date
        if cls is not None:
            where &= pl.col("asset_class") == cls
        dtype = frame.schema[column]
        new = pl.when(where).then(pl.lit(value, dtype=dtype)).otherwise(pl.col(column))
        return frame.with_columns(new.alias(column))

    return change


def drop_at(date: dt.date, cls: str | None):
    def change(frame: pl.DataFrame) -> pl.DataFrame:
        where = pl.col("period_end") == date
        if cls is not None:
            where &= pl.col("asset_class") == cls
        return frame.filter(~where)

    return change


def duplicate_at(date: dt.date, cls: str):
    def change(frame: pl.DataFrame) -> pl.DataFrame:
        row = frame.filter((pl.col("period_end") == date) & (pl.col("asset_class") == cls))
        return pl.concat([frame, row])

    return change


def text_cell(column: str, text: str):
    """Every value as text, one cell of ``column`` replaced by ``text`` (for CSV)."""

    def change(frame: pl.DataFrame) -> pl.DataFrame:
        as_text = frame.with_columns(pl.all().cast(pl.String))
        fifth = pl.int_range(pl.len()) == 4
        return as_text.with_columns(
            pl.when(fifth).then(pl.lit(text)).otherwise(pl.col(column)).alias(column)
        )

    return change


def null_portfolio(frame: pl.DataFrame) -> pl.DataFrame:
    """Append a copy of P1's rows with an empty portfolio_id."""
    extra = frame.filter(pl.col("portfolio_id") == "P1").with_columns(
        portfolio_id=pl.lit(None, dtype=pl.String)
    )
    return pl.concat([frame, extra])


@dataclass(frozen=True)
class InputCase:
    id: str
    argv: Argv
    words: tuple[str, ...]  # the stderr line must name these (table, column, key, rule)


CASES = (
    InputCase(
        "missing-file",
        with_file("holdings", "nowhere.parquet", None),
        ("holdings", "nowhere.parquet", "does not exist"),
    ),
    InputCase(
        "garbage-parquet",
        with_file("holdings", "garbage.parquet", b"this is not a parquet file\x00\x01" * 8),
        ("holdings", "garbage.parquet", "cannot read"),
    ),
    InputCase(
        "unknown-extension",
        with_file("policy", "policy.xlsx", b"PK\x03\x04 not a table we read"),
        ("policy", "policy.xlsx", ".parquet", ".csv", ".xlsx"),
    ),
    InputCase(
        "missing-required-table",
        without("policy"),
        ("policy", "required", "--policy"),
    ),
    InputCase(
        "missing-column",
        with_frame("holdings", lambda f: f.drop("weight")),
        ("holdings", "missing column", "'weight'", "expected columns"),
    ),
    InputCase(
        "wrong-type-date",
        with_frame("holdings", lambda f: f.with_columns(as_of=pl.lit(5))),
        ("holdings", "'as_of'", "type Int32", "expected a date"),
    ),
    InputCase(
        "wrong-type-number",
        with_frame("index_returns", lambda f: f.with_columns(pl.col("return") > 0)),
        ("index_returns", "'return'", "Boolean", "expected a number"),
    ),
    InputCase(
        "bad-date-text-csv",
        with_frame("holdings", text_cell("as_of", "31/01/2020"), fmt="csv"),
        ("holdings", "'as_of'", "'31/01/2020'", "YYYY-MM-DD"),
    ),
    InputCase(
        "bad-number-text-csv",
        with_frame("index_returns", text_cell("return", "1.2%"), fmt="csv"),
        ("index_returns", "'return'", "'1.2%'", "a number"),
    ),
    InputCase(
        "empty-holdings",
        with_frame("holdings", lambda f: f.clear()),
        ("holdings", "no rows"),
    ),
    InputCase(
        "empty-index-returns",
        with_frame("index_returns", lambda f: f.clear()),
        ("index_returns", "no rows", "period_end", "calendar"),
    ),
    InputCase(
        "holdings-null-portfolio_id",
        with_frame("holdings", null_portfolio),
        ("holdings", "'portfolio_id'", "empty"),
    ),
    InputCase(
        "index_returns-nan",
        with_frame("index_returns", set_at("return", float("nan"))),
        ("index_returns", "'return'", "finite", "period_end, asset_class", "2020-03-31", "equity"),
    ),
    InputCase(
        "index_returns-inf",
        with_frame("index_returns", set_at("return", float("inf"))),
        ("index_returns", "'return'", "finite", "period_end, asset_class", "2020-03-31", "equity"),
    ),
    InputCase(
        "index_returns-minus-100",
        with_frame("index_returns", set_at("return", -1.0)),
        ("index_returns", "'return'", "above -1", "period_end, asset_class", "2020-03-31"),
    ),
    InputCase(
        "index_returns-empty-date",
        with_frame("index_returns", set_at("period_end", None)),
        ("index_returns", "'period_end'", "empty", "period_end, asset_class"),
    ),
    InputCase(
        "index_returns-duplicate",
        with_frame("index_returns", duplicate_at(MARCH, "bonds")),
        ("index_returns", "duplicate key", "period_end, asset_class", "2020-03-31", "bonds"),
    ),
    InputCase(
        "index_returns-class-missing-on-date",
        with_frame("index_returns", drop_at(MARCH, "bonds")),
        ("index_returns", "every class needs every date", "2020-03-31", "bonds"),
    ),
    InputCase(
        "riskfree-missing-date",
        with_frame("riskfree", drop_at(MARCH, None)),
        ("riskfree", "no riskless return", "period_end", "2020-03-31"),
    ),
    InputCase(
        "riskfree-nan",
        with_frame("riskfree", set_at("return", float("nan"), cls=None)),
        ("riskfree", "'return'", "finite", "period_end", "2020-03-31"),
    ),
    InputCase(
        "static-trailing-0",
        with_options("--static", "trailing:0"),
        ("'static'", "trailing:N", "'trailing:0'"),
    ),
    InputCase(
        "weight-tolerance-negative",
        with_options("--weight-tolerance", "-1"),
        ("'weight_tolerance'", "(0, 1)", "-1"),
    ),
    InputCase(
        "cash-class-unknown",
        with_options("--cash-class", "gold"),
        ("'cash_class'", "'gold'", "index_returns", "'cash'"),
    ),
    InputCase(
        "market-unknown",
        with_options("--market", "gold"),
        ("'market'", "'gold'", "'policy'", "index_returns"),
    ),
    InputCase(
        "beta-window-too-short",
        with_options("--beta-window", "expanding:1"),
        ("'beta_window'", "expanding:N", "'expanding:1'"),
    ),
    InputCase(
        "draws-too-few",
        with_options("--draws", "5"),
        ("'draws'", "≥ 99", "Got 5"),
    ),
    InputCase(
        "config-unknown-key",
        with_config('holdngs = "holdings.parquet"\n'),
        ("config", "unknown key", "'holdngs'", "job.toml"),
    ),
    InputCase(
        "config-invalid-toml",
        with_config("linking = = carino\n[unclosed\n"),
        ("config", "job.toml", "not valid TOML"),
    ),
    InputCase(
        "config-missing",
        with_config(None),
        ("config", "job.toml", "does not exist"),
    ),
    InputCase(
        "config-bad-value",
        with_config('linking = "fastest"\n'),
        ("'linking'", "'carino'", "'fastest'"),
    ),
)


def assert_one_line(result: Result, words: tuple[str, ...]) -> None:
    """Exit 2, no traceback, exactly one stderr line naming every word, nothing on stdout."""
    assert result.exit_code == 2, (result.exit_code, result.output, result.stderr)
    assert "Traceback" not in result.stderr
    lines = [line for line in result.stderr.splitlines() if line.strip()]
    assert len(lines) == 1, result.stderr
    assert lines[0].startswith("tiltaudit: error: ")
    for word in words:
        assert word in lines[0], (word, lines[0])
    assert result.stdout == ""


def leftovers(out: Path) -> list[str]:
    """Staging or previous-result folders of ``out`` left beside it."""
    return sorted(
        p.name
        for p in out.parent.glob(f".{out.name}.*")
        if ".staging-" in p.name or p.name.endswith(".previous")
    )


@pytest.fixture(scope="module")
def previous_results(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A folder of results from a good run, copied into each test as 'earlier results'."""
    ws = Workspace(tmp_path_factory.mktemp("previous"))
    ws.good_run(ws.root / "out")
    return ws.root / "out"


@pytest.mark.parametrize("case", CASES, ids=lambda c: c.id)
def test_whole_input_problem(ws: Workspace, case: InputCase, previous_results: Path) -> None:
    fresh = ws.root / "fresh"
    assert_one_line(ws.invoke(case.argv(ws, fresh)), case.words)
    assert not fresh.exists()

    earlier = ws.root / "earlier"
    shutil.copytree(previous_results, earlier)
    before = snapshot(earlier)
    assert_one_line(ws.invoke(case.argv(ws, earlier)), case.words)
    assert snapshot(earlier) == before
    assert leftovers(earlier) == []


@pytest.mark.parametrize(
    ("flag", "value"),
    [("--form", "bhc"), ("--linking", "fastest"), ("--align", "week"), ("--pcm-lag", "one")],
)
def test_usage_error_from_click(ws: Workspace, flag: str, value: str) -> None:
    """Values click itself rejects: exit 2, the option named, no traceback, nothing written."""
    out = ws.root / "out"
    result = ws.invoke(ws.run_args(ws.write(), out, flag, value))
    assert result.exit_code == 2
    assert "Traceback" not in result.stderr
    assert f"Invalid value for '{flag}'" in result.stderr
    assert repr(value) in result.stderr
    assert not out.exists()


def test_missing_out_is_an_error(ws: Workspace) -> None:
    args = ws.run_args(ws.write(), ws.root / "unused")
    cut = args.index("--out")
    result = ws.invoke(args[:cut] + args[cut + 2 :])
    assert result.exit_code == 2
    lines = [line for line in result.stderr.splitlines() if line.strip()]
    assert len(lines) == 1
    assert "'out'" in lines[0]
    assert "--out" in lines[0]


def test_bad_input_creates_nothing_beside_out(ws: Workspace) -> None:
    """'Nothing written' (DESIGN §2): not the output folder, nor its parents, nor a lock file."""
    paths = ws.write()
    before = sorted(p.name for p in ws.root.iterdir())
    out = ws.root / "new" / "deeper" / "out"
    argv = ws.run_args({**paths, "holdings": ws.root / "nowhere.parquet"}, out)
    result = ws.invoke(argv)
    assert result.exit_code == 2
    assert sorted(p.name for p in ws.root.iterdir()) == before


def as_validate(argv: list[str]) -> list[str]:
    """The same inputs and options for ``validate`` (no --out, no --quiet)."""
    cut = argv.index("--out")
    rest = [a for a in argv[cut + 2 :] if a != "--quiet"]
    return ["validate", *argv[1:cut], *rest]


@pytest.mark.parametrize("case", CASES, ids=lambda c: c.id)
def test_validate_whole_input_problem(ws: Workspace, case: InputCase) -> None:
    argv = as_validate(case.argv(ws, ws.root / "unused"))
    before = snapshot(ws.root)
    assert_one_line(ws.invoke(argv), case.words)
    assert snapshot(ws.root) == before
