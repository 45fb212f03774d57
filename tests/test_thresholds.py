"""Tests of suitability thresholds, their areas and omission."""

import numpy as np
import pytest
from numpy.testing import assert_allclose
from sklearn.metrics import roc_curve

from screener.errors import InputError
from screener.results import Threshold
from screener.thresholds import (
    compute_thresholds,
    max_sss_threshold,
    percentile_training_presence,
)


def test_thresholds_on_a_worked_example():
    scores = np.array([0.9, 0.3, 0.5, 0.7, 0.6, 0.8, 0.45, 0.65, 0.55, 0.75])
    m = np.array([[0.1, 0.3, 0.5], [0.27, 0.8, np.nan]])
    area = np.array([[1.0, 2.0, 3.0], [4.0, 5.0, 6.0]])
    t = compute_thresholds(scores, m, area, relax=0.1)
    assert set(t) == {"mtp", "p10", "relaxed"}
    assert all(isinstance(v, Threshold) for v in t.values())
    # MTP: lowest training score (common practice); covers 0.3, 0.5, 0.8 -> 2 + 3 + 5.
    assert t["mtp"].value == 0.3 and t["mtp"].area_km2 == 10.0
    assert t["mtp"].training_omission == 0.0
    # 10th percentile with n = 10: one record below (common practice).
    assert t["p10"].value == 0.45 and t["p10"].training_omission == pytest.approx(0.1)
    assert t["p10"].area_km2 == 8.0
    # Relaxed MTP: 0.3 * 0.9 = 0.27 takes in the 0.27 cell; the NaN cell never counts.
    assert t["relaxed"].value == pytest.approx(0.27)
    assert t["relaxed"].area_km2 == 14.0


def test_percentile_rule_small_samples():
    assert (
        percentile_training_presence([0.2, 0.4, 0.6]) == 0.2
    )  # n < 10: nothing omitted
    assert percentile_training_presence(np.arange(25) / 25) == 2 / 25  # 2 of 25 omitted


def test_maxsss_matches_youden_threshold():
    """Max sens+spec (Liu et al. 2013, J. Biogeogr. 40:778) = argmax(TPR - FPR) on the
    ROC curve (sklearn.metrics.roc_curve)."""
    rng = np.random.default_rng(0)
    pres = rng.beta(5, 2, size=50)
    bg = rng.beta(2, 4, size=400)
    fpr, tpr, thr = roc_curve(np.r_[np.ones(50), np.zeros(400)], np.r_[pres, bg])
    j = tpr - fpr
    best = thr[j == j.max()]
    t = max_sss_threshold(pres, bg)
    assert t in best
    out = compute_thresholds(pres, bg, 1.0, background_scores=bg)
    assert out["maxsss"].value == t
    assert out["maxsss"].area_km2 == float(np.sum(bg >= t))


def test_scalar_and_broadcast_areas():
    t = compute_thresholds([0.5], np.full((3, 4), 0.6), 2.5)
    assert t["mtp"].area_km2 == 30.0
    t = compute_thresholds([0.5], np.full((3, 4), 0.6), np.array([[1.0], [2.0], [3.0]]))
    assert_allclose(t["mtp"].area_km2, 4 * 6.0)


def test_threshold_errors():
    with pytest.raises(InputError, match="empty"):
        compute_thresholds([], np.zeros(3), 1.0)
    with pytest.raises(InputError, match="missing scores"):
        compute_thresholds([0.2, np.nan], np.zeros(3), 1.0)
    with pytest.raises(InputError, match="relax"):
        compute_thresholds([0.2], np.zeros(3), 1.0, relax=1.5)


def test_maxsss_equals_mtp_exactly_when_background_between_records_is_scarce():
    # Why max-SSS often equals the minimum training presence (MTP) with few records:
    # raising t past the k-th lowest record score costs k/n sensitivity and gains only
    # the background share between the lowest record and there.  By the definition
    # (Liu et al. 2013), max-SSS = MTP when F_bg(s_(k+1)) - F_bg(s_(1)) <= k/n for all
    # k, F_bg the background's empirical distribution (checked against a brute-force
    # search over every candidate threshold).
    rng = np.random.default_rng(4)
    hits = misses = 0
    for _ in range(200):
        n = int(rng.integers(5, 30))
        pres = rng.beta(rng.uniform(1, 8), 1.5, size=n)
        bg = rng.beta(1.0, rng.uniform(1, 8), size=int(rng.integers(50, 400)))
        s = np.sort(pres)
        f = np.searchsorted(np.sort(bg), s, side="left") / bg.size
        condition = all(f[k] - f[0] <= k / n + 1e-12 for k in range(1, n))
        t = max_sss_threshold(pres, bg)
        cand = np.unique(np.r_[pres, bg])
        total = [np.mean(pres >= c) + np.mean(bg < c) for c in cand]
        assert np.mean(pres >= t) + np.mean(bg < t) == pytest.approx(max(total))
        assert (t == s[0]) == condition
        hits += condition
        misses += not condition
    assert hits > 20 and misses > 20  # both cases occur in the draw
