"""Every statement kind, rendered for every target dialect, and the per-dialect trees.

Reference for parse-back: sqlglot's own parser for that dialect (the text reads
back to a tree that renders to the same text).  Reference for the trees built
for dialects without a DuckDB function: numpy (floor, isfinite) on the same
values, executed in DuckDB.  Real PostgreSQL and Spark runs of these trees are
in test_engines_postgres.py and test_engines_spark.py.
"""

from __future__ import annotations

import re
from dataclasses import replace

import duckdb
import numpy as np
import pytest
import sqlglot
from click.testing import CliRunner
from sqlglot import exp

from tillite import sqlgen
from tillite.cli import main
from tillite.engines import SourceError, engine_kind
from tillite.sqlgen import Assignment, CellMap, Grid, Source

from conftest import write_table

DIALECTS = ("duckdb", "postgres", "spark", "trino", "bigquery", "snowflake")
NAMES = ["litres", "unit price", "select", 'a"b']
GRID = Grid(center=(0.5, -1.0, 2.0, 0.0), inv_scale=(1.0, 2.0, 0.5, 1.0), width=0.5,
            axes=((1.0, 0.2), (0.0, 1.0), (0.5, 0.5), (0.1, -0.3)))
ASSIGN = Assignment(center=(0.0, 0.0, 1.0, 2.0), inv_scale=(1.0, 1.0, 2.0, 0.5), weights=(1.0, 1.0, 0.5, 2.0),
                    centroids=((0.0, 0.0, 0.0, 0.0), (1.0, 1.0, -1.0, 0.5), (2.0, -1.0, 0.0, 1.0)))

#: Cells labelled through the map (packed into one code), and a map too wide to pack (one join column per axis).
CELL_MAP = CellMap(GRID, ((0.0, 1.0), (-2.0, 3.0), (4.0, -1.0)), (-1, 2, -1))
WIDE_CELL_MAP = CellMap(GRID, ((0.0, 1.0), (-3.0e15, 3.0e15)), (-1, 0), unmapped="noise")


def statement_kinds(dialect: str, source: Source) -> dict[str, exp.Expression]:
    """Every statement tillite runs for a segment or label, built for one dialect."""
    labels = sqlgen.label_select(source, NAMES, ["id", *NAMES], ASSIGN, dialect)
    return {
        "describe": sqlgen.describe_statement(source),
        "count": sqlgen.count_statement(source),
        "list tables": sqlgen.list_tables_statement(),
        "current schema": sqlgen.current_schema_statement(),
        "profile sample SYSTEM": sqlgen.sample_statement(source, NAMES, dialect, percent=1.5, method="SYSTEM", limit=50_000),
        "profile sample BERNOULLI": sqlgen.sample_statement(source, NAMES, dialect, percent=0.0075, method="BERNOULLI", limit=50_000),
        "profile whole": sqlgen.sample_statement(source, NAMES, dialect),
        "cells": sqlgen.cells_statement(source, NAMES, GRID, dialect),
        "refine": sqlgen.refine_statement(source, NAMES, ASSIGN, dialect),
        "refine, cell map inline": sqlgen.refine_statement(source, NAMES, ASSIGN, dialect, cell_map=CELL_MAP),
        "refine, cell map held": sqlgen.refine_statement(source, NAMES, ASSIGN, dialect, cell_map=replace(CELL_MAP, table="map rows")),
        "refine, wide cell map": sqlgen.refine_statement(source, NAMES, ASSIGN, dialect, cell_map=WIDE_CELL_MAP),
        "label, cell map inline": sqlgen.label_select(source, NAMES, ["id", *NAMES], ASSIGN, dialect, cell_map=CELL_MAP),
        "label": labels,
        "label view": sqlgen.create_relation_statement("analytics.point segments", labels, False),
        "label table": sqlgen.create_relation_statement("analytics.point segments", labels.copy(), True),
        "temporary label view": sqlgen.temporary_view(sqlgen.create_relation_statement("point segments", labels.copy(), False)),
        "drop view": sqlgen.drop_statement("analytics.point segments", "view"),
        "drop table": sqlgen.drop_statement("analytics.point segments", "table"),
    }


#: Known sqlglot normalisations: the text reads back to an equivalent tree that renders differently.
NORMALISED = {("bigquery", "list tables")}


