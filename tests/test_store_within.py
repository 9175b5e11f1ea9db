"""Summary stores of `store build --within COL`: cells per (partition, group, cell), a model per group, and
refreshes that re-segment only the groups whose cells changed.

Outside references: `tillite segment --within` on the same data (itself checked against runs on each group
alone and scikit-learn in test_within.py), numpy's SSE of the labelled rows in each group's scaled units, a
numpy nearest-centroid mapping of new centroids to old ones for the ids, and DuckDB's own counts of the rows.
"""

from __future__ import annotations

import json
import warnings

import duckdb
import numpy as np
import pytest

from tillite import store as S
from tillite import within
from tillite.engines import DuckDBEngine
from tillite.model import Model
from tillite.pipeline import Settings, segment
from tillite.sqlgen import Source

from conftest import assert_one_error_line, fetch_columns, fetch_rows, grouped_blobs, numpy_sse, run_cli as run, within_days_table

COLUMNS = ["a", "b", "c"]
#: Refine passes to Lloyd's fixed point, so two runs on the same data end at the same centroids whatever
#: the order their sums were added in.
SETTINGS = dict(k=4, cell_budget=1_000, refine_passes=30, tolerance=1e-12)
SOURCE = Source.of_table("meters")
PARTS = S.PartitionSpec(("day",))


def build_store(path, **extra) -> Model:
    with DuckDBEngine(str(path)) as engine:
        _, model = S.build(engine, SOURCE, COLUMNS, PARTS, Settings(**{**SETTINGS, **extra}, within="grp"))
    return model


def refresh_store(path, **kw) -> S.RefreshReport:
    with DuckDBEngine(str(path)) as engine:
        return S.refresh(engine, "meters", **kw)


def run_sql(path, *statements: str) -> None:
    with duckdb.connect(str(path)) as con:
        for st in statements:
            con.execute(st)


def groups_of(model: Model) -> dict:
    return {g["name"]: g for g in model.within["groups"]}


def segment_within_now(path) -> Model:
    with DuckDBEngine(str(path), read_only=True) as engine:
        return segment(engine, SOURCE, COLUMNS, Settings(**SETTINGS, within="grp"))


def assert_groups_equal(got: dict, ref: dict, rtol: float = 1e-9) -> None:
    """Sizes equal, centroids and SSE within ``rtol`` (ids may differ: compared by segment, matched by centroid)."""
    assert sorted(got["sizes"]) == sorted(ref["sizes"])
    order_got = np.lexsort(np.asarray(got["centroids"]).T[::-1])
    order_ref = np.lexsort(np.asarray(ref["centroids"]).T[::-1])
    np.testing.assert_allclose(np.asarray(got["centroids"])[order_got], np.asarray(ref["centroids"])[order_ref], rtol=rtol, atol=1e-12)
    assert np.asarray(got["sizes"])[order_got].tolist() == np.asarray(ref["sizes"])[order_ref].tolist()
    assert got["sse"] == pytest.approx(ref["sse"], rel=rtol)


def stored_model_text(path) -> dict:
    """The store's model as the registry holds it: each group's entry as JSON text."""
    (text,) = fetch_rows(path, "SELECT model FROM tillite_stores WHERE store = 'meters'", read_only=True)[0]
    return {g["name"]: json.dumps(g, sort_keys=True) for g in json.loads(text)["within"]["groups"]}


@pytest.fixture
def store_db(tmp_path):
    path = within_days_table(tmp_path / "within_store.duckdb")
    return path, build_store(path)


