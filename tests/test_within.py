"""`segment --within COL`: segments computed separately per group, every group from the same scans.

Outside references: each group against tillite run on a table holding that group alone (made by a
plain SQL WHERE in DuckDB), scikit-learn's KMeans(n_init=10) objective on the group's scaled rows
(numpy mean and population sd), and make_blobs' generating labels.
"""

from __future__ import annotations

import copy
import json
import warnings

import duckdb
import numpy as np
import pytest
from click.testing import CliRunner
from sklearn.cluster import KMeans

from tillite.cli import main
from tillite.engines import DuckDBEngine
from tillite.model import Model
from tillite.pipeline import Settings, label, segment
from tillite import sqlgen
from tillite.sqlgen import Source

from conftest import WITHIN_GROUPS, assert_one_error_line, grouped_blobs, run_cli as run, write_table

COLUMNS = ["a", "b", "c"]
#: A small cell budget, so the cells do not settle the segments and refine passes run; passes until
#: Lloyd's fixed point, so a run on a group alone and the --within run end at the same centroids
#: (two of the harbour blobs touch: three passes leave both runs short of it, at different places).
SETTINGS = dict(k=4, cell_budget=1_000, refine_passes=30, tolerance=1e-12)
ALONE = {"harbour": "only_harbour", "dune": "only_dune", "NULL": "only_null"}


def rows_of(path, table: str, where: str = "TRUE") -> tuple[np.ndarray, list]:
    con = duckdb.connect(str(path), read_only=True)
    try:
        got = con.execute(f"SELECT a, b, c, grp FROM {table} WHERE {where}").fetchall()
    finally:
        con.close()
    return np.array([r[:3] for r in got], dtype=float), [r[3] for r in got]


def by_first_column(centroids) -> np.ndarray:
    c = np.asarray(centroids, dtype=float)
    return c[np.lexsort(c.T[::-1])]


@pytest.fixture(scope="module")
def within_model(within_db):
    with DuckDBEngine(str(within_db), read_only=True) as engine:
        return segment(engine, Source.of_table("meters"), COLUMNS, Settings(**SETTINGS, within="grp"))


def test_each_group_equals_a_run_on_that_group_alone(within_db, within_model):
    groups = {g["name"]: g for g in within_model.within["groups"]}
    assert set(groups) == set(ALONE)
    assert any(g["passes"] for g in groups.values())  # the refine passes ran
    for name, table in ALONE.items():
        with DuckDBEngine(str(within_db), read_only=True) as engine:
            alone = segment(engine, Source.of_table(table), COLUMNS, Settings(**SETTINGS))
        g = groups[name]
        # outside reference: tillite on a table holding only this group (SQL WHERE on the group in DuckDB)
        assert sorted(g["sizes"]) == sorted(alone.sizes)
        np.testing.assert_allclose(by_first_column(g["centroids"]), by_first_column(alone.centroids), rtol=1e-6, atol=1e-6)
        assert g["sse"] == pytest.approx(alone.sse, rel=1e-6)


def test_each_group_sse_within_0_2_percent_of_scikit_learn_kmeans(within_db, within_model):
    for g in within_model.within["groups"]:
        where = "grp IS NULL" if g["value"] is None else f"grp = '{g['value']}'"
        x, _ = rows_of(within_db, "meters", where)
        u = (x - x.mean(axis=0)) / x.std(axis=0)  # numpy: the group's exact mean and population sd
        # outside reference: scikit-learn KMeans(n_init=10) inertia on the group's scaled rows
        best = KMeans(n_clusters=g["k"], n_init=10, random_state=0).fit(u).inertia_
        assert g["sse"] <= 1.002 * best, (g["name"], g["sse"], best)
        np.testing.assert_allclose(g["center"], x.mean(axis=0), rtol=1e-9)


def test_cell_pass_is_one_statement_and_each_refine_pass_one_statement(within_db):
    seen: list[str] = []
    with DuckDBEngine(str(within_db), read_only=True) as engine:
        query = engine.query

        def recording(statement):
            seen.append(sqlgen.render(statement, "duckdb"))
            return query(statement)

        engine.query = recording
        model = segment(engine, Source.of_table("meters"), COLUMNS, Settings(**SETTINGS, within="grp"))
    cell_passes = [s for s in seen if '"k0"' in s and "GROUP BY" in s]
    refine = [s for s in seen if '"gid"' in s and "GROUP BY" in s]
    assert len(cell_passes) == 1 and '"grp"' in cell_passes[0]
    assert len(refine) == len(model.passes) >= 1


