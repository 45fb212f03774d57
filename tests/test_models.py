"""Tests of the niche-model families: the estimator contract and the fits themselves."""

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy.special import logsumexp
from scipy.stats import chi2, spearmanr
from sklearn.base import clone
from sklearn.covariance import LedoitWolf
from sklearn.exceptions import NotFittedError
from sklearn.linear_model import PoissonRegressor
from threadpoolctl import threadpool_limits

from screener.errors import InputError, ScreenerDeprecationWarning
from screener.models import (
    FAMILIES,
    DownsampledForest,
    EnvelopeNiche,
    PointProcessNiche,
    fit_taxon_models,
    make_model,
    training_presence_scores,
)
from screener.models.ensemble import (
    agreement_map,
    clade_agreement,
    ensemble_weights,
    weighted_mean_map,
)
from screener.models.inspect import permutation_importance, response_curves

FAST = {"forest": {"n_estimators": 50}, "ppm": {"n_penalties": 4}}


@pytest.fixture(scope="module")
def data():
    # Invented predictor values: the records sit off-centre in a Gaussian background.
    rng = np.random.default_rng(0)
    bg = rng.normal(size=(1500, 3))
    pres = rng.normal([1.0, -0.5, 0.0], 0.4, size=(30, 3))
    return pres, bg


@pytest.mark.parametrize("family", sorted(FAMILIES))
def test_contract(family, data):
    """fit returns self, sets `_` attributes only in fit, clone works, output in [0, 1]."""
    pres, bg = data
    model = make_model(family, **FAST.get(family, {}))
    assert not [k for k in vars(model) if k.endswith("_")]
    with pytest.raises(NotFittedError):
        model.predict(bg)
    assert model.fit(pres, bg) is model
    fitted = [k for k in vars(model) if k.endswith("_")]
    assert "n_features_in_" in fitted
    twin = clone(model)
    assert not [k for k in vars(twin) if k.endswith("_")]
    assert twin.get_params() == model.get_params()
    s = model.predict(bg)
    assert s.shape == (len(bg),) and np.all((s >= 0) & (s <= 1))
    # A float32 stack gives the same answer to float32 precision.
    assert_allclose(model.predict(bg.astype(np.float32)), s, atol=2e-5)
    # Records sit in better environments than the average background cell.
    assert training_presence_scores(model, pres).mean() > s.mean()
    with pytest.raises(InputError, match="predictors but the model was fitted with 3"):
        model.predict(bg[:, :2])


@pytest.mark.parametrize("family", sorted(FAMILIES))
def test_fit_is_deterministic(family, data):
    pres, bg = data
    a = make_model(family, **FAST.get(family, {})).fit(pres, bg).predict(bg[:200])
    b = make_model(family, **FAST.get(family, {})).fit(pres, bg).predict(bg[:200])
    assert_allclose(a, b, rtol=0, atol=0)


def test_chunked_predict_matches_unchunked(data, monkeypatch):
    pres, bg = data
    model = make_model(
        "ppm", terms="linear+quadratic+interaction+hinge+step", l1_penalty=0.02
    ).fit(pres, bg)
    whole = model.predict(bg)
    # The float32 path (knots and slopes folded into predictor units) agrees.
    assert_allclose(model.predict(bg.astype(np.float32)), whole, atol=2e-5)
    monkeypatch.setattr("screener.models.base.CHUNK_ROWS", 97)
    assert_allclose(model.predict(bg), whole, rtol=1e-12)


def test_unknown_family_suggests_name():
    with pytest.raises(InputError, match="Did you mean 'forest'"):
        make_model("forrest")
    with pytest.raises(InputError, match="no parameter 'n_tree'"):
        make_model("forest", n_tree=3)


def test_bad_inputs_raise_input_errors(data):
    pres, bg = data
    bad = pres.copy()
    bad[3, 1] = np.nan
    with pytest.raises(InputError, match="row 3"):
        make_model("ellipsoid").fit(bad, bg)
    with pytest.raises(InputError, match="needs background"):
        make_model("ppm").fit(pres, None)
    with pytest.raises(InputError, match="'cubic' is not a term set"):
        make_model("ppm", terms=["linear", "cubic"]).fit(pres, bg)
    with pytest.raises(InputError, match="l1_penalty"):
        make_model("ppm", l1_penalty=-1.0).fit(pres, bg)


