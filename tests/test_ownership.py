"""tillite replaces or drops only what it made: labels, store label views, macros (DuckDB, through the CLI).

Each case puts a user-made table, view or macro where tillite would write, and
checks that it is refused in one error line (or skipped with one warning) and
that the user's object is unchanged, compared with DuckDB's own catalog and
row hashes read directly.
"""

from __future__ import annotations

from pathlib import Path

import duckdb
import numpy as np
import pytest
from sklearn.datasets import make_blobs

from tillite.demo import DEMO_COLUMNS, build_demo_database
from tillite.pipeline import OWNED_MARK

from conftest import assert_one_error_line, columns_of, fetch_rows, run_cli, write_table

NAMES = ["a", "b"]


def catalog_entry(path: Path, name: str) -> list[tuple]:
    """DuckDB's own record of a relation: kind, definition (views) and comment."""
    return fetch_rows(path, f"""
        SELECT 'view', sql, comment FROM duckdb_views() WHERE view_name = '{name}'
        UNION ALL SELECT 'table', sql, comment FROM duckdb_tables() WHERE table_name = '{name}'""", read_only=True)


def contents(path: Path, name: str) -> list[tuple]:
    return fetch_rows(path, f'SELECT count(*), sum(hash(COLUMNS(*))) FROM "{name}"', read_only=True)


@pytest.fixture
def points_and_model(tmp_path):
    x, _ = make_blobs(n_samples=3_000, centers=3, n_features=2, random_state=4)
    path = write_table(tmp_path / "pts.duckdb", "points", columns_of(x, NAMES))
    model = tmp_path / "pts.model.json"
    assert run_cli("segment", path, "-t", "points", "-c", "a,b", "--k", "3", "-o", model, "-q").exit_code == 0
    return path, model


# ----------------------------------------------------------------------------- label --into


@pytest.mark.parametrize("materialize", [[], ["--materialize"]])
def test_label_refuses_a_users_table_of_that_name_without_replace(points_and_model, materialize):
    path, model = points_and_model
    fetch_rows(path, 'CREATE TABLE "mine" AS SELECT 42 AS answer')
    before = catalog_entry(path, "mine"), contents(path, "mine")
    result = run_cli("label", path, "-t", "points", "-m", model, "--into", "mine", *materialize)
    assert_one_error_line(result, "table named mine", "not made by tillite", "--replace")
    assert (catalog_entry(path, "mine"), contents(path, "mine")) == before


@pytest.mark.parametrize("materialize", [[], ["--materialize"]])
def test_label_refuses_a_users_view_of_that_name_without_replace(points_and_model, materialize):
    path, model = points_and_model
    fetch_rows(path, 'CREATE VIEW "mine" AS SELECT 42 AS answer')
    before = catalog_entry(path, "mine")
    result = run_cli("label", path, "-t", "points", "-m", model, "--into", "mine", *materialize)
    assert_one_error_line(result, "view named mine", "not made by tillite", "--replace")
    assert catalog_entry(path, "mine") == before  # still the user's view, same definition, no table


def test_replace_takes_over_a_users_view_and_marks_it_as_tillites(points_and_model):
    path, model = points_and_model
    fetch_rows(path, 'CREATE VIEW "mine" AS SELECT 42 AS answer')
    result = run_cli("label", path, "-t", "points", "-m", model, "--into", "mine", "--materialize", "--replace", "-q")
    assert result.exit_code == 0, result.output
    (kind, _, comment), = catalog_entry(path, "mine")
    assert kind == "table" and comment.startswith(OWNED_MARK)


def test_a_view_tillite_made_is_re_created_without_replace(points_and_model):
    path, model = points_and_model
    for _ in range(2):
        result = run_cli("label", path, "-t", "points", "-m", model, "--into", "labelled", "-q")
        assert result.exit_code == 0, result.output
    (kind, _, comment), = catalog_entry(path, "labelled")
    assert kind == "view" and comment.startswith(OWNED_MARK)
    # a view tillite made may also become a table without --replace
    result = run_cli("label", path, "-t", "points", "-m", model, "--into", "labelled", "--materialize", "-q")
    assert result.exit_code == 0, result.output
    assert catalog_entry(path, "labelled")[0][0] == "table"


