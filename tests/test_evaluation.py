"""Tests of evaluation metrics, partitions, jackknife and the null-model test."""

import itertools
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose
from scipy.stats import binom
from sklearn.metrics import roc_auc_score, roc_curve

from screener.errors import InputError, ScreenerDeprecationWarning
from screener.evaluation import (
    EvaluationParameters,
    Points,
    auc,
    block_partition,
    boyce_index,
    checkerboard_partition,
    evaluate_family,
    jackknife,
    null_model_test,
    poisson_binomial_sf,
    random_kfold_partition,
    tss_max,
)


@given(
    st.lists(st.sampled_from([0.0, 0.1, 0.25, 0.5, 0.9, 1.0]), min_size=1, max_size=12),
    st.lists(st.sampled_from([0.0, 0.1, 0.3, 0.5, 0.9]), min_size=1, max_size=12),
)
@settings(max_examples=60, deadline=None)
def test_auc_matches_sklearn(pres, bg):
    """AUC = Mann-Whitney U/(n1 n0); reference sklearn.metrics.roc_auc_score (ties too)."""
    y = np.r_[np.ones(len(pres)), np.zeros(len(bg))]
    assert auc(pres, bg) == pytest.approx(roc_auc_score(y, np.r_[pres, bg]), abs=1e-12)


def test_poisson_binomial_matches_brute_force():
    """Exact P(X >= k) vs enumeration of all 2^n outcomes (definition)."""
    rng = np.random.default_rng(0)
    probs = rng.uniform(size=9)
    pmf = np.zeros(10)
    for outcome in itertools.product([0, 1], repeat=9):
        o = np.array(outcome)
        pmf[o.sum()] += np.prod(np.where(o == 1, probs, 1 - probs))
    for k in range(0, 11):
        assert poisson_binomial_sf(k, probs) == pytest.approx(pmf[k:].sum(), abs=1e-13)


@pytest.mark.parametrize("n, p", [(1, 0.3), (10, 0.05), (25, 0.5), (60, 0.9)])
def test_poisson_binomial_equal_probs_is_binomial(n, p):
    """All probabilities equal: scipy.stats.binom.sf(k - 1, n, p)."""
    for k in range(0, n + 2):
        assert_allclose(
            poisson_binomial_sf(k, np.full(n, p)),
            binom.sf(k - 1, n, p),
            rtol=1e-10,
            atol=1e-15,
        )


def test_tss_max_matches_roc_curve():
    """Max TSS = max(TPR - FPR) over the ROC curve (Youden J; sklearn roc_curve)."""
    rng = np.random.default_rng(2)
    pres = np.round(rng.beta(4, 2, size=40), 2)
    bg = np.round(rng.beta(2, 3, size=300), 2)
    fpr, tpr, _ = roc_curve(np.r_[np.ones(40), np.zeros(300)], np.r_[pres, bg])
    assert tss_max(pres, bg) == pytest.approx(np.max(tpr - fpr), abs=1e-12)


def test_boyce_on_constructed_cases():
    """Hirzel et al. 2006 (Ecol. Modelling 199:142): P/E rising with suitability gives
    +1, falling gives -1, a symmetric hump gives 0."""
    bg = np.linspace(0, 1, 2001)  # uniform background: E is the same in every window
    w = bg.copy()
    rising = np.repeat(bg, np.round(10 * w).astype(int))  # presences ~ suitability
    falling = np.repeat(bg, np.round(10 * (1 - w)).astype(int))
    assert boyce_index(rising, bg) == pytest.approx(1.0, abs=1e-9)
    assert boyce_index(falling, bg) == pytest.approx(-1.0, abs=1e-9)
    hump = np.repeat(bg, np.round(20 * np.minimum(w, 1 - w)).astype(int))
    assert abs(boyce_index(hump, bg)) < 0.05
    # Presences distributed as the background: P/E == 1 everywhere, index undefined.
    assert math.isnan(boyce_index(bg, bg))


