"""The segment report: statistics, breakdowns, map and names, each checked against an outside reference,
and the page itself opened in a real browser (headless Chromium)."""

from __future__ import annotations

import json
import os
import re

import duckdb
import numpy as np
import pytest
from click.testing import CliRunner
from sklearn.metrics import calinski_harabasz_score

from tillite import report as R
from tillite import sqlgen
from tillite.cli import main
from tillite.engines import DuckDBEngine
from tillite.model import Model
from tillite.pipeline import Settings, label, segment
from tillite.report_render import diverging_colour, render_html, render_markdown
from tillite.sqlgen import Source

from conftest import columns_of, write_table

HOSTILE = '<script>alert("x")</script> \'quoted\' "double" – Überlauf 漏水'

#: Rank tolerance kept for the rank checks below.  Tables of at most sqlgen.QUARTILE_SAMPLE_ROWS rows (those
#: here) are read whole for the quartiles, and DuckDB's quantile_cont is exact on them; the sampled case has
#: its own test with a bound from the sample's size (test_quartiles_from_a_sample_...).
QUANTILE_RANK_TOLERANCE = 0.02


def dkw_rank_bound(m: int, alpha: float = 1e-6) -> float:
    """Dvoretzky-Kiefer-Wolfowitz inequality with Massart's constant (recalled from memory):
    P(sup_x |F_m(x) - F(x)| > eps) <= 2 exp(-2 m eps^2), so eps = sqrt(ln(2 / alpha) / (2 m)).
    For a simple random sample without replacement the same bound holds (Hoeffding 1963, also from memory)."""
    return float(np.sqrt(np.log(2.0 / alpha) / (2.0 * m)))


@pytest.fixture
def district_db(tmp_path, blobs_30k_4d_5c):
    """The make_blobs rows, with NaN rows, a text column of districts (one hostile) and a NULL district."""
    x, y = blobs_30k_4d_5c
    x = x.copy()
    x[:7, 1] = np.nan
    names = ["a", "b", "c", "d"]
    data = columns_of(x, names)
    rng = np.random.default_rng(5)
    districts = np.array(["north", "south", "east", HOSTILE, "west"], dtype=object)[np.minimum(y + rng.integers(0, 2, len(y)), 4)]
    districts[100:110] = None
    data["district"] = districts
    data["many"] = rng.integers(0, 40, len(y))  # more than 20 categories: the rest become "other"
    path = write_table(tmp_path / "district.duckdb", "points", data)
    return path, names


@pytest.fixture
def labelled(district_db, open_engine):
    """A k=5 model of the rows, and every row with its label fetched back (for numpy to check against)."""
    path, names = district_db
    engine = open_engine(path)
    src = Source.of_table("points")
    model = segment(engine, src, names, Settings(k=5, seed=1))
    label(engine, src, model, "labelled")
    got = engine.query(sqlgen.select_where("labelled", None, ["a", "b", "c", "d", "district", "many", "segment"]))
    x = np.column_stack([np.ma.filled(np.ma.asarray(got[c], dtype=float), np.nan) for c in "abcd"])
    seg = np.ma.filled(np.ma.asarray(got["segment"]).astype(np.int64), -99)
    districts = [None if m else v for v, m in zip(np.ma.getdata(got["district"]), np.ma.getmaskarray(got["district"]))]
    return engine, src, model, x, seg, districts, np.asarray(got["many"])


def assert_moments_equal_numpy(stats: dict, x: np.ndarray, seg: np.ndarray, columns: list[str]) -> None:
    """Each segment's count, mean, population sd, min and max equal numpy's on the same rows."""
    for sid, st in stats.items():
        rows = x[seg == sid]
        # reference: numpy count, mean, population sd (ddof=0), min, max on the same rows
        assert st["n"] == len(rows)
        for j, c in enumerate(columns):
            got = st["columns"][c]
            np.testing.assert_allclose(got["mean"], rows[:, j].mean(), rtol=1e-9, atol=1e-12)
            np.testing.assert_allclose(got["sd"], rows[:, j].std(ddof=0), rtol=1e-7)
            assert got["min"] == rows[:, j].min() and got["max"] == rows[:, j].max()


