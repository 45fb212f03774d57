"""Tests of niche overlap (screener.overlap) against published formulas and references.

Sources named beside each check:
- Schoener (1968) Ecology 49:704 and Warren et al. (2008) Evolution 62:2868 for D and I
  (formulas from memory, as given in the project's methods reference);
- Levins (1968) for niche breadth (from memory);
- scipy.stats.gaussian_kde and sklearn.neighbors.KernelDensity as reference densities;
- spherical cell area A = R^2 dlon (sin lat_top - sin lat_bottom), R = 6371.0072 km
  (authalic radius, from memory);
- permutation-test calibration: under exchangeable records the equivalency test's
  p-value is uniform on {1/(R+1), ..., 1} (Warren et al. 2008; standard permutation
  theory).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from affine import Affine
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays
from numpy.testing import assert_allclose
from scipy.stats import gaussian_kde
from sklearn.neighbors import KernelDensity

from screener import overlap as ov
from screener.errors import InputError, ScreenerDeprecationWarning
from screener.grid import Grid

# --------------------------------------------------------------------------------------
# D and I
# --------------------------------------------------------------------------------------


def test_d_and_i_hand_computed():
    # Schoener 1968: D = 1 - 0.5 sum|p - q|; Warren et al. 2008: I = sum sqrt(p q).
    p = np.array([0.2, 0.3, 0.5])
    q = np.array([0.5, 0.3, 0.2])
    # by hand: |p - q| = (0.3, 0, 0.3) -> D = 1 - 0.3 = 0.7
    assert ov.schoener_d(p, q) == pytest.approx(0.7, abs=1e-12)
    # by hand: I = 2 sqrt(0.10) + sqrt(0.09) = 0.632456 + 0.3
    assert ov.hellinger_i(p, q) == pytest.approx(2 * math.sqrt(0.1) + 0.3, abs=1e-12)
    # unnormalised input is normalised first: (1, 1) -> (0.5, 0.5)
    assert ov.schoener_d([1.0, 1.0], [3.0, 0.0]) == pytest.approx(0.5, abs=1e-12)
    assert ov.hellinger_i([1.0, 1.0], [3.0, 0.0]) == pytest.approx(math.sqrt(0.5))


def test_identical_and_disjoint():
    # Warren et al. 2008: both statistics are 1 for identical and 0 for disjoint niches.
    rng = np.random.default_rng(3)
    p = rng.random((6, 7))
    assert ov.schoener_d(p, 2 * p) == pytest.approx(1.0, abs=1e-12)
    assert ov.hellinger_i(p, 2 * p) == pytest.approx(1.0, abs=1e-12)
    a = np.zeros((4, 4))
    b = np.zeros((4, 4))
    a[:2] = 1.0
    b[2:] = 0.7
    assert ov.schoener_d(a, b) == 0.0
    assert ov.hellinger_i(a, b) == 0.0


def test_i_is_the_bhattacharyya_coefficient():
    # Warren et al. 2008: I = 1 - H^2/2 = sum sqrt(p q) (Bhattacharyya coefficient).
    rng = np.random.default_rng(5)
    for _ in range(5):
        p = rng.random(50) ** 3
        q = rng.random(50) ** 3
        bc = np.sum(np.sqrt(p / p.sum() * q / q.sum()))
        assert ov.hellinger_i(p, q) == pytest.approx(bc, abs=1e-12)


def test_nan_cells_are_ignored():
    # Warren et al. 2008 normalise over cells valid in both surfaces.
    p = np.array([[1.0, 2.0, np.nan], [3.0, 4.0, 5.0]])
    q = np.array([[2.0, 2.0, 9.0], [np.nan, 1.0, 5.0]])
    keep = np.isfinite(p) & np.isfinite(q)
    assert ov.schoener_d(p, q) == pytest.approx(ov.schoener_d(p[keep], q[keep]))
    assert ov.hellinger_i(p, q) == pytest.approx(ov.hellinger_i(p[keep], q[keep]))


def test_empty_or_negative_surfaces_are_rejected():
    with pytest.raises(ValueError, match="zero"):
        ov.schoener_d(np.zeros(4), np.ones(4))
    with pytest.raises(ValueError, match="zero"):
        ov.hellinger_i(np.ones(4), [np.nan, 0.0, 0.0, 0.0])
    with pytest.raises(ValueError, match="negative"):
        ov.schoener_d([1.0, -0.1], [1.0, 1.0])
    with pytest.raises(ValueError, match="same shape"):
        ov.schoener_d(np.ones(3), np.ones(4))


def test_area_weighting_changes_the_answer_on_a_lonlat_grid():
    # Two 1 x 1 degree cells, one at the equator (0-1 N) and one at 60-61 N.
    # Spherical cell area A = R^2 dlon (sin top - sin bottom), R = 6371.0072 km
    # (authalic sphere, from memory); computed here by hand.
    r = 6371.0072
    dlon = math.radians(1.0)
    a0 = r**2 * dlon * (math.sin(math.radians(1)) - math.sin(math.radians(0)))
    a1 = r**2 * dlon * (math.sin(math.radians(61)) - math.sin(math.radians(60)))
    p = np.array([1.0, 1.0])  # suitable in both cells
    q = np.array([1.0, 0.0])  # suitable only at the equator
    # Unweighted: p = (1/2, 1/2), q = (1, 0) -> D = 0.5.
    assert ov.schoener_d(p, q) == pytest.approx(0.5)
    # Weighted: p = (a0, a1)/(a0 + a1) -> D = a0 / (a0 + a1), I = sqrt(a0 / (a0 + a1)).
    d_expected = a0 / (a0 + a1)
    assert d_expected == pytest.approx(0.670, abs=0.002)  # visibly not 0.5
    assert ov.schoener_d(p, q, weights=[a0, a1]) == pytest.approx(d_expected, rel=1e-12)
    assert ov.hellinger_i(p, q, [a0, a1]) == pytest.approx(math.sqrt(d_expected))
    # The grid's WGS84 areas give nearly the same answer (sphere vs ellipsoid < 0.5 %).
    grid = Grid("EPSG:4326", Affine(1.0, 0, 10.0, 0, -1.0, 61.0), (61, 1))
    areas = grid.cell_area_km2[[60, 0], 0]  # rows: 0-1 N is the last, 60-61 N the first
    d_grid, i_grid = ov.geographic_overlap(p[:, None], q[:, None], areas[:, None])
    assert d_grid == pytest.approx(d_expected, rel=5e-3)
    assert i_grid == pytest.approx(math.sqrt(d_expected), rel=5e-3)


_surface = arrays(
    np.float64, (4, 5), elements=st.floats(0, 1, allow_nan=False, allow_subnormal=False)
)


@settings(max_examples=60, deadline=None)
@given(_surface, _surface)
def test_d_and_i_bounded_and_symmetric(p, q):
    # Warren et al. 2008: D, I in [0, 1] and symmetric in the two taxa.
    p = p.copy()
    q = q.copy()
    p[0, 0] += 0.5  # not all zero
    q[-1, -1] += 0.5
    for f in (ov.schoener_d, ov.hellinger_i):
        v = f(p, q)
        assert 0.0 <= v <= 1.0
        assert v == pytest.approx(f(q, p), abs=1e-12)
    # D <= I always holds for normalised distributions (|p-q| >= (sqrt p - sqrt q)^2).
    assert ov.schoener_d(p, q) <= ov.hellinger_i(p, q) + 1e-12


def test_levins_breadth_hand_computed():
    # Levins 1968: B = 1 / sum p^2, standardised (B - 1) / (N - 1).
    assert ov.levins_breadth(np.ones(5)) == pytest.approx(1.0)
    assert ov.levins_breadth([0.0, 0.0, 3.0]) == pytest.approx(0.0)
    # p = (1/2, 1/2, 0, 0): B = 2, N = 4 -> 1/3
    assert ov.levins_breadth([1.0, 1.0, 0.0, 0.0]) == pytest.approx(1 / 3)
    assert ov.levins_breadth([1.0, 1.0, 0.0, np.nan]) == pytest.approx(1 / 2)


# --------------------------------------------------------------------------------------
# Environmental space
# --------------------------------------------------------------------------------------


def _pair(rng, shift=0.0, n=30, n_bg=600, n_vars=3, spread=0.5):
    bg_a = rng.normal(size=(n_bg, n_vars))
    bg_b = rng.normal(size=(n_bg, n_vars))
    ra = rng.normal(0.0, spread, size=(n, n_vars))
    rb = rng.normal(0.0, spread, size=(n, n_vars))
    rb[:, 0] += shift
    return ra, rb, bg_a, bg_b


def _space(ra, rb, ba, bb, *, places=None, env_available=None, predictor_names=(),
           lonlat=True, **parameters):
    """The environmental space of two taxa given as arrays (records, background of
    A and B, and their coordinates in the order records A, B, background A, B)."""
    xy = places if places is not None else (None,) * 4
    a = ov.OverlapTaxon("A", env_records=ra, env_background=ba, xy_records=xy[0],
                        xy_background=xy[2])
    b = ov.OverlapTaxon("B", env_records=rb, env_background=bb, xy_records=xy[1],
                        xy_background=xy[3])
    shared = ov.SharedSpace(env_available=env_available,
                            predictor_names=predictor_names, lonlat=lonlat)
    return ov.environmental_space(
        a, b, shared=shared,
        space_parameters=ov.EnvironmentalSpaceParameters(**parameters))


def _whitened_kde(points, nodes, cov):
    """Gaussian density with kernel covariance `cov` via sklearn on whitened data."""
    chol = np.linalg.cholesky(cov)
    inv = np.linalg.inv(chol)
    kd = KernelDensity(kernel="gaussian", bandwidth=1.0).fit(points @ inv.T)
    return np.exp(kd.score_samples(nodes @ inv.T)) / abs(np.linalg.det(chol))


def test_kernel_sum_matches_scipy_gaussian_kde():
    # Reference: scipy.stats.gaussian_kde with its default Scott bandwidth, which is
    # the sample covariance times n^(-1/3) in two dimensions (Scott 1992, from memory).
    rng = np.random.default_rng(11)
    pts = rng.normal(size=(40, 2)) @ np.array([[1.0, 0.4], [0.0, 0.6]])
    nodes = rng.uniform(-3, 3, size=(500, 2))
    cov = np.cov(pts.T) * len(pts) ** (-1 / 3)
    ours = ov._kernel_sum(pts, nodes, cov) / len(pts)
    ref = gaussian_kde(pts.T)(nodes.T)
    assert_allclose(ours, ref, rtol=1e-9, atol=1e-14)
    # the record bandwidth is Scott's rule on the taxon's own records plus a ridge of
    # the available environment's covariance
    avail = np.array([[2.0, 0.3], [0.3, 1.0]])
    want = (np.cov(pts.T) + ov.BANDWIDTH_RIDGE * avail) * len(pts) ** (-1 / 3)
    assert_allclose(ov.record_bandwidth(pts, avail), want, rtol=1e-12)


def test_record_densities_match_sklearn_on_the_pca_grid():
    # Reference: sklearn.neighbors.KernelDensity (Gaussian) with the same kernel
    # covariance, applied in whitened coordinates; same grid nodes.
    rng = np.random.default_rng(2)
    space = _space(*_pair(rng, shift=1.0), grid_cells=30)
    nodes = space.nodes
    ref_a = _whitened_kde(space.a.scores_records, nodes, space.a.bandwidth)
    ref_b = _whitened_kde(space.b.scores_records, nodes, space.b.bandwidth)
    assert_allclose(space.a.z_occ.ravel(), ref_a, rtol=1e-8, atol=1e-14)
    assert_allclose(space.b.z_occ.ravel(), ref_b, rtol=1e-8, atol=1e-14)
    # the shared environment density is gaussian_kde of the available environment
    # (both backgrounds pooled when none is given), scaled to max 1
    assert len(space.scores_available) == 1200
    env = gaussian_kde(space.scores_available.T)(nodes.T)
    assert_allclose(space.z_env.ravel(), env / env.max(), rtol=1e-10)
    # rows follow PC2, columns PC1: the densest record cell sits near the record mean
    r, c = np.unravel_index(np.argmax(space.b.z_occ), space.b.z_occ.shape)
    mean = space.b.scores_records.mean(axis=0)
    assert abs(space.pc1_centres[c] - mean[0]) < 0.6
    assert abs(space.pc2_centres[r] - mean[1]) < 0.6


def test_occupancy_is_density_ratio_on_support():
    # Broennimann et al. 2012: occupancy = z_occ / z_env where the environment exists.
    rng = np.random.default_rng(4)
    space = _space(*_pair(rng), grid_cells=25)
    ratio = np.where(space.support, space.a.z_occ / space.z_env, 0.0)
    assert_allclose(space.a.occupancy, ratio / ratio.max(), rtol=1e-12)
    assert space.a.occupancy.max() == pytest.approx(1.0)
    # support_quantile = 0: every available point's cell lies in the support
    rows, cols = space.cell_of(space.scores_available)
    assert space.support[rows, cols].all()
    # occupancy_of rebuilds an occupancy exactly as the taxa's are built
    assert_allclose(space.occupancy_of(space.b.scores_records), space.b.occupancy)


def test_identical_records_give_d_of_one_whatever_background_each_drew():
    # Warren et al. 2008 / Broennimann et al. 2012: D = 1 for identical niches.  The
    # two taxa draw separate background samples of one area; with the shared
    # available environment their occupancies must be identical.
    rng = np.random.default_rng(6)
    area = rng.normal(size=(2000, 3)) @ np.array([[1, 0.3, 0], [0, 1, 0.2], [0, 0, 0.7]])
    bg_a = area[rng.choice(2000, 400, replace=False)]
    bg_b = area[rng.choice(2000, 400, replace=False)]
    rec = area[rng.choice(2000, 15, replace=False)]
    space = _space(rec, rec, bg_a, bg_b, grid_cells=40)
    assert ov.environmental_overlap(space) == pytest.approx((1.0, 1.0), abs=1e-12)
    given = _space(rec, rec, bg_a, bg_b, env_available=area)
    assert ov.environmental_overlap(given) == pytest.approx((1.0, 1.0), abs=1e-12)
    # deterministic: the same inputs give the same surfaces
    again = _space(rec, rec, bg_a, bg_b, env_available=area)
    assert np.array_equal(again.a.occupancy, given.a.occupancy)


def test_each_taxon_gets_its_own_bandwidth():
    # Scott's rule on a taxon's own records: B's records do not change A's kernel, and
    # a clearly separated pair of tight niches has almost no overlap.
    rng = np.random.default_rng(7)
    ra, rb, ba, bb = _pair(rng, shift=0.0, n=20, spread=0.2)
    rb = rb + np.array([3.0, 0.0, 0.0])
    wide = rng.normal(0.0, 1.5, size=(20, 3))
    s1 = _space(ra, rb, ba, bb, env_available=ba)
    s2 = _space(ra, wide, ba, bb, env_available=ba)
    assert_allclose(s1.a.bandwidth, s2.a.bandwidth, rtol=1e-12)
    assert np.trace(s2.b.bandwidth) > 10 * np.trace(s1.b.bandwidth)
    assert ov.environmental_overlap(s1)[0] < 0.01


def test_environmental_overlap_is_unit_free():
    # Standardising before the PCA makes the result independent of predictor units.
    rng = np.random.default_rng(8)
    ra, rb, ba, bb = _pair(rng, shift=0.8)
    d1, i1 = ov.environmental_overlap(
        _space(ra, rb, ba, bb, grid_cells=30)
    )
    scale = np.array([1000.0, 1.0, 0.01])
    d2, i2 = ov.environmental_overlap(
        _space(
            ra * scale, rb * scale, ba * scale, bb * scale, grid_cells=30
        )
    )
    assert d1 == pytest.approx(d2, abs=1e-6)
    assert i1 == pytest.approx(i2, abs=1e-6)
    same = _space(ra, ra, ba, bb, grid_cells=30)
    dyn = ov.niche_dynamics(same)
    assert dyn["stability"] == pytest.approx(1.0)
    assert dyn["expansion"] == pytest.approx(0.0, abs=1e-12)
    assert dyn["unfilling"] == pytest.approx(0.0, abs=1e-12)


def test_niche_dynamics_of_disjoint_niches():
    # Guisan et al. 2014: a niche entirely outside the reference is all expansion and
    # leaves the reference's niche unfilled.
    rng = np.random.default_rng(9)
    bg = rng.normal(size=(1500, 3)) * 2.0
    ra = rng.normal(-2.5, 0.2, size=(25, 3))
    rb = rng.normal(2.5, 0.2, size=(25, 3))
    space = _space(ra, rb, bg, bg, grid_cells=40)
    dyn = ov.niche_dynamics(space)
    assert dyn["expansion"] > 0.9
    assert dyn["unfilling"] > 0.9
    assert dyn["stability"] == pytest.approx(1 - dyn["expansion"])
    assert ov.environmental_overlap(space)[0] < 0.1


def test_analogue_environment_is_cut_over_cells_not_background_points():
    # Guisan et al. 2014 define analogue environment on the cells of environmental
    # space.  A background with a dense core and a sparse halo: a quantile over
    # background points would drop halo cells holding far more than 5 % of the cells;
    # over cells it drops about 5 % of the occupied cells.
    rng = np.random.default_rng(10)
    core = rng.normal(0.0, 0.3, size=(3000, 3))
    halo = rng.uniform(-3, 3, size=(300, 3))
    bg = np.vstack([core, halo])
    ra = rng.normal(0, 0.3, size=(20, 3))
    rb = rng.uniform(-2.5, 2.5, size=(20, 3))
    space = _space(ra, rb, bg, bg, grid_cells=30)
    rows, cols = space.cell_of(space.a.scores_background)
    holds = np.zeros(space.z_env.shape, bool)
    holds[rows, cols] = True
    kept = space.a.available.sum() / holds.sum()
    assert 0.93 <= kept <= 0.97  # one cell per cell: the 5 % quantile drops ~5 %
    assert not np.any(space.a.available & ~holds)
    # the share of records in analogue environment, counted directly
    r, c = space.cell_of(space.b.scores_records)
    dyn = ov.niche_dynamics(space)
    assert dyn["analogue_share_b"] == pytest.approx(np.mean(space.analogue[r, c]))


def test_environmental_space_input_errors():
    rng = np.random.default_rng(1)
    ra, rb, ba, bb = _pair(rng)
    with pytest.raises(InputError, match="NaN"):
        bad = ra.copy()
        bad[3, 1] = np.nan
        _space(bad, rb, ba, bb)
    with pytest.raises(InputError, match="same predictors"):
        _space(ra, rb[:, :2], ba, bb)
    with pytest.raises(InputError, match="at least 2 predictors"):
        _space(ra[:, :1], rb[:, :1], ba[:, :1], bb[:, :1])
    with pytest.raises(InputError, match="grid_cells"):
        _space(ra, rb, ba, bb, grid_cells=5)


def test_old_option_names_still_work_with_a_warning():
    rng = np.random.default_rng(1)
    ra, rb, ba, bb = _pair(rng, n=8)
    with pytest.warns(ScreenerDeprecationWarning) as caught:
        old = ov.environmental_space(ra, rb, ba, bb, resolution=20)
    said = " ".join(str(w.message) for w in caught)
    assert "`resolution` is `grid_cells`" in said and "OverlapTaxon" in said
    assert old.grid_cells == 20
    with pytest.warns(ScreenerDeprecationWarning, match="hypothesis"):
        t = ov.similarity_test(old, alternative="lower", n_replicates=9)["D"]
    assert t.hypothesis == "diverged" and t.tail == "lower"


def test_old_pair_names_of_the_space_still_read():
    # kept for one release: ``space.occupancy_a`` is ``space.a.occupancy``
    rng = np.random.default_rng(1)
    space = _space(*_pair(rng, n=8), grid_cells=20)
    for which in ("a", "b"):
        taxon = space.taxon(which)
        for name in ("scores_records", "scores_background", "bandwidth", "available",
                     "z_occ", "occupancy", "xy_records", "xy_background"):
            assert getattr(space, f"{name}_{which}") is getattr(taxon, name)
    with pytest.raises(AttributeError, match="occupancy_c"):
        space.occupancy_c


# --------------------------------------------------------------------------------------
# Tests of overlap
# --------------------------------------------------------------------------------------


def test_equivalency_p_value_formula_and_reproducibility():
    # Warren et al. 2008: p = (1 + #{null <= observed}) / (1 + R).
    rng = np.random.default_rng(12)
    space = _space(*_pair(rng, shift=0.7, n=15), grid_cells=30)
    res = ov.equivalency_test(space, n_replicates=29, random_state=7)
    for stat in ("D", "I"):
        t = res[stat]
        assert t.null.shape == (29,) and t.n_valid == 29
        p = (1 + np.sum(t.null <= t.observed)) / 30
        assert t.p_value == pytest.approx(p)
        # Monte Carlo standard error of an estimated proportion, sqrt(p(1-p)/R)
        assert t.p_se == pytest.approx(math.sqrt(p * (1 - p) / 29))
        assert t.tail == "lower" and t.test == "equivalency"
    assert res["D"].observed == pytest.approx(ov.environmental_overlap(space)[0])
    again = ov.equivalency_test(space, n_replicates=29, random_state=7)
    assert np.array_equal(again["D"].null, res["D"].null)
    other = ov.equivalency_test(space, n_replicates=29, random_state=8)
    assert not np.array_equal(other["D"].null, res["D"].null)


def test_equivalency_replicates_rebuild_densities_like_the_observed_ones():
    # A replicate that happens to keep every record with its own taxon must give the
    # observed D: same bandwidth rule, same shared environment.
    rng = np.random.default_rng(14)
    space = _space(*_pair(rng, shift=0.7, n=10), grid_cells=25)
    task = ov._EnvTask(
        nodes=space.nodes,
        shape=space.z_env.shape,
        inv_env=space.inverse_env.ravel(),
        available_cov=space.available_cov,
        pool=np.vstack([space.a.scores_records, space.b.scores_records]),
        n_a=10,
    )
    za = task.density(task.pool[:10])
    zb = task.density(task.pool[10:])
    assert ov._d_i_or_nan(za, zb) == pytest.approx(ov.environmental_overlap(space))


def _places(rng, n_a, n_b, n_bg, spread_km=50.0):
    return tuple(rng.uniform(0, spread_km, size=(k, 2)) for k in (n_a, n_b, n_bg, n_bg))


def test_equivalency_with_single_record_clusters_is_the_published_permutation():
    # Restricted permutation (Manly 2007, from memory): with every record its own
    # cluster (a link shorter than any gap) it reduces to the plain permutation of
    # Warren et al. 2008, draw for draw.
    rng = np.random.default_rng(21)
    ra, rb, ba, bb = _pair(rng, shift=0.7, n=12)
    xy = np.column_stack([np.arange(24) * 10.0, np.zeros(24)])
    places = (xy[:12], xy[12:], rng.uniform(0, 300, (600, 2)), rng.uniform(0, 300, (600, 2)))
    space = _space(ra, rb, ba, bb, grid_cells=20, places=places,
                                   lonlat=False)
    plain = ov.equivalency_test(space, n_replicates=19, random_state=3)
    linked = ov.equivalency_test(space, n_replicates=19, random_state=3, cluster_km=5.0)
    assert_allclose(linked["D"].null, plain["D"].null, rtol=1e-12)


def test_equivalency_cannot_reject_with_two_clusters_per_taxon():
    # Each taxon known from two tight clusters of records: four units, six ways to
    # split them, so no p below 1/6 is honest; record by record it rejects.
    rng = np.random.default_rng(22)
    ra, rb, ba, bb = _pair(rng, shift=2.0, n=12)
    centres = np.array([[0, 0], [100, 0], [0, 100], [100, 100]], float)
    xy = np.repeat(centres, 6, axis=0) + rng.uniform(0, 1, (24, 2))
    places = (xy[:12], xy[12:], rng.uniform(0, 100, (600, 2)),
              rng.uniform(0, 100, (600, 2)))
    space = _space(ra, rb, ba, bb, grid_cells=20, places=places,
                                   lonlat=False)
    plain = ov.equivalency_test(space, n_replicates=99, random_state=4)
    linked = ov.equivalency_test(space, n_replicates=99, random_state=4, cluster_km=3.0)
    assert plain["D"].p_value <= 0.02
    assert linked["D"].p_value > 0.1
    assert len(np.unique(np.round(linked["D"].null, 12))) <= 6


def test_equivalency_keeps_neighbouring_sites_of_two_taxa_apart():
    # A collected at one site, B at another within one link of it: pooled single
    # linkage made them one "shared" site and shuffled labels record by record
    # (p <= 0.02 on clearly different niches); they are two units, one per taxon
    # (site nested in taxon: Anderson & ter Braak 2003, from memory), and two
    # units can only be swapped, which gives the observed D again: no evidence.
    rng = np.random.default_rng(24)
    ra, rb, ba, bb = _pair(rng, shift=2.0, n=12)
    site = rng.uniform(0, 2.0, (12, 2))
    xy = np.vstack([site, site + [4.0, 0.0]])
    from screener.randomisation import spatial_clusters

    assert np.unique(spatial_clusters(xy, 3.0, lonlat=False)).size == 1  # pooled: one
    places = (xy[:12], xy[12:], rng.uniform(0, 100, (600, 2)),
              rng.uniform(0, 100, (600, 2)))
    space = _space(ra, rb, ba, bb, grid_cells=20, places=places, lonlat=False)
    plain = ov.equivalency_test(space, n_replicates=99, random_state=5)
    linked = ov.equivalency_test(space, n_replicates=99, random_state=5, cluster_km=3.0)
    assert plain["D"].p_value <= 0.02
    assert linked["D"].p_value == 1.0
    assert_allclose(linked["D"].null, linked["D"].observed, rtol=1e-9)


def test_equivalency_p_matches_exact_enumeration_of_the_unit_splits():
    # Reference: the exact permutation p over every allowed split of whole units
    # (itertools; Manly 2007, from memory).  Two sites per taxon of unequal sizes:
    # C(4, 2) = 6 splits, two of them (the observed one and its mirror) give the
    # observed D again, up to rounding; they must count as ties, or p comes out
    # 0.01 where the exact p is at least 2/6.
    from itertools import combinations

    rng = np.random.default_rng(29)  # a draw whose observed split is the least alike
    ra, rb, ba, bb = _pair(rng, shift=1.5, n=12)
    centres = np.array([[0, 0], [100, 0], [0, 100], [100, 100]], float)
    sizes = [9, 3, 7, 5]
    xy = np.repeat(centres, sizes, axis=0) + rng.uniform(0, 1, (24, 2))
    places = (xy[:12], xy[12:], rng.uniform(0, 100, (600, 2)),
              rng.uniform(0, 100, (600, 2)))
    space = _space(ra, rb, ba, bb, grid_cells=20, places=places, lonlat=False)
    res = ov.equivalency_test(space, n_replicates=999, random_state=6, cluster_km=3.0)
    task = ov._EnvTask(
        nodes=space.nodes, shape=space.z_env.shape, inv_env=space.inverse_env.ravel(),
        available_cov=space.available_cov,
        pool=np.vstack([space.a.scores_records, space.b.scores_records]), n_a=12,
    )
    unit = np.repeat(np.arange(4), sizes)
    d_obs = res["D"].observed
    d_splits = []
    for units_a in combinations(range(4), 2):
        is_a = np.isin(unit, units_a)
        d_splits.append(ov._d_i_or_nan(task.density(task.pool[is_a]),
                                       task.density(task.pool[~is_a]))[0])
    exact = np.mean(np.asarray(d_splits) <= d_obs + 1e-9)
    assert exact >= 2 / 6
    # Monte Carlo p of 999 replicates within 4 binomial standard errors of it
    se = math.sqrt(exact * (1 - exact) / 999)
    assert abs(res["D"].p_value - exact) <= 4 * se + 1 / 1000


def test_places_must_match_the_rows():
    rng = np.random.default_rng(23)
    ra, rb, ba, bb = _pair(rng, n=8)
    places = _places(rng, 8, 8, 600)
    space = _space(ra, rb, ba, bb, grid_cells=20, places=places,
                                   lonlat=False)
    assert space.has_places
    assert not _space(ra, rb, ba, bb, grid_cells=20).has_places
    with pytest.raises(InputError, match="one per row"):
        _space(ra, rb, ba, bb, grid_cells=20,
                               places=_places(rng, 7, 8, 600), lonlat=False)


def _calibration_rate(shift, n_pairs, seed, n_replicates=39):
    rng = np.random.default_rng(seed)
    rejected = 0
    for _ in range(n_pairs):
        ra, rb, ba, bb = _pair(rng, shift=shift, n=12, n_bg=150, spread=0.6)
        space = _space(ra, rb, ba, bb, grid_cells=20)
        res = ov.equivalency_test(
            space, n_replicates=n_replicates, random_state=int(rng.integers(2**31))
        )
        rejected += res["D"].p_value <= 0.05
    return rejected / n_pairs


@pytest.mark.slow
def test_equivalency_calibration_under_the_null():
    # Permutation theory: with R = 39 replicates, P(p <= 0.05) = 2/40 = 5 % exactly
    # when both taxa's records come from one niche (exchangeable records).  Over 300
    # pairs the rejection rate must fall in 2 %..8 % (binomial sd 1.3 %).
    rate = _calibration_rate(shift=0.0, n_pairs=300, seed=2024)
    assert 0.02 <= rate <= 0.08


@pytest.mark.slow
def test_equivalency_power_on_different_niches():
    # Clearly different niches (centres 2.0 apart on one predictor, 3.3 record-sd)
    # must be rejected in at least 90 % of pairs.
    rate = _calibration_rate(shift=2.0, n_pairs=40, seed=77)
    assert rate >= 0.9


@pytest.mark.slow
def test_similarity_null_is_random_records_from_the_other_accessible_area():
    # Warren et al. 2008 background test: when B's records are themselves random
    # points of B's accessible area, B's observed D is exchangeable with the null
    # replicates, so P(p <= 2/40) = 2/40 with R = 39.  150 pairs: band 1 %..10 %.
    rng = np.random.default_rng(15)
    rejected = 0
    n_pairs = 150
    for _ in range(n_pairs):
        ba = rng.normal(size=(200, 3))
        bb = rng.normal(size=(200, 3)) + np.array([0.8, 0.0, 0.0])
        ra = ba[rng.choice(200, 10, replace=False)]
        rb = bb[rng.choice(200, 10, replace=False)]
        space = _space(ra, rb, ba, bb, grid_cells=20)
        t = ov.similarity_test(
            space, n_replicates=39, random_state=int(rng.integers(2**31))
        )["D"]
        rejected += t.p_value <= 0.05
    assert 0.01 <= rejected / n_pairs <= 0.10


def test_similarity_detects_conservatism_and_its_p_formula():
    # Two taxa in the same small corner of broad, different accessible areas: their
    # niches are more similar than random records from the backgrounds give
    # (Warren et al. 2008: p = (1 + #{null >= observed}) / (1 + R)).
    rng = np.random.default_rng(21)
    bg_a = rng.normal(size=(800, 3)) * 2.0 + np.array([1.0, 0.0, 0.0])
    bg_b = rng.normal(size=(800, 3)) * 2.0 - np.array([1.0, 0.0, 0.0])
    ra = rng.normal(0.0, 0.3, size=(20, 3)) + np.array([0.0, 2.0, 0.0])
    rb = rng.normal(0.0, 0.3, size=(20, 3)) + np.array([0.0, 2.0, 0.0])
    space = _space(ra, rb, bg_a, bg_b, grid_cells=30)
    for direction in ("ab", "ba"):
        res = ov.similarity_test(
            space, direction=direction, n_replicates=49, random_state=1
        )
        t = res["D"]
        assert t.p_value == pytest.approx((1 + np.sum(t.null >= t.observed)) / 50)
        assert t.p_value < 0.05 and t.hypothesis == "conserved"
        low = ov.similarity_test(
            space,
            direction=direction,
            hypothesis="diverged",
            n_replicates=49,
            random_state=1,
        )["D"]
        assert np.array_equal(low.null, t.null)
        assert low.p_value > 0.5
    with pytest.raises(InputError, match="hypothesis"):
        ov.similarity_test(space, hypothesis="two-sided")


def test_holm_adjustment_by_hand():
    # Holm 1979: sorted p_(i) times (m - i + 1), made non-decreasing, capped at 1.
    # p = (0.01, 0.04, 0.03, 0.005), m = 4: sorted 0.005, 0.01, 0.03, 0.04 ->
    # 0.020, 0.030, 0.060, 0.040 -> running max 0.020, 0.030, 0.060, 0.060.
    got = ov.holm_adjust([0.01, 0.04, 0.03, 0.005])
    assert_allclose(got, [0.03, 0.06, 0.06, 0.02], atol=1e-15)
    # NaN (a test not run) is not counted: m = 2 here
    got = ov.holm_adjust([0.02, np.nan, 0.04])
    assert_allclose(got[[0, 2]], [0.04, 0.04])
    assert math.isnan(got[1])
    # between the raw p and Bonferroni's m * p (Holm 1979)
    rng = np.random.default_rng(3)
    p = rng.random(12) ** 3
    q = ov.holm_adjust(p)
    assert np.all(q >= p) and np.all(q <= np.minimum(1, 12 * p) + 1e-15)


def test_p_values_print_to_the_precision_of_their_replicates():
    assert ov.format_p(0.012, 999) == "p = 0.012"
    assert ov.format_p(1 / 1000, 999) == "p <= 0.001"
    assert ov.format_p(0.35, 19) == "p = 0.35"
    assert ov.format_p(1 / 20, 19) == "p <= 0.05"
    assert ov.format_p(float("nan"), 0) == "p not computed"


# --------------------------------------------------------------------------------------
# Geographic tests and the pair entry point
# --------------------------------------------------------------------------------------

_SHAPE = (20, 24)


class _BumpModel:
    """Invented stand-in for a niche model: a Gaussian bump at the presences' mean."""

    def __init__(self, shape=_SHAPE, width=3.0):
        self.shape = shape
        self.width = width

    def __call__(self, cells):
        rows, cols = np.unravel_index(np.asarray(cells), self.shape)
        rr, cc = np.indices(self.shape)
        d2 = (rr - rows.mean()) ** 2 + (cc - cols.mean()) ** 2
        return np.exp(-0.5 * d2 / self.width**2)