def test_labels_number_segments_within_each_group_and_match_the_model(within_db, within_model, tmp_path):
    db = tmp_path / "copy.duckdb"
    write_table(db, "meters", grouped_blobs(WITHIN_GROUPS))
    with DuckDBEngine(str(db)) as engine:
        assert label(engine, Source.of_table("meters"), within_model, "meter_segments") == "view meter_segments"
    con = duckdb.connect(str(db))
    got = con.execute("SELECT grp, segment, count(*), sum(distance * distance) FROM meter_segments GROUP BY 1, 2").fetchall()
    con.close()
    for g in within_model.within["groups"]:
        mine = sorted((r[1], r[2], r[3]) for r in got if r[0] == g["value"])
        assert [m[0] for m in mine] == list(range(g["k"]))  # segment ids 0..k-1 within the group
        assert [m[1] for m in mine] == g["sizes"]
        assert sum(m[2] for m in mine) == pytest.approx(g["sse"], rel=1e-9)


def test_group_value_unknown_to_the_model_is_labelled_null_with_a_count(within_db, within_model, tmp_path):
    db = tmp_path / "later.duckdb"
    data = grouped_blobs({**WITHIN_GROUPS, "marsh": (37, 2, 5.0, 1.0)})
    write_table(db, "meters", data)
    with DuckDBEngine(str(db)) as engine, pytest.warns(UserWarning, match=r"37 row\(s\) .* groups the model does not know"):
        label(engine, Source.of_table("meters"), within_model, "meter_segments")
    con = duckdb.connect(str(db))
    nulls = con.execute("SELECT count(*) FROM meter_segments WHERE grp = 'marsh' AND segment IS NULL").fetchone()[0]
    con.close()
    assert nulls == 37


def test_a_group_whose_rows_were_all_skipped_is_not_counted_as_unknown_when_labelling(tmp_path):
    data = grouped_blobs({"harbour": (400, 2, 0.0, 1.0), "marsh": (5, 1, 0.0, 1.0)})
    data["a"] = np.where(data["grp"] == "marsh", np.nan, data["a"])  # marsh: every row skipped (NaN) at build time
    db = write_table(tmp_path / "skipped.duckdb", "meters", data)
    with DuckDBEngine(str(db)) as engine:
        with warnings.catch_warnings(record=True) as built:
            warnings.simplefilter("always")
            model = segment(engine, Source.of_table("meters"), COLUMNS, Settings(k=2, within="grp"))
        assert any("group marsh: all 5 rows" in str(w.message) for w in built)
        with warnings.catch_warnings(record=True) as labelled:
            warnings.simplefilter("always")
            label(engine, Source.of_table("meters"), model, "meter_segments")
    assert not [w for w in labelled if "does not know" in str(w.message)], [str(w.message) for w in labelled]


def test_group_with_too_few_rows_gets_fewer_segments_with_a_warning(tmp_path):
    data = grouped_blobs({"big": (3_000, 3, 0.0, 1.0), "two": (2, 1, 9.0, 1.0)})
    write_table(tmp_path / "few.duckdb", "t", data)
    with DuckDBEngine(str(tmp_path / "few.duckdb"), read_only=True) as engine, \
            pytest.warns(UserWarning, match="group two: 2 distinct grid cell"):
        model = segment(engine, Source.of_table("t"), COLUMNS, Settings(k=3, within="grp"))
    groups = {g["name"]: g for g in model.within["groups"]}
    assert groups["big"]["k"] == 3 and groups["two"]["k"] == 2 and groups["two"]["sizes"] == [1, 1]