def test_segment_statistics_equal_numpy_on_the_same_rows_and_labels(labelled):
    engine, src, model, x, seg, _, _ = labelled
    stats = R.segment_statistics(engine, src, model)
    assert sorted(stats) == sorted(set(seg[seg != -99].tolist()))
    assert_moments_equal_numpy(stats, x, seg, model.columns)
    for sid, st in stats.items():
        rows = x[seg == sid]
        for j, c in enumerate(model.columns):
            got = st["columns"][c]
            for q in (25, 50, 75):
                # reference: numpy.percentile (linear interpolation, the rule of quantile_cont): the table is
                # smaller than the quartile sample, so every row is read and the quartile is exact
                np.testing.assert_allclose(got[f"q{q}"], np.percentile(rows[:, j], q), rtol=1e-12, atol=1e-12)
                rank = (rows[:, j] <= got[f"q{q}"]).mean()
                assert abs(rank - q / 100) <= QUANTILE_RANK_TOLERANCE, (sid, c, q, rank)
                assert np.percentile(rows[:, j], q - 100 * QUANTILE_RANK_TOLERANCE) <= got[f"q{q}"] <= np.percentile(rows[:, j], q + 100 * QUANTILE_RANK_TOLERANCE)


def test_quartiles_from_a_sample_sit_within_the_dkw_bound_of_numpy_percentile(labelled):
    engine, src, model, x, seg, _, _ = labelled
    percent = 20.0  # the 30,000 rows read as a Bernoulli sample of about 6,000
    quartiles, sampled = R.sample_quartiles(engine, src, model, percent=percent)
    usable = seg != -99
    assert sampled == sum(q["n"] for q in quartiles.values())
    # reference: a Bernoulli sample's size is binomial(N, p): within 6 standard deviations of N p
    n_usable = int(usable.sum())
    assert abs(sampled - n_usable * percent / 100) < 6 * np.sqrt(n_usable * 0.2 * 0.8)
    assert R.sample_quartiles(engine, src, model, percent=percent) == (quartiles, sampled)  # seeded: repeatable
    for sid, q in quartiles.items():
        rows = x[seg == sid]
        m = q["n"]
        tolerance = dkw_rank_bound(m) + 1.0 / m  # DKW on the sample, plus one rank for interpolation between values
        for j, c in enumerate(model.columns):
            for p in (25, 50, 75):
                got = q["columns"][c][f"q{p}"]
                # reference: numpy.percentile over ALL the segment's rows, within the DKW rank bound of the sample
                lo = np.percentile(rows[:, j], max(0.0, p - 100 * tolerance))
                hi = np.percentile(rows[:, j], min(100.0, p + 100 * tolerance))
                assert lo <= got <= hi, (sid, c, p, m, tolerance)


def test_one_scan_with_two_breakdowns_equals_numpy_and_the_single_breakdowns(labelled):
    engine, src, model, x, seg, districts, many = labelled
    stats, (by_district, by_many) = R.report_scan(engine, src, model, ["district", "many"])
    assert_moments_equal_numpy(stats, x, seg, model.columns)
    # reference: the one-column statement (itself checked against a numpy crosstab above)
    assert by_district == R.breakdown(engine, src, model, "district")
    assert by_many == R.breakdown(engine, src, model, "many")


def test_map_kept_in_the_model_file_equals_a_cell_pass_map_and_old_files_fall_back(labelled, tmp_path):
    engine, src, model, x, _, _, _ = labelled
    assert model.report_map, "segment keeps the map in the model"
    path = tmp_path / "m.json"
    model.write(path)
    kept = Model.read(path)
    figure = R.report_map(engine, src, kept)
    assert figure["from"] == "model"
    # reference: numpy's count of usable rows; every usable row is in some dot
    assert round(sum(figure["dots"]["n"])) == int(np.isfinite(x).all(axis=1).sum())
    assert len(figure["dots"]["n"]) <= R.MAP_BINS**2 * (model.k + 1)
    old = Model.read(path)
    old.report_map = {}
    fallback = R.report_map(engine, src, old)
    assert fallback["from"] == "cell pass"
    # the same cells drawn at report time: the same dots, to the 6 digits the model file keeps
    np.testing.assert_allclose(fallback["variance_share"], figure["variance_share"], rtol=1e-5)
    np.testing.assert_allclose(sorted(fallback["dots"]["n"]), sorted(figure["dots"]["n"]), rtol=1e-5)
    np.testing.assert_allclose(sorted(fallback["dots"]["x"]), sorted(figure["dots"]["x"]), rtol=1e-4, atol=1e-5)


def test_report_reads_a_materialized_labels_table_with_the_same_figures(labelled):
    engine, src, model, _, _, _, _ = labelled
    label(engine, src, model, "labels_table", materialize=True)
    assigned = R.report_of_model(engine, src, model, ["district"])
    read = R.report_of_model(engine, src, model, ["district"], labels="labels_table")
    # reference: the report that assigns the rows itself (checked against numpy above); the engine's
    # plain AVG adds in thread order, so figures agree to round-off, not to the last bit
    for part in ("segments", "breakdowns", "spread"):
        assert_same_figures(read[part], assigned[part], part)


