"""Walking time from Tobler's hiking function."""

import numpy as np
import pytest
from affine import Affine
from matplotlib import cbook
from numpy.testing import assert_allclose
from pyproj import Geod

from screener.access import (
    isotropic_speed_kmh,
    slope_rise_over_run,
    start_cells_from_lonlat,
    tobler_speed_kmh,
    walk_from_start_points,
    walking_hours,
)
from screener.errors import InputError
from screener.grid import Grid


def projected_grid(shape, res=1000.0):
    return Grid("EPSG:32633", Affine(res, 0, 500000, 0, -res, 5000000), shape)


def test_tobler_published_values():
    """Tobler (1993): v = 6 exp(-3.5 |S + 0.05|); 5.04 km/h on the flat, 6 at -5 %."""
    assert_allclose(tobler_speed_kmh(0.0), 5.04, atol=0.005)
    assert_allclose(tobler_speed_kmh(-0.05), 6.0, rtol=1e-12)
    assert_allclose(tobler_speed_kmh(0.10), 6 * np.exp(-3.5 * 0.15), rtol=1e-12)
    assert_allclose(tobler_speed_kmh(0.10), 3.55, atol=0.005)
    # off-track factor 0.6 (Tobler 1993)
    assert_allclose(tobler_speed_kmh(0.0, off_track=True), 0.6 * 5.0366, atol=0.001)
    # isotropic approximation, time-consistent: up and back down 1 km of a slope
    # takes as long at the isotropic speed as at Tobler's two directional speeds
    for s in (0.0, 0.03, 0.1, 0.4):
        there_and_back = 1 / tobler_speed_kmh(s) + 1 / tobler_speed_kmh(-s)
        assert_allclose(2 / isotropic_speed_kmh(s, off_track=False), there_and_back,
                        rtol=1e-12)
    # the arithmetic mean would overstate it by cosh(3.5 * 0.05)^2 on slopes > 5 %
    # (from the formula: (a + b)^2 / 4ab with a/b = exp(2 * 3.5 * 0.05))
    s = np.linspace(0.05, 1.0, 20)
    mean = (tobler_speed_kmh(s) + tobler_speed_kmh(-s)) / 2
    assert_allclose(mean / isotropic_speed_kmh(s, off_track=False), np.cosh(0.175) ** 2,
                    rtol=1e-12)


def test_inclined_plane_hours():
    """On a 10 % plane every cell has slope 0.1; hours = km / isotropic speed."""
    grid = projected_grid((5, 8))
    x_m = (np.arange(8) + 0.5) * 1000.0
    z = np.broadcast_to(0.1 * x_m, grid.shape).copy()
    assert_allclose(slope_rise_over_run(grid, z), 0.1, rtol=1e-12)
    h = walking_hours(grid, z, ([2], [0]))
    v = 2 / (1 / (6 * np.exp(-3.5 * 0.15)) + 1 / (6 * np.exp(-3.5 * 0.05))) * 0.6
    assert_allclose(h[2, 7], 7.0 / v, rtol=1e-12)


def test_cells_beside_nodata_keep_their_slope_and_stay_walkable():
    """A 10 % plane (slope 0.1 everywhere, from its formula) with a sea of nodata along
    one side and a hole: cells beside the nodata get the plane's slope from the
    one-sided difference, and a start point on the coast reaches every land cell."""
    grid = projected_grid((6, 9))
    x_m = (np.arange(9) + 0.5) * 1000.0
    y_m = (np.arange(6) + 0.5) * 1000.0
    z = 0.06 * x_m[None, :] + 0.08 * y_m[:, None]  # |gradient| = hypot(0.06, 0.08) = 0.1
    z[:, :2] = np.nan  # the sea west of the coast at column 2
    z[3, 5] = np.nan  # a hole
    land = np.isfinite(z)
    grid = grid.with_mask(land)
    slope = slope_rise_over_run(grid, z)
    assert_allclose(slope[land], 0.1, rtol=1e-12)
    assert np.isnan(slope[~land]).all()
    h = walking_hours(grid, z, ([2], [2]))  # a landing on the coast
    assert np.isfinite(h[land]).all() and h[2, 2] == 0.0