@pytest.mark.parametrize("dialect", DIALECTS)
def test_every_statement_kind_parses_back_in_every_dialect(dialect):
    for kind, statement in statement_kinds(dialect, Source.of_table(("warehouse", "meter days"))).items():
        text = sqlgen.render(statement, dialect)
        # reference: sqlglot's parser for the dialect reads the text back to the same statement
        back = sqlglot.parse_one(text, read=dialect)
        assert back is not None, kind
        if (dialect, kind) not in NORMALISED:
            assert back.sql(dialect=dialect) == text, f"{dialect} {kind}"
        for name in NAMES:
            assert name in {c.name for c in back.find_all(exp.Column)} | {"*"} or kind in (
                "describe", "count", "list tables", "current schema", "drop view", "drop table"), f"{dialect} {kind}: {name}"


#: Partition column types per dialect, as each engine's describe() names them (PostgreSQL: PG_TYPE_NAMES).
PARTITION_TYPES = {"postgres": ["DATE", "INTEGER"], "spark": ["DATE", "INT"], "bigquery": ["DATE", "INT64"]}


def store_statement_kinds(dialect: str, source: Source) -> dict[str, exp.Expression]:
    """Every statement the summary store runs, built for one dialect."""
    parts = sqlgen.Partitioning.of_columns(["day", "unit price"])
    types = PARTITION_TYPES.get(dialect, ["DATE", "INTEGER"])
    only = parts.filter(types, [["2026-01-03", "7"], ["2026-01-04", None]], dialect)
    where = sqlgen.all_of([sqlgen.equals_all({"store": "meter days"}), sqlgen.in_list("part", ["2026-01-03", "it's"])])
    return {
        "fingerprint": sqlgen.fingerprint_statement(source, NAMES, parts, dialect),
        "create table": sqlgen.create_table_statement("tillite_store_parts", [
            ("store", "VARCHAR"), ("rows", "BIGINT"), ("file_mtime", "DOUBLE"), ("materialized", "BOOLEAN")]),
        "create cells table": sqlgen.create_table_statement("tillite_cells_meter_days", [("part", "VARCHAR"), ("k0", "DOUBLE")], False),
        "insert values": sqlgen.insert_values_statement("tillite_store_parts", [
            ("meter days", 12, 1.5e9, True), ("it's", -3, None, False)]),
        "insert cells": sqlgen.insert_select_statement(
            "tillite_cells_meter_days", sqlgen.cells_statement(source, NAMES, GRID, dialect, parts, where=only)),
        "delete": sqlgen.delete_statement("tillite_store_parts", where),
        "update": sqlgen.update_statement("tillite_stores", {"version": 3, "model": '{"k": 5}', "refreshed_at": None},
                                          sqlgen.equals_all({"store": "meter days", "version": 2})),
        "lock store row": sqlgen.lock_rows_statement("tillite_stores", sqlgen.equals_all({"store": "meter days"}), ["version"], dialect),
        "merged cells": sqlgen.merged_cells_statement("tillite_cells_meter_days", GRID.key_names(), len(NAMES)),
        "partition filter": exp.select(exp.Star()).from_(source.relation()).where(only),
        "drop cells table": sqlgen.drop_statement("tillite_cells_meter_days", "table"),
    }


@pytest.mark.parametrize("dialect", DIALECTS)
def test_every_store_statement_parses_back_in_every_dialect(dialect):
    for kind, statement in store_statement_kinds(dialect, Source.of_table(("warehouse", "meter days"))).items():
        text = sqlgen.render(statement, dialect)
        # reference: sqlglot's parser for the dialect reads the text back to the same statement
        back = sqlglot.parse_one(text, read=dialect)
        assert back is not None and back.sql(dialect=dialect) == text, f"{dialect} {kind}"
        if kind in ("fingerprint", "insert cells", "partition filter"):
            assert {"day", "unit price"} <= {c.name for c in back.find_all(exp.Column)}, f"{dialect} {kind}"


#: The per-dialect fingerprint pieces: the 64-bit row hash, the exact type it is summed in, the text it is returned as.
FINGERPRINT_FORMS = {
    "duckdb": ('CAST(SUM(HASH("litres", "unit price", "select", "a""b")) AS TEXT)',),
    "postgres": ("CAST(SUM(HASHTEXTEXTENDED(COALESCE(CAST(\"litres\" AS VARCHAR), '~') || '|' || ", ", 0)) AS VARCHAR)"),
    "spark": ("CAST(SUM(CAST(XXHASH64(`litres` IS NULL, `litres`, `unit price` IS NULL, `unit price`, ", "AS DECIMAL(38, 0))) AS STRING)"),
    "trino": ("CAST(SUM(CAST(FROM_BIG_ENDIAN_64(XXHASH64(TO_UTF8(COALESCE(CAST(\"litres\" AS VARCHAR), '~') || '|' || ",
              "AS DECIMAL(38, 0))) AS VARCHAR)"),
    "bigquery": ("CAST(SUM(CAST(FARM_FINGERPRINT(TO_JSON_STRING(STRUCT(`litres`, `unit price`, `select`, `a\"b`))) AS BIGNUMERIC)) AS STRING)",),
    "snowflake": ('CAST(SUM(CAST(HASH("litres", "unit price", "select", "a""b") AS DECIMAL(38, 0))) AS VARCHAR)',),
}