def assert_same_figures(got, expected, where: str) -> None:
    """Equal structure and text; numbers equal within 1e-12 relative (summation order)."""
    if isinstance(expected, dict):
        assert isinstance(got, dict) and got.keys() == expected.keys(), where
        for key in expected:
            assert_same_figures(got[key], expected[key], f"{where}.{key}")
    elif isinstance(expected, (list, tuple)):
        assert isinstance(got, (list, tuple)) and len(got) == len(expected), where
        for i, (g, e) in enumerate(zip(got, expected)):
            assert_same_figures(g, e, f"{where}[{i}]")
    elif isinstance(expected, float) and not isinstance(expected, bool):
        assert got == pytest.approx(expected, rel=1e-12, abs=1e-300, nan_ok=True), where
    else:
        assert got == expected, where


def test_a_breakdown_column_named_twice_is_one_breakdown_and_small_tables_say_all_rows(labelled):
    engine, src, model, _, _, _, _ = labelled
    content = R.report_of_model(engine, src, model, ["district", "district"])
    assert [b["column"] for b in content["breakdowns"]] == ["district"]
    # the 30,000-row table is smaller than the quartile sample: read whole, and the page says so
    assert "from all" in render_markdown(content)


def test_skipped_rows_are_left_out_of_the_statistics(labelled):
    engine, src, model, x, seg, _, _ = labelled
    stats = R.segment_statistics(engine, src, model)
    # reference: numpy's isfinite says 7 rows are unusable (NaN in column b)
    assert sum(s["n"] for s in stats.values()) == int(np.isfinite(x).all(axis=1).sum()) == len(x) - 7


def test_breakdown_shares_equal_a_numpy_crosstab(labelled):
    engine, src, model, _, seg, districts, _ = labelled
    got = R.breakdown(engine, src, model, "district")
    usable = seg != -99
    for sid in model.segment_ids():
        for cat, n in zip(got["categories"], got["counts"][str(sid)]):
            value = None if cat == "(missing)" else cat
            # reference: a numpy count of (segment, district) pairs on the labelled rows
            expected = int(sum(1 for s, d, u in zip(seg, districts, usable) if u and s == sid and d == value))
            assert n == expected, (sid, cat)
    assert HOSTILE in got["categories"] and "(missing)" in got["categories"]


def test_breakdown_keeps_the_top_20_categories_and_sums_the_rest_as_other(labelled):
    engine, src, model, _, seg, _, many = labelled
    got = R.breakdown(engine, src, model, "many")
    assert len(got["categories"]) == 21 and got["categories"][-1] == "other"
    usable = seg != -99
    values, counts = np.unique(many[usable], return_counts=True)
    # reference: numpy's counts per value; the 20 largest (ties by text) are kept, in that order
    order = sorted(zip(-counts, [str(v) for v in values]))
    assert got["categories"][:20] == [t for _, t in order[:20]]
    total = sum(sum(v) for v in got["counts"].values())
    assert total == int(usable.sum())
    other = sum(v[-1] for v in got["counts"].values())
    assert other == int(sum(-c for c, _ in order[20:]))


def test_calinski_harabasz_from_the_segment_cfs_equals_scikit_learn(labelled):
    engine, src, model, x, seg, _, _ = labelled
    stats = R.segment_statistics(engine, src, model)
    usable = seg != -99
    scaled = (x[usable] - np.asarray(model.center)) / np.asarray(model.scale) * np.asarray(model.weights)
    # reference: scikit-learn's calinski_harabasz_score on the scaled rows and their labels
    expected = calinski_harabasz_score(scaled, seg[usable])
    np.testing.assert_allclose(R.calinski_harabasz_of(stats, model), expected, rtol=1e-7)


def test_principal_axes_from_the_cells_match_numpy_on_the_row_covariance(labelled):
    engine, src, model, x, seg, _, _ = labelled
    cells_grid, _ = R.map_cells(engine, src, model)
    values, vectors = R.principal_axes(R.cells_in_model_space(cells_grid, model))
    ok = np.isfinite(x).all(axis=1)
    scaled = (x[ok] - np.asarray(model.center)) / np.asarray(model.scale) * np.asarray(model.weights)
    # reference: numpy's eigen-decomposition of the population covariance of the rows
    ref_values, ref_vectors = np.linalg.eigh(np.cov(scaled, rowvar=False, ddof=0))
    ref_values, ref_vectors = ref_values[::-1], ref_vectors[:, ::-1]
    np.testing.assert_allclose(values.sum(), ref_values.sum(), rtol=1e-9)  # the trace is exact from the CFs
    np.testing.assert_allclose(values[:2], ref_values[:2], rtol=0.01)
    for a in range(2):
        assert abs(vectors[:, a] @ ref_vectors[:, a]) > 0.999


