"""Accessible area and background draws."""

import numpy as np
from affine import Affine
from pyproj import Geod

from screener.background import accessible_area, distance_to_points_km, draw_background
from screener.grid import Grid


def test_buffer_matches_brute_force_geodesic_distances():
    # Reference: pyproj.Geod.inv from every cell centre to every record (brute force).
    g = Grid("EPSG:4326", Affine(0.05, 0, 20.0, 0, -0.05, 62.0), (40, 60))
    lon = np.array([21.0, 22.3])
    lat = np.array([61.2, 60.6])
    acc = accessible_area(g, lon, lat, buffer_km=25.0)
    rr, cc = np.mgrid[0:40, 0:60]
    clon, clat = g.lonlat(rr, cc)
    geod = Geod(ellps="WGS84")
    d = np.full(g.shape, np.inf)
    for a, b in zip(lon, lat):
        _, _, dist = geod.inv(np.full(clon.shape, a), np.full(clat.shape, b), clon, clat)
        d = np.minimum(d, dist / 1000)
    assert np.array_equal(acc, d <= 25.0)
    got = distance_to_points_km(g, lon, lat, 25.0)
    np.testing.assert_allclose(got[acc], d[acc], rtol=1e-9)


def test_background_is_drawn_without_replacement_by_ground_area():
    g = Grid("EPSG:4326", Affine(1, 0, 0, 0, -1, 80), (80, 10))
    acc = np.ones(g.shape, bool)
    bg = draw_background(g, acc, max_points=300, random_state=1)
    flat = bg.rows * 10 + bg.cols
    assert np.unique(flat).size == 300
    # cells near 75N cover a quarter of the ground of cells near 5N: fewer draws there
    north = (bg.rows < 20).sum()
    south = (bg.rows >= 60).sum()
    assert north < south
    # all cells used when the area is small
    small = np.zeros(g.shape, bool)
    small[:2, :3] = True
    assert draw_background(g, small, max_points=300).n == 6