def test_geographic_equivalency_detects_separated_ranges():
    model = _BumpModel()
    cells_a = np.ravel_multi_index(([2, 3, 4, 3, 2], [2, 3, 2, 4, 4]), _SHAPE)
    cells_b = np.ravel_multi_index(([16, 17, 15, 16, 17], [20, 21, 19, 19, 20]), _SHAPE)
    res = ov.geographic_equivalency_test(
        model, cells_a, cells_b, 1.0, n_replicates=39, random_state=3
    )
    t = res["D"]
    assert t.observed == pytest.approx(
        ov.geographic_overlap(model(cells_a), model(cells_b), 1.0)[0]
    )
    assert t.p_value == pytest.approx(1 / 40)  # every random split overlaps more
    assert ov.estimate_seconds(model, cells_a, 10) >= 0.0


def test_geographic_similarity_test_takes_the_two_taxa():
    # Warren et al. 2008: the fixed taxon's map against maps fitted to random cells
    # of the other's accessible area.  Observed maps come from the test's own model,
    # so the old form given those maps gives the same null, draw for draw.
    model = _BumpModel()
    cells_a = np.ravel_multi_index(([2, 3, 4, 3], [2, 3, 2, 4]), _SHAPE)
    cells_b = np.ravel_multi_index(([15, 16, 17, 16], [19, 20, 21, 21]), _SHAPE)
    near_b = np.zeros(_SHAPE, bool)
    near_b[12:, 16:] = True
    a = ov.OverlapTaxon("A", cells=cells_a, accessible=~near_b)
    b = ov.OverlapTaxon("B", cells=cells_b, accessible=near_b)
    tests = ov.OverlapTestParameters(n_replicates=19, random_state=5)
    new = ov.geographic_similarity_test(model, a, b, 1.0, test_parameters=tests)
    t = new["D"]
    assert t.direction == "ab" and t.space == "geographic" and t.n_replicates == 19
    assert t.observed == pytest.approx(
        ov.geographic_overlap(model(cells_a), model(cells_b), 1.0)[0]
    )
    with pytest.warns(ScreenerDeprecationWarning, match=r"OverlapTaxon\(name, cells="):
        old = ov.geographic_similarity_test(
            model, model(cells_a), near_b, 4, 1.0, observed_map_moved=model(cells_b),
            direction="ab", n_replicates=19, random_state=5,
        )
    assert_allclose(old["D"].null, t.null, rtol=0, atol=0)
    assert old["D"].p_value == t.p_value and old["I"].p_value == new["I"].p_value
    with pytest.warns(ScreenerDeprecationWarning):
        by_keyword = ov.geographic_similarity_test(
            model, map_fixed=model(cells_a), accessible_moved=near_b, n_moved=4,
            cell_area_km2=1.0, observed_map_moved=model(cells_b), n_replicates=19,
            random_state=5,
        )
    assert_allclose(by_keyword["D"].null, t.null, rtol=0, atol=0)
    # "ba" keeps B and moves A's records within A's accessible area
    back = ov.geographic_similarity_test(model, a, b, 1.0, direction="ba",
                                         test_parameters=tests)["D"]
    assert back.direction == "ba" and back.observed == pytest.approx(t.observed)
    with pytest.raises(InputError, match="accessible"):
        ov.geographic_similarity_test(model, a, ov.OverlapTaxon("B", cells=cells_b),
                                      1.0, test_parameters=tests)


