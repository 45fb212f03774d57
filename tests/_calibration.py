"""Calibration scenarios of the overlap tests on real terrain (shared by the slow test
and tests/benchmarks/bench_calibration.py).

Terrain: the elevation grids matplotlib ships as sample data
(``matplotlib.cbook.get_sample_data``: ``jacksboro_fault_dem.npz``, 344 x 403 cells,
and the land part of ``topobathy.npz``).  Predictors derived from each grid:
elevation, slope (finite differences) and local relief (elevation minus its 9 x 9
mean).  "skewed" uses them as they are (slope and relief are right-skewed);
"symmetric" replaces each by its normal scores (rank -> normal quantile), so the same
terrain gives a symmetric environment.

Each pair gets two square accessible areas (windows) at random places of one grid.
Records are drawn from cells of a window:

* ``dispersed`` - uniformly at random;
* ``clustered`` - around 2 random centres, within 4 cells of them.

Null scenarios (no niche signal; which test each one is a null for):

* similarity null: each taxon's records come from its own window by the spatial
  process alone (the null of the background test: records no more than random points
  of the accessible area);
* equivalency null: ``2 n`` records are drawn from one shared window by one process
  and split at random between the taxa, so their records are exchangeable (then every
  test is under its null: both taxa's records are also random points of their
  accessible area);
* ``separate-clusters`` (reported, not a target): one shared window, but each taxon
  draws its own clusters.  The niches are the same, yet the records sample different
  places; it shows what clustered sampling does to a test that assumes independent
  records.

Alternatives: ``divergent`` (one window; A's records from its lowest third of
elevation, B's from its highest third) and ``similar`` (two windows; both taxa's
records from the cells within 0.3 sd of the same elevation).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage, stats

from screener import overlap as ov

ALPHA = 0.05


def terrain(name: str, shape: str) -> np.ndarray:
    """Predictor cube (rows, cols, 3) of one matplotlib sample grid; NaN off land."""
    from matplotlib import cbook

    if name == "jacksboro":
        z = np.asarray(cbook.get_sample_data("jacksboro_fault_dem.npz")["elevation"], float)
    else:
        z = np.asarray(cbook.get_sample_data("topobathy.npz")["topo"], float)
        z = np.where(z > 0, z, np.nan)
    gy, gx = np.gradient(np.where(np.isfinite(z), z, np.nanmean(z)))
    slope = np.hypot(gx, gy)
    relief = z - ndimage.uniform_filter(np.where(np.isfinite(z), z, np.nanmean(z)), 9)
    cube = np.stack([z, slope, relief], axis=-1)
    cube[~np.isfinite(z)] = np.nan
    if shape == "symmetric":
        for k in range(3):
            layer = cube[..., k]
            ok = np.isfinite(layer)
            ranks = stats.rankdata(layer[ok])
            layer[ok] = stats.norm.ppf((ranks - 0.5) / ok.sum())
    return cube


@dataclass
class Pair:
    records_a: np.ndarray
    records_b: np.ndarray
    background_a: np.ndarray
    background_b: np.ndarray
    available: np.ndarray
    #: (column, row) of the rows above, in cells (x, y with one cell = 1 "km")
    places: tuple = ()


def _window_cells(cube, rng, size):
    n_rows, n_cols = cube.shape[:2]
    for _ in range(100):
        r0 = int(rng.integers(0, n_rows - size))
        c0 = int(rng.integers(0, n_cols - size))
        rr, cc = np.mgrid[r0 : r0 + size, c0 : c0 + size]
        ok = np.all(np.isfinite(cube[rr, cc]), axis=-1)
        if ok.mean() > 0.9:
            return rr[ok], cc[ok]
    raise RuntimeError("no land window found")


def _draw(rows, cols, n, process, rng, weights=None):
    idx = np.arange(len(rows))
    if weights is not None:
        idx = idx[weights]
    if process == "clustered":
        centres = rng.choice(idx, 2, replace=False)
        near = np.zeros(len(rows), bool)
        for c in centres:
            near |= np.hypot(rows - rows[c], cols - cols[c]) <= 4
        near_idx = np.intersect1d(idx, np.flatnonzero(near))
        idx = near_idx if len(near_idx) >= n else idx
    return rng.choice(idx, n, replace=len(idx) < n)


def make_pair(cube, scenario, process, rng, *, n=12, window=70, n_background=None):
    """Records, accessible backgrounds and the shared available environment.

    The background of a window is all its land cells (``n_background=None``, as a
    run takes when the accessible area has fewer cells than ``[background]
    max_points``) or a random sample of that many cells.
    """
    wa = _window_cells(cube, rng, window)
    same = ("equivalency-null", "divergent", "separate-clusters")
    wb = wa if scenario in same else _window_cells(cube, rng, window)

    def env(w, idx):
        return cube[w[0][idx], w[1][idx]]

    def xy(w, idx):
        return np.column_stack([w[1][idx], w[0][idx]]).astype(float)

    def bg_idx(w):
        if n_background is None or n_background >= len(w[0]):
            return np.arange(len(w[0]))
        return rng.choice(len(w[0]), n_background, replace=False)

    if scenario in ("similarity-null", "separate-clusters"):
        ia = _draw(*wa, n, process, rng)
        ib = _draw(*wb, n, process, rng)
    elif scenario == "equivalency-null":
        pool = _draw(*wa, 2 * n, process, rng)
        perm = rng.permutation(2 * n)
        ia, ib = pool[perm[:n]], pool[perm[n:]]
    elif scenario == "divergent":
        z = cube[wa[0], wa[1], 0]
        lo, hi = np.quantile(z, [1 / 3, 2 / 3])
        ia = _draw(*wa, n, process, rng, z <= lo)
        ib = _draw(*wb, n, process, rng, z >= hi)
    elif scenario == "similar":
        za = cube[wa[0], wa[1], 0]
        zb = cube[wb[0], wb[1], 0]
        both = np.concatenate([za, zb])
        target = float(rng.choice(both))
        band = 0.3 * both.std()
        ia = _draw(*wa, n, process, rng, np.abs(za - target) <= band) if np.sum(
            np.abs(za - target) <= band) >= 3 else _draw(*wa, n, process, rng)
        ib = _draw(*wb, n, process, rng, np.abs(zb - target) <= band) if np.sum(
            np.abs(zb - target) <= band) >= 3 else _draw(*wb, n, process, rng)
    else:
        raise ValueError(scenario)
    ga, gb = bg_idx(wa), bg_idx(wb)
    # shared available environment: the union of both windows, one draw
    rows = np.concatenate([wa[0], wb[0]])
    cols = np.concatenate([wa[1], wb[1]])
    union = np.unique(np.ravel_multi_index((rows, cols), cube.shape[:2]))
    pick = rng.choice(union, min(400, len(union)), replace=False)
    ur, uc = np.unravel_index(pick, cube.shape[:2])
    return Pair(env(wa, ia), env(wb, ib), env(wa, ga), env(wb, gb), cube[ur, uc],
                (xy(wa, ia), xy(wb, ib), xy(wa, ga), xy(wb, gb)))


#: Records of one spatial cluster: chained by gaps of at most this many cells (the
#: default of a run, see ``screener.overlap.CLUSTER_CELLS``).
CLUSTER_CELLS = ov.CLUSTER_CELLS


def run_pair(pair: Pair, rng, *, n_replicates=99, grid_cells=24, hypothesis="conserved",
             structured=True):
    """p-values of the three environmental tests and the reading's claims.

    ``structured``: the tests keep the records' spatial structure (pattern-keeping
    similarity null, equivalency by spatial clusters), as a run does; False gives the
    published tests with independent records.
    """
    xy = pair.places if structured else (None,) * 4
    space = ov.environmental_space(
        ov.OverlapTaxon("A", env_records=pair.records_a, env_background=pair.background_a,
                        xy_records=xy[0], xy_background=xy[2]),
        ov.OverlapTaxon("B", env_records=pair.records_b, env_background=pair.background_b,
                        xy_records=xy[1], xy_background=xy[3]),
        shared=ov.SharedSpace(env_available=pair.available, lonlat=False),
        space_parameters=ov.EnvironmentalSpaceParameters(grid_cells=grid_cells),
    )
    seeds = rng.integers(2**31, size=3)
    link = float(CLUSTER_CELLS) if structured else 0.0
    eq = ov.equivalency_test(space, n_replicates=n_replicates, random_state=int(seeds[0]),
                             cluster_km=link)
    ab = ov.similarity_test(space, direction="ab", hypothesis=hypothesis,
                            n_replicates=n_replicates, random_state=int(seeds[1]),
                            cluster_km=link)
    ba = ov.similarity_test(space, direction="ba", hypothesis=hypothesis,
                            n_replicates=n_replicates, random_state=int(seeds[2]),
                            cluster_km=link)
    return _claims(eq["D"].p_value, ab["D"].p_value, ba["D"].p_value)


def _claims(p_equivalency, p_ab, p_ba) -> dict:
    raw = np.array([p_equivalency, p_ab, p_ba])
    holm = ov.holm_adjust(raw)
    return {
        "equivalency": raw[0],
        "similarity_ab": raw[1],
        "similarity_ba": raw[2],
        # the reading claims "not equivalent" / "more alike" only when the Holm-adjusted
        # p (over the pair's three p-values here) is below alpha
        "claims_different": bool(holm[0] < ALPHA),
        "claims_similar": bool(min(holm[1], holm[2]) < ALPHA),
    }


def binomial_ci(k: int, n: int) -> tuple[float, float]:
    """Clopper-Pearson 95 % interval (scipy.stats.binomtest)."""
    ci = stats.binomtest(int(k), int(n)).proportion_ci(0.95, method="exact")
    return float(ci.low), float(ci.high)


def rejection_rates(cube, scenario, process, n_pairs, seed, **kw):
    """Share of pairs with p <= alpha per test, and the reading's claim rates."""
    rng = np.random.default_rng(seed)
    rows = [run_pair(make_pair(cube, scenario, process, rng), rng, **kw)
            for _ in range(n_pairs)]
    return _rates(rows)


