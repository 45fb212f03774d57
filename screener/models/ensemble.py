"""Ensembles of family maps: an evaluation-weighted mean and an agreement map."""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping

import numpy as np
from sklearn.base import BaseEstimator

from screener.errors import InputError

__all__ = [
    "ensemble_weights", "weighted_mean_map", "agreement_map", "clade_agreement",
    "ConsensusModel",
]


def ensemble_weights(
    scores: Mapping[str, float], *, baseline: float = 0.5
) -> dict[str, float]:
    """Weights ``max(score - baseline, 0)``, normalised to sum 1.

    With AUC as the score (the default ``baseline`` 0.5), a family no better than random
    gets weight 0.  When every weight is 0 or missing (NaN), all families get equal
    weight.

    Parameters
    ----------
    scores : mapping of str to float
        Evaluation score per family (e.g. test AUC); NaN counts as 0.
    baseline : float, default 0.5

    Returns
    -------
    dict of str to float

    References
    ----------
    .. [1] Araujo, M. B. & New, M. (2007). Ensemble forecasting of species
       distributions. Trends in Ecology and Evolution 22:42-47.

    Examples
    --------
    >>> ensemble_weights({"a": 0.875, "b": 0.625, "c": 0.4})
    {'a': 0.75, 'b': 0.25, 'c': 0.0}
    >>> ensemble_weights({"a": float("nan"), "b": 0.5})
    {'a': 0.5, 'b': 0.5}
    """
    if not scores:
        raise InputError("No family scores given; fit at least one model family.")
    raw = {}
    for name, s in scores.items():
        s = float(s) if s is not None else math.nan
        raw[name] = max(s - baseline, 0.0) if math.isfinite(s) else 0.0
    total = sum(raw.values())
    if total <= 0:
        return {name: 1.0 / len(raw) for name in raw}
    return {name: w / total for name, w in raw.items()}


def _stack(maps: Mapping[str, np.ndarray]):
    if not maps:
        raise InputError("No family maps given; fit at least one model family.")
    names = list(maps)
    arrays = [np.asarray(maps[n], dtype=np.float32) for n in names]
    shape = arrays[0].shape
    for n, a in zip(names, arrays, strict=True):
        if a.shape != shape:
            raise InputError(
                f"Family map {n!r} has shape {a.shape}, expected {shape}; all family "
                "maps must be on the same grid."
            )
    return names, arrays, shape


def weighted_mean_map(
    maps: Mapping[str, np.ndarray], weights: Mapping[str, float]
) -> np.ndarray:
    """Weighted mean of family suitability maps (float32, NaN where any map is NaN).

    Parameters
    ----------
    maps : mapping of str to ndarray
        Family -> suitability map, all the same shape.
    weights : mapping of str to float
        Family -> weight (e.g. from :func:`ensemble_weights`); normalised here.

    Returns
    -------
    ndarray of float32
    """
    names, arrays, shape = _stack(maps)
    w = np.array([float(weights.get(n, 0.0)) for n in names])
    if not np.all(np.isfinite(w)) or np.any(w < 0) or w.sum() <= 0:
        raise InputError(
            f"Ensemble weights {dict(zip(names, w.tolist(), strict=True))} must be "
            "non-negative with a positive sum."
        )
    w = w / w.sum()
    out = np.zeros(shape, dtype=np.float32)
    for wi, a in zip(w, arrays, strict=True):
        out += np.float32(wi) * a
    return out


def agreement_map(
    maps: Mapping[str, np.ndarray], thresholds: Mapping[str, float]
) -> np.ndarray:
    """Share of families calling each cell suitable at their own threshold.

    Parameters
    ----------
    maps : mapping of str to ndarray
        Family -> suitability map.
    thresholds : mapping of str to float
        Family -> threshold value (a cell is suitable when ``map >= threshold``).

    Returns
    -------
    ndarray of float32 in [0, 1], NaN where any map is NaN.
    """
    names, arrays, shape = _stack(maps)
    missing = [n for n in names if n not in thresholds]
    if missing:
        raise InputError(f"No threshold given for families {missing}.")
    count = np.zeros(shape, dtype=np.float32)
    nan = np.zeros(shape, dtype=bool)
    for n, a in zip(names, arrays, strict=True):
        nan |= np.isnan(a)
        with np.errstate(invalid="ignore"):
            count += a >= np.float32(thresholds[n])
    out = count / np.float32(len(names))
    out[nan] = np.nan
    return out


