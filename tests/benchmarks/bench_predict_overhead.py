"""What ``predict_map`` adds to each model family's own arithmetic.

The scaling benchmark compares prediction with one weighted sum over the layers (the
memory-bound floor).  Families whose arithmetic is heavier than a weighted sum (a p x p
product and a chi-square tail per cell, one interpolation per layer and cell, feature
expansion) cannot come near that floor; this script shows how much the map path adds
above the family itself: ``predict_map`` on an in-memory stack beside the family's own
``predict`` on a ready matrix of valid cells (the same blocks of 2^20 rows, float32).

Run:  python tests/benchmarks/bench_predict_overhead.py [--cells 4e6] [--repeats 3]
Writes docs/benchmarks/predict_overhead.md.  Not collected by pytest.
"""

from __future__ import annotations

import argparse
import os
import platform
import sys
import tempfile
import time
from pathlib import Path

os.environ.setdefault("GDAL_CACHEMAX", "64")

import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_scaling import N_LAYERS, make_grid  # noqa: E402

ROOT = Path(__file__).resolve().parents[2]
FAMILIES = [
    ("ppm", {"terms": "linear"}),
    ("ppm", {"terms": "linear+quadratic+hinge", "l1_penalty": 0.05}),
    ("ellipsoid", {}),
    ("envelope", {}),
]


def main():
    from screener.layers import read_layers
    from screener.models import make_model
    from screener.models.mapping import predict_map
    from screener.system import avoid_hugepage_stalls

    avoid_hugepage_stalls()
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--cells", default="4e6")
    ap.add_argument("--repeats", type=int, default=3)
    args = ap.parse_args()
    side = int(round(np.sqrt(float(args.cells))))
    rows = []
    with tempfile.TemporaryDirectory(prefix="screener-bench-") as tmp:
        folder = Path(tmp) / f"g{side}"
        make_grid(folder, side)
        stack = read_layers(sorted(folder.glob("layer*.tif")), memory_mb=None)
        grid = stack.grid
        rng = np.random.default_rng(1)
        idx = rng.choice(np.flatnonzero(grid.mask.ravel()), 2000, replace=False)
        B = stack.values_at(*np.unravel_index(idx, grid.shape))
        P = B[:20] + 0.1
        X = np.stack([stack.layer(n)[grid.mask] for n in stack.names], axis=1)
        X = X.astype(np.float32, copy=False)
        block = 1 << 20
        for family, params in FAMILIES:
            model = make_model(family, **params).fit(P, B)
            t_map, t_own = [], []
            for _ in range(args.repeats):  # interleaved
                t0 = time.perf_counter()
                predict_map(model, stack)
                t_map.append(time.perf_counter() - t0)
                t0 = time.perf_counter()
                for a in range(0, len(X), block):
                    model.predict(X[a : a + block], check_input=False, dtype=np.float32)
                t_own.append(time.perf_counter() - t0)
            name = family + (f" ({params['terms']})" if params else "")
            rows.append((name, min(t_map), min(t_own)))
            print(f"{name:18s} predict_map {min(t_map):.3f} s, own predict {min(t_own):.3f} s",
                  flush=True)
    lines = [
        "# What the map path adds to each family's prediction",
        "",
        f"`python tests/benchmarks/bench_predict_overhead.py --cells {args.cells} --repeats "
        f"{args.repeats}` on {platform.machine()} ({os.cpu_count()} cores), Python "
        f"{platform.python_version()}, {time.strftime('%Y-%m-%d')}: {grid.n_cells:,} cells "
        f"x {N_LAYERS} float32 layers in memory, best of the repeats. `predict_map` (blocks, "
        "masks, output raster) beside the family's own `predict` on a ready matrix of the "
        "valid cells in the same blocks.",
        "",
        "| family | predict_map (s) | own predict (s) | ratio |",
        "| --- | --- | --- | --- |",
    ]
    lines += [f"| {n} | {a:.3f} | {b:.3f} | {a / b:.2f} |" for n, a, b in rows]
    lines.append("")
    (ROOT / "docs" / "benchmarks" / "predict_overhead.md").write_text("\n".join(lines))


if __name__ == "__main__":
    main()
