"""Environmental layers: read, check they share one grid, derive terrain layers.

Only :func:`read_layers` touches files.  The resulting :class:`LayerStack` holds the
predictors as float32 with NaN for nodata; the union of the layers' nodata masks
defines the valid cells of the :class:`~screener.grid.Grid`.
"""

from __future__ import annotations

import contextlib

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
    "BandRef",
    "list_bands",
    "read_layers",
    "check_layers",
    "ground_gradients",
    "slope_aspect",
    "hillshade",
]

log = logging.getLogger(__name__)

#: Pearson |r| above which two predictors are reported as collinear
#: (common practice; Dormann et al. 2013, Ecography 36:27).
COLLINEARITY_R = 0.7


#: values beyond +/- this (and +/-inf) are fill values written for "no data" (such as
#: the float32 extremes +/-3.4e38), never measurements of an environmental variable
FILL_ABOVE = 1e30

@dataclass(frozen=True)
class LayerSource:
    """Where one layer's values come from on disk, and how to read them.

    Attributes
    ----------
    path : Path
    nodata_extra : float or None
        A further nodata sentinel (for files without a nodata tag).
    category : float or None
        For an indicator layer of a categorical raster: the class value.
    band : int
        Band number in the file (1-based).
    """

    path: Path
    nodata_extra: float | None = None
    category: float | None = None
    band: int = 1

    def read(self, src, window=None, out=None, *, mark_nodata: bool = True,
             fills: list | None = None) -> np.ndarray:
        """Read from an open dataset as float32, NaN for nodata.

        Values beyond +/-:data:`FILL_ABOVE` (and +/-inf) are fill values, never data:
        they are nodata whatever the file's tag says; ``fills``, a list, receives the
        number of such cells that were not the tagged nodata value.

        ``out``, a float32 array of the window's shape, receives the values when
        given (no intermediate copy).  ``mark_nodata=False`` leaves nodata cells as
        the file holds them (for callers that only use cells valid in every layer,
        whose values are the same either way); indicator layers are still derived.
        """
        from rasterio.enums import MaskFlags

        b = self.band
        if not mark_nodata and self.category is None:
            if out is not None:
                return src.read(b, window=window, out=out)
            return src.read(b, window=window, out_dtype=np.float32)
        nodata = src.nodatavals[b - 1]
        if nodata is None and MaskFlags.per_dataset in src.mask_flag_enums[b - 1]:
            # an internal mask band instead of a nodata value: let GDAL apply it
            raw = src.read(b, window=window, masked=True)
            values = np.ma.filled(raw.astype(np.float32), np.nan)
        elif out is not None and self.category is None:
            values = src.read(b, window=window, out=out)
        else:
            values = src.read(b, window=window, out_dtype=np.float32)
        bad = ~np.isfinite(values)
        for nd in (nodata, self.nodata_extra):
            if nd is not None and np.isfinite(nd):
                bad |= values == np.float32(nd)
        with np.errstate(invalid="ignore"):
            fill = np.abs(values) > FILL_ABOVE  # includes +/-inf, never NaN
        fill &= ~bad | np.isinf(values)
        if fills is not None:
            fills.append(int(np.count_nonzero(fill)))
        bad |= fill
        values[bad] = np.nan
        if self.category is not None:
            values = np.where(
                np.isnan(values), np.nan, (values == np.float32(self.category))
            ).astype(np.float32)
        return values


