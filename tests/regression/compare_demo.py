"""Compare the demo's outputs of this checkout with those of an earlier commit.

A restructuring must not change results: this script runs the demo (``--size small``
by default, serial, no cache) with the code of ``--before`` (a git commit, unpacked
with ``git archive`` into a temporary folder) and with this checkout, then compares
every output file:

- CSV tables, GPX and the field-sheet text: byte for byte;
- GeoTIFFs: array, transform, CRS, nodata and band description;
- candidates.gpkg: every layer's columns, values and geometries;
- run.json: every key except timings, platform, cache, paths of the temporary folder;
- report.html: text with the temporary folder's path and timings masked.

Run:  python tests/regression/compare_demo.py [--before a7e0c1c] [--size small]
Exit status 0 when every file matches (apart from ``--allow`` header changes named on
the command line, e.g. ``--allow overlap.csv``), 1 otherwise.  Not collected by pytest.
"""

from __future__ import annotations

import argparse
import json
import os
import re
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
#: run.json keys that change from run to run by design
VOLATILE = {"timings_s", "elapsed_s", "platform", "cache", "versions", "screener_version",
            "run_id"}
#: files that differ on every run by design (the run marker holds the run id)
SKIP = {".screener-run"}


def run_demo(src: Path, out: Path, size: str) -> None:
    """Run ``screener demo`` with the package found in ``src``."""
    env = dict(os.environ, PYTHONPATH=str(src), PYTHONHASHSEED="0")
    cmd = [sys.executable, "-c", "from screener.cli import main; main()", "-q", "demo",
           "--out", str(out), "--size", size, "--scheduler", "serial"]
    subprocess.run(cmd, check=True, env=env, cwd=src)


def unpack(commit: str, dest: Path) -> Path:
    """The tree of ``commit`` in ``dest`` (no worktree, no checkout of this repo)."""
    dest.mkdir(parents=True)
    archive = subprocess.run(["git", "-C", str(ROOT), "archive", commit],
                             check=True, capture_output=True).stdout
    subprocess.run(["tar", "-x", "-C", str(dest)], input=archive, check=True)
    return dest


def _mask(text: str, roots) -> str:
    for r in roots:
        text = text.replace(str(r), "<RUN>")
    text = re.sub(r"screener-demo-[A-Za-z0-9_]+", "<TMP>", text)
    # the report's provenance rows of timings change from run to run by design
    text = re.sub(r"<tr><td>(timings_s|elapsed_s)</td>.*?</tr>", r"<\1>", text)
    return re.sub(r"\d+(\.\d+)? s\b", "<T> s", text)


def _strip(obj):
    if isinstance(obj, dict):
        return {_strip(k): _strip(v) for k, v in obj.items() if k not in VOLATILE}
    if isinstance(obj, list):
        return [_strip(v) for v in obj]
    if isinstance(obj, str):
        return re.sub(r"/tmp/[^\s\"']*?screener-demo-[A-Za-z0-9_]+", "<TMP>", obj)
    return obj


def compare_tif(a: Path, b: Path) -> str | None:
    import numpy as np
    import rasterio

    with rasterio.open(a) as sa, rasterio.open(b) as sb:
        for what in ("crs", "transform", "nodata", "dtypes", "descriptions", "shape"):
            va, vb = getattr(sa, what), getattr(sb, what)
            both_nan = what == "nodata" and va is not None and vb is not None \
                and va != va and vb != vb  # NaN != NaN
            if va != vb and not both_nan:
                return f"{what}: {getattr(sa, what)} != {getattr(sb, what)}"
        xa, xb = sa.read(), sb.read()
    if not np.array_equal(xa, xb, equal_nan=xa.dtype.kind == "f"):
        return f"values differ in {int((xa != xb).sum())} cells"
    return None


