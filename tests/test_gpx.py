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
    by_name = {w.name: w for w in gpx.waypoints}
    for site in run.sites.itertuples():
        w = by_name[site.site_id]
        np.testing.assert_allclose(
            [w.latitude, w.longitude], [site.latitude, site.longitude], atol=1e-6
        )
        assert site.kind in w.description and f"rank {site.rank}" in w.description
        assert "m" in w.description and w.symbol
    # no two waypoints on the same spot: a sampling point at the site point is the
    # site's own waypoint
    spots = [(round(w.latitude, 7), round(w.longitude, 7)) for w in gpx.waypoints]
    assert len(spots) == len(set(spots))
    site_xy = run.sites.set_index("site_id")[["longitude", "latitude"]]
    n_same = 0
    for p in points.itertuples():
        same = np.allclose([p.longitude, p.latitude], site_xy.loc[p.site_id], atol=1e-9)
        n_same += same
        w = by_name[p.site_id if same else f"{p.site_id}-{p.point_id}"]
        np.testing.assert_allclose(
            [w.latitude, w.longitude], [p.latitude, p.longitude], atol=1e-6
        )
        # every sampling point's waypoint carries its elevation, the site's own too
        assert w.elevation == pytest.approx(p.elevation_m, abs=0.05)
    assert n_same >= 1
    assert len(gpx.waypoints) == len(run.sites) + len(points) - n_same
    # Names fit a handheld's short display (common practice: <= 8 characters).
    assert all(len(w.name) <= 8 for w in gpx.waypoints)


def test_gpx_start_points_and_route_tracks(tmp_path, run, schema):
    import pandas as pd

    from screener.access import walking_surface
    from screener.routes import walking_routes

    lon, lat = run.grid.lonlat(38, 48)
    starts = pd.DataFrame({"name": ["Road end"], "longitude": [float(lon)],
                           "latitude": [float(lat)], "row": [38], "col": [48],
                           "elevation_m": [float(run.elevation[38, 48])]})
    surf = walking_surface(run.grid, run.elevation, np.array([[38, 48]]))
    sites = run.sites.copy()
    sites["row"], sites["col"], _ = run.grid.rowcol(sites["x"].to_numpy(),
                                                    sites["y"].to_numpy())
    routes = walking_routes(run.grid, run.elevation, surf, starts, sites.head(2))
    path = write_gpx(tmp_path / "w.gpx", run.sites, start_points=starts, routes=routes)
    schema.validate(str(path))
    with path.open() as fh:
        gpx = gpxpy.parse(fh)
    start = [w for w in gpx.waypoints if w.name == "Road end"]
    assert len(start) == 1 and start[0].latitude == pytest.approx(float(lat), abs=1e-6)
    # its elevation as gpxpy reads it back (GPX 1.1 <ele>, metres, one decimal)
    assert start[0].elevation == pytest.approx(float(run.elevation[38, 48]), abs=0.05)
    # one track per routed site, in rank order
    ranked = [sid for sid in run.sites["site_id"] if sid in routes]
    assert [t.name for t in gpx.tracks] == [f"{sid} route" for sid in ranked]
    for trk, route in zip(gpx.tracks, (routes[sid] for sid in ranked), strict=True):
        pts = trk.segments[0].points
        assert len(pts) == len(route.cells)
        # the track runs from the start point to the site's cell
        assert (pts[0].latitude, pts[0].longitude) == pytest.approx(
            (float(lat), float(lon)), abs=1e-6)
        # gpxpy's own 2D length (haversine) agrees with the route's geodesic length
        assert trk.length_2d() / 1000 == pytest.approx(route.distance_km, rel=5e-3)
        assert "Road end" in trk.description


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