# ----------------------------------------------------------------------------- a label view's cell map table


@pytest.fixture
def outliers_and_model(tmp_path):
    """Blobs with far points and a small --tree-budget: the model has an outlier group, labelled through a cell map."""
    x, _ = make_blobs(n_samples=6_000, centers=3, n_features=2, random_state=4)
    far = np.random.default_rng(1).uniform(40, 60, size=(20, 2))
    path = write_table(tmp_path / "far.duckdb", "points", columns_of(np.vstack([x, far]), NAMES))
    model = tmp_path / "far.model.json"
    res = run_cli("segment", path, "-t", "points", "-c", "a,b", "--k", "3", "--tree-budget", "150", "-o", model, "-q")
    assert res.exit_code == 0, res.output
    return path, model


def test_a_label_view_keeps_its_cell_map_in_a_marked_table_dropped_when_no_longer_needed(outliers_and_model, points_and_model):
    path, model = outliers_and_model
    for _ in range(2):  # made, then replaced without --replace: both are tillite's
        result = run_cli("label", path, "-t", "points", "-m", model, "--into", "labelled", "-q")
        assert result.exit_code == 0, result.output
        (kind, _, comment), = catalog_entry(path, "tillite_cellmap_labelled")
        assert kind == "table" and comment.startswith(OWNED_MARK)
        assert (catalog_entry(path, "labelled")[0][0]) == "view"
    # reference: DuckDB's own catalog; a labels table joins the map held for the run only
    assert run_cli("label", path, "-t", "points", "-m", model, "--into", "labelled", "--materialize", "-q").exit_code == 0
    assert catalog_entry(path, "tillite_cellmap_labelled") == []
    assert run_cli("label", path, "-t", "points", "-m", model, "--into", "labelled", "--replace", "-q").exit_code == 0
    assert catalog_entry(path, "tillite_cellmap_labelled")[0][0] == "table"
    plain = points_and_model[1]  # a model labelling every row by its nearest centroid: no map table
    assert run_cli("label", path, "-t", "points", "-m", plain, "--into", "labelled", "-q").exit_code == 0
    assert catalog_entry(path, "tillite_cellmap_labelled") == []
    assert catalog_entry(path, "labelled")[0][0] == "view"


@pytest.mark.parametrize("kind", ["TABLE", "VIEW"])
def test_a_label_view_refuses_a_users_object_in_place_of_its_cell_map_table(outliers_and_model, points_and_model, kind):
    path, model = outliers_and_model
    fetch_rows(path, f'CREATE {kind} "tillite_cellmap_labelled" AS SELECT 42 AS answer')
    before = catalog_entry(path, "tillite_cellmap_labelled"), contents(path, "tillite_cellmap_labelled")
    for replace in ([], ["--replace"]):
        result = run_cli("label", path, "-t", "points", "-m", model, "--into", "labelled", *replace)
        assert_one_error_line(result, "--into labelled", "tillite_cellmap_labelled", "did not make")
        assert catalog_entry(path, "labelled") == []
    # a model that needs no map labels beside it and leaves the user's object alone
    assert run_cli("label", path, "-t", "points", "-m", points_and_model[1], "--into", "labelled", "-q").exit_code == 0
    assert (catalog_entry(path, "tillite_cellmap_labelled"), contents(path, "tillite_cellmap_labelled")) == before


# ----------------------------------------------------------------------------- store label views and refresh