@pytest.mark.parametrize("dialect", DIALECTS)
def test_fingerprint_hash_is_built_per_dialect_and_summed_without_overflow(dialect):
    text = sqlgen.render(sqlgen.fingerprint_statement(Source.of_table("t"), NAMES, sqlgen.Partitioning.of_columns(["day"]), dialect), dialect)
    # reference: the engines' documented functions, from memory: DuckDB hash (UBIGINT, SUM -> HUGEINT);
    # PostgreSQL hashtextextended (bigint, SUM -> numeric); Spark xxhash64 (skips NULL arguments);
    # Trino xxhash64(varbinary) and from_big_endian_64; BigQuery farm_fingerprint (INT64, SUM overflows);
    # Snowflake HASH (never NULL, NULL hashed as a value); Spark, Trino and BigQuery SUM of 64-bit integers overflow
    for piece in FINGERPRINT_FORMS[dialect]:
        assert piece in text, f"{dialect}: {piece}"


def test_fingerprint_is_refused_by_name_for_a_dialect_without_a_row_hash():
    with pytest.raises(NotImplementedError, match="not built for the mysql dialect; built for duckdb, postgres"):
        sqlgen.fingerprint_statement(Source.of_table("t"), ["a"], sqlgen.Partitioning.of_columns(["day"]), "mysql")


def test_row_text_tells_null_from_values_and_keeps_column_boundaries():
    rows = [(None, 1.5), (1.5, None), (None, None), (1.0, 15.0), (11.0, 5.0), (115.0, None), (None, 115.0),
            (float("nan"), 1.0), (float("inf"), None), (0.30000000000000004, 0.0), (0.3, 0.0), (-0.5, 2.0)]
    values = exp.Values(
        expressions=[exp.Tuple(expressions=[sqlgen.literal(v) if v is None or np.isfinite(v) else
                                            exp.cast(exp.Literal.string(str(v)), "DOUBLE") for v in r]) for r in rows],
        alias=exp.TableAlias(this=exp.to_identifier("r"), columns=[exp.to_identifier("a"), exp.to_identifier("b")]),
    )
    stmt = exp.select(exp.alias_(sqlgen.row_text(["a", "b"]), "t")).from_(values)
    got = [r[0] for r in duckdb.connect().execute(sqlgen.render(stmt, "duckdb")).fetchall()]
    # reference: the rows are pairwise distinct (Python's set), so their texts must be too; DuckDB runs the
    # tree PostgreSQL and Trino hash, and prints a double with the shortest digits that read back exactly
    assert len(set(rows)) == len(rows) and len(set(got)) == len(rows)
    assert got[0] == "~|1.5" and got[1] == "1.5|~"


def test_postgres_describe_type_names_parse_for_the_partition_filter():
    from tillite.engines import PG_TYPE_NAMES

    filt = sqlgen.Partitioning.of_columns(["p"])
    for name in PG_TYPE_NAMES.values():
        text = sqlgen.render(exp.select(exp.Star()).from_("t").where(filt.filter([name], [["1"]], "postgres")), "postgres")
        # reference: sqlglot's PostgreSQL parser reads each type name PostgresEngine.describe() gives
        assert sqlglot.parse_one(text, read="postgres").sql("postgres") == text, name


@pytest.mark.parametrize("dialect", ["duckdb", "spark"])
def test_file_sources_render_as_each_engine_reads_files(dialect):
    src = Source.of_files("/data/meter days/*.parquet", "parquet")
    for kind, statement in statement_kinds(dialect, src).items():
        text = sqlgen.render(statement, dialect)
        assert sqlglot.parse_one(text, read=dialect) is not None, kind
    count = sqlgen.render(sqlgen.count_statement(src), dialect)
    expected = "READ_PARQUET('/data/meter days/*.parquet')" if dialect == "duckdb" else "parquet.`/data/meter days/*.parquet`"
    assert expected in count


