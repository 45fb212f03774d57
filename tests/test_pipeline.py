"""The whole pipeline on the (small) invented demo: contract, isolated massif, debrief."""

import dataclasses
import json

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from screener.cli import main
from screener.demo import DEMO_TRUTH, write_demo_scenario
from screener.outputs.tables import CANDIDATE_COLUMNS, EVALUATION_COLUMNS, OVERLAP_COLUMNS


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory):
    base = tmp_path_factory.mktemp("demo")
    project = write_demo_scenario(base / "scenario", size="small")
    text = project.read_text()
    # fewer replicates keep the suite quick; the demo command itself uses the defaults
    text += "\n[overlap]\nn_replicates = 19\n\n[evaluation]\nn_null = 9\n"
    project.write_text(text)
    out = base / "results"
    result = CliRunner().invoke(main, ["-q", "run", str(project), "--out", str(out)])
    assert result.exit_code == 0, result.output
    return project, out, result.output


@pytest.mark.slow
def test_outputs_follow_the_contract(demo_run):
    project, out, _ = demo_run
    truth = DEMO_TRUTH["small"]
    for taxon in truth.taxa:
        assert (out / "suitability" / f"{taxon.replace(' ', '_')}.tif").exists()
    for name in ["evaluation.csv", "overlap.csv", "candidates.csv", "candidates.gpkg",
                 "report.html", "map.html", "field_sheets.pdf", "sites.gpx", "run.json"]:
        assert (out / name).stat().st_size > 0, name
    ev = pd.read_csv(out / "evaluation.csv")
    assert list(ev.columns[: len(EVALUATION_COLUMNS)]) == EVALUATION_COLUMNS
    assert set(ev["algorithm"]) >= {"ellipsoid", "ensemble"}
    ov = pd.read_csv(out / "overlap.csv")
    assert list(ov.columns[: len(OVERLAP_COLUMNS)]) == OVERLAP_COLUMNS
    assert set(ov["space"]) == {"geographic", "environmental"}
    assert len(ov) == 2 * 3  # three pairs of three taxa, two spaces
    assert ov[["D", "I"]].apply(lambda c: c.between(0, 1)).all().all()
    cand = pd.read_csv(out / "candidates.csv")
    assert list(cand.columns[: len(CANDIDATE_COLUMNS)]) == CANDIDATE_COLUMNS
    assert cand["rank"].tolist() == sorted(cand["rank"])
    assert set(cand["kind"]) <= {"within-range", "near-range", "isolated"}
    gdf = gpd.read_file(out / "candidates.gpkg", layer="sites")
    assert gdf.crs is not None and len(gdf) == len(cand)


@pytest.mark.slow
@pytest.mark.slow
def test_field_pack_names_sites_by_site_id_with_walking_routes(demo_run):
    import gpxpy

    _, out, _ = demo_run
    cand = pd.read_csv(out / "candidates.csv")
    with (out / "sites.gpx").open() as fh:
        gpx = gpxpy.parse(fh)
    names = {w.name for w in gpx.waypoints}
    assert set(cand["site_id"]) <= names
    # every site reached from a start point has a track named by its site id
    reached = cand.loc[np.isfinite(cand["walk_hours"].astype(float)), "site_id"]
    assert {t.name for t in gpx.tracks} == {f"{sid} route" for sid in reached}
    assert {"Port Elvarre", "Tollo road end"} <= names  # start points
    page = (out / "map.html").read_text()
    assert all(f'data-site="{sid}"' in page for sid in cand["site_id"])


@pytest.mark.slow
@pytest.mark.parametrize("width", [1400, 800])
def test_demo_report_and_map_page_fit_the_window(demo_run, tmp_path, width):
    """The demo's report and map page in headless Chromium: no horizontal page scroll
    at 1400 px nor in a narrow (tablet) window, no console error, every figure loads;
    at 1400 px no table needs a sideways scroll of its own."""
    from _browser import find_chromium, probe

    chromium = find_chromium()
    if chromium is None:
        pytest.skip("chromium is not installed and could not be installed")
    _, out, _ = demo_run
    for name in ("report.html", "map.html"):
        got = probe(chromium, out / name, tmp_path, width=width)
        assert got["scrollWidth"] <= got["innerWidth"], (name, got)
        assert got["errors"] == [], name
        assert got["brokenImages"] == [], name
        if width >= 1400 or name == "map.html":
            assert got["overflowing"] == [], (name, got["overflowing"])
    assert got["images"] == 0  # the map page's rasters are SVG images, checked below
    page = (out / "map.html").read_text()
    assert page.count('<image href="data:image/png;base64,') == 1 + len(DEMO_TRUTH["small"].taxa)