@pytest.fixture
def demo_store_and_model(tmp_path):
    path = tmp_path / "water.duckdb"
    build_demo_database(path, rows=12_000, days=6, seed=3)
    cols = ",".join(DEMO_COLUMNS)
    assert run_cli("store", "build", path, "-t", "meter_days", "-c", cols, "--partition-by", "day", "--k", "4", "-q").exit_code == 0
    assert run_cli("label", path, "--store", "meter_days", "--into", "water_labels", "-q").exit_code == 0
    model = tmp_path / "water.model.json"
    assert run_cli("segment", path, "-t", "meter_days", "-c", cols, "--k", "4", "-o", model, "-q").exit_code == 0
    return path, model


def test_materializing_over_a_stores_label_view_is_refused_naming_the_store(demo_store_and_model):
    path, model = demo_store_and_model
    before = catalog_entry(path, "water_labels")
    result = run_cli("label", path, "-t", "meter_days", "-m", model, "--into", "water_labels", "--materialize")
    assert_one_error_line(result, "water_labels", "store meter_days", "--store meter_days", "--replace")
    assert catalog_entry(path, "water_labels") == before
    # the store itself may turn its own labels into a table, and its refresh keeps them a table
    assert run_cli("label", path, "--store", "meter_days", "--into", "water_labels", "--materialize", "-q").exit_code == 0
    result = run_cli("refresh", path, "--store", "meter_days", "--force", "-q")
    assert result.exit_code == 0, result.output
    assert catalog_entry(path, "water_labels")[0][0] == "table"


def test_refresh_warns_once_and_skips_a_label_taken_over_with_replace(demo_store_and_model):
    path, model = demo_store_and_model
    result = run_cli("label", path, "-t", "meter_days", "-m", model, "--into", "water_labels", "--materialize", "--replace", "-q")
    assert result.exit_code == 0, result.output
    before = catalog_entry(path, "water_labels"), contents(path, "water_labels")
    result = run_cli("refresh", path, "--store", "meter_days", "--force", "-q")
    assert result.exit_code == 0, result.output
    warned = [ln for ln in result.stderr.splitlines() if ln.startswith("warning:")]
    assert len(warned) == 1 and "water_labels" in warned[0] and "not re-created" in warned[0], result.stderr
    assert (catalog_entry(path, "water_labels"), contents(path, "water_labels")) == before  # a table still, untouched


@pytest.mark.parametrize("user_object", ['CREATE VIEW "water_labels" AS SELECT 1 AS one',
                                         'CREATE TABLE "water_labels" AS SELECT 1 AS one'])
def test_refresh_never_drops_a_users_object_in_place_of_a_registered_label(demo_store_and_model, user_object):
    path, _ = demo_store_and_model
    fetch_rows(path, 'DROP VIEW "water_labels"')
    fetch_rows(path, user_object)
    before = catalog_entry(path, "water_labels"), contents(path, "water_labels")
    result = run_cli("refresh", path, "--store", "meter_days", "--force", "-q")
    assert result.exit_code == 0, result.output
    assert sum(ln.startswith("warning:") and "water_labels" in ln for ln in result.stderr.splitlines()) == 1, result.stderr
    assert (catalog_entry(path, "water_labels"), contents(path, "water_labels")) == before


def test_refresh_re_creates_a_registered_label_that_was_dropped(demo_store_and_model):
    path, _ = demo_store_and_model
    fetch_rows(path, 'DROP VIEW "water_labels"')
    result = run_cli("refresh", path, "--store", "meter_days", "--force", "-q")
    assert result.exit_code == 0 and "warning" not in result.stderr, result.output
    assert catalog_entry(path, "water_labels")[0][0] == "view"


# ----------------------------------------------------------------------------- macros


def macro_text(path: Path, name: str) -> list[tuple]:
    """DuckDB's own record of a macro: its definition and comment."""
    return fetch_rows(path, f"SELECT macro_definition, comment FROM duckdb_functions() WHERE function_name = '{name}'", read_only=True)