def test_ellipsoid_matches_chi2_of_ledoit_wolf_distance(data):
    """Suitability = chi2 sf of D2 under sklearn's Ledoit-Wolf covariance (Etherington 2019)."""
    pres, bg = data
    model = make_model("ellipsoid", ridge=0.0).fit(pres, bg)
    scale = bg.std(axis=0)
    lw = LedoitWolf().fit(pres / scale)
    d = (bg - pres.mean(axis=0)) / scale
    d2 = np.einsum("ij,jk,ik->i", d, np.linalg.inv(lw.covariance_), d)
    assert_allclose(model.predict(bg), chi2.sf(d2, df=3), rtol=1e-9, atol=1e-300)


def test_envelope_percentile_rule():
    """2*min(F, 1-F) with F the presence percentile (Busby 1991), worked by hand."""
    pres = np.array([[1.0], [2.0], [3.0], [4.0]])
    model = EnvelopeNiche().fit(pres)
    # F at the records: (i - 0.5)/n = 1/8, 3/8, 5/8, 7/8; at 2.5 interpolated to 1/2.
    got = model.predict(np.array([[1.0], [2.0], [2.5], [4.0], [0.5], [4.5]]))
    assert_allclose(got, [0.25, 0.75, 1.0, 0.25, 0.0, 0.0])


def test_ppm_deprecated_names_warn_and_map_to_new_ones(data):
    pres, bg = data
    with pytest.warns(ScreenerDeprecationWarning, match="feature_classes .* deprecated"):
        with pytest.warns(ScreenerDeprecationWarning, match="regularization .* deprecated"):
            old = make_model("ppm", feature_classes="lq", regularization=1.0)
            old.fit(pres, bg)
    new = make_model(
        "ppm", terms=["quadratic", "linear"], l1_penalty=0.5 / np.sqrt(len(pres))
    ).fit(pres, bg)
    assert old.terms_ == new.terms_ == ("linear", "quadratic")
    assert_allclose(old.l1_penalty_, new.l1_penalty_)
    assert_allclose(old.predict(bg), new.predict(bg), rtol=1e-12)
    # selected_params refits without the deprecated names (and without warnings).
    params = {"feature_classes": "lq", "regularization": 1.0}
    params.update(old.selected_params())  # as the null model does
    again = make_model("ppm", **params).fit(pres, bg)
    assert_allclose(again.predict(bg), new.predict(bg), rtol=1e-12)


def test_ppm_path_starts_where_every_term_is_zero(data):
    """lambda_max from the score at zero (lasso KKT conditions; Tibshirani 1996),
    checked against scikit-learn's liblinear solver: just above it no term survives."""
    pres, bg = data
    model = make_model("ppm", n_penalties=5).fit(pres, bg)
    lam_max = model.path_[0]["l1_penalty"] / 0.01 ** (1 / 5)
    above = make_model("ppm", l1_penalty=lam_max * 1.01).fit(pres, bg)
    below = make_model("ppm", l1_penalty=lam_max * 0.9).fit(pres, bg)
    assert above.n_coefficients_ == 0 and below.n_coefficients_ > 0
    # Zero terms: every cell scores the reference level 1 - 1/e.
    assert_allclose(above.predict(bg[:5]), 1 - np.exp(-1.0), rtol=1e-9)


def test_ppm_penalty_has_best_heldout_likelihood(data):
    """The chosen penalty maximises the held-out log density of the left-out block,
    recomputed from separate fits with that penalty on the other blocks."""
    pres, bg = data
    bg = bg[:800]  # below the path's background subset size: the same rows everywhere
    groups = np.arange(len(pres)) % 3
    model = make_model("ppm", n_penalties=6).fit(pres, bg, groups=groups)
    lls = [row["heldout_log_likelihood"] for row in model.path_]
    assert model.l1_penalty_ == model.path_[int(np.argmax(lls))]["l1_penalty"]
    assert model.n_blocks_ == 3
    pens = [row["l1_penalty"] for row in model.path_]
    assert np.all(np.diff(pens) < 0)
    held = np.empty(len(pres))
    for g in range(3):
        fit = make_model("ppm", l1_penalty=model.l1_penalty_).fit(pres[groups != g], bg)
        held[groups == g] = fit.log_density(pres[groups == g])
    # Tolerance ours: the path's fits stop at a looser solver tolerance.
    assert_allclose(held.mean(), model.heldout_log_likelihood_, atol=0.02)


