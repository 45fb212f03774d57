"""Grid geometry against pyproj's geodesics and published constants."""

import numpy as np
import pytest
from affine import Affine
from numpy.testing import assert_allclose
from pyproj import Geod

from screener.errors import LayerError
from screener.grid import Grid, ellipsoidal_zone_area_km2, geodesic_distance_km

GEOD = Geod(ellps="WGS84")


def test_whole_globe_one_degree_cells_sum_to_wgs84_area():
    # Published constant: WGS84 surface area about 510,065,622 km2 (from memory).
    g = Grid("EPSG:4326", Affine(1, 0, -180, 0, -1, 90), (180, 360))
    total = float(np.asarray(g.cell_area_km2, float).sum())
    assert total == pytest.approx(510_065_622, rel=1e-8)


@pytest.mark.parametrize("lat_top", [89.0, 60.0, 10.0, -45.0])
@pytest.mark.parametrize("size", [1.0, 0.1, 0.01])
def test_cell_area_matches_pyproj_geodesic_polygon(lat_top, size):
    # Reference: pyproj.Geod(ellps="WGS84").polygon_area_perimeter; geodesic edges
    # bow slightly off the parallels, so a densified polygon is compared.
    g = Grid("EPSG:4326", Affine(size, 0, 20.0, 0, -size, lat_top), (2, 2))
    lons = np.r_[np.linspace(20, 20 + size, 200), np.full(50, 20 + size),
                 np.linspace(20 + size, 20, 200), np.full(50, 20.0)]
    lats = np.r_[np.full(200, lat_top), np.linspace(lat_top, lat_top - size, 50),
                 np.full(200, lat_top - size), np.linspace(lat_top - size, lat_top, 50)]
    area, _ = GEOD.polygon_area_perimeter(lons, lats)
    assert_allclose(g.cell_area_km2[0, 0], abs(area) / 1e6, rtol=2e-5)


def test_sphere_formula_limit():
    # Spherical formula A = R^2 dlon (sin top - sin bottom) for e2 = 0 (methods, sec. 1).
    R = 6371.0072
    a = ellipsoidal_zone_area_km2(10, 11, 1, a_m=R * 1000, e2=0.0)
    expect = R**2 * np.radians(1) * (np.sin(np.radians(11)) - np.sin(np.radians(10)))
    assert_allclose(a, expect, rtol=1e-12)


def test_geographic_step_lengths_match_geod_inv():
    # Reference: pyproj.Geod.inv between neighbouring cell centres.
    g = Grid("EPSG:4326", Affine(0.5, 0, 0, 0, -0.5, 70), (10, 4))
    lat = 70 - 0.25 - 0.5 * np.arange(10)
    _, _, ew = GEOD.inv(np.zeros(10), lat, np.full(10, 0.5), lat)
    _, _, ns = GEOD.inv(np.zeros(9), lat[:-1], np.zeros(9), lat[1:])
    _, _, dg = GEOD.inv(np.zeros(9), lat[:-1], np.full(9, 0.5), lat[1:])
    assert_allclose(g.ew_step_km, ew / 1000, rtol=1e-12)
    assert_allclose(g.ns_step_km, ns / 1000, rtol=1e-12)
    assert_allclose(g.diag_step_km, dg / 1000, rtol=1e-12)
    # east-west widths shrink poleward: degrees are not planar
    assert np.all(np.diff(g.ew_step_km) > 0)


def test_projected_steps_and_units():
    g = Grid("EPSG:32633", Affine(250, 0, 400000, 0, -250, 5_000_000), (4, 5))
    assert g.constant_steps
    assert_allclose(g.ew_step_km, 0.25)
    assert_allclose(g.diag_step_km, np.hypot(0.25, 0.25))


def test_projected_area_corrects_for_scale_factor():
    # UTM's central scale factor is 0.9996 (from memory): a planar 1 km2 cell on the
    # central meridian covers 1 / 0.9996**2 km2 of ground.  Cross-check with pyproj:
    # a cell's corners back-projected to lon/lat and measured on the ellipsoid.
    from pyproj import Transformer

    g = Grid("EPSG:32633", Affine(1000, 0, 499500, 0, -1000, 5_000_500), (1, 1))
    assert_allclose(g.cell_area_km2[0, 0], 1 / 0.9996**2, rtol=2e-5)
    t = Transformer.from_crs("EPSG:32633", "EPSG:4326", always_xy=True)
    xs = np.r_[np.linspace(499500, 500500, 50), np.full(50, 500500),
               np.linspace(500500, 499500, 50), np.full(50, 499500)]
    ys = np.r_[np.full(50, 5_000_500), np.linspace(5_000_500, 4_999_500, 50),
               np.full(50, 4_999_500), np.linspace(4_999_500, 5_000_500, 50)]
    lon, lat = t.transform(xs, ys)
    area, _ = GEOD.polygon_area_perimeter(lon, lat)
    assert_allclose(g.cell_area_km2[0, 0], abs(area) / 1e6, rtol=1e-5)


def test_rowcol_round_trip_and_outside():
    g = Grid("EPSG:4326", Affine(0.1, 0, 10, 0, -0.1, 5), (20, 30))
    rows, cols = np.array([0, 5, 19]), np.array([0, 7, 29])
    x, y = g.xy(rows, cols)
    r2, c2, inside = g.rowcol(np.r_[x, 9.0], np.r_[y, 4.0])
    assert inside.tolist() == [True, True, True, False]
    assert r2[:3].tolist() == rows.tolist() and c2[:3].tolist() == cols.tolist()


def test_rotated_grid_is_refused():
    with pytest.raises(LayerError, match="rotated"):
        Grid("EPSG:4326", Affine(0.1, 0.01, 10, 0, -0.1, 5), (2, 2))


def test_geodesic_distance_equator_degree():
    # One degree of longitude on the WGS84 equator is 111.319 km (from memory;
    # a = 6378.137 km times pi/180).
    assert geodesic_distance_km(0, 0, 1, 0) == pytest.approx(6378.137 * np.pi / 180, rel=1e-9)
