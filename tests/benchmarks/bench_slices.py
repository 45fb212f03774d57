"""Benchmark: what one extra time slice costs, beside the present-day run.

Run ``python tests/benchmarks/bench_slices.py [--sides 1000 2000] [--repeats N]``.
Not collected by pytest.  Prints a Markdown table to paste into
docs/benchmarks/slices.md.

Per grid size, on invented smooth layers (three predictors, two taxa, the ellipsoid and
envelope families) it times:

- the present's prediction pass: every family of every taxon mapped over the grid, the
  consensus and the MESS map (what the model stage maps per taxon);
- the present's isolation pass: ``find_candidates`` at the MTP and relaxed thresholds
  (as a run does);
- ``analyse_slices`` with one and with two slices; the cost of one slice is the
  difference, and the one-slice run is split into projection and isolation.

Target: one slice costs at most one prediction pass plus one isolation pass.
"""

import argparse

import numpy as np
from affine import Affine
from scipy import ndimage as ndi

from screener.grid import Grid
from screener.isolation import Clade, find_candidates
from screener.layers import LayerStack
from screener.models import make_model
from screener.models.ensemble import weighted_mean_map
from screener.models.mapping import predict_map
from screener.novelty import mess_map
from screener.results import TaxonRecords, TaxonResult
from screener.slices import TimeSlice, analyse_slices, map_models
from screener.system import avoid_hugepage_stalls
from _timing import timed  # noqa: E402 (tests/benchmarks/_timing.py)

FAMILIES = ("ellipsoid", "envelope")


def field(rng, n, sigma):
    f = ndi.gaussian_filter(rng.standard_normal((n, n)), sigma)
    return (f - f.mean()) / f.std()


def scenario(n, seed=0):
    rng = np.random.default_rng(seed)
    grid = Grid("EPSG:32633", Affine(500, 0, 500000, 0, -500, 5000000), (n, n))
    relief = field(rng, n, n / 25)
    layers = {"temperature": 20 - 6 * relief, "moisture": 1500 + 500 * field(rng, n, n / 40),
              "cloud": 50 + 20 * relief + 5 * field(rng, n, n / 80)}
    data = np.stack([v.astype(np.float32) for v in layers.values()])
    present = LayerStack(grid, list(layers), data)
    cold = data.copy()
    cold[0] -= 3.0
    past = LayerStack(grid, list(layers), cold)
    taxa = {}
    for i, t_opt in enumerate((10.0, 12.0)):
        score = -np.abs(layers["temperature"] - t_opt)
        cells = np.flatnonzero(score.ravel() > -0.3)
        pick = rng.choice(cells, 15, replace=False)
        rows, cols = np.unravel_index(pick, grid.shape)
        bg = rng.choice(n * n, 5000, replace=False)
        P = present.values_at(rows, cols)
        B = present.values_at(*np.unravel_index(bg, grid.shape))
        models = {f: make_model(f).fit(P, B) for f in FAMILIES}
        x, y = grid.xy(rows, cols)
        lon, lat = grid.lonlat(rows, cols)
        rec = TaxonRecords(f"taxon {i}", lon, lat, x, y, rows, cols, np.arange(15) + 2)
        taxa[rec.taxon] = (TaxonResult(rec.taxon, rec, None, presence_env=P, background_env=B,
                                       ensemble_weights={f: 1.0 for f in FAMILIES}), models)
    return grid, present, past, taxa


def prediction_pass(present, taxa):
    maps = {}
    for name, (t, models) in taxa.items():
        fam = {f: predict_map(m, present) for f, m in models.items()}
        maps[name] = weighted_mean_map(fam, t.ensemble_weights).astype(np.float32)
        mess_map(present, t.background_env)
    return maps


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--sides", type=int, nargs="+", default=[1000, 2000])
    ap.add_argument("--repeats", type=int, default=3)
    a = ap.parse_args()
    avoid_hugepage_stalls()
    print("| cells | present prediction (s) | present isolation (s) | one slice (s) "
          "| of which mapping the models (s) | the rest: consensus, MESS, isolation, history (s) "
          "| 2nd slice adds (s) | one slice / (prediction + isolation) |")
    print("|---|---|---|---|---|---|---|---|")
    for n in a.sides:
        grid, present, past, taxa = scenario(n)
        pred = timed(lambda: prediction_pass(present, taxa), a.repeats)
        for name, m in pred[2].items():
            taxa[name][0].suitability = m
        mtp = {name: float(np.nanmin(m[t.records.rows, t.records.cols]))
               for (name, m), (t, _) in zip(pred[2].items(), taxa.values())}
        relaxed = {k: 0.9 * v for k, v in mtp.items()}
        records = {name: (t.records.rows, t.records.cols) for name, (t, _) in taxa.items()}
        iso = timed(lambda: find_candidates(Clade(grid, pred[2], records), mtp, relaxed),
                    a.repeats)
        cand = iso[2]
        results = {name: t for name, (t, _) in taxa.items()}

        def run(names):
            # the model stage maps each fitted model on each slice; then the slice stage
            for name, (t, models) in taxa.items():
                t.slice_maps = {n: map_models(models, past) for n in names}
            return analyse_slices(grid, [TimeSlice(n, past) for n in names], results, cand,
                                  mtp)

        proj = timed(lambda: [map_models(m, past) for _, m in taxa.values()], a.repeats)
        one = timed(lambda: run(["cold"]), a.repeats)
        two = timed(lambda: run(["cold", "colder"]), a.repeats)
        ratio = one[0] / (pred[0] + iso[0])
        print(f"| {n * n:.0e} | {pred[0]:.2f} | {iso[0]:.2f} | {one[0]:.2f} | {proj[0]:.2f} "
              f"| {one[0] - proj[0]:.2f} | {two[0] - one[0]:.2f} | {ratio:.2f} |", flush=True)


if __name__ == "__main__":
    main()
