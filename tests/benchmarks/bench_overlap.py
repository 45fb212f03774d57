"""Benchmark of the niche-overlap tests (not collected by pytest).

Run from the repository root::

    python tests/benchmarks/bench_overlap.py         # writes docs/benchmarks/overlap.md
    python tests/benchmarks/bench_overlap.py --quick    # fewer repeats, prints only

Measures, on invented data (2 x 50 records, 2 x 2,000 background cells, 4 predictors,
G = 100 grid cells per axis):

1. an environmental-space equivalency test with 1,000 replicates, serial;
2. 1,000 bare kernel-density evaluations (``scipy.stats.gaussian_kde`` of 50 points on
   the same 100 x 100 grid) and the ratio of (1) to (2) (goal: at most 2x);
3. the same test on a warm pool of one process and of two processes (goal: two at
   least 1.7x faster);
4. pool start-up time per start method;
5. a larger calibration run (null and power) of the equivalency test.

Times are min and median over repeats (VM timings are noisy).  The page records the
1-minute load average before and after the run: other jobs on the same cores inflate
the medians and hide the process speed-up.  The page's text from ``## Reading`` on is
hand-written and kept when the figures are rewritten; check it against new figures.
"""

from __future__ import annotations

import argparse
import math
import multiprocessing
import os
import platform
import sys
import time

import numpy as np
from scipy.stats import gaussian_kde

sys.path.insert(0, os.path.abspath(os.path.join(os.path.dirname(__file__), "..", "..")))

from screener import overlap as ov  # noqa: E402
from screener.parallel import make_executor  # noqa: E402
from _timing import timed  # noqa: E402 (tests/benchmarks/_timing.py)


def _data(rng, shift=0.0, n=50, n_bg=2000, n_vars=4, spread=0.5):
    bg_a = rng.normal(size=(n_bg, n_vars))
    bg_b = rng.normal(size=(n_bg, n_vars)) + 0.2
    ra = rng.normal(0.0, spread, size=(n, n_vars))
    rb = rng.normal(0.0, spread, size=(n, n_vars))
    rb[:, 0] += shift
    return ra, rb, bg_a, bg_b


