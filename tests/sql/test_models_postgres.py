"""Opt-in: the SQL models transpiled to PostgreSQL and run on a throwaway PostgreSQL server
give the same marts as on DuckDB (every column, messages included, numbers to 1e-12).

Runs only when ``TILTAUDIT_POSTGRES_BIN`` names the ``bin`` folder of a PostgreSQL
installation (``initdb``, ``pg_ctl``, ``psql``; e.g. ``/usr/lib/postgresql/15/bin`` from
Debian's ``postgresql`` package). The server listens on a Unix socket only (no TCP) in a
temporary folder and is stopped afterwards; run as root, it runs as the ``postgres`` user
(initdb refuses root). Tables go in and out as CSV through ``psql``'s ``\\copy``, so no
database driver is needed.
"""

from __future__ import annotations

import os
import shlex
import shutil
import subprocess
import tempfile
from collections.abc import Iterator
from pathlib import Path

import duckdb
import polars as pl
import pytest
from sql_model_checks import assert_marts_equal, broken_roster

from attribution.options import RunOptions
from attribution.simulate import demo_roster
from attribution.sql_models import (
    INPUT_SCHEMAS,
    INPUT_TABLES,
    MARTS,
    options_frame,
    read_marts,
    run_models,
    transpile_models,
)

PG_BIN = os.environ.get("TILTAUDIT_POSTGRES_BIN", "")

pytestmark = pytest.mark.skipif(
    not PG_BIN,
    reason="opt-in: set TILTAUDIT_POSTGRES_BIN to the bin folder of a PostgreSQL install",
)

PG_TYPES = {pl.String: "text", pl.Date: "date", pl.Float64: "double precision", pl.Int32: "integer"}


class Server:
    """A PostgreSQL server in a temporary folder, reachable through its Unix socket."""

    def __init__(self, root: Path) -> None:
        self.root = root
        self.data = root / "data"
        self.port = 50000 + os.getpid() % 10000

    def command(self, *args: str) -> subprocess.CompletedProcess[str]:
        line = " ".join(shlex.quote(a) for a in args)
        argv = ["su", "postgres", "-c", line] if os.geteuid() == 0 else ["sh", "-c", line]
        return subprocess.run(argv, capture_output=True, text=True, check=False, timeout=600)

    def start(self) -> None:
        done = self.command(f"{PG_BIN}/initdb", "-D", str(self.data), "-A", "trust")
        assert done.returncode == 0, done.stderr
        options = f"-p {self.port} -k {self.root} -c listen_addresses= -c fsync=off"
        log = str(self.root / "server.log")
        done = self.command(
            f"{PG_BIN}/pg_ctl", "-D", str(self.data), "-o", options, "-l", log, "-w", "start"
        )
        assert done.returncode == 0, done.stderr

    def stop(self) -> None:
        self.command(f"{PG_BIN}/pg_ctl", "-D", str(self.data), "-m", "fast", "-w", "stop")

    def run_script(self, script: Path) -> None:
        done = self.command(
            f"{PG_BIN}/psql", "-v", "ON_ERROR_STOP=1", "-q", "-h", str(self.root),
            "-p", str(self.port), "-d", "postgres", "-f", str(script),
        )  # fmt: skip
        assert done.returncode == 0, done.stdout[-2000:] + done.stderr[-2000:]


@pytest.fixture(scope="module")
def server() -> Iterator[Server]:
    root = Path(tempfile.mkdtemp(prefix="tiltaudit-pg-"))
    root.chmod(0o777)  # the postgres user writes here when the tests run as root
    found = Server(root)
    try:
        found.start()
        yield found
    finally:
        found.stop()
        shutil.rmtree(root, ignore_errors=True)


def _write_csv(frame: pl.DataFrame, path: Path) -> None:
    """CSV that PostgreSQL reads back exactly: floats in shortest round-trip form, NaN and
    infinities spelled as PostgreSQL spells them, null as an empty field."""
    spelled = [
        pl.col(c).cast(pl.String).replace({"inf": "Infinity", "-inf": "-Infinity"})
        for c, t in frame.schema.items()
        if t == pl.Float64
    ]
    frame.with_columns(spelled).write_csv(path, null_value="")


def _read_csv(path: Path, schema: dict[str, pl.DataType]) -> pl.DataFrame:
    raw = pl.read_csv(path, infer_schema=False, null_values=[""])
    columns = []
    for name, dtype in schema.items():
        column = pl.col(name)
        if dtype == pl.Boolean:
            columns.append(column == "t")
        elif dtype == pl.Date:
            columns.append(column.str.to_date("%Y-%m-%d"))
        else:
            columns.append(column.cast(dtype))
    return raw.with_columns(columns)


def _on_postgres(
    server: Server, tables: dict[str, pl.DataFrame], options: RunOptions
) -> dict[str, Path]:
    """Load the inputs, create every model as a table, and export the marts as CSV files."""
    given: dict[str, pl.DataFrame | None] = {**tables, "run_options": options_frame(options)}
    lines = ["drop schema if exists models cascade;", "create schema models;"]
    lines.append("set search_path = models;")
    for name in INPUT_TABLES:
        schema = INPUT_SCHEMAS[name]
        frame = given.get(name)
        frame = pl.DataFrame(schema=schema) if frame is None else frame.select(list(schema))
        frame = frame.cast(schema)  # type: ignore[arg-type]
        columns = ", ".join(f'"{c}" {PG_TYPES[type(t)]}' for c, t in schema.items())
        lines.append(f"create table {name} ({columns});")
        path = server.root / f"in_{name}.csv"
        _write_csv(frame, path)
        lines.append(f"\\copy {name} from '{path}' with (format csv, header true)")
    for name, select in transpile_models("postgres").items():
        lines.append(f"create table {name} as {select};")
    for name in MARTS:
        path = server.root / f"out_{name}.csv"
        lines.append(f"\\copy (select * from {name}) to '{path}' with (format csv, header true)")
    script = server.root / "run.sql"
    script.write_text("\n".join(lines), encoding="utf-8")
    server.run_script(script)
    return {name: server.root / f"out_{name}.csv" for name in MARTS}


def _on_duckdb(tables: dict[str, pl.DataFrame], options: RunOptions) -> dict[str, pl.DataFrame]:
    con = duckdb.connect()
    run_models(con, tables, options=options)
    return read_marts(con)


@pytest.mark.parametrize(
    ("roster", "options"),
    [
        ("demo", {}),
        ("broken", {"linking": "menchero", "static": "trailing:6", "form": "bhb"}),
        ("broken", {"linking": "grap", "static": "expanding"}),
    ],
)
def test_postgres_equals_duckdb(server: Server, roster: str, options: dict[str, str]) -> None:
    tables = demo_roster() if roster == "demo" else broken_roster()
    opts = RunOptions.build(**options)
    expected = _on_duckdb(tables, opts)
    files = _on_postgres(server, tables, opts)
    actual = {name: _read_csv(path, dict(expected[name].schema)) for name, path in files.items()}
    assert actual["summary"].height > 0
    assert_marts_equal(actual, expected)