def _two_sites(rows, cols, n, rng):
    """``n`` distinct cells within 1 cell of (row, col) (one collecting site)."""
    rr, cc = np.meshgrid(np.arange(rows - 1, rows + 2), np.arange(cols - 1, cols + 2),
                         indexing="ij")
    pick = rng.choice(9, n, replace=False)
    return np.ravel_multi_index((rr.ravel()[pick], cc.ravel()[pick]), _SHAPE)


def test_geographic_equivalency_keeping_sites_cannot_reject_two_sites_per_taxon():
    # Each taxon at two tight sites far apart: record by record the split rejects;
    # keeping the sites (whole units, Anderson & ter Braak 2003, from memory) there
    # are C(4, 2) = 6 splits, the observed one and its mirror give the observed D,
    # so p >= 1/3 up to Monte Carlo noise, and at most 3 distinct null values.
    rng = np.random.default_rng(31)
    model = _BumpModel()
    cells_a = np.concatenate([_two_sites(3, 3, 4, rng), _two_sites(3, 12, 4, rng)])
    cells_b = np.concatenate([_two_sites(16, 12, 4, rng), _two_sites(16, 21, 4, rng)])
    plain = ov.geographic_equivalency_test(model, cells_a, cells_b, 1.0,
                                           n_replicates=99, random_state=4)
    sites = ov.geographic_equivalency_test(model, cells_a, cells_b, 1.0,
                                           n_replicates=99, random_state=4,
                                           cluster_km=2.0)
    assert plain["D"].p_value <= 0.02
    assert sites["D"].p_value >= 0.2
    assert len(np.unique(np.round(sites["D"].null, 9))) <= 3
    # the link is measured in km: cells of 4 km2 are 2 km wide, so 4 km is the same
    # 2 cells and gives the same null (D with equal weights does not change)
    again = ov.geographic_equivalency_test(model, cells_a, cells_b, 4.0,
                                           n_replicates=99, random_state=4,
                                           cluster_km=4.0)
    assert_allclose(again["D"].null, sites["D"].null)


