"""Environmental layers: read, check they share one grid, derive terrain layers.

Only :func:`read_layers` touches files.  The resulting :class:`LayerStack` holds the
predictors as float32 with NaN for nodata; the union of the layers' nodata masks
defines the valid cells of the :class:`~screener.grid.Grid`.
"""

from __future__ import annotations

import logging
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from screener.errors import CollinearityWarning, GridMismatchError, LayerError, ScreenerWarning
from screener.grid import Grid

__all__ = [
    "LayerStack",
    "LayerReport",
    "read_layers",
    "check_layers",
    "slope_aspect",
    "hillshade",
]

log = logging.getLogger(__name__)

#: Pearson |r| above which two predictors are reported as collinear
#: (common practice; Dormann et al. 2013, Ecography 36:27).
COLLINEARITY_R = 0.7


@dataclass(eq=False)
class LayerStack:
    """Predictor layers on one grid.

    Attributes
    ----------
    grid : Grid
        Shared grid; ``grid.mask`` is True where every layer has data.
    names : list of str
        One name per layer (the file stem unless given).
    data : ndarray of float32, shape (n_layers, n_rows, n_cols)
        Values, NaN outside ``grid.mask``.
    paths : list of Path
        Source file of each layer (None for derived layers).
    units : list of str
        Unit text per layer where known ("" otherwise).
    """

    grid: Grid
    names: list
    data: np.ndarray
    paths: list = field(default_factory=list)
    units: list = field(default_factory=list)

    @property
    def n_layers(self) -> int:
        return len(self.names)

    def layer(self, name: str) -> np.ndarray:
        """One layer by name, shape (n_rows, n_cols)."""
        try:
            return self.data[self.names.index(name)]
        except ValueError:
            from screener.errors import suggest

            raise LayerError(
                f"There is no layer named {name!r}; layers are {', '.join(self.names)}."
                + suggest(name, self.names)
            ) from None

    def values_at(self, rows, cols) -> np.ndarray:
        """Predictor values at cells, shape (n, n_layers), float64."""
        rows = np.asarray(rows, dtype=np.int64)
        cols = np.asarray(cols, dtype=np.int64)
        return self.data[:, rows, cols].T.astype(np.float64)

    def select(self, names) -> LayerStack:
        """A stack holding only ``names``, in that order (the data are not copied)."""
        idx = [self.names.index(n) for n in names]
        return LayerStack(
            self.grid,
            [self.names[i] for i in idx],
            self.data[idx],
            [self.paths[i] if self.paths else None for i in idx],
            [self.units[i] if self.units else "" for i in idx],
        )

    def iter_blocks(self, max_cells: int = 1 << 20):
        """Yield ``(row_slice, X, valid)`` blocks of whole rows for prediction.

        ``X`` has shape (n_valid_in_block, n_layers), float32; ``valid`` is the
        block's (rows, n_cols) mask, so ``out[row_slice][valid] = predict(X)``.
        Memory per block is bounded by ``max_cells * n_layers`` values.
        """
        n_rows, n_cols = self.grid.shape
        step = max(1, int(max_cells) // max(n_cols, 1))
        for r0 in range(0, n_rows, step):
            sl = slice(r0, min(n_rows, r0 + step))
            valid = self.grid.mask[sl]
            X = self.data[:, sl][:, valid].T
            yield sl, np.ascontiguousarray(X, dtype=np.float32), valid


@dataclass
class LayerReport:
    """What the layer checks found.

    Attributes
    ----------
    constant : list of str
        Layers with a single value over the valid cells (dropped as predictors).
    collinear : list of tuple (str, str, float)
        Pairs with |Pearson r| > 0.7 over the valid cells (common practice).
    nodata_share : dict of str to float
        Share of the grid that each layer leaves without data.
    """

    constant: list = field(default_factory=list)
    collinear: list = field(default_factory=list)
    nodata_share: dict = field(default_factory=dict)


def _fmt(values) -> str:
    return "(" + ", ".join(f"{float(v):.10g}" for v in values) + ")"


def _describe_difference(ref, other, ref_name: str, other_name: str) -> str:
    """What differs between two rasters' grids, each value named by its file."""
    diffs = []
    if ref.crs != other.crs:
        diffs.append(f"CRS {other.crs} in {other_name} but {ref.crs} in {ref_name}")
    if (ref.width, ref.height) != (other.width, other.height):
        diffs.append(
            f"shape {other.height} rows x {other.width} cols in {other_name} but "
            f"{ref.height} rows x {ref.width} cols in {ref_name}"
        )
    same_res = np.allclose(ref.res, other.res, rtol=1e-9, atol=0)
    if not same_res:
        diffs.append(
            f"resolution {_fmt(other.res)} in {other_name} but {_fmt(ref.res)} in {ref_name}"
        )
    if not ref.transform.almost_equals(other.transform, precision=1e-9) and same_res:
        diffs.append(
            f"origin {_fmt((other.transform.c, other.transform.f))} in {other_name} but "
            f"{_fmt((ref.transform.c, ref.transform.f))} in {ref_name}"
        )
    return "; ".join(diffs)


def _untagged_sentinel(values: np.ndarray, dtype) -> float | None:
    """A common nodata sentinel that is the extreme of an untagged layer, or None.

    Files without a nodata tag sometimes still mark missing cells with the integer
    type's minimum (or maximum, for unsigned types), -9999, or the float32 minimum.
    Read as data, such cells would dominate the models.
    """
    finite = values[np.isfinite(values)]
    if finite.size == 0:
        return None
    lo, hi = float(finite.min()), float(finite.max())
    dt = np.dtype(dtype)
    candidates = [-9999.0]
    if np.issubdtype(dt, np.signedinteger):
        candidates.append(float(np.iinfo(dt).min))
    elif np.issubdtype(dt, np.unsignedinteger):
        candidates.append(float(np.iinfo(dt).max))
    else:
        candidates.append(float(np.finfo(np.float32).min))
    for c in candidates:
        if (c == lo or c == hi) and lo != hi:
            return c
    if lo <= -1e38:  # float32 minimum written as a float64 or rounded
        return lo
    return None


def read_layers(
    paths,
    *,
    names=None,
    categorical=(),
    cell_budget: int | None = None,
    nodata_values: dict | None = None,
) -> LayerStack:
    """Read single-band rasters that share one grid into a :class:`LayerStack`.

    Parameters
    ----------
    paths : sequence of path-like
        Raster files (GeoTIFF or anything rasterio opens), one band each.
    names : sequence of str, optional
        Layer names; the file stems by default.
    categorical : sequence of str, default ()
        Names of categorical layers; each class becomes a 0/1 indicator layer
        named ``<layer>=<class>``.
    cell_budget : int, optional
        Refuse grids with more cells than this (protects memory).
    nodata_values : dict of str to float, optional
        Extra nodata sentinel per layer name, for files that lack a nodata tag.

    Returns
    -------
    LayerStack

    Raises
    ------
    LayerError
        A file is missing, unreadable, multi-band, entirely nodata or looks
        categorical without being declared so.
    GridMismatchError
        Two files differ in CRS, transform, resolution or shape; the message names
        both files and what differs.
    """
    import rasterio

    paths = [Path(p) for p in paths]
    if not paths:
        raise LayerError("No layers were given: list raster files under [layers] paths.")
    names = list(names) if names is not None else [p.stem for p in paths]
    if len(set(names)) != len(names):
        dup = sorted({n for n in names if names.count(n) > 1})
        raise LayerError(
            f"Two layers share the name {dup[0]!r}; rename one file so names are unique."
        )
    nodata_values = dict(nodata_values or {})
    categorical = set(categorical)
    arrays, out_names, out_paths, units = [], [], [], []
    ref = None
    ref_path = None
    for path, name in zip(paths, names):
        if not path.exists():
            raise LayerError(f"Layer file {path} does not exist; check [layers] paths.")
        try:
            src_ctx = rasterio.open(path)
        except Exception as exc:  # rasterio raises several types for unreadable files
            raise LayerError(
                f"Layer file {path} cannot be read as a raster "
                f"({str(exc).rstrip('.')}); "
                "give a GeoTIFF or another single-band raster that GDAL opens."
            ) from None
        with src_ctx as src:
            if src.count != 1:
                raise LayerError(
                    f"Layer file {path} has {src.count} bands; the screener needs "
                    "single-band rasters (split it, e.g. one file per band)."
                )
            if src.crs is None:
                raise LayerError(
                    f"Layer file {path} has no CRS; assign one (e.g. gdal_edit -a_srs)."
                )
            if ref is None:
                ref, ref_path = src, path
                ref_info = (src.crs, src.transform, src.width, src.height, src.res)
                n_cells = src.width * src.height
                if cell_budget is not None and n_cells > cell_budget:
                    raise LayerError(
                        f"Layer file {path} has {n_cells:,} cells, more than the cell "
                        f"budget of {cell_budget:,}; crop or coarsen the layers, or raise "
                        "[layers] cell_budget (each cell needs about 4 bytes per layer, "
                        "several times over)."
                    )
            else:
                crs, transform, width, height, res = ref_info
                mismatch = (
                    src.crs != crs
                    or (src.width, src.height) != (width, height)
                    or not src.transform.almost_equals(transform, precision=1e-9)
                )
                if mismatch:
                    diff = _RefInfo(crs, transform, width, height, res)
                    raise GridMismatchError(
                        f"Layers {ref_path} and {path} are not on the same grid: "
                        f"{_describe_difference(diff, src, ref_path.name, path.name)}."
                        " Resample one onto the "
                        "other's grid first (e.g. rasterio.warp.reproject or gdalwarp)."
                    )
            raw = src.read(1, masked=True)
            dtype = src.dtypes[0]
            tagged = src.nodata is not None
            unit = (src.units[0] if src.units else "") or ""
        values = np.ma.filled(raw.astype(np.float32), np.nan)
        if name in nodata_values:
            values[values == np.float32(nodata_values[name])] = np.nan
        values[~np.isfinite(values)] = np.nan
        if not tagged and name not in nodata_values:
            sentinel = _untagged_sentinel(values, dtype)
            if sentinel is not None:
                n_sent = int(np.count_nonzero(values == np.float32(sentinel)))
                raise LayerError(
                    f"Layer file {path} has no nodata value, but {n_sent:,} cells hold "
                    f"{sentinel:.9g}, a common nodata marker, as its "
                    f"{'minimum' if sentinel == np.nanmin(values) else 'maximum'}. "
                    "Read as data they would distort every model. If they are nodata, "
                    f"tag the file (e.g. gdal_edit -a_nodata {sentinel:.9g} {path.name}); "
                    "if they are real values, rescale the layer."
                )
        if np.isnan(values).all():
            raise LayerError(
                f"Layer {name!r} ({path}) has no data at all (every cell is nodata); "
                "check its nodata value or leave it out."
            )
        is_int = np.issubdtype(np.dtype(dtype), np.integer)
        if name in categorical:
            classes = np.unique(values[np.isfinite(values)])
            if classes.size > 50:
                raise LayerError(
                    f"Layer {name!r} ({path}) is declared categorical but has "
                    f"{classes.size} classes; more than 50 is unlikely to be categorical."
                )
            for c in classes:
                ind = np.where(np.isnan(values), np.nan, (values == c).astype(np.float32))
                arrays.append(ind.astype(np.float32))
                out_names.append(f"{name}={c:g}")
                out_paths.append(path)
                units.append("indicator")
            continue
        if is_int:
            n_classes = np.unique(values[np.isfinite(values)][:1_000_000]).size
            if 1 < n_classes <= 12:
                warnings.warn(
                    f"Layer {name!r} ({path}) is an integer layer with only {n_classes} "
                    "distinct values: if it is categorical (soil, vegetation class), list "
                    "it under [layers] categorical so each class becomes an indicator; "
                    "it is used as a continuous predictor now.",
                    ScreenerWarning,
                    stacklevel=2,
                )
        arrays.append(values)
        out_names.append(name)
        out_paths.append(path)
        units.append(unit)
    data = np.stack(arrays)
    mask = np.isfinite(data).all(axis=0)
    if not mask.any():
        raise LayerError(
            "The layers' nodata areas do not overlap anywhere with data in all layers: "
            "no cell has a value in every layer. Check that they cover the same region."
        )
    data[:, ~mask] = np.nan
    crs, transform, width, height, _ = ref_info
    grid = Grid(crs, transform, (height, width), mask)
    return LayerStack(grid, out_names, data, out_paths, units)


@dataclass(frozen=True)
class _RefInfo:
    crs: object
    transform: object
    width: int
    height: int
    res: tuple


def check_layers(stack: LayerStack, *, sample: int = 200_000, random_state=0):
    """Report constant layers and collinear pairs over the valid cells.

    Parameters
    ----------
    stack : LayerStack
    sample : int, default 200000
        Valid cells sampled for the correlations.
    random_state : int, default 0

    Returns
    -------
    LayerReport

    Notes
    -----
    Pairs with |Pearson r| > 0.7 are reported (common practice; Dormann et al. 2013,
    Ecography 36:27); the models still use both: dropping one is the user's call.
    """
    grid = stack.grid
    report = LayerReport()
    for i, name in enumerate(stack.names):
        report.nodata_share[name] = float(np.isnan(stack.data[i]).mean())
    idx = np.flatnonzero(grid.mask.ravel())
    if idx.size > sample:
        rng = np.random.default_rng(random_state)
        idx = np.sort(rng.choice(idx, size=sample, replace=False))
    X = stack.data.reshape(stack.n_layers, -1)[:, idx].astype(np.float64)
    sd = X.std(axis=1)
    const = sd <= 1e-12 * np.maximum(1.0, np.abs(X).max(axis=1))
    report.constant = [n for n, c in zip(stack.names, const) if c]
    keep = np.flatnonzero(~const)
    if keep.size >= 2:
        r = np.corrcoef(X[keep])
        for a in range(keep.size):
            for b in range(a + 1, keep.size):
                if abs(r[a, b]) > COLLINEARITY_R:
                    report.collinear.append(
                        (stack.names[keep[a]], stack.names[keep[b]], float(r[a, b]))
                    )
    for name in report.constant:
        warnings.warn(
            f"Layer {name!r} is constant over the valid cells; it carries no "
            "information and is left out of the models.",
            ScreenerWarning,
            stacklevel=2,
        )
    for a, b, r in report.collinear:
        log.info("layers %s and %s are collinear (r = %.2f)", a, b, r)
    if report.collinear:
        pairs = ", ".join(f"{a}/{b} (r = {r:+.2f})" for a, b, r in report.collinear)
        warnings.warn(
            f"Collinear predictor pairs (|r| > {COLLINEARITY_R}, common practice): {pairs}. "
            "Consider keeping one of each pair.",
            CollinearityWarning,
            stacklevel=2,
        )
    return report


def _metre_gradients(grid: Grid, elevation: np.ndarray):
    """d(elevation)/d(east) and d(elevation)/d(north), dimensionless (m per m)."""
    z = np.asarray(elevation, dtype=np.float64)
    dz_drow, dz_dcol = np.gradient(z)  # per cell, NaN propagates
    dx_m = grid.ew_step_km[:, None] * 1000.0
    ns = grid.ns_step_km * 1000.0
    if ns.size == 0:
        dy_m = np.full((grid.n_rows, 1), np.inf)
    else:
        # np.gradient uses central differences: spacing is the mean of neighbouring steps
        dy = np.empty(grid.n_rows)
        dy[0] = ns[0]
        dy[-1] = ns[-1]
        dy[1:-1] = 0.5 * (ns[:-1] + ns[1:])
        dy_m = dy[:, None]
    dz_deast = dz_dcol / dx_m
    dz_dnorth = -dz_drow / dy_m  # rows increase southwards
    return dz_deast, dz_dnorth


def slope_aspect(grid: Grid, elevation: np.ndarray):
    """Slope and aspect of an elevation layer with true metre spacing.

    Parameters
    ----------
    grid : Grid
        Its step lengths give the ground spacing (per row on lat/lon grids).
    elevation : ndarray of shape (n_rows, n_cols)
        Metres; NaN for nodata.

    Returns
    -------
    slope_deg : ndarray of float32
        Slope in degrees (0 = flat).
    aspect_deg : ndarray of float32
        Downslope direction in degrees clockwise from north (NaN on flat cells).

    Notes
    -----
    Central differences (``numpy.gradient``); on geographic grids the east-west
    spacing is the geodesic width of the row, so degrees are never used as metres.
    """
    gx, gy = _metre_gradients(grid, elevation)
    slope = np.degrees(np.arctan(np.hypot(gx, gy)))
    # downslope direction: opposite of the gradient vector (east = gx, north = gy)
    aspect = (np.degrees(np.arctan2(-gx, -gy)) + 360.0) % 360.0
    aspect[np.hypot(gx, gy) == 0] = np.nan
    return slope.astype(np.float32), aspect.astype(np.float32)


def hillshade(grid: Grid, elevation: np.ndarray, *, azimuth=315.0, altitude=45.0):
    """Hillshade in [0, 1] with true metre spacing (for maps).

    Uses :class:`matplotlib.colors.LightSource` on metre gradients.
    """
    from matplotlib.colors import LightSource

    ls = LightSource(azdeg=azimuth, altdeg=altitude)
    dx = float(np.nanmean(grid.ew_step_km)) * 1000.0
    dy = float(np.nanmean(grid.ns_step_km)) * 1000.0 if grid.n_rows > 1 else dx
    z = np.where(np.isfinite(elevation), elevation, np.nanmin(elevation))
    return ls.hillshade(z, vert_exag=1.0, dx=dx, dy=dy)
