"""Compare the demo's outputs of this checkout with those of an earlier commit.

A restructuring must not change results: this script runs the demo scenario
(``--size small`` by default, serial, no cache, geographic tests always on with 99
replicates so both sides run the same tests whatever the machine's load) with the
code of ``--before`` (a git commit, unpacked with ``git archive`` into a temporary
folder) and with a copy of this checkout, then compares every output file:

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
import shutil
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


#: settings added to the demo project so both sides run the same tests: the demo's
#: "auto" geographic tests are skipped when a refit looks slow, which depends on the
#: machine's load, not on the code
OVERRIDES = """
[overlap]
n_replicates = 99
geographic_tests = "on"
"""


def run_demo(src: Path, base: Path, out: Path, size: str) -> None:
    """Write the demo scenario into ``base / "scenario"`` and run it with the package in
    ``src`` (the scenario is rewritten at the same path for each side, so paths in
    the outputs agree)."""
    env = dict(os.environ, PYTHONPATH=str(src), PYTHONHASHSEED="0")
    scen = base / "scenario"
    if scen.exists():
        shutil.rmtree(scen)
    write = ("import sys; from pathlib import Path; from screener.demo import "
             "write_demo_scenario; p = write_demo_scenario(Path(sys.argv[1]), "
             "size=sys.argv[2]); p.write_text(p.read_text() + sys.argv[3])")
    subprocess.run([sys.executable, "-c", write, str(scen), size, OVERRIDES],
                   check=True, env=env, cwd=src)
    cmd = [sys.executable, "-c", "from screener.cli import main; main()", "-q", "run",
           str(scen / "project.toml"), "--out", str(out), "--scheduler", "serial",
           "--no-cache"]
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
    # ... also when the report shows run.json as text
    text = re.sub(r"&quot;(elapsed_s|run_id)&quot;: [^,\n]*", r"<\1>", text)
    text = re.sub(r"&quot;timings_s&quot;: \{.*?\}", "<timings_s>", text, flags=re.S)
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


def compare_csv(a: Path, b: Path) -> str:
    """How two different CSV files differ: "header ..." when only the columns changed
    (names or order) and the shared columns hold the same values, else "rows differ"."""
    import pandas as pd

    ta, tb = pd.read_csv(a, dtype=str), pd.read_csv(b, dtype=str)
    if list(ta.columns) == list(tb.columns):
        return "rows differ"
    shared = [c for c in ta.columns if c in tb.columns]
    same = len(ta) == len(tb) and ta[shared].equals(tb[shared])
    added = [c for c in tb.columns if c not in ta.columns]
    gone = [c for c in ta.columns if c not in tb.columns]
    what = (f"header: columns added {added}, removed {gone}" if added or gone
            else "header: column order changed")
    return what + ("" if same else "; and values in shared columns differ")


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
                d = compare_csv(pa, pb)
        if d:
            diffs[name] = d
    return diffs


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--before", default="a7e0c1c", help="git commit to compare with")
    ap.add_argument("--after", help="git commit to compare (default: this checkout)")
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
        # this checkout's package is copied first, so edits made while the earlier
        # commit's demo runs do not leak into this side
        src_after = base / "src-after"
        if args.after:
            unpack(args.after, src_after)
        else:
            shutil.copytree(ROOT / "screener", src_after / "screener",
                            ignore=shutil.ignore_patterns("__pycache__"))
        if before is None:
            src = unpack(args.before, base / "src-before")
            before = base / "before"
            run_demo(src, base, before, args.size)
        after = base / "after"
        run_demo(src_after, base, after, args.size)
        diffs = compare_folders(before, after, [before, after])
    bad = {k: v for k, v in diffs.items()
           if not (Path(k).name in args.allow and v.startswith("header")
                   and "values" not in v)}
    for name, d in diffs.items():
        tag = "allowed" if name not in bad else "DIFFERS"
        print(f"{tag}: {name}: {d}")
    n = sum(1 for _ in diffs)
    print(f"{'identical' if not bad else 'different'}: "
          f"{n} file(s) differ, {len(bad)} unexpectedly (before = {args.before}, "
          f"after = {args.after or 'this checkout'})")
    return 1 if bad else 0


if __name__ == "__main__":
    sys.exit(main())
