"""Walking time to candidate sites from roads, camps or trailheads.

Speed on foot follows Tobler's hiking function, ``v = 6 exp(-3.5 |S + 0.05|)`` km/h with
``S`` the rise over run of the step, times 0.6 off-track.  The function is anisotropic
(downhill at 5 % is fastest); a raster of cell costs cannot know the direction of travel,
so each cell gets the *isotropic approximation*: the harmonic mean of the up- and
downhill speeds at the cell's slope.  The harmonic mean keeps time consistent: crossing
a cell once uphill and once downhill takes exactly as long at the isotropic speed as at
Tobler's two directional speeds.  (The arithmetic mean would overstate the speed by up
to ``cosh(0.175)**2 - 1``, about 3 %, on slopes steeper than 5 %.)  Walking time is then the accumulated cost distance with cost
``1 / v`` hours per km (:mod:`screener.costdistance`).

Times are planning estimates for fit walkers in good weather; they ignore vegetation,
rivers, cliffs finer than a cell, heat and altitude.  Add margins, carry a way to call
for help, and get landholder permission before crossing private or customary land.

References
----------
.. [1] Tobler, W. (1993). Three presentations on geographical analysis and modeling.
   NCGIA Technical Report 93-1, Santa Barbara.
"""

from __future__ import annotations

import numpy as np

from screener.costdistance import cost_distance
from screener.errors import InputError
from screener.grid import Grid
from screener.layers import ground_gradients

__all__ = [
    "OFF_TRACK_FACTOR",
    "isotropic_speed_kmh",
    "slope_rise_over_run",
    "start_cells_from_lonlat",
    "tobler_speed_kmh",
    "walk_from_start_points",
    "walking_hours",
    "walking_surface",
]

#: Speed factor off tracks (Tobler 1993).
OFF_TRACK_FACTOR = 0.6


def tobler_speed_kmh(
    slope, *, off_track: bool = False, off_track_factor=OFF_TRACK_FACTOR
):
    """Walking speed in km/h from Tobler's hiking function.

    Parameters
    ----------
    slope : array_like
        Rise over run along the direction of travel (dimensionless; 0.1 = 10 % uphill,
        negative downhill).
    off_track : bool, default False
        Multiply by ``off_track_factor``.
    off_track_factor : float, default 0.6

    Returns
    -------
    ndarray or float
        Speed in km/h.

    References
    ----------
    .. [1] Tobler, W. (1993). NCGIA Technical Report 93-1.

    Examples
    --------
    >>> round(tobler_speed_kmh(-0.05), 6)
    6.0
    >>> round(tobler_speed_kmh(0.0), 3)
    5.037
    """
    s = np.asarray(slope, dtype=np.float64)
    v = 6.0 * np.exp(-3.5 * np.abs(s + 0.05))
    if off_track:
        v = v * off_track_factor
    return float(v) if v.ndim == 0 else v


def isotropic_speed_kmh(
    slope, *, off_track: bool = True, off_track_factor=OFF_TRACK_FACTOR
):
    """Harmonic mean of Tobler's uphill and downhill speeds at a slope magnitude, km/h.

    ``2 / (1 / v_up + 1 / v_down)``: the speed at which a walk up and back down the
    same ground takes as long as at the two directional speeds (time-consistent).
    """
    s = np.abs(np.asarray(slope, dtype=np.float64))
    up = tobler_speed_kmh(s, off_track=off_track, off_track_factor=off_track_factor)
    down = tobler_speed_kmh(-s, off_track=off_track, off_track_factor=off_track_factor)
    v = 2.0 / (1.0 / np.asarray(up) + 1.0 / np.asarray(down))
    return float(v) if v.ndim == 0 else v


def slope_rise_over_run(grid: Grid, elevation) -> np.ndarray:
    """Slope magnitude (rise over run) of every cell, from elevation in metres.

    From :func:`screener.layers.ground_gradients`: central differences
    (``numpy.gradient``) with the grid's ground spacing: per row for east-west steps
    (they shrink with latitude on geographic grids) and the row-to-row distances
    north-south.  Beside missing elevation (a coast, the edge of
    the data) the one-sided difference to the valid neighbour is used, so edge cells,
    such as a coastal start point, stay walkable; a cell with no valid neighbour
    along an axis has no slope along it.  NaN where elevation is missing.
    """
    z = np.asarray(elevation, dtype=np.float64)
    if z.shape != grid.shape:
        raise InputError(
            f"`elevation` has shape {z.shape}, but the grid is {grid.shape}."
        )
    z = np.where(grid.mask, z, np.nan)
    if grid.n_rows < 2 or grid.n_cols < 2:
        raise InputError("`elevation` needs at least 2 rows and 2 columns for slopes.")
    gx, gy = ground_gradients(grid, z)
    return np.hypot(gx, gy)


