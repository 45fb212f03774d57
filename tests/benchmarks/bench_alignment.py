"""Aligning layers of mixed grids beside a bare ``rasterio.warp.reproject`` of each.

Six layers on a 2000 x 2000 reference grid (4e6 cells, 0.0025 degrees, EPSG:4326):
a finer layer (averaged), a coarse one and a 30-arc-second one (bilinear), one in
UTM at 250 m (bilinear across CRSs), a categorical one (mode) and one with a shifted
origin (bilinear).  ``align_layers`` (coverage check, method choice, warp, tiled
GeoTIFF written to the cache) beside a bare ``reproject`` of the same layers with
the same resampling into arrays.  Goal: at most 1.5x.

Run:  python tests/benchmarks/bench_alignment.py [--repeats 3]
Writes docs/benchmarks/alignment.md.  Not collected by pytest.
"""

from __future__ import annotations

import argparse
import os
import platform
import shutil
import sys
import tempfile
import time
from pathlib import Path

os.environ.setdefault("GDAL_CACHEMAX", "64")

import numpy as np  # noqa: E402

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

REF_RES = 0.0025
SIDE = 2000
X0, Y0 = 30.0, -10.0  # west and north edges of the reference grid


def _write(path, arr, crs, transform, nodata=np.nan):
    import rasterio

    with rasterio.open(path, "w", driver="GTiff", width=arr.shape[1], height=arr.shape[0],
                       count=1, dtype=str(arr.dtype), crs=crs, transform=transform,
                       nodata=nodata, tiled=True, blockxsize=256, blockysize=256) as dst:
        dst.write(arr, 1)
    return path


def make_layers(folder: Path):
    """The reference layer and five layers on other grids, all covering it."""
    from affine import Affine
    from rasterio.warp import transform_bounds

    rng = np.random.default_rng(0)
    folder.mkdir(parents=True, exist_ok=True)
    span = SIDE * REF_RES

    def field(n_rows, n_cols, dtype=np.float32):
        base = rng.normal(size=(n_rows // 50 + 2, n_cols // 50 + 2))
        from scipy.ndimage import zoom

        return zoom(base, (n_rows / base.shape[0], n_cols / base.shape[1]), order=1)[
            :n_rows, :n_cols].astype(dtype)

    out = [_write(folder / "reference.tif", field(SIDE, SIDE), "EPSG:4326",
                  Affine(REF_RES, 0, X0, 0, -REF_RES, Y0))]
    fine = REF_RES / 2
    n = int(span / fine) + 4
    out.append(_write(folder / "fine.tif", field(n, n), "EPSG:4326",
                      Affine(fine, 0, X0 - 2 * fine, 0, -fine, Y0 + 2 * fine)))
    n = int(span / 0.05) + 2
    out.append(_write(folder / "coarse.tif", field(n, n), "EPSG:4326",
                      Affine(0.05, 0, X0 - 0.05, 0, -0.05, Y0 + 0.05)))
    arcsec30 = 1 / 120
    n = int(span / arcsec30) + 2
    out.append(_write(folder / "thirty_seconds.tif", field(n, n), "EPSG:4326",
                      Affine(arcsec30, 0, X0 - arcsec30, 0, -arcsec30, Y0 + arcsec30)))
    utm = "EPSG:32736"  # UTM 36S covers 30-36 E
    xmin, ymin, xmax, ymax = transform_bounds("EPSG:4326", utm, X0, Y0 - span, X0 + span, Y0,
                                              densify_pts=51)
    w, h = int((xmax - xmin) / 250) + 4, int((ymax - ymin) / 250) + 4
    out.append(_write(folder / "national.tif", field(h, w), utm,
                      Affine(250.0, 0, xmin - 500, 0, -250.0, ymax + 500)))
    n = int(span / fine) + 4
    cls = (np.abs(field(n, n)) * 3).astype(np.uint8) % 5 + 1
    out.append(_write(folder / "cover.tif", cls, "EPSG:4326",
                      Affine(fine, 0, X0 - 2 * fine, 0, -fine, Y0 + 2 * fine), nodata=0))
    shift = REF_RES / 3
    out.append(_write(folder / "shifted.tif", field(SIDE + 2, SIDE + 2), "EPSG:4326",
                      Affine(REF_RES, 0, X0 - REF_RES + shift, 0, -REF_RES,
                             Y0 + REF_RES - shift)))
    return out


def bare(paths, align):
    """rasterio.warp.reproject of each layer into an array, same resampling."""
    import rasterio
    from rasterio.enums import Resampling
    from rasterio.warp import reproject

    methods = {o.name: o.method for o in align.origins}
    ref = align.reference
    for p in paths[1:]:
        with rasterio.open(p) as src:
            dst = np.full((ref.height, ref.width), np.nan, np.float32)
            reproject(rasterio.band(src, 1), dst, dst_transform=ref.transform,
                      dst_crs=ref.crs, dst_nodata=np.nan,
                      resampling=getattr(Resampling, methods[p.stem]))


def main():
    from screener.alignment import align_layers

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=3)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory(prefix="screener-bench-align-") as tmp:
        tmp = Path(tmp)
        paths = make_layers(tmp / "layers")
        ours, theirs = [], []
        al = None
        for k in range(args.repeats):
            cache = tmp / f"cache{k}"
            t0 = time.perf_counter()
            al = align_layers(paths, cache_dir=cache, categorical=["cover"])
            ours.append(time.perf_counter() - t0)
            shutil.rmtree(cache)
            t0 = time.perf_counter()
            bare(paths, al)
            theirs.append(time.perf_counter() - t0)
        t_ours, t_bare = min(ours), min(theirs)
    lines = [
        "# Aligning layers of mixed grids",
        "",
        f"`python tests/benchmarks/bench_alignment.py --repeats {args.repeats}` on "
        f"{platform.machine()} ({os.cpu_count()} cores), Python {platform.python_version()}, "
        f"{time.strftime('%Y-%m-%d')}: six layers aligned to a {SIDE} x {SIDE} reference grid "
        f"({SIDE * SIDE:.0e} cells, {REF_RES} degrees), best of the repeats. "
        "`align_layers` (coverage check, method choice, warp, tiled GeoTIFF written to the "
        "cache folder) beside a bare `rasterio.warp.reproject` of the same layers into "
        "arrays with the same resampling. Goal: at most 1.5x.",
        "",
        "| layer | original grid | method |",
        "| --- | --- | --- |",
    ]
    for o in al.origins[1:]:
        lines.append(f"| {o.name} | {o.crs}, {o.shape[0]} x {o.shape[1]} cells of "
                     f"{o.res[0]:.6g} | {o.method} ({o.note}) |")
    lines += [
        "",
        "| align_layers (s) | bare reproject (s) | ratio | goal |",
        "| --- | --- | --- | --- |",
        f"| {t_ours:.2f} | {t_bare:.2f} | {t_ours / t_bare:.2f} | "
        f"{'met' if t_ours <= 1.5 * t_bare else 'NOT met'} (<= 1.5) |",
        "",
    ]
    out = ROOT / "docs" / "benchmarks" / "alignment.md"
    out.write_text("\n".join(lines), encoding="utf-8")
    print("\n".join(lines))


if __name__ == "__main__":
    main()