def _space(ra, rb, bg_a, bg_b, grid_cells):
    return ov.environmental_space(
        ov.OverlapTaxon("A", env_records=ra, env_background=bg_a),
        ov.OverlapTaxon("B", env_records=rb, env_background=bg_b),
        space_parameters=ov.EnvironmentalSpaceParameters(grid_cells=grid_cells),
    )


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true")
    args = parser.parse_args(argv)
    repeats = 2 if args.quick else 5
    load_before = os.getloadavg()[0]
    rng = np.random.default_rng(0)
    space = _space(*_data(rng, shift=0.5), grid_cells=100)
    nodes = space.nodes
    lines = []

    def report(text):
        print(text)
        lines.append(text)

    # 1. equivalency, serial
    eq = timed(lambda: ov.equivalency_test(space, n_replicates=1000), repeats)
    # 2. bare densities
    rec = space.a.scores_records

    def bare():
        for _ in range(1000):
            gaussian_kde(rec.T)(nodes.T)

    kde = timed(bare, max(1, repeats // 2))
    report("| measurement | min (s) | median (s) |")
    report("| --- | --- | --- |")
    report(
        f"| E-space equivalency, 1000 replicates, 2 x 50 records, G = 100, serial "
        f"| {eq[0]:.2f} | {eq[1]:.2f} |"
    )
    report(
        f"| 1000 bare gaussian_kde evaluations (50 points, 100 x 100 grid) "
        f"| {kde[0]:.2f} | {kde[1]:.2f} |"
    )
    report(
        f"| ratio equivalency / bare densities (goal <= 2) "
        f"| {eq[0] / kde[0]:.2f} | {eq[1] / kde[1]:.2f} |"
    )
    sim = timed(lambda: ov.similarity_test(space, n_replicates=1000), repeats)
    report(
        f"| E-space similarity, 1000 replicates, serial | {sim[0]:.2f} | {sim[1]:.2f} |"
    )

    # 3. one vs two processes, warm pools
    n_rep = 4000
    res = {}
    for n_workers in (1, 2):
        with make_executor("processes", n_workers=n_workers) as ex:
            ex.map(abs, range(8))  # start the workers
            ov.equivalency_test(space, n_replicates=8, executor=ex)  # warm caches
            res[n_workers] = timed(
                lambda ex=ex: ov.equivalency_test(
                    space, n_replicates=n_rep, executor=ex
                ),
                repeats,
            )
    w1, w2 = res[1], res[2]
    report(
        f"| equivalency, {n_rep} replicates, 1 process, warm pool "
        f"| {w1[0]:.2f} | {w1[1]:.2f} |"
    )
    report(
        f"| equivalency, {n_rep} replicates, 2 processes, warm pool "
        f"| {w2[0]:.2f} | {w2[1]:.2f} |"
    )
    report(
        f"| speed-up 2 vs 1 process, warm pool (goal >= 1.7) "
        f"| {w1[0] / w2[0]:.2f} | {w1[1] / w2[1]:.2f} |"
    )

    # 4. pool start-up
    for method in ("fork", "forkserver", "spawn"):
        if method not in multiprocessing.get_all_start_methods():
            continue

        def start(method=method):
            with make_executor("processes", n_workers=2, start_method=method) as ex:
                ex.map(math.sqrt, range(4))

        st = timed(start, max(1, repeats // 2))
        report(
            f"| process pool start + first map, 2 workers, {method} "
            f"| {st[0]:.2f} | {st[1]:.2f} |"
        )
    t0 = time.perf_counter()
    with make_executor("dask", n_workers=2) as ex:
        ex.map(math.sqrt, range(4))
    report(
        f"| Dask LocalCluster start + first map + close, 2 workers "
        f"| {time.perf_counter() - t0:.2f} | - |"
    )

    # 5. calibration, larger than the test suite's
    n_pairs = 200 if args.quick else 1000
    cal_rng = np.random.default_rng(99)
    rates = {}
    for label, shift, pairs in (
        ("null", 0.0, n_pairs),
        ("shift 2.0", 2.0, n_pairs // 4),
    ):
        rejected = 0
        for _ in range(pairs):
            sp = _space(
                *_data(cal_rng, shift=shift, n=12, n_bg=300, n_vars=3, spread=0.6),
                grid_cells=40,
            )
            p = ov.equivalency_test(
                sp, n_replicates=99, random_state=int(cal_rng.integers(2**31))
            )["D"].p_value
            rejected += p <= 0.05
        rates[label] = (rejected / pairs, pairs)
    report("")
    report(
        "| calibration (R = 99, 2 x 12 records, alpha = 0.05) | pairs "
        "| rejection rate |"
    )
    report("| --- | --- | --- |")
    for label, (rate, pairs) in rates.items():
        report(f"| {label} | {pairs} | {rate:.3f} |")

    if not args.quick:
        path = os.path.join(
            os.path.dirname(__file__), "..", "..", "docs", "benchmarks", "overlap.md"
        )
        os.makedirs(os.path.dirname(path), exist_ok=True)
        load_after = os.getloadavg()[0]
        head = [
            "# Benchmark: niche-overlap tests",
            "",
            "Written by `python tests/benchmarks/bench_overlap.py` (invented data; "
            "see the",
            "script's docstring).  Machine: "
            f"{platform.machine()}, {os.cpu_count()} cores, Python "
            f"{platform.python_version()}, numpy {np.__version__}.  Times in seconds, "
            f"min and median of {repeats} repeats ({max(1, repeats // 2)} for the "
            "bare-density loop and the start-up rows).  1-minute load average "
            f"{load_before:.1f} before and {load_after:.1f} after the run on "
            f"{os.cpu_count()} cores; a load above the core count means other jobs "
            "shared the cores, which inflates the medians and hides the process "
            "speed-up.",
            "",
        ]
        kept = []
        if os.path.exists(path):
            old = open(path, encoding="utf-8").read().split("\n")
            starts = [i for i, line in enumerate(old) if line.startswith("## Reading")]
            kept = [""] + old[starts[0]:] if starts else []
        with open(path, "w", encoding="utf-8") as fh:
            fh.write("\n".join(head + lines + kept).rstrip("\n") + "\n")
        print(f"wrote {os.path.normpath(path)}")


if __name__ == "__main__":
    main()