def test_block_partition_quarters():
    rng = np.random.default_rng(3)
    pxy = rng.uniform(size=(40, 2))
    bxy = rng.uniform(size=(500, 2))
    pg, bg = block_partition(pxy, bxy)
    assert np.bincount(pg).tolist() == [10, 10, 10, 10]
    x_cut = np.median(pxy[:, 0])
    assert np.all((pg >= 2) == (pxy[:, 0] > x_cut))
    assert np.all((bg >= 2) == (bxy[:, 0] > x_cut))
    for g in range(4):  # the background of a block shares its bounding box
        pb = pxy[pg == g]
        side_x = (bxy[bg == g, 0] > x_cut) == (pb[0, 0] > x_cut)
        assert side_x.all()


def test_checkerboard_and_random_kfold():
    pxy = np.array([[0.5, 0.5], [1.5, 0.5], [0.5, 1.5], [1.5, 1.5]])
    pg, bg = checkerboard_partition(pxy, pxy + 2.0, block_size=1.0)
    assert pg.tolist() == [0, 1, 1, 0] and bg.tolist() == [0, 1, 1, 0]
    pg, bg = random_kfold_partition(23, 100, k=5, random_state=1)
    assert sorted(np.bincount(pg)) == [4, 4, 5, 5, 5]
    with pytest.raises(InputError, match="folds"):
        random_kfold_partition(3, 10, k=5)


@pytest.fixture(scope="module")
def small():
    # Invented predictor values: 8 records in a corner of a Gaussian background.
    rng = np.random.default_rng(4)
    bg = rng.normal(size=(600, 2))
    pres = rng.normal([1.2, 1.0], 0.3, size=(8, 2))
    return pres, bg


def test_jackknife_by_hand(small):
    """Pearson et al. 2007 (J. Biogeogr. 34:102): refit without each record, threshold
    at its lowest training presence; p from the Poisson binomial of area shares."""
    from screener.models import make_model

    pres, bg = small
    jk = jackknife("ellipsoid", {}, Points(pres), Points(bg))
    for i in (0, 5):
        keep = np.arange(len(pres)) != i
        m = make_model("ellipsoid").fit(pres[keep], bg)
        thr = m.predict(pres[keep]).min()
        assert jk.thresholds[i] == pytest.approx(thr)
        assert jk.left_out_scores[i] == pytest.approx(m.predict(pres[i : i + 1])[0])
        assert jk.share_present[i] == pytest.approx(np.mean(m.predict(bg) >= thr))
    assert jk.successes == int(np.sum(jk.left_out_scores >= jk.thresholds))
    assert jk.p_value == pytest.approx(
        poisson_binomial_sf(jk.successes, jk.share_present)
    )
    assert jk.p_value < 0.05


def test_buffered_jackknife_holds_out_whole_clusters_by_hand(small):
    """Spatially buffered jackknife (Roberts et al. 2017, Ecography 40:913, from
    memory): records chained within the buffer are held out together, one model and
    one Poisson-binomial trial per cluster (Pearson et al. 2007 otherwise)."""
    from screener.models import make_model

    pres, bg = small
    # km coordinates: records 0-2 chained by 1 km gaps, 3-4 a pair, 5, 6, 7 alone
    xy = np.array([[0, 0], [1, 0], [2, 0], [20, 0], [20, 1], [40, 0], [60, 0],
                   [80, 0]], float)
    jk = jackknife("ellipsoid", {}, Points(pres, xy, lonlat=False), Points(bg),
                   parameters=EvaluationParameters(random_state=0, cluster_km=1.5))
    assert jk.n == 5 and jk.buffer_km == 1.5
    assert len(jk.left_out_scores) == 8
    keep = np.arange(8) >= 3
    m = make_model("ellipsoid").fit(pres[keep], bg)
    thr = m.predict(pres[keep]).min()
    assert_allclose(jk.thresholds[:3], thr)
    assert_allclose(jk.left_out_scores[:3], m.predict(pres[:3]))
    assert jk.share_present[0] == pytest.approx(np.mean(m.predict(bg) >= thr))
    # a buffer that holds nobody else is the published jackknife
    plain = jackknife("ellipsoid", {}, Points(pres), Points(bg))
    alone = jackknife("ellipsoid", {}, Points(pres, xy, lonlat=False), Points(bg),
                      parameters=EvaluationParameters(cluster_km=0.5))
    assert alone.n == 8 and alone.buffer_km == 0.0
    assert_allclose(alone.left_out_scores, plain.left_out_scores)
    assert alone.p_value == pytest.approx(plain.p_value)
    # every record in one cluster leaves nothing to train on: no model, no p
    none = jackknife("ellipsoid", {}, Points(pres, xy, lonlat=False), Points(bg),
                     parameters=EvaluationParameters(cluster_km=100.0))
    assert none.n == 0 and np.isnan(none.p_value)


