"""Walking routes: length against pyproj's geodesic, climb against the cells, hours
against Tobler's hiking function."""

import math

import numpy as np
import pandas as pd
import pytest
from affine import Affine
from pyproj import Geod

from screener.access import walking_surface
from screener.grid import Grid
from screener.routes import walking_days, walking_routes


def _grid():
    # 0.01 degree cells near the equator (invented fixture)
    return Grid("EPSG:4326", Affine(0.01, 0, 30.0, 0, -0.01, 0.5), (30, 40))


def test_route_on_a_flat_plain_matches_tobler_and_the_geodesic():
    grid = _grid()
    z = np.full(grid.shape, 500.0)
    starts = pd.DataFrame({"name": ["Camp A"], "row": [15], "col": [2]})
    surf = walking_surface(grid, z, np.array([[15, 2]]))
    sites = pd.DataFrame({"site_id": ["S01"], "row": [15], "col": [30]})
    route = walking_routes(grid, z, surf, starts, sites)["S01"]
    assert route.start_name == "Camp A"
    assert [tuple(c) for c in route.cells[[0, -1]]] == [(15, 2), (15, 30)]
    # length: the sum of WGS84 geodesic steps between cell centres (pyproj.Geod)
    _, _, d = Geod(ellps="WGS84").inv(route.lon[:-1], route.lat[:-1], route.lon[1:],
                                       route.lat[1:])
    assert route.distance_km == pytest.approx(d.sum() / 1000.0, rel=1e-6)
    # hours: Tobler (1993) off track on flat ground, 0.6 * 6 exp(-3.5 * 0.05) km/h
    speed = 0.6 * 6.0 * math.exp(-3.5 * 0.05)
    assert route.hours == pytest.approx(route.distance_km / speed, rel=1e-6)
    assert route.ascent_m == 0 and route.descent_m == 0


def test_ascent_and_descent_sum_the_climbs_along_the_route():
    grid = _grid()
    rr, cc = np.mgrid[0:30, 0:40]
    z = 200.0 + 900.0 * np.exp(-((rr - 15) ** 2 + (cc - 20) ** 2) / 40.0)
    starts = pd.DataFrame({"row": [15], "col": [1]})
    surf = walking_surface(grid, z, np.array([[15, 1]]))
    sites = pd.DataFrame({"site_id": ["top", "far"], "row": [15, 15], "col": [20, 38]})
    routes = walking_routes(grid, z, surf, starts, sites)
    for route in routes.values():
        steps = np.diff(z[route.cells[:, 0], route.cells[:, 1]])
        assert route.ascent_m == pytest.approx(steps[steps > 0].sum())
        assert route.descent_m == pytest.approx(-steps[steps < 0].sum())
        assert route.hours == pytest.approx(surf.cost[tuple(route.cells[-1])])
        assert route.start_name == "start 1"
    top = routes["top"]
    # walking up to the summit climbs at least the summit's height above the start
    assert top.ascent_m >= z[15, 20] - z[15, 1] - 1e-9


def test_unreached_sites_have_no_route():
    grid = _grid()
    z = np.full(grid.shape, 100.0)
    z[:, 20] = np.nan  # a river no one crosses
    surf = walking_surface(grid, z, np.array([[5, 5]]))
    sites = pd.DataFrame({"site_id": ["east"], "row": [5], "col": [30]})
    starts = pd.DataFrame({"name": ["W"], "row": [5], "col": [5]})
    assert walking_routes(grid, z, surf, starts, sites) == {}


def test_walking_days():
    assert walking_days(0.5) == 1
    assert walking_days(7.0) == 1 and walking_days(7.01) == 2
    assert walking_days(13.0, 6.0) == 3
    with pytest.raises(ValueError):
        walking_days(float("inf"))