def _rates(rows) -> dict:
    n_pairs = len(rows)
    out = {}
    for key in ("equivalency", "similarity_ab", "similarity_ba"):
        k = sum(r[key] <= ALPHA for r in rows)
        out[key] = (k, n_pairs)
    out["claims_different"] = (sum(r["claims_different"] for r in rows), n_pairs)
    out["claims_similar"] = (sum(r["claims_similar"] for r in rows), n_pairs)
    out["claims_any"] = (
        sum(r["claims_different"] or r["claims_similar"] for r in rows), n_pairs)
    return out


# --- evaluation: jackknife and null model on records without niche signal ----------
#: Family fitted in the evaluation scenarios (fast, deterministic).
EVAL_FAMILY = "ellipsoid"


def evaluation_rates(cube, process, n_taxa, seed, *, n=12, window=70, n_background=1000,
                     n_null=19, structured=True):
    """Share of taxa whose jackknife and null-model p is at most alpha.

    Each taxon's records come from its window by the spatial process alone (no niche
    signal), so both tests are under their null.  The study area of both tests is the
    background (as in a run).  ``structured``: the jackknife leaves out each held-out
    record's spatial cluster and the null model moves each cluster as a whole
    (``CLUSTER_CELLS`` cells), as a run does; False: the published tests.
    """
    from screener.evaluation import EvaluationParameters, Points, jackknife, null_model_test

    rng = np.random.default_rng(seed)
    hits = {"jackknife": 0, "null_model": 0}
    for _ in range(n_taxa):
        rows, cols = _window_cells(cube, rng, window)
        idx = _draw(rows, cols, n, process, rng)
        bg = rng.choice(len(rows), min(n_background, len(rows)), replace=False)
        env = cube[rows, cols]
        xy = np.column_stack([cols, rows]).astype(float)
        link = float(CLUSTER_CELLS) if structured else 0.0
        s = int(rng.integers(2**31))
        # coordinates in cells (taken as km: only their ratio to the link matters)
        jk = jackknife(EVAL_FAMILY, {}, Points(env[idx], xy[idx], lonlat=False),
                       Points(env[bg]), Points(env[bg]),
                       EvaluationParameters(random_state=s, cluster_km=link))
        nm = null_model_test(
            EVAL_FAMILY, {},
            Points(env[idx], xy[idx] if structured else None, lonlat=False),
            Points(env[bg], xy[bg] if structured else None, lonlat=False),
            parameters=EvaluationParameters(n_null=n_null, random_state=s,
                                      cluster_km=link if structured else None))
        hits["jackknife"] += jk.p_value <= ALPHA
        hits["null_model"] += nm.p_value <= ALPHA
    return {k: (v, n_taxa) for k, v in hits.items()}