def test_html_escapes_hostile_names_and_categories(labelled, tmp_path):
    engine, src, model, *_ = labelled
    model.names = {"0": HOSTILE, "1": "probable leak"}
    content = R.report_of_model(engine, src, model, ["district"])
    page = render_html(content)
    assert "<script>" not in page and "alert(&quot;x&quot;)" in page
    assert "&lt;script&gt;" in page and "漏水" in page and "&#x27;quoted&#x27;" in page
    assert "<script" not in page.lower()
    md = render_markdown(content)
    assert "<script>" not in md and "&lt;script&gt;" in md
    # the JSON carries the text as given
    assert json.loads(json.dumps(content))["segments"][0]["name"] == HOSTILE


def test_page_is_self_contained(labelled):
    engine, src, model, *_ = labelled
    page = render_html(R.report_of_model(engine, src, model, ["district"]))
    # no script, no external resource of any kind
    assert not re.search(r"<script|<link|<img|<iframe|@import|url\(", page, re.I)
    assert not re.search(r"(src|href)=", page, re.I)
    assert page.count('<figure class="chart"') == 1 + 1 + len(model.columns) + 1 + 1


def test_hostile_names_are_literals_in_the_label_view_and_macro(labelled, tmp_path):
    engine, src, model, x, seg, *_ = labelled
    model.names = {"0": HOSTILE, "2": "it's a \"leak\"; DROP TABLE points; --"}
    label(engine, src, model, "named")
    got = engine.query(sqlgen.select_where("named", None))
    seg_col, seg_null, names = np.ma.getdata(got["segment"]), np.ma.getmaskarray(got["segment"]), got["segment_name"]
    name_null = np.ma.getmaskarray(names)
    for s, skipped, n, no_name in zip(seg_col, seg_null, np.ma.getdata(names), name_null):
        expected = None if skipped else model.segment_name(int(s))
        assert (None if no_name else n) == expected
    assert engine.query(sqlgen.count_statement(Source.of_table("points")))  # the source is still there

    from tillite import macros as M

    defs = M.scoring_macros(model, "water")
    assert [d.name for d in defs] == ["water_segment", "water_distance", "water_segment_name"]
    engine.close()
    path = str(tmp_path / "m.duckdb")
    con = duckdb.connect(path)
    con.execute("CREATE TABLE t AS SELECT 0.0 AS a, 0.0 AS b, 0.0 AS c, 0.0 AS d")
    con.close()
    M.install_into(path, defs)
    con = duckdb.connect(path)
    try:
        row = con.execute("SELECT water_segment(a, b, c, d), water_segment_name(a, b, c, d) FROM t").fetchone()
    finally:
        con.close()
    assert row[1] == model.segment_name(model.segment_ids()[row[0]])


def test_diverging_scale_runs_blue_to_orange_through_grey():
    # reference: the end colours chosen for the scale (blue #2166AC, grey #F7F7F7, orange #E08214)
    assert diverging_colour(-3) == "#2166AC" and diverging_colour(0) == "#F7F7F7" and diverging_colour(3) == "#E08214"
    assert diverging_colour(-10) == diverging_colour(-3) and diverging_colour(None) == "#FFFFFF"


# --------------------------------------------------------------------------- names


def test_name_writes_names_into_the_model_file_and_keeps_ids(blob_db, tmp_path):
    path, names = blob_db
    runner = CliRunner()
    out = tmp_path / "model.json"
    assert runner.invoke(main, ["segment", str(path), "-t", "points", "-c", ",".join(names), "--k", "3", "-o", str(out), "-q"]).exit_code == 0
    before = Model.read(out)
    done = runner.invoke(main, ["name", str(out), "2", "probable leak", "0", HOSTILE])
    assert done.exit_code == 0, done.output
    after = Model.read(out)
    assert after.segment_ids() == before.segment_ids() and after.centroids == before.centroids
    assert after.names == {"0": HOSTILE, "2": "probable leak"}
    shown = runner.invoke(main, ["show", str(out)])
    assert '2 "probable leak"' in shown.output and "sd" in shown.output
    summary = json.loads(runner.invoke(main, ["show", str(out), "--json"]).output)
    assert summary["segments"][2]["name"] == "probable leak" and summary["segments"][2]["description"]
    names_file = tmp_path / "names.json"
    names_file.write_text(json.dumps({"1": "steady", "2": ""}))
    assert runner.invoke(main, ["name", str(out), "--names", str(names_file)]).exit_code == 0
    assert Model.read(out).names == {"0": HOSTILE, "1": "steady"}