def test_jackknife_area_weights(small):
    pres, bg = small
    # Weight only the cells far from the records: share predicted present drops.
    far = np.linalg.norm(bg - [1.2, 1.0], axis=1) > 1.5
    w = np.where(far, 1.0, 0.0)
    P, B = Points(pres), Points(bg)
    jk_w = jackknife("ellipsoid", {}, P, B, study_area=Points(bg, area_km2=w))
    jk = jackknife("ellipsoid", {}, P, B, study_area=B)
    assert np.all(jk_w.share_present <= jk.share_present)
    with pytest.raises(InputError, match="non-negative cell"):
        jackknife("ellipsoid", {}, P, B, study_area=Points(bg, area_km2=w[:5]))


def test_parallel_map_gives_same_result(small):
    """Seeds are drawn up front: a different map (here reversed order) changes nothing."""
    pres, bg = small

    def reversed_map(fn, items):
        items = list(items)
        out = [fn(t) for t in reversed(items)]
        return list(reversed(out))

    P, B = Points(pres), Points(bg)
    seven = EvaluationParameters(random_state=7)
    a = jackknife("forest", {"n_estimators": 20}, P, B, parameters=seven)
    b = jackknife("forest", {"n_estimators": 20}, P, B, parameters=seven,
                  map_fn=reversed_map)
    assert_allclose(a.left_out_scores, b.left_out_scores)
    five = EvaluationParameters(n_null=5, random_state=1)
    na = null_model_test("ellipsoid", {}, P, B, parameters=five)
    nb = null_model_test("ellipsoid", {}, P, B, parameters=five, map_fn=reversed_map)
    assert_allclose(na.null, nb.null)


def test_null_model_p_value_formula(small):
    """Raes & ter Steege 2007 (Ecography 30:727): p = (1 + #null >= obs) / (1 + R)."""
    pres, bg = small
    nm = null_model_test("ellipsoid", {}, Points(pres), Points(bg),
                         parameters=EvaluationParameters(n_null=19))
    assert nm.null.shape == (19,)
    assert nm.p_value == pytest.approx((1 + np.sum(nm.null >= nm.observed)) / 20)
    assert nm.observed > np.median(nm.null)


def test_evaluate_family_small_sample_uses_jackknife(small):
    pres, bg = small
    ev = evaluate_family("envelope", None, Points(pres), Points(bg),
                         parameters=EvaluationParameters(n_null=9))
    assert ev.method == "jackknife" and ev.n_records == 8
    assert ev.jackknife_successes is not None and 0 <= ev.jackknife_p <= 1
    assert math.isnan(ev.boyce) and math.isnan(
        ev.tss
    )  # not defined for one test record
    row = ev.as_row()
    assert row["algorithm"] == "envelope" and row["method"] == "jackknife"
    assert 0.1 <= row["auc_null_p"] <= 1.0


@pytest.mark.parametrize("partition", ["quadrants", "squares", "random"])
def test_evaluate_family_partitions(partition):
    rng = np.random.default_rng(5)
    bg = rng.normal(size=(800, 2))
    bxy = rng.uniform(0, 10, size=(800, 2))
    pres = rng.normal([1.0, 1.0], 0.4, size=(30, 2))
    pxy = rng.uniform(0, 10, size=(30, 2))
    ev = evaluate_family("ellipsoid", {}, Points(pres, pxy), Points(bg, bxy),
                         parameters=EvaluationParameters(partition=partition, n_null=0))
    assert ev.method == partition
    assert ev.n_folds == {"quadrants": 4, "squares": 2, "random": 5}[partition]
    assert 0.8 < ev.auc <= 1.0 and ev.boyce > 0 and 0 < ev.tss <= 1
    assert 0 <= ev.omission_mtp <= ev.omission_p10 <= 1
    assert ev.jackknife_p is None and math.isnan(ev.auc_null_p)