def test_flat_latlon_hours_match_geodesic_distance():
    """Flat ground on a lat/lon grid: hours along a row = pyproj geodesic km / speed."""
    grid = Grid("EPSG:4326", Affine(0.01, 0, 20.0, 0, -0.01, 60.0), (3, 30))
    h = walking_hours(grid, np.zeros(grid.shape), ([1], [0]), off_track=False)
    lon, lat = grid.lonlat([1, 1], [0, 29])
    km = Geod(ellps="WGS84").inv(lon[0], lat[0], lon[1], lat[1])[2] / 1000.0
    assert_allclose(h[1, 29], km / tobler_speed_kmh(0.0), rtol=1e-6)


def test_real_dem_hours_bounded_by_straight_line():
    """On the real Jacksboro DEM, no cell is reached faster than straight-line km / top speed."""
    d = cbook.get_sample_data("jacksboro_fault_dem.npz")
    z = d["elevation"][::4, ::4].astype(float)  # every 4th cell keeps the test fast
    top = max(float(d["ymin"]), float(d["ymax"]))  # the file's ymin/ymax are swapped
    grid = Grid(
        "EPSG:4326",
        Affine(4 * d["dx"], 0, float(d["xmin"]), 0, -4 * d["dy"], top),
        z.shape,
    )
    rows, cols = start_cells_from_lonlat(grid, -84.3, 36.6)
    h = walking_hours(grid, z, (rows, cols))
    assert np.isfinite(h).all() and h[rows[0], cols[0]] == 0
    rr, cc = np.indices(grid.shape)
    lon, lat = grid.lonlat(rr.ravel(), cc.ravel())
    lon0, lat0 = grid.lonlat(rows, cols)
    km = (
        Geod(ellps="WGS84").inv(
            np.full(lon.size, lon0[0]), np.full(lat.size, lat0[0]), lon, lat
        )[2]
        / 1000.0
    )
    vmax = isotropic_speed_kmh(0.0)
    assert np.all(h.ravel() >= km / vmax - 1e-9)
    assert h.max() > km.max() / vmax  # the relief costs time somewhere


def test_impassable_and_errors():
    grid = projected_grid((4, 4))
    blocked = np.zeros(grid.shape, bool)
    blocked[:, 2] = True
    h = walking_hours(grid, np.zeros(grid.shape), ([0], [0]), impassable=blocked)
    assert np.isinf(h[:, 3]).all()
    with pytest.raises(InputError, match="outside the grid"):
        start_cells_from_lonlat(grid, 100.0, 0.0)
    with pytest.raises(InputError, match="shape"):
        walking_hours(grid, np.zeros((2, 2)), ([0], [0]))


def test_walk_from_start_points_uses_only_points_on_valid_cells():
    """Flat lat/lon strip: hours from the one usable start = pyproj geodesic km / speed."""
    import pandas as pd

    grid = Grid("EPSG:4326", Affine(0.01, 0, 20.0, 0, -0.01, 60.0), (3, 30),
                mask=np.ones((3, 30), bool))
    lon0, lat0 = grid.lonlat([1], [0])
    points = pd.DataFrame({"name": ["camp", "off the grid"],
                           "longitude": [float(lon0[0]), 25.0],
                           "latitude": [float(lat0[0]), 60.0]})
    walk, starts = walk_from_start_points(grid, np.zeros(grid.shape), points,
                                          off_track=False)
    assert starts["name"].tolist() == ["camp"]
    assert (starts["row"].tolist(), starts["col"].tolist()) == ([1], [0])
    assert starts["elevation_m"].tolist() == [0.0]
    lon, lat = grid.lonlat([1], [29])
    km = Geod(ellps="WGS84").inv(lon0[0], lat0[0], lon[0], lat[0])[2] / 1000.0
    assert_allclose(walk.cost[1, 29], km / tobler_speed_kmh(0.0), rtol=1e-6)
    with pytest.raises(InputError, match="starts.csv"):
        walk_from_start_points(grid, np.zeros(grid.shape), points.iloc[1:],
                               source="starts.csv")