def test_build_with_within_equals_segment_within_on_the_same_data(store_db):
    path, model = store_db
    ref = segment_within_now(path)
    got, want = groups_of(model), groups_of(ref)
    assert set(got) == set(want) == {"harbour", "dune", "NULL"}
    for name in want:  # outside reference: `tillite segment --within` on the same table
        assert_groups_equal(got[name], want[name])
    assert model.rows == ref.rows and model.skipped == ref.skipped
    # outside reference: numpy's SSE of the store's labels, in each group's own scaled units
    with DuckDBEngine(str(path)) as engine:
        S.label(engine, "meters", "meter_segments")
    rows = fetch_columns(path, "SELECT a, b, c, grp, segment FROM meter_segments", read_only=True)
    x, grp, seg = np.column_stack([rows[c] for c in COLUMNS]), np.asarray(rows["grp"], dtype=object), np.asarray(rows["segment"])
    for g in model.within["groups"]:
        mine = np.array([v == g["value"] for v in grp])
        u = (x[mine] - np.asarray(g["center"])) / np.asarray(g["scale"]) * np.asarray(g["weights"])
        assert numpy_sse(u, seg[mine]) == pytest.approx(g["sse"], rel=1e-9)
        assert np.bincount(seg[mine]).tolist() == [g["sizes"][g["ids"].index(i)] for i in range(g["k"])]


def test_status_and_label_from_the_cli_work_on_a_within_store(store_db, tmp_path):
    path, _ = store_db
    status = run("store", "status", path, "--store", "meters")
    assert status.exit_code == 0, status.output
    assert "segments within each grp: dune k=4 (ids 0, 1, 2, 3); harbour k=4" in status.output
    assert "within grp" in status.output
    as_json = json.loads(run("store", "status", path, "--store", "meters", "--json").stdout)
    assert [g["group"] for g in as_json["groups"]] == ["dune", "harbour", "NULL"]
    labelled = run("label", path, "--store", "meters", "--into", "seg_view")
    assert labelled.exit_code == 0, labelled.output
    # reference: DuckDB's own count of the table's rows
    assert fetch_rows(path, "SELECT count(*) FROM seg_view WHERE segment IS NOT NULL", read_only=True)[0][0] == 13_000


def test_store_build_within_from_the_cli_writes_a_model_that_show_reads(tmp_path):
    path = within_days_table(tmp_path / "cli.duckdb")
    out = tmp_path / "store.model.json"
    built = run("store", "build", path, "-t", "meters", "-c", "a,b,c", "--partition-by", "day", "--k", 3,
                "--within", "grp", "--out", out, "-q")
    assert built.exit_code == 0, built.output
    assert "segments within each grp (3 groups, 9 segments in all)" in built.output
    shown = run("show", out)
    assert shown.exit_code == 0 and "== grp = NULL" in shown.output
    refreshed = run("refresh", path, "--store", "meters", "--force", "--json")
    assert refreshed.exit_code == 0, refreshed.output
    assert json.loads(refreshed.stdout)["groups"]["resegmented"] == ["dune", "harbour", "NULL"]


@pytest.mark.parametrize("group, name", [("'dune'", "dune"), (None, "NULL")])
def test_a_refresh_changing_one_group_in_one_partition_resegments_that_group_only(store_db, group, name):
    path, _ = store_db
    before = stored_model_text(path)
    where = "grp IS NULL" if group is None else f"grp = {group}"
    run_sql(path, f"UPDATE meters SET a = a + 0.25 WHERE day = 3 AND {where}")
    report = refresh_store(path)
    assert report.changed == ["3"]
    assert report.groups == {"resegmented": [name], "new": [], "vanished": [], "kept": 2}
    after = stored_model_text(path)
    for other in set(before) - {name}:
        assert after[other] == before[other]  # untouched, bit for bit
    assert after[name] != before[name]
    # outside reference: `segment --within` on the changed table, for the re-segmented group
    assert_groups_equal(groups_of(report.model)[name], groups_of(segment_within_now(path))[name])
    text = report.describe()
    assert f"groups re-segmented: {name}; 2 kept as they were" in text
    assert json.loads(json.dumps(report.to_dict()))["groups"]["resegmented"] == [name]


