"""Darwin Core records: CSV/TSV and archives, datums, uncertainty, filters, flags."""

import zipfile

import numpy as np
import pytest
from affine import Affine
from numpy.testing import assert_allclose
from pyproj import Transformer

from screener.darwincore import REPEATED_TAXA, TERMS, DarwinCoreOptions
from screener.errors import RecordsError
from screener.grid import Grid
from screener.records import parse_records_text, read_records, validate_records

#: 0.01-degree cells over 100.5 W - 99.5 W, 40.5 N - 41.5 N (cells about 840 m x 1110 m)
GRID = Grid("EPSG:4326", Affine(0.01, 0, -100.5, 0, -0.01, 41.5), (100, 100))


def test_term_names_as_the_standard_spells_them():
    # Darwin Core standard (TDWG), term names from memory: lower camel case, "In" and
    # "Meters" capitalised, "ID" in capitals
    assert TERMS == ("occurrenceID", "scientificName", "decimalLongitude",
                     "decimalLatitude", "geodeticDatum", "coordinateUncertaintyInMeters",
                     "basisOfRecord", "eventDate")


def _tsv(rows, header=("occurrenceID", "scientificName", "decimalLongitude",
                       "decimalLatitude", "geodeticDatum", "coordinateUncertaintyInMeters",
                       "basisOfRecord", "eventDate")):
    return "\n".join("\t".join(map(str, r)) for r in [header, *rows]) + "\n"


def _base_rows(taxon="Orvanta pellis", n=4, start=0):
    rng = np.random.default_rng(start)
    out = []
    for k in range(n):
        lon = -100.4 + 0.8 * rng.random()
        lat = 40.6 + 0.8 * rng.random()
        out.append((f"urn:x:{start + k}", taxon, f"{lon:.5f}", f"{lat:.5f}", "WGS84", "30",
                    "PreservedSpecimen", f"{1990 + k}-06-1{k}"))
    return out


def _validate(text, taxa=None, **opts):
    raw = parse_records_text(text, "records.tsv")
    return validate_records(raw, GRID, min_records=1, taxa=taxa,
                            darwin_core=DarwinCoreOptions(**opts) if opts else None)


def test_darwin_core_tsv_is_read_with_scientific_name_and_ids():
    rows = _base_rows() + [("urn:x:bad", "Orvanta pellis", "-120.5", "40.7", "WGS84", "",
                            "PreservedSpecimen", "2001")]
    res = _validate(_tsv(rows))
    assert list(res.taxa) == ["Orvanta pellis"] and res.taxa["Orvanta pellis"].n == 4
    (drop,) = res.dropped
    assert drop.occurrence_id == "urn:x:bad" and "outside the grid" in drop.reason
    assert "urn:x:bad" in "\n".join(res.summary_lines())
    assert res.occurrence_ids[2] == "urn:x:0"


def test_a_chosen_rank_column():
    text = _tsv([r + ("Orvanta",) for r in _base_rows()],
                header=("occurrenceID", "scientificName", "decimalLongitude",
                        "decimalLatitude", "geodeticDatum", "coordinateUncertaintyInMeters",
                        "basisOfRecord", "eventDate", "genus"))
    raw = parse_records_text(text, "r.tsv", taxon_column="genus")
    assert set(raw.taxon) == {"Orvanta"}


def test_uncertainty_beyond_a_cell_is_dropped_with_the_reason():
    rows = _base_rows()
    rows[1] = rows[1][:5] + ("5000",) + rows[1][6:]
    rows[2] = rows[2][:5] + ("900",) + rows[2][6:]  # below the 1111 m cell side: kept
    res = _validate(_tsv(rows))
    (drop,) = res.dropped
    assert drop.line == 3 and drop.occurrence_id == "urn:x:1"
    assert "uncertainty 5,000 m is larger than the cell size (1,11" in drop.reason
    res = _validate(_tsv(rows), max_uncertainty_m=500.0)
    assert [d.line for d in res.dropped] == [3, 4]


def test_basis_of_record_and_date_filters():
    rows = _base_rows(n=6)
    rows[0] = rows[0][:6] + ("FossilSpecimen",) + rows[0][7:]
    rows[1] = rows[1][:6] + ("HUMAN_OBSERVATION",) + rows[1][7:]  # an export's spelling
    res = _validate(_tsv(rows), basis_of_record=("PreservedSpecimen", "HumanObservation"))
    assert [d.line for d in res.dropped] == [2]
    assert "FossilSpecimen" in res.dropped[0].reason
    # dates 1990-06-10 ... 1995-06-15; an interval and a year-month spelled out
    rows[2] = rows[2][:7] + ("1992-05/1992-07",)
    rows[3] = rows[3][:7] + ("1993-06",)
    res = _validate(_tsv(rows), date_from="1991", date_to="1993-06-30")
    kept = {int(x) for x in res.taxa["Orvanta pellis"].lines}
    assert kept == {3, 4, 5}
    reasons = {d.line: d.reason for d in res.dropped}
    assert "before date_from 1991" in reasons[2] and "after date_to" in reasons[6]
    with pytest.raises(RecordsError, match="date_from = '1991-13' is not a date"):
        _validate(_tsv(rows), date_from="1991-13")


