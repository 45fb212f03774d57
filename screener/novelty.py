"""Extrapolation: the multivariate environmental similarity surface (MESS).

Where MESS is negative, at least one predictor lies outside the range of the calibration
(reference) data and any model's prediction there is an extrapolation: treat suitability in
such cells with extra caution before sending a team there.
"""

from __future__ import annotations

import functools

import numpy as np

from screener.errors import InputError
from screener.models.base import check_predictors

__all__ = ["mess", "mess_map", "similarity"]


def similarity(reference, X) -> np.ndarray:
    """Per-predictor similarity of each row of ``X`` to the reference, in percent.

    With ``f`` the percent of reference values below ``x`` (strictly),
    ``min``/``max`` the reference range:

    - ``f == 0``: ``100 (x - min) / (max - min)`` (0 at the minimum, negative below it);
    - ``0 < f <= 50``: ``2 f``;
    - ``50 < f < 100``: ``2 (100 - f)``;
    - ``f == 100``: ``100 (max - x) / (max - min)`` (negative above the maximum).

    A predictor that is constant over the reference has no range: the similarity is 0
    where ``x`` equals the constant and ``-inf`` elsewhere.

    Parameters
    ----------
    reference : array_like of shape (m, p)
        Calibration rows (records plus background, or background alone).
    X : array_like of shape (k, p)

    Returns
    -------
    ndarray of float64, shape (k, p)

    References
    ----------
    .. [1] Elith, J., Kearney, M. & Phillips, S. (2010). The art of modelling
       range-shifting species. Methods in Ecology and Evolution 1:330-342.
    """
    ref = check_predictors(reference, "reference", min_rows=1).astype(np.float64)
    X = np.asarray(X)
    if X.ndim != 2 or X.shape[1] != ref.shape[1]:
        raise InputError(
            f"`X` must have shape (k, {ref.shape[1]}) like the reference; got {X.shape}."
        )
    out = np.empty(X.shape, dtype=np.float64)
    for j in range(ref.shape[1]):
        out[:, j] = _layer_similarity(np.sort(ref[:, j]), X[:, j])
    return out


def _layer_similarity(r: np.ndarray, x) -> np.ndarray:
    """Similarity of values ``x`` to one predictor's sorted reference values ``r``."""
    m = r.size
    lo, hi = r[0], r[-1]
    x = np.asarray(x, dtype=np.float64)
    f = 100.0 * np.searchsorted(r, x, side="left") / m
    s = np.where(f <= 50.0, 2.0 * f, 2.0 * (100.0 - f))
    rng = hi - lo
    if rng > 0:
        s = np.where(f == 0.0, 100.0 * (x - lo) / rng, s)
        s = np.where(f == 100.0, 100.0 * (hi - x) / rng, s)
    else:
        s = np.where(x == lo, 0.0, -np.inf)
    s[~np.isfinite(x)] = np.nan
    return s


def mess(reference, X) -> tuple[np.ndarray, np.ndarray]:
    """MESS and the most dissimilar predictor of each row.

    Parameters
    ----------
    reference : array_like of shape (m, p)
        Calibration rows.
    X : array_like of shape (k, p)
        Rows to score (e.g. the valid cells of a raster stack).  Rows with a NaN get
        MESS NaN and predictor -1.

    Returns
    -------
    mess : ndarray of float64, shape (k,)
        Minimum over predictors of :func:`similarity`; negative = novel environment.
    most_dissimilar : ndarray of int16, shape (k,)
        Column index of the predictor attaining that minimum.

    References
    ----------
    .. [1] Elith, J., Kearney, M. & Phillips, S. (2010). The art of modelling
       range-shifting species. Methods in Ecology and Evolution 1:330-342.

    Examples
    --------
    >>> ref = np.array([[1.0, 10.0], [2.0, 20.0], [3.0, 30.0], [4.0, 40.0]])
    >>> m, j = mess(ref, np.array([[2.5, 55.0]]))
    >>> float(m[0]), int(j[0])
    (-50.0, 1)
    """
    ref = check_predictors(reference, "reference", min_rows=1).astype(np.float64)
    X = np.asarray(X)
    if X.ndim != 2 or X.shape[1] != ref.shape[1]:
        raise InputError(
            f"`X` must have shape (k, {ref.shape[1]}) like the reference; got {X.shape}."
        )
    # a running minimum over the predictors: one (k,) similarity at a time, not the
    # (k, p) matrix (8 bytes per cell and predictor on a large block)
    k = X.shape[0]
    out = np.full(k, np.inf)
    idx = np.zeros(k, dtype=np.int16)
    bad = np.zeros(k, dtype=bool)
    for j in range(ref.shape[1]):
        s = _layer_similarity(np.sort(ref[:, j]), X[:, j])
        bad |= np.isnan(s)
        lower = s < out  # strict: ties keep the first predictor, as argmin does
        out[lower] = s[lower]
        idx[lower] = j
    out[bad] = np.nan
    idx[bad] = -1
    return out, idx


def _mess_rows(stack, reference: np.ndarray, rows: tuple, max_cells: int):
    """MESS and most dissimilar layer at the valid cells of a band of rows (a task)."""
    parts = [mess(reference, X) for _, X, _ in
             stack.iter_blocks(max_cells, rows=slice(*rows)) if X.shape[0]]
    if not parts:
        return np.empty(0, np.float32), np.empty(0, np.int16)
    return (np.concatenate([m for m, _ in parts]).astype(np.float32),
            np.concatenate([i for _, i in parts]))


def mess_map(stack, reference: np.ndarray, max_cells: int = 1 << 20,
              map_fn=None):
    """MESS map and most-dissimilar-layer map over a layer stack, band by band.

    Streamed stacks run the bands on ``map_fn`` (each worker reads its own windows),
    as :func:`screener.models.mapping.predict_map` does; in-memory stacks run in this
    process.

    Parameters
    ----------
    stack : screener.layers.LayerStack
        Predictors, in the order of the columns of ``reference``.
    reference : ndarray of shape (n, p)
        Calibration values (e.g. the background of a taxon).
    max_cells : int, default 1048576
        Cells per band.
    map_fn : callable, optional
        ``map``-like callable of a parallel executor.

    Returns
    -------
    mess : ndarray of float32, shape (n_rows, n_cols)
        NaN off the valid mask.
    most_dissimilar : ndarray of int16, shape (n_rows, n_cols)
        Column index of the most dissimilar predictor; -1 off the mask.
    """
    grid = stack.grid
    out = np.full(grid.shape, np.nan, dtype=np.float32)
    most = np.full(grid.shape, -1, dtype=np.int16)
    run = map_fn if map_fn is not None and stack.streamed else map
    bands = stack.row_bands(max_cells)
    task = functools.partial(_mess_rows, stack, np.asarray(reference), max_cells=max_cells)
    for (r0, r1), (m, idx) in zip(bands, run(task, bands)):
        valid = grid.mask[r0:r1]
        out[r0:r1][valid] = m
        most[r0:r1][valid] = idx
    return out, most