def test_k_auto_chooses_per_group(tmp_path):
    # seed 20: scikit-learn's calinski_harabasz_score of KMeans on each group's scaled rows peaks at 3 and 5
    data = grouped_blobs({"three": (3_000, 3, 0.0, 1.0), "five": (5_000, 5, 0.0, 1.0)}, seed=20)
    write_table(tmp_path / "auto.duckdb", "t", data)
    with DuckDBEngine(str(tmp_path / "auto.duckdb"), read_only=True) as engine:
        model = segment(engine, Source.of_table("t"), COLUMNS, Settings(k=0, k_candidates=tuple(range(1, 13)), within="grp"))
    # outside reference: the number of centres make_blobs generated in each group
    assert {g["name"]: g["k"] for g in model.within["groups"]} == {"three": 3, "five": 5}
    assert all(g["k_choice"]["k"] == g["k"] for g in model.within["groups"])


def test_k_auto_says_one_line_per_group_and_reruns_its_finalists_with_every_restart(tmp_path):
    data = grouped_blobs({"three": (3_000, 3, 0.0, 1.0), "five": (5_000, 5, 0.0, 1.0)}, seed=20)
    write_table(tmp_path / "auto.duckdb", "t", data)
    said: list[tuple[str, str]] = []
    with DuckDBEngine(str(tmp_path / "auto.duckdb"), read_only=True) as engine:
        model = segment(engine, Source.of_table("t"), COLUMNS, Settings(k=0, k_candidates=tuple(range(1, 13)), within="grp"),
                        progress=lambda stage, message: said.append((stage, message)))
    choose = [m for stage, m in said if stage == "choose k"]
    assert len(choose) == 2 and all("\n" not in m for m in choose), choose
    # outside reference: the number of centres make_blobs generated in each group
    assert {g["name"]: g["k"] for g in model.within["groups"]} == {"three": 3, "five": 5}
    for g in model.within["groups"]:  # the chosen k's row is a full run: its SSE is the group's cell-level k-means SSE
        row = next(r for r in g["k_choice"]["table"] if r["k"] == g["k"])
        assert row["sse"] == pytest.approx(g["cell_sse"], rel=1e-9)


def test_model_file_round_trips_and_show_lists_groups_with_null_named(within_db, tmp_path):
    out = tmp_path / "m.json"
    res = CliRunner().invoke(main, ["segment", str(within_db), "-t", "meters", "-c", "a,b,c", "--k", "4", "--within", "grp",
                                    "-o", str(out), "-q"])
    assert res.exit_code == 0, res.output
    model = Model.read(out)
    assert model.k == 0 and model.sizes == [] and len(model.within["groups"]) == 3
    shown = CliRunner().invoke(main, ["show", str(out)])
    assert "groups:" in shown.output and "== grp = NULL" in shown.output and "harbour" in shown.output
    digest = json.loads(CliRunner().invoke(main, ["show", str(out), "--json"]).output)
    assert [g["group"] for g in digest["groups"]] == ["dune", "harbour", "NULL"]
    assert all(len(g["segments"]) == g["k"] == 4 for g in digest["groups"])
    assert sum(s["size"] for g in digest["groups"] for s in g["segments"]) == 13_000


def test_sql_stage_cells_of_a_within_model_prints_the_group_and_cell_pass(within_db, within_model, tmp_path):
    model = tmp_path / "within.model.json"
    within_model.write(model)
    result = run("sql", within_db, "-t", "meters", "--model", model, "--stage", "cells")
    assert result.exit_code == 0, result.output
    with duckdb.connect(str(within_db), read_only=True) as con:  # the printed statement, run as a user would
        got = con.execute(f"SELECT part, sum(n) FROM ({result.stdout.strip().rstrip(';')}) GROUP BY part").fetchall()
    assert len(got) == len(WITHIN_GROUPS)  # one set of cells per group: harbour, dune and the NULL group
    assert sorted(int(n) for _, n in got) == sorted(spec[0] for spec in WITHIN_GROUPS.values())


def test_a_text_group_null_and_the_null_group_are_named_apart(tmp_path):
    data = grouped_blobs({"NULL": (300, 2, 0.0, 1.0), None: (300, 2, 20.0, 1.0)})
    db = write_table(tmp_path / "nulls.duckdb", "meters", data)
    with DuckDBEngine(str(db), read_only=True) as engine:
        model = segment(engine, Source.of_table("meters"), COLUMNS, Settings(k=2, within="grp"))
    names = {g["value"]: g["name"] for g in model.within["groups"]}
    assert names == {"NULL": "'NULL'", None: "NULL"}
    assert "== grp = 'NULL'" in model.describe() and "== grp = NULL" in model.describe()