def shrink_the_largest_dune_segment(path) -> int:
    """The largest dune segment loses most of its rows in two partitions and becomes the smallest: positions
    (ordered by size) move, so ids kept stable differ from positions. Leaves the view before_view (a table of
    the labels before). Returns that segment's id."""
    with DuckDBEngine(str(path)) as engine:
        S.label(engine, "meters", "before_view", materialize=True)
    biggest = fetch_rows(path, "SELECT segment, count(*) FROM before_view WHERE grp = 'dune' GROUP BY 1 ORDER BY 2 DESC, 1 "
                               "LIMIT 1", read_only=True)[0][0]
    run_sql(path, f"DELETE FROM meters WHERE id IN (SELECT id FROM before_view WHERE grp = 'dune' AND segment = {biggest} "
                  "AND day IN (1, 2, 3))")
    return biggest


def test_segment_ids_stay_stable_per_group_after_a_small_change(store_db):
    path, model = store_db
    old = groups_of(model)["dune"]
    biggest = shrink_the_largest_dune_segment(path)
    report = refresh_store(path)
    new = groups_of(report.model)["dune"]
    assert report.groups["resegmented"] == ["dune"]
    assert new["ids"] != list(range(new["k"]))  # positions moved
    # outside reference: numpy nearest old centroid of each new centroid, in the group's sd
    sd = np.asarray(new["sd"])
    gap = (np.asarray(new["centroids"])[:, None, :] - np.asarray(old["centroids"])[None, :, :]) / sd
    nearest = np.argmin((gap**2).sum(axis=2), axis=1)
    assert new["ids"] == [old["ids"][i] for i in nearest]
    assert new["sizes"][new["ids"].index(biggest)] < min(old["sizes"])
    # the labels follow: every row left keeps its segment id (DuckDB joins the labels before and after)
    with DuckDBEngine(str(path)) as engine:
        S.label(engine, "meters", "after_view")
    moved = fetch_rows(path, "SELECT count(*) FROM before_view b JOIN after_view n USING (id) "
                             "WHERE b.segment IS DISTINCT FROM n.segment", read_only=True)[0][0]
    assert moved == 0


def test_a_group_appearing_in_a_refresh_gets_its_own_segments(store_db):
    path, _ = store_db
    before = stored_model_text(path)
    x = grouped_blobs({"reef": (2_000, 4, 20.0, 2.0)}, seed=40)
    values = ", ".join(f"({a}, {b}, {c}, 'reef', 99, {100_000 + i})" for i, (a, b, c) in enumerate(zip(x["a"], x["b"], x["c"])))
    run_sql(path, f"INSERT INTO meters (a, b, c, grp, day, id) VALUES {values}")
    report = refresh_store(path)
    assert report.new == ["99"]
    assert report.groups == {"resegmented": ["reef"], "new": ["reef"], "vanished": [], "kept": 3}
    assert {k: v for k, v in stored_model_text(path).items() if k != "reef"} == before
    reef = groups_of(report.model)["reef"]
    assert reef["ids"] == [0, 1, 2, 3] and reef["k"] == 4
    # outside reference: `segment --within` on the grown table, for the new group
    assert_groups_equal(reef, groups_of(segment_within_now(path))["reef"])


def test_a_group_vanishing_in_a_refresh_leaves_the_model_and_the_others_keep_theirs(store_db):
    path, _ = store_db
    before = stored_model_text(path)
    run_sql(path, "DELETE FROM meters WHERE grp = 'dune'")
    report = refresh_store(path)
    assert report.groups == {"resegmented": [], "new": [], "vanished": ["dune"], "kept": 2}
    assert stored_model_text(path) == {k: v for k, v in before.items() if k != "dune"}
    assert report.model.rows == 9_000  # reference: the rows left, by construction (13,000 less dune's 4,000)