def test_geographic_similarity_keeping_sites_moves_whole_sites():
    # The random records of the moved taxon keep its sites' shapes (Fortin & Dale
    # 2005, restricted randomisation, from memory): every replicate's cells form
    # groups whose spread matches the sites', not scattered cells.
    rng = np.random.default_rng(32)
    cells_b = np.concatenate([_two_sites(15, 17, 5, rng), _two_sites(6, 20, 5, rng)])
    cells_a = _two_sites(3, 3, 5, rng)
    seen = []

    class Recording(_BumpModel):
        def __call__(self, cells):
            seen.append(np.asarray(cells).copy())
            return super().__call__(cells)

    model = Recording()
    a = ov.OverlapTaxon("A", cells=cells_a, accessible=np.ones(_SHAPE, bool))
    b = ov.OverlapTaxon("B", cells=cells_b, accessible=np.ones(_SHAPE, bool))
    tests = ov.OverlapTestParameters(n_replicates=19, random_state=6, cluster_km=2.5)
    ov.geographic_similarity_test(model, a, b, 1.0, test_parameters=tests)
    draws = [c for c in seen if len(c) == 10][1:]  # after the observed fit of B
    assert len(draws) == 19
    for cells in draws:
        rows, cols = np.unravel_index(cells, _SHAPE)
        for part in (slice(0, 5), slice(5, 10)):  # each site lands in one piece
            spread = np.hypot(rows[part] - rows[part].mean(),
                              cols[part] - cols[part].mean()).max()
            # within the 3 x 3 block (2 sqrt 2 from its centroid) plus the landing
            # tolerance of pattern_draws (2 cells)
            assert spread <= 2 * np.sqrt(2) + 2.0
    # without the link the same test draws scattered cells
    seen.clear()
    plain = ov.OverlapTestParameters(n_replicates=19, random_state=6)
    ov.geographic_similarity_test(model, a, b, 1.0, test_parameters=plain)
    spreads = [np.hypot(*(np.array(np.unravel_index(c[:5], _SHAPE)).T
                          - np.array(np.unravel_index(c[:5], _SHAPE)).T.mean(0)).T).max()
               for c in [c for c in seen if len(c) == 10][1:]]
    assert np.median(spreads) > 4.0