def test_empty_and_blank_groups_are_shown_quoted_in_show_report_and_name(tmp_path):
    data = grouped_blobs({"": (300, 2, 0.0, 1.0), " ": (300, 2, 20.0, 1.0), "north": (300, 2, 40.0, 1.0)})
    db = write_table(tmp_path / "blank.duckdb", "meters", data)
    out = tmp_path / "m.json"
    assert run("segment", db, "-t", "meters", "-c", "a,b,c", "--k", "2", "--within", "grp", "-o", out, "-q").exit_code == 0
    # outside reference: the group texts written to the table ('' and ' ', as DuckDB stores them)
    shown = run("show", out).stdout
    assert "== grp = ''" in shown and "== grp = ' '" in shown and "\n  ''" in shown and "\n  ' '" in shown, shown
    md = tmp_path / "r.md"
    assert run("report", db, "-t", "meters", "--model", out, "--format", "md", "-o", md, "-q").exit_code == 0
    text = md.read_text()
    assert "grp = ''" in text and "grp = ' '" in text, text
    named = run("name", out, "--group", "' '", "0", "steady")
    assert named.exit_code == 0, named.output
    assert "group ' '" in named.stdout and "group :" not in named.stdout, named.stdout


def test_without_within_the_model_file_keeps_its_single_model_shape(within_db):
    with DuckDBEngine(str(within_db), read_only=True) as engine:
        model = segment(engine, Source.of_table("only_dune"), COLUMNS, Settings(k=4))
    assert model.within == {} and model.k == 4 and len(model.sizes) == 4


def test_scoring_macros_take_the_group_column_and_equal_the_labels_on_every_row(within_model, tmp_path):
    from tillite import macros as M

    db = tmp_path / "macros.duckdb"
    write_table(db, "meters", grouped_blobs({**WITHIN_GROUPS, "marsh": (20, 2, 5.0, 1.0)}))
    with DuckDBEngine(str(db)) as engine, warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the marsh group is unknown to the model: NULL both ways
        label(engine, Source.of_table("meters"), within_model, "meter_segments")
    M.install_into(db, M.scoring_macros(within_model, "water"))
    con = duckdb.connect(str(db))
    try:
        # reference: the label view, computed by another statement form (the per-group join)
        differ = con.execute(
            "SELECT count(*) FROM meter_segments WHERE water_segment(grp, a, b, c) IS DISTINCT FROM segment "
            "OR abs(water_distance(grp, a, b, c) - distance) > 1e-9 * (1 + distance)"
        ).fetchone()[0]
        nulls = con.execute("SELECT count(*) FROM meter_segments WHERE water_segment(grp, a, b, c) IS NULL").fetchone()[0]
    finally:
        con.close()
    assert differ == 0 and nulls == 20


def test_macros_install_prints_a_call_that_runs_with_the_group_column_first(within_model, tmp_path):
    db, model = tmp_path / "hint.duckdb", tmp_path / "within.model.json"
    write_table(db, "meters", grouped_blobs(WITHIN_GROUPS))
    within_model.write(model)
    result = run("macros", "install", db, "--model", model, "--name", "water")
    assert result.exit_code == 0, result.output
    hint = result.stdout.strip().splitlines()[-1].removeprefix("try: ").replace("my_table", "meters")
    assert '"water_segment"("grp", "a", "b", "c")' in hint
    with duckdb.connect(str(db)) as con:  # the printed call binds and scores every row
        assert len(con.execute(hint).fetchall()) == sum(spec[0] for spec in WITHIN_GROUPS.values())


# ----------------------------------------------------------------------------- bad inputs


@pytest.fixture(scope="module")
def many_groups_db(tmp_path_factory):
    """100,000 rows, each with its own value of ``id`` (100,000 groups) and a few of ``kind``."""
    rng = np.random.default_rng(1)
    path = tmp_path_factory.mktemp("many") / "many.duckdb"
    n = 100_000
    write_table(path, "t", {"id": np.arange(n), "a": rng.normal(size=n), "b": rng.normal(size=n), "c": rng.normal(size=n),
                            "kind": np.arange(n) % 3})
    return path


