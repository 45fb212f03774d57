"""Measured type I error and power of the overlap tests and of the evaluation.

    python tests/benchmarks/bench_calibration.py            # writes docs/calibration.md
    python tests/benchmarks/bench_calibration.py --quick    # 40 pairs each, prints only

Scenarios on real terrain (matplotlib's sample elevation grid, see
``tests/_calibration.py``): null pairs with dispersed and clustered records in skewed
and symmetric environments, divergent / similar pairs for power, and single taxa
without niche signal for the jackknife and the null model of the evaluation.  The
tests keep the records' spatial clusters as a run does (``[occurrences]
cluster_cells``).  Each rate comes with its Clopper-Pearson 95 % interval
(``scipy.stats.binomtest``).  Runs on two worker processes; seeds are fixed, so the
numbers are reproducible.
"""

from __future__ import annotations

import os
import sys
import time
from concurrent.futures import ProcessPoolExecutor

# one BLAS thread per worker: two workers share two cores
for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))
sys.path.insert(0, str(HERE.parent.parent))

from _calibration import (  # noqa: E402
    ALPHA,
    CLUSTER_CELLS,
    EVAL_FAMILY,
    binomial_ci,
    evaluation_rates,
    rejection_rates,
    terrain,
)

N_REPLICATES = 99
GRID_CELLS = 24

#: (scenario, record process, environment shape, pairs, what it measures)
PLAN = [
    ("equivalency-null", "dispersed", "skewed", 200, "null"),
    ("equivalency-null", "clustered", "symmetric", 200, "null"),
    ("similarity-null", "dispersed", "skewed", 200, "null"),
    ("similarity-null", "clustered", "symmetric", 200, "null"),
    ("separate-clusters", "clustered", "skewed", 200, "null"),
    ("divergent", "dispersed", "skewed", 100, "power"),
    ("divergent", "clustered", "symmetric", 100, "power"),
    ("similar", "dispersed", "skewed", 100, "power"),
]
#: evaluation scenarios: (record process, environment shape, taxa, cluster-keeping)
EVAL_PLAN = [
    ("dispersed", "skewed", 200, True),
    ("clustered", "skewed", 200, True),
    ("clustered", "skewed", 100, False),
]

_CUBES = {}


def _cube(shape):
    if shape not in _CUBES:
        _CUBES[shape] = terrain("jacksboro", shape)
    return _CUBES[shape]


def _job(args):
    scenario, process, shape, n_pairs, seed = args
    return rejection_rates(_cube(shape), scenario, process, n_pairs, seed,
                           n_replicates=N_REPLICATES, grid_cells=GRID_CELLS)


def _eval_job(args):
    process, shape, n_taxa, structured, seed = args
    return evaluation_rates(_cube(shape), process, n_taxa, seed, n_null=19,
                            structured=structured)


def _merge(parts):
    out = {}
    for part in parts:
        for key, (k, n) in part.items():
            a, b = out.get(key, (0, 0))
            out[key] = (a + k, b + n)
    return out


def _fmt(k, n):
    low, high = binomial_ci(k, n)
    return f"{k / n:.3f} [{low:.3f}, {high:.3f}]"


def main(quick: bool = False):
    t0 = time.perf_counter()
    jobs, index = [], []
    for i, (scenario, process, shape, n_pairs, _) in enumerate(PLAN):
        n_pairs = 40 if quick else n_pairs
        chunk = 20
        for j in range(0, n_pairs, chunk):
            jobs.append((scenario, process, shape, min(chunk, n_pairs - j),
                         1000 * i + j))
            index.append(i)
    eval_jobs, eval_index = [], []
    for i, (process, shape, n_taxa, structured) in enumerate(EVAL_PLAN):
        n_taxa = 40 if quick else n_taxa
        for j in range(0, n_taxa, 50):
            eval_jobs.append((process, shape, min(50, n_taxa - j), structured,
                              5000 + 1000 * i + j))
            eval_index.append(i)
    with ProcessPoolExecutor(max_workers=2) as ex:
        eval_results = list(ex.map(_eval_job, eval_jobs))
        results = list(ex.map(_job, jobs))
    merged = [_merge([r for r, k in zip(results, index) if k == i])
              for i in range(len(PLAN))]
    eval_merged = [_merge([r for r, k in zip(eval_results, eval_index) if k == i])
                   for i in range(len(EVAL_PLAN))]
    seconds = time.perf_counter() - t0
    keys = ("equivalency", "similarity_ab", "similarity_ba", "claims_different",
            "claims_similar", "claims_any")
    lines = [
        "| scenario | records | environment | pairs | equivalency | similarity A->B "
        "| similarity B->A | reading: 'not equivalent' | reading: 'more alike' "
        "| reading: any claim |",
        "| --- | --- | --- | --- | --- | --- | --- | --- | --- | --- |",
    ]
    for (scenario, process, shape, _, _), rates in zip(PLAN, merged):
        n = rates["equivalency"][1]
        cells = " | ".join(_fmt(*rates[k]) for k in keys)
        lines.append(f"| {scenario} | {process} | {shape} | {n} | {cells} |")
    lines += [
        "",
        f"Evaluation ({EVAL_FAMILY} family, 12 records without niche signal, study "
        "area = 1000 background cells of a 70 x 70 window, null model R = 19):",
        "",
        "| records | environment | taxa | randomisation | jackknife | null model |",
        "| --- | --- | --- | --- | --- | --- |",
    ]
    for (process, shape, _, structured), rates in zip(EVAL_PLAN, eval_merged):
        n = rates["jackknife"][1]
        how = (f"clusters kept ({CLUSTER_CELLS} cells)" if structured
               else "published (records independent)")
        lines.append(f"| {process} | {shape} | {n} | {how} | "
                     f"{_fmt(*rates['jackknife'])} | {_fmt(*rates['null_model'])} |")
    table = "\n".join(lines)
    print(table)
    print(f"{seconds:.0f} s on 2 worker processes")
    if quick:
        return
    doc = HERE.parent.parent / "docs" / "calibration.md"
    text = doc.read_text() if doc.exists() else ""
    start, end = "<!-- calibration-table:start -->", "<!-- calibration-table:end -->"
    if start in text:
        head = text.split(start)[0]
        tail = text.split(end)[1]
        doc.write_text(
            f"{head}{start}\n{table}\n\nMeasured in {seconds:.0f} s on 2 worker "
            f"processes ({os.cpu_count()} cores shared), alpha = {ALPHA}, "
            f"R = {N_REPLICATES} replicates per test, {GRID_CELLS} grid cells per "
            f"axis, spatial clusters of records chained within {CLUSTER_CELLS} cells."
            f"\n{end}{tail}")
        print(f"wrote {doc}")


if __name__ == "__main__":
    main(quick="--quick" in sys.argv)
