"""Looking inside fitted models: response curves and permutation importance, as data."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from sklearn.inspection import permutation_importance as _sk_permutation_importance
from sklearn.utils.validation import check_is_fitted

from screener.errors import InputError
from screener.models.base import check_predictors

__all__ = ["ResponseCurves", "response_curves", "Importance", "permutation_importance"]


@dataclass
class ResponseCurves:
    """Suitability along each predictor with the others held at their median.

    Attributes
    ----------
    values : ndarray of shape (n_points, p)
        Column ``j``: evenly spaced values of predictor ``j`` over its background range.
    suitability : ndarray of shape (n_points, p)
        Column ``j``: model suitability along column ``j`` of ``values``.
    medians : ndarray of shape (p,)
        Background medians used for the predictors held fixed.
    names : list of str
    """

    values: np.ndarray
    suitability: np.ndarray
    medians: np.ndarray
    names: list


def _names(names, p):
    if names is None:
        return [f"predictor {j}" for j in range(p)]
    names = [str(n) for n in names]
    if len(names) != p:
        raise InputError(f"Got {len(names)} predictor names for {p} predictors.")
    return names


def response_curves(
    model, background, n_points: int = 50, *, names=None, at=None
) -> ResponseCurves:
    """Response curve of every predictor, the others fixed at reference values.

    Parameters
    ----------
    model : fitted niche model
    background : array_like of shape (m, p)
        Sets each predictor's range (min to max), and the reference values when
        ``at`` is not given (the background medians).
    n_points : int, default 50
    names : sequence of str, optional
        Predictor names for labels.
    at : array_like of shape (p,), optional
        Values the other predictors are held at.  The pipeline passes the medians
        at the taxon's records: held at the background median (often lowland where
        nothing is suitable) every curve of a narrow montane niche is flat at 0,
        while through the records' medians each curve crosses the niche.

    Returns
    -------
    ResponseCurves
        ``medians`` holds the reference values used.
    """
    check_is_fitted(model)
    bg = check_predictors(background, "background", n_features=model.n_features_in_)
    p = bg.shape[1]
    if at is None:
        med = np.median(bg, axis=0)
    else:
        med = np.asarray(at, dtype=float).reshape(-1)
        if med.shape != (p,) or not np.all(np.isfinite(med)):
            raise ValueError(f"`at` must hold {p} finite values; got {med!r}")
    lo, hi = bg.min(axis=0), bg.max(axis=0)
    values = np.linspace(lo, hi, int(n_points))  # (n_points, p)
    suit = np.empty_like(values, dtype=float)
    for j in range(p):
        X = np.tile(med, (values.shape[0], 1))
        X[:, j] = values[:, j]
        suit[:, j] = model.predict(X)
    return ResponseCurves(
        values=values, suitability=suit, medians=med, names=_names(names, p)
    )


@dataclass
class Importance:
    """Drop in AUC when each predictor is permuted.

    Attributes
    ----------
    baseline_auc : float
        AUC, presences vs background, with nothing permuted.
    mean, std : ndarray of shape (p,)
        Mean and standard deviation over repeats of the AUC drop.
    drops : ndarray of shape (p, n_repeats)
    names : list of str
    """

    baseline_auc: float
    mean: np.ndarray
    std: np.ndarray
    drops: np.ndarray
    names: list


def _auc_scorer(estimator, X, y):
    from screener.evaluation import auc

    s = estimator.predict(X)
    return auc(s[y == 1], s[y == 0])


def permutation_importance(
    model, presence, background, random_state=0, *, n_repeats: int = 5, names=None
) -> Importance:
    """Permutation importance: loss of presence-vs-background AUC per predictor.

    Each predictor's column is shuffled over the pooled presence and background rows
    (:func:`sklearn.inspection.permutation_importance`), breaking its link with the
    labels while keeping its distribution.

    Parameters
    ----------
    model : fitted niche model
    presence : array_like of shape (n, p)
    background : array_like of shape (m, p)
    random_state : int, default 0
    n_repeats : int, default 5
    names : sequence of str, optional

    Returns
    -------
    Importance

    References
    ----------
    .. [1] Breiman, L. (2001). Random forests. Machine Learning 45:5-32.
    """
    check_is_fitted(model)
    pres = check_predictors(presence, "presence", n_features=model.n_features_in_)
    bg = check_predictors(background, "background", n_features=model.n_features_in_)
    X = np.vstack([pres, bg])
    y = np.r_[np.ones(len(pres), dtype=int), np.zeros(len(bg), dtype=int)]
    res = _sk_permutation_importance(
        model,
        X,
        y,
        scoring=_auc_scorer,
        n_repeats=int(n_repeats),
        random_state=int(random_state),
        n_jobs=None,
    )
    return Importance(
        baseline_auc=_auc_scorer(model, X, y),
        mean=np.asarray(res.importances_mean),
        std=np.asarray(res.importances_std),
        drops=np.asarray(res.importances),
        names=_names(names, X.shape[1]),
    )
