"""Reading the input tables (Parquet or CSV, by file extension) into typed polars frames.

Only whole-input problems are raised here (unreadable file, missing column, wrong type, a
null key in a column that names the portfolio); everything about the *values* is checked in
:mod:`attribution.validate`.
"""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path
from typing import Any

import polars as pl

from attribution.errors import ReadError, SchemaError, examples

DATE, FLOAT, TEXT = "date", "float", "text"

#: The columns each input table must carry (DESIGN §2), in output order.
TABLE_COLUMNS: dict[str, dict[str, str]] = {
    "holdings": {"portfolio_id": TEXT, "as_of": DATE, "asset_class": TEXT, "weight": FLOAT},
    "index_returns": {"period_end": DATE, "asset_class": TEXT, "return": FLOAT},
    "policy": {
        "portfolio_id": TEXT,
        "asset_class": TEXT,
        "weight": FLOAT,
        "effective_from": DATE,
    },
    "riskfree": {"period_end": DATE, "return": FLOAT},
    "segment_returns": {
        "portfolio_id": TEXT,
        "period_end": DATE,
        "asset_class": TEXT,
        "return": FLOAT,
    },
    "portfolio_returns": {"portfolio_id": TEXT, "period_end": DATE, "return": FLOAT},
    "portfolio_values": {"portfolio_id": TEXT, "as_of": DATE, "value": FLOAT},
}
REQUIRED_TABLES = ("holdings", "index_returns", "policy")
OPTIONAL_TABLES = ("riskfree", "segment_returns", "portfolio_returns", "portfolio_values")

TableSource = str | Path | pl.DataFrame | pl.LazyFrame | Any


def read_table(source: TableSource, table: str) -> pl.DataFrame:
    """Read one input table and give it the contract's column types.

    ``source`` is a path (``.parquet``/``.pq`` or ``.csv``, chosen by extension) or an
    in-memory frame (polars eager or lazy, pandas, or Arrow). Extra columns are dropped.
    """
    raw = _read_raw(source, table)
    return coerce_schema(raw, table)


def _read_raw(source: TableSource, table: str) -> pl.DataFrame:
    if isinstance(source, pl.LazyFrame):
        return source.collect()
    if isinstance(source, pl.DataFrame):
        return source
    if isinstance(source, str | Path):
        path = Path(source)
        if not path.is_file():
            msg = f"{table}: file {str(path)!r} does not exist or is not a file."
            raise ReadError(msg)
        suffix = path.suffix.lower()
        try:
            if suffix in (".parquet", ".pq"):
                return pl.read_parquet(path)
            if suffix == ".csv":
                # Read every column as text and cast under our own rules, so a bad cell is
                # reported with its column instead of surfacing as a parser error.
                return pl.read_csv(path, infer_schema=False)
        except Exception as exc:
            reason = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
            msg = f"{table}: cannot read {str(path)!r} ({reason})."
            raise ReadError(msg) from exc
        msg = f"{table}: {str(path)!r} must end in .parquet, .pq or .csv (got {suffix or 'none'})."
        raise ReadError(msg)
    try:
        frame = pl.from_arrow(source) if hasattr(source, "schema") else pl.from_pandas(source)
    except Exception as exc:
        msg = f"{table}: cannot convert an object of type {type(source).__name__} to a table."
        raise ReadError(msg) from exc
    if not isinstance(frame, pl.DataFrame):
        msg = f"{table}: expected a table, got {type(source).__name__}."
        raise ReadError(msg)
    return frame