def test_evaluate_family_without_coordinates_falls_back_to_random():
    rng = np.random.default_rng(6)
    bg = rng.normal(size=(300, 2))
    pres = rng.normal(1.0, 0.4, size=(26, 2))
    ev = evaluate_family("ellipsoid", {}, Points(pres), Points(bg),
                         parameters=EvaluationParameters(n_null=0))
    assert ev.method == "random"
    with pytest.raises(InputError, match="Unknown partition"):
        EvaluationParameters(partition="stripes", n_null=0)


def test_evaluate_family_gives_ppm_the_spatial_blocks():
    """The mapped ppm chooses its penalty over the records' spatial blocks (4 quadrants)."""
    rng = np.random.default_rng(7)
    bg = rng.normal(size=(600, 2))
    bxy = rng.uniform(0, 10, size=(600, 2))
    pres = rng.normal([1.0, 1.0], 0.4, size=(30, 2))
    pxy = rng.uniform(0, 10, size=(30, 2))
    kw = {"n_blocks": 5, "n_penalties": 3}
    no_null = EvaluationParameters(n_null=0)
    with_xy = evaluate_family("ppm", kw, Points(pres, pxy), Points(bg, bxy),
                              parameters=no_null).extra["model"]
    assert with_xy.n_blocks_ == 4
    without = evaluate_family("ppm", kw, Points(pres), Points(bg),
                              parameters=no_null).extra["model"]
    assert without.n_blocks_ == 5


def _clustered_no_signal(rng, z, slope, n_pool=3000):
    """Ten records in two tight spatial clusters on real terrain, no niche signal."""
    rows, cols = np.nonzero(np.isfinite(z))
    pick = rng.choice(len(rows), n_pool, replace=False)
    pr, pc = rows[pick], cols[pick]
    env = np.column_stack([z[pr, pc], slope[pr, pc]])
    xy = np.column_stack([-84.0 + pc * 0.00083, 36.3 - pr * 0.00083])
    rec = []
    for _ in range(2):
        centre = rng.integers(n_pool)
        near = np.flatnonzero(np.hypot(pr - pr[centre], pc - pc[centre]) <= 6)
        rec.extend(rng.choice(near, 5, replace=len(near) < 5))
    rec = np.asarray(rec)
    return env[rec], xy[rec], env, xy


@pytest.mark.slow
def test_null_model_keeps_the_records_spatial_pattern():
    # Raes & ter Steege 2007 null model on real terrain (matplotlib's sample DEM
    # jacksboro_fault_dem.npz via matplotlib.cbook.get_sample_data).  Ten records in
    # two clusters carry no niche signal: random scattered points make such a sample
    # look significant; random placements of the same pattern (Fortin & Dale 2005,
    # restricted randomisation, from memory) should not.  12 draws, R = 19, so a
    # calibrated test rejects (p <= 0.05) with probability 1/20 per draw.
    from matplotlib import cbook

    z = np.asarray(cbook.get_sample_data("jacksboro_fault_dem.npz")["elevation"], float)
    gy, gx = np.gradient(z)
    slope = np.hypot(gx, gy)
    rng = np.random.default_rng(2026)
    scattered = patterned = 0
    for k in range(12):
        pres, pxy, pool, qxy = _clustered_no_signal(rng, z, slope)
        opts = EvaluationParameters(n_null=19, random_state=k)
        plain = null_model_test("ellipsoid", {}, Points(pres), Points(pool),
                                parameters=opts)
        kept = null_model_test("ellipsoid", {}, Points(pres, pxy), Points(pool, qxy),
                               parameters=opts)
        assert kept.structured and not plain.structured
        scattered += plain.p_value <= 0.05
        patterned += kept.p_value <= 0.05
    assert scattered >= 6  # the defect the pattern-keeping null removes
    assert patterned <= 3  # binomial(12, 0.05): P(X >= 4) < 0.3 %


