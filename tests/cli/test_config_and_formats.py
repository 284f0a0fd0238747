"""``--config`` TOML files, CSV versus Parquet inputs, and ``--align month`` (DESIGN §2)."""

from __future__ import annotations

import json
from pathlib import Path

import polars as pl
import pytest
from polars.testing import assert_frame_equal
from tiny_roster import HOLDING_DATES, PERIOD_ENDS, PORTFOLIOS, Workspace, business_month_end

TABLES = ("effects", "summary", "summary_windows", "series", "data_issues")


def assert_same_tables(left: Path, right: Path) -> None:
    """Every output table of two runs is identical (values, types, order)."""
    for table in TABLES:
        assert_frame_equal(
            pl.read_parquet(left / f"{table}.parquet"),
            pl.read_parquet(right / f"{table}.parquet"),
        )


def write_config(path: Path, values: dict[str, object]) -> Path:
    """A TOML file of string, integer and float values (keys = long options, underscored)."""
    lines = []
    for key, value in values.items():
        text = f'"{value}"' if isinstance(value, str) else repr(value)
        lines.append(f"{key} = {text}")
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def manifest(out: Path) -> dict:
    return json.loads((out / "manifest.json").read_text(encoding="utf-8"))


@pytest.fixture
def job(ws: Workspace, monkeypatch: pytest.MonkeyPatch) -> Path:
    """A config in ``<root>/jobs`` naming the inputs relative to itself; cwd elsewhere."""
    ws.write()  # <root>/inputs/<table>.parquet
    values: dict[str, object] = {
        name: f"../inputs/{name}.parquet"
        for name in ("holdings", "index_returns", "policy", "riskfree", "segment_returns")
    }
    values |= {
        "portfolio_returns": "../inputs/portfolio_returns.parquet",
        "out": "results",
        "linking": "grap",
        "static": "trailing:3",
        "weight_tolerance": 0.001,
        "draws": 199,
    }
    path = write_config(ws.root / "jobs" / "job.toml", values)
    elsewhere = ws.root / "elsewhere"
    elsewhere.mkdir()
    monkeypatch.chdir(elsewhere)
    return path


def test_config_gives_the_same_tables_as_flags(ws: Workspace, job: Path) -> None:
    by_flags = ws.root / "by-flags"
    flags = ("--linking", "grap", "--static", "trailing:3", "--weight-tolerance", "0.001")
    result = ws.invoke(ws.run_args(ws.write(), by_flags, *flags, "--draws", "199"))
    assert result.exit_code == 0, result.stderr

    result = ws.invoke(["run", "--config", str(job), "--quiet"])
    assert result.exit_code == 0, result.stderr
    # Relative paths in the config are read from the config file's folder, not the cwd.
    by_config = job.parent / "results"
    assert by_config.is_dir()
    assert not (ws.root / "elsewhere" / "results").exists()
    assert_same_tables(by_flags, by_config)
    options = manifest(by_config)["options"]
    assert options == manifest(by_flags)["options"]
    assert (options["linking"], options["static"], options["draws"]) == ("grap", "trailing:3", 199)
    assert options["weight_tolerance"] == 0.001
    inputs = manifest(by_config)["inputs"]
    assert Path(inputs["holdings"]["path"]) == (ws.root / "inputs" / "holdings.parquet").resolve()


def test_flags_override_config(ws: Workspace, job: Path) -> None:
    other_out = ws.root / "chosen-by-flag"
    result = ws.invoke(
        ["run", "--config", str(job), "--linking", "menchero", "--out", str(other_out), "--quiet"]
    )
    assert result.exit_code == 0, result.stderr
    assert not (job.parent / "results").exists()  # the flag's --out won
    summary = pl.read_parquet(other_out / "summary.parquet")
    assert set(summary["linking"]) == {"menchero"}
    options = manifest(other_out)["options"]
    assert options["linking"] == "menchero"
    assert options["static"] == "trailing:3"  # not overridden: the config's value stands


