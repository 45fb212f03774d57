"""Shared fixtures: tiny synthetic rasters and record files written to tmp_path.

The values here are invented test inputs, not data; checks of results against
outside sources live in the test modules and name their source.
"""

from __future__ import annotations

import os

import matplotlib
import numpy as np
import pytest

matplotlib.use("Agg")

#: speed and regression scripts are run by hand, not collected (doctests included)
collect_ignore_glob = ["benchmarks/*", "regression/*"]
os.environ.setdefault("GDAL_CACHEMAX", "64")

# Property tests draw the same examples on every run, so a red CI is reproducible and
# main cannot turn red on a lucky draw; set HYPOTHESIS_PROFILE=explore to search afresh.
from hypothesis import settings as _hypothesis_settings  # noqa: E402

_hypothesis_settings.register_profile("repeatable", derandomize=True, database=None)
_hypothesis_settings.register_profile("explore", database=None)
_hypothesis_settings.load_profile(os.environ.get("HYPOTHESIS_PROFILE", "repeatable"))


def write_tif(path, array, *, crs="EPSG:4326", transform=None, nodata=-9999.0, dtype=None):
    """Write one band to a GeoTIFF; NaN becomes ``nodata``."""
    import rasterio
    from affine import Affine

    arr = np.asarray(array)
    dtype = dtype or arr.dtype
    if transform is None:
        transform = Affine(0.01, 0, 10.0, 0, -0.01, -5.0)
    out = arr.astype(dtype)
    if nodata is not None and np.issubdtype(np.dtype(dtype), np.floating):
        out = np.where(np.isnan(arr), nodata, arr).astype(dtype)
    profile = dict(
        driver="GTiff",
        width=arr.shape[1],
        height=arr.shape[0],
        count=1,
        dtype=str(np.dtype(dtype)),
        crs=crs,
        transform=transform,
    )
    if nodata is not None:
        profile["nodata"] = nodata
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(out, 1)
    return path


@pytest.fixture
def tif_writer():
    return write_tif


@pytest.fixture
def small_layers(tmp_path):
    """Three 30 x 40 float32 layers on a lat/lon grid with a nodata corner."""
    rng = np.random.default_rng(1)
    rr, cc = np.mgrid[0:30, 0:40]
    a = (rr * 2.0 + cc).astype(np.float32)
    b = np.sin(rr / 5.0).astype(np.float32) * 10 + rng.normal(0, 1, (30, 40)).astype(
        np.float32
    )
    c = rng.normal(0, 1, (30, 40)).astype(np.float32)
    a[:3, :3] = np.nan
    folder = tmp_path / "layers"
    folder.mkdir()
    paths = []
    for name, arr in (("alpha", a), ("beta", b), ("gamma", c)):
        paths.append(write_tif(folder / f"{name}.tif", arr))
    return paths