def test_old_form_of_environmental_space_gives_the_same_space():
    rng = np.random.default_rng(24)
    ra, rb, ba, bb = _pair(rng, shift=0.6, n=10)
    places = _places(rng, 10, 10, 600)
    new = _space(ra, rb, ba, bb, places=places, env_available=ba, lonlat=False,
                 predictor_names=("heat", "rain", "soil"), grid_cells=20,
                 available_quantile=0.1)
    with pytest.warns(ScreenerDeprecationWarning) as caught:
        old = ov.environmental_space(
            ra, rb, ba, bb, env_available=ba, grid_cells=20, available_quantile=0.1,
            predictor_names=("heat", "rain", "soil"), places=places, lonlat=False,
        )
    said = " ".join(str(w.message) for w in caught)
    assert "OverlapTaxon(name, env_records=..." in said
    assert "shared=SharedSpace(env_available=..., predictor_names=..., lonlat=...)" in said
    assert "EnvironmentalSpaceParameters(grid_cells=..., available_quantile=...)" in said
    for which in ("a", "b"):
        for name in ("occupancy", "available", "xy_records", "xy_background"):
            assert np.array_equal(getattr(old.taxon(which), name),
                                  getattr(new.taxon(which), name))
    assert np.array_equal(old.z_env, new.z_env)
    assert (old.predictor_names, old.lonlat, old.available_quantile) == (
        new.predictor_names, new.lonlat, new.available_quantile)


