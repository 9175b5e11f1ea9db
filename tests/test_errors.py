"""One error family: every engine wraps its driver's errors, old import paths name the same classes,
the store tells a lost race by the error's class (not its words), and API messages name parameters
while the command line names options."""

from __future__ import annotations

import re
from types import SimpleNamespace

import duckdb
import numpy as np
import pytest
from click.testing import CliRunner
from sqlglot import exp

from tillite import errors, sqlgen
from tillite import store as S
from tillite.cli import main
from tillite.targets import DuckDB
from tillite.engines import DuckDBEngine, PostgresEngine
from tillite.errors import EngineError, ParameterError, StoreBusy, StoreError, StoreExists, TransactionConflict
from tillite.pipeline import check_may_replace

from conftest import write_table


def test_error_classes_keep_their_old_import_paths():
    from tillite import engines, macros, model, naming

    assert engines.SourceError is errors.SourceError and engines.DatabaseLocked is errors.DatabaseLocked
    assert engines.EngineError is errors.EngineError and engines.MissingExtraError is errors.MissingExtraError
    assert engines.TilliteError is errors.TilliteError
    assert model.ModelError is errors.ModelError and macros.MacroError is errors.MacroError
    assert naming.NamingError is errors.NamingError
    assert S.StoreError is errors.StoreError and S.StoreBusy is errors.StoreBusy
    for name in errors.__all__:
        assert issubclass(getattr(errors, name), errors.TilliteError), name


def test_errors_module_imports_no_driver():
    import subprocess
    import sys

    code = "import sys, tillite.errors; print(sorted(m for m in ('duckdb', 'psycopg', 'pyspark', 'numpy', 'sqlglot') if m in sys.modules))"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout.strip()
    assert out == "[]"


def test_a_duckdb_error_arrives_as_engine_error():
    engine = DuckDBEngine(":memory:")
    try:
        with pytest.raises(EngineError, match="^database error: .*nope") as caught:
            engine.query(exp.select("*").from_("nope"))
        assert not isinstance(caught.value, duckdb.Error) and not isinstance(caught.value, TransactionConflict)
        with pytest.raises(EngineError, match="database error"):
            engine.execute(sqlglot_statement("INSERT INTO nope VALUES (1)"))
    finally:
        engine.close()


def sqlglot_statement(sql: str) -> exp.Expression:
    import sqlglot

    return sqlglot.parse_one(sql, dialect="duckdb")


def second_connection(first: DuckDBEngine) -> DuckDBEngine:
    """Another connection to the same in-memory database (a cursor), as a DuckDBEngine."""
    other = DuckDBEngine.__new__(DuckDBEngine)
    other.path, other.read_only, other.dialect = first.path, False, "duckdb"
    other.bytes_fetched = other.rows_fetched = 0
    other._duckdb = duckdb
    other.con = first.con.cursor()
    return other


def test_a_duckdb_write_write_conflict_arrives_as_transaction_conflict():
    first = DuckDBEngine(":memory:")
    first.execute(sqlglot_statement("CREATE TABLE t (a INTEGER)"))
    first.execute(sqlglot_statement("INSERT INTO t VALUES (1)"))
    second = second_connection(first)
    update = sqlgen.update_statement("t", {"a": 2}, sqlgen.equals_all({"a": 1}))
    with first.transaction():
        first.execute(update)
        with pytest.raises(TransactionConflict, match="database error"):
            with second.transaction():
                second.execute(update)
    # the second transaction rolled back, the first committed
    assert first.query(exp.select("a").from_("t"))["a"].tolist() == [2]
    first.close()


class RaisingEngine:
    """An engine whose every query raises ``err`` (to drive store._claim)."""

    dialect = "duckdb"
    target = DuckDB()

    def __init__(self, err: Exception) -> None:
        self.err = err

    def query(self, statement):
        raise self.err

    def execute(self, statement):
        raise self.err


def test_store_busy_comes_from_the_error_class_not_its_words():
    info = SimpleNamespace(name="meters", version=1)
    # a lost race whose message holds neither "conflict" nor "lock" is still a busy store
    with pytest.raises(StoreBusy, match="changed by another refresh"):
        S._claim(RaisingEngine(TransactionConflict("database error: could not serialize access")), info)
    # other database errors pass through, whatever words they hold
    with pytest.raises(EngineError, match="lock file conflict") as caught:
        S._claim(RaisingEngine(EngineError("database error: lock file conflict")), info)
    assert not isinstance(caught.value, StoreBusy)


def test_store_source_matches_no_words_of_driver_messages():
    import inspect

    text = inspect.getsource(S).lower()
    assert '"conflict"' not in text and '"lock"' not in text


# ----------------------------------------------------------------------------- parameter names


def test_replace_messages_name_the_parameter_in_the_api_and_the_option_in_the_cli():
    from tillite.cli import cli_message

    with pytest.raises(ParameterError) as caught:
        check_may_replace("labels", "table", None)
    assert "replace=True overwrites it" in str(caught.value)
    assert cli_message(caught.value) == "a table named labels already exists and was not made by tillite; --replace overwrites it"
    with pytest.raises(ParameterError) as caught:
        check_may_replace("labels", "view", "made by tillite: labels of store meters", store=None)
    assert "(replace=True takes it over)" in str(caught.value) and "(--replace takes it over)" in cli_message(caught.value)
    # a command whose option for the parameter is another one
    assert cli_message(caught.value, {"replace": "--regrid"}).endswith("(--regrid takes it over)")


