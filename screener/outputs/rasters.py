"""GeoTIFF writing in the Cloud-Optimized layout (tiled, compressed, overviews)."""

from __future__ import annotations

from pathlib import Path

import numpy as np

__all__ = ["write_raster", "read_raster"]


def write_raster(path, array, grid, *, nodata=np.nan, description: str = "") -> Path:
    """Write one band as a Cloud-Optimized GeoTIFF.

    Parameters
    ----------
    path : path-like
    array : ndarray of shape (n_rows, n_cols)
        Float arrays are written as float32 with NaN as nodata; bool as uint8
        (0/1, nodata 255); integers as int32 (nodata -1).
    grid : Grid
        CRS and transform.
    nodata : float, default NaN
    description : str
        Band description stored in the file.

    Returns
    -------
    Path

    Notes
    -----
    256 x 256 tiles, DEFLATE with the floating-point predictor, and internal
    overviews, written through GDAL's COG driver so the layout is the standard one.
    Tiles are compressed on all usable cores (GDAL ``NUM_THREADS``).  No timestamp
    is written, so identical arrays give identical files.
    """
    import rasterio
    from rasterio.io import MemoryFile

    from screener.parallel import default_n_workers
    from rasterio.shutil import copy as rio_copy

    path = Path(path)
    arr = np.asarray(array)
    if arr.dtype == bool:
        out, dtype, nd, predictor = arr.astype(np.uint8), "uint8", 255, 2
        out = np.where(grid.mask, out, 255).astype(np.uint8)
    elif np.issubdtype(arr.dtype, np.integer):
        out, dtype, nd, predictor = arr.astype(np.int32, copy=False), "int32", -1, 2
    else:
        out = arr.astype(np.float32, copy=False)
        dtype, nd, predictor = "float32", nodata, 3
    profile = dict(
        driver="GTiff",
        width=grid.n_cols,
        height=grid.n_rows,
        count=1,
        dtype=dtype,
        crs=grid.crs,
        transform=grid.transform,
        nodata=nd,
    )
    with MemoryFile() as mem:
        with mem.open(**profile) as dst:
            dst.write(out, 1)
            if description:
                dst.set_band_description(1, description)
        with mem.open() as src:
            rio_copy(
                src,
                str(path),
                driver="COG",
                compress="DEFLATE",
                predictor=str(predictor),
                blocksize=256,
                overview_resampling="average" if dtype == "float32" else "nearest",
                # compression runs on every core this process may use; tiles are
                # still written in order, so the file does not depend on it
                num_threads=default_n_workers(),
            )
    with rasterio.open(path) as chk:  # fail loudly rather than leave a bad file
        assert chk.width == grid.n_cols and chk.height == grid.n_rows
    return path


def read_raster(path):
    """Read band 1 as float64 with nodata as NaN (for tests and notebooks)."""
    import rasterio

    with rasterio.open(path) as src:
        return np.ma.filled(src.read(1, masked=True).astype(np.float64), np.nan)