# --- geographic space: tests that refit a model per replicate ------------------------
#: Family refitted by the geographic-space tests in the calibration (fast,
#: deterministic: one mean and covariance per fit).
GEO_FAMILY = "ellipsoid"


def geographic_pair(cube, pair: Pair):
    """Grid, refitting callable, record cells and accessible areas of one pair.

    The grid is the bounding box of the pair's windows, its mask their union (the
    study area); the model is refitted against the pooled background of both windows,
    as a run does (``screener.models.mapping.GeographicRefit``).
    """
    from screener.models.mapping import GeographicRefit

    xa, xb, ga, gb = (np.asarray(v, int) for v in pair.places)
    allc = np.vstack([ga, gb])
    c0, r0 = allc.min(axis=0)
    c1, r1 = allc.max(axis=0) + 1
    shape = (r1 - r0, c1 - c0)

    def flat(xy):
        return np.ravel_multi_index((xy[:, 1] - r0, xy[:, 0] - c0), shape)

    def area(xy):
        m = np.zeros(shape, bool)
        m.ravel()[flat(xy)] = True
        return m

    acc_a, acc_b = area(ga), area(gb)
    mask = acc_a | acc_b
    values = cube[r0:r1, c0:c1][mask]
    refit = GeographicRefit(GEO_FAMILY, {}, np.vstack([pair.background_a,
                                                       pair.background_b]),
                            values, mask)
    return refit, flat(xa), flat(xb), acc_a, acc_b


