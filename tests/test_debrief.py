"""Debrief: read a finished run folder and score field results against it.

The run folder here is built from tiny synthetic rasters with the writers the
pipeline uses, so these checks do not depend on a full run.
"""

from __future__ import annotations

import hashlib
import json

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
from affine import Affine
from shapely.geometry import box

from screener.debrief import debrief_run, load_run_outputs
from screener.errors import InputError
from screener.grid import Grid
from screener.outputs.rasters import write_raster

TAXA = {"Alpha one": "Alpha_one", "Beta two": "Beta_two"}


@pytest.fixture
def run_dir(tmp_path):
    """A two-taxon run folder on a 10 x 12 lon/lat grid with one site per taxon."""
    grid = Grid("EPSG:4326", Affine(0.01, 0, 10.0, 0, -0.01, -5.0), (10, 12))
    run = tmp_path / "run"
    for sub in ("suitability", "ranges"):
        (run / sub).mkdir(parents=True)
    rr, cc = np.mgrid[0:10, 0:12]
    maps = {"Alpha one": (cc / 11.0).astype(np.float32),       # rises to the east
            "Beta two": (1 - rr / 9.0).astype(np.float32)}     # rises to the north
    mtp = {"Alpha one": 0.75, "Beta two": 0.8}
    for name, safe in TAXA.items():
        write_raster(run / "suitability" / f"{safe}.tif", maps[name], grid)
        write_raster(run / "ranges" / f"{safe}.mtp.tif", maps[name] >= mtp[name], grid)
    pd.DataFrame({
        "taxon": list(TAXA) * 2, "algorithm": ["ensemble"] * 2 + ["envelope"] * 2,
        "threshold_mtp": [mtp["Alpha one"], mtp["Beta two"], 0.1, 0.1],
    }).to_csv(run / "evaluation.csv", index=False)
    x0, y0 = grid.transform @ (9, 0)          # north-east corner cells: both ranges
    x1, y1 = grid.transform @ (0, 7)          # south-west corner: neither range
    sites = gpd.GeoDataFrame(
        {"site_id": [1, 2], "rank": [1, 2], "kind": ["isolated", "isolated"]},
        geometry=[box(x0, y0 - 0.02, x0 + 0.03, y0), box(x1, y1 - 0.03, x1 + 0.03, y1)],
        crs="EPSG:4326",
    )
    rep = sites.geometry.representative_point()
    sites["x"], sites["y"] = rep.x, rep.y
    sites["longitude"], sites["latitude"] = rep.x, rep.y  # a lon/lat grid
    sites.to_file(run / "candidates.gpkg", layer="sites", driver="GPKG")
    records = tmp_path / "records.csv"
    records.write_text("taxon,longitude,latitude\nAlpha one,10.115,-5.005\n")
    prov = {"taxa": TAXA, "seeds": {"random_state": 7},
            "settings": {"occurrences": {"path": str(records)}},
            # as a run records its inputs: SHA-256 of the file's bytes (hashlib)
            "input_hashes": {str(records): hashlib.sha256(records.read_bytes()).hexdigest()}}
    (run / "run.json").write_text(json.dumps(prov))
    return run, grid, maps, mtp, records


def test_load_run_outputs_reads_maps_ranges_and_thresholds(run_dir):
    run, grid, maps, mtp, _ = run_dir
    got = load_run_outputs(run)
    assert got["grid"].shape == grid.shape and got["grid"].transform == grid.transform
    for name in TAXA:
        np.testing.assert_array_equal(got["suitability"][name], maps[name])
    union = (maps["Alpha one"] >= mtp["Alpha one"]) | (maps["Beta two"] >= mtp["Beta two"])
    np.testing.assert_array_equal(got["predicted"], union)
    assert got["mtp"] == mtp
    assert list(got["sites"]["site_id"]) == [1, 2]