def test_macros_install_refuses_a_users_macro_of_that_name_and_remove_leaves_it(points_and_model):
    path, model = points_and_model
    fetch_rows(path, 'CREATE MACRO "water_segment"(a, b) AS a + b')
    before = macro_text(path, "water_segment")
    result = run_cli("macros", "install", path, "--model", model, "--name", "water")
    assert_one_error_line(result, "water_segment", "not installed by tillite", "--replace")
    assert macro_text(path, "water_segment") == before
    assert macro_text(path, "water_distance") == []  # all or nothing: the other macro is not installed either
    result = run_cli("macros", "remove", path)
    assert result.exit_code == 0, result.output
    assert macro_text(path, "water_segment") == before


def test_macros_remove_skips_a_macro_a_user_put_in_place_of_ours(points_and_model):
    path, model = points_and_model
    assert run_cli("macros", "install", path, "--model", model, "--name", "water").exit_code == 0
    fetch_rows(path, 'CREATE OR REPLACE MACRO "water_segment"(a, b) AS a * b')
    before = macro_text(path, "water_segment")
    result = run_cli("macros", "remove", path, "--name", "water")
    assert result.exit_code == 0, result.output
    assert macro_text(path, "water_segment") == before
    assert macro_text(path, "water_distance") == []
    assert sum(ln.startswith("warning:") and "water_segment" in ln for ln in result.stderr.splitlines()) == 1, result.stderr


def test_macros_install_replace_takes_over_a_users_macro_and_remove_then_drops_it(points_and_model):
    path, model = points_and_model
    fetch_rows(path, 'CREATE MACRO "water_segment"(a, b) AS a + b')
    result = run_cli("macros", "install", path, "--model", model, "--name", "water", "--replace")
    assert result.exit_code == 0, result.output
    x = np.array([[0.0, 0.0]])
    assert fetch_rows(path, f"SELECT water_segment({x[0, 0]}, {x[0, 1]})")[0][0] in (0, 1, 2)
    assert run_cli("macros", "remove", path, "--name", "water").exit_code == 0
    assert macro_text(path, "water_segment") == []


# ----------------------------------------------------------------------------- the mark's SQL


@pytest.mark.parametrize("dialect", ["duckdb", "postgres", "spark"])
@pytest.mark.parametrize("kind", ["view", "table"])
def test_mark_statement_renders_and_parses_back_with_the_name_quoted(dialect, kind):
    import sqlglot

    from tillite import sqlgen

    tree = sqlgen.mark_statement('odd "name".labels', kind, "made by tillite: labels of store it's", dialect)
    text = sqlgen.render(tree, dialect)
    # reference: sqlglot's own parser reads the text back to the same tree
    assert sqlglot.parse_one(text, read=dialect) == tree


@pytest.mark.parametrize("dialect", ["duckdb", "postgres"])
def test_comment_query_renders_and_parses_back(dialect):
    import sqlglot

    from tillite import sqlgen

    text = sqlgen.render(sqlgen.comment_of_statement("s.it's", dialect), dialect)
    # reference: sqlglot's parser accepts the text in the same dialect
    assert sqlglot.parse_one(text, read=dialect) is not None
    if dialect == "duckdb":
        con = duckdb.connect()
        try:
            con.execute('CREATE SCHEMA s; CREATE VIEW s."it\'s" AS SELECT 1 AS one; COMMENT ON VIEW s."it\'s" IS \'x\'')
            # reference: the comment DuckDB stored, read back by the generated query
            assert con.execute(text).fetchall() == [("x",)]
        finally:
            con.close()


def test_cell_map_table_names_stay_within_postgresqls_identifier_length_and_apart():
    from tillite.pipeline import cell_map_table

    long_a, long_b = "segments_of_" + "x" * 50 + "_a", "segments_of_" + "x" * 50 + "_b"
    names = [cell_map_table(n) for n in (long_a, long_b, "s.labelled", "labelled", "é" * 40)]
    # reference (from memory): PostgreSQL cuts identifiers at NAMEDATALEN - 1 = 63 bytes
    assert all(len(n.split(".")[-1].encode()) <= 63 for n in names)
    assert names[0] != names[1]
    assert names[2:4] == ["s.tillite_cellmap_labelled", "tillite_cellmap_labelled"]