def test_spark_refuses_csv_and_several_paths_with_a_reason():
    with pytest.raises(ValueError, match="Parquet"):
        sqlgen.render(sqlgen.count_statement(Source.of_files("x.csv", "csv")), "spark")
    with pytest.raises(ValueError, match="one path"):
        sqlgen.render(sqlgen.count_statement(Source.of_files(["a.parquet", "b.parquet"], "parquet")), "spark")


def test_tablesample_forms_per_dialect():
    src = Source.of_table("t")

    def sample(dialect: str, method: str, percent: float = 1.5) -> str:
        return sqlgen.render(sqlgen.sample_statement(src, ["a"], dialect, percent=percent, method=method), dialect)

    # reference: the engines' documented grammars (PostgreSQL, Trino: TABLESAMPLE SYSTEM|BERNOULLI (p);
    # Spark SQL: TABLESAMPLE (p PERCENT) with a decimal literal; BigQuery: TABLESAMPLE SYSTEM (p PERCENT))
    assert "TABLESAMPLE SYSTEM (1.5e+00)" in sample("postgres", "SYSTEM")
    assert "TABLESAMPLE BERNOULLI (1.5e+00)" in sample("postgres", "BERNOULLI")
    assert "TABLESAMPLE BERNOULLI (1.5e+00)" in sample("trino", "BERNOULLI")
    assert "TABLESAMPLE (1.5 PERCENT)" in sample("spark", "SYSTEM")
    assert "TABLESAMPLE (0.0075 PERCENT)" in sample("spark", "BERNOULLI", 0.0075)
    assert not re.search(r"PERCENT\)", sample("postgres", "SYSTEM"))
    assert "TABLESAMPLE SYSTEM (1.5e+00 PERCENT)" in sample("bigquery", "BERNOULLI")


def test_spark_cells_avoid_floor_and_others_keep_it():
    src = Source.of_table("t")
    for dialect in DIALECTS:
        text = sqlgen.render(sqlgen.cells_statement(src, NAMES, GRID, dialect), dialect)
        # Spark's FLOOR returns BIGINT (overflow for far outliers); everywhere else FLOOR of a double is a double
        assert ("FLOOR(" in text) == (dialect != "spark"), dialect


def test_finiteness_test_is_isfinite_only_in_duckdb():
    e = sqlgen.col("x")
    assert sqlgen.render(sqlgen.is_finite(e, "duckdb"), "duckdb") == 'ISFINITE("x")'
    for dialect in ("postgres", "spark", "trino", "bigquery", "snowflake"):
        assert "ISFINITE" not in sqlgen.render(sqlgen.is_finite(e, dialect), dialect).upper()


SPECIAL = [-2.5, -1e-20, -0.0, 0.0, 2.5, 1e300, -1e300, 2.0**53 + 2, -(2.0**52) - 0.5, 7.0, -7.0, 0.9999999999999999, -5e-324]


def test_floor_built_for_spark_equals_numpy_floor():
    stmt = exp.select(*[exp.alias_(sqlgen.floor_of(sqlgen.num(v), "spark"), f"f{i}") for i, v in enumerate(SPECIAL)])
    got = duckdb.connect().execute(sqlgen.render(stmt, "duckdb")).fetchone()
    # reference: numpy.floor; DuckDB's % on doubles is the C fmod that Spark's (Java's) % also is
    assert list(got) == [float(np.floor(v)) for v in SPECIAL]


def test_generic_finiteness_test_equals_numpy_isfinite():
    values = ["1.5", "NaN", "Infinity", "-Infinity", "1e308"]
    stmt = exp.select(*[exp.alias_(sqlgen.is_finite(exp.cast(exp.Literal.string(v), "DOUBLE"), "postgres"), f"f{i}")
                        for i, v in enumerate(values)], exp.alias_(sqlgen.is_finite(exp.cast(exp.Null(), "DOUBLE"), "postgres"), "null"))
    got = duckdb.connect().execute(sqlgen.render(stmt, "duckdb")).fetchone()
    # reference: numpy.isfinite; NULL stays NULL
    assert list(got[:-1]) == [bool(np.isfinite(float(v))) for v in values]
    assert got[-1] is None


def test_temporary_view_says_temporary_in_spark():
    create = sqlgen.create_relation_statement("labels", sqlgen.count_statement(Source.of_table("t")), False)
    assert sqlgen.render(sqlgen.temporary_view(create), "spark").startswith("CREATE OR REPLACE TEMPORARY VIEW `labels`")
    assert "TEMPORARY" not in sqlgen.render(create, "spark")


