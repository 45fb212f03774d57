"""Accessible area (calibration area, "M") and background draws per taxon.

The accessible area is the region a taxon could plausibly have reached; models are
calibrated against background drawn there, not over the whole grid (Barve et al.
2011, Ecological Modelling 222:1810).  The default is the union of geodesic buffers
of ``buffer_km`` around the records, restricted to valid cells.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from screener.grid import Grid, geodesic_distance_km
from screener.project import default

__all__ = ["Background", "accessible_area", "draw_background", "distance_to_points_km"]

#: Default buffer radius (km) around records (a documented choice: about the distance
#: a small, low-vagility montane animal's range edge may lie beyond its known
#: localities; set it from the taxon's biology where known).
DEFAULT_BUFFER_KM = default("background", "buffer_km")


@dataclass(eq=False)
class Background:
    """Background cells of one taxon.

    Attributes
    ----------
    rows, cols : ndarray of int
        Drawn cells (without replacement).
    accessible : ndarray of bool, shape (n_rows, n_cols)
        The accessible area they were drawn from.
    """

    rows: np.ndarray
    cols: np.ndarray
    accessible: np.ndarray

    @property
    def n(self) -> int:
        return int(self.rows.size)


def distance_to_points_km(grid: Grid, lon, lat, max_km: float) -> np.ndarray:
    """Geodesic distance (km) from every cell centre to the nearest point, up to max_km.

    Cells farther than ``max_km`` from every point get ``inf``.  Each point only
    touches the cells in its bounding box, so the cost grows with the number of
    points times the buffer area, not with the grid.

    Parameters
    ----------
    grid : Grid
    lon, lat : ndarray of shape (n,)
        WGS84 degrees.
    max_km : float

    Returns
    -------
    ndarray of float64, shape (n_rows, n_cols)
    """
    lon = np.atleast_1d(np.asarray(lon, float))
    lat = np.atleast_1d(np.asarray(lat, float))
    out = np.full(grid.shape, np.inf)
    x, y = grid.from_lonlat(lon, lat)
    x, y = np.atleast_1d(x), np.atleast_1d(y)
    # cell size in km (smallest east-west width bounds the box safely)
    min_ew = float(np.min(grid.ew_step_km))
    min_ns = float(np.min(grid.ns_step_km)) if grid.n_rows > 1 else min_ew
    pr, pc, _ = grid.rowcol(x, y)
    half_r = int(np.ceil(max_km / min_ns)) + 1
    half_c = int(np.ceil(max_km / min_ew)) + 1
    for i in range(lon.size):
        r0, r1 = max(0, pr[i] - half_r), min(grid.n_rows, pr[i] + half_r + 1)
        c0, c1 = max(0, pc[i] - half_c), min(grid.n_cols, pc[i] + half_c + 1)
        if r0 >= r1 or c0 >= c1:
            continue
        rr, cc = np.mgrid[r0:r1, c0:c1]
        clon, clat = grid.lonlat(rr, cc)
        d = geodesic_distance_km(lon[i], lat[i], clon, clat)
        d = np.where(d <= max_km, d, np.inf)
        np.minimum(out[r0:r1, c0:c1], d, out=out[r0:r1, c0:c1])
    return out


def accessible_area(grid: Grid, lon, lat, buffer_km: float = DEFAULT_BUFFER_KM) -> np.ndarray:
    """Valid cells within ``buffer_km`` (geodesic) of any record.

    Parameters
    ----------
    grid : Grid
    lon, lat : ndarray
        Record coordinates, WGS84 degrees.
    buffer_km : float, default 50

    Returns
    -------
    ndarray of bool, shape (n_rows, n_cols)

    References
    ----------
    .. [1] Barve, N. et al. (2011). The crucial role of the accessible area in
       ecological niche modeling and species distribution modeling. Ecological
       Modelling 222:1810-1819.
    """
    d = distance_to_points_km(grid, lon, lat, buffer_km)
    return np.isfinite(d) & grid.mask


def draw_background(
    grid: Grid,
    accessible: np.ndarray,
    *,
    max_points: int = default("background", "max_points"),
    random_state=0,
) -> Background:
    """Draw up to ``max_points`` background cells from the accessible area.

    Cells are drawn without replacement with probability proportional to their
    ground area, so on a lat/lon grid the draw is uniform over the ground, not over
    degrees.  When the area has no more cells than ``max_points`` all are used.

    Parameters
    ----------
    grid : Grid
    accessible : ndarray of bool
    max_points : int, default 10000
    random_state : int, default 0

    Returns
    -------
    Background
    """
    idx = np.flatnonzero(accessible.ravel())
    if idx.size > max_points:
        rng = np.random.default_rng(random_state)
        w = np.asarray(grid.cell_area_km2, float).ravel()[idx]
        idx = np.sort(rng.choice(idx, size=max_points, replace=False, p=w / w.sum()))
    rows, cols = np.unravel_index(idx, grid.shape)
    return Background(rows.astype(np.int64), cols.astype(np.int64), accessible)