@pytest.mark.parametrize("extra, needles", [
    (["--within", "a"], ["--within", "a", "also a segmenting column"]),
    (["--within", "nope"], ["--within", "nope", "not found", "columns there", "a (DOUBLE)"]),
    (["--within", "id"], ["--within", "id", "100,000", "at most 1,000"]),
    (["--within", "kind", "--method", "density"], ["--within", "--method", "density"]),
    (["--within", "kind", "--categorical", "kind"], ["--within", "--categorical"]),
])
def test_bad_within_gives_one_error_line(many_groups_db, extra, needles):
    k = [] if "density" in extra else ["--k", 3]
    assert_one_error_line(run("segment", many_groups_db, "-t", "t", "-c", "a,b,c", *k, *extra, "-q"), *needles)


@pytest.mark.parametrize("command, needles", [
    (["macros"], ["group column first", "--categorical columns"]),
    (["label"], ["segment --within"]),
    (["report"], ["segment --within"]),
    (["show"], ["segment --within"]),
    (["refresh"], ["--within"]),
    (["segment"], ["1 to 200"]),
])
def test_help_of_commands_that_take_within_models_says_how(command, needles):
    # outside reference: the behaviour the other tests here check (argument order of the macros, per-group output)
    text = " ".join(run(*command, "--help").stdout.split())
    for needle in needles:
        assert needle in text, (needle, text)


def test_commands_without_within_support_refuse_such_a_model_in_one_line(within_db, tmp_path):
    out = tmp_path / "m.json"
    assert run("segment", within_db, "-t", "meters", "-c", "a,b,c", "--k", 2, "--within", "grp", "-o", out, "-q").exit_code == 0
    assert_one_error_line(run("report", within_db, "-t", "meters", "--model", out, "--labels", "meters", "-q"),
                          "--labels", "segment --within")
    assert_one_error_line(run("name", out, 0, "steady"), "segment --within", "--group", "harbour")
    assert_one_error_line(run("sql", "-t", "meters", "--stage", "refine", "--model", out), "tillite sql")


def test_demo_prints_segments_within_each_district(tmp_path):
    from tillite.demo import DISTRICTS

    db = tmp_path / "demo.duckdb"
    res = CliRunner().invoke(main, ["demo", "--db", str(db), "--rows", "5000", "--days", "10", "--out", str(tmp_path / "m.json"),
                                    "--report", str(tmp_path / "r.html"), "-q"])
    assert res.exit_code == 0, res.output
    block = [ln.strip() for ln in res.stdout.split("--within district --k 3):")[1].split("\n\n")[0].strip().splitlines()]
    assert sorted(ln.split("  ")[0].strip() for ln in block) == sorted(DISTRICTS)
    con = duckdb.connect(str(db), read_only=True)
    per_district = dict(con.execute("SELECT district, count(*) FROM meter_days GROUP BY 1").fetchall())
    con.close()
    # reference: DuckDB's own count of each district's rows
    for ln in block:
        name = ln.split("  ")[0].strip()
        assert f"{per_district[name]:,} rows" in ln


def test_group_with_a_tiny_spread_gets_a_grid_of_its_own_and_equals_a_run_on_it_alone(tmp_path):
    # the "dot" group spreads over 1e-4 of the others' range: on the shared grid it fills a cell or two
    data = grouped_blobs({"wide": (6_000, 3, 0.0, 1.0), "dot": (3_000, 3, 2.0, 1e-4)}, seed=20)
    db = write_table(tmp_path / "dot.duckdb", "t", data)
    con = duckdb.connect(str(db))
    con.execute("CREATE TABLE only_dot AS SELECT * FROM t WHERE grp = 'dot'")
    con.close()
    settings = dict(k=3, cell_budget=2_000, refine_passes=30, tolerance=1e-12)
    seen = []
    with DuckDBEngine(str(db), read_only=True) as engine:
        model = segment(engine, Source.of_table("t"), COLUMNS, Settings(**settings, within="grp"),
                        progress=lambda stage, message: seen.append(message))
        alone = segment(engine, Source.of_table("only_dot"), COLUMNS, Settings(**settings))
    assert any("group dot" in m and "a grid of its own" in m for m in seen)
    dot = {g["name"]: g for g in model.within["groups"]}["dot"]
    assert dot["k"] == 3 and not dot["notes"]
    # outside reference: tillite on a table holding only the dot group (SQL WHERE in DuckDB)
    assert sorted(dot["sizes"]) == sorted(alone.sizes)
    np.testing.assert_allclose(by_first_column(dot["centroids"]), by_first_column(alone.centroids), rtol=1e-6, atol=1e-9)
    assert dot["sse"] == pytest.approx(alone.sse, rel=1e-6)