def test_tables_are_created_without_or_replace_everywhere():
    create = sqlgen.create_relation_statement("labels", sqlgen.count_statement(Source.of_table("t")), True)
    for dialect in DIALECTS:
        # PostgreSQL and Spark's session catalog have no CREATE OR REPLACE TABLE: the pipeline drops first
        assert sqlgen.render(create, dialect).startswith("CREATE TABLE"), dialect


@pytest.mark.parametrize(("location", "engine", "kind"), [
    ("postgresql://me@db.example/warehouse", None, "postgres"),
    ("postgres://me@/warehouse?host=/run/postgresql", "auto", "postgres"),
    ("host=/tmp dbname=warehouse", "postgres", "postgres"),
    ("spark://master:7077", None, "spark"),
    ("local[2]", None, "spark"),
    ("local[*]", None, "spark"),
    ("yarn", None, "spark"),
    ("data/meter_days.parquet", "spark", "spark"),
    ("data/meter_days.parquet", None, "duckdb"),
    ("tillite-demo.duckdb", None, "duckdb"),
    ("local.duckdb", None, "duckdb"),
])
def test_engine_is_told_from_the_source_or_the_option(location, engine, kind):
    assert engine_kind(location, engine) == kind


def test_unknown_engine_is_refused_by_name():
    with pytest.raises(SourceError, match="unknown engine 'oracle'"):
        engine_kind("x", "oracle")


@pytest.mark.parametrize("dialect", DIALECTS)
def test_cli_sql_prints_every_stage_in_every_dialect(tmp_path, dialect):
    rng = np.random.default_rng(0)
    db = write_table(tmp_path / "t.duckdb", "meter days", {"litres": rng.normal(size=500), "unit price": rng.normal(size=500)})
    runner = CliRunner()
    model = tmp_path / "m.json"
    done = runner.invoke(main, ["segment", str(db), "--table", "meter days", "--columns", "litres,unit price", "--k", "2",
                                "--out", str(model), "--quiet"])
    assert done.exit_code == 0, done.output
    for stage in ("profile", "cells", "refine", "label"):
        done = runner.invoke(main, ["sql", str(db), "--table", "meter days", "--model", str(model), "--stage", stage,
                                    "--dialect", dialect])
        assert done.exit_code == 0, done.output
        statements = [s for s in done.output.split(";\n") if s.strip()]
        # reference: sqlglot's parser for the dialect
        assert statements and all(sqlglot.parse_one(s, read=dialect) is not None for s in statements), stage


def test_seeded_profile_sample_repeats_in_each_engines_own_form():
    src = Source.of_table("t")

    def sample(dialect: str, method: str) -> str:
        return sqlgen.render(sqlgen.sample_statement(src, ["a"], dialect, percent=1.5, method=method, seed=42), dialect)

    # reference: the engines' documented grammars (DuckDB and PostgreSQL: TABLESAMPLE ... REPEATABLE (seed);
    # Spark SQL's REPEATABLE is not what sqlglot renders, so a rand(seed) filter, seeded per partition)
    assert "TABLESAMPLE BERNOULLI (1.5e+00 PERCENT) REPEATABLE (42)" in sample("duckdb", "BERNOULLI")
    assert "TABLESAMPLE SYSTEM (1.5e+00) REPEATABLE (42)" in sample("postgres", "SYSTEM")
    spark = sample("spark", "SYSTEM")
    assert "TABLESAMPLE" not in spark and "RAND(42) < 1.5e-02" in spark
    assert "42" not in sample("trino", "BERNOULLI")  # no seed where the engine cannot repeat a sample
    assert sqlgen.sample_repeats("duckdb") == sqlgen.sample_repeats("postgres") == "yes"
    assert sqlgen.sample_repeats("trino") == "no"
    for dialect in ("duckdb", "postgres", "spark"):
        sqlglot.parse_one(sample(dialect, "BERNOULLI"), read=dialect)


def test_duckdb_float_sums_are_compensated_and_others_plain():
    grid = GRID
    duck = sqlgen.render(sqlgen.cells_statement(Source.of_table("t"), NAMES, grid, "duckdb"), "duckdb")
    pg = sqlgen.render(sqlgen.cells_statement(Source.of_table("t"), NAMES, grid, "postgres"), "postgres")
    assert "FSUM(" in duck and "FSUM(" not in pg and "SUM(" in pg