def test_ppm_cloglog_output_reference_level(data):
    """cloglog link 1 - exp(-exp(eta + c)) (Phillips et al. 2017, Ecography 40:887);
    c is ours: the mean log intensity at the training records maps to 1 - 1/e."""
    pres, bg = data
    model = make_model("ppm", terms="linear+quadratic", l1_penalty=0.05).fit(pres, bg)
    log_q = model.log_density(bg)
    assert_allclose(logsumexp(log_q), 0.0, atol=1e-9)
    ref = model.log_density(pres).mean()
    assert_allclose(model.predict(bg), -np.expm1(-np.exp(log_q - ref)), rtol=1e-9)


def _hand_features(z, zb, terms, n_knots=10):
    cols = [z]
    if "quadratic" in terms:
        cols.append(z**2)
    if "hinge" in terms:
        levels = np.arange(1, n_knots + 1) / (n_knots + 1)
        for j in range(z.shape[1]):
            kn = np.unique(np.quantile(zb[:, j], levels))
            cols.append(np.maximum(z[:, [j]] - kn, 0))
            cols.append(np.maximum(kn - z[:, [j]], 0))
    return np.hstack(cols)


@pytest.mark.parametrize(
    "terms, n_knots, min_rho, max_p95",
    [
        (("linear", "quadratic"), 10, 0.999, 0.1),
        (("linear", "quadratic", "hinge"), 4, 0.999, 0.15),
        (("linear", "quadratic", "hinge"), 10, 0.98, 0.6),
    ],
)
def test_ppm_matches_poisson_point_process_glm(terms, n_knots, min_rho, max_p95):
    """Weakly penalised ppm vs an unpenalised Poisson GLM on quadrature points.

    Renner & Warton 2013 (Biometrics 69:274): the background-weighted logistic fit
    converges on the Poisson point-process model.  Reference: sklearn PoissonRegressor
    fitted to Berman-Turner quadrature (presences + background, weights w, counts y/w).
    Tolerances are ours: relative log intensities agree in rank (Spearman) and in
    value (95th percentile of |difference|) over the background.  Hinge features are
    nearly collinear, so their tails are less well identified: looser bounds.
    """
    rng = np.random.default_rng(1)
    bg = rng.normal(size=(3000, 2))
    eta = 1.2 * bg[:, 0] - 0.6 * bg[:, 0] ** 2 + 0.8 * bg[:, 1]
    idx = rng.choice(len(bg), size=200, p=np.exp(eta - logsumexp(eta)))
    pres = bg[idx] + rng.normal(scale=0.01, size=(200, 2))
    # A weak penalty: 0.02 x 0.5 / sqrt(200) per record.
    model = PointProcessNiche(terms=terms, l1_penalty=7.071e-4, n_knots=n_knots)
    model.fit(pres, bg)

    mu, sd = bg.mean(axis=0), bg.std(axis=0)
    zb = (bg - mu) / sd
    F = _hand_features((np.vstack([pres, bg]) - mu) / sd, zb, terms, n_knots)
    F = (F - F[len(pres) :].mean(axis=0)) / F[len(pres) :].std(axis=0)
    w = np.r_[np.full(len(pres), 1e-6), np.full(len(bg), 1.0 / len(bg))]
    y = np.r_[np.ones(len(pres)), np.zeros(len(bg))] / w
    # One BLAS thread: multi-threaded BLAS is erratic on small problems here.
    with threadpool_limits(1):
        glm = PoissonRegressor(
            alpha=1e-8, max_iter=300, tol=1e-8, solver="newton-cholesky"
        ).fit(F, y, sample_weight=w)
    e = F[len(pres) :] @ glm.coef_
    ref = e - logsumexp(e)
    got = model.log_density(bg)
    assert spearmanr(got, ref).statistic > min_rho
    assert np.percentile(np.abs(got - ref), 95) < max_p95