def test_pattern_draws_keep_distances_between_records():
    # A rotation plus a translation keeps every distance between records, up to the
    # snap to a cell: each record moves at most 2 cell spacings (the acceptance
    # tolerance), so a distance changes by at most 4.
    from screener.evaluation import pattern_draws

    g = np.stack(np.meshgrid(np.arange(60.0), np.arange(60.0)), -1).reshape(-1, 2)
    rec = np.array([[10.0, 10.0], [11.0, 10.0], [10.0, 12.0], [30.0, 31.0]])
    draws = pattern_draws(rec, g, 20, random_state=3, lonlat=False)
    d0 = np.hypot(*(rec[:, None, :] - rec[None, :, :]).transpose(2, 0, 1))
    for idx in draws:
        moved = g[idx]
        d = np.hypot(*(moved[:, None, :] - moved[None, :, :]).transpose(2, 0, 1))
        assert np.all(np.abs(d - d0) <= 4.0 + 1e-9)
        assert np.mean(np.abs(d - d0)) <= 1.0
    assert len({tuple(idx) for idx in draws}) > 10


def test_consensus_is_evaluated_like_a_family():
    # The consensus map is the weighted mean of the families (Araujo & New 2007); as
    # a model it must predict exactly that mean, and get the same evaluation columns
    # (jackknife p below 25 records, null-model p) as any family.
    from screener.models import make_model
    from screener.models.ensemble import ConsensusModel

    rng = np.random.default_rng(8)
    bg = rng.normal(size=(300, 2))
    pres = rng.normal([1.0, 0.5], 0.4, size=(12, 2))
    weights = {"ellipsoid": 0.7, "envelope": 0.3}
    cm = ConsensusModel({"ellipsoid": {}, "envelope": {}}, weights).fit(pres, bg)
    want = 0.7 * make_model("ellipsoid").fit(pres, bg).predict(bg) + 0.3 * make_model(
        "envelope").fit(pres, bg).predict(bg)
    assert_allclose(cm.predict(bg), want, rtol=1e-12)
    ev = evaluate_family(
        "consensus", {"families": {"ellipsoid": {}, "envelope": {}}, "weights": weights},
        Points(pres), Points(bg), parameters=EvaluationParameters(n_null=9, random_state=1),
    )
    row = ev.as_row()
    assert row["method"] == "jackknife" and 0 < row["jackknife_p"] <= 1
    assert 0 < row["auc_null_p"] <= 1 and 0.5 < row["auc"] <= 1
    assert "Boyce" in row["note"]  # says why Boyce and TSS are empty


def test_family_evaluation_says_why_a_clustered_jackknife_is_empty(small):
    pres, bg = small
    xy = np.array([[0, 0], [1, 0], [2, 0], [20, 0], [20, 1], [40, 0], [60, 0],
                   [80, 0]], float)
    # one chain of records (100 km links): nothing can be held out with its cluster
    records, background = Points(pres, xy, lonlat=False), Points(bg, bg, lonlat=False)
    one = evaluate_family("ellipsoid", {}, records, background,
                          parameters=EvaluationParameters(n_null=0, cluster_km=100.0))
    assert np.isnan(one.auc) and one.n_folds == 0
    assert one.note.startswith("No jackknife") and "100.0 km" in one.note
    # clusters that can be held out: the usual note, no claim of untested records
    some = evaluate_family("ellipsoid", {}, records, background,
                           parameters=EvaluationParameters(n_null=0, cluster_km=1.5))
    assert some.n_folds == 5 and "not tested" not in some.note


# --- the old form (arrays and one keyword per option) keeps working for one release ---
def _same(a, b):
    """Two results of the same call: equal field by field (NaN equal to NaN)."""
    for k, v in vars(a).items():
        w = getattr(b, k)
        if isinstance(v, np.ndarray):
            assert_allclose(v, w, rtol=0, atol=0, equal_nan=True)
        elif k != "extra":
            assert v == w or (v != v and w != w), k


