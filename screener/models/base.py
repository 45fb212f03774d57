"""The protocol every niche-model family follows, and helpers shared by the families.

A family is a scikit-learn style estimator (:class:`sklearn.base.BaseEstimator`):

- ``__init__`` only stores its keyword parameters;
- ``fit(presence, background)`` takes predictor values at the records, shape (n, p), and at
  background cells, shape (m, p), validates them, learns, sets attributes ending in ``_``
  and returns ``self``;
- ``predict(X)`` returns suitability in [0, 1], shape (k,), for any number of rows; it works
  through ``X`` in chunks so that temporaries stay small when ``X`` is a whole raster stack.

Predictions are hypotheses about where a taxon *might* live, to be checked in the field;
they are not evidence that it does.
"""

from __future__ import annotations

import contextlib

import numpy as np
from sklearn.base import BaseEstimator
from sklearn.utils.validation import check_is_fitted

from screener.errors import InputError

__all__ = ["NicheModel", "check_predictors", "training_presence_scores", "CHUNK_ROWS"]

#: Rows handled per chunk in ``predict``: 65,536 rows x 8 float32 predictors is 2 MiB,
#: small enough for temporaries to stay in cache.
CHUNK_ROWS = 65_536


def check_predictors(
    values, name: str, *, n_features: int | None = None, min_rows: int = 1
) -> np.ndarray:
    """Validate a (rows, predictors) array of predictor values and return it as float.

    Parameters
    ----------
    values : array_like of shape (n, p)
        Predictor values, one row per record or cell.
    name : str
        What the array is ("presence", "background", "X"), used in messages.
    n_features : int, optional
        Required number of columns.
    min_rows : int, default 1
        Fewest rows accepted.

    Returns
    -------
    ndarray of float64 (float32 kept as float32), shape (n, p)

    Raises
    ------
    screener.errors.InputError
        Wrong shape, too few rows, or non-finite values.
    """
    arr = np.asarray(values)
    if arr.dtype != np.float32:
        try:
            arr = arr.astype(np.float64, copy=False)
        except (TypeError, ValueError) as exc:
            raise InputError(
                f"`{name}` must hold numbers; got dtype {arr.dtype}."
            ) from exc
    if arr.ndim == 1 and n_features == 1:
        arr = arr[:, None]
    if arr.ndim != 2:
        raise InputError(
            f"`{name}` must be 2-D (rows, predictors); got shape {arr.shape}. "
            "Pass one row per record or cell and one column per layer."
        )
    if n_features is not None and arr.shape[1] != n_features:
        raise InputError(
            f"`{name}` has {arr.shape[1]} predictors but the model was fitted with "
            f"{n_features}; use the same layers, in the same order, as in fit."
        )
    if arr.shape[0] < min_rows:
        raise InputError(
            f"`{name}` has {arr.shape[0]} rows; at least {min_rows} are needed."
        )
    if arr.shape[0] and not np.all(np.isfinite(arr)):
        bad = np.flatnonzero(~np.all(np.isfinite(arr), axis=1))
        raise InputError(
            f"`{name}` has missing or infinite predictor values in {bad.size} rows "
            f"(first: row {int(bad[0])}); drop cells outside the layers' valid mask "
            "before fitting or predicting."
        )
    return arr