def test_forest_trees_see_balanced_samples(data):
    pres, bg = data
    model = DownsampledForest(n_estimators=20, random_state=3).fit(pres, bg)
    for tree in model.estimators_:
        counts = tree.tree_.value[0]  # root node class fractions (weighted)
        assert_allclose(counts.ravel(), [0.5, 0.5])
    oob = model.oob_presence_
    assert oob.shape == (len(pres),) and np.all(np.isfinite(oob))
    # In-sample, fully grown trees score their own records near 1; out-of-bag is lower.
    assert model.predict(pres).mean() > oob.mean()
    assert_allclose(training_presence_scores(model, pres), oob)


def test_fit_taxon_models_fits_every_family(data):
    pres, bg = data
    fitted = fit_taxon_models(
        pres, bg, {"ellipsoid": {}, "forest": {"n_estimators": 10}}, random_state=5
    )
    assert list(fitted) == ["ellipsoid", "forest"]
    assert fitted["forest"].random_state == 5
    assert fitted["ellipsoid"].predict(bg[:3]).shape == (3,)


def test_ensemble_weights_mean_and_agreement():
    # Weights max(AUC - 0.5, 0) (Araujo & New 2007, TREE 22:42), equal when all zero.
    w = ensemble_weights({"a": 0.9, "b": 0.6, "c": 0.45})
    assert_allclose([w["a"], w["b"], w["c"]], [0.8, 0.2, 0.0])
    assert ensemble_weights({"a": 0.5, "b": 0.3}) == {"a": 0.5, "b": 0.5}
    maps = {
        "a": np.array([[0.2, 0.8], [np.nan, 0.5]]),
        "b": np.array([[0.6, 0.4], [0.1, 0.5]]),
    }
    mean = weighted_mean_map(maps, {"a": 3.0, "b": 1.0})
    assert mean.dtype == np.float32
    assert_allclose(mean, [[0.3, 0.7], [np.nan, 0.5]], rtol=1e-6)
    agree = agreement_map(maps, {"a": 0.5, "b": 0.5})
    assert_allclose(agree, [[0.5, 0.5], [np.nan, 1.0]])
    with pytest.raises(InputError, match="same grid"):
        weighted_mean_map({"a": np.zeros(2), "b": np.zeros(3)}, {"a": 1, "b": 1})


def test_response_curves_and_importance(data):
    pres, bg = data
    model = make_model("ellipsoid").fit(pres, bg)
    rc = response_curves(model, bg, n_points=21, names=["a", "b", "c"])
    assert rc.values.shape == rc.suitability.shape == (21, 3)
    assert_allclose(rc.values[[0, -1]], [bg.min(axis=0), bg.max(axis=0)])
    # The curve of predictor 0 peaks near the records' mean on it.
    peak = rc.values[np.argmax(rc.suitability[:, 0]), 0]
    assert abs(peak - pres[:, 0].mean()) < 0.5
    imp = permutation_importance(model, pres, bg, random_state=0, n_repeats=3)
    # Predictors 0 and 1 separate records from background; predictor 2 does not.
    assert imp.mean[0] > imp.mean[2] and imp.mean[1] > imp.mean[2]
    assert imp.drops.shape == (3, 3)


def test_response_curves_through_the_records_show_a_narrow_niche():
    # A narrow niche in a corner of the available environment: held at the
    # background medians every curve misses it; held at the records' medians each
    # curve crosses it and peaks near the records (invented fixture values).
    rng = np.random.default_rng(3)
    bg = rng.uniform(0, 10, (2000, 2))
    pres = rng.normal(9.0, 0.3, (25, 2))
    model = make_model("ellipsoid").fit(pres, bg)
    flat = response_curves(model, bg, n_points=41)
    assert flat.suitability.max() < 0.05
    rc = response_curves(model, bg, n_points=41, at=np.median(pres, axis=0))
    assert_allclose(rc.medians, np.median(pres, axis=0))
    assert rc.suitability.max(axis=0).min() > 0.5
    for j in range(2):
        peak = rc.values[np.argmax(rc.suitability[:, j]), j]
        assert abs(peak - np.median(pres[:, j])) < 0.5
    with pytest.raises(ValueError, match="2 finite values"):
        response_curves(model, bg, at=[1.0])