@pytest.fixture(scope="module")
def placed(small):
    """The small sample with km coordinates (two chained clusters) and cell areas."""
    pres, bg = small
    rng = np.random.default_rng(9)
    pxy = np.array([[0, 0], [1, 0], [2, 0], [20, 0], [20, 1], [40, 0], [60, 0],
                    [80, 0]], float)
    bxy = rng.uniform(-10, 90, size=(len(bg), 2))
    area = rng.uniform(0.5, 1.0, size=len(bg))
    return pres, bg, pxy, bxy, area


def test_old_jackknife_call_warns_and_gives_the_new_result(placed):
    pres, bg, pxy, bxy, area = placed
    new = jackknife("ellipsoid", {}, Points(pres, pxy, lonlat=False), Points(bg),
                    Points(bg, area_km2=area),
                    EvaluationParameters(random_state=3, cluster_km=1.5))
    with pytest.warns(ScreenerDeprecationWarning, match=r"EvaluationParameters\("):
        old = jackknife("ellipsoid", {}, pres, bg, bg, area, 3, presence_xy=pxy,
                        buffer_km=1.5, lonlat=False)
    assert new.buffer_km == 1.5
    _same(new, old)


def test_old_null_model_call_warns_and_gives_the_new_result(placed):
    pres, bg, pxy, bxy, _ = placed
    new = null_model_test("ellipsoid", {}, Points(pres, pxy, lonlat=False),
                          Points(bg, bxy, lonlat=False),
                          parameters=EvaluationParameters(n_null=9, random_state=2,
                                                    cluster_km=1.5))
    with pytest.warns(ScreenerDeprecationWarning, match=r"Points\(presence"):
        old = null_model_test("ellipsoid", {}, pres, bg, n_null=9, random_state=2,
                              presence_xy=pxy, study_area_xy=bxy, lonlat=False,
                              cluster_km=1.5)
    assert new.structured
    _same(new, old)


@pytest.mark.parametrize("n_records", [8, 30])
def test_old_evaluate_family_call_warns_and_gives_the_new_result(placed, n_records):
    pres, bg, pxy, bxy, area = placed
    rng = np.random.default_rng(n_records)
    if n_records > len(pres):  # enough records for folds ("squares")
        pres = rng.normal([1.2, 1.0], 0.3, size=(n_records, 2))
        pxy = rng.uniform(0, 80, size=(n_records, 2))
    new = evaluate_family(
        "ellipsoid", {}, Points(pres, pxy, lonlat=False), Points(bg, bxy, lonlat=False),
        Points(bg, bxy, area, lonlat=False),
        EvaluationParameters(partition="squares", square_size=20.0, n_null=5,
                          random_state=4, cluster_km=1.5))
    with pytest.warns(ScreenerDeprecationWarning, match="square_size=checkerboard_size"):
        old = evaluate_family(
            "ellipsoid", {}, pres, bg, presence_xy=pxy, background_xy=bxy,
            study_area=bg, study_area_weights=area, study_area_xy=bxy,
            partition="squares", checkerboard_size=20.0, n_null=5, random_state=4,
            lonlat=False, cluster_km=1.5)
    assert new.method == ("jackknife" if n_records < 25 else "squares")
    _same(new, old)
    _same(new.extra["null_model"], old.extra["null_model"])


def test_new_form_wants_points_and_one_kind_of_coordinates(small):
    pres, bg = small
    with pytest.raises(TypeError, match="must be a Points value"):
        evaluate_family("ellipsoid", {}, Points(pres), bg)
    xy = np.zeros((len(pres), 2))
    with pytest.raises(InputError, match="one kind"):
        jackknife("ellipsoid", {}, Points(pres, xy), Points(bg, np.zeros((600, 2)),
                                                            lonlat=False))


def test_evaluation_parameters_from_settings():
    from types import SimpleNamespace

    from screener.project import SECTION_TYPES

    settings = SimpleNamespace(evaluation=SECTION_TYPES["evaluation"](jackknife_below=12,
                                                                      n_null=0))
    p = EvaluationParameters.from_settings(settings, random_state=5, cluster_km=2.0)
    assert (p.jackknife_below, p.n_null, p.random_state, p.cluster_km) == (12, 0, 5, 2.0)
    assert p.partition == EvaluationParameters().partition
