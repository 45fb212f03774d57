"""Benchmark: cost distance + path extraction vs bare MCP_Geometric.find_costs.

Run ``python tests/benchmarks/bench_isolation.py [--skip-largest] [--repeats N]``.
Not collected by pytest.  Prints a Markdown table (min and median seconds) to paste
into docs/benchmarks/isolation.md.  Invented smooth random resistance.
"""

import argparse
import time

import numpy as np
from affine import Affine
from scipy import ndimage as ndi
from skimage.graph import MCP_Geometric

from screener.costdistance import CostGraph, least_cost_path
from screener.grid import Grid
from _timing import timed  # noqa: E402 (tests/benchmarks/_timing.py)


def surface(n, seed=0):
    rng = np.random.default_rng(seed)
    r = ndi.gaussian_filter(rng.random((n, n)), 8)
    return (r - r.min()) / (r.max() - r.min()) + 0.01


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--skip-largest", action="store_true")
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--dijkstra-max", type=int, default=4_000_000)
    a = ap.parse_args()
    sides = [1000, 2000] if a.skip_largest else [1000, 2000, 4000]
    print(
        "| cells | backend | bare find_costs min/med (s) | ours cost+path min/med (s) "
        "| ratio (min) | graph build (s) |"
    )
    print("|---|---|---|---|---|---|")
    for n in sides:
        r = surface(n)
        src = [(n // 2, n // 2), (10, 10)]
        end = (n - 5, n - 5)
        proj = Grid("EPSG:32633", Affine(1000, 0, 500000, 0, -1000, 5000000), (n, n))
        bare = timed(
            lambda: MCP_Geometric(
                r, fully_connected=True, sampling=(1.0, 1.0)
            ).find_costs(src),
            a.repeats,
        )

        def ours(grid):
            g = CostGraph(grid, r)
            s = g.run(src)
            least_cost_path(s, end)

        t = timed(lambda: ours(proj), a.repeats)
        t0 = time.perf_counter()
        CostGraph(proj, r)
        build = time.perf_counter() - t0
        print(
            f"| {n * n:.1e} | mcp (projected) | {bare[0]:.2f} / {bare[1]:.2f} | "
            f"{t[0]:.2f} / {t[1]:.2f} | {t[0] / bare[0]:.2f} | {build:.2f} |",
            flush=True,
        )
        if n * n <= a.dijkstra_max:
            geo = Grid("EPSG:4326", Affine(0.001, 0, 10, 0, -0.001, 60), (n, n))
            t = timed(lambda: ours(geo), max(1, a.repeats - 1))
            t0 = time.perf_counter()
            CostGraph(geo, r)
            build = time.perf_counter() - t0
            print(
                f"| {n * n:.1e} | dijkstra (lat/lon) | {bare[0]:.2f} / {bare[1]:.2f} | "
                f"{t[0]:.2f} / {t[1]:.2f} | {t[0] / bare[0]:.2f} | {build:.2f} |",
                flush=True,
            )


if __name__ == "__main__":
    main()