class NicheModel(BaseEstimator):
    """Base class of the niche-model families.

    Subclasses implement ``fit`` and ``_predict_chunk(X)``; this class supplies a chunked,
    validated ``predict``.  Fitted models always have ``n_features_in_``.
    """

    #: True when ``fit`` makes use of background rows.
    uses_background = True
    #: True when rows with missing values only spoil their own score (NaN or
    #: meaningless), so a whole block of cells can be predicted and masked afterwards
    #: instead of gathering its valid cells first.
    accepts_invalid_rows = False

    def predict(self, X, *, check_input: bool = True, dtype=np.float64) -> np.ndarray:
        """Suitability in [0, 1] for each row of ``X``.

        Parameters
        ----------
        X : array_like of shape (k, p)
            Predictor values (float32 or float64), in the column order used in ``fit``.
        check_input : bool, default True
            Validate ``X`` (shape, finite values).  ``False`` skips the checks; rows
            with missing values then get meaningless scores, which the caller must
            mask (the grid prediction does so for families with
            ``accepts_invalid_rows``).
        dtype : {numpy.float64, numpy.float32}, default float64
            Type of the returned scores (float32 for maps).

        Returns
        -------
        ndarray of ``dtype``, shape (k,)
        """
        check_is_fitted(self)
        if check_input:
            X = check_predictors(X, "X", n_features=self.n_features_in_, min_rows=0)
        out = np.empty(X.shape[0], dtype=dtype)
        with np.errstate(all="ignore") if not check_input else contextlib.nullcontext():
            for start in range(0, X.shape[0], CHUNK_ROWS):
                stop = min(start + CHUNK_ROWS, X.shape[0])
                out[start:stop] = self._predict_chunk(X[start:stop])
        np.clip(out, 0.0, 1.0, out=out)
        return out

    def _predict_chunk(self, X: np.ndarray) -> np.ndarray:  # pragma: no cover
        raise NotImplementedError

    def _check_fit_inputs(self, presence, background, *, min_presence: int = 1):
        presence = check_predictors(presence, "presence", min_rows=min_presence)
        p = presence.shape[1]
        if background is None:
            if self.uses_background:
                raise InputError(
                    f"{type(self).__name__} needs background rows; pass the predictor "
                    "values of background cells drawn from the accessible area."
                )
            return presence, None
        background = check_predictors(
            background, "background", n_features=p, min_rows=1
        )
        return presence, background


class ClampedModel:
    """A fitted model whose predictors are clamped to its calibration range.

    ``predict(X)`` is the wrapped model's prediction at ``clip(X, low, high)``: a cell
    beyond the range of the rows the model was fitted on is scored as if at the edge
    of that range, so terms that grow without bound (linear, hinge) cannot carry
    suitability to 1 far outside the data.  Family-independent; the grid mapping uses
    it for every family when ``[models] clamp`` is on.

    Parameters
    ----------
    model : fitted niche model
    low, high : array_like of shape (p,)
        Per-predictor calibration range (minimum and maximum over the presence and
        background rows the model was fitted on).

    References
    ----------
    .. [1] Elith, J., Kearney, M. & Phillips, S. (2010). The art of modelling
       range-shifting species. Methods in Ecology and Evolution 1, 330-342
       (clamping and MESS as the two guards against extrapolation).
    """

    def __init__(self, model, low, high):
        self.model = model
        self.low = np.asarray(low, dtype=np.float64)
        self.high = np.asarray(high, dtype=np.float64)
        self.accepts_invalid_rows = getattr(model, "accepts_invalid_rows", False)

    @classmethod
    def from_rows(cls, model, *rows):
        """Clamp to the range of the given row sets (e.g. presence and background)."""
        stacked = np.vstack([np.asarray(r, dtype=np.float64) for r in rows])
        return cls(model, np.nanmin(stacked, axis=0), np.nanmax(stacked, axis=0))

    def outside(self, X) -> np.ndarray:
        """True for rows with any predictor outside the calibration range."""
        X = np.asarray(X)
        return np.any((X < self.low) | (X > self.high), axis=1)

    def predict(self, X, **kwargs) -> np.ndarray:
        X = np.asarray(X)
        lo = self.low.astype(X.dtype, copy=False)
        hi = self.high.astype(X.dtype, copy=False)
        return self.model.predict(np.clip(X, lo, hi), **kwargs)


def training_presence_scores(model, presence) -> np.ndarray:
    """Scores of a fitted model at its own training records, fit for thresholds.

    Families that memorise their training rows (the forest) report out-of-bag scores
    (``oob_presence_``), so that thresholds are not set on in-sample predictions; the
    others are scored by ``predict``.

    Parameters
    ----------
    model : fitted niche model
    presence : array_like of shape (n, p)
        The presence rows the model was fitted with, in the same order.

    Returns
    -------
    ndarray of float, shape (n,)
    """
    check_is_fitted(model)
    oob = getattr(model, "oob_presence_", None)
    if oob is not None:
        oob = np.asarray(oob, dtype=float)
        if oob.shape[0] != np.shape(presence)[0]:
            raise InputError(
                f"The model was fitted with {oob.shape[0]} presences but "
                f"{np.shape(presence)[0]} were passed; pass the training presences."
            )
        return oob
    return model.predict(presence)
