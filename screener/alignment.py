"""Align layers from different sources onto one reference grid.

Real layers come at different resolutions, origins and projections.  Every layer
that is not already on the reference grid is resampled onto it with GDAL's warper
(:func:`rasterio.warp.reproject`): the cell average when a continuous layer is
coarsened, bilinear interpolation when it is refined, the most frequent class for
categorical layers.  Slope and aspect are derived from the elevation layer at its
own resolution first and aggregated afterwards (aspect through its sine and
cosine, so that 359 and 1 degrees average to 0, not 180).

Aligned layers are written as tiled GeoTIFFs into a content-keyed cache folder and
then read like any other layer (:func:`screener.layers.read_layers`), so stacks
larger than memory are warped a band of rows at a time and streamed from disk.
"""

from __future__ import annotations

import atexit
import hashlib
import logging
import os
import shutil
import tempfile
import uuid
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from screener.errors import LayerError, accepts_old_form
from screener.layers import BandRef, _base, _open_raster, list_bands

__all__ = [
    "ReferenceGridSpec",
    "ReferenceGrid",
    "LayerOrigin",
    "AlignedLayers",
    "reference_grid",
    "align_layers",
    "aligned_layer_folder",
]

log = logging.getLogger(__name__)

#: sampled reference cells per axis when measuring a layer's coverage
_COVERAGE_SAMPLES = 512


@dataclass(frozen=True)
class ReferenceGrid:
    """The grid every layer is aligned to.

    Attributes
    ----------
    crs : rasterio.crs.CRS
    transform : affine.Affine
    width, height : int
        Columns and rows.
    source : str
        Where it comes from, in words ("layer 'temperature'", "project file").
    """

    crs: object
    transform: object
    width: int
    height: int
    source: str

    @property
    def res(self) -> tuple:
        return (abs(self.transform.a), abs(self.transform.e))

    def describe(self) -> str:
        return (f"{_crs_text(self.crs)}, {self.height} x {self.width} cells of "
                f"{self.res[0]:.6g} x {self.res[1]:.6g} CRS units")


@dataclass(frozen=True)
class ReferenceGridSpec:
    """What the reference grid is to be: a named layer's grid, or one described by
    its CRS, cell size and extent (``[layers] reference``, ``crs``, ``resolution``,
    ``extent``).

    Attributes
    ----------
    reference : str
        Name of the layer whose grid is the reference.  Empty: the first layer's
        grid, unless ``crs``, ``resolution`` or ``extent`` describe the grid (then
        a named layer is refused).
    crs : str
        CRS of a described grid (e.g. "EPSG:4326"); empty: the first layer's.
    resolution : float or (float, float), optional
        Cell size in CRS units (degrees or metres); default the first layer's cell
        size (in its CRS when the CRS is the same, else GDAL's estimate of the
        equivalent size).  0 counts as not given.
    extent : (xmin, ymin, xmax, ymax), optional
        In CRS units; default the first layer's bounds (transformed to ``crs``).
        Extended outwards to whole cells.  Empty counts as not given.

    Examples
    --------
    >>> spec = ReferenceGridSpec(crs="EPSG:4326", resolution=[0.01, 0.01],
    ...                          extent=[10.0, 45.0, 11.0, 46.0])
    >>> spec.resolution, spec.extent
    ((0.01, 0.01), (10.0, 45.0, 11.0, 46.0))
    >>> ReferenceGridSpec(resolution=0.0, extent=[]) == ReferenceGridSpec()
    True
    """

    reference: str = ""
    crs: str = ""
    resolution: float | tuple | None = None
    extent: tuple | None = None

    def __post_init__(self):
        def tupled(value):
            if not value:
                return None
            return tuple(value) if isinstance(value, (list, tuple)) else value

        object.__setattr__(self, "resolution", tupled(self.resolution))
        object.__setattr__(self, "extent", tupled(self.extent))

    @classmethod
    def from_settings(cls, settings) -> ReferenceGridSpec:
        """The reference grid the ``[layers]`` settings of a loaded project describe."""
        layers = settings.layers
        return cls(reference=layers.reference, crs=layers.crs,
                   resolution=layers.resolution, extent=layers.extent)

    def resolve(self, bands) -> ReferenceGrid:
        """The grid itself, for these layers (see :func:`reference_grid`)."""
        return reference_grid(bands, reference=self.reference, crs=self.crs,
                              resolution=self.resolution, extent=self.extent)


