"""Walking routes from the start points to the top sites, for field sheets and GPX.

The access stage accumulates walking time from every start point over Tobler's hiking
function (:func:`screener.access.walking_surface`).  Tracing that surface back from a
site's representative cell gives the cheapest walking route to it: the cells walked,
the start point it leaves from, its ground length, the climb and drop along it and the
hours.  Days are hours divided by a walking day; 6 to 8 hours of walking a day is
common practice for loaded field teams (the default, 7 h, is a planning figure, not a
rule).

Ascent and descent are summed from the elevation of the cells along the route, so
relief finer than a cell (gullies, ridges crossed between cell centres) is missed:
they are lower bounds.  Routes ignore vegetation, rivers, cliffs and tracks; a local
guide knows better.

References
----------
.. [1] Tobler, W. (1993). Three presentations on geographical analysis and modeling.
   NCGIA Technical Report 93-1, Santa Barbara.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from screener.costdistance import least_cost_path, step_lengths_km

__all__ = ["DEFAULT_WALKING_DAY_HOURS", "WalkingRoute", "walking_routes", "walking_days"]

#: Hours of walking in a field day (common practice: 6 to 8 hours).
DEFAULT_WALKING_DAY_HOURS = 7.0


def walking_days(hours: float, day_hours: float = DEFAULT_WALKING_DAY_HOURS) -> int:
    """Whole walking days for ``hours`` of walking at ``day_hours`` a day.

    Examples
    --------
    >>> walking_days(5.0), walking_days(7.5), walking_days(14.0, 7.0)
    (1, 2, 2)
    """
    if not (math.isfinite(hours) and hours >= 0):
        raise ValueError(f"hours must be finite and >= 0; got {hours!r}")
    if not day_hours > 0:
        raise ValueError(f"day_hours must be > 0; got {day_hours!r}")
    return max(1, math.ceil(round(hours / day_hours, 9)))


@dataclass(frozen=True, eq=False)
class WalkingRoute:
    """The cheapest walking route from a start point to one site.

    Attributes
    ----------
    site_id : str
    start_name : str
        Name of the start point the route leaves from.
    cells : ndarray of int64, shape (n, 2)
        (row, col) cells from the start to the site.
    lon, lat : ndarray of float, shape (n,)
        WGS84 degrees of the cell centres.
    x, y : ndarray of float, shape (n,)
        Grid CRS coordinates of the cell centres.
    elevation_m : ndarray of float, shape (n,)
    distance_km : float
        Ground length along the route.
    ascent_m, descent_m : float
        Sums of the climbs and drops between consecutive cells (lower bounds).
    hours : float
        Walking time (the access stage's estimate).
    """

    site_id: str
    start_name: str
    cells: np.ndarray
    lon: np.ndarray
    lat: np.ndarray
    x: np.ndarray
    y: np.ndarray
    elevation_m: np.ndarray
    distance_km: float
    ascent_m: float
    descent_m: float
    hours: float

    def days(self, day_hours: float = DEFAULT_WALKING_DAY_HOURS) -> int:
        """Whole walking days at ``day_hours`` of walking a day."""
        return walking_days(self.hours, day_hours)


def walking_routes(grid, elevation, surface, starts, sites) -> dict:
    """Trace the walking route to each site from the access stage's surface.

    Parameters
    ----------
    grid : screener.grid.Grid
    elevation : ndarray of float, shape (n_rows, n_cols)
        Metres.
    surface : screener.costdistance.CostSurface
        Walking time in hours from the start points
        (:func:`screener.access.walking_surface`).
    starts : pandas.DataFrame
        Start points with ``name`` (optional), ``row`` and ``col``.
    sites : pandas.DataFrame
        Sites with ``site_id``, ``row`` and ``col`` (their representative cells).

    Returns
    -------
    dict of str to WalkingRoute
        Keyed by site id; sites no start point reaches are left out.
    """
    z = np.asarray(elevation, float)
    names = (
        starts["name"].astype(str).tolist()
        if "name" in starts.columns
        else [f"start {i + 1}" for i in range(len(starts))]
    )
    by_cell = {}
    for name, r, c in zip(names, starts["row"], starts["col"], strict=True):
        by_cell.setdefault((int(r), int(c)), name)
    out = {}
    for sid, r, c in zip(sites["site_id"], sites["row"], sites["col"], strict=True):
        cells = least_cost_path(surface, (int(r), int(c)))
        if len(cells) == 0:
            continue
        lon, lat = grid.lonlat(cells[:, 0], cells[:, 1])
        x, y = grid.xy(cells[:, 0], cells[:, 1])
        elev = z[cells[:, 0], cells[:, 1]]
        rise = np.diff(elev)
        rise = rise[np.isfinite(rise)]
        out[str(sid)] = WalkingRoute(
            site_id=str(sid),
            start_name=by_cell.get(tuple(int(v) for v in cells[0]), "start point"),
            cells=cells,
            lon=np.atleast_1d(np.asarray(lon, float)),
            lat=np.atleast_1d(np.asarray(lat, float)),
            x=np.atleast_1d(np.asarray(x, float)),
            y=np.atleast_1d(np.asarray(y, float)),
            elevation_m=elev,
            distance_km=float(step_lengths_km(grid, cells).sum()),
            ascent_m=float(rise[rise > 0].sum()),
            descent_m=float(-rise[rise < 0].sum()),
            hours=float(surface.cost[int(r), int(c)]),
        )
    return out