@pytest.mark.parametrize("args, fault", [
    (["9", "x"], "segment id 9"),
    (["one", "x"], "segment id 'one'"),
    (["1"], "pairs"),
])
def test_name_refuses_bad_ids_in_one_line(blob_db, tmp_path, args, fault):
    path, names = blob_db
    out = tmp_path / "model.json"
    runner = CliRunner()
    runner.invoke(main, ["segment", str(path), "-t", "points", "-c", ",".join(names), "--k", "3", "-o", str(out), "-q"])
    before = out.read_text()
    got = runner.invoke(main, ["name", str(out), *args])
    assert got.exit_code in (1, 2) and fault in got.output and "Traceback" not in got.output
    assert len([line for line in got.output.splitlines() if line.startswith("Error")]) == 1
    assert out.read_text() == before


def test_description_names_the_most_distinctive_columns():
    m = Model(columns=["zero_hours", "flow_run_hours", "litres"], center=[9.0, 3.0, 300.0], scale=[2.0, 1.0, 100.0],
              weights=[1.0, 1.0, 1.0], scaling="zscore", centroids=[[5.2, 6.1, 310.0]], centroids_scaled=[[0, 0, 0]],
              sizes=[10], sse=1.0, segment_sse=[1.0], radius=[1.0], rows=10, skipped=0, source="t", k=1)
    # reference: (5.2 - 9) / 2 = -1.9 and (6.1 - 3) / 1 = 3.1 standard deviations, worked by hand
    assert m.segment_description(0) == "flow_run_hours 3.1 sd above average, zero_hours 1.9 sd below average"


# --------------------------------------------------------------------------- the command


def test_report_command_offers_exactly_the_formats_the_report_writes():
    from tillite.cli.report import REPORT_FORMATS

    assert REPORT_FORMATS == R.FORMATS


def test_report_command_writes_html_md_and_json_with_the_same_numbers(district_db, tmp_path):
    path, names = district_db
    runner = CliRunner()
    model_path = tmp_path / "model.json"
    assert runner.invoke(main, ["segment", str(path), "-t", "points", "-c", ",".join(names), "--k", "4", "-o", str(model_path), "-q"]).exit_code == 0
    outs = {}
    for fmt in ("html", "md", "json"):
        out = tmp_path / f"r.{fmt}"
        got = runner.invoke(main, ["report", str(path), "--table", "points", "--model", str(model_path), "--by", "district",
                                   "--format", fmt, "--out", str(out), "-q"])
        assert got.exit_code == 0, got.output
        assert f"report written to {out}" in got.output
        outs[fmt] = out.read_text(encoding="utf-8")
    content = json.loads(outs["json"])
    for s in content["segments"]:
        shown = f"{s['rows']:,}"
        assert shown in outs["html"] and shown in outs["md"]
    assert R.CAUTION.split(".")[0] in outs["md"]


@pytest.mark.parametrize("args, fault", [
    (["--by", "nowhere"], "--by column nowhere"),
    (["--format", "pdf"], "--format"),
    (["--out", "/no/such/folder/r.html"], "/no/such/folder"),
    (["--labels", "nowhere"], "nowhere"),
    (["--labels", "points"], "segment"),
])
def test_report_refuses_bad_options_in_one_line(district_db, tmp_path, args, fault):
    path, names = district_db
    runner = CliRunner()
    model_path = tmp_path / "model.json"
    runner.invoke(main, ["segment", str(path), "-t", "points", "-c", ",".join(names), "--k", "3", "-o", str(model_path), "-q"])
    got = runner.invoke(main, ["report", str(path), "--table", "points", "--model", str(model_path), "-q", *args])
    assert got.exit_code in (1, 2) and fault in got.output and "Traceback" not in got.output