@dataclass(frozen=True)
class LayerOrigin:
    """Where a layer came from and how it reached the reference grid.

    Attributes
    ----------
    name : str
    source : str
        File (and band) it was read from.
    crs : str
        Original CRS.
    res : tuple of float
        Original cell size (x, y) in the original CRS units.
    shape : tuple of int
        Original (rows, cols).
    method : str
        "none" (already on the reference grid), "nearest" (same cells, other
        extent), "average", "bilinear", "mode", or "derived" (from elevation).
    note : str
        Plain-words detail, e.g. "coarsened 10.0x" or "slope at 92 m, then average".
    """

    name: str
    source: str
    crs: str
    res: tuple
    shape: tuple
    method: str
    note: str = ""

    def line(self) -> str:
        return (f"{self.name}: {self.source}, {self.crs}, {self.shape[0]} x {self.shape[1]} "
                f"cells of {self.res[0]:.6g} x {self.res[1]:.6g}; {self.method}"
                + (f" ({self.note})" if self.note else ""))

    def as_dict(self) -> dict:
        return {"name": self.name, "source": self.source, "crs": self.crs,
                "res": list(self.res), "shape": list(self.shape), "method": self.method,
                "note": self.note}


@dataclass(frozen=True)
class AlignedLayers:
    """Layers on the reference grid, ready for :func:`screener.layers.read_layers`.

    Attributes
    ----------
    bands : list of BandRef
        One per layer, every one on the reference grid (original files where they
        already were, cached aligned files otherwise).
    origins : list of LayerOrigin
        One per layer, same order.
    reference : ReferenceGrid
    derived : list of str
        Terrain layers derived from elevation at its own resolution (already in
        ``bands``); empty when the elevation layer was on the reference grid.
    """

    bands: list
    origins: list
    reference: ReferenceGrid
    derived: list


def _crs_text(crs) -> str:
    epsg = crs.to_epsg() if crs is not None else None
    return f"EPSG:{epsg}" if epsg else (crs.to_string() if crs is not None else "no CRS")