def test_debrief_writes_its_files_and_leaves_the_records_alone(run_dir, tmp_path):
    run, grid, maps, mtp, records = run_dir
    before = records.read_bytes()
    field = tmp_path / "field.csv"
    # the find at its own coordinates inside site 1 (north-east corner cells)
    lon, lat = grid.lonlat(0, 10)
    field.write_text(
        "site_id,longitude,latitude,date,taxon,outcome,effort_hours\n"
        f"1,{float(lon)},{float(lat)},2027-03-02,Alpha one,found,4\n"
        "2,,,2027-03-03,Beta two,not-found,5\n"
    )
    lines = debrief_run(field, run, tmp_path / "debrief")
    out = tmp_path / "debrief"
    assert sorted(p.name for p in out.iterdir()) == [
        ".screener-run", "debrief.json", "debrief.md", "project_next.toml",
        "records_updated.csv", "site_outcomes.csv"]
    summary = json.loads((out / "debrief.json").read_text())
    assert summary["n_visited"] == 2 and summary["n_hits"] == 1
    # the predicted share is the union of the MTP ranges over the (geodesic) cell areas
    areas = np.asarray(grid.cell_area_km2, float)
    union = (maps["Alpha one"] >= mtp["Alpha one"]) | (maps["Beta two"] >= mtp["Beta two"])
    assert summary["area_share"] == pytest.approx(areas[union].sum() / areas.sum())
    assert any("area predicted suitable" in line for line in lines)
    upd = pd.read_csv(out / "records_updated.csv")
    assert len(upd) == 2 and upd["taxon"].tolist() == ["Alpha one", "Alpha one"]
    assert upd["longitude"].iloc[-1] == pytest.approx(float(lon))
    assert records.read_bytes() == before


def test_debrief_refuses_an_existing_output_folder(run_dir, tmp_path):
    run = run_dir[0]
    (tmp_path / "debrief").mkdir()
    field = tmp_path / "field.csv"
    field.write_text("site_id,date,taxon,outcome\n1,2027-03-02,Alpha one,found\n")
    from screener.errors import OutputError

    with pytest.raises(OutputError, match="--overwrite"):
        debrief_run(field, run, tmp_path / "debrief")


def test_folder_without_run_json_is_an_input_error(tmp_path):
    with pytest.raises(InputError, match="no run.json"):
        load_run_outputs(tmp_path)


def test_run_json_without_taxa_is_an_input_error(tmp_path):
    (tmp_path / "run.json").write_text("{}")
    with pytest.raises(InputError, match="lists no taxa"):
        load_run_outputs(tmp_path)


def test_missing_map_is_named(run_dir):
    run = run_dir[0]
    (run / "ranges" / "Beta_two.mtp.tif").unlink()
    with pytest.raises(InputError, match="Beta_two"):
        load_run_outputs(run)


def test_moved_record_file_is_an_input_error(run_dir, tmp_path):
    run, *_, records = run_dir
    records.unlink()
    field = tmp_path / "field.csv"
    field.write_text("site_id,date,taxon,outcome\n1,2027-03-02,Alpha one,found\n")
    with pytest.raises(InputError, match="record file"):
        debrief_run(field, run, tmp_path / "debrief")
    assert not (tmp_path / "debrief").exists()


def test_debrief_refuses_a_record_file_the_run_did_not_read(run_dir, tmp_path):
    run, grid, maps, mtp, records = run_dir
    field = tmp_path / "field.csv"
    field.write_text("site_id,date,taxon,outcome\n1,2027-03-02,Alpha one,found\n")
    # the record file edited after the run: the updated file would carry other records
    records.write_text("taxon,longitude,latitude\nAlpha one,10.115,-5.005\nAlpha one,10.02,-5.03\n")
    with pytest.raises(InputError, match="changed since the run"):
        debrief_run(field, run, tmp_path / "out1")
    assert not (tmp_path / "out1").exists()
    debrief_run(field, run, tmp_path / "out2", allow_changed_inputs=True)
    assert (tmp_path / "out2" / "records_updated.csv").read_text().count("10.02") == 1
    # a run.json with its hashes deleted does not switch the check off
    prov = json.loads((run / "run.json").read_text())
    del prov["input_hashes"]
    (run / "run.json").write_text(json.dumps(prov))
    with pytest.raises(InputError, match="no hash"):
        debrief_run(field, run, tmp_path / "out3")