def test_model_figures(data):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from screener.outputs.model_figures import plot_importance, plot_response_curves

    pres, bg = data
    model = make_model("envelope").fit(pres)
    fig = plot_response_curves(response_curves(model, bg, n_points=11))
    assert len([a for a in fig.axes if a.get_visible()]) == 3
    assert len(fig.axes[0].lines) == 2  # curve + median marker
    ax = plot_importance(permutation_importance(model, pres, bg, n_repeats=2))
    assert len(ax.patches) == 3
    plt.close("all")


@pytest.mark.parametrize("df", [1, 2, 3, 4, 5, 8, 19, 20, 33, 64, 65])
def test_chi2_upper_tail_equals_scipy(df):
    """The closed form for integer df equals scipy.special.chdtrc (a reference library)
    from tiny to far-tail distances, with NaN, inf and the hand-over to scipy."""
    from scipy.special import chdtrc

    from screener.models.ellipsoid import chi2_upper_tail

    x = np.r_[0.0, np.logspace(-8, np.log10(3000.0), 400), 1399.0, 1401.0, np.inf, np.nan]
    got, want = chi2_upper_tail(df, x), chdtrc(df, x)
    assert np.array_equal(np.isnan(got), np.isnan(want))
    ok = ~np.isnan(want)
    assert_allclose(got[ok], want[ok], rtol=1e-12, atol=1e-300)
    assert got[0] == 1.0 and got[-2] == 0.0


def test_clamped_model_scores_beyond_the_range_as_at_its_edge():
    # Clamping (Elith, Kearney & Phillips 2010): a predictor beyond the calibration
    # range is set to the range's edge before predicting.  A linear-trend model would
    # keep rising outside the data; clamped, it stays at the edge value.
    from screener.models import make_model
    from screener.models.base import ClampedModel

    rng = np.random.default_rng(0)
    pres = rng.normal([1.0, 0.0], 0.3, size=(30, 2))
    bg = rng.normal(0.0, 1.0, size=(300, 2))
    model = make_model("ellipsoid").fit(pres, bg)
    clamped = ClampedModel.from_rows(model, pres, bg)
    lo = np.vstack([pres, bg]).min(axis=0)
    hi = np.vstack([pres, bg]).max(axis=0)
    assert_allclose(clamped.low, lo) and assert_allclose(clamped.high, hi)
    far = np.array([[hi[0] + 5.0, 0.0], [lo[0] - 3.0, hi[1] + 9.0], [0.5, 0.1]])
    edge = np.clip(far, lo, hi)
    assert_allclose(clamped.predict(far), model.predict(edge), rtol=1e-12)
    assert clamped.outside(far).tolist() == [True, True, False]
    # inside the range nothing changes
    inside = bg[:50]
    assert_allclose(clamped.predict(inside), model.predict(inside), rtol=1e-12)
    assert clamped.accepts_invalid_rows == model.accepts_invalid_rows


def test_clade_agreement_is_the_cellwise_maximum_over_taxa():
    rng = np.random.default_rng(4)
    maps = [rng.random((4, 5)).astype(np.float32) for _ in range(3)]
    maps[1][0, 0] = np.nan
    mask = np.ones((4, 5), bool)
    mask[3, 4] = False
    got = clade_agreement([maps[0], None, maps[1], maps[2]], mask)
    ref = np.max(np.stack(maps), axis=0)  # numpy's maximum: NaN where any is NaN
    ref[~mask] = np.nan
    assert got.dtype == np.float32
    assert_allclose(got, ref, equal_nan=True)
    assert np.isnan(got[0, 0]) and np.isnan(got[3, 4])
    assert not np.shares_memory(got, maps[0])  # the taxa's maps are left as they were
    assert clade_agreement([None, None]) is None
