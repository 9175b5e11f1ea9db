"""Plumbing every engine shares: opened in a with-statement, closed on leaving it."""

from __future__ import annotations

import duckdb
import numpy as np
import pytest
from sqlglot import exp

from tillite.engines import DuckDBEngine, OpenedSource, open_database, open_source, result_rows

from conftest import write_table


@pytest.fixture
def five_rows_db(tmp_path):
    return write_table(tmp_path / "small.duckdb", "pts", {"a": np.arange(5.0)})


def is_closed(engine: DuckDBEngine) -> bool:
    try:
        engine.con.execute("SELECT 1")
    except duckdb.ConnectionException:
        return True
    return False


def test_open_source_in_a_with_statement_closes_the_engine_even_on_error(five_rows_db):
    with pytest.raises(RuntimeError, match="inside"):
        with open_source(str(five_rows_db), "pts") as (engine, source):
            assert source.label == "pts"
            assert engine.query(exp.select("a").from_("pts"))["a"].tolist() == [0.0, 1.0, 2.0, 3.0, 4.0]
            raise RuntimeError("inside")
    assert is_closed(engine)
    # the file's lock went with it: it opens for writing again
    with open_source(str(five_rows_db), "pts", writable=True) as opened:
        assert isinstance(opened, OpenedSource) and opened.engine.read_only is False
    assert is_closed(opened.engine)


def test_open_source_still_unpacks_into_engine_and_source(five_rows_db):
    engine, source = open_source(str(five_rows_db), "pts")
    try:
        assert isinstance(engine, DuckDBEngine) and source.table == ("pts",)
    finally:
        engine.close()


def test_an_engine_is_its_own_context_manager(five_rows_db):
    with open_database(str(five_rows_db)) as engine:
        assert engine.tables() == ["pts"]
    assert is_closed(engine)


def test_the_named_catalog_look_up_finds_a_table_in_the_current_schema_in_any_case():
    from tillite import sqlgen

    con = duckdb.connect()
    con.execute('CREATE TABLE "Meters" (a INTEGER)')
    con.execute("CREATE SCHEMA other")
    con.execute("CREATE TABLE other.pumps (a INTEGER)")

    def found(name):
        return con.execute(sqlgen.render(sqlgen.list_tables_statement(named=name))).fetchall()

    # reference: DuckDB's own duckdb_tables() listing
    assert con.execute("SELECT schema_name, table_name FROM duckdb_tables() ORDER BY 1").fetchall() == [("main", "Meters"), ("other", "pumps")]
    assert found("meters") == [("main", "Meters", "BASE TABLE")]
    assert found("pumps") == []  # another schema than the current one
    con.close()


def test_the_duckdb_transaction_helper_commits_all_or_nothing():
    from tillite.engines import duckdb_transaction

    con = duckdb.connect()
    con.execute("CREATE TABLE t (a INTEGER)")
    with pytest.raises(RuntimeError):
        with duckdb_transaction(con):
            con.execute("INSERT INTO t VALUES (1)")
            raise RuntimeError("midway")
    assert con.execute("SELECT count(*) FROM t").fetchone()[0] == 0
    with duckdb_transaction(con):
        con.execute("INSERT INTO t VALUES (1)")
        con.execute("INSERT INTO t VALUES (2)")
    assert con.execute("SELECT count(*) FROM t").fetchone()[0] == 2
    con.close()


def test_query_rows_gives_the_values_of_the_numpy_columns_and_none_for_null(tmp_path):
    engine = DuckDBEngine(str(tmp_path / "r.duckdb"))
    engine.con.execute("CREATE TABLE r (s VARCHAR, i BIGINT, j INTEGER, d DOUBLE, b BOOLEAN)")
    engine.con.execute("INSERT INTO r VALUES ('a', 1, 2, 0.5, true), (NULL, NULL, NULL, NULL, NULL), ('', -3, 0, 'NaN', false)")
    statement = exp.select("*").from_("r")
    rows = engine.query_rows(statement)
    # reference: DuckDB's fetchnumpy columns (masked where NULL), read value by value
    expected = result_rows(engine.query(statement))
    assert [list(r) for r in rows] == [list(r) for r in expected] == [["s", "i", "j", "d", "b"]] * 3
    for got, want in zip(rows, expected):
        for name in got:
            g, w = got[name], want[name]
            assert type(g) is type(w) and (g == w or (g != g and w != w)), (name, g, w)
    assert rows[1] == dict.fromkeys("sijdb")
    engine.close()