def start_cells_from_lonlat(grid: Grid, lon, lat):
    """(rows, cols) of start points given in WGS84 longitude/latitude (degrees).

    Raises
    ------
    InputError
        If a point lies outside the grid.
    """
    x, y = grid.from_lonlat(np.atleast_1d(lon), np.atleast_1d(lat))
    rows, cols, inside = grid.rowcol(x, y)
    if not np.all(inside):
        i = int(np.flatnonzero(~inside)[0])
        raise InputError(
            f"Start point {i} (lon {np.atleast_1d(lon)[i]}, lat {np.atleast_1d(lat)[i]}) "
            "lies outside the grid; check the coordinates (longitude first)."
        )
    return rows, cols


def walking_surface(
    grid: Grid,
    elevation,
    start_rc,
    off_track: bool = True,
    impassable=None,
    *,
    off_track_factor: float = OFF_TRACK_FACTOR,
    memory_mb: float | None = None,
):
    """Walking time from the nearest start point, with its traceback.

    As :func:`walking_hours`, but returns the whole
    :class:`~screener.costdistance.CostSurface` (``cost`` in hours), so the walking
    route to any cell can be traced with
    :func:`~screener.costdistance.least_cost_path`.
    """
    slope = slope_rise_over_run(grid, elevation)
    v = isotropic_speed_kmh(
        slope, off_track=off_track, off_track_factor=off_track_factor
    )
    with np.errstate(invalid="ignore"):
        cost = 1.0 / v  # hours per km
    if impassable is not None:
        cost = np.where(np.asarray(impassable, bool), np.inf, cost)
    return cost_distance(grid, cost, start_rc, memory_mb=memory_mb)


def walking_hours(
    grid: Grid,
    elevation,
    start_rc,
    off_track: bool = True,
    impassable=None,
    *,
    off_track_factor: float = OFF_TRACK_FACTOR,
    memory_mb: float | None = None,
) -> np.ndarray:
    """Walking time in hours from the nearest start point to every cell.

    Parameters
    ----------
    grid : Grid
    elevation : ndarray of shape (n_rows, n_cols)
        Metres; NaN cells are impassable.
    start_rc : tuple (rows, cols) or array of shape (n, 2)
        Start cells (roads, camps); see :func:`start_cells_from_lonlat`.
    off_track : bool, default True
        Apply the off-track factor everywhere.
    impassable : ndarray of bool, optional
        Cells no walker crosses (open water, cliffs, closed land).
    off_track_factor : float, default 0.6
    memory_mb : float, optional
        Working memory for the cost-distance solver (MB); see
        :class:`~screener.costdistance.CostGraph`.

    Returns
    -------
    ndarray of float64, shape (n_rows, n_cols)
        Hours; ``inf`` where unreachable.

    References
    ----------
    .. [1] Tobler, W. (1993). NCGIA Technical Report 93-1.
    """
    return walking_surface(
        grid,
        elevation,
        start_rc,
        off_track,
        impassable,
        off_track_factor=off_track_factor,
        memory_mb=memory_mb,
    ).cost


def walk_from_start_points(grid: Grid, elevation, start_points, *, off_track: bool = True,
                           memory_mb=None, source="the start points"):
    """Walking time (hours) from the start points that lie on valid cells.

    Parameters
    ----------
    grid : Grid
    elevation : ndarray of shape grid.shape
        Elevation in metres (NaN off the grid's valid mask).
    start_points : pandas.DataFrame
        With ``longitude`` and ``latitude`` (WGS84 degrees); points off the grid or on
        invalid cells are left out.
    off_track : bool, default True
        Walk at :data:`OFF_TRACK_FACTOR` of the on-track speed.
    memory_mb : float, optional
        Working memory of the cost-distance solver, in MB.
    source : str
        Where the start points came from, for the error message.

    Returns
    -------
    walk : screener.costdistance.CostDistanceResult
        As :func:`walking_surface` returns it (``walk.cost`` in hours).
    starts : pandas.DataFrame
        The start points used, with their ``row``, ``col`` and ``elevation_m`` (the
        elevation of their cell, metres).

    Raises
    ------
    InputError
        No start point lies on a valid cell.
    """
    x, y = grid.from_lonlat(start_points["longitude"].to_numpy(),
                            start_points["latitude"].to_numpy())
    r, c, inside = grid.rowcol(x, y)
    ok = inside.copy()
    ok[inside] = grid.mask[r[inside], c[inside]]
    if not ok.any():
        raise InputError(
            f"None of the start points in {source} lies on a valid cell of the grid; "
            "check their coordinates."
        )
    walk = walking_surface(grid, elevation, np.column_stack([r[ok], c[ok]]),
                           off_track=off_track, memory_mb=memory_mb)
    starts = start_points.loc[ok].copy()
    starts["row"], starts["col"] = r[ok], c[ok]
    starts["elevation_m"] = np.asarray(elevation, float)[r[ok], c[ok]]
    return walk, starts
