"""Tests of MESS against the published formula worked by hand."""

import numpy as np
import pytest
from numpy.testing import assert_allclose

from screener.errors import InputError
from screener.novelty import mess, similarity


def test_mess_hand_worked():
    """Elith et al. 2010 (Methods Ecol. Evol. 1:330), formula as in methods.md s. 5.

    Reference predictor 1: 1..10 (min 1, max 10, range 9); predictor 2: 0, 10, ..., 90.
    """
    ref = np.column_stack([np.arange(1.0, 11.0), np.arange(0.0, 100.0, 10.0)])
    X = np.array(
        [
            [3.5, 45.0],  # f1 = 30 % -> 60;  f2 = 50 % -> 100; MESS 60 (predictor 0)
            [8.5, 5.0],  # f1 = 80 % -> 40;  f2 = 10 % -> 20;  MESS 20 (predictor 1)
            [-0.8, 50.0],  # f1 = 0: 100 (-0.8 - 1) / 9 = -20;   f2 = 50 % -> 100
            [5.0, 117.0],  # f1 = 40 % -> 80; f2 = 100: 100 (90 - 117) / 90 = -30
            [1.0, 90.0],  # at the minimum: f1 = 0 -> 0; at the maximum f2 = 90 % -> 20
            [5.5, 60.0],  # f1 = 50 % -> 100; f2 = 60 % -> 80 (the 50 < f < 100 branch)
        ]
    )
    s = similarity(ref, X)
    assert_allclose(s, [[60, 100], [40, 20], [-20, 100], [80, -30], [0, 20], [100, 80]])
    m, j = mess(ref, X)
    assert_allclose(m, [60, 20, -20, -30, 0, 80])
    assert j.tolist() == [0, 1, 0, 1, 0, 1]
    assert j.dtype == np.int16


def test_mess_vectorised_matches_loop():
    """searchsorted result equals counting reference values below, row by row."""
    rng = np.random.default_rng(0)
    ref = rng.normal(size=(200, 3))
    X = rng.normal(scale=2.0, size=(500, 3))
    s = similarity(ref, X)
    for i in range(0, 500, 37):
        for k in range(3):
            r = ref[:, k]
            f = 100.0 * np.mean(r < X[i, k])
            lo, hi = r.min(), r.max()
            if f == 0:
                want = 100 * (X[i, k] - lo) / (hi - lo)
            elif f <= 50:
                want = 2 * f
            elif f < 100:
                want = 2 * (100 - f)
            else:
                want = 100 * (hi - X[i, k]) / (hi - lo)
            assert s[i, k] == pytest.approx(want, abs=1e-9)


def test_mess_nan_rows_and_constant_reference():
    ref = np.array([[1.0, 5.0], [2.0, 5.0], [3.0, 5.0]])
    X = np.array([[2.0, 5.0], [2.0, 6.0], [np.nan, 5.0]], dtype=np.float32)
    m, j = mess(ref, X)
    assert m[0] == pytest.approx(0.0)  # at the constant: f = 0 -> 0 (no range)
    assert m[1] == -np.inf and j[1] == 1
    assert np.isnan(m[2]) and j[2] == -1
    with pytest.raises(InputError, match="shape"):
        mess(ref, np.zeros((2, 3)))


def test_mess_is_the_row_minimum_of_the_similarity_matrix():
    # mess() keeps a running minimum over predictors; it must equal the minimum and the
    # first argmin of the full similarity matrix (NaN rows stay NaN, index -1).
    from screener.novelty import similarity

    rng = np.random.default_rng(7)
    ref = rng.normal(size=(200, 5))
    X = rng.normal(scale=2.0, size=(1000, 5))
    X[::17, 2] = np.nan
    X[5, 1] = ref[:, 1].min()  # a tie candidate at the reference minimum
    sim = similarity(ref, X)
    m, idx = mess(ref, X)
    nan_rows = np.isnan(sim).any(axis=1)
    assert np.isnan(m[nan_rows]).all() and (idx[nan_rows] == -1).all()
    ok = ~nan_rows
    np.testing.assert_array_equal(m[ok], sim[ok].min(axis=1))
    np.testing.assert_array_equal(idx[ok], sim[ok].argmin(axis=1))