def test_regrid_keeps_each_groups_ids(store_db):
    path, model = store_db
    with DuckDBEngine(str(path)) as engine:
        regridded = S.regrid(engine, "meters")
    for name, g in groups_of(regridded).items():
        old = groups_of(model)[name]
        by_id = dict(zip(old["ids"], old["centroids"]))
        for sid, c in zip(g["ids"], g["centroids"]):  # same data: each id keeps its centroid
            np.testing.assert_allclose(c, by_id[sid], rtol=1e-9, atol=1e-9)


def test_scoring_macros_of_a_store_with_moved_ids_equal_its_labels(store_db, tmp_path):
    from tillite import macros as M

    path, _ = store_db
    shrink_the_largest_dune_segment(path)
    report = refresh_store(path)
    assert groups_of(report.model)["dune"]["ids"] != [0, 1, 2, 3]
    with DuckDBEngine(str(path)) as engine:
        S.label(engine, "meters", "seg_view")
    M.install_into(path, M.scoring_macros(report.model, "water"))
    # reference: the label view, computed by another statement form (the per-group join)
    differ = fetch_rows(path, "SELECT count(*) FROM seg_view WHERE water_segment(grp, a, b, c) IS DISTINCT FROM segment")[0][0]
    assert differ == 0


def test_subtracting_rows_from_a_within_store_is_refused_in_one_line(store_db):
    path, _ = store_db
    with DuckDBEngine(str(path)) as engine, pytest.raises(S.StoreError, match="per group of grp"):
        S.subtract_rows(engine, "meters", "3", np.zeros((1, 3)))


@pytest.mark.parametrize("within_column, needles", [
    ("a", ("--within", "segmenting column")),
    ("nosuch", ("--within", "nosuch", "not found")),
])
def test_bad_within_for_a_store_gives_one_error_line(tmp_path, within_column, needles):
    path = within_days_table(tmp_path / "bad.duckdb")
    result = run("store", "build", path, "-t", "meters", "-c", "a,b,c", "--partition-by", "day", "--k", 2,
                 "--within", within_column, "-q")
    assert_one_error_line(result, *needles)


def test_too_many_groups_for_a_store_are_refused_in_one_line(tmp_path, monkeypatch):
    path = within_days_table(tmp_path / "many.duckdb")
    monkeypatch.setattr(within, "MAX_GROUPS", 2)
    result = run("store", "build", path, "-t", "meters", "-c", "a,b,c", "--partition-by", "day", "--k", 2, "--within", "grp", "-q")
    assert_one_error_line(result, "--within", "groups", "at most 2")


def test_a_group_coarse_on_the_frozen_grid_is_warned_about(tmp_path):
    path = within_days_table(tmp_path / "dot.duckdb", {"wide": (6_000, 3, 0.0, 1.0), "dot": (3_000, 3, 2.0, 1e-4)})
    with DuckDBEngine(str(path)) as engine, warnings.catch_warnings():
        warnings.simplefilter("ignore")
        info, _ = S.build(engine, SOURCE, COLUMNS, PARTS, Settings(k=3, within="grp"))
    assert any("group dot fills only" in w and "frozen grid" in w for w in info.warnings)


def test_within_with_categorical_columns_is_refused_by_a_store_in_one_line(tmp_path):
    from tillite.errors import ParameterError

    path = within_days_table(tmp_path / "cat.duckdb")
    with DuckDBEngine(str(path)) as engine, pytest.raises(ParameterError) as caught:
        S.build(engine, SOURCE, COLUMNS, PARTS, Settings(k=2, within="grp", categorical=("grp",)))
    text = str(caught.value)
    assert "\n" not in text and "categorical" in text


