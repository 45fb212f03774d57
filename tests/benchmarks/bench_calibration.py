"""Measured type I error and power of the overlap tests and of the evaluation.

    python tests/benchmarks/bench_calibration.py            # writes docs/calibration.md
    python tests/benchmarks/bench_calibration.py --quick    # 40 pairs each, prints only
    python tests/benchmarks/bench_calibration.py --only separate-clusters \
        --only equivalency-null/clustered                   # rerun some rows only

``--only PREFIX`` (repeatable) reruns the rows whose key starts with PREFIX and
rewrites just those rows of the page; the other rows keep their numbers and the
commit they were measured at.  Keys: ``scenario/records/environment`` for the
environmental tests, ``evaluation/records/environment/clusters`` (or ``/published``)
for the evaluation, ``geographic/scenario/records/environment`` for the
geographic-space tests.

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
import subprocess
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
    GEO_FAMILY,
    binomial_ci,
    evaluation_rates,
    geographic_rates,
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

#: geographic-space scenarios: (scenario, record process, environment shape, pairs)
GEO_PLAN = [
    ("equivalency-null", "dispersed", "skewed", 200),
    ("similarity-null", "dispersed", "skewed", 200),
    ("equivalency-null", "clustered", "symmetric", 200),
    ("similarity-null", "clustered", "symmetric", 200),
    ("separate-clusters", "clustered", "skewed", 200),
    ("divergent", "dispersed", "skewed", 100),
    ("divergent", "clustered", "symmetric", 100),
]
#: replicates of each geographic test: 99 as in environmental space, so that the
#: reading's Holm threshold (alpha / 3 = 0.017) can be reached (1 / 100 = 0.01); each
#: replicate refits the ellipsoid family (a few ms), so the cost is bearable
GEO_REPLICATES = 99

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


#: commit of the rows measured before rows carried their own "measured at" column
FIRST_MEASURED = "eeaf2b1, 2026-12-02"


def _measured_at() -> str:
    """Short commit and UTC date of this run ("+ changes" when code or tests differ
    from the commit)."""
    root = HERE.parent.parent
    try:
        sha = subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=root,
                             capture_output=True, text=True, check=True).stdout.strip()
        dirty = subprocess.run(["git", "status", "--porcelain", "--untracked-files=no",
                                "--", "screener", "tests"],
                               cwd=root, capture_output=True, text=True,
                               check=True).stdout.strip()
    except (OSError, subprocess.CalledProcessError):
        sha, dirty = "unknown commit", ""
    day = time.strftime("%Y-%m-%d", time.gmtime())
    return f"{sha}{' + changes' if dirty else ''}, {day}"


def _key(*parts) -> str:
    return "/".join(str(p) for p in parts)


def _selected(key: str, only) -> bool:
    return not only or any(key.startswith(pattern) for pattern in only)


def _geo_job(args):
    scenario, process, shape, n_pairs, seed = args
    return geographic_rates(_cube(shape), scenario, process, n_pairs, seed,
                            n_replicates=GEO_REPLICATES)


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


_TESTS = ("equivalency", "similarity_ab", "similarity_ba", "claims_different",
          "claims_similar", "claims_any")
_TEST_HEADER = ("equivalency | similarity A->B | similarity B->A | reading: 'not "
                "equivalent' | reading: 'more alike' | reading: any claim")
_HEADERS = {
    "scenario": ("| scenario | records | environment | pairs | " + _TEST_HEADER
                 + " | measured at |", (0, 1, 2)),
    "records": ("| records | environment | taxa | randomisation | jackknife | null "
                "model | measured at |", (0, 1, 3)),
    "geographic scenario": ("| geographic scenario | records | environment | pairs | "
                            + _TEST_HEADER + " | measured at |", (0, 1, 2)),
}


def _table(kind, new_rows, old_text, order=()):
    """One markdown table: rerun rows replace the page's rows of the same key, the
    other rows of the page stay (measured at their commit); rows in the plan's
    ``order`` of keys, others after them."""
    header, key_at = _HEADERS[kind]
    n_cols = header.count("|") - 1
    old = {}
    in_table = False
    for line in old_text.splitlines():
        cells = [c.strip() for c in line.strip().strip("|").split("|")]
        if line.startswith("|") and cells[0] == kind:
            in_table = True
            continue
        if not line.startswith("|"):
            in_table = False
            continue
        if in_table and cells[0] != "---":
            if len(cells) < n_cols:
                cells.append(FIRST_MEASURED)
            old[tuple(cells[k] for k in key_at)] = cells
    for cells in new_rows:
        old[tuple(cells[k] for k in key_at)] = cells
    rank = {tuple(k): i for i, k in enumerate(order)}
    rows = sorted(old.items(), key=lambda kv: rank.get(kv[0], len(rank)))
    lines = [header, "|" + " --- |" * n_cols]
    lines += ["| " + " | ".join(cells) + " |" for _, cells in rows]
    return "\n".join(lines) if len(lines) > 2 else ""


def main(quick: bool = False, only=()):
    t0 = time.perf_counter()
    when = _measured_at()
    plan = [r for r in PLAN if _selected(_key(*r[:3]), only)]
    eval_plan = [r for r in EVAL_PLAN if _selected(
        _key("evaluation", r[0], r[1], "clusters" if r[3] else "published"), only)]
    geo_plan = [r for r in GEO_PLAN if _selected(_key("geographic", *r[:3]), only)]
    # seeds follow the row's place in the full plan, so a filtered run repeats it
    jobs, index = [], []
    for row in plan:
        i = PLAN.index(row)
        n_pairs = 40 if quick else row[3]
        for j in range(0, n_pairs, 20):
            jobs.append((*row[:3], min(20, n_pairs - j), 1000 * i + j))
            index.append(i)
    eval_jobs, eval_index = [], []
    for row in eval_plan:
        i = EVAL_PLAN.index(row)
        process, shape, n_taxa, structured = row
        n_taxa = 40 if quick else n_taxa
        for j in range(0, n_taxa, 50):
            eval_jobs.append((process, shape, min(50, n_taxa - j), structured,
                              5000 + 1000 * i + j))
            eval_index.append(i)
    geo_jobs, geo_index = [], []
    for row in geo_plan:
        i = GEO_PLAN.index(row)
        n_pairs = 40 if quick else row[3]
        for j in range(0, n_pairs, 20):
            geo_jobs.append((*row[:3], min(20, n_pairs - j), 20000 + 1000 * i + j))
            geo_index.append(i)
    with ProcessPoolExecutor(max_workers=2) as ex:
        eval_results = list(ex.map(_eval_job, eval_jobs))
        results = list(ex.map(_job, jobs))
        geo_results = list(ex.map(_geo_job, geo_jobs))
    seconds = time.perf_counter() - t0

    def merged(rows, full, results, index):
        return [(row, _merge([r for r, k in zip(results, index)
                              if k == full.index(row)])) for row in rows]

    env_rows = []
    for (scenario, process, shape, _, _), rates in merged(plan, PLAN, results, index):
        env_rows.append([scenario, process, shape, str(rates["equivalency"][1]),
                         *(_fmt(*rates[k]) for k in _TESTS), when])
    eval_rows = []
    for (process, shape, _, structured), rates in merged(
            eval_plan, EVAL_PLAN, eval_results, eval_index):
        how = (f"clusters kept ({CLUSTER_CELLS} cells)" if structured
               else "published (records independent)")
        eval_rows.append([process, shape, str(rates["jackknife"][1]), how,
                          _fmt(*rates["jackknife"]), _fmt(*rates["null_model"]), when])
    geo_rows = []
    for (scenario, process, shape, _), rates in merged(
            geo_plan, GEO_PLAN, geo_results, geo_index):
        geo_rows.append([scenario, process, shape, str(rates["equivalency"][1]),
                         *(_fmt(*rates[k]) for k in _TESTS), when])
    doc = HERE.parent.parent / "docs" / "calibration.md"
    text = doc.read_text() if doc.exists() else ""
    start, end = "<!-- calibration-table:start -->", "<!-- calibration-table:end -->"
    old = text.split(start)[1].split(end)[0] if start in text else ""
    parts = [
        _table("scenario", env_rows, old, [r[:3] for r in PLAN]),
        f"Evaluation ({EVAL_FAMILY} family, 12 records without niche signal, study "
        "area = 1000 background cells of a 70 x 70 window, null model R = 19):",
        _table("records", eval_rows, old, [
            (r[0], r[1], f"clusters kept ({CLUSTER_CELLS} cells)" if r[3]
             else "published (records independent)") for r in EVAL_PLAN]),
        f"Geographic space ({GEO_FAMILY} family refitted per replicate on the cells "
        f"of the pair's windows, R = {GEO_REPLICATES} replicates per test, same "
        "scenarios and reading as above, the reading over the three geographic "
        "p-values):",
        _table("geographic scenario", geo_rows, old, [r[:3] for r in GEO_PLAN]),
        f"Settings: alpha = {ALPHA}; environmental space R = {N_REPLICATES} "
        f"replicates per test, {GRID_CELLS} grid cells per axis; spatial clusters of "
        f"records chained within {CLUSTER_CELLS} cells.  The last run took "
        f"{seconds:.0f} s on 2 worker processes ({os.cpu_count()} cores shared) "
        f"for {len(env_rows) + len(eval_rows) + len(geo_rows)} rows.",
    ]
    table = "\n\n".join(p for p in parts if p)
    print(table)
    if quick:
        return
    if start in text:
        head = text.split(start)[0]
        tail = text.split(end)[1]
        doc.write_text(f"{head}{start}\n{table}\n{end}{tail}")
        print(f"wrote {doc}")


def _options(argv):
    only = [argv[k + 1] for k, a in enumerate(argv) if a == "--only" and k + 1 < len(argv)]
    return {"quick": "--quick" in argv, "only": only}


if __name__ == "__main__":
    main(**_options(sys.argv[1:]))
