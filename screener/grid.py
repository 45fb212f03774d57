"""The raster grid every stage works on: CRS, transform, shape, valid cells.

A :class:`Grid` knows its geometry in ground units.  On a projected grid, cells are
``dx`` by ``dy`` in the CRS's linear unit; on a geographic (longitude/latitude) grid the
east-west width of a cell shrinks with latitude, so widths, diagonal steps and areas
are computed per row on the CRS's ellipsoid.  Degrees are never treated as planar.

Arrays are indexed ``(row, col)``: rows run from north to south as in the raster.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property

import numpy as np
from affine import Affine
from pyproj import CRS as ProjCRS
from pyproj import Geod, Proj, Transformer

from screener.errors import LayerError

__all__ = ["Grid", "geodesic_distance_km", "ellipsoidal_zone_area_km2"]

#: WGS84 ellipsoid, used for record coordinates and geodesic distances.
WGS84_GEOD = Geod(ellps="WGS84")


def geodesic_distance_km(lon1, lat1, lon2, lat2, geod: Geod = WGS84_GEOD):
    """Geodesic distance on the ellipsoid, in km.

    Parameters
    ----------
    lon1, lat1, lon2, lat2 : array_like
        Coordinates in degrees (broadcast together).
    geod : pyproj.Geod, default WGS84

    Returns
    -------
    ndarray or float
        Distances in km.

    Examples
    --------
    >>> round(geodesic_distance_km(0.0, 0.0, 1.0, 0.0), 3)  # one degree of equator
    111.319
    """
    lon1, lat1, lon2, lat2 = np.broadcast_arrays(
        *(np.asarray(v, dtype=float) for v in (lon1, lat1, lon2, lat2))
    )
    _, _, dist = geod.inv(lon1, lat1, lon2, lat2)
    dist = np.asarray(dist, dtype=float) / 1000.0
    return float(dist) if dist.ndim == 0 else dist


def _authalic_q(lat_deg, e2):
    """The ``q`` function of the authalic latitude (Snyder 1987, eq. 3-12)."""
    s = np.sin(np.radians(lat_deg))
    if e2 == 0:
        return 2.0 * s
    e = np.sqrt(e2)
    return (1 - e2) * (
        s / (1 - e2 * s * s) - (1 / (2 * e)) * np.log((1 - e * s) / (1 + e * s))
    )


def ellipsoidal_zone_area_km2(lat_south, lat_north, dlon_deg, a_m=6378137.0, e2=None):
    """Exact area of a cell bounded by two parallels and two meridians, in km².

    Parameters
    ----------
    lat_south, lat_north : array_like
        Bounding latitudes in degrees.
    dlon_deg : float
        Width in degrees of longitude.
    a_m : float, default 6378137.0
        Semi-major axis in metres (WGS84 by default).
    e2 : float, optional
        First eccentricity squared; WGS84's when omitted.

    Returns
    -------
    ndarray
        Area in km².

    Notes
    -----
    ``A = (a^2 / 2) * dlon * (q(lat_north) - q(lat_south))`` with ``q`` the authalic
    function of the ellipsoid; on a sphere this reduces to
    ``R^2 dlon (sin lat_north - sin lat_south)``.

    References
    ----------
    .. [1] Snyder, J. P. (1987). Map Projections: A Working Manual. USGS Professional
       Paper 1395, eqs. 3-11 to 3-12.

    Examples
    --------
    >>> round(float(ellipsoidal_zone_area_km2(-90, 90, 360)))  # WGS84 surface area
    510065622
    """
    if e2 is None:
        f = 1 / 298.257223563
        e2 = f * (2 - f)
    qn = _authalic_q(np.asarray(lat_north, float), e2)
    qs = _authalic_q(np.asarray(lat_south, float), e2)
    return (a_m**2 / 2.0) * np.radians(abs(dlon_deg)) * np.abs(qn - qs) / 1e6


@dataclass(frozen=True, eq=False)
class Grid:
    """A north-up raster grid with a valid-cell mask and geodesic cell geometry.

    Parameters
    ----------
    crs : rasterio.crs.CRS or pyproj.CRS or str
        Coordinate reference system of the rasters.
    transform : affine.Affine
        Pixel-to-CRS transform (north-up: no rotation terms).
    shape : tuple of int
        ``(n_rows, n_cols)``.
    mask : ndarray of bool, shape (n_rows, n_cols), optional
        True where every layer has data.  All cells valid when omitted.

    Attributes
    ----------
    is_geographic : bool
        True for longitude/latitude grids.
    row_cell_area_km2 : ndarray of shape (n_rows,) or None
        Geographic grids: cell area per row.
    ew_step_km : ndarray of shape (n_rows,)
        Ground distance between the centres of horizontally adjacent cells, per row.
    ns_step_km : ndarray of shape (n_rows - 1,)
        Ground distance between the centres of cells in rows ``i`` and ``i + 1``.
    diag_step_km : ndarray of shape (n_rows - 1,)
        Ground distance between diagonally adjacent centres in rows ``i``, ``i + 1``.

    Examples
    --------
    >>> from affine import Affine
    >>> g = Grid("EPSG:32633", Affine(1000, 0, 500000, 0, -1000, 5000000), (3, 4))
    >>> g.is_geographic, float(g.ew_step_km[0]), float(g.diag_step_km[0]) ** 2
    (False, 1.0, 2.0000000000000004)
    """

    crs: object
    transform: Affine
    shape: tuple
    mask: np.ndarray = field(default=None)

    def __post_init__(self):
        shape = tuple(int(v) for v in self.shape)
        object.__setattr__(self, "shape", shape)
        t = self.transform
        if t.b != 0 or t.d != 0:
            raise LayerError(
                "The raster grid is rotated (transform has shear/rotation terms); "
                "warp the layers to a north-up grid first (e.g. with gdalwarp)."
            )
        if t.e >= 0:
            raise LayerError(
                "The raster grid is south-up (positive row step); "
                "rewrite the layers north-up first."
            )
        if self.mask is None:
            object.__setattr__(self, "mask", np.ones(shape, dtype=bool))
        else:
            m = np.asarray(self.mask, dtype=bool)
            if m.shape != shape:
                raise ValueError(f"mask has shape {m.shape}, expected {shape}")
            object.__setattr__(self, "mask", m)

    # --- coordinate systems ---------------------------------------------------------
    @cached_property
    def pyproj_crs(self) -> ProjCRS:
        """The CRS as a :class:`pyproj.CRS`."""
        crs = self.crs
        if isinstance(crs, ProjCRS):
            return crs
        if hasattr(crs, "to_wkt"):
            return ProjCRS.from_wkt(crs.to_wkt())
        return ProjCRS.from_user_input(crs)

    @property
    def is_geographic(self) -> bool:
        return bool(self.pyproj_crs.is_geographic)

    @cached_property
    def geod(self) -> Geod:
        """The ellipsoid of the grid's CRS, as a :class:`pyproj.Geod`."""
        ell = self.pyproj_crs.ellipsoid
        if ell is None:
            return WGS84_GEOD
        return Geod(a=ell.semi_major_metre, b=ell.semi_minor_metre)

    @cached_property
    def _to_lonlat(self) -> Transformer:
        return Transformer.from_crs(self.pyproj_crs, "EPSG:4326", always_xy=True)

    @cached_property
    def _from_lonlat(self) -> Transformer:
        return Transformer.from_crs("EPSG:4326", self.pyproj_crs, always_xy=True)

    def to_lonlat(self, x, y):
        """Grid-CRS coordinates to WGS84 longitude, latitude (degrees)."""
        return self._to_lonlat.transform(np.asarray(x, float), np.asarray(y, float))

    def from_lonlat(self, lon, lat):
        """WGS84 longitude, latitude (degrees) to grid-CRS coordinates."""
        return self._from_lonlat.transform(np.asarray(lon, float), np.asarray(lat, float))

    # --- geometry -------------------------------------------------------------------
    @property
    def n_rows(self) -> int:
        return self.shape[0]

    @property
    def n_cols(self) -> int:
        return self.shape[1]

    @property
    def n_cells(self) -> int:
        return self.shape[0] * self.shape[1]

    @property
    def n_valid(self) -> int:
        return int(self.mask.sum())

    @property
    def res(self) -> tuple:
        """Cell size ``(dx, dy)`` in CRS units (degrees on geographic grids)."""
        return (abs(self.transform.a), abs(self.transform.e))

    @property
    def bounds(self) -> tuple:
        """``(left, bottom, right, top)`` in CRS units."""
        t = self.transform
        return (t.c, t.f + t.e * self.n_rows, t.c + t.a * self.n_cols, t.f)

    def xy(self, rows, cols):
        """Centre coordinates (CRS units) of cells ``(rows, cols)``."""
        t = self.transform
        rows = np.asarray(rows, float)
        cols = np.asarray(cols, float)
        return t.c + (cols + 0.5) * t.a, t.f + (rows + 0.5) * t.e

    def lonlat(self, rows, cols):
        """Centre longitude, latitude (WGS84 degrees) of cells ``(rows, cols)``."""
        return self.to_lonlat(*self.xy(rows, cols))

    def rowcol(self, x, y):
        """Cell indices of points in CRS units, and whether each lies on the grid.

        Returns
        -------
        rows, cols : ndarray of int
        inside : ndarray of bool
        """
        t = self.transform
        x = np.asarray(x, float)
        y = np.asarray(y, float)
        with np.errstate(invalid="ignore"):
            cols = np.floor((x - t.c) / t.a)
            rows = np.floor((y - t.f) / t.e)
        inside = (
            np.isfinite(rows)
            & np.isfinite(cols)
            & (rows >= 0)
            & (rows < self.n_rows)
            & (cols >= 0)
            & (cols < self.n_cols)
        )
        rows = np.where(inside, rows, 0).astype(np.int64)
        cols = np.where(inside, cols, 0).astype(np.int64)
        return rows, cols, inside

    @property
    def row_centre_y(self) -> np.ndarray:
        """CRS y (latitude on geographic grids) of each row's centre."""
        return self.transform.f + (np.arange(self.n_rows) + 0.5) * self.transform.e

    @cached_property
    def _linear_unit_km(self) -> float:
        if self.is_geographic:
            return float("nan")
        axis = self.pyproj_crs.axis_info
        factor = axis[0].unit_conversion_factor if axis else 1.0
        return float(factor) / 1000.0

    @cached_property
    def ew_step_km(self) -> np.ndarray:
        if not self.is_geographic:
            return np.full(self.n_rows, self.res[0] * self._linear_unit_km)
        lat = self.row_centre_y
        d = geodesic_distance_km(0.0, lat, self.res[0], lat, self.geod)
        return np.atleast_1d(np.asarray(d, float))

    @cached_property
    def ns_step_km(self) -> np.ndarray:
        if not self.is_geographic:
            return np.full(max(self.n_rows - 1, 0), self.res[1] * self._linear_unit_km)
        lat = self.row_centre_y
        d = geodesic_distance_km(0.0, lat[:-1], 0.0, lat[1:], self.geod)
        return np.atleast_1d(np.asarray(d, float))

    @cached_property
    def diag_step_km(self) -> np.ndarray:
        if not self.is_geographic:
            dx = self.res[0] * self._linear_unit_km
            dy = self.res[1] * self._linear_unit_km
            return np.full(max(self.n_rows - 1, 0), float(np.hypot(dx, dy)))
        lat = self.row_centre_y
        d = geodesic_distance_km(0.0, lat[:-1], self.res[0], lat[1:], self.geod)
        return np.atleast_1d(np.asarray(d, float))

    @property
    def constant_steps(self) -> bool:
        """True when step lengths are the same in every row (projected grids)."""
        return not self.is_geographic

    @cached_property
    def row_cell_area_km2(self):
        if not self.is_geographic:
            return None
        top = self.transform.f + np.arange(self.n_rows) * self.transform.e
        bottom = top + self.transform.e
        ell = self.pyproj_crs.ellipsoid
        a = ell.semi_major_metre if ell is not None else 6378137.0
        b = ell.semi_minor_metre if ell is not None else 6356752.314245179
        e2 = 1 - (b / a) ** 2
        return ellipsoidal_zone_area_km2(bottom, top, self.res[0], a_m=a, e2=e2)

    @cached_property
    def cell_area_km2(self) -> np.ndarray:
        """Ground area of every cell in km², shape ``(n_rows, n_cols)`` (read-only).

        Geographic grids: exact ellipsoidal area per row.  Projected grids: the planar
        cell area divided by the projection's areal scale factor at the cell centre
        (pyproj ``Proj.get_factors``), i.e. the true ground area to first order; an
        equal-area projection gives the planar area.
        """
        if self.is_geographic:
            out = np.broadcast_to(self.row_cell_area_km2[:, None], self.shape)
            return out
        planar = self.res[0] * self.res[1] * self._linear_unit_km**2
        scale = self._areal_scale()
        if scale is None:
            return np.broadcast_to(np.float64(planar), self.shape)
        out = planar / scale
        out.setflags(write=False)
        return out

    def _areal_scale(self):
        """Areal scale factor at every cell centre, or None if PROJ cannot give it.

        Scale factors vary smoothly: they are evaluated on a uniform lattice of at most
        65 x 65 cell positions (corners included) and interpolated bilinearly with
        ``scipy.ndimage.zoom``, which keeps memory to the output array alone.
        """
        try:
            proj = Proj(self.pyproj_crs)
        except Exception:  # CRS that PROJ cannot express as a projection
            return None
        kr = min(self.n_rows, 65)
        kc = min(self.n_cols, 65)
        rs = np.linspace(0, self.n_rows - 1, kr)
        cs = np.linspace(0, self.n_cols - 1, kc)
        rr, cc = np.meshgrid(rs, cs, indexing="ij")
        lon, lat = self.lonlat(rr, cc)
        try:
            factors = proj.get_factors(lon, lat)
        except Exception:
            return None
        coarse = np.asarray(factors.areal_scale, float).reshape(rr.shape)
        if not np.all(np.isfinite(coarse)):
            return None
        if coarse.shape == self.shape:
            return coarse
        from scipy.ndimage import zoom

        return zoom(coarse, (self.n_rows / kr, self.n_cols / kc), order=1,
                    grid_mode=False, mode="nearest")

    # --- comparison and derived grids ------------------------------------------------
    def same_geometry(self, other: Grid) -> bool:
        """True when CRS, transform and shape agree (masks may differ)."""
        return (
            self.shape == other.shape
            and self.transform.almost_equals(other.transform, precision=1e-9)
            and self.pyproj_crs == other.pyproj_crs
        )

    def with_mask(self, mask) -> Grid:
        """A copy of this grid with another valid-cell mask."""
        return Grid(self.crs, self.transform, self.shape, mask)

    def __repr__(self) -> str:
        kind = "geographic" if self.is_geographic else "projected"
        return (
            f"Grid({self.pyproj_crs.to_string()}, {kind}, shape={self.shape}, "
            f"res={self.res}, valid={self.n_valid})"
        )
