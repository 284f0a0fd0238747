"""The SQL models transpiled to Spark SQL and run on a local Spark session give the same
marts as on DuckDB (every column, messages included, numbers to 1e-12), on the demo roster
and on the roster with every data issue.

With ``CI=true`` a missing pyspark or Java fails the test instead of skipping it. One
session for the module: ``local[2]``, two shuffle partitions, and adaptive execution and
whole-stage code generation off, which roughly halves the run on tables this small (many
tiny queries, where planning and code generation dominate).
"""

from __future__ import annotations

import os
import shutil
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import duckdb
import polars as pl
import pytest
from sql_model_checks import assert_marts_equal, assert_matches_python, broken_roster, python_marts

from attribution.options import RunOptions
from attribution.simulate import demo_roster
from attribution.sql_models import read_marts, run_models, run_models_on_spark

pytestmark = [
    # pyspark 4.3 warns once that it does not fully support pandas 3; these tests hand it
    # Arrow tables and read Arrow back, never pandas.
    pytest.mark.filterwarnings("ignore:PySpark does not yet fully support pandas:FutureWarning"),
]


def _unavailable(reason: str) -> None:
    if os.environ.get("CI") == "true":
        pytest.fail(f"{reason}; CI must run the Spark tests (CI=true).")
    pytest.skip(reason)


@pytest.fixture(scope="module")
def spark(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Any]:
    try:
        from pyspark.sql import SparkSession
    except ImportError:
        _unavailable("pyspark is not installed")
    if shutil.which("java") is None and not os.environ.get("JAVA_HOME"):
        _unavailable("no Java runtime (java on PATH or JAVA_HOME)")
    warehouse: Path = tmp_path_factory.mktemp("spark-warehouse")
    session = (
        SparkSession.builder.master("local[2]")
        .appName("tiltaudit-sql-models")
        .config("spark.sql.shuffle.partitions", "2")
        .config("spark.default.parallelism", "2")
        .config("spark.ui.enabled", "false")
        .config("spark.ui.showConsoleProgress", "false")
        .config("spark.sql.warehouse.dir", str(warehouse))
        .config("spark.sql.adaptive.enabled", "false")
        .config("spark.sql.codegen.wholeStage", "false")
        .config("spark.sql.session.timeZone", "UTC")
        .getOrCreate()
    )
    session.sparkContext.setLogLevel("ERROR")
    yield session
    session.stop()


def _on_spark(spark: Any, tables: dict[str, pl.DataFrame], options: RunOptions) -> dict:
    marts = run_models_on_spark(spark, tables, options=options)
    return {name: pl.from_arrow(frame.toArrow()) for name, frame in marts.items()}


def _on_duckdb(tables: dict[str, pl.DataFrame], options: RunOptions) -> dict:
    con = duckdb.connect()
    run_models(con, tables, options=options)
    return read_marts(con)


def test_demo_roster_on_spark_equals_duckdb(spark: Any) -> None:
    tables = demo_roster()
    options = RunOptions()
    on_spark = _on_spark(spark, tables, options)
    assert on_spark["summary"].height == 8
    assert_marts_equal(on_spark, _on_duckdb(tables, options))
    assert_matches_python(on_spark, python_marts(tables, options))


def test_every_data_issue_on_spark_equals_duckdb(spark: Any) -> None:
    # NaN and infinite values, -100 % returns, duplicates and drift go through Spark's own
    # arithmetic and comparison rules here.
    tables = broken_roster()
    options = RunOptions.build(linking="menchero", static="trailing:6", form="bhb")
    on_spark = _on_spark(spark, tables, options)
    assert on_spark["data_issues"].height > 10
    assert_marts_equal(on_spark, _on_duckdb(tables, options))
    assert_matches_python(on_spark, python_marts(tables, options))
