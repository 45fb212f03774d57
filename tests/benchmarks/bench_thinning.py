"""Benchmark: thinning records to a minimum geodesic distance.

Run ``python tests/benchmarks/bench_thinning.py [--sizes 1000 10000 100000]
[--repeats N]``.  Not collected by pytest.  Prints a Markdown table (min and median
seconds) to paste into docs/benchmarks/thinning.md.  Invented records: uniform points
over a 10 x 10 degree box near the equator (the densest case for a given count),
thinned at 5 km with the default 20 greedy passes per group of close records.
Target: 100,000 records in under 10 s.
"""

import argparse

import numpy as np

from screener.records import close_pairs, thin_by_distance
from _timing import timed  # noqa: E402 (tests/benchmarks/_timing.py)


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--sizes", type=int, nargs="+", default=[1000, 10000, 100000])
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--km", type=float, default=5.0)
    args = ap.parse_args()
    print("| records | close pairs | pairs min/med (s) | thinning min/med (s) | kept |")
    print("|---|---|---|---|---|")
    for n in args.sizes:
        rng = np.random.default_rng(0)
        lon = rng.uniform(30, 40, n)
        lat = rng.uniform(-5, 5, n)
        p_min, p_med, (i, _) = timed(lambda: close_pairs(lon, lat, args.km), args.repeats)
        t_min, t_med, kept = timed(lambda: thin_by_distance(lon, lat, args.km),
                                   args.repeats)
        print(f"| {n:,} | {i.size:,} | {p_min:.2f} / {p_med:.2f} | "
              f"{t_min:.2f} / {t_med:.2f} | {kept.size:,} |")


if __name__ == "__main__":
    main()