@pytest.mark.slow
def test_demo_field_sheets_in_poppler_text(demo_run):
    """pdftotext (poppler) of the demo's field_sheets.pdf: one sheet per top site with
    its identifier, the walk in from a named start point, and every caution in full."""
    import subprocess

    from _synthetic_run import ensure_debian_tool

    from screener.outputs.cautions import CAUTIONS

    exe = ensure_debian_tool("pdftotext", "poppler-utils")
    if exe is None:
        pytest.skip("pdftotext (poppler-utils) is absent and could not be installed")
    project, out, _ = demo_run
    text = subprocess.run([exe, str(out / "field_sheets.pdf"), "-"], capture_output=True,
                          check=True, timeout=120).stdout.decode("utf-8", "replace")
    pages = [" ".join(p.split()) for p in text.split("\f") if p.strip()]
    cand = pd.read_csv(out / "candidates.csv")
    starts = pd.read_csv(project.parent / "start_points.csv")["name"].tolist()
    assert len(pages) == min(len(cand), 10)
    for page, site in zip(pages, cand.to_dict("records"), strict=False):
        assert f"Field sheet: site {site['site_id']} (rank {site['rank']})" in page
        for heading, caution in CAUTIONS:
            assert f"{heading}: {caution}" in page, (site["site_id"], heading)
        walk = page[page.index("Walk in from "):]
        assert any(walk.startswith(f"Walk in from {name}: ") for name in starts), walk[:80]
        assert f"clamped_share {100 * site['clamped_share']:.0f}%" in page


