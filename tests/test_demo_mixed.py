"""The second invented example: mixed-grid layers and a Darwin Core archive."""

import hashlib
import json

import pandas as pd
import pytest
from click.testing import CliRunner

from screener.cli import main
from screener.demo_mixed import TAXA, write_mixed_example
from screener.intake import load_inputs
from screener.project import load_project

PLANTED = {
    "urn:catalog:TRW:ORTH:9001": "0, 0",
    "urn:catalog:TRW:ORTH:9002": "uncertainty 8,000 m",
    "urn:catalog:TRW:ORTH:9003": "FossilSpecimen",
    "urn:catalog:TRW:ORTH:9004": "before date_from 1970",
}


def _digests(folder):
    return {p.relative_to(folder).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


@pytest.fixture(scope="module")
def example(tmp_path_factory):
    folder = tmp_path_factory.mktemp("mixed") / "example"
    return write_mixed_example(folder)


def test_written_deterministically(example, tmp_path):
    again = write_mixed_example(tmp_path / "again")
    assert _digests(again.parent) == _digests(example.parent)


def test_intake_aligns_every_source_and_screens_the_archive(example, tmp_path):
    settings = load_project(example)
    intake = load_inputs(settings, cache_dir=tmp_path / "cache")
    methods = {o.name: o.method for o in intake.layer_origins}
    assert methods == {"temperature": "none", "temperature_range": "none",
                       "elevation": "average", "slope": "derived",
                       "landcover": "mode", "rainfall": "bilinear"}
    assert intake.grid.shape == (96, 120)  # 30 arc-seconds over 1 x 0.8 degrees
    dropped = {d.occurrence_id: d.reason for d in intake.records.dropped}
    assert set(dropped) == set(PLANTED)
    for oid, words in PLANTED.items():
        assert words in dropped[oid]
    assert set(intake.records.taxa) == set(TAXA)
    assert any("'Arc 1960': transformed to WGS84" in n for n in intake.records.notes)
    text = "\n".join(intake.summary_lines())
    assert "landcover: landcover.tif, EPSG:32747" in text and "mode" in text


@pytest.mark.slow
def test_run_and_debrief_keep_occurrence_ids(example, tmp_path):
    out = tmp_path / "results"
    r = CliRunner().invoke(main, ["-q", "run", str(example), "--out", str(out)])
    assert r.exit_code == 0, r.output
    dropped = pd.read_csv(out / "dropped_records.csv")
    assert set(dropped["occurrence_id"]) == set(PLANTED)
    report = (out / "report.html").read_text(encoding="utf-8")
    assert all(oid in report for oid in PLANTED)
    assert "layers aligned to the grid" in report
    layers = {o["name"]: o for o in json.loads((out / "run.json").read_text())["layers"]}
    assert layers["landcover"]["crs"] == "EPSG:32747"
    assert layers["elevation"]["shape"] == [980, 1220]
    cand = pd.read_csv(out / "candidates.csv")
    site = cand.iloc[0]
    field = tmp_path / "field.csv"
    field.write_text(
        "site_id,longitude,latitude,date,taxon,outcome,effort_hours\n"
        f"{site['site_id']},{site['longitude']},{site['latitude']},2027-03-02,"
        f"{TAXA[0]},found,4\n"
    )
    deb = tmp_path / "debrief"
    r = CliRunner().invoke(main, ["debrief", str(field), "--run", str(out), "--out", str(deb)])
    assert r.exit_code == 0, r.output
    upd = pd.read_csv(deb / "records_updated.csv", dtype=str, keep_default_na=False)
    assert "urn:catalog:TRW:ORTH:9001" in set(upd["occurrenceID"])
    new = upd.iloc[-1]
    assert new["scientificName"] == TAXA[0] and new["geodeticDatum"] == "WGS84"
    assert float(new["decimalLongitude"]) == pytest.approx(site["longitude"])
