"""Time the demo pipeline stage by stage; cells/s for prediction and cost distance.

Run:  python tests/benchmarks/bench_pipeline.py [--size full|small] [--repeats 3]
Writes docs/benchmarks/pipeline.md.  Not collected by pytest.
"""

from __future__ import annotations

import argparse
import platform
import statistics
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]


def main():
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--size", default="full", choices=["full", "small"])
    ap.add_argument("--repeats", type=int, default=3)
    args = ap.parse_args()

    from screener.costdistance import CostGraph
    from screener.demo import write_demo_scenario
    from screener.isolation import clade_suitability, resistance_from_suitability
    from screener.models import make_model
    from screener.models.mapping import predict_map
    from screener.pipeline import load_inputs, run_project
    from screener.project import load_project

    stage_times: dict = {}
    totals = []
    with tempfile.TemporaryDirectory() as tmp:
        project = write_demo_scenario(Path(tmp) / "scen", size=args.size)
        settings = load_project(project)
        for i in range(args.repeats):
            t0 = time.perf_counter()
            res = run_project(settings, Path(tmp) / f"out{i}", cache_dir=None)
            totals.append(time.perf_counter() - t0)
            for k, v in res.provenance["timings_s"].items():
                stage_times.setdefault(k, []).append(v)
        intake = load_inputs(settings)
        stack = intake.predictor_stack()
        rec = next(iter(intake.records.taxa.values()))
        P = stack.values_at(rec.rows, rec.cols)
        bg_idx = np.flatnonzero(intake.grid.mask.ravel())[::7]
        r, c = np.unravel_index(bg_idx, intake.grid.shape)
        B = stack.values_at(r, c)
        model = make_model("ellipsoid").fit(P, B)
        pred = []
        for _ in range(args.repeats):
            t0 = time.perf_counter()
            m = predict_map(model, stack)
            pred.append(time.perf_counter() - t0)
        n_valid = intake.grid.n_valid
        suit = clade_suitability({"a": m})
        res_map = resistance_from_suitability(suit)
        cd = []
        for _ in range(args.repeats):
            t0 = time.perf_counter()
            g = CostGraph(intake.grid, res_map)
            g.run(np.column_stack([rec.rows, rec.cols]))
            cd.append(time.perf_counter() - t0)

    cells = intake.grid.n_cells
    lines = [
        "# Demo pipeline timings",
        "",
        f"`python tests/benchmarks/bench_pipeline.py --size {args.size} --repeats "
        f"{args.repeats}` on {platform.machine()}, Python {platform.python_version()}, "
        f"{time.strftime('%Y-%m-%d')}. Grid {intake.grid.n_rows} x {intake.grid.n_cols} "
        f"({cells:,} cells, {n_valid:,} valid), {len(intake.records.taxa)} taxa, default "
        "settings, serial scheduler, no cache.",
        "",
        "| stage | min (s) | median (s) |",
        "| --- | --- | --- |",
    ]
    for k, v in stage_times.items():
        lines.append(f"| {k} | {min(v):.2f} | {statistics.median(v):.2f} |")
    lines.append(f"| **whole run** | {min(totals):.2f} | {statistics.median(totals):.2f} |")
    lines += [
        "",
        "| kernel | min (s) | cells/s (valid cells, best) |",
        "| --- | --- | --- |",
        f"| ellipsoid prediction over the grid | {min(pred):.3f} | {n_valid / min(pred):,.0f} |",
        f"| cost distance (graph + one source set, lat/lon Dijkstra) | {min(cd):.3f} | "
        f"{cells / min(cd):,.0f} |",
        "",
    ]
    out = ROOT / "docs" / "benchmarks" / "pipeline.md"
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text("\n".join(lines))
    print("\n".join(lines))


if __name__ == "__main__":
    main()