def coerce_schema(frame: pl.DataFrame, table: str) -> pl.DataFrame:
    """Check the table's columns and cast them to Date / Float64 / String.

    Text dates must be ISO ``YYYY-MM-DD``; datetimes are truncated to their date. Integer
    columns are accepted where a float is expected. A value that cannot be cast is a whole-
    input :class:`SchemaError` naming the table, column and example values.
    """
    spec = TABLE_COLUMNS[table]
    missing = [c for c in spec if c not in frame.columns]
    if missing:
        msg = (
            f"{table}: missing column(s) {', '.join(map(repr, missing))}; "
            f"expected columns {list(spec)}, found {frame.columns}."
        )
        raise SchemaError(msg)
    out = frame.select(list(spec))
    casts = [_cast_column(out, table, name, kind) for name, kind in spec.items()]
    return out.with_columns(casts)


def _cast_column(frame: pl.DataFrame, table: str, name: str, kind: str) -> pl.Expr:
    dtype = frame.schema[name]
    col = pl.col(name)
    if kind == TEXT:
        if dtype in (pl.String, pl.Categorical) or dtype.is_integer():
            return col.cast(pl.String)
        if isinstance(dtype, pl.Enum):
            return col.cast(pl.String)
        _wrong_type(table, name, dtype, "text (or integer ids)")
    if kind == FLOAT:
        if dtype.is_numeric():
            return col.cast(pl.Float64)
        if dtype == pl.String:
            parsed = frame.select(col.str.strip_chars().cast(pl.Float64, strict=False))[name]
            bad = frame.filter(parsed.is_null() & col.is_not_null() & (col.str.strip_chars() != ""))
            if bad.height:
                _bad_values(table, name, bad[name].to_list(), "a number")
            return col.str.strip_chars().cast(pl.Float64, strict=False)
        _wrong_type(table, name, dtype, "a number")
    if dtype == pl.Date:
        return col
    if isinstance(dtype, pl.Datetime):
        return col.dt.date()
    if dtype == pl.String:
        parsed = frame.select(col.str.strip_chars().str.to_date("%Y-%m-%d", strict=False))[name]
        bad = frame.filter(parsed.is_null() & col.is_not_null())
        if bad.height:
            _bad_values(table, name, bad[name].to_list(), "an ISO date YYYY-MM-DD")
        return col.str.strip_chars().str.to_date("%Y-%m-%d", strict=False)
    _wrong_type(table, name, dtype, "a date")
    raise AssertionError  # unreachable: _wrong_type raises


def _wrong_type(table: str, name: str, dtype: object, expected: str) -> None:
    msg = f"{table}: column {name!r} has type {dtype}; expected {expected}."
    raise SchemaError(msg)


def _bad_values(table: str, name: str, values: list[object], expected: str) -> None:
    msg = f"{table}: column {name!r} has values that are not {expected}: {examples(values)}."
    raise SchemaError(msg)


def read_inputs(sources: Mapping[str, TableSource | None]) -> dict[str, pl.DataFrame | None]:
    """Read every named table; optional tables may be ``None``. Required ones must be given."""
    out: dict[str, pl.DataFrame | None] = {}
    for table in REQUIRED_TABLES:
        if sources.get(table) is None:
            flag = "--" + table.replace("_", "-")
            msg = f"{table}: this table is required (give it with {flag})."
            raise ReadError(msg)
    for table in (*REQUIRED_TABLES, *OPTIONAL_TABLES):
        src = sources.get(table)
        out[table] = None if src is None else read_table(src, table)
    return out


