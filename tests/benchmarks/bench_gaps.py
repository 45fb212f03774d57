"""Benchmark: the separating gap of every patch vs one bare MCP_Geometric.find_costs.

Run ``python tests/benchmarks/bench_gaps.py [--sides 1000 2000] [--repeats N]``.
Not collected by pytest.  Prints a Markdown table (min and median seconds) to paste
into docs/benchmarks/gaps.md.  Invented smooth random suitability; the cells at or
above the 80th percentile are suitable (thousands of patches), the largest patch is
the known range.  "Bare" is one ``find_costs`` from two source cells over ``1 - s``
on the same projected grid (the pass the least-cost stage makes per taxon); "ours" is
:func:`screener.gaps.separating_gaps` from patch labels to the gap of every patch.
"""

import argparse

import numpy as np
from affine import Affine
from scipy import ndimage as ndi
from skimage.graph import MCP_Geometric

from screener.gaps import separating_gaps
from screener.grid import Grid
from _timing import timed  # noqa: E402 (tests/benchmarks/_timing.py)


def scene(n, seed=0):
    rng = np.random.default_rng(seed)
    s = ndi.gaussian_filter(rng.random((n, n)), 6)
    s = (s - s.min()) / (s.max() - s.min())
    suitable = s >= np.quantile(s, 0.8)
    labels, k = ndi.label(suitable, np.ones((3, 3), bool))
    sizes = np.bincount(labels.ravel())
    sizes[0] = 0
    return s, labels, k, [int(np.argmax(sizes))]


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--sides", type=int, nargs="+", default=[1000, 2000])
    ap.add_argument("--repeats", type=int, default=3)
    a = ap.parse_args()
    print("| cells | patches | bare find_costs min/med (s) | separating gap min/med (s) "
          "| ratio (min) |")
    print("|---|---|---|---|---|")
    for n in a.sides:
        s, labels, k, ranges = scene(n)
        grid = Grid("EPSG:32633", Affine(1000, 0, 500000, 0, -1000, 5000000), (n, n))
        r = 1.0 - s
        src = [(n // 2, n // 2), (10, 10)]
        bare = timed(
            lambda: MCP_Geometric(r, fully_connected=True, sampling=(1.0, 1.0)).find_costs(src),
            a.repeats,
        )
        ours = timed(lambda: separating_gaps(grid, labels, k, ranges), a.repeats)
        print(f"| {n * n:.1e} | {k} | {bare[0]:.2f} / {bare[1]:.2f} | "
              f"{ours[0]:.2f} / {ours[1]:.2f} | {ours[0] / bare[0]:.2f} |", flush=True)


if __name__ == "__main__":
    main()