def reference_grid(bands, *, reference: str = "", crs: str = "", resolution=None,
                   extent=None) -> ReferenceGrid:
    """The grid to align to: a named layer's, or one described in the project file.

    Parameters
    ----------
    bands : list of BandRef
    reference : str
        Name of the layer whose grid is the reference (default: the first layer,
        unless ``crs``, ``resolution`` or ``extent`` describe the grid).
    crs : str
        CRS of the reference grid (e.g. "EPSG:4326"); default the first layer's.
    resolution : float or (float, float), optional
        Cell size in CRS units; default the first layer's cell size (in its CRS
        when the CRS is the same, else GDAL's estimate of the equivalent size).
    extent : (xmin, ymin, xmax, ymax), optional
        In CRS units; default the first layer's bounds (transformed to ``crs``).
        Extended outwards to whole cells.

    Raises
    ------
    LayerError
        Unknown reference layer, unknown CRS, non-positive resolution, empty extent.
    """
    from affine import Affine
    from rasterio.crs import CRS
    from rasterio.warp import transform_bounds

    names = [b.name for b in bands]
    if reference:
        if reference not in names:
            from screener.errors import suggest

            raise LayerError(
                f"[layers] reference = {reference!r} names no layer; layers are "
                f"{', '.join(names)}." + suggest(reference, names)
            )
        if crs or resolution or extent:
            raise LayerError(
                "[layers] reference names a layer, so [layers] crs, resolution and extent "
                "must be left out (or drop reference and describe the grid with them)."
            )
    described = bool(crs or resolution or extent)
    first = bands[names.index(reference)] if reference else bands[0]
    with _open_raster(first.path) as src:
        if src.crs is None:
            raise LayerError(
                f"Layer file {first.path} has no CRS; assign one (e.g. gdal_edit -a_srs)."
            )
        if not described:
            what = f"layer {first.name!r}"
            return ReferenceGrid(src.crs, src.transform, src.width, src.height, what)
        src_crs, src_res, src_bounds = src.crs, src.res, src.bounds
        src_w, src_h = src.width, src.height
    try:
        dst_crs = CRS.from_user_input(crs) if crs else src_crs
    except Exception:
        raise LayerError(
            f"[layers] crs = {crs!r} is not a CRS that PROJ knows; give e.g. "
            '"EPSG:4326" or an EPSG code of the national grid.'
        ) from None
    if extent:
        if len(extent) != 4 or not (extent[0] < extent[2] and extent[1] < extent[3]):
            raise LayerError(
                f"[layers] extent = {list(extent)!r} must be [xmin, ymin, xmax, ymax] "
                "with xmin < xmax and ymin < ymax (in the units of [layers] crs)."
            )
        bounds = tuple(float(v) for v in extent)
    else:
        bounds = transform_bounds(src_crs, dst_crs, *src_bounds, densify_pts=21)
    if resolution:
        res = (resolution, resolution) if isinstance(resolution, (int, float)) else resolution
        if len(res) != 2 or min(res) <= 0:
            raise LayerError(
                f"[layers] resolution = {_as_written(resolution)!r} must be a positive "
                "cell size, or [x, y] sizes, in the units of [layers] crs."
            )
        res = (float(res[0]), float(res[1]))
    elif dst_crs == src_crs:
        res = src_res
    else:
        res = _equivalent_res(src_crs, dst_crs, src_bounds, src_w, src_h)
    width = max(1, int(np.ceil((bounds[2] - bounds[0]) / res[0] - 1e-9)))
    height = max(1, int(np.ceil((bounds[3] - bounds[1]) / res[1] - 1e-9)))
    transform = Affine(res[0], 0.0, bounds[0], 0.0, -res[1], bounds[3])
    return ReferenceGrid(dst_crs, transform, width, height, "project file")


def _as_written(value):
    """A value as the project file writes it (TOML arrays are lists)."""
    return list(value) if isinstance(value, tuple) else value


def _same_grid(src, ref: ReferenceGrid) -> bool:
    return (src.crs == ref.crs and (src.width, src.height) == (ref.width, ref.height)
            and src.transform.almost_equals(ref.transform, precision=1e-9))


def _resolution_in(src, ref: ReferenceGrid) -> tuple:
    """The source cell size expressed in the reference CRS units (x, y)."""
    if src.crs == ref.crs:
        return src.res
    return _equivalent_res(src.crs, ref.crs, src.bounds, src.width, src.height)


def _equivalent_res(src_crs, dst_crs, bounds, width: int, height: int) -> tuple:
    """Cell size in ``dst_crs`` units of a grid of ``bounds`` in ``src_crs``."""
    from rasterio.warp import transform_bounds

    x0, y0, x1, y1 = transform_bounds(src_crs, dst_crs, *bounds, densify_pts=21)
    return ((x1 - x0) / width, (y1 - y0) / height)


def _uncovered_share(src, ref: ReferenceGrid) -> float:
    """Share of the reference grid's cells whose centres lie outside the layer.

    Measured on up to 512 x 512 cells spread evenly over the grid (first and last
    rows and columns included).
    """
    from rasterio.warp import transform as warp_transform

    rows = np.unique(np.linspace(0, ref.height - 1, min(ref.height, _COVERAGE_SAMPLES))
                     .round().astype(int))
    cols = np.unique(np.linspace(0, ref.width - 1, min(ref.width, _COVERAGE_SAMPLES))
                     .round().astype(int))
    cc, rr = np.meshgrid(cols + 0.5, rows + 0.5)
    t = ref.transform
    xs = t.c + t.a * cc.ravel() + t.b * rr.ravel()
    ys = t.f + t.d * cc.ravel() + t.e * rr.ravel()
    if src.crs != ref.crs:
        xs, ys = warp_transform(ref.crs, src.crs, xs, ys)
    inv = ~src.transform
    xs, ys = np.asarray(xs), np.asarray(ys)
    col = inv.c + inv.a * xs + inv.b * ys
    row = inv.f + inv.d * xs + inv.e * ys
    inside = ((col >= 0) & (col <= src.width) & (row >= 0) & (row <= src.height)
              & np.isfinite(col) & np.isfinite(row))
    return float(1.0 - inside.mean())


