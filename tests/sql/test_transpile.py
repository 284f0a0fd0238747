"""Every SQL model is plain, portable SQL: it transpiles with sqlglot to Spark SQL and
PostgreSQL, the PostgreSQL text parses back, and each file keeps the house layout (STYLE
§12: one select, import CTEs first, a final ``select * from <last cte>``, lowercase, no
DuckDB-only conveniences). Running on Spark is tested in test_models_spark.py.
"""

from __future__ import annotations

import re

import pytest
import sqlglot
from sqlglot import expressions as exp

from attribution.sql_models import INPUT_TABLES, MARTS, load_models, transpile_models

MODELS = load_models()
NAMES = [m.name for m in MODELS]

#: DuckDB conveniences other warehouses do not accept (STYLE, "What to avoid" 11), and
#: DuckDB-only syntax sqlglot would have to rewrite.
FORBIDDEN = [
    r"\bgroup\s+by\s+all\b",
    r"\border\s+by\s+all\b",
    r"\bexclude\s*\(",
    r"\breplace\s*\(",
    r"\bqualify\b",
    r"::",
    r"//",
    r"\blist_\w+\(",
    r"\bstruct_pack\(",
    r"\bcount_if\(",
    r"\bany_value\(",
    r"\bfilter\s*\(\s*where\b",
]


def _code_only(sql: str) -> str:
    """The text with comments and string literals removed."""
    without_comments = re.sub(r"--[^\n]*|/\*.*?\*/", "", sql, flags=re.DOTALL)
    return re.sub(r"'(?:[^']|'')*'", "''", without_comments)


@pytest.fixture(scope="module")
def spark_sql() -> dict[str, str]:
    return transpile_models("spark")


@pytest.fixture(scope="module")
def postgres_sql() -> dict[str, str]:
    return transpile_models("postgres")


def test_every_layer_and_mart_is_there() -> None:
    layers = {m.layer for m in MODELS}
    assert layers == {"staging", "intermediate", "marts"}
    staged = {m.reads_inputs[0] for m in MODELS if m.layer == "staging"}
    assert staged == set(INPUT_TABLES)
    assert {m.name for m in MODELS if m.layer == "marts"} == set(MARTS)


@pytest.mark.parametrize("model", MODELS, ids=NAMES)
def test_layout(model) -> None:  # type: ignore[no-untyped-def]
    statements = sqlglot.parse(model.sql, read="duckdb")
    assert len(statements) == 1, "one statement per file"
    tree = statements[0]
    assert isinstance(tree, exp.Select), "the file is one select"
    ctes = [cte.alias_or_name for cte in tree.find_all(exp.CTE)]
    assert ctes, "import CTEs first"
    # the final select is `select * from <last cte>`
    assert [e.sql() for e in tree.expressions] == ["*"]
    source = tree.args["from_"].this
    assert isinstance(source, exp.Table)
    assert source.name == ctes[-1]
    assert tree.args.get("joins") is None
    assert tree.args.get("where") is None
    code = _code_only(model.sql)
    assert code == code.lower(), "lowercase outside comments and string literals"
    for pattern in FORBIDDEN:
        assert not re.search(pattern, code, flags=re.IGNORECASE), pattern
    if model.layer == "staging":
        # rename and cast only: one import CTE over the input, one select of casts
        assert ctes == ["source", "renamed"]
        renamed = next(c for c in tree.find_all(exp.CTE) if c.alias_or_name == "renamed").this
        for column in renamed.expressions:
            assert isinstance(column, exp.Alias)
            assert isinstance(column.this, exp.Cast)
    else:
        # every import CTE is `select * from <model>` and they come before the others
        imports = [
            cte
            for cte in tree.find_all(exp.CTE)
            if isinstance(cte.this, exp.Select)
            and [e.sql() for e in cte.this.expressions] == ["*"]
            and isinstance(cte.this.args["from_"].this, exp.Table)
            and cte.this.args["from_"].this.name in NAMES
            and not cte.this.args.get("joins")
            and not cte.this.args.get("where")
        ]
        assert imports, "import CTEs first"
        assert ctes[: len(imports)] == [c.alias_or_name for c in imports]


@pytest.mark.parametrize("name", NAMES)
def test_transpiles_to_spark(name: str, spark_sql: dict[str, str]) -> None:
    text = spark_sql[name]
    # the comments travel along as /* ... */ blocks ahead of the statement
    assert re.sub(r"/\*.*?\*/\s*", "", text, flags=re.DOTALL).upper().startswith("WITH ")
    # Spark quotes with backticks; a double-quoted identifier would be a string there
    assert '"' not in _code_only(text)
    sqlglot.parse_one(text, read="spark")


@pytest.mark.parametrize("name", NAMES)
def test_transpiles_to_postgres_and_parses_back(name: str, postgres_sql: dict[str, str]) -> None:
    text = postgres_sql[name]
    tree = sqlglot.parse_one(text, read="postgres")
    assert isinstance(tree, exp.Select)
    original = sqlglot.parse_one(next(m.sql for m in MODELS if m.name == name), read="duckdb")
    # the same relations read and the same output columns after the round trip
    assert {t.name for t in tree.find_all(exp.Table)} == {
        t.name for t in original.find_all(exp.Table)
    }
    last = {c.alias_or_name: c for c in original.find_all(exp.CTE)}
    round_trip = {c.alias_or_name: c for c in tree.find_all(exp.CTE)}
    assert list(last) == list(round_trip)
    final = list(last)[-1]
    assert last[final].this.named_selects == round_trip[final].this.named_selects
    # DuckDB's DOUBLE must come out as PostgreSQL's DOUBLE PRECISION
    assert " DOUBLE)" not in text.upper()
    assert " DOUBLE," not in text.upper()