class TableReader:
    """One input table, read shard by shard: a Parquet/CSV file scanned lazily with a filter
    on ``portfolio_id`` (row-group statistics skip what a shard does not need), or an
    in-memory frame filtered in memory."""

    def __init__(self, source: TableSource, table: str) -> None:
        self.table = table
        self._lazy: pl.LazyFrame
        if isinstance(source, str | Path):
            path = Path(source)
            if not path.is_file():
                msg = f"{table}: file {str(path)!r} does not exist or is not a file."
                raise ReadError(msg)
            suffix = path.suffix.lower()
            if suffix in (".parquet", ".pq"):
                self._lazy = pl.scan_parquet(path)
            elif suffix == ".csv":
                self._lazy = pl.scan_csv(path, infer_schema=False)
            else:
                msg = (
                    f"{table}: {str(path)!r} must end in .parquet, .pq or .csv "
                    f"(got {suffix or 'none'})."
                )
                raise ReadError(msg)
            self._where = str(path)
        else:
            self._lazy = _read_raw(source, table).lazy()
            self._where = "the table given"
        try:
            columns = self._lazy.collect_schema().names()
        except Exception as exc:
            reason = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
            msg = f"{table}: cannot read {self._where!r} ({reason})."
            raise ReadError(msg) from exc
        spec = TABLE_COLUMNS[table]
        missing = [c for c in spec if c not in columns]
        if missing:
            msg = (
                f"{table}: missing column(s) {', '.join(map(repr, missing))}; "
                f"expected columns {list(spec)}, found {columns}."
            )
            raise SchemaError(msg)
        self._lazy = self._lazy.select(list(spec))
        self._known_ids: pl.Series | None = None

    def _collect(self, lazy: pl.LazyFrame) -> pl.DataFrame:
        try:
            return lazy.collect()
        except Exception as exc:
            reason = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
            msg = f"{self.table}: cannot read {self._where!r} ({reason})."
            raise ReadError(msg) from exc

    def portfolio_ids(self) -> pl.Series:
        """The distinct portfolio ids of the table, as text (nulls dropped).

        Only the first row of each run of equal ids is hashed: a file grouped by portfolio
        (the usual layout) then costs one comparison per row.
        """
        pid = pl.col("portfolio_id").cast(pl.String)
        # Row 0 compares with a null shift, so it is kept unless it is null; nulls are kept.
        run_start = pid.ne_missing(pid.shift(1)) | pid.is_null()
        ids = self._collect(self._lazy.select(pid).filter(run_start).unique())["portfolio_id"]
        if ids.null_count():
            msg = (
                f"{self.table}: column 'portfolio_id' is empty in some rows; every row must "
                "name its portfolio."
            )
            raise SchemaError(msg)
        self._known_ids = ids.sort()
        return self._known_ids

    def _range_is_enough(self, wanted: pl.Series) -> bool:
        """Whether every id of this table between the shard's least and greatest id is one of
        the shard's ids (known once :meth:`portfolio_ids` has run): then the range filter
        alone selects the shard, without looking each row's id up in the shard's set."""
        known = self._known_ids
        if known is None:
            return False
        lo = known.search_sorted(wanted.min(), side="left")
        hi = known.search_sorted(wanted.max(), side="right")
        return bool(known.slice(lo, hi - lo).is_in(wanted.implode()).all())

    def read_all(self) -> pl.DataFrame:
        """The whole table, typed."""
        return coerce_schema(self._collect(self._lazy), self.table)

    def read_shard(self, ids: list[str]) -> pl.DataFrame:
        """The typed rows of the given portfolios; the numbers in one chunk each.

        The id range of the shard is filtered on as well as the ids themselves: Parquet
        row-group statistics then skip the rest of a file sorted by portfolio.
        """
        wanted = pl.Series(ids, dtype=pl.String)
        pid = pl.col("portfolio_id").cast(pl.String)
        if wanted.len() == 0:
            lazy = self._lazy.filter(pid.is_in(wanted.implode()))
        elif self._range_is_enough(wanted):
            lazy = self._lazy.filter((pid >= wanted.min()) & (pid <= wanted.max()))
        else:
            lazy = self._lazy.filter(
                (pid >= wanted.min()) & (pid <= wanted.max()) & pid.is_in(wanted.implode())
            )
        frame = coerce_schema(self._collect(lazy), self.table)
        # One chunk makes every numpy view of the column free (it is read several times).
        numbers = [name for name, kind in TABLE_COLUMNS[self.table].items() if kind == FLOAT]
        return frame.with_columns([frame[name].rechunk() for name in numbers])