def _choose(src, ref: ReferenceGrid, categorical: bool):
    """Resampling method name and a note, for one source layer."""
    if src.crs == ref.crs and np.allclose(src.res, ref.res, rtol=1e-9, atol=0):
        # same cell size: exact copy when the lattices coincide, else interpolate
        inv = ~src.transform
        off = (inv.c + inv.a * ref.transform.c + inv.b * ref.transform.f,
               inv.f + inv.d * ref.transform.c + inv.e * ref.transform.f)
        if np.allclose(off, np.round(off), atol=1e-6):
            return "nearest", "same cells, other extent"
        return ("mode" if categorical else "bilinear"), "same cell size, shifted origin"
    sx, sy = _resolution_in(src, ref)
    ratio = float(np.sqrt((ref.res[0] * ref.res[1]) / (sx * sy)))
    if categorical:
        return "mode", (f"coarsened {ratio:.3g}x" if ratio >= 1 else f"refined {1 / ratio:.3g}x")
    if ratio > 1 + 1e-9:
        return "average", f"coarsened {ratio:.3g}x"
    return "bilinear", f"refined {1 / ratio:.3g}x" if ratio < 1 else "reprojected"


def _cache_key(band: BandRef, ref: ReferenceGrid, method: str, nodata, extra: str = "") -> str:
    path = band.path
    # a subdataset name ('NETCDF:"/data/clim.nc":tas') is stamped by its container file
    candidates = [path] if isinstance(path, Path) else [
        part.strip('"') for part in str(path).split(":")]
    stamp = ()
    for cand in candidates:
        try:
            st = os.stat(cand)
        except (OSError, ValueError):
            continue
        stamp = (st.st_size, st.st_mtime_ns)
        break
    text = repr((str(path), stamp, band.band, ref.crs.to_wkt(), tuple(ref.transform),
                 ref.width, ref.height, method, nodata, extra, _CACHE_VERSION))
    return hashlib.sha256(text.encode()).hexdigest()[:24]


#: bump when the aligned files' content would change for the same inputs
_CACHE_VERSION = 1