@pytest.mark.slow
def test_time_slice_figure_has_no_overprinted_text(demo_run, tmp_path):
    """The report's time-slice figure of the demo: no two of the figure's own texts
    (legend entries, its note) overlap once drawn."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.text import Text

    from screener.outputs.timeslices import plot_slices
    from screener.pipeline import run_project
    from screener.project import load_project

    project, _, _ = demo_run
    result = run_project(load_project(project), tmp_path / "again")  # from the cache
    fig = plot_slices(result)
    canvas = FigureCanvasAgg(fig)
    canvas.draw()
    renderer = canvas.get_renderer()
    boxes = [(t.get_text(), t.get_window_extent(renderer)) for t in fig.findobj(Text)
             if t.get_visible() and t.get_text().strip() and t.axes is None]
    assert any(text.startswith("Numbers are present ranks") for text, _ in boxes)
    for i, (a, box_a) in enumerate(boxes):
        for b, box_b in boxes[i + 1:]:
            assert not box_a.overlaps(box_b), (a, b)
    # no blank band: each panel's map fills its axes box (up to the margins), and the
    # legend starts within a few pixels below the lowest map
    maps_ = [ax.get_window_extent(renderer) for ax in fig.axes]
    for ax, box in zip(fig.axes, maps_):
        pos = ax.get_position(original=True)  # the box layout gave the panel
        given = pos.height * fig.bbox.height
        assert box.height >= 0.9 * given, (box.height, given)
    legend = fig.legends[0].get_window_extent(renderer)
    gap = min(b.y0 for b in maps_) - legend.y1
    assert gap < 0.05 * fig.bbox.height, gap


@pytest.mark.slow  # runs the whole small demo (its fixture)
def test_unrecorded_massif_is_the_top_isolated_site(demo_run):
    _, out, _ = demo_run
    truth = DEMO_TRUTH["small"].unrecorded
    cand = pd.read_csv(out / "candidates.csv")
    iso = cand[cand["kind"] == "isolated"].sort_values("rank")
    assert len(iso)
    top = iso.iloc[0]
    lo_lon, lo_lat, hi_lon, hi_lat = truth.bbox
    assert lo_lon <= top["longitude"] <= hi_lon and lo_lat <= top["latitude"] <= hi_lat
    assert top["gap_km"] >= 5.0
    # no recorded massif is reported as isolated: every isolated site is far from records
    assert (iso["nearest_record_km"] > 5.0).all()


@pytest.mark.slow
def test_cold_stage_joins_one_massif_and_leaves_the_unrecorded_one_isolated(demo_run):
    _, out, _ = demo_run
    cand = pd.read_csv(out / "candidates.csv")
    truth = {m.role: m for m in DEMO_TRUTH["small"].massifs}

    def on(massif):
        lo_lon, lo_lat, hi_lon, hi_lat = massif.bbox
        inside = cand["longitude"].between(lo_lon, hi_lon) & cand["latitude"].between(
            lo_lat, hi_lat)
        assert inside.any(), massif.name
        return cand[inside & (cand["kind"] != "within-range")].iloc[0]

    hullavar, pelto = on(truth["unrecorded"]), on(truth["dry"])
    assert hullavar["n_slices_isolated"] == hullavar["n_slices"] == 2
    assert not hullavar["ever_connected"]
    assert pelto["kind_cold_stage"] == "joined" and "cold_stage" in pelto["connected_in"]
    assert hullavar["rank"] < pelto["rank"]
    assert (out / "stability" / "_clade.tif").stat().st_size > 0
    report = (out / "report.html").read_text()
    assert "Climate through time" in report and "every past slice" in report


@pytest.mark.slow
def test_run_json_is_provenance(demo_run):
    project, out, _ = demo_run
    prov = json.loads((out / "run.json").read_text())
    for key in ["versions", "settings", "input_hashes", "seeds", "timings_s", "warnings"]:
        assert key in prov
    assert str(project) in prov["input_hashes"]
    assert prov["settings"]["overlap"]["n_replicates"] == 19


@pytest.mark.slow
def test_no_partial_folders_left(demo_run):
    _, out, _ = demo_run
    leftovers = [p.name for p in out.parent.iterdir() if ".partial" in p.name]
    assert leftovers == []


@pytest.mark.slow
def test_existing_output_folder_is_kept(demo_run):
    project, out, _ = demo_run
    before = (out / "candidates.csv").read_bytes()
    r = CliRunner().invoke(main, ["-q", "run", str(project), "--out", str(out)])
    assert r.exit_code == 2
    assert "already exists" in r.output and "--overwrite" in r.output
    assert (out / "candidates.csv").read_bytes() == before


@pytest.mark.slow
def test_rerun_from_cache_is_identical(demo_run, tmp_path):
    # Changing only ranking weights refits nothing (models and overlap come from the
    # cache) and leaves the model outputs byte-identical.
    project, out, _ = demo_run
    out2 = tmp_path / "again"
    r = CliRunner().invoke(main, ["-q", "run", str(project), "--out", str(out2)])
    assert r.exit_code == 0, r.output
    prov = json.loads((out2 / "run.json").read_text())
    assert "taxon" in prov["cache"]["hits"] and "taxon" not in prov["cache"]["misses"]
    for name in ["evaluation.csv", "overlap.csv", "candidates.csv"]:
        assert (out2 / name).read_bytes() == (out / name).read_bytes(), name


@pytest.mark.slow
def test_debrief_scores_a_survey(demo_run, tmp_path):
    project, out, _ = demo_run
    cand = pd.read_csv(out / "candidates.csv")
    first = cand.iloc[0]
    # one identifier per site, by rank, and a key from its location
    assert first["site_id"] == "S01" and cand["site_id"].tolist() == [
        f"S{r:02d}" for r in cand["rank"]
    ]
    assert cand["site_key"].is_unique
    field = tmp_path / "field.csv"
    # a single-record new lineage, found at its own coordinates inside the top site,
    # and a find logged by site only (no locality)
    field.write_text(
        "site_id,longitude,latitude,date,taxon,outcome,effort_hours\n"
        f"{first['site_id']},{first['longitude']},{first['latitude']},2027-03-02,"
        "Nebrivex sp. nov.,new-lineage,6\n"
        f"{first['site_id']},,,2027-03-03,Nebrivex tarvelli,found,2\n"
    )
    deb = tmp_path / "debrief"
    r = CliRunner().invoke(main, ["debrief", str(field), "--run", str(out), "--out", str(deb)])
    assert r.exit_code == 0, r.output
    upd = pd.read_csv(deb / "records_updated.csv", keep_default_na=False)
    orig = pd.read_csv(project.parent / "occurrences.csv")
    # only the find with its own coordinates is a new record, at those coordinates
    assert len(upd) == len(orig) + 1
    new = upd.iloc[-1]
    assert new["taxon"] == "Nebrivex sp. nov."
    assert float(new["longitude"]) == pytest.approx(first["longitude"])
    assert "left out of modelling" in new["note"]
    # the input record file itself is untouched
    assert len(pd.read_csv(project.parent / "occurrences.csv")) == len(orig)
    summary = json.loads((deb / "debrief.json").read_text())
    assert summary["n_visited"] == 1 and summary["n_hits"] == 1
    assert summary["n_new_records"] == 1  # the site-only find is not a test record
    assert 0 < summary["area_share"] < 1
    # the binomial p-value of one hit in one visit equals the predicted area share
    # (P(X >= 1), X ~ Bin(1, p) = p; scipy.stats.binomtest reference)
    from scipy.stats import binomtest

    assert summary["binomial_p"] == pytest.approx(
        binomtest(1, 1, summary["area_share"], alternative="greater").pvalue
    )
    assert np.isfinite(summary["auc"])
    assert "line 3" in (deb / "debrief.md").read_text()
    # the next project models the run's taxa, not the single-record lineage, and its
    # intake does not stop on it
    from screener.intake import check_project
    from screener.project import load_project

    nxt = load_project(deb / "project_next.toml")
    assert "Nebrivex sp. nov." not in nxt.project.taxa
    lines = check_project(nxt)
    assert any("Records:" in line for line in lines)


@pytest.mark.slow
def test_demo_then_reproduce_and_debrief_after_a_move(tmp_path):
    import shutil

    demo_dir = tmp_path / "demo"
    r = CliRunner().invoke(main, ["-q", "demo", "--out", str(demo_dir), "--size", "small"])
    assert r.exit_code == 0, r.output
    prov = json.loads((demo_dir / "results" / "run.json").read_text())
    # the demo prints each of its warnings once, and trips no collinearity warning
    printed = [line for line in r.output.splitlines() if line.startswith("Warning: ")]
    assert printed == [f"Warning: {w}" for w in prov["warnings"]]
    assert len(set(printed)) == len(printed) and "Collinear" not in r.output
    # run.json points at the scenario the demo left behind
    assert (demo_dir / "scenario" / "project.toml").samefile(prov["project_file"])
    for path in prov["input_hashes"]:
        assert (demo_dir / "scenario") in __import__("pathlib").Path(path).parents
    assert prov["project_file_from_results"] == "../scenario/project.toml"
    # moved as a whole, the results still find their inputs
    moved = tmp_path / "elsewhere" / "demo"
    moved.parent.mkdir()
    shutil.move(str(demo_dir), str(moved))
    again = tmp_path / "again"
    r = CliRunner().invoke(main, ["-q", "reproduce", str(moved / "results" / "run.json"),
                                  "--out", str(again)])
    assert r.exit_code == 0, r.output
    for name in ("candidates.csv", "evaluation.csv"):
        assert (again / name).read_bytes() == (moved / "results" / name).read_bytes()
    site = pd.read_csv(moved / "results" / "candidates.csv").iloc[0]
    field = tmp_path / "field.csv"
    field.write_text(
        "site_id,longitude,latitude,date,taxon,outcome,effort_hours\n"
        f"{site['site_id']},{site['longitude']},{site['latitude']},2027-03-02,"
        "Nebrivex tarvelli,found,6\n"
    )
    r = CliRunner().invoke(main, ["debrief", str(field), "--run", str(moved / "results"),
                                  "--out", str(tmp_path / "debrief")])
    assert r.exit_code == 0, r.output


def test_spatial_partitions_with_non_spatial_baseline(tmp_path):
    # Above the jackknife limit, evaluation uses spatial quadrants, and reports
    # alternating squares and random folds beside them (Radosavljevic & Anderson 2014).
    from screener.intake import load_inputs
    from screener.pipeline import model_taxon
    from screener.project import load_project

    project = write_demo_scenario(tmp_path / "scen", size="small")
    project.write_text(project.read_text()
                       + "\n[evaluation]\njackknife_below = 5\nn_null = 0\n")
    intake = load_inputs(load_project(project))
    taxon = max(intake.records.taxa, key=lambda t: intake.records.taxa[t].n)
    res = model_taxon(intake, taxon)
    row = next(r for r in res.evaluation if r["algorithm"] == "ellipsoid")
    assert row["method"] == "quadrants"
    for part in ("squares", "random"):
        assert 0.0 <= row[f"auc_{part}"] <= 1.0
    assert row["jackknife_p"] is None or np.isnan(row["jackknife_p"])


def test_auto_scheduler_uses_processes_only_for_heavy_work(tmp_path, monkeypatch):
    from screener import pipeline
    from screener.intake import load_inputs
    from screener.models.mapping import refit_seconds
    from screener.pipeline import geographic_test_seconds, resolve_scheduler
    from screener.project import load_project

    monkeypatch.setattr(pipeline, "default_n_workers", lambda: 2)
    project = write_demo_scenario(tmp_path / "scen", size="small")
    s = load_project(project).replace("overlap", n_replicates=19)
    intake = load_inputs(s)
    n_cells = int(intake.grid.mask.sum())
    # three taxa: 3 pairs x 4 maps x 19 replicates of the ellipsoid family (fixed cost
    # model): about a second, so serial is faster than starting a pool
    assert geographic_test_seconds(intake) == pytest.approx(
        3 * 4 * 19 * refit_seconds("ellipsoid", n_cells))
    assert resolve_scheduler("auto", intake) == "serial"
    heavy = dataclasses.replace(intake, settings=s.replace("models", families=["ellipsoid", "ppm"]))
    assert resolve_scheduler("auto", heavy) == "processes"
    # the default 999 replicates refit for tens of seconds: worth two processes
    many = dataclasses.replace(intake, settings=s.replace("overlap", n_replicates=999))
    assert geographic_test_seconds(many) >= pipeline.PARALLEL_OVERLAP_S
    assert resolve_scheduler("auto", many) == "processes"
    # ... but not on one core, nor when the geographic tests are off
    off = dataclasses.replace(intake, settings=many.settings.replace(
        "overlap", geographic_tests="off"))
    assert geographic_test_seconds(off) == 0 and resolve_scheduler("auto", off) == "serial"
    monkeypatch.setattr(pipeline, "default_n_workers", lambda: 1)
    assert resolve_scheduler("auto", many) == "serial"
    assert resolve_scheduler("tcp://127.0.0.1:8786", intake) == "tcp://127.0.0.1:8786"


@pytest.mark.slow
def test_no_candidate_sites_gives_a_finished_plan(tmp_path):
    # patches larger than the study area and within-range sites farther than any
    # record: no site at all, and still a finished run with an empty plan
    project = write_demo_scenario(tmp_path / "scen", size="small")
    project.write_text(
        project.read_text()
        + "\n[overlap]\nn_replicates = 9\ngeographic_tests = \"off\"\n\n[evaluation]\nn_null = 0\n"
        + "\n[isolation]\nmin_patch_km2 = 1e9\nwithin_range_min_km = 1e6\n"
    )
    out = tmp_path / "results"
    result = CliRunner().invoke(main, ["run", str(project), "--out", str(out)])
    assert result.exit_code == 0, result.output
    assert "No candidate sites" in result.output
    cand = pd.read_csv(out / "candidates.csv")
    assert len(cand) == 0 and list(cand.columns[: len(CANDIDATE_COLUMNS)]) == CANDIDATE_COLUMNS
    for name in ("report.html", "sites.gpx", "field_sheets.pdf", "barrier.tif"):
        assert (out / name).exists(), name


@pytest.mark.slow
def test_every_written_column_is_registered(demo_run):
    from screener.columns import CANDIDATES, EVALUATION, OVERLAP, find_column

    _, out, _ = demo_run
    for name, registry in [("candidates.csv", CANDIDATES), ("evaluation.csv", EVALUATION),
                           ("overlap.csv", OVERLAP)]:
        columns = pd.read_csv(out / name, nrows=0).columns
        missing = [c for c in columns if find_column(registry, c) is None]
        assert missing == [], f"{name}: register {missing} in screener/columns.py"
    sites = gpd.read_file(out / "candidates.gpkg", layer="sites")
    assert all(find_column(CANDIDATES, c) is not None for c in sites.columns
               if c != "geometry")