def test_report_of_a_within_store_has_one_section_per_group_like_a_segment_within_model(store_db, tmp_path):
    path, model = store_db
    refresh_store(path, force=True)
    for fmt in ("md", "html", "json"):
        out = tmp_path / f"srep.{fmt}"
        result = run("report", path, "--store", "meters", "--by", "grp", "--format", fmt, "--out", out, "-q")
        assert result.exit_code == 0, result.output
    content = json.loads((tmp_path / "srep.json").read_text())
    assert [g["group"] for g in content["groups"]] == ["dune", "harbour", "NULL"]
    # reference: DuckDB's own counts of each group's rows
    counts = dict(fetch_rows(path, "SELECT coalesce(grp, 'NULL'), count(*) FROM meters GROUP BY 1", read_only=True))
    for g in content["groups"]:
        assert sum(s["rows"] for s in g["report"]["segments"]) == counts[g["group"]]
        assert g["report"]["map"]  # the map each group's build or refresh kept
    assert [h["event"] for h in content["history"]] == ["build", "refresh"]
    assert all(h["k"] == 12 for h in content["history"])  # 3 groups x k=4, by construction
    assert "## grp = dune" in (tmp_path / "srep.md").read_text() and "Refresh history" in (tmp_path / "srep.md").read_text()


def test_store_status_history_of_a_within_store_counts_every_groups_segments_and_the_largest_move_of_all(store_db):
    path, _ = store_db
    run_sql(path, "UPDATE meters SET a = a + 3 WHERE day = 3 AND grp = 'dune'",
            "UPDATE meters SET a = a + 0.25 WHERE day = 3 AND grp = 'harbour'")  # harbour's drift rows come last
    report = refresh_store(path)
    assert report.groups["resegmented"] == ["dune", "harbour"]
    status = run("store", "status", path, "--store", "meters")
    assert status.exit_code == 0, status.output
    assert "12 segments in 3 groups" in status.output and "k=0" not in status.output
    # reference: the refresh's own drift rows (every group's), their largest move
    largest = max(d["shift_sd"] for d in report.drift if d.get("shift_sd") is not None)
    assert f"largest centroid move {largest:.3f} sd" in status.output


def test_naming_a_within_store_group_names_its_segments_and_the_names_survive_refreshes(store_db):
    path, model = store_db
    named = run("name", path, "--store", "meters", "--group", "dune", "0", "quiet", "1", "busy")
    assert named.exit_code == 0, named.output
    assert "group dune" in named.output and '0: "quiet"' in named.output
    assert_one_error_line(run("name", path, "--store", "meters", "0", "x"), "--group", "dune, harbour, NULL")
    assert_one_error_line(run("name", path, "--store", "meters", "--group", "reef", "0", "x"), "--group reef", "dune")
    run("name", path, "--store", "meters", "--group", "harbour", "2", "edge")
    # a refresh re-segmenting dune only: harbour's entry is kept, dune's names follow its matched ids
    run_sql(path, "UPDATE meters SET a = a + 0.25 WHERE day = 3 AND grp = 'dune'")
    report = refresh_store(path)
    assert report.groups["resegmented"] == ["dune"]
    groups = groups_of(report.model)
    assert groups["dune"]["names"] == {"0": "quiet", "1": "busy"} and groups["harbour"]["names"] == {"2": "edge"}
    with DuckDBEngine(str(path)) as engine:
        S.label(engine, "meters", "named_view")
    # reference: DuckDB's own join of the view's segment ids to the names given
    got = dict(fetch_rows(path, "SELECT DISTINCT segment, segment_name FROM named_view WHERE grp = 'dune' AND segment IN (0, 1)",
                          read_only=True))
    assert got == {0: "quiet", 1: "busy"}
    assert fetch_rows(path, "SELECT DISTINCT segment_name FROM named_view WHERE grp = 'harbour' AND segment = 2", read_only=True) == [("edge",)]