def test_parameter_values_refuse_what_the_tests_cannot_run():
    with pytest.raises(InputError, match="grid_cells"):
        ov.EnvironmentalSpaceParameters(grid_cells=5)
    with pytest.raises(InputError, match="available_quantile"):
        ov.EnvironmentalSpaceParameters(available_quantile=1.0)
    with pytest.raises(InputError, match="n_replicates"):
        ov.OverlapTestParameters(n_replicates=0)
    with pytest.raises(InputError, match="hypothesis"):
        ov.OverlapTestParameters(hypothesis="greater")
    with pytest.raises(InputError, match="alpha"):
        ov.OverlapTestParameters(alpha=1.5)
    with pytest.raises(InputError, match="cluster_km"):
        ov.OverlapTestParameters(cluster_km=float("nan"))
    # defaults are the project file's (screener.project.default)
    from screener.project import default

    t = ov.OverlapTestParameters()
    assert (t.n_replicates, t.hypothesis, t.alpha) == (
        default("overlap", "n_replicates"), default("overlap", "similarity_hypothesis"),
        default("overlap", "alpha"))
    assert ov.EnvironmentalSpaceParameters().grid_cells == default("overlap", "grid_cells")


def test_parameter_values_read_a_loaded_project(tmp_path):
    from screener.project import settings_from_dict

    (tmp_path / "records.csv").write_text("taxon,longitude,latitude\nA,10.1,-5.1\n")
    (tmp_path / "heat.tif").write_bytes(b"")  # only its name is read here
    s = settings_from_dict(
        {"occurrences": {"path": "records.csv"}, "layers": {"paths": ["*.tif"]},
         "project": {"random_state": 7},
         "overlap": {"n_replicates": 49, "grid_cells": 20, "alpha": 0.1,
                     "similarity_hypothesis": "diverged"}},
        base_dir=tmp_path,
    )
    t = ov.OverlapTestParameters.from_settings(s, cluster_km=2.5)
    assert (t.n_replicates, t.hypothesis, t.alpha, t.random_state, t.cluster_km) == (
        49, "diverged", 0.1, 7, 2.5)
    assert ov.EnvironmentalSpaceParameters.from_settings(s).grid_cells == 20