def clade_agreement(
    maps: Iterable[np.ndarray | None], mask: np.ndarray | None = None
) -> np.ndarray | None:
    """Agreement of a clade: the cell-wise maximum over its taxa's agreement maps.

    A cell counts as agreed for the clade as far as it is agreed for the taxon whose
    families agree most there (each map from :func:`agreement_map`).  The maps are
    folded one by one, so no stack of every taxon's map is held in memory.

    Parameters
    ----------
    maps : iterable of ndarray (n_rows, n_cols) or None
        Each taxon's agreement map (share of families, 0 to 1); None entries (taxa
        without one) are skipped.
    mask : ndarray of bool (n_rows, n_cols), optional
        Study-area cells; cells outside are NaN.

    Returns
    -------
    ndarray of float32 in [0, 1] or None
        NaN where any taxon's map is NaN (or outside ``mask``); None when no taxon
        has an agreement map.

    Examples
    --------
    >>> clade_agreement([np.array([0.5, 1.0]), None, np.array([0.75, 0.25])])
    array([0.75, 1.  ], dtype=float32)
    """
    out = None
    for a in maps:
        if a is None:
            continue
        if out is None:
            out = np.array(a, dtype=np.float32)
        else:
            np.maximum(out, a, out=out)
    if out is not None and mask is not None:
        out[~np.asarray(mask, bool)] = np.nan
    return out


class ConsensusModel(BaseEstimator):
    """The weighted mean of several families as one model, so it can be evaluated
    (jackknife, spatial blocks, null model) exactly like a single family.

    ``fit`` fits every family with a positive weight to the same records and
    background; ``predict`` is the weighted mean of their predictions, the same
    combination :func:`weighted_mean_map` makes of the mapped families.  The weights
    are held fixed (they come from the families' own evaluation on the same records,
    which makes the consensus's evaluation slightly optimistic).

    Parameters
    ----------
    families : mapping of str to dict
        Family name -> its parameters.
    weights : mapping of str to float
        Family -> weight (normalised; families at 0 are not fitted).
    random_state : int, default 0
        Seed passed to the families that take one.

    Attributes
    ----------
    models_ : dict of str to fitted model
    oob_presence_ : ndarray
        Weighted mean of the families' own training-record scores (out-of-bag for
        the forest), used for thresholds and the training AUC.
    """

    accepts_invalid_rows = False

    def __init__(self, families=None, weights=None, random_state=0):
        self.families = families
        self.weights = weights
        self.random_state = random_state

    def _normalised(self) -> dict:
        w = {f: float((self.weights or {}).get(f, 0.0)) for f in (self.families or {})}
        total = sum(v for v in w.values() if v > 0)
        if not total > 0:
            raise InputError("Consensus weights must have a positive sum.")
        return {f: v / total for f, v in w.items() if v > 0}

    def fit(self, presence, background, groups=None):
        """Fit every weighted family; ``groups`` (block labels of the records) go to
        the families whose ``fit`` takes them."""
        from screener.models import accepts_groups, accepts_random_state, make_model
        from screener.models.base import training_presence_scores

        self.weights_ = self._normalised()
        self.models_ = {}
        scores = 0.0
        for family, w in self.weights_.items():
            params = dict(self.families[family] or {})
            if accepts_random_state(family):
                params["random_state"] = int(self.random_state)
            kw = {"groups": groups} if groups is not None and accepts_groups(family) else {}
            model = make_model(family, **params).fit(presence, background, **kw)
            self.models_[family] = model
            scores = scores + w * np.asarray(
                training_presence_scores(model, presence), float)
        self.oob_presence_ = np.asarray(scores, float)
        return self

    def predict(self, X, **kwargs) -> np.ndarray:
        out = None
        for family, w in self.weights_.items():
            p = w * np.asarray(self.models_[family].predict(X, **kwargs), np.float64)
            out = p if out is None else out + p
        dtype = kwargs.get("dtype", np.float64)
        return out.astype(dtype, copy=False)