@pytest.mark.parametrize("passes", [0, 3])
def test_a_within_store_claims_no_pass_needed_only_when_its_labels_match_its_sizes(tmp_path, passes):
    path = within_days_table(tmp_path / "coarse.duckdb")
    said = []
    with DuckDBEngine(str(path)) as engine:  # coarse cells (budget 200): some straddle harbour's segment boundaries
        _, model = S.build(engine, SOURCE, COLUMNS, PARTS, Settings(k=3, cell_budget=200, refine_passes=passes, within="grp"),
                           progress=lambda stage, text: said.append(f"{stage}: {text}"))
        S.label(engine, "meters", "coarse_labels", materialize=True)
    refine = [s for s in said if s.startswith("refine")]
    # reference: DuckDB's own count of each group's labelled rows per segment
    counts = {(g, s): n for g, s, n in fetch_rows(path, "SELECT coalesce(grp, 'NULL'), segment, count(*) FROM coarse_labels "
                                                        "GROUP BY 1, 2", read_only=True)}
    match = all([counts.get((g["name"], i), 0) for i in g["ids"]] == g["sizes"] for g in model.within["groups"])
    if passes == 0:
        assert refine and "no pass run" in refine[0] and not any("no pass needed" in s for s in refine)
        assert not match  # cell-level estimates, as the message says (by construction of the coarse grid)
    else:
        assert match and not any("no pass run" in s for s in refine)


def test_a_within_store_build_and_refresh_say_what_their_counts_count_in_stage_order(tmp_path):
    path = within_days_table(tmp_path / "counts.duckdb")
    built = run("store", "build", path, "-t", "meters", "-c", "a,b,c", "--partition-by", "day", "--k", 3, "--within", "grp",
                "--cell-budget", 200)
    assert built.exit_code == 0, built.output
    # reference: DuckDB's own count of the (group, cell) pairs in the cells table
    pairs = fetch_rows(path, "SELECT count(*) FROM (SELECT DISTINCT grp, k0, k1, k2 FROM tillite_cells_meters WHERE k0 IS NOT NULL)",
                       read_only=True)[0][0]
    assert f"6 partitions -> {pairs:,} (group, cell) pairs" in built.output
    stages = [line.split(":")[0] for line in built.output.splitlines() if line.startswith("[tillite]")]
    assert stages.index("[tillite] second phase") < stages.index("[tillite] refine") < stages.index("[tillite] groups")
    status = run("store", "status", path, "--store", "meters")
    assert f"cells: {pairs:,} (group, cell) pairs" in status.output
    run_sql(path, "UPDATE meters SET a = a + 1 WHERE day = 2", "INSERT INTO meters SELECT a, b, c, grp, truth, 99, id FROM meters WHERE day = 1")
    refreshed = run("refresh", path, "--store", "meters")
    assert refreshed.exit_code == 0, refreshed.output
    assert "2 partition(s) summarised (1 new, 1 changed), 0 vanished partition(s) dropped" in refreshed.output


def test_a_constant_group_in_a_within_store_gets_one_warning(tmp_path):
    path = within_days_table(tmp_path / "flat.duckdb")
    run_sql(path, "INSERT INTO meters SELECT 1.0, 2.0, 3.0, 'flat', 0, day, id + 100000 FROM meters WHERE grp = 'dune'")
    with DuckDBEngine(str(path)) as engine, warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        info, model = S.build(engine, SOURCE, COLUMNS, PARTS, Settings(k=3, cell_budget=300, within="grp"))
    said = [str(w.message) for w in caught] + list(info.warnings)
    flat = [w for w in said if "flat" in w]
    assert len(flat) == 1 and "nothing to segment on" in flat[0], said
    assert groups_of(model)["flat"]["k"] == 1  # reference: numpy's unique rows of the group, by construction one


@pytest.mark.parametrize("k", ["auto", "2..5"])
def test_store_build_and_refresh_refuse_a_k_that_is_not_one_number_in_one_line(store_db, k):
    path, _ = store_db
    built = run("store", "build", path, "-t", "meters", "-c", "a,b,c", "--partition-by", "day", "--k", k, "--store", "other", "-q")
    assert_one_error_line(built, "--k", "one number", "segment --k auto", code=2)
    assert_one_error_line(run("refresh", path, "--store", "meters", "--k", k), "--k", "one number", code=2)