def test_same_data_and_options_give_the_same_within_model(within_db):
    def body(model):
        d = model.to_dict()
        d.pop("timings"), d.pop("created")  # what the README says may differ, and nothing else
        return d

    with DuckDBEngine(str(within_db), read_only=True) as engine:
        runs = [segment(engine, Source.of_table("meters"), COLUMNS, Settings(k=3, cell_budget=1_000, within="grp")) for _ in range(2)]
    assert body(runs[0]) == body(runs[1])


def test_a_damaged_group_in_the_model_file_is_one_clear_error(within_model, tmp_path):
    from tillite.model import ModelError

    d = within_model.to_dict()
    d["within"]["groups"][1]["centroids"] = d["within"]["groups"][1]["centroids"][:-1]
    with pytest.raises(ModelError, match=r"group harbour\) is damaged: centroids has 3 entries for 4 segments"):
        Model.from_dict(d)
    d = within_model.to_dict()
    del d["within"]["groups"][0]["sizes"]
    with pytest.raises(ModelError, match="a group of within lacks"):
        Model.from_dict(d)


def _damage_within(d: dict, what: str) -> None:
    groups = d["within"]["groups"]
    if what == "missing-center":
        del groups[0]["center"]
    elif what == "missing-value":
        del groups[0]["value"]
    elif what == "group-twice":
        groups.append(groups[0])
    elif what == "no-groups":
        groups.clear()
    elif what == "bad-type":
        d["within"]["type"] = "BLOB; DROP TABLE meters"
    elif what == "sizes-text":
        groups[0]["sizes"] = "x"
    elif what == "sse-null":
        groups[1]["sse"] = None


@pytest.mark.parametrize("what, needles", [
    ("missing-center", ["damaged", "lacks center"]),
    ("missing-value", ["damaged", "lacks its value"]),
    ("group-twice", ["damaged", "listed twice"]),
    ("no-groups", ["damaged", "no groups"]),
    ("bad-type", ["damaged", "grp", "not a SQL type"]),
    ("sizes-text", ["damaged", 'field "sizes" must be a list of whole numbers', "(group "]),
    ("sse-null", ["damaged", 'field "sse" must be a number, got null', "(group "]),
])
@pytest.mark.parametrize("command", ["show", "label", "macros"])
def test_a_damaged_within_model_file_is_one_error_line_in_show_label_and_macros(within_db, within_model, tmp_path,
                                                                                 what, needles, command):
    d = within_model.to_dict()
    _damage_within(d, what)
    bad = tmp_path / "bad.json"
    bad.write_text(json.dumps(d))
    db = tmp_path / "m.duckdb"
    duckdb.connect(str(db)).close()
    args = {"show": ["show", bad], "label": ["label", within_db, "-t", "meters", "--model", bad, "--into", "v", "-q"],
            "macros": ["macros", "install", db, "--model", bad, "--name", "w"]}[command]
    res = run(*args)
    if command == "show" and what == "bad-type":
        # show writes no SQL, so it never reads the type: it lists the groups; the commands that write SQL refuse it
        assert res.exit_code == 0 and "grp" in res.stdout, res.output
        return
    assert_one_error_line(res, *needles)


@pytest.mark.parametrize("group_sql", ["DATE '2026-01-01' + CAST(truth AS INTEGER)", "CAST(truth AS DOUBLE) / 3", "truth > 1",
                                       "CAST(truth AS VARCHAR) || ' o''clock'"])