def run_geographic_pair(cube, pair: Pair, rng, *, n_replicates=99,
                        hypothesis="conserved", structured=True):
    """p-values of the three geographic-space tests and the reading's claims
    (``structured``: the tests keep the records' sites, as a run does)."""
    refit, ca, cb, acc_a, acc_b = geographic_pair(cube, pair)
    seeds = rng.integers(2**31, size=3)
    link = float(CLUSTER_CELLS) if structured else 0.0
    eq = ov.geographic_equivalency_test(refit, ca, cb, 1.0, n_replicates=n_replicates,
                                        random_state=int(seeds[0]), cluster_km=link)
    a = ov.OverlapTaxon("A", cells=ca, accessible=acc_a)
    b = ov.OverlapTaxon("B", cells=cb, accessible=acc_b)
    p = []
    for direction, seed in (("ab", seeds[1]), ("ba", seeds[2])):
        tests = ov.OverlapTestParameters(n_replicates=n_replicates, hypothesis=hypothesis,
                                         random_state=int(seed), cluster_km=link)
        p.append(ov.geographic_similarity_test(refit, a, b, 1.0, direction=direction,
                                               test_parameters=tests)["D"].p_value)
    return _claims(eq["D"].p_value, *p)


def geographic_rates(cube, scenario, process, n_pairs, seed, **kw):
    """:func:`rejection_rates` of the geographic-space tests."""
    rng = np.random.default_rng(seed)
    rows = [run_geographic_pair(cube, make_pair(cube, scenario, process, rng), rng,
                                **kw) for _ in range(n_pairs)]
    return _rates(rows)