def test_georeferencing_flags():
    rows = _base_rows(n=3)
    rows += [("f1", "Orvanta pellis", "0", "0", "", "", "PreservedSpecimen", "2000"),
             ("f2", "Orvanta pellis", "-99.5", "-99.5", "", "", "PreservedSpecimen", "2000"),
             ("f3", "Orvanta pellis", "-100", "41", "", "", "PreservedSpecimen", "2000")]
    # one locality shared by REPEATED_TAXA taxa (a placeholder centroid)
    rows += [(f"c{k}", f"Taxon {k}", "-100.12345", "41.12345", "", "", "PreservedSpecimen",
              "2000") for k in range(REPEATED_TAXA)]
    res = _validate(_tsv(rows), taxa=["Orvanta pellis"])
    reasons = {d.occurrence_id: d.reason for d in res.dropped}
    assert "0, 0" in reasons["f1"]
    assert "longitude equals latitude" in reasons["f2"]
    assert "whole degrees" in reasons["f3"]
    assert all(f"shared by {REPEATED_TAXA} taxa" in reasons[f"c{k}"]
               for k in range(REPEATED_TAXA))
    kept = _validate(_tsv(rows), flagged="keep")
    reasons = {d.occurrence_id: d.reason for d in kept.dropped}
    assert "0, 0" in reasons["f1"]  # 0,0 is dropped either way
    assert "f3" not in reasons and "Taxon 0" in kept.taxa
    assert any("whole degrees" in n for n in kept.notes)
    # one taxon fewer at the locality: not flagged
    res = _validate(_tsv(rows[:-1]), taxa=["Orvanta pellis"])
    assert not any("shared by" in d.reason for d in res.dropped)


def test_other_datums_are_transformed_with_pyproj():
    rows = _base_rows(n=3)
    rows[0] = rows[0][:4] + ("NAD27",) + rows[0][5:]
    rows[1] = rows[1][:4] + ("EPSG:4267",) + rows[1][5:]
    rows[2] = rows[2][:4] + ("not recorded",) + rows[2][5:]
    res = _validate(_tsv(rows))
    rec = res.taxa["Orvanta pellis"]
    # outside reference: pyproj's own NAD27 -> WGS84 transformation
    tr = Transformer.from_crs("EPSG:4267", "EPSG:4326", always_xy=True)
    for i in (0, 1):
        x, y = tr.transform(float(rows[i][2]), float(rows[i][3]))
        assert_allclose([rec.lon[i], rec.lat[i]], [x, y], rtol=0, atol=1e-9)
        assert abs(rec.lon[i] - float(rows[i][2])) > 1e-5  # the datums do differ here
    assert rec.lon[2] == float(rows[2][2])
    assert any("read as WGS84" in n for n in res.notes)
    rows[2] = rows[2][:4] + ("Datum of Quenmor",) + rows[2][5:]
    with pytest.raises(RecordsError, match="line 4: geodeticDatum 'Datum of Quenmor' is "
                                           "not a datum pyproj knows"):
        _validate(_tsv(rows))


META = """<?xml version="1.0" encoding="UTF-8"?>
<archive xmlns="http://rs.tdwg.org/dwc/text/" metadata="eml.xml">
  <core encoding="UTF-8" fieldsTerminatedBy="\\t" linesTerminatedBy="\\n"
        fieldsEnclosedBy="" ignoreHeaderLines="1"
        rowType="http://rs.tdwg.org/dwc/terms/Occurrence">
    <files><location>occurrence.txt</location></files>
    <id index="0"/>
    <field index="0" term="http://rs.tdwg.org/dwc/terms/occurrenceID"/>
    <field index="1" term="http://rs.tdwg.org/dwc/terms/scientificName"/>
    <field index="2" term="http://rs.tdwg.org/dwc/terms/decimalLatitude"/>
    <field index="3" term="http://rs.tdwg.org/dwc/terms/decimalLongitude"/>
    <field index="4" term="http://rs.tdwg.org/dwc/terms/coordinateUncertaintyInMeters"/>
    <field term="http://rs.tdwg.org/dwc/terms/geodeticDatum" default="WGS84"/>
  </core>
</archive>
"""


def test_darwin_core_archive(tmp_path):
    rows = _base_rows(n=4)
    # columns in the archive's own order (latitude before longitude), header ignored
    body = "id\tname\tlat\tlon\tunc\n" + "".join(
        f"{r[0]}\t{r[1]}\t{r[3]}\t{r[2]}\t{r[5]}\n" for r in rows)
    body += "urn:x:far\tOrvanta pellis\t41.05\t-100.05\t20000\n"
    p = tmp_path / "export.zip"
    with zipfile.ZipFile(p, "w") as zf:
        zf.writestr("meta.xml", META)
        zf.writestr("occurrence.txt", body)
    raw = read_records(p)
    assert raw.darwin_core and raw.path.endswith("export.zip:occurrence.txt")
    res = validate_records(raw, GRID, min_records=1)
    rec = res.taxa["Orvanta pellis"]
    assert_allclose(rec.lon, [float(r[2]) for r in rows])
    assert_allclose(rec.lat, [float(r[3]) for r in rows])
    (drop,) = res.dropped
    assert drop.occurrence_id == "urn:x:far" and drop.line == 6
    bad = tmp_path / "bad.zip"
    with zipfile.ZipFile(bad, "w") as zf:
        zf.writestr("meta.xml", META.replace("terms/Occurrence", "terms/Event"))
        zf.writestr("occurrence.txt", body)
    with pytest.raises(RecordsError, match="not occurrences"):
        read_records(bad)