def test_group_columns_of_other_types_label_every_row_into_its_own_group(tmp_path, group_sql):
    db = write_table(tmp_path / "typed.duckdb", "raw", grouped_blobs({"x": (4_000, 4, 0.0, 1.0)}, seed=20))
    con = duckdb.connect(str(db))
    con.execute(f"CREATE TABLE t AS SELECT a, b, c, {group_sql} AS g FROM raw")
    con.close()
    with DuckDBEngine(str(db)) as engine:
        model = segment(engine, Source.of_table("t"), COLUMNS, Settings(k=2, cell_budget=500, within="g"))
        label(engine, Source.of_table("t"), model, "labelled")
    con = duckdb.connect(str(db), read_only=True)
    rows, unlabelled = con.execute("SELECT count(*), count(*) FILTER (segment IS NULL) FROM labelled").fetchone()
    con.close()
    # reference: DuckDB's count of the table's rows; none left without a segment (every group value found again)
    assert sum(sum(g["sizes"]) for g in model.within["groups"]) == rows == 4_000 and unlabelled == 0


@pytest.mark.parametrize("dialect", ["duckdb", "postgres", "spark"])
def test_within_statements_render_and_parse_back_in_each_dialect(within_model, dialect):
    from dataclasses import replace

    import sqlglot

    from tillite import within_sql
    from tillite.within import model_assignment

    src, assign = Source.of_table("meters"), model_assignment(within_model)
    for statement in (within_sql.refine_statement(src, COLUMNS, assign, dialect),
                      within_sql.label_select(src, COLUMNS, [*COLUMNS, "grp"], assign, dialect, materialize=True),
                      within_sql.unknown_groups_statement(src, assign, dialect),
                      within_sql.grouped_sample_statement(src, COLUMNS, "grp", dialect, percent=5.0, seed=1),
                      # a store's: the (partition, group, cell) pass, and labels with ids kept stable per group
                      within_sql.store_cells_statement(src, COLUMNS, sqlgen.Grid.from_dict(within_model.grid), dialect,
                                                       sqlgen.Partitioning.of_columns(["day"]), "grp"),
                      within_sql.label_select(src, COLUMNS, [*COLUMNS, "grp"], replace(assign, ids=tuple(
                          tuple(range(len(c), 0, -1)) for c in assign.centroids)), dialect)):
        text = sqlgen.render(statement, dialect)
        # reference: sqlglot's own parser for the dialect reads every statement back
        assert sqlglot.parse_one(text, read=dialect) is not None


def test_show_of_a_model_with_one_group_says_one_group_in_the_singular(tmp_path):
    rng = np.random.default_rng(5)
    x = np.vstack([rng.normal(0, 0.3, (300, 2)), rng.normal(4, 0.3, (300, 2))])
    db = write_table(tmp_path / "one.duckdb", "t", {"a": x[:, 0], "b": x[:, 1], "grp": np.array(["only"] * 600, dtype=object)})
    path = tmp_path / "m.json"
    assert run("segment", db, "-t", "t", "-c", "a,b", "--within", "grp", "--k", "2", "-o", path, "-q").exit_code == 0
    out = run("show", path).stdout
    assert "(1 group, 2 segments in all)" in out, out



# ----------------------------------------------------------------------------- report and names


def test_report_of_a_within_model_gives_each_group_the_figures_of_its_own_rows(within_db, within_model, tmp_path):
    from tillite import report as R

    copy = tmp_path / "labels.duckdb"
    copy.write_bytes(within_db.read_bytes())
    with DuckDBEngine(str(copy)) as engine:
        label(engine, Source.of_table("meters"), within_model, "meter_segments")
        content = R.report_of_model(engine, Source.of_table("meters"), within_model, ["grp"])
    assert [g["group"] for g in content["groups"]] == [g["name"] for g in within_model.within["groups"]]
    con = duckdb.connect(str(copy), read_only=True)
    try:
        for g, entry in zip(content["groups"], within_model.within["groups"]):
            where = "grp IS NULL" if entry["value"] is None else f"grp = '{entry['value']}'"
            rows = con.execute(f"SELECT segment, a, b, c FROM meter_segments WHERE {where}").fetchall()
            seg = np.array([r[0] for r in rows])
            x = np.array([r[1:] for r in rows], dtype=float)
            report = g["report"]
            assert [s["rows"] for s in report["segments"]] == entry["sizes"]
            for s, spread in zip(report["segments"], report["spread"]["a"]):
                mine = x[seg == s["segment"], 0]
                # outside reference: numpy mean, population sd, min and max of the group's rows in that segment
                assert spread["mean"] == pytest.approx(mine.mean(), rel=1e-9, abs=1e-9)
                assert spread["sd"] == pytest.approx(mine.std(), rel=1e-6, abs=1e-9)
                assert (spread["min"], spread["max"]) == (mine.min(), mine.max())
            assert report["map"] and report["map"]["centroids"]  # each group's map, kept in the model file
            assert report["breakdowns"][0]["categories"] == [entry["name"] if entry["value"] is not None else "(missing)"]
    finally:
        con.close()
    assert "statistical grouping" in content["header"]["caution"]


