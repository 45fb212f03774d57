"""The run-folder layout: one object names every output, writers and readers agree."""

from __future__ import annotations

import dataclasses
import json

import pandas as pd
import pytest
from _synthetic_run import TAXA, make_run

from screener.errors import InputError
from screener.outputs.run_folder import RunFolder, taxon_file_stem, taxon_file_stems


@pytest.mark.parametrize("name", ["Nebrivex tarvelli", "N. sp. 'north' (2027)", "a/b\\c:d",
                                  "Étoile", "", "  "])
def test_stems_are_safe_file_names(name):
    stem = taxon_file_stem(name)
    assert stem and "/" not in stem and "\\" not in stem and " " not in stem
    assert stem == stem.strip("_")
    assert all(c.isascii() and (c.isalnum() or c in "._-") for c in stem)


def test_stems_keep_the_order_of_the_taxa():
    assert list(taxon_file_stems(["b", "a", "c"])) == ["b", "a", "c"]


def test_every_taxon_path_lies_in_its_subfolder(tmp_path):
    folder = RunFolder.for_taxa(tmp_path, TAXA)
    for name in TAXA:
        stem = folder.stem(name)
        assert folder.suitability(name).parent.name == "suitability"
        assert folder.suitability(name, "ppm").name == f"{stem}.ppm.tif"
        assert folder.range_map(name, "relaxed").parent.name == "ranges"
        assert folder.mess(name).parent == folder.most_dissimilar(name).parent
    with pytest.raises(InputError, match="has no taxon 'Other'"):
        folder.suitability("Other")


def test_reading_uses_the_recorded_stems(tmp_path):
    # a folder written under another naming rule is read with the names it used
    (tmp_path / "run.json").write_text(json.dumps({"taxa": {"Alpha one": "t1"}}))
    folder, prov = RunFolder.read(tmp_path)
    assert folder.suitability("Alpha one") == tmp_path / "suitability" / "t1.tif"
    assert prov["taxa"] == {"Alpha one": "t1"}


def test_unreadable_run_json_is_an_input_error(tmp_path):
    (tmp_path / "run.json").write_text("{not json")
    with pytest.raises(InputError, match="not a readable run.json"):
        RunFolder.read(tmp_path)


@pytest.mark.slow
def test_written_outputs_are_where_the_folder_says(tmp_path):
    from screener.overlap import OVERLAP_COLUMNS
    from screener.outputs.writer import write_outputs

    # a one-taxon run has no pairs: its overlap table is empty
    result = dataclasses.replace(make_run(), overlap=pd.DataFrame(columns=list(OVERLAP_COLUMNS)))
    (tmp_path / "out").mkdir()
    written = write_outputs(result, tmp_path / "out")
    folder, prov = RunFolder.read(tmp_path / "out")
    assert prov["outputs"] == written
    assert all((folder.root / name).is_file() for name in written)
    expected = [folder.run_json, folder.evaluation_csv, folder.overlap_csv,
                folder.candidates_csv, folder.candidates_gpkg, folder.sites_gpx,
                folder.field_sheets_pdf, folder.report_html, folder.barrier_tif,
                folder.dropped_records_csv]
    for name in TAXA:
        expected += [folder.suitability(name), folder.range_map(name, "mtp")]
    assert {folder.relative(p) for p in expected} <= set(written)
    # the same overlap.csv header with or without pairs (it was 8 columns without)
    header = folder.overlap_csv.read_text("utf-8").splitlines()[0].split(",")
    assert header == list(OVERLAP_COLUMNS)


def test_time_slice_files_follow_the_run_folders_stems():
    # case twins get distinct stems; the slice and stability maps use the same ones as
    # the present-day maps, so no two taxa share a file
    folder = RunFolder.for_taxa("r", ["Nebrivex alba", "Nebrivex Alba"])
    a, b = (folder.stem(t) for t in ("Nebrivex alba", "Nebrivex Alba"))
    assert a.casefold() != b.casefold()
    for taxon, stem in (("Nebrivex alba", a), ("Nebrivex Alba", b)):
        assert folder.slice_suitability("cold_stage", taxon).as_posix() == \
            f"r/slices/cold_stage.{stem}.tif"
        assert folder.slice_mess("cold_stage", taxon).name == f"cold_stage.{stem}.mess.tif"
        assert folder.stability(taxon).as_posix() == f"r/stability/{stem}.tif"
    assert folder.stability().as_posix() == "r/stability/_clade.tif"
    # taxa named like the clade's map keep files of their own (case-blind too)
    clash = RunFolder.for_taxa("r", ["Clade", "clade", "_clade", "CLADE"])
    names = [clash.stability(t).name.casefold() for t in clash.stems]
    assert len(set(names + [clash.stability().name.casefold()])) == 5
    # a slice name that is not a plain word gets a unique stem, never a path separator
    odd = folder.slice_suitability("last glacial / max", "Nebrivex alba")
    assert odd.parent.as_posix() == "r/slices" and "/" not in odd.name
