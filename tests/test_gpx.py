"""GPX waypoints: validated against the GPX 1.1 XML Schema and read back with gpxpy."""

from pathlib import Path

import gpxpy
import numpy as np
import pytest
import xmlschema
from _synthetic_run import make_run

from screener.errors import InputError
from screener.outputs.gpx import write_gpx
from screener.outputs.sheets import site_sampling_points

# The XML Schema of the open GPX 1.1 standard (TopoGrafix 2004); tests/data/README.md.
XSD = Path(__file__).parent / "data" / "gpx-1.1.xsd"


@pytest.fixture(scope="module")
def run():
    return make_run()


@pytest.fixture(scope="module")
def schema():
    return xmlschema.XMLSchema(str(XSD))


def test_gpx_validates_and_reads_back(tmp_path, run, schema):
    points = site_sampling_points(run, n=3)
    path = write_gpx(tmp_path / "sites.gpx", run.sites, points)
    # Check against the GPX 1.1 XML Schema (TopoGrafix 2004).
    schema.validate(str(path))
    with path.open() as fh:
        gpx = gpxpy.parse(fh)
    assert len(gpx.waypoints) == len(run.sites) + len(points)
    by_name = {w.name: w for w in gpx.waypoints}
    for site in run.sites.itertuples():
        w = by_name[f"S{site.rank:02d}"]
        np.testing.assert_allclose(
            [w.latitude, w.longitude], [site.latitude, site.longitude], atol=1e-6
        )
        assert site.kind in w.description and f"rank {site.rank}" in w.description
        assert "m" in w.description and w.symbol
    rank = dict(zip(run.sites.site_id, run.sites["rank"], strict=True))
    for p in points.itertuples():
        w = by_name[f"S{rank[p.site_id]:02d}-{p.point_id}"]
        np.testing.assert_allclose(
            [w.latitude, w.longitude], [p.latitude, p.longitude], atol=1e-6
        )
    # Names fit a handheld's short display (common practice: <= 8 characters).
    assert all(len(w.name) <= 8 for w in gpx.waypoints)


def test_gpx_wraps_longitude_and_stays_valid(tmp_path, run, schema):
    sites = run.sites.copy()
    sites.loc[0, "longitude"] = 180.0  # the schema's longitudeType excludes +180
    path = write_gpx(tmp_path / "w.gpx", sites)
    schema.validate(str(path))
    with path.open() as fh:
        assert gpxpy.parse(fh).waypoints[0].longitude == -180.0


def test_gpx_rejects_missing_columns(tmp_path, run):
    with pytest.raises(InputError, match="lacks column"):
        write_gpx(tmp_path / "x.gpx", run.sites.drop(columns=["kind"]))


def test_gpx_rejects_bad_latitude(tmp_path, run):
    sites = run.sites.copy()
    sites.loc[1, "latitude"] = 95.0
    with pytest.raises(InputError, match="site row 1"):
        write_gpx(tmp_path / "x.gpx", sites)