def test_report_page_of_a_within_model_has_a_section_per_group_and_stays_self_contained(within_db, within_model, tmp_path):
    import re

    from tillite import report as R
    from tillite.report_render import render_html, render_markdown

    with DuckDBEngine(str(within_db), read_only=True) as engine:
        content = R.report_of_model(engine, Source.of_table("meters"), within_model)
    page = render_html(content)
    assert page.count('<details class="group"') == len(within_model.within["groups"])
    assert not re.search(r"<script|<link|<img|<iframe|@import|url\(|(src|href)=", page, re.I)
    ids = re.findall(r' id="([^"]+)"', page)
    assert len(ids) == len(set(ids))  # every figure id is unique across the groups
    assert "statistical grouping" in page
    md = render_markdown(content)
    assert all(f"## grp = {g['name']}" in md for g in within_model.within["groups"])


def test_name_names_segments_per_group_shown_by_show_report_and_the_label_view(within_db, within_model, tmp_path):
    path, db = tmp_path / "m.json", tmp_path / "labels.duckdb"
    within_model.write(path)
    db.write_bytes(within_db.read_bytes())
    result = run("name", path, "--group", "dune", 0, "dune steady")
    assert result.exit_code == 0, result.output
    assert run("name", path, "--group", "NULL", 1, "null busy").exit_code == 0
    model = Model.read(path)
    groups = {g["name"]: g for g in model.within["groups"]}
    assert groups["dune"]["names"] == {"0": "dune steady"} and groups["NULL"]["names"] == {"1": "null busy"}
    assert "harbour" in groups and "names" not in groups["harbour"]
    assert '0 "dune steady"' in run("show", path).stdout
    assert run("label", db, "-t", "meters", "--model", path, "--into", "named", "-q").exit_code == 0
    con = duckdb.connect(str(db), read_only=True)
    try:
        got = dict(((g, s), n) for g, s, n in con.execute(
            "SELECT DISTINCT grp, segment, segment_name FROM named WHERE segment_name IS NOT NULL").fetchall())
    finally:
        con.close()
    # reference: the names given, on the rows of that group and segment only
    assert got == {("dune", 0): "dune steady", (None, 1): "null busy"}
    assert_one_error_line(run("name", path, "--group", "marsh", 0, "x"), "--group marsh", "dune")


def test_segment_name_macro_of_a_model_named_per_group_equals_the_label_view(within_db, within_model, tmp_path):
    from tillite import macros as M
    from tillite.naming import apply_names

    model = Model.from_dict(copy.deepcopy(within_model.to_dict()))  # the module's model stays unnamed
    apply_names(model, {0: "dune steady", 2: "dune 'busy'"}, group="dune")
    db = tmp_path / "named.duckdb"
    db.write_bytes(within_db.read_bytes())
    with DuckDBEngine(str(db)) as engine:
        label(engine, Source.of_table("meters"), model, "named")
    M.install_into(db, M.scoring_macros(model, "water"))
    con = duckdb.connect(str(db), read_only=True)
    try:
        # reference: the label view's segment_name column, computed by another statement form (the per-group join)
        differ = con.execute("SELECT count(*) FROM named WHERE water_segment_name(grp, a, b, c) IS DISTINCT FROM segment_name"
                             ).fetchone()[0]
        named = con.execute("SELECT count(*) FROM named WHERE segment_name IS NOT NULL").fetchone()[0]
    finally:
        con.close()
    assert differ == 0 and named > 0