def test_reading_says_when_too_few_sites_let_equivalency_reject():
    # Each taxon's records at one collecting site, clearly different niches: keeping
    # the sites, the only splits are the observed one and its mirror, so every
    # replicate ties with the observed D and p = 1 (ties count: p >= tie share).
    # The reading must say the test could not reject, not leave "p = 1" to be read
    # as "equivalent".
    rng = np.random.default_rng(33)
    ra, rb, ba, bb = _pair(rng, shift=2.0, n=10, n_bg=300)
    xy_a = rng.uniform(0, 2, (10, 2))
    xy_b = rng.uniform(0, 2, (10, 2)) + [50.0, 0.0]
    bg_xy = rng.uniform(0, 60, (300, 2))
    model = _BumpModel()
    cells = np.ravel_multi_index(([2, 3, 4], [2, 3, 2]), _SHAPE)
    a = ov.OverlapTaxon("Alpha", model(cells), env_records=ra, env_background=ba,
                        xy_records=xy_a, xy_background=bg_xy)
    b = ov.OverlapTaxon("Beta", model(cells + 5), env_records=rb, env_background=bb,
                        xy_records=xy_b, xy_background=bg_xy)
    common = dict(shared=ov.SharedSpace(cell_area_km2=1.0, lonlat=False),
                  space_parameters=ov.EnvironmentalSpaceParameters(grid_cells=20))
    sites = ov.compare_pair(a, b, test_parameters=ov.OverlapTestParameters(
        n_replicates=49, cluster_km=3.0), **common)
    t = sites.environmental.test("equivalency")
    assert t.tie_share == 1.0 and t.p_value == 1.0
    assert "could not reach p < 0.05" in sites.plain_reading()
    records = ov.compare_pair(a, b, test_parameters=ov.OverlapTestParameters(
        n_replicates=49), **common)
    assert records.environmental.test("equivalency").tie_share < 0.05
    assert "could not reach" not in records.plain_reading()


def test_compare_pair_rows_and_reading():
    rng = np.random.default_rng(30)
    ra, rb, ba, bb = _pair(rng, shift=1.5, n=15, n_bg=300)
    model = _BumpModel()
    cells_a = np.ravel_multi_index(([2, 3, 4], [2, 3, 2]), _SHAPE)
    cells_b = np.ravel_multi_index(([6, 7, 5], [8, 9, 9]), _SHAPE)
    alpha = ov.OverlapTaxon("Alpha", model(cells_a), env_records=ra, env_background=ba)
    beta = ov.OverlapTaxon("Beta", model(cells_b), env_records=rb, env_background=bb)
    new = dict(shared=ov.SharedSpace(cell_area_km2=1.0),
               test_parameters=ov.OverlapTestParameters(n_replicates=99, random_state=0),
               space_parameters=ov.EnvironmentalSpaceParameters(grid_cells=30))
    res = ov.compare_pair(alpha, beta, **new)
    rows = res.rows()
    assert [r["space"] for r in rows] == ["geographic", "environmental"]
    for r in rows:
        assert tuple(r) == ov.OVERLAP_COLUMNS
        assert r["n_replicates"] == 99 and r["similarity_hypothesis"] == "conserved"
    geo, env = rows
    # geographic tests were not run: p-values are NaN, not invented
    assert all(
        math.isnan(geo[k])
        for k in ("equivalency_p", "similarity_p_ab", "similarity_p_ba")
    )
    assert math.isnan(geo["stability"])
    assert geo["D"] == pytest.approx(ov.schoener_d(model(cells_a), model(cells_b)))
    assert 0 < env["equivalency_p"] <= 1 and 0 < env["similarity_p_ba"] <= 1
    assert env["equivalency_p_replicates"] == 99
    assert env["D_tested"] == env["D"]  # environmental tests test the reported D
    assert env["stability"] + env["expansion"] == pytest.approx(1.0)
    # the pair's own p-values are Holm-corrected together (Holm 1979)
    raw = [env[k] for k in ("equivalency_p", "similarity_p_ab", "similarity_p_ba")]
    holm = [env[f"{k}_holm"] for k in ("equivalency_p", "similarity_p_ab",
                                         "similarity_p_ba")]
    assert_allclose(holm, ov.holm_adjust(raw))
    reading = res.plain_reading()
    assert "Alpha and Beta" in reading and "hypothesis" in reading
    assert "not equivalent" in reading  # shift of 1.5 with 15 records
    assert "Holm's correction covered the 3 p-values" in reading
    # the same call twice gives the same table
    again = ov.compare_pair(alpha, beta, **new)
    assert again.rows()[1]["equivalency_p"] == env["equivalency_p"]
    # the old forms, one keyword per taxon and per option, give the same numbers
    import pandas as pd

    with pytest.warns(ScreenerDeprecationWarning) as caught:
        old = ov.compare_pair(
            "Alpha", "Beta", map_a=model(cells_a), map_b=model(cells_b),
            cell_area_km2=1.0, env_records_a=ra, env_records_b=rb,
            env_background_a=ba, env_background_b=bb, n_replicates=99,
            grid_cells=30, random_state=0,
        )
    said = " ".join(str(w.message) for w in caught)
    assert "OverlapTaxon" in said
    assert "shared=SharedSpace(cell_area_km2=...)" in said
    assert "space_parameters=EnvironmentalSpaceParameters(grid_cells=...)" in said
    assert "OverlapTestParameters(n_replicates=..., random_state=...)" in said
    assert pd.DataFrame(old.rows()).equals(pd.DataFrame(res.rows()))  # NaN == NaN
    with pytest.warns(ScreenerDeprecationWarning, match="test_parameters="):
        old = ov.compare_pair(alpha, beta, cell_area_km2=1.0, n_replicates=99,
                              grid_cells=30, random_state=0)
    assert pd.DataFrame(old.rows()).equals(pd.DataFrame(res.rows()))
    with pytest.raises(TypeError, match="give them inside test_parameters"):
        ov.compare_pair(alpha, beta, n_replicates=9, **new)
    with pytest.raises(InputError, match="cell areas"):
        ov.compare_pair(alpha, beta)


def test_compare_pair_geographic_tests_and_budget():
    model = _BumpModel()
    cells_a = np.ravel_multi_index(([2, 3, 4], [2, 3, 2]), _SHAPE)
    cells_b = np.ravel_multi_index(([3, 4, 2], [3, 2, 4]), _SHAPE)
    access = np.ones(_SHAPE, bool)
    a = ov.OverlapTaxon("A", model(cells_a), cells=cells_a, accessible=access)
    b = ov.OverlapTaxon("B", model(cells_b), cells=cells_b, accessible=access)
    shared = ov.SharedSpace(cell_area_km2=1.0)
    res = ov.compare_pair(a, b, shared=shared, geographic_fit_predict=model,
                          test_parameters=ov.OverlapTestParameters(n_replicates=9))
    assert res.environmental is None
    (row,) = res.rows()
    assert all(
        0 < row[k] <= 1 for k in ("equivalency_p", "similarity_p_ab", "similarity_p_ba")
    )
    # near-identical ranges: the equivalency test cannot tell them apart
    assert row["equivalency_p"] > 0.05
    assert (
        "do not tell their niches apart" in res.plain_reading()
        or "more like" in res.plain_reading()
    )
    # the geographic tests' statistic is labelled beside the reported D
    assert row["D_tested"] == pytest.approx(
        ov.geographic_overlap(model(cells_a), model(cells_b), 1.0)[0]
    )
    skipped = ov.compare_pair(
        a, b, shared=shared, geographic_fit_predict=model,
        test_parameters=ov.OverlapTestParameters(n_replicates=9, geographic_budget_s=0))
    assert math.isnan(skipped.rows()[0]["equivalency_p"])


