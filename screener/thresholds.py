"""Suitability thresholds with their area (km²) and training omission.

A threshold turns a continuous suitability map into "suitable / not suitable".  Every
choice trades omission of known sites against area, so each threshold here reports both.
Suitable area is a hypothesis to test in the field, not a range map.
"""

from __future__ import annotations

import math

import numpy as np

from screener.errors import InputError
from screener.project import default
from screener.results import Threshold

__all__ = [
    "Threshold",
    "compute_thresholds",
    "minimum_training_presence",
    "percentile_training_presence",
    "max_sss_threshold",
    "suitable_area_km2",
]


def _scores(values, name: str) -> np.ndarray:
    arr = np.asarray(values, dtype=float).ravel()
    if arr.size == 0:
        raise InputError(f"`{name}` is empty; at least one training record is needed.")
    if not np.all(np.isfinite(arr)):
        raise InputError(
            f"`{name}` has {int((~np.isfinite(arr)).sum())} missing scores; score every "
            "training record (records on nodata cells should have been dropped)."
        )
    return arr


def minimum_training_presence(record_scores) -> float:
    """Lowest suitability at a training record (MTP; common practice).

    Examples
    --------
    >>> minimum_training_presence([0.4, 0.2, 0.9])
    0.2
    """
    return float(np.min(_scores(record_scores, "record_scores")))


def percentile_training_presence(record_scores, percent: float = 10.0) -> float:
    """Threshold that omits the lowest ``floor(n * percent / 100)`` training records.

    The cut-off is the score of the first record kept, so with ``n = 10`` and the
    default 10 % exactly one record falls below it; with ``n < 10`` none does and the
    result equals the MTP (common practice for small samples).

    Examples
    --------
    >>> percentile_training_presence([0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9, 1.0])
    0.2
    """
    s = np.sort(_scores(record_scores, "record_scores"))
    k = int(math.floor(s.size * float(percent) / 100.0 + 1e-9))
    return float(s[min(k, s.size - 1)])


def max_sss_threshold(record_scores, background_scores) -> float:
    """Threshold maximising sensitivity + specificity, presences vs background.

    Sensitivity is the share of records ``>= t``, specificity the share of background
    ``< t``; candidates are the observed scores.

    References
    ----------
    .. [1] Liu, C., White, M. & Newell, G. (2013). Selecting thresholds for the
       prediction of species occurrence with presence-only data. J. Biogeography
       40:778-789.
    """
    pres = _scores(record_scores, "record_scores")
    bg = _scores(background_scores, "background_scores")
    cand = np.unique(np.r_[pres, bg])
    ps = np.sort(pres)
    bs = np.sort(bg)
    sens = 1.0 - np.searchsorted(ps, cand, side="left") / ps.size
    spec = np.searchsorted(bs, cand, side="left") / bs.size
    return float(cand[int(np.argmax(sens + spec))])


def suitable_area_km2(map_values, cell_area_km2, value: float) -> float:
    """Area (km²) of the cells with ``map >= value``; NaN cells are never counted."""
    m = np.asarray(map_values)
    if not np.issubdtype(m.dtype, np.floating):
        m = m.astype(float)
    a = np.broadcast_to(np.asarray(cell_area_km2, dtype=float), m.shape)
    with np.errstate(invalid="ignore"):
        # compared in the map's own precision, so a record's cell is never lost to
        # rounding; summed in float64 without copying the areas
        sel = np.isfinite(m) & (m >= m.dtype.type(value))
    return float(np.sum(a, where=sel, dtype=np.float64))


def compute_thresholds(
    record_scores,
    map_values,
    cell_area_km2,
    *,
    relax: float = default("thresholds", "relax"),
    background_scores=None,
) -> dict[str, Threshold]:
    """The standard thresholds of one suitability map.

    Parameters
    ----------
    record_scores : array_like of shape (n,)
        Suitability at the training records (out-of-bag for the forest, see
        :func:`screener.models.training_presence_scores`).
    map_values : ndarray
        The suitability map (any shape), NaN outside the valid mask.
    cell_area_km2 : float or ndarray broadcastable to ``map_values``
        Ground area of each cell, km².
    relax : float, default 0.1
        The relaxed threshold is ``MTP * (1 - relax)``: deliberately broader than the
        MTP, to reach places environmentally close to, not identical with, known sites.
    background_scores : array_like, optional
        Suitability at background cells; needed for "maxsss".

    Returns
    -------
    dict of str to Threshold
        Keys "mtp", "p10", "relaxed" and, with background scores, "maxsss".  Each has
        the area (km²) of cells ``>=`` its value and the share of training records
        below it.

    Raises
    ------
    screener.errors.InputError
        No or non-finite record scores, or ``relax`` outside [0, 1).

    Examples
    --------
    >>> t = compute_thresholds([0.5, 0.8], np.array([[0.2, 0.6], [0.9, np.nan]]), 2.0)
    >>> t["mtp"].value, t["mtp"].area_km2, t["mtp"].training_omission
    (0.5, 4.0, 0.0)
    """
    scores = _scores(record_scores, "record_scores")
    if not 0.0 <= float(relax) < 1.0:
        raise InputError(f"relax must be in [0, 1); got {relax!r} (e.g. 0.1 for 10 %).")
    values = {
        "mtp": minimum_training_presence(scores),
        "p10": percentile_training_presence(scores, 10.0),
    }
    values["relaxed"] = values["mtp"] * (1.0 - float(relax))
    if background_scores is not None:
        values["maxsss"] = max_sss_threshold(scores, background_scores)
    out = {}
    for name, value in values.items():
        out[name] = Threshold(
            name=name,
            value=float(value),
            area_km2=suitable_area_km2(map_values, cell_area_km2, value),
            training_omission=float(np.mean(scores < value)),
        )
    return out
