"""How each per-cell stage's cost grows with the grid, beside its reference kernel.

Builds synthetic projected grids of 1e6, 4e6 and 1.6e7 cells x 20 float32 layers
(tiled, DEFLATE GeoTIFFs in a temporary folder), then times, per stage, our code
and a bare reference kernel run in the same process:

===============  ==========================================  =============================
stage            ours                                        reference kernel
===============  ==========================================  =============================
I/O (read)       streamed ``LayerStack.iter_blocks``         bare rasterio windowed reads
I/O (write)      ``outputs.rasters.write_raster`` (COG)      bare rasterio GTiff write
prediction       ``predict_map``, point-process (linear,     ``np.tensordot(w, stack)``: one
                 and linear+quadratic+hinge), ellipsoid,     weighted sum over the layers
                 envelope; stack in memory                   (memory bound)
prediction,      ``predict_map``, point-process (linear),    bare rasterio windowed reads
streamed         stack streamed from disk                    + the same weighted sum
novelty          MESS over blocks (stack in memory)          ``np.tensordot`` as above
thresholds       ``compute_thresholds`` on the map           ``np.sum`` over the map
cost distance    ``CostGraph`` + one run + one path          ``MCP_Geometric.find_costs``
cost, tiled      the same under ``memory_mb`` (tile by tile)  ``MCP_Geometric.find_costs``
isolation        ``find_candidates`` (one taxon, MTP and     ``scipy.ndimage.label`` + bare
                 relaxed thresholds: the whole stage)        MCP, once per threshold set
===============  ==========================================  =============================

Peak memory is measured per stage in a fresh subprocess (``ru_maxrss``), with the
stack streamed under ``memory_mb`` and GDAL's block cache capped at 64 MB; a last
subprocess runs the per-cell chain end to end (read, predict, MESS, thresholds, write,
isolation under ``memory_mb``) and reports its peak.  Replicate-bound speed-up: the environmental
equivalency test, 1000 replicates, on one and on two local processes.

Run:  python tests/benchmarks/bench_scaling.py [--sizes 1e6,4e6,1.6e7] [--repeats 2]
Writes docs/benchmarks/scaling.md.  Not collected by pytest.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

os.environ.setdefault("GDAL_CACHEMAX", "64")

import numpy as np  # noqa: E402
from _timing import timed  # noqa: E402 (tests/benchmarks/_timing.py)

ROOT = Path(__file__).resolve().parents[2]
N_LAYERS = 20
#: memory_mb for streamed stacks: small enough that every grid here is streamed
MEMORY_MB = 64.0
#: raw figures of the last run; a rerun of some stages merges into them
RESULTS = ROOT / "docs" / "benchmarks" / "scaling.json"


def make_grid(folder: Path, side: int, seed: int = 0):
    """Write N_LAYERS smooth float32 layers of side x side cells (EPSG:32633, 1 km)."""
    import rasterio
    from affine import Affine
    from scipy.ndimage import gaussian_filter, zoom

    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    transform = Affine(1000, 0, 200_000, 0, -1000, 200_000 + side * 1000)
    paths = []
    base = [zoom(gaussian_filter(rng.normal(size=(side // 16 + 2,) * 2), 2), 16,
                 order=1)[:side, :side].astype(np.float32) for _ in range(4)]
    for i in range(N_LAYERS):
        w = rng.normal(size=4).astype(np.float32)
        arr = sum(wk * b for wk, b in zip(w, base)) + np.float32(i)
        arr[: side // 50, : side // 50] = np.nan  # a nodata corner
        p = folder / f"layer{i:02d}.tif"
        with rasterio.open(p, "w", driver="GTiff", width=side, height=side, count=1,
                           dtype="float32", crs="EPSG:32633", transform=transform,
                           nodata=np.nan, tiled=True, blockxsize=256, blockysize=256,
                           compress="deflate", predictor=3) as dst:
            dst.write(arr, 1)
        paths.append(p)
    return paths


def stage_run(stage: str, folder: Path, repeats: int) -> dict:
    """Run one stage (ours and its reference) in this process; return timings."""
    import rasterio
    from rasterio.windows import Window

    from screener.layers import read_layers

    paths = sorted(folder.glob("layer*.tif"))
    stack = read_layers(paths, memory_mb=MEMORY_MB)
    grid = stack.grid
    n = grid.n_cells
    if (stage.startswith("predict") and stage != "predict_streamed") or stage == "novelty":
        # kernels compared on values in memory (the reference is in-memory arithmetic)
        stack = read_layers(paths, memory_mb=None)
    rng = np.random.default_rng(1)
    idx = rng.choice(np.flatnonzero(grid.mask.ravel()), 2000, replace=False)
    rr, cc = np.unravel_index(idx, grid.shape)
    B = stack.values_at(rr, cc)
    P = B[:20] + 0.1
    res = {"cells": n}

    if stage == "io_read":
        def ours():
            for _ in stack.iter_blocks(1 << 20):
                pass

        def ref():
            step = max(1, (1 << 20) // grid.n_cols)
            for p in paths:
                with rasterio.open(p) as src:
                    for r0 in range(0, grid.n_rows, step):
                        src.read(1, window=Window(0, r0, grid.n_cols,
                                                  min(step, grid.n_rows - r0)))
    elif stage == "io_write":
        from screener.outputs.rasters import write_raster

        m = stack.layer(stack.names[0])
        tmp = folder / "w"
        tmp.mkdir(exist_ok=True)

        def ours():
            write_raster(tmp / "ours.tif", m, grid)

        def ref():
            with rasterio.open(tmp / "ref.tif", "w", driver="GTiff", width=grid.n_cols,
                               height=grid.n_rows, count=1, dtype="float32",
                               crs=grid.crs, transform=grid.transform, nodata=np.nan,
                               tiled=True, blockxsize=256, blockysize=256,
                               compress="deflate", predictor=3) as dst:
                dst.write(m, 1)
    elif stage.startswith("predict") or stage == "novelty":
        from screener.models import make_model
        from screener.novelty import mess
        from screener.models.mapping import predict_map

        family, params = {
            "predict_ppm": ("ppm", {"terms": "linear"}),
            "predict_streamed": ("ppm", {"terms": "linear"}),
            "predict_ppm_hinge": ("ppm", {"terms": "linear+quadratic+hinge", "l1_penalty": 0.05}),
            "predict_ellipsoid": ("ellipsoid", {}),
            "predict_envelope": ("envelope", {}),
            "novelty": ("ellipsoid", {}),
        }[stage]
        model = make_model(family, **params).fit(P, B)
        w = rng.normal(size=N_LAYERS).astype(np.float32)

        if stage == "novelty":
            def ours():
                for _, X, _ in stack.iter_blocks(1 << 20):
                    mess(B, X)
        else:
            def ours():
                predict_map(model, stack)

        if stage == "predict_streamed":
            def ref():  # bare windowed reads of every layer, then the weighted sum
                step = max(1, (1 << 20) // grid.n_cols)
                srcs = [rasterio.open(p) for p in paths]
                try:
                    for r0 in range(0, grid.n_rows, step):
                        win = Window(0, r0, grid.n_cols, min(step, grid.n_rows - r0))
                        band = np.stack([s.read(1, window=win) for s in srcs])
                        np.tensordot(w, band, axes=1)
                finally:
                    for s in srcs:
                        s.close()
        else:
            data = stack.data

            def ref():  # one weighted sum over the band-sequential stack: memory bound
                np.tensordot(w, data, axes=1)
    elif stage == "thresholds":
        from screener.thresholds import compute_thresholds

        m = rng.random(grid.shape).astype(np.float32)
        areas = np.asarray(grid.cell_area_km2, float)
        scores = rng.random(30)

        def ours():
            compute_thresholds(scores, m, areas, background_scores=rng.random(2000))

        def ref():
            np.nansum(m)
    elif stage in ("cost", "cost_tiled"):
        from skimage.graph import MCP_Geometric

        from screener.costdistance import CostGraph, least_cost_path

        r = rng.random(grid.shape) + 0.1
        src_rc = np.array([[grid.n_rows // 2, grid.n_cols // 2]])
        # "cost": the defaults; "cost_tiled": the solver held to memory_mb (tile by
        # tile at every size, the same costs)
        memory_mb = MEMORY_MB if stage == "cost_tiled" else None

        def ours():
            g = CostGraph(grid, r, memory_mb=memory_mb)
            assert memory_mb is None or g.backend == "tiled"
            surf = g.run(src_rc)
            least_cost_path(surf, (grid.n_rows - 1, grid.n_cols - 1))

        def ref():
            costs = np.where(grid.mask, r, np.inf)
            MCP_Geometric(costs, sampling=(1.0, 1.0)).find_costs([tuple(src_rc[0])])
    elif stage == "isolation":
        from scipy import ndimage
        from skimage.graph import MCP_Geometric

        from screener.isolation import Clade, IsolationParameters, find_candidates

        s = np.where(grid.mask, stack.layer(stack.names[0]), np.nan)
        s = ((s - np.nanmin(s)) / (np.nanmax(s) - np.nanmin(s))).astype(np.float32)
        thr = float(np.nanquantile(s, 0.8))
        relaxed = float(np.nanquantile(s, 0.7))
        pick = np.flatnonzero((s >= thr).ravel())[:5]
        rec = np.unravel_index(pick, grid.shape)

        def ours():
            find_candidates(Clade(grid, {"a": s}, {"a": rec}), {"a": thr}, {"a": relaxed},
                            IsolationParameters(memory_mb=MEMORY_MB))

        def ref():  # the kernels the stage cannot avoid: label and MCP per threshold set
            costs = np.where(grid.mask, 1.0 - s, np.inf)
            mcp = MCP_Geometric(costs, fully_connected=True)
            for t in (thr, relaxed):
                lab, _ = ndimage.label(s >= t, structure=np.ones((3, 3)))
                src = np.isin(lab, np.unique(lab[rec])) & (lab > 0)
                edge = src & ~ndimage.binary_erosion(src, np.ones((3, 3)))
                mcp.find_costs(np.argwhere(edge))
    else:
        raise SystemExit(f"unknown stage {stage}")

    # interleaved (ours, ref, ours, ref, ...): neither side always runs on a warmer cache
    t_ours, t_ref = [], []
    for _ in range(repeats):
        t_ours.append(timed(ours, 1)[0])
        t_ref.append(timed(ref, 1)[0])
    res["ours_min"], res["ours_med"] = min(t_ours), statistics.median(t_ours)
    res["ref_min"], res["ref_med"] = min(t_ref), statistics.median(t_ref)
    res["peak_mb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    return res


def chain_run(folder: Path) -> dict:
    """The per-cell chain end to end, for the peak memory of a whole run."""
    from screener.isolation import Clade, IsolationParameters, find_candidates
    from screener.layers import check_layers, read_layers
    from screener.models import make_model
    from screener.novelty import mess
    from screener.outputs.rasters import write_raster
    from screener.models.mapping import predict_map
    from screener.thresholds import compute_thresholds

    t0 = time.perf_counter()
    paths = sorted(folder.glob("layer*.tif"))
    stack = read_layers(paths, memory_mb=MEMORY_MB)
    grid = stack.grid
    check_layers(stack)
    rng = np.random.default_rng(2)
    idx = rng.choice(np.flatnonzero(grid.mask.ravel()), 10_000, replace=False)
    B = stack.values_at(*np.unravel_index(idx, grid.shape))
    P = B[:25]
    model = make_model("ellipsoid").fit(P, B)
    m = predict_map(model, stack)
    for _, X, _ in stack.iter_blocks(1 << 20):
        mess(B, X)
    th = compute_thresholds(model.predict(P), m, np.asarray(grid.cell_area_km2, float))
    write_raster(folder / "chain.tif", m, grid)
    rec = np.unravel_index(idx[:5], grid.shape)
    find_candidates(Clade(grid, {"a": m}, {"a": rec}), {"a": th["mtp"].value},
                    {"a": th["p10"].value}, IsolationParameters(memory_mb=MEMORY_MB))
    return {"cells": grid.n_cells, "seconds": time.perf_counter() - t0,
            "peak_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
            "mtp": th["mtp"].value}


def replicate_speedup(repeats: int) -> dict:
    """One vs two local processes on replicate-bound work.

    Two workloads: the environmental equivalency test (1000 replicates, batched into
    matrix products of 64 replicates) and the null-model test of AUC for the
    point-process family (99 replicates, the default, each a model fit on 10,000
    background points).
    """
    from screener.evaluation import EvaluationParameters, Points, null_model_test
    from screener.overlap import OverlapTaxon, environmental_space, equivalency_test
    from screener.parallel import make_executor

    rng = np.random.default_rng(3)
    records_a, records_b = rng.normal(0, 1, (50, 4)), rng.normal(0.3, 1, (50, 4))
    space = environmental_space(
        OverlapTaxon("A", env_records=records_a, env_background=rng.normal(0, 2, (3000, 4))),
        OverlapTaxon("B", env_records=records_b, env_background=rng.normal(0, 2, (3000, 4))),
    )
    bg = rng.normal(0, 1, (10_000, 6))
    pres = bg[:12] * 0.3 + 1.0
    out = {}
    for kind, n in (("serial", 1), ("processes", 1), ("processes", 2)):
        with make_executor(kind, n_workers=None if kind == "serial" else n) as ex:
            ex.map(abs, [1, 2])  # start the workers before timing
            out[f"equivalency-1000, {kind}-{n}"] = timed(
                lambda ex=ex: equivalency_test(space, n_replicates=1000, random_state=0,
                                               executor=ex), repeats)[:2]
            out[f"null-model ppm-99, {kind}-{n}"] = timed(
                lambda ex=ex: null_model_test("ppm", {"terms": "linear+quadratic"},
                                              Points(pres), Points(bg),
                                              parameters=EvaluationParameters(n_null=99),
                                              observed_auc=0.9, map_fn=ex.map),
                repeats)[:2]
    return out


STAGES = ["io_read", "io_write", "predict_ppm", "predict_ppm_hinge", "predict_ellipsoid",
          "predict_envelope", "predict_streamed", "novelty", "thresholds", "cost", "cost_tiled",
          "isolation"]


def main():
    ap = argparse.ArgumentParser(description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--sizes", default="1e6,4e6,1.6e7")
    ap.add_argument("--repeats", type=int, default=2)
    ap.add_argument("--stages", default=",".join(STAGES),
                    help="comma-separated subset of stages")
    ap.add_argument("--speedup-only", action="store_true",
                    help="only the one-vs-two-process replicate measurement")
    ap.add_argument("--no-chain", action="store_true",
                    help="skip the whole-chain runs (keep the last ones)")
    ap.add_argument("--no-speedup", action="store_true",
                    help="skip the replicate speed-up (keep the last one)")
    ap.add_argument("--stage", help=argparse.SUPPRESS)
    ap.add_argument("--folder", help=argparse.SUPPRESS)
    ap.add_argument("--chain", action="store_true", help=argparse.SUPPRESS)
    args = ap.parse_args()
    # every process (driver, stages, chain) is set up as the command line sets itself
    # up, for ours and the reference alike
    from screener.system import avoid_hugepage_stalls

    avoid_hugepage_stalls()
    if args.stage:
        print(json.dumps(stage_run(args.stage, Path(args.folder), args.repeats)))
        return
    if args.chain:
        print(json.dumps(chain_run(Path(args.folder))))
        return

    if args.speedup_only:
        speed = replicate_speedup(args.repeats)
        for k, v in speed.items():
            print(f"| {k} | {v[0]:.2f} | {v[1]:.2f} |")
        return
    stages = args.stages.split(",")
    sizes = [int(float(s)) for s in args.sizes.split(",")]
    results = {s: {} for s in STAGES}
    chains = []
    speed = None
    partial = set(stages) != set(STAGES) or args.no_chain
    if partial and RESULTS.exists():
        # a rerun of some stages: keep the other figures of the last full run
        old = json.loads(RESULTS.read_text())
        for st, by_n in old["results"].items():
            results.setdefault(st, {}).update({int(k): v for k, v in by_n.items()})
        chains, speed = old["chains"], {k: tuple(v) for k, v in old["speed"].items()}
        sizes = sorted(set(sizes) | {c["cells_requested"] for c in chains})
    with tempfile.TemporaryDirectory(prefix="screener-bench-") as tmp:
        for n in [int(float(x)) for x in args.sizes.split(",")]:
            side = int(round(np.sqrt(n)))
            folder = Path(tmp) / f"g{side}"
            t0 = time.perf_counter()
            make_grid(folder, side)
            print(f"grid {side} x {side}: written in {time.perf_counter() - t0:.1f} s",
                  flush=True)
            for stage in stages:
                cmd = [sys.executable, __file__, "--stage", stage, "--folder", str(folder),
                       "--repeats", str(args.repeats)]
                out = subprocess.run(cmd, capture_output=True, text=True)
                if out.returncode:
                    print(out.stderr[-2000:])
                    raise SystemExit(f"stage {stage} failed")
                res = json.loads(out.stdout.strip().splitlines()[-1])
                res["commit"] = _commit()
                results[stage][n] = res
                print(f"  {stage:18s} ours {res['ours_min']:.3f} s, ref "
                      f"{res['ref_min']:.3f} s, peak {res['peak_mb']:.0f} MB", flush=True)
            if not args.no_chain:
                out = subprocess.run([sys.executable, __file__, "--chain", "--folder",
                                      str(folder)], capture_output=True, text=True)
                if out.returncode:
                    print(out.stderr[-2000:])
                    raise SystemExit("chain failed")
                chain = json.loads(out.stdout.strip().splitlines()[-1])
                chain["cells_requested"] = n
                chains = [c for c in chains if c["cells_requested"] != n] + [chain]
                chains.sort(key=lambda c: c["cells"])
                print(f"  chain: {chain['seconds']:.1f} s, peak "
                      f"{chain['peak_mb']:.0f} MB", flush=True)
            import shutil

            shutil.rmtree(folder)
    if speed is None or not args.no_speedup:
        speed = replicate_speedup(args.repeats)
    RESULTS.write_text(json.dumps({"results": results, "chains": chains,
                                   "speed": speed}, indent=1))
    write_doc(sizes, results, chains, speed, args)


def _commit() -> str:
    out = subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=ROOT,
                         capture_output=True, text=True)
    return out.stdout.strip() or "unknown"


def write_doc(sizes, results, chains, speed, args):
    lines = [
        "# Scaling of the per-cell stages",
        "",
        f"`python tests/benchmarks/bench_scaling.py --sizes 1e6,4e6,1.6e7 --repeats "
        f"{args.repeats}` (stages rerun alone merge into `scaling.json`; the commit of "
        f"each figure is in that file) on {platform.machine()} ({os.cpu_count()} cores), Python "
        f"{platform.python_version()}, {time.strftime('%Y-%m-%d')}. Synthetic projected "
        f"grids x {N_LAYERS} float32 layers, streamed with `memory_mb = {MEMORY_MB:g}` and "
        "`GDAL_CACHEMAX=64`. Times are the best of the repeats (median in brackets); "
        "ratio = ours / reference; exponent = slope of log(time) on log(cells) across sizes "
        "(1 = linear; no stage should exceed about 1.1, n log n).",
        "",
        "| stage | cells | ours (s) | reference (s) | ratio | cells/s (ours) | peak (MB) |",
        "| --- | --- | --- | --- | --- | --- | --- |",
    ]
    exps = {}
    for stage in STAGES:
        xs, ys = [], []
        for n in sizes:
            r = results[stage].get(n)
            if not r:
                continue
            xs.append(np.log(r["cells"]))
            ys.append(np.log(max(r["ours_min"], 1e-6)))
            lines.append(
                f"| {stage} | {r['cells']:,} | {r['ours_min']:.3f} ({r['ours_med']:.3f}) | "
                f"{r['ref_min']:.3f} ({r['ref_med']:.3f}) | "
                f"{r['ours_min'] / max(r['ref_min'], 1e-9):.2f} | "
                f"{r['cells'] / r['ours_min']:,.0f} | {r['peak_mb']:.0f} |"
            )
        if len(xs) >= 2:
            exps[stage] = float(np.polyfit(xs, ys, 1)[0])
    lines += ["", "I/O stages and `predict_streamed` read a streamed stack; the other "
              "prediction stages and novelty run on a stack in memory. `io_write` uses "
              "every core for compression (GDAL NUM_THREADS), the bare reference one. "
              "`cost` is `CostGraph` with its defaults (whole-grid MCP below 8e6 cells, "
              "tiles from 8e6 cells), `cost_tiled` the solver held to `memory_mb` (tile "
              "by tile at every size; exact, see docs/methods), both beside one bare MCP "
              "run. `isolation` runs with `memory_mb` too; its reference is one "
              "`ndimage.label` and one bare MCP run per threshold set.", "", "| stage | scaling exponent |", "| --- | --- |"]
    lines += [f"| {k} | {v:.2f} |" for k, v in exps.items()]
    lines += ["", "Whole per-cell chain (streamed read, layer checks, fit, predict, MESS, "
              "thresholds, write, then the isolation stage at MTP and p10 thresholds), one "
              "subprocess each:", "",
              "| cells | seconds | peak memory (MB) |", "| --- | --- | --- |"]
    lines += [f"| {c['cells']:,} | {c['seconds']:.1f} | {c['peak_mb']:.0f} |" for c in chains]
    lines += ["", "Replicate-bound work on one and two local processes:", "",
              "| workload, executor | best (s) | median (s) |", "| --- | --- | --- |"]
    lines += [f"| {k} | {v[0]:.2f} | {v[1]:.2f} |" for k, v in speed.items()]
    for work in ("equivalency-1000", "null-model ppm-99"):
        s1 = speed[f"{work}, processes-1"][0]
        s2 = speed[f"{work}, processes-2"][0]
        lines.append(f"\n{work}: two processes vs one, {s1 / s2:.2f}x faster.")
    lines.append("")
    out = ROOT / "docs" / "benchmarks" / "scaling.md"
    out.write_text("\n".join(lines))
    print("\n".join(lines))


if __name__ == "__main__":
    main()