@pytest.fixture
def four_days_db(tmp_path):
    rng = np.random.default_rng(5)
    data = {"a": rng.normal(size=400), "b": rng.normal(size=400), "day": np.repeat(np.arange(4), 100)}
    return write_table(tmp_path / "small.duckdb", "pts", data)


def test_building_a_store_twice_names_replace_in_the_api_and_regrid_in_the_cli(four_days_db):
    args = ["store", "build", str(four_days_db), "-t", "pts", "-c", "a,b", "--partition-by", "day", "--k", "2", "-q"]
    assert CliRunner().invoke(main, args).exit_code == 0
    res = CliRunner().invoke(main, args)
    assert res.exit_code == 1 and "Traceback" not in res.output
    lines = [ln for ln in res.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1 and lines[0] == "Error: store pts already exists; refresh it, or rebuild with --regrid", lines
    engine = DuckDBEngine(str(four_days_db))
    try:
        from tillite.pipeline import Settings
        from tillite.sqlgen import Source

        with pytest.raises(StoreExists) as caught:
            S.build(engine, Source.of_table("pts"), ["a", "b"], S.PartitionSpec(("day",)), Settings(k=2))
        assert isinstance(caught.value, StoreError)
        assert str(caught.value) == "store pts already exists; refresh it, or rebuild with replace=True"
    finally:
        engine.close()


# ----------------------------------------------------------------------------- PostgreSQL


def test_a_postgres_lock_held_elsewhere_arrives_as_transaction_conflict(server):
    """FOR UPDATE NOWAIT on a row another transaction locked: SQLSTATE 55P03 (PostgreSQL manual,
    Appendix A, lock_not_available), wrapped as TransactionConflict; other errors as EngineError."""
    import psycopg

    with psycopg.connect(server.conninfo, autocommit=True) as con:
        con.execute("DROP TABLE IF EXISTS error_rows")
        con.execute("CREATE TABLE error_rows (store TEXT, version INTEGER)")
        con.execute("INSERT INTO error_rows VALUES ('s', 1)")
    first, second = PostgresEngine(server.conninfo), PostgresEngine(server.conninfo)
    lock = sqlgen.lock_rows_statement("error_rows", sqlgen.equals_all({"store": "s"}), ["version"], "postgres")
    try:
        with first.transaction():
            first.query(lock)
            with pytest.raises(TransactionConflict) as caught:
                with second.transaction():
                    second.query(lock)
        assert caught.value.sqlstate == "55P03"
        with pytest.raises(EngineError) as plain:
            second.query(exp.select("*").from_("no_such_table"))
        assert not isinstance(plain.value, TransactionConflict) and plain.value.sqlstate == "42P01"
    finally:
        first.close()
        second.close()


def test_the_demo_build_on_a_damaged_database_gives_one_line_naming_the_file_and_the_database_error(tmp_path):
    """A file with DuckDB's header magic but damaged blocks gets past the demo's own check of the header, so its
    error is DuckDB's, wrapped by engines.duckdb_errors (never a duckdb.Error) and said with the file's name.
    (A file that is not DuckDB at all is refused before DuckDB opens it: tests/test_outputs.py.)"""
    from tillite.demo import build_demo_database

    bogus = tmp_path / "notes.duckdb"
    bogus.write_bytes(b"\0" * 8 + b"DUCK" + b"not a database\n" * 400)  # DuckDB's magic after the 8-byte checksum
    with pytest.raises(EngineError, match=f"^demo database {re.escape(str(bogus))}: database error: ") as caught:
        build_demo_database(bogus, rows=1_000, days=10)
    assert not isinstance(caught.value, duckdb.Error)
    res = CliRunner().invoke(main, ["demo", "--db", str(bogus), "--rebuild", "--rows", "1000", "-q"])
    assert res.exit_code == 1 and "Traceback" not in res.output, res.output
    lines = [ln for ln in res.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1 and lines[0].startswith(f"Error: demo database {bogus}: database error: "), lines


def test_refresh_limits_name_parameters_in_the_api_and_options_in_the_cli(four_days_db):
    """The API says partitions/where; the CLI says --partitions/--where (its one-line errors are pinned in test_store.py)."""
    from tillite.cli import cli_message
    from tillite.pipeline import Settings
    from tillite.sqlgen import Source

    engine = DuckDBEngine(str(four_days_db))
    try:
        S.build(engine, Source.of_table("pts"), ["a", "b"], S.PartitionSpec(("day",)), Settings(k=2))
        with pytest.raises(ParameterError) as caught:
            S.refresh(engine, "pts", partitions=["day=1"], where="day = 2")
        assert str(caught.value) == "give partitions or where, not both"
        assert cli_message(caught.value) == "give --partitions or --where, not both"
        with pytest.raises(ParameterError) as caught:
            S.build(engine, Source.of_table("pts"), ["a", "b"], S.PartitionSpec(()), Settings(k=2), store="other")
        assert "(partition)" in str(caught.value) and "(--partition-by)" in cli_message(caught.value)
    finally:
        engine.close()