def test_pairwise_table_is_symmetric():
    grid_maps = {
        name: _BumpModel()(np.ravel_multi_index(([r], [c]), _SHAPE))
        for name, r, c in (("x", 3, 3), ("y", 8, 10), ("z", 15, 20))
    }
    names = sorted(grid_maps)
    results = [
        ov.compare_pair(ov.OverlapTaxon(a, grid_maps[a]), ov.OverlapTaxon(b, grid_maps[b]),
                        shared=ov.SharedSpace(cell_area_km2=1.0))
        for i, a in enumerate(names)
        for b in names[i + 1 :]
    ]
    table = ov.pairwise_table(results, space="geographic")
    assert list(table.index) == names and list(table.columns) == names
    assert_allclose(table.to_numpy(), table.to_numpy().T)
    assert_allclose(np.diag(table.to_numpy()), 1.0)
    assert table.loc["x", "z"] < table.loc["x", "y"]  # farther apart, less overlap
    assert table.loc["y", "z"] == pytest.approx(
        ov.geographic_overlap(grid_maps["y"], grid_maps["z"], 1.0)[0]
    )


# --------------------------------------------------------------------------------------
# Figures (artists, not pixels)
# --------------------------------------------------------------------------------------


def test_figures_draw_the_tested_value_and_both_niches():
    from screener.outputs.overlap_figures import (
        niche_core,
        plot_niches,
        plot_null_distribution,
    )

    rng = np.random.default_rng(40)
    ra, rb, ba, bb = _pair(rng, shift=0.8, n=12)
    space = _space(
        ra, rb, ba, bb, grid_cells=25, predictor_names=("heat", "rain", "soil")
    )
    test = ov.equivalency_test(space, n_replicates=19)["D"]
    fig = plot_null_distribution(test, reported_d=0.5)
    ax = fig.axes[0]
    assert any(np.allclose(line.get_xdata(), test.observed) for line in ax.lines)
    assert any(np.allclose(line.get_xdata(), 0.5) for line in ax.lines)
    assert test.p_text() in ax.get_title()
    fig = plot_niches(space, names=("Alpha", "Beta"))
    ax = fig.axes[0]
    d = ov.environmental_overlap(space)[0]
    assert f"D = {d:.2f}" in ax.get_title()
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    assert "both niches (overlap)" in labels and "Alpha records (12)" in labels
    # the overlap colour marks exactly the cells in both niches
    rgb = ax.images[0].get_array()[..., :3]
    both = np.all(np.isclose(rgb, [0.0, 158 / 255, 115 / 255]), axis=-1)
    assert np.array_equal(
        both, niche_core(space.a.occupancy) & niche_core(space.b.occupancy)
    )
    assert len(ax.collections) == 2  # one marker set per taxon
    assert "more" in ax.get_xlabel() or "less" in ax.get_xlabel()
    # a niche core holds at least 90 % of the occupancy, and is the smallest such set
    core = niche_core(space.a.occupancy)
    occ = space.a.occupancy
    assert occ[core].sum() >= 0.9 * occ.sum()
    assert occ[core].sum() - occ[core].min() < 0.9 * occ.sum()


def test_a_run_is_holm_corrected_over_every_pair_test_and_space():
    # Holm 1979 over all p-values of the run (pairs x tests x spaces): each pair's
    # adjusted values equal holm_adjust of every p-value of the run together.
    rng = np.random.default_rng(31)
    model = _BumpModel()
    cmps = []
    for k in range(2):
        ra, rb, ba, bb = _pair(rng, shift=1.0 * k, n=10, n_bg=200)
        cmps.append(ov.compare_pair(
            ov.OverlapTaxon(f"T{k}", model([3, 40]), env_records=ra, env_background=ba),
            ov.OverlapTaxon(f"U{k}", model([60, 90]), env_records=rb, env_background=bb),
            shared=ov.SharedSpace(cell_area_km2=1.0),
            test_parameters=ov.OverlapTestParameters(n_replicates=19, random_state=k),
            space_parameters=ov.EnvironmentalSpaceParameters(grid_cells=20),
        ))
    m = ov.correct_for_multiplicity(cmps, alpha=0.05)
    assert m == 6
    keys = ("equivalency_p", "similarity_p_ab", "similarity_p_ba")
    raw = [c.rows()[1][k] for c in cmps for k in keys]
    adjusted = [c.rows()[1][f"{k}_holm"] for c in cmps for k in keys]
    assert_allclose(adjusted, ov.holm_adjust(raw))
    reading = cmps[0].plain_reading()
    assert "covered the 6 p-values" in reading
    # 19 replicates cannot reach 0.05 / 6: the reading says so
    assert "raise [overlap] n_replicates" in reading


def test_shared_available_cells_come_from_the_union_or_the_study_area():
    mask = np.ones((6, 8), bool)
    mask[0, :] = False
    grid = Grid("EPSG:4326", Affine(1.0, 0, 10.0, 0, -1.0, 50.0), mask.shape, mask=mask)
    acc_a = np.zeros(mask.shape, bool)
    acc_b = np.zeros(mask.shape, bool)
    acc_a[1:3, 0:3] = True
    acc_b[2:5, 2:6] = True
    rows, cols = ov.shared_available_cells(grid, acc_a, acc_b, max_points=1000)
    drawn = np.zeros(mask.shape, bool)
    drawn[rows, cols] = True
    assert np.array_equal(drawn, acc_a | acc_b)  # fewer cells than max_points: all
    rows, cols = ov.shared_available_cells(grid, acc_a, acc_b, study_area=True,
                                           max_points=1000)
    assert len(rows) == mask.sum() and mask[rows, cols].all()
    r1 = ov.shared_available_cells(grid, acc_a, acc_b, max_points=5, random_state=3)
    r2 = ov.shared_available_cells(grid, acc_a, acc_b, max_points=5, random_state=3)
    assert len(r1[0]) == 5 and np.array_equal(r1[0], r2[0]) and (acc_a | acc_b)[r1].all()


def test_reading_says_none_when_no_record_lies_in_analogue_environment():
    # niche dynamics (Guisan et al. 2014, TREE 29:260) describe only records in
    # environment available to both taxa; the reading says how many that is
    env = ov.SpaceComparison(space="environmental", D=0.2, I=0.4, breadth_a=0.1,
                             breadth_b=0.1, analogue_share_a=0.23, analogue_share_b=0.0)
    geo = ov.SpaceComparison(space="geographic", D=0.3, I=0.5, breadth_a=0.1,
                             breadth_b=0.1)
    reading = ov.PairComparison(taxon_a="Alpha", taxon_b="Beta", geographic=geo,
                                environmental=env, space=None, n_replicates=0,
                                hypothesis="conserved").plain_reading()
    assert "Only 23 % of Alpha's records lie in environment available" in reading
    assert "None of Beta's records lie in environment available" in reading
    assert "0 %" not in reading
