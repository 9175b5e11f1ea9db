"""Engine targets (targets.py): one class per engine or dialect holds every SQL difference.

Reference for rendered text: sqlglot's own parser for the dialect reads it back;
reference for the cell pass of a new target: DuckDB runs the text and its cell
counts match numpy's floor of the same binned values.
"""

from __future__ import annotations

import ast
import re
import sys
from pathlib import Path

import duckdb
import numpy as np
import pytest
import sqlglot
from click.testing import CliRunner
from sqlglot import exp

from tillite import sqlgen, targets
from tillite.cli import main
from tillite.engines import DuckDBEngine, PostgresEngine, SparkEngine
from tillite.sqlgen import Grid, Source
from tillite.targets import DuckDB, PostgreSQL, Spark, Target, target_for

SRC = Path(__file__).resolve().parents[1] / "src" / "tillite"
GRID = Grid(center=(0.5, -1.0), inv_scale=(1.0, 2.0), width=0.5, axes=((1.0, 0.0), (0.0, 1.0)))
NAMES = ["litres", "unit price"]


@pytest.mark.parametrize("engine_class, target_class", [(DuckDBEngine, DuckDB), (PostgresEngine, PostgreSQL), (SparkEngine, Spark)])
def test_every_engine_renders_with_its_own_target(engine_class, target_class):
    engine = engine_class.__new__(engine_class)  # the engine's type alone: no database is opened
    assert type(engine.target) is target_class and engine.target.name == engine.dialect
    cells = sqlgen.cells_statement(Source.of_table("t"), NAMES, GRID, engine.target)
    assert engine.sql_text(cells) == sqlgen.render(sqlgen.cells_statement(Source.of_table("t"), NAMES, GRID, engine.dialect), engine.dialect)


def test_unknown_dialect_is_one_clear_error():
    with pytest.raises(ValueError) as err:
        target_for("nosuchsql")
    assert "nosuchsql" in str(err.value) and "\n" not in str(err.value)
    result = CliRunner().invoke(main, ["sql", "--table", "t", "--columns", "a", "--stage", "profile", "--dialect", "nosuchsql"])
    lines = [line for line in result.output.splitlines() if line.strip()]
    assert result.exit_code == 2 and "Traceback" not in result.output
    assert any("nosuchsql" in line for line in lines) and "unknown SQL dialect" in result.output


def test_a_dialect_without_a_class_of_its_own_gets_standard_sql_and_no_row_hash():
    mysql = target_for("mysql")
    assert type(mysql) is Target and mysql.name == "mysql"
    text = sqlgen.render(sqlgen.cells_statement(Source.of_table("t"), NAMES, GRID, mysql), mysql)
    assert "FLOOR(" in text and "ISFINITE" not in text.upper()
    with pytest.raises(NotImplementedError, match="not built for the mysql dialect; built for duckdb, postgres, spark"):
        sqlgen.row_hash(NAMES, mysql)


def test_a_new_render_only_target_needs_only_a_class():
    class NanTested(Target):  # a tiny target: standard SQL except its own finiteness test
        name = "duckdb"

        def is_finite(self, e: exp.Expression) -> exp.Expression:
            return exp.Not(this=exp.Anonymous(this="isnan", expressions=[e]))

    rng = np.random.default_rng(7)
    x = rng.normal(size=(200, 2))
    con = duckdb.connect()
    con.execute('CREATE TABLE t ("litres" DOUBLE, "unit price" DOUBLE)')
    con.executemany("INSERT INTO t VALUES (?, ?)", x.tolist())
    text = sqlgen.render(sqlgen.cells_statement(Source.of_table("t"), NAMES, GRID, NanTested()), NanTested())
    assert "NOT ISNAN(" in text.upper() and "ISFINITE" not in text.upper()
    got = con.execute(text).fetchall()
    # reference: numpy's floor of the same binned values (u = (x - center) * inv_scale / width per axis)
    keys = np.floor((x - np.array(GRID.center)) * np.array(GRID.inv_scale) / GRID.width)
    _, expected_counts = np.unique(keys, axis=0, return_counts=True)
    assert sorted(row[2] for row in got) == sorted(expected_counts.tolist())


def test_builders_take_a_target_or_its_dialect_name_alike():
    for name in ("duckdb", "postgres", "spark", "trino", "bigquery", "snowflake", "databricks"):
        by_name = sqlgen.render(sqlgen.sample_statement(Source.of_table("t"), NAMES, name, percent=2.0, seed=3), name)
        by_target = sqlgen.render(sqlgen.sample_statement(Source.of_table("t"), NAMES, target_for(name), percent=2.0, seed=3), target_for(name))
        assert by_name == by_target
        # reference: sqlglot's parser for the dialect reads the text back
        assert sqlglot.parse_one(by_name, read=name) is not None


def test_store_refuses_targets_without_transactions_and_runs_on_those_with():
    assert [t.name for t in targets.TARGETS if not t.transactions] == ["spark", "databricks", "spark2", "hive"]
    assert DuckDB().transactions and PostgreSQL().transactions


def test_no_dialect_test_is_left_outside_the_targets():
    for module in sorted(SRC.rglob("*.py")):
        if module.name == "targets.py":
            continue
        text = module.read_text(encoding="utf-8")
        assert not re.search(r"(dialect|target\.name)\s*(==|!=|in\b|not in\b)|in SPARK_DIALECTS", text), module


def test_targets_module_imports_only_sqlglot_and_the_standard_library():
    tree = ast.parse((SRC / "targets.py").read_text(encoding="utf-8"))
    imported = {alias.name.split(".")[0] for node in ast.walk(tree) if isinstance(node, ast.Import) for alias in node.names}
    imported |= {node.module.split(".")[0] for node in ast.walk(tree) if isinstance(node, ast.ImportFrom) and node.level == 0}
    assert not any(isinstance(node, ast.ImportFrom) and node.level for node in ast.walk(tree)), "imports a module of ours"
    assert imported <= set(sys.stdlib_module_names) | {"sqlglot"}, imported