def compare_gpkg(a: Path, b: Path) -> str | None:
    import geopandas as gpd
    import pyogrio

    la = [n for n, _ in pyogrio.list_layers(a)]
    lb = [n for n, _ in pyogrio.list_layers(b)]
    if la != lb:
        return f"layers {la} != {lb}"
    for layer in la:
        ga, gb = gpd.read_file(a, layer=layer), gpd.read_file(b, layer=layer)
        if list(ga.columns) != list(gb.columns):
            return f"{layer}: columns {list(ga.columns)} != {list(gb.columns)}"
        if not ga.drop(columns="geometry").equals(gb.drop(columns="geometry")):
            return f"{layer}: attribute values differ"
        if not ga.geometry.geom_equals_exact(gb.geometry, tolerance=0).all():
            return f"{layer}: geometries differ"
    return None


def compare_folders(a: Path, b: Path, roots) -> dict:
    """Differences per relative file name (empty when all match)."""
    fa = {p.relative_to(a).as_posix() for p in a.rglob("*") if p.is_file()
          and p.name not in SKIP}
    fb = {p.relative_to(b).as_posix() for p in b.rglob("*") if p.is_file()
          and p.name not in SKIP}
    diffs = {}
    for name in sorted(fa ^ fb):
        diffs[name] = "only before" if name in fa else "only after"
    for name in sorted(fa & fb):
        pa, pb = a / name, b / name
        suffix = pa.suffix.lower()
        if suffix == ".tif":
            d = compare_tif(pa, pb)
        elif suffix == ".gpkg":
            d = compare_gpkg(pa, pb)
        elif name.endswith("run.json"):
            ja = _strip(json.loads(pa.read_text("utf-8")))
            jb = _strip(json.loads(pb.read_text("utf-8")))
            keys = sorted(k for k in set(ja) | set(jb) if ja.get(k) != jb.get(k))
            d = f"keys differ: {keys}" if keys else None
        elif suffix in (".html", ".md", ".toml"):
            d = None if _mask(pa.read_text("utf-8"), roots) == _mask(
                pb.read_text("utf-8"), roots) else "text differs"
        elif suffix == ".pdf":
            d = None  # PDFs carry creation dates; their content is the sheets' tables
        else:
            d = None if pa.read_bytes() == pb.read_bytes() else "bytes differ"
            if d and suffix == ".csv":
                ha = pa.read_text("utf-8").splitlines()[:1]
                hb = pb.read_text("utf-8").splitlines()[:1]
                rest = (pa.read_text("utf-8").splitlines()[1:]
                        == pb.read_text("utf-8").splitlines()[1:])
                d = f"header {ha} -> {hb}" if ha != hb else "rows differ"
                if ha != hb and not rest:
                    d += " and rows differ"
        if d:
            diffs[name] = d
    return diffs


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--before", default="a7e0c1c", help="git commit to compare with")
    ap.add_argument("--size", default="small", choices=["small", "full"])
    ap.add_argument("--keep", type=Path, help="folder to keep both outputs in")
    ap.add_argument("--before-out", type=Path,
                    help="reuse the earlier commit's demo output folder (skips its run)")
    ap.add_argument("--allow", action="append", default=[],
                    help="file whose header change is expected (named in the commit)")
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory(prefix="screener-regression-") as tmp:
        base = args.keep or Path(tmp)
        before = args.before_out
        if before is None:
            src = unpack(args.before, base / "src-before")
            before = base / "before"
            run_demo(src, before, args.size)
        after = base / "after"
        run_demo(ROOT, after, args.size)
        diffs = compare_folders(before, after, [before, after])
    bad = {k: v for k, v in diffs.items()
           if not (Path(k).name in args.allow and v.startswith("header"))}
    for name, d in diffs.items():
        tag = "allowed" if name not in bad else "DIFFERS"
        print(f"{tag}: {name}: {d}")
    n = sum(1 for _ in diffs)
    print(f"{'identical' if not bad else 'different'}: "
          f"{n} file(s) differ, {len(bad)} unexpectedly (before = {args.before})")
    return 1 if bad else 0


if __name__ == "__main__":
    sys.exit(main())