def test_relative_flag_paths_are_read_from_the_cwd(ws: Workspace, job: Path) -> None:
    """A flag's relative path is the user's (cwd), a config's is the config file's."""
    ws.write(folder="elsewhere/mine")
    result = ws.invoke(
        ["run", "--config", str(job), "--holdings", "mine/holdings.parquet", "--quiet"]
    )
    assert result.exit_code == 0, result.stderr
    recorded = manifest(job.parent / "results")["inputs"]["holdings"]["path"]
    assert Path(recorded) == (ws.root / "elsewhere" / "mine" / "holdings.parquet").resolve()


def test_validate_reads_the_config(ws: Workspace, job: Path) -> None:
    result = ws.invoke(["validate", "--config", str(job)])
    assert result.exit_code == 0, result.stderr
    assert f"{len(PORTFOLIOS)} portfolio(s) would run" in result.stdout
    assert not (job.parent / "results").exists()


def test_csv_and_parquet_give_identical_tables(ws: Workspace) -> None:
    from_parquet, from_csv = ws.root / "out-parquet", ws.root / "out-csv"
    parquet_paths = ws.write(fmt="parquet", folder="parquet")
    csv_paths = ws.write(fmt="csv", folder="csv")
    assert ws.invoke(ws.run_args(parquet_paths, from_parquet)).exit_code == 0
    result = ws.invoke(ws.run_args(csv_paths, from_csv))
    assert result.exit_code == 0, result.stderr
    assert_same_tables(from_parquet, from_csv)


BUSINESS = {d: business_month_end(d) for d in (*HOLDING_DATES, *PERIOD_ENDS)}
#: Business-day month ends that differ from the calendar ones in 2020 (weekend month ends).
MOVED = {d: b for d, b in BUSINESS.items() if d != b}


def on_business_days(frames: dict[str, pl.DataFrame], tables: tuple[str, ...]):
    """The roster with the dates of ``tables`` moved to the last weekday of their month."""
    out = dict(frames)
    for table in tables:
        col = "as_of" if table == "holdings" else "period_end"
        out[table] = frames[table].with_columns(pl.col(col).replace(BUSINESS))
    return out


def test_business_day_dates_are_off_calendar_without_align(ws: Workspace) -> None:
    assert dt_text(MOVED) == ["2020-02-29", "2020-05-31", "2020-10-31"]
    frames = on_business_days(ws.frames, ("holdings", "segment_returns", "portfolio_returns"))
    out = ws.root / "out"
    result = ws.invoke(ws.run_args(ws.write(frames), out))
    assert result.exit_code == 3, result.stderr
    issues = pl.read_parquet(out / "data_issues.parquet").filter(
        pl.col("code") == "off_calendar_date"
    )
    assert set(issues["portfolio_id"]) == set(PORTFOLIOS)
    assert set(issues["severity"]) == {"error"}
    assert any("2020-05-29" in m for m in issues["message"])
    assert pl.read_parquet(out / "summary.parquet").height == 0


@pytest.mark.parametrize(
    "tables",
    [
        ("holdings", "segment_returns", "portfolio_returns"),
        ("holdings", "index_returns", "riskfree", "segment_returns", "portfolio_returns"),
    ],
    ids=["portfolio-tables", "every-table"],
)
def test_align_month_maps_business_days(ws: Workspace, tables: tuple[str, ...]) -> None:
    calendar_out = ws.root / "calendar"
    ws.good_run(calendar_out)
    aligned_out = ws.root / "aligned"
    frames = on_business_days(ws.frames, tables)
    result = ws.invoke(
        ws.run_args(ws.write(frames, folder="business"), aligned_out, "--align", "month")
    )
    assert result.exit_code == 0, result.stderr
    assert_same_tables(calendar_out, aligned_out)
    effects = pl.read_parquet(aligned_out / "effects.parquet")
    assert set(effects["period_end"]) == set(PERIOD_ENDS)


def dt_text(dates: dict) -> list[str]:
    return sorted(str(d) for d in dates)