def test_store_report_has_the_refresh_history_and_status_shows_it(tmp_path):
    from tillite import store as S
    from tillite import store_history

    rng = np.random.default_rng(0)
    n = 6000
    x = np.concatenate([rng.normal(0, 1, (n // 2, 2)), rng.normal(6, 1, (n // 2, 2))])
    day = np.repeat(np.arange(6), n // 6)
    path = write_table(tmp_path / "s.duckdb", "readings", {"a": x[:, 0], "b": x[:, 1], "day": day})
    engine = DuckDBEngine(str(path))
    try:
        S.build(engine, Source.of_table("readings"), ["a", "b"], S.PartitionSpec(("day",)), Settings(k=2, refine_passes=0))
        con = engine.con if hasattr(engine, "con") else None
        engine.execute(sqlgen.delete_statement("readings", sqlgen.equals_all({"day": 5})))
        S.refresh(engine, "readings")
        # a refresh that fails inside its transaction leaves no history row
        engine.execute(sqlgen.delete_statement("readings", sqlgen.equals_all({"day": 4})))

        def fail():
            raise RuntimeError("injected")

        with pytest.raises(RuntimeError):
            S.refresh(engine, "readings", before_commit=fail)
        rows = store_history.history(engine, "readings")
        assert [r["event"] for r in rows] == ["build", "refresh"]
        # reference: the partitions deleted above (6 days of 1,000 rows, day 5 gone)
        assert rows[0]["rows"] == n and rows[1]["rows"] == n - n // 6 and rows[1]["changed"] + rows[1]["vanished"] == 1
        assert sum(rows[1]["sizes"].values()) == n - n // 6
        del con
    finally:
        engine.close()
    runner = CliRunner()
    status = runner.invoke(main, ["store", "status", str(path), "--store", "readings"])
    assert status.exit_code == 0 and "refresh" in status.output and "build" in status.output
    named = runner.invoke(main, ["name", str(path), "--store", "readings", "1", "high"])
    assert named.exit_code == 0, named.output
    out = tmp_path / "store.json"
    got = runner.invoke(main, ["report", str(path), "--store", "readings", "--format", "json", "--out", str(out), "-q"])
    assert got.exit_code == 0, got.output
    content = json.loads(out.read_text())
    assert [h["event"] for h in content["history"]] == ["build", "refresh"]
    assert any(s["name"] == "high" for s in content["segments"])
    page = tmp_path / "store.html"
    assert runner.invoke(main, ["report", str(path), "--store", "readings", "--out", str(page), "-q"]).exit_code == 0
    assert 'id="chart-history-sizes"' in page.read_text() and 'id="chart-history-drift"' in page.read_text()


# --------------------------------------------------------------------------- in a real browser


def _browser_or_skip():
    from headless_browser import find_chromium

    found = find_chromium()
    if found is None:
        message = "no headless Chromium (apt-get install -y chromium)"
        if os.environ.get("CI", "").lower() in ("1", "true", "yes"):
            pytest.fail(message + " and CI=true")
        pytest.skip(message)
    return found


def test_report_opens_in_headless_chromium_with_every_chart_drawn(tmp_path):
    """The demo-style report in a real browser: each chart region drawn, no console error, no network request."""
    browser = _browser_or_skip()
    from headless_browser import look_at, region_is_drawn

    from tillite import demo

    db = tmp_path / "demo.duckdb"
    demo.build_demo_database(db, rows=20_000, days=20, seed=7)
    engine = DuckDBEngine(str(db))
    try:
        src = Source.of_table("meter_days")
        model = segment(engine, src, list(demo.DEMO_COLUMNS), Settings(k=5))
        model.names = {"4": "probable leak <check>"}
        content = R.report_of_model(engine, src, model, ["district"])
    finally:
        engine.close()
    page = R.write_report(content, tmp_path / "report.html")
    look = look_at(page, browser=browser)
    expected = {"chart-sizes", "chart-profile", "chart-map", "chart-breakdown-0"} | {f"chart-spread-{j}" for j in range(5)}
    assert expected <= set(look.charts)
    for chart, box in look.charts.items():
        assert box["width"] > 50 and box["height"] > 50, chart
        assert region_is_drawn(look.png, box), f"{chart} is blank"
    assert look.errors == []
    assert look.requests == []


def test_within_report_opens_in_headless_chromium_with_the_first_group_drawn(tmp_path):
    """A --within report in a real browser: the first group's section is open with every chart drawn, the
    others closed (their charts take no room until opened); no console error, no network request."""
    browser = _browser_or_skip()
    from headless_browser import look_at, region_is_drawn

    from tillite import demo

    db = tmp_path / "demo.duckdb"
    demo.build_demo_database(db, rows=20_000, days=20, seed=7)
    with DuckDBEngine(str(db)) as engine:
        src = Source.of_table("meter_days")
        model = segment(engine, src, list(demo.DEMO_COLUMNS), Settings(k=3, within="district"))
        content = R.report_of_model(engine, src, model)
    page = R.write_report(content, tmp_path / "report.html")
    look = look_at(page, browser=browser)
    first = {c for c in look.charts if c.startswith("group-0-chart-")}
    assert {"group-0-chart-sizes", "group-0-chart-profile", "group-0-chart-map"} <= first
    for chart in first:
        box = look.charts[chart]
        assert box["width"] > 50 and box["height"] > 50, chart
        assert region_is_drawn(look.png, box), f"{chart} is blank"
    assert all(f"group-{i}-chart-sizes" in look.charts for i in range(len(model.within["groups"])))
    assert look.errors == []
    assert look.requests == []


@pytest.mark.parametrize("dialect", ["duckdb", "postgres", "spark"])
def test_report_statements_render_and_parse_back_in_each_dialect(dialect):
    import sqlglot

    assign = sqlgen.Assignment(center=(0.0, 1.0), inv_scale=(1.0, 0.5), weights=(1.0, 1.0), centroids=((0.0, 0.0), (1.0, 1.0)))
    rows = sqlgen.report_rows_select(Source.of_table("points"), ["unit price", "select"], ["district", "kind"], assign, dialect)
    for statement in (sqlgen.report_scan_statement(rows, ["unit price", "select"], ["district"]),
                      sqlgen.report_scan_statement(rows, ["unit price", "select"], ["district", "kind"]),
                      sqlgen.quartile_statement(sqlgen.sampled_rows(rows, 1.0, dialect), ["unit price", "select"], dialect)):
        text = sqlgen.render(statement, dialect)
        # reference: sqlglot's own parser for the dialect reads the text back
        assert sqlglot.parse_one(text, read=dialect) is not None
        assert '"unit price"' in text or "`unit price`" in text


def test_demo_ends_by_writing_its_report_beside_the_database_and_says_where(tmp_path):
    db = tmp_path / "demo.duckdb"
    got = CliRunner().invoke(main, ["demo", "--db", str(db), "--rows", "5000", "--days", "10", "--out", str(tmp_path / "m.json"), "-q"])
    assert got.exit_code == 0, got.output
    page = tmp_path / "tillite-demo-report.html"
    assert page.exists() and f"report written to {page.resolve()}" in got.output
    assert 'id="chart-breakdown-0"' in page.read_text(encoding="utf-8")
    assert "probable leak" in page.read_text(encoding="utf-8")  # the demo's own caution (demo.REPORT_CAUTION)


def test_a_tables_report_carries_the_general_caution_and_no_demo_wording(tmp_path, blobs_600_4d_5c):
    x, _ = blobs_600_4d_5c
    db = tmp_path / "t.duckdb"
    with duckdb.connect(str(db)) as con:
        frame = {"a": x[:, 0], "b": x[:, 1]}  # noqa: F841
        con.execute("CREATE SCHEMA s1")
        con.execute("CREATE TABLE s1.t AS SELECT * FROM frame")
    runner = CliRunner()
    model = tmp_path / "m.json"
    assert runner.invoke(main, ["segment", str(db), "--table", "s1.t", "-c", "a,b", "--k", "3", "-o", str(model), "-q"]).exit_code == 0
    for fmt in ("html", "md"):
        out = tmp_path / f"r.{fmt}"
        got = runner.invoke(main, ["report", str(db), "--table", "s1.t", "--model", str(model), "--format", fmt,
                                   "--out", str(out), "-q"])
        assert got.exit_code == 0, got.output
        page = out.read_text(encoding="utf-8")
        assert "statistical grouping" in page and "usual procedures of the field" in page
        assert "meters" not in page and "inspection" not in page and "leak" not in page


def test_report_of_an_outlier_model_counts_the_rows_its_label_view_gives_each_segment(tmp_path):
    from sklearn.datasets import make_blobs

    x, _ = make_blobs(n_samples=8_000, centers=3, n_features=2, random_state=6)
    far = np.random.default_rng(3).uniform(40, 60, size=(25, 2))
    engine = DuckDBEngine(str(write_table(tmp_path / "far.duckdb", "t", columns_of(np.vstack([x, far]), ["a", "b"]))))
    model = segment(engine, Source.of_table("t"), ["a", "b"], Settings(k=3, tree_budget=150))
    assert model.cell_map_spec() is not None
    stats, _ = R.report_scan(engine, Source.of_table("t"), model)  # the map held as a temporary relation
    label(engine, Source.of_table("t"), model, "labels")
    seg = np.asarray(engine.con.execute('SELECT "segment" FROM "labels"').fetchnumpy()["segment"])
    # reference: numpy's counts of the label view's segments (-1: the outlier group)
    assert {sid: s["n"] for sid, s in stats.items()} == {int(v): int((seg == v).sum()) for v in np.unique(seg)}
    assert (seg == -1).any()
    assert engine.con.execute("SELECT count(*) FROM duckdb_views() WHERE view_name LIKE '__tillite_map%'").fetchone()[0] == 0
    engine.close()


def test_sse_without_a_refine_pass_is_labelled_a_cell_based_estimate_not_row_level(tmp_path):
    """A store runs no refine pass by default: its SSE assigns whole cells, so `store build`, `show` and the
    report call it a cell-based estimate; a segment run with its refine passes calls it row level.
    Reference: the SSE of the labels (numpy on the label view's rows) equals a row-level SSE only."""
    from sklearn.datasets import make_blobs

    x, _ = make_blobs(n_samples=3_000, centers=3, n_features=2, cluster_std=1.5, random_state=2)
    path = write_table(tmp_path / "s.duckdb", "points", {"a": x[:, 0], "b": x[:, 1], "part": np.arange(len(x)) % 3})
    runner = CliRunner()
    built = runner.invoke(main, ["store", "build", str(path), "-t", "points", "-c", "a,b", "--partition-by", "part", "--k", 3])
    assert built.exit_code == 0, built.output
    assert "SSE (cell-based estimate, no refine pass" in built.stdout and "row level" not in built.stdout
    out = tmp_path / "store.json"
    assert runner.invoke(main, ["report", str(path), "--store", "points", "--format", "json", "--out", str(out), "-q"]).exit_code == 0
    assert json.loads(out.read_text())["header"]["sse_basis"] == "cell-based estimate, no refine pass"
    page = tmp_path / "store.md"
    assert runner.invoke(main, ["report", str(path), "--store", "points", "--format", "md", "--out", str(page), "-q"]).exit_code == 0
    assert "SSE (cell-based estimate, no refine pass, scaled units)" in page.read_text()
    for passes, basis in ((0, "cell-based estimate, no refine pass"), (3, "row level")):
        model = tmp_path / f"m{passes}.json"
        assert runner.invoke(main, ["segment", str(path), "-t", "points", "-c", "a,b", "--k", 3, "--refine-passes", passes,
                                    "-o", str(model), "-q"]).exit_code == 0
        shown = runner.invoke(main, ["show", str(model)])
        assert f"SSE ({basis}, in standard deviations)" in shown.stdout
    refined = Model.read(tmp_path / "m3.json")
    engine = DuckDBEngine(str(path))
    try:
        label(engine, Source.of_table("points"), refined, "labels")
        seg = engine.con.execute("SELECT segment FROM labels ORDER BY a, b").fetchnumpy()["segment"]
        rows = engine.con.execute("SELECT a, b FROM labels ORDER BY a, b").fetchnumpy()
    finally:
        engine.close()
    u = (np.column_stack([rows["a"], rows["b"]]) - np.asarray(refined.center)) / np.asarray(refined.scale)
    own = np.asarray(refined.centroids_scaled)[[refined.segment_ids().index(s) for s in seg]]
    assert float(((u - own) ** 2).sum()) == pytest.approx(refined.sse, rel=1e-9)


def test_a_segment_whose_rows_all_hold_one_value_reads_exactly_that_mean_and_a_zero_sd(tmp_path, open_engine):
    """Means come back from centred, scaled sums; a segment of constant rows must not read the round-off
    (centre + (-centre / scale) * scale is about 1e-13 off).  Reference: numpy's mean and sd of the same rows."""
    rng = np.random.default_rng(3)
    zeros = np.column_stack([rng.normal(0, 1, 300), np.zeros(300)])
    busy = np.column_stack([rng.normal(40, 1, 300), rng.normal(7.3, 2.1, 300)])
    x = np.vstack([zeros, busy])
    path = write_table(tmp_path / "z.duckdb", "points", columns_of(x, ["a", "hours"]))
    engine = open_engine(path)
    src = Source.of_table("points")
    model = segment(engine, src, ["a", "hours"], Settings(k=2, seed=0))
    stats = R.segment_statistics(engine, src, model)
    flat = [st["columns"]["hours"] for st in stats.values() if st["columns"]["hours"]["max"] == 0.0]
    assert len(flat) == 1
    assert flat[0]["mean"] == np.zeros(300).mean() == 0.0 and flat[0]["sd"] == np.zeros(300).std() == 0.0