def _warp_to_file(source, out: Path, ref: ReferenceGrid, method: str, *, src_nodata,
                  block_cells: int, description: str = "") -> Path:
    """Warp one band onto the reference grid into a tiled float32 GeoTIFF.

    ``source`` is a ``rasterio.band`` (read by GDAL as it warps) or a tuple
    ``(array, transform, crs)``.  Rows are warped ``block_cells // width`` at a
    time, so memory is bounded whatever the grid size.  The file is written under a
    temporary name and renamed into place.
    """
    import rasterio
    from affine import Affine
    from rasterio.enums import Resampling
    from rasterio.warp import reproject
    from rasterio.windows import Window

    if out.exists():
        return out
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_name(f".{out.stem}.{uuid.uuid4().hex}.tif")
    profile = dict(driver="GTiff", width=ref.width, height=ref.height, count=1,
                   dtype="float32", crs=ref.crs, transform=ref.transform, nodata=np.nan,
                   tiled=True, blockxsize=256, blockysize=256, BIGTIFF="IF_SAFER")
    step = ref.height if ref.width * ref.height <= block_cells else max(
        256, (block_cells // max(ref.width, 1)) // 256 * 256)
    kw = {}
    if isinstance(source, tuple) and isinstance(source[0], np.ndarray):
        source, kw = source[0], {"src_transform": source[1], "src_crs": source[2]}
    try:
        with rasterio.open(tmp, "w", **profile) as dst:
            if description:
                dst.set_band_description(1, description)
            for r0 in range(0, ref.height, step):
                h = min(step, ref.height - r0)
                block = np.full((h, ref.width), np.nan, dtype=np.float32)
                reproject(source, block, src_nodata=src_nodata,
                          dst_transform=ref.transform @ Affine.translation(0, r0),
                          dst_crs=ref.crs, dst_nodata=np.nan,
                          resampling=getattr(Resampling, method), **kw)
                dst.write(block, 1, window=Window(0, r0, ref.width, h))
        os.replace(tmp, out)
    finally:
        if tmp.exists():
            tmp.unlink()
    return out


def _source_nodata(src, band: int, extra):
    nd = src.nodatavals[band - 1]
    if nd is None and extra is not None:
        return float(extra)
    if nd is None and np.issubdtype(np.dtype(src.dtypes[band - 1]), np.floating):
        return np.nan
    return nd


_OLD_GRID_KEYWORDS = ("reference", "crs", "resolution", "extent")


def _old_align_layers(*args, **kwargs):
    """The old form of :func:`align_layers` (the reference grid as four keywords) in
    the new form; None for a call in the new form."""
    old = {k: kwargs.pop(k) for k in _OLD_GRID_KEYWORDS if k in kwargs}
    if not old:
        return None
    if "grid_spec" in kwargs:
        raise TypeError("align_layers() takes grid_spec or the old keywords "
                        f"{', '.join(old)}, not both.")
    kwargs["grid_spec"] = ReferenceGridSpec(**old)
    return args, kwargs, (
        "align_layers(paths, cache_dir=..., reference=..., crs=..., resolution=..., "
        "extent=...) is replaced by align_layers(paths, cache_dir=..., "
        "grid_spec=ReferenceGridSpec(reference=..., crs=..., resolution=..., "
        "extent=...)) (or ReferenceGridSpec.from_settings(settings)); the old "
        "form stops working in the next release.")


@accepts_old_form(_old_align_layers)
def align_layers(
    paths,
    *,
    cache_dir,
    grid_spec: ReferenceGridSpec | None = None,
    categorical=(),
    nodata_values: dict | None = None,
    elevation: str = "",
    derive=(),
    block_cells: int = 1 << 22,
) -> AlignedLayers:
    """Put every layer on one reference grid (see the module notes for the methods).

    Parameters
    ----------
    paths : sequence of path-like or BandRef
        Raster files; each band of a multi-band file is a layer.
    cache_dir : path-like
        Folder for aligned files (content-keyed: reruns reuse them; safe to delete).
    grid_spec : ReferenceGridSpec, optional
        The reference grid (default: the first layer's).  The old keywords
        ``reference``, ``crs``, ``resolution`` and ``extent`` still work for one
        release, with a :class:`~screener.errors.ScreenerDeprecationWarning`.
    categorical : sequence of str
        Layers resampled by the most frequent class ("mode").
    nodata_values : dict of str to float, optional
        Extra nodata value per layer for files without a nodata tag.
    elevation : str
        Name of the elevation layer (metres).
    derive : sequence of str
        "slope" and/or "aspect": derived from elevation at its own resolution when
        elevation is not on the reference grid (otherwise left to the caller).
    block_cells : int, default 4194304
        Cells warped at a time per layer (bounds memory on large grids).

    Returns
    -------
    AlignedLayers

    Raises
    ------
    LayerError
        A layer does not cover the study area (the reference grid): the message
        names the layer and the share of the area it leaves uncovered.
    """
    import rasterio

    bands = list_bands(paths)
    ref = (grid_spec or ReferenceGridSpec()).resolve(bands)
    cache_dir = Path(cache_dir)
    nodata_values = dict(nodata_values or {})
    categorical = set(categorical)
    out_bands, origins, derived = [], [], []
    for b in bands:
        where = _base(b.path) + (f" band {b.band}" if b.band > 1 else "")
        with _open_raster(b.path) as src:
            if src.crs is None:
                raise LayerError(
                    f"Layer file {b.path} has no CRS; assign one (e.g. gdal_edit -a_srs)."
                )
            origin = dict(name=b.name, source=where, crs=_crs_text(src.crs),
                          res=tuple(float(v) for v in src.res),
                          shape=(src.height, src.width))
            if _same_grid(src, ref):
                out_bands.append(b)
                origins.append(LayerOrigin(method="none", note="on the reference grid",
                                           **origin))
                on_ref = True
            else:
                on_ref = False
                share = _uncovered_share(src, ref)
                if share > 0:
                    raise LayerError(
                        f"Layer {b.name!r} ({b.path}) does not cover the study area: "
                        f"{share:.1%} of the reference grid ({ref.source}: "
                        f"{ref.describe()}) lies outside it. Give a layer that covers the "
                        "whole area, or shrink the area ([layers] extent or reference)."
                    )
                method, note = _choose(src, ref, b.name in categorical)
                nodata = _source_nodata(src, b.band, nodata_values.get(b.name))
                key = _cache_key(b, ref, method, nodata)
                path = _warp_to_file(rasterio.band(src, b.band), cache_dir / f"{key}.tif",
                                     ref, method, src_nodata=nodata,
                                     block_cells=block_cells, description=b.name)
                log.info("aligned %s by %s (%s)", b.name, method, note)
                out_bands.append(BandRef(path, 1, b.name, b.unit, b.dtype))
                origins.append(LayerOrigin(method=method, note=note, **origin))
            if b.name == elevation and derive and not on_ref:
                for name, path, note in _derive_terrain(src, b, ref, cache_dir, derive,
                                                        nodata_values.get(b.name),
                                                        block_cells):
                    out_bands.append(BandRef(path, 1, name, "degrees", "float32"))
                    origins.append(LayerOrigin(name=name, source=f"derived from {b.name}",
                                               crs=origin["crs"], res=origin["res"],
                                               shape=origin["shape"], method="derived",
                                               note=note))
                    derived.append(name)
    return AlignedLayers(out_bands, origins, ref, derived)


def _derive_terrain(src, band: BandRef, ref: ReferenceGrid, cache_dir: Path, derive,
                    nodata_extra, block_cells):
    """Slope/aspect at the elevation layer's own resolution, then onto the reference.

    Slope is aggregated like any continuous layer; aspect through the cell means of
    its sine and cosine (circular mean), so flat cells (no aspect) are left out.  The
    native terrain is computed a band of rows at a time (with one row of overlap, so
    the central differences equal those of the whole grid) into temporary files that
    GDAL reads as it warps: memory stays bounded however large the DEM.
    """
    import rasterio

    from screener.grid import Grid

    from affine import Affine

    # east-west cell width of the DEM's middle row (a one-row grid: no full-size mask)
    middle = Grid(src.crs, src.transform @ Affine.translation(0, src.height // 2),
                  (1, src.width))
    dem_m = float(middle.ew_step_km[0]) * 1000.0
    method, _ = _choose(src, ref, False)
    keys = {d: _cache_key(band, ref, method, nodata_extra, d) for d in ("slope", "aspect")}
    outs = {d: cache_dir / f"{keys[d]}.tif" for d in keys}
    wanted = [d for d in ("slope", "aspect") if d in derive]
    todo = [d for d in wanted if not outs[d].exists()]
    if todo:
        natives = _native_terrain(src, band, nodata_extra, cache_dir, todo, block_cells)
        try:
            def warp(tag, out, description=""):
                with rasterio.open(natives[tag]) as nat:
                    return _warp_to_file(rasterio.band(nat, 1), out, ref, method,
                                         src_nodata=np.nan, block_cells=block_cells,
                                         description=description)

            if "slope" in todo:
                warp("slope", outs["slope"], "slope")
            if "aspect" in todo:
                tmp = keys["aspect"]
                parts = [warp(tag, cache_dir / f"{tmp}.{tag}.tif") for tag in ("sin", "cos")]
                _combine_aspect(parts[0], parts[1], outs["aspect"], block_cells)
                for p in parts:
                    p.unlink()
        finally:
            for p in natives.values():
                p.unlink(missing_ok=True)
    notes = {"slope": f"slope at {dem_m:.3g} m, then {method}",
             "aspect": f"aspect at {dem_m:.3g} m, then circular {method} of sine and cosine"}
    return [(d, outs[d], notes[d]) for d in wanted]


def _native_terrain(src, band: BandRef, nodata_extra, cache_dir: Path, todo,
                    block_cells: int) -> dict:
    """Slope (degrees) and the sine and cosine of aspect on the DEM's own grid.

    Written band by band into temporary float32 GeoTIFFs; returns tag -> path
    ("slope", "sin", "cos").
    """
    import rasterio
    from affine import Affine
    from rasterio.windows import Window

    from screener.grid import Grid
    from screener.layers import LayerSource, slope_aspect

    height, width = src.height, src.width
    tags = (["slope"] if "slope" in todo else []) + (["sin", "cos"] if "aspect" in todo
                                                      else [])
    run = uuid.uuid4().hex
    paths = {t: cache_dir / f".native-{run}.{t}.tif" for t in tags}
    cache_dir.mkdir(parents=True, exist_ok=True)
    profile = dict(driver="GTiff", width=width, height=height, count=1, dtype="float32",
                   crs=src.crs, transform=src.transform, nodata=np.nan, tiled=True,
                   blockxsize=256, blockysize=256, BIGTIFF="IF_SAFER")
    reader = LayerSource(band.path, nodata_extra, band=band.band)
    step = max(8, block_cells // max(width, 1))
    files = {t: rasterio.open(p, "w", **profile) for t, p in paths.items()}
    try:
        for r0 in range(0, height, step):
            r1 = min(height, r0 + step)
            a0, a1 = max(0, r0 - 1), min(height, r1 + 1)  # one row of overlap each side
            z = reader.read(src, window=Window(0, a0, width, a1 - a0)).astype(np.float64)
            sub = Grid(src.crs, src.transform @ Affine.translation(0, a0), (a1 - a0, width))
            slope, aspect = slope_aspect(sub, z)
            keep = slice(r0 - a0, r0 - a0 + (r1 - r0))
            win = Window(0, r0, width, r1 - r0)
            if "slope" in files:
                files["slope"].write(slope[keep], 1, window=win)
            if "sin" in files:
                rad = np.radians(aspect[keep].astype(np.float64))
                files["sin"].write(np.sin(rad).astype(np.float32), 1, window=win)
                files["cos"].write(np.cos(rad).astype(np.float32), 1, window=win)
    except BaseException:
        for f in files.values():
            f.close()
        for p in paths.values():
            p.unlink(missing_ok=True)
        raise
    for f in files.values():
        f.close()
    return paths


def _combine_aspect(sin_path: Path, cos_path: Path, out: Path, block_cells: int) -> None:
    """Aspect (degrees clockwise from north) from aligned sine and cosine files."""
    import rasterio
    from rasterio.windows import Window

    tmp = out.with_name(f".{out.stem}.{uuid.uuid4().hex}.tif")
    try:
        with rasterio.open(sin_path) as s, rasterio.open(cos_path) as c:
            profile = s.profile
            step = max(1, block_cells // max(s.width, 1))
            with rasterio.open(tmp, "w", **profile) as dst:
                dst.set_band_description(1, "aspect")
                for r0 in range(0, s.height, step):
                    win = Window(0, r0, s.width, min(step, s.height - r0))
                    sv = s.read(1, window=win)
                    cv = c.read(1, window=win)
                    deg = (np.degrees(np.arctan2(sv, cv)) + 360.0) % 360.0
                    deg[np.hypot(sv, cv) == 0] = np.nan
                    dst.write(deg.astype(np.float32), 1, window=win)
        os.replace(tmp, out)
    finally:
        if tmp.exists():
            tmp.unlink()


def describe_origins(origins) -> list:
    """One plain-words line per layer: original grid and resampling method."""
    return [o.line() for o in origins]


_TEMP_ALIGNED: list = []


def aligned_layer_folder(cache_dir) -> Path:
    """Folder for aligned layers: ``aligned`` in the stage cache when it is writable,
    else one temporary folder for this process (removed when it exits)."""
    if cache_dir is not None:
        folder = Path(cache_dir) / "aligned"
        existing = next(p for p in (folder, *folder.parents) if p.exists())
        if os.access(existing, os.W_OK):
            return folder  # created only when a layer needs aligning
        log.warning("cannot write aligned layers to %s; using a temporary folder", folder)
    if not _TEMP_ALIGNED:
        folder = tempfile.mkdtemp(prefix="screener-aligned-")
        atexit.register(shutil.rmtree, folder, ignore_errors=True)
        _TEMP_ALIGNED.append(Path(folder))
    return _TEMP_ALIGNED[0]