@dataclass(eq=False)
class LayerStack:
    """Predictor layers on one grid, in memory or streamed from disk.

    A stack either holds every layer in ``data`` or, for grids larger than the
    memory budget, reads them window by window from ``sources`` (``data`` is None).
    Both kinds offer the same methods; per-cell stages use :meth:`iter_blocks`,
    whose memory is bounded by its ``max_cells``, not by the grid.

    Attributes
    ----------
    grid : Grid
        Shared grid; ``grid.mask`` is True where every layer has data.
    names : list of str
        One name per layer (the file stem unless given).
    data : ndarray of float32, shape (n_layers, n_rows, n_cols), or None
        Values, NaN outside ``grid.mask``; None for a streamed stack.
    paths : list of Path
        Source file of each layer (None for derived layers).
    units : list of str
        Unit text per layer where known ("" otherwise).
    sources : list of LayerSource or None
        Streamed stacks: how to read each layer (None for in-memory layers).
    in_memory : dict of str to ndarray
        Streamed stacks: layers held in memory (derived terrain layers).
    nodata_share : dict of str to float
        Share of the grid each source layer leaves without data.
    """

    grid: Grid
    names: list
    data: np.ndarray | None
    paths: list = field(default_factory=list)
    units: list = field(default_factory=list)
    sources: list | None = None
    in_memory: dict = field(default_factory=dict)
    nodata_share: dict = field(default_factory=dict)

    @property
    def n_layers(self) -> int:
        return len(self.names)

    @property
    def streamed(self) -> bool:
        """True when the values are read from disk window by window."""
        return self.data is None

    def _index(self, name: str) -> int:
        try:
            return self.names.index(name)
        except ValueError:
            from screener.errors import suggest

            raise LayerError(
                f"There is no layer named {name!r}; layers are {', '.join(self.names)}."
                + suggest(name, self.names)
            ) from None

    def read_rows(self, rows: slice, *, fill_invalid: bool = True) -> np.ndarray:
        """Values of every layer in a band of rows, shape (n_layers, n, n_cols).

        With ``fill_invalid`` (default) cells outside the valid mask are NaN in every
        layer; without it they keep whatever the file holds (cheaper, for callers
        that only look at valid cells).
        """
        if self.data is not None:
            return self.data[:, rows]
        with self._open_sources() as opened:
            return self._read_rows(rows, opened, fill_invalid)

    @contextlib.contextmanager
    def _open_sources(self):
        """Every source file of a streamed stack, opened once (closed on exit)."""
        import rasterio

        opened: dict = {}
        try:
            for src_info in self.sources or []:
                if src_info is not None and src_info.path not in opened:
                    opened[src_info.path] = rasterio.open(src_info.path)
            yield opened
        finally:
            for ds in opened.values():
                ds.close()

    def _read_rows(self, rows: slice, opened: dict, fill_invalid: bool) -> np.ndarray:
        from rasterio.windows import Window

        r0, r1 = rows.start or 0, min(rows.stop, self.grid.n_rows)
        win = Window(0, r0, self.grid.n_cols, r1 - r0)
        out = np.empty((self.n_layers, r1 - r0, self.grid.n_cols), dtype=np.float32)
        for i, name in enumerate(self.names):
            if name in self.in_memory:
                out[i] = self.in_memory[name][r0:r1]
                continue
            src_info = self.sources[i]
            dst = out[i]
            values = src_info.read(opened[src_info.path], window=win, out=dst,
                                   mark_nodata=fill_invalid)
            if values is not dst:  # read into a new array (mask band, indicator layer)
                dst[...] = values
        if fill_invalid:
            out[:, ~self.grid.mask[r0:r1]] = np.nan
        return out

    def _rows_per_block(self, max_cells: int) -> int:
        rows = max(1, int(max_cells) // max(self.grid.n_cols, 1))
        if self.streamed and rows >= 256:
            rows -= rows % 256  # whole rows of 256-row tiles: no tile is decoded twice
        return rows

    def row_bands(self, max_cells: int) -> list:
        """``(first, stop)`` rows of bands of about ``max_cells`` cells, whole tile
        rows each: the tasks of window-by-window work on an executor."""
        step = self._rows_per_block(max_cells)
        n = self.grid.n_rows
        return [(r0, min(n, r0 + step)) for r0 in range(0, n, step)]

    def layer(self, name: str) -> np.ndarray:
        """One layer by name, shape (n_rows, n_cols), float32."""
        i = self._index(name)
        if self.data is not None:
            return self.data[i]
        if name in self.in_memory:
            return self.in_memory[name]
        import rasterio

        with rasterio.open(self.sources[i].path) as src:
            values = self.sources[i].read(src)
        values[~self.grid.mask] = np.nan
        return values

    def values_at(self, rows, cols, *, max_cells: int = 1 << 22) -> np.ndarray:
        """Predictor values at cells, shape (n, n_layers), float64."""
        rows = np.asarray(rows, dtype=np.int64)
        cols = np.asarray(cols, dtype=np.int64)
        if self.data is not None:
            return self.data[:, rows, cols].T.astype(np.float64)
        out = np.empty((rows.size, self.n_layers), dtype=np.float64)
        step = self._rows_per_block(max_cells // max(self.n_layers, 1))
        block_of = rows // step
        for b in np.unique(block_of):
            pick = np.flatnonzero(block_of == b)
            lo, hi = int(rows[pick].min()), int(rows[pick].max()) + 1
            band = self.read_rows(slice(lo, hi))
            out[pick] = band[:, rows[pick] - lo, cols[pick]].T
        return out

    def select(self, names) -> LayerStack:
        """A stack holding only ``names``, in that order (the data are not copied)."""
        idx = [self._index(n) for n in names]
        return LayerStack(
            self.grid,
            [self.names[i] for i in idx],
            self.data[idx] if self.data is not None else None,
            [self.paths[i] if self.paths else None for i in idx],
            [self.units[i] if self.units else "" for i in idx],
            [self.sources[i] for i in idx] if self.sources is not None else None,
            {n: self.in_memory[n] for n in names if n in self.in_memory},
            {n: v for n, v in self.nodata_share.items() if n in names},
        )

    def with_layers(self, arrays: dict, units=None) -> LayerStack:
        """A stack with further in-memory layers (e.g. slope) appended.

        Cells where a new layer has no value leave the valid mask, so every valid cell
        still has a value in every layer.
        """
        units = list(units) if units is not None else [""] * len(arrays)
        new_mask = self.grid.mask.copy()
        for arr in arrays.values():
            new_mask &= np.isfinite(arr)
        grid = self.grid.with_mask(new_mask)
        names = self.names + list(arrays)
        paths = self.paths + [None] * len(arrays)
        units_all = self.units + units
        if self.data is not None:
            data = np.concatenate(
                [self.data] + [np.asarray(a, np.float32)[None] for a in arrays.values()]
            )
            data[:, ~new_mask] = np.nan
            return LayerStack(grid, names, data, paths, units_all,
                              nodata_share=dict(self.nodata_share))
        mem = dict(self.in_memory)
        mem.update({k: np.asarray(v, np.float32) for k, v in arrays.items()})
        sources = list(self.sources) + [None] * len(arrays)
        return LayerStack(grid, names, None, paths, units_all, sources, mem,
                          dict(self.nodata_share))

    def iter_blocks(
        self, max_cells: int = 1 << 20, rows: slice | None = None, *, gather: bool = True
    ):
        """Yield ``(row_slice, X, valid)`` blocks of whole rows for prediction.

        ``X`` has shape (n_valid_in_block, n_layers), float32, column-major (a view
        of the stack where the whole block is valid); ``valid`` is the block's
        (rows, n_cols) mask, so ``out[row_slice][valid] = predict(X)``.  Memory per
        block is bounded by ``max_cells * n_layers`` values.  ``rows`` limits the
        blocks to a band of rows.

        With ``gather=False``, ``X`` holds every cell of the block (valid or not;
        shape (n_cells_in_block, n_layers), always a view), for computations that
        are cheaper done everywhere and masked afterwards than gathered first.
        """
        start = 0 if rows is None else (rows.start or 0)
        n_rows = self.grid.n_rows if rows is None else min(rows.stop, self.grid.n_rows)
        step = self._rows_per_block(max_cells)
        opener = self._open_sources() if self.streamed else contextlib.nullcontext({})
        with opener as opened:  # files stay open across blocks, not reopened per block
            for r0 in range(start, n_rows, step):
                sl = slice(r0, min(n_rows, r0 + step))
                valid = self.grid.mask[sl]
                band = (self._read_rows(sl, opened, False) if self.streamed
                        else self.data[:, sl]).reshape(self.n_layers, -1)
                if not gather or valid.all():
                    X = band.T  # no copy: a column-major (cells, layers) view
                else:
                    X = np.take(band, np.flatnonzero(valid.ravel()), axis=1).T
                yield sl, X.astype(np.float32, copy=False), valid

    def valid_matrix(self) -> np.ndarray:
        """Values at every valid cell, shape (n_valid, n_layers), float32, row-major."""
        return np.concatenate([X for _, X, _ in self.iter_blocks()], axis=0)


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


class _LayerStats:
    """Per-layer statistics gathered block by block while reading."""

    def __init__(self, dtype):
        self.dtype = np.dtype(dtype)
        self.n_finite = 0
        self.lo = np.inf
        self.hi = -np.inf
        self.n_lo = 0
        self.n_hi = 0
        self.classes: set | None = set()

    def add(self, values: np.ndarray):
        finite = values[np.isfinite(values)]
        if not finite.size:
            return
        self.n_finite += finite.size
        lo, hi = float(finite.min()), float(finite.max())
        n_lo, n_hi = int(np.count_nonzero(finite == lo)), int(np.count_nonzero(finite == hi))
        if lo < self.lo:
            self.lo, self.n_lo = lo, n_lo
        elif lo == self.lo:
            self.n_lo += n_lo
        if hi > self.hi:
            self.hi, self.n_hi = hi, n_hi
        elif hi == self.hi:
            self.n_hi += n_hi
        if self.classes is not None:
            self.classes.update(np.unique(finite[:1_000_000]).tolist())
            if len(self.classes) > 64:
                self.classes = None  # too many values to be categorical

    def sentinel(self):
        """A common nodata marker at an extreme of an untagged layer, and its count."""
        if self.n_finite == 0 or self.lo == self.hi:
            return None, 0
        dt = self.dtype
        candidates = [-9999.0]
        if np.issubdtype(dt, np.signedinteger):
            candidates.append(float(np.iinfo(dt).min))
        elif np.issubdtype(dt, np.unsignedinteger):
            candidates.append(float(np.iinfo(dt).max))
        else:
            candidates.append(float(np.finfo(np.float32).min))
        for c in candidates:
            if c == self.lo:
                return c, self.n_lo
            if c == self.hi:
                return c, self.n_hi
        if self.lo <= -1e38:  # float32 minimum written as a float64 or rounded
            return self.lo, self.n_lo
        return None, 0


@dataclass(frozen=True)
class BandRef:
    """One band of a raster file: a layer before it is read.

    Attributes
    ----------
    path : Path or str
        The file, or a GDAL subdataset name (e.g. one variable of a NetCDF file).
    band : int
        Band number (1-based).
    name : str
        Layer name: the file stem for a single-band file, the band description for
        a band of a multi-band file (``<stem>_<band>`` when it has none), the
        variable name for a subdataset.
    unit : str
        Unit text of the band ("" when the file has none).
    dtype : str
        Data type of the original band (kept when a layer is resampled to float).
    """

    path: object
    band: int
    name: str
    unit: str = ""
    dtype: str = "float32"


def _open_raster(path):
    import rasterio

    if isinstance(path, Path) and not path.exists():
        raise LayerError(f"Layer file {path} does not exist; check [layers] paths.")
    from rasterio.errors import NotGeoreferencedWarning

    try:
        with warnings.catch_warnings():
            # containers of subdatasets have no geotransform; a layer without one
            # is refused later for its missing CRS
            warnings.simplefilter("ignore", NotGeoreferencedWarning)
            return rasterio.open(path)
    except Exception as exc:  # rasterio raises several types for unreadable files
        raise LayerError(
            f"Layer file {path} cannot be read as a raster "
            f"({str(exc).rstrip('.')}); give a GeoTIFF or another raster that GDAL opens."
        ) from None


def _bands_of(src, path, stem: str) -> list:
    units = list(src.units or ())
    descs = list(src.descriptions or ())
    if src.count == 1:
        return [BandRef(path, 1, stem, (units[0] if units else "") or "", src.dtypes[0])]
    out = []
    for b in range(1, src.count + 1):
        desc = (descs[b - 1] if b - 1 < len(descs) else None) or ""
        name = desc.strip() or f"{stem}_{b}"
        out.append(BandRef(path, b, name, (units[b - 1] if b - 1 < len(units) else "") or "",
                           src.dtypes[b - 1]))
    return out


def list_bands(paths) -> list:
    """Every layer the raster files hold, as :class:`BandRef` (files are only opened).

    A single-band file is one layer named by its stem; each band of a multi-band
    file is a layer named by its band description; a container of subdatasets
    (e.g. NetCDF with several variables) gives each variable's bands.
    :class:`BandRef` items in ``paths`` are passed through.

    Raises
    ------
    LayerError
        A file is missing, unreadable, or has no bands; two layers share a name.
    """
    out = []
    for path in paths:
        if isinstance(path, BandRef):
            out.append(path)
            continue
        path = Path(path)
        with _open_raster(path) as src:
            if src.count == 0 and src.subdatasets:
                subs = list(src.subdatasets)
            elif src.count == 0:
                raise LayerError(f"Layer file {path} holds no raster band.")
            else:
                subs = None
                out.extend(_bands_of(src, path, path.stem))
        for sub in subs or ():
            var = str(sub).rsplit(":", 1)[-1].strip('"') or path.stem
            with _open_raster(sub) as src:
                out.extend(_bands_of(src, sub, var))
    names = [b.name for b in out]
    if len(set(names)) != len(names):
        dup = sorted({n for n in names if names.count(n) > 1})
        where = ", ".join(str(b.path) + (f" band {b.band}" if b.band > 1 else "")
                          for b in out if b.name == dup[0])
        raise LayerError(
            f"Two layers share the name {dup[0]!r} ({where}); rename a file or set "
            "distinct band descriptions so names are unique."
        )
    return out


def read_layers(
    paths,
    *,
    names=None,
    categorical=(),
    cell_budget: int | None = None,
    nodata_values: dict | None = None,
    memory_mb: float | None = None,
    block_cells: int = 1 << 22,
) -> LayerStack:
    """Read rasters that share one grid into a :class:`LayerStack`.

    Parameters
    ----------
    paths : sequence of path-like or BandRef
        Raster files (GeoTIFF or anything GDAL opens).  Each band of a multi-band
        file is one layer, named by its band description (see :func:`list_bands`).
    names : sequence of str, optional
        Layer names, one per band; by default from :func:`list_bands`.
    categorical : sequence of str, default ()
        Names of categorical layers; each class becomes a 0/1 indicator layer
        named ``<layer>=<class>``.
    cell_budget : int, optional
        Refuse grids with more cells than this (protects memory).
    nodata_values : dict of str to float, optional
        Extra nodata sentinel per layer name, for files that lack a nodata tag.
    memory_mb : float, optional
        Memory the layer values may take.  A stack larger than half of it is
        streamed from disk window by window instead of held in memory.  No limit
        when omitted.
    block_cells : int, default 4194304
        Cells per layer read at a time while checking the files.

    Returns
    -------
    LayerStack

    Raises
    ------
    LayerError
        A file is missing, unreadable, entirely nodata or looks categorical
        without being declared so.
    GridMismatchError
        Two files differ in CRS, transform, resolution or shape; the message names
        both files and what differs.
    """
    import rasterio
    from rasterio.windows import Window

    if not list(paths):
        raise LayerError("No layers were given: list raster files under [layers] paths.")
    bands = list_bands(paths)
    if names is not None:
        names = list(names)
        if len(names) != len(bands):
            raise LayerError(
                f"{len(names)} layer names were given for {len(bands)} layers "
                f"({', '.join(b.name for b in bands)})."
            )
        if len(set(names)) != len(names):
            dup = sorted({n for n in names if names.count(n) > 1})
            raise LayerError(
                f"Two layers share the name {dup[0]!r}; rename one file so names are unique."
            )
        bands = [BandRef(b.path, b.band, n, b.unit, b.dtype) for b, n in zip(bands, names)]
    names = [b.name for b in bands]
    nodata_values = dict(nodata_values or {})
    categorical = set(categorical)

    # -- 1. metadata: every file readable, with a CRS, on one grid ----------------------
    meta = []
    ref_info = ref_path = None
    for bref in bands:
        path, name = bref.path, bref.name
        with _open_raster(path) as src:
            if src.crs is None:
                raise LayerError(
                    f"Layer file {path} has no CRS; assign one (e.g. gdal_edit -a_srs)."
                )
            if ref_info is None:
                ref_path = path
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
                        f"{_describe_difference(diff, src, _base(ref_path), _base(path))}."
                        " Resample one onto the other's grid first, or let the screener "
                        'align them ([layers] alignment = "warp").'
                    )
            meta.append({
                "path": path,
                "band": bref.band,
                "name": name,
                "dtype": bref.dtype,
                "tagged": src.nodatavals[bref.band - 1] is not None,
                "unit": bref.unit,
            })
    crs, transform, width, height, _ = ref_info
    n_cells = width * height
    n_guess = len(bands)
    in_memory = memory_mb is None or n_guess * n_cells * 4 <= 0.5 * memory_mb * 1e6

    # -- 2. values: one pass, block by block (the whole grid at once in memory) -------
    step = height if in_memory else max(1, block_cells // max(width, 1))
    stats = [_LayerStats(m["dtype"]) for m in meta]
    sources = [LayerSource(m["path"], nodata_values.get(m["name"]), band=m["band"])
               for m in meta]
    mask = np.ones((height, width), dtype=bool)
    fills = [[] for _ in meta]
    full = [None] * len(meta)
    n_nan = [0] * len(meta)
    for r0 in range(0, height, step):
        win = Window(0, r0, width, min(step, height - r0))
        for i, m in enumerate(meta):
            with rasterio.open(m["path"]) as src:
                values = sources[i].read(src, window=win, fills=fills[i])
            stats[i].add(values)
            nan = np.isnan(values)
            n_nan[i] += int(nan.sum())
            mask[r0:r0 + win.height] &= ~nan
            if in_memory:
                full[i] = values

    # -- 3. per-layer checks ------------------------------------------------------------
    out_names, out_paths, units, out_sources, arrays = [], [], [], [], []
    for i, m in enumerate(meta):
        path, name, st = m["path"], m["name"], stats[i]
        if sum(fills[i]):
            warnings.warn(ScreenerWarning(
                f"Layer {name!r} ({path}): {sum(fills[i]):,} cells hold values beyond "
                f"+/-{FILL_ABOVE:g} or infinite ones, fill values rather than data; they "
                "are read as nodata. Tag the file's nodata value to silence this."))
        if not m["tagged"] and name not in nodata_values:
            sentinel, n_sent = st.sentinel()
            if sentinel is not None:
                raise LayerError(
                    f"Layer file {path} has no nodata value, but {n_sent:,} cells hold "
                    f"{sentinel:.9g}, a common nodata marker, as its "
                    f"{'minimum' if sentinel == st.lo else 'maximum'}. "
                    "Read as data they would distort every model. If they are nodata, "
                    f"tag the file (e.g. gdal_edit -a_nodata {sentinel:.9g} {_base(path)}); "
                    "if they are real values, rescale the layer."
                )
        if st.n_finite == 0:
            raise LayerError(
                f"Layer {name!r} ({path}) has no data at all (every cell is nodata); "
                "check its nodata value or leave it out."
            )
        is_int = np.issubdtype(np.dtype(m["dtype"]), np.integer)
        if name in categorical:
            if st.classes is None or len(st.classes) > 50:
                raise LayerError(
                    f"Layer {name!r} ({path}) is declared categorical but has more than "
                    "50 classes; more than 50 is unlikely to be categorical."
                )
            for c in sorted(st.classes):
                src_c = LayerSource(path, nodata_values.get(name), float(c), m["band"])
                out_sources.append(src_c)
                out_names.append(f"{name}={c:g}")
                out_paths.append(path)
                units.append("indicator")
                if in_memory:
                    v = full[i]
                    arrays.append(
                        np.where(np.isnan(v), np.nan, (v == np.float32(c))).astype(np.float32)
                    )
            continue
        if is_int and st.classes is not None and 1 < len(st.classes) <= 12:
            warnings.warn(
                f"Layer {name!r} ({path}) is an integer layer with only "
                f"{len(st.classes)} distinct values: if it is categorical (soil, "
                "vegetation class), list it under [layers] categorical so each class "
                "becomes an indicator; it is used as a continuous predictor now.",
                ScreenerWarning,
                stacklevel=2,
            )
        out_sources.append(sources[i])
        out_names.append(name)
        out_paths.append(path)
        units.append(m["unit"])
        if in_memory:
            arrays.append(full[i])
    if not mask.any():
        raise LayerError(
            "The layers' nodata areas do not overlap anywhere with data in all layers: "
            "no cell has a value in every layer. Check that they cover the same region."
        )
    grid = Grid(crs, transform, (height, width), mask)
    share = {m["name"]: n_nan[i] / n_cells for i, m in enumerate(meta)}
    if in_memory:
        data = np.stack(arrays)
        data[:, ~mask] = np.nan
        return LayerStack(grid, out_names, data, out_paths, units, nodata_share=share)
    log.info("streaming %d layers of %s cells from disk", len(out_names), f"{n_cells:,}")
    return LayerStack(grid, out_names, None, out_paths, units, out_sources,
                      nodata_share=share)


def _base(path) -> str:
    """Short name of a file (or subdataset) for messages."""
    return path.name if isinstance(path, Path) else str(path)


@dataclass(frozen=True)
class _RefInfo:
    crs: object
    transform: object
    width: int
    height: int
    res: tuple


def check_layers(stack: LayerStack, *, sample: int = 200_000, random_state=0,
                 names=None):
    """Report constant layers and collinear pairs over the valid cells.

    Parameters
    ----------
    stack : LayerStack
    sample : int, default 200000
        Valid cells sampled for the correlations.
    random_state : int, default 0
    names : sequence of str, optional
        Layers to check (default all); layers left out of the models need not be.

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
    names = list(stack.names) if names is None else list(names)
    cols_of = [stack.names.index(n) for n in names]
    for name in names:
        if name in stack.nodata_share:
            report.nodata_share[name] = stack.nodata_share[name]
        elif stack.data is not None:
            report.nodata_share[name] = float(np.isnan(stack.data[stack.names.index(name)])
                                              .mean())
    idx = np.flatnonzero(grid.mask.ravel())
    if idx.size > sample:
        rng = np.random.default_rng(random_state)
        idx = np.sort(rng.choice(idx, size=sample, replace=False))
    rows, cols = np.unravel_index(idx, grid.shape)
    X = stack.values_at(rows, cols).T[cols_of]
    sd = X.std(axis=1)
    const = sd <= 1e-12 * np.maximum(1.0, np.abs(X).max(axis=1))
    report.constant = [n for n, c in zip(names, const) if c]
    keep = np.flatnonzero(~const)
    if keep.size >= 2:
        r = np.corrcoef(X[keep])
        for a in range(keep.size):
            for b in range(a + 1, keep.size):
                if abs(r[a, b]) > COLLINEARITY_R:
                    report.collinear.append(
                        (names[keep[a]], names[keep[b]], float(r[a, b]))
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


def ground_gradients(grid: Grid, elevation) -> tuple:
    """Gradient of elevation towards east and north in metres per metre (rise over run).

    The one terrain gradient of the screener: slopes for walking
    (:func:`screener.access.slope_rise_over_run`), slope and aspect
    (:func:`slope_aspect`) and the hillshade (:func:`hillshade`) all use it.

    Parameters
    ----------
    grid : Grid
        Ground spacing: each row's own east-west cell width (km; it shrinks with
        latitude on geographic grids) and the north-south distances between rows.
    elevation : ndarray of shape (n_rows, n_cols)
        Metres; NaN for nodata.

    Returns
    -------
    dz_deast, dz_dnorth : ndarray of float64
        NaN where elevation is missing.

    Notes
    -----
    Central differences (``numpy.gradient``) over the ground spacing.  Beside missing
    elevation (a coast, a hole, the edge of the data) the one-sided difference to the
    valid neighbour is used, so cells next to nodata keep their slope; a valid cell
    with no valid neighbour along an axis has no gradient along it (0).  An axis of
    length 1 has no gradient along it.
    """
    z = np.asarray(elevation, dtype=np.float64)
    if z.shape != tuple(grid.shape):
        raise ValueError(f"elevation has shape {z.shape}, expected {tuple(grid.shape)}")
    n_rows, n_cols = z.shape
    if n_rows > 1:
        # northing of each row (rows increase southwards)
        y_m = -np.concatenate([[0.0], np.cumsum(grid.ns_step_km)]) * 1000.0
        dz_dnorth = _to_valid_neighbour(z, np.gradient(z, y_m, axis=0),
                                        np.diff(z, axis=0) / np.diff(y_m)[:, None],
                                        axis=0)
    else:
        dz_dnorth = np.where(np.isfinite(z), 0.0, np.nan)
    if n_cols > 1:
        ew_m = np.asarray(grid.ew_step_km, dtype=np.float64)[:, None] * 1000.0
        dz_deast = _to_valid_neighbour(z, np.gradient(z, axis=1) / ew_m,
                                       np.diff(z, axis=1) / ew_m, axis=1)
    else:
        dz_deast = np.where(np.isfinite(z), 0.0, np.nan)
    return dz_deast, dz_dnorth


def _to_valid_neighbour(z, central, step, axis):
    """``central`` differences where finite; else the one-sided difference (``step``:
    differences between consecutive cells along ``axis`` over their spacing) to the
    next or the previous cell; else 0 on a valid cell with no valid neighbour; NaN on
    missing cells."""
    pad = [(0, 0), (0, 0)]
    pad[axis] = (0, 1)
    forward = np.pad(step, pad, constant_values=np.nan)
    pad[axis] = (1, 0)
    backward = np.pad(step, pad, constant_values=np.nan)
    out = np.where(np.isfinite(central), central, forward)
    out = np.where(np.isfinite(out), out, backward)
    out = np.where(np.isfinite(out), out, 0.0)
    # a central difference skips the cell itself: a missing cell has no gradient
    return np.where(np.isfinite(z), out, np.nan)


#: rise over run below which a cell counts as flat (no aspect)
FLAT_RISE_OVER_RUN = 1e-9


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
        Downslope direction in degrees clockwise from north (NaN on flat cells, rise
        over run below ``FLAT_RISE_OVER_RUN``, and where elevation is missing).

    Notes
    -----
    Gradients from :func:`ground_gradients`: central differences
    (``numpy.gradient``), and beside nodata (a coast, a hole) the one-sided
    difference to the valid neighbour, so coastal cells keep their slope and aspect;
    NaN where elevation is missing.  On geographic grids the east-west spacing is the
    geodesic width of the row, so degrees are never used as metres.
    """
    gx, gy = ground_gradients(grid, elevation)
    slope = np.degrees(np.arctan(np.hypot(gx, gy)))
    # downslope direction: opposite of the gradient vector (east = gx, north = gy)
    aspect = (np.degrees(np.arctan2(-gx, -gy)) + 360.0) % 360.0
    # flat: below 1 mm per 1000 km, the rounding of central differences over unequal
    # row steps on flat ground
    aspect[np.hypot(gx, gy) < FLAT_RISE_OVER_RUN] = np.nan
    return slope.astype(np.float32), aspect.astype(np.float32)


def hillshade(
    grid: Grid,
    elevation,
    *,
    azimuth: float = 315.0,
    altitude: float = 45.0,
    vert_exag: float = 1.0,
) -> np.ndarray:
    """Hillshade of an elevation map with true ground spacing, in [0, 1] (for maps).

    The one hillshade of the screener: the pipeline, the figures and the map page all
    use it.

    Parameters
    ----------
    grid : screener.grid.Grid
        On longitude/latitude grids each row uses its own east-west cell width and
        the north-south steps between rows, in metres; on projected grids the
        constant cell size.
    elevation : ndarray of shape (n_rows, n_cols)
        Elevation in metres; NaN outside the valid area.
    azimuth, altitude : float, default 315, 45
        Light azimuth (degrees clockwise from north) and altitude (degrees).
    vert_exag : float, default 1.0
        Vertical exaggeration.

    Returns
    -------
    ndarray of float, shape (n_rows, n_cols)
        Illumination in [0, 1] (as :meth:`matplotlib.colors.LightSource.hillshade`),
        NaN where the elevation is NaN.

    Notes
    -----
    Lambertian shading of the surface: the illumination of a cell is the cosine of
    the angle between its surface normal and the direction of the light [1]_.  The
    normals come from central-difference gradients in metres (``numpy.gradient``)
    as in :meth:`matplotlib.colors.LightSource.hillshade` [2]_, but with each row's
    own east-west width, so a slope on a geographic grid is not exaggerated towards
    the poles; :meth:`matplotlib.colors.LightSource.shade_normals` then shades them
    (and stretches the result to [0, 1]).  On a projected grid the result equals
    ``LightSource.hillshade`` with ``dx``, ``dy`` the cell size in metres.  Beside
    nodata (a coast, a hole) the gradients are the one-sided differences to the
    valid neighbour (:func:`ground_gradients`); nodata cells are NaN in the result
    and take no part in the stretch.

    References
    ----------
    .. [1] Horn, B. K. P. (1981). Hill shading and the reflectance map. Proceedings
       of the IEEE 69(1), 14-47.
    .. [2] matplotlib.colors.LightSource, matplotlib documentation (hillshade and
       shade_normals).
    """
    from matplotlib.colors import LightSource

    z = np.asarray(elevation, dtype=float)
    if z.shape != tuple(grid.shape):
        raise ValueError(f"elevation has shape {z.shape}, expected {grid.shape}")
    nan = ~np.isfinite(z)
    if nan.all():
        return np.full(z.shape, np.nan)
    e_dx, e_dy = ground_gradients(grid, vert_exag * z)
    valid = ~nan
    normal = np.empty((int(valid.sum()), 3))
    normal[:, 0] = -e_dx[valid]
    normal[:, 1] = -e_dy[valid]
    normal[:, 2] = 1.0
    normal /= np.sqrt(np.sum(normal**2, axis=-1))[:, None]
    ls = LightSource(azdeg=azimuth, altdeg=altitude)
    # shaded (and stretched to [0, 1]) over the cells with elevation only
    out = np.full(z.shape, np.nan)
    out[valid] = np.asarray(ls.shade_normals(normal, fraction=1.0), float)
    return out
