"""Evaluation of niche models: jackknife for small samples, spatial partitions, metrics.

Pure functions over arrays.  The repeated fits (jackknife folds, partition folds and
null-model replicates) are independent tasks whose seeds are drawn up front in the
caller, so a parallel ``map_fn`` gives the same numbers as the builtin ``map``.

Good evaluation scores say a model ranks the known records above the background; they
do not make its predictions facts.  Predicted sites remain hypotheses for survey.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Callable
from dataclasses import asdict, dataclass, field, replace

import numpy as np
from scipy.stats import rankdata, spearmanr

from screener.errors import InputError, accepts_old_form
from screener.models import (
    accepts_groups,
    accepts_random_state,
    make_model,
    training_presence_scores,
)
from screener.models.base import check_predictors
from screener.project import default
from screener.randomisation import _xy, pattern_draws, spatial_clusters
from screener.thresholds import percentile_training_presence

__all__ = [
    "Points",
    "EvaluationParameters",
    "auc",
    "poisson_binomial_sf",
    "boyce_index",
    "tss_max",
    "omission_rate",
    "block_partition",
    "checkerboard_partition",
    "random_kfold_partition",
    "JackknifeResult",
    "jackknife",
    "null_model_test",
    "pattern_draws",
    "NullModelResult",
    "FamilyEvaluation",
    "evaluate_family",
    "METHODS",
]

log = logging.getLogger(__name__)

#: Evaluation methods reported in ``FamilyEvaluation.method``.
METHODS = ("jackknife", "quadrants", "squares", "random")


# --- metrics ------------------------------------------------------------------------
def _finite_1d(values, name: str) -> np.ndarray:
    arr = np.asarray(values, dtype=float).ravel()
    if not np.all(np.isfinite(arr)):
        raise InputError(f"`{name}` has missing (NaN) or infinite scores.")
    return arr


def auc(presence_scores, background_scores) -> float:
    """Area under the ROC curve, presences vs background: ``U / (n1 n0)``.

    ``U`` is the Mann-Whitney statistic of the presence scores (mid-ranks for ties, so a
    tie counts one half).

    Parameters
    ----------
    presence_scores : array_like of shape (n1,)
    background_scores : array_like of shape (n0,)

    Returns
    -------
    float in [0, 1], NaN when either group is empty.

    References
    ----------
    .. [1] Hanley, J. A. & McNeil, B. J. (1982). The meaning and use of the area under
       a receiver operating characteristic (ROC) curve. Radiology 143:29-36.

    Examples
    --------
    >>> auc([0.9, 0.4], [0.1, 0.4, 0.5])
    0.75
    """
    p = _finite_1d(presence_scores, "presence_scores")
    b = _finite_1d(background_scores, "background_scores")
    if p.size == 0 or b.size == 0:
        return math.nan
    ranks = rankdata(np.r_[p, b])
    u = ranks[: p.size].sum() - p.size * (p.size + 1) / 2.0
    return float(u / (p.size * b.size))


def poisson_binomial_sf(k: int, probs) -> float:
    """``P(X >= k)`` for X the number of successes of independent trials.

    Exact, by dynamic programming over the trials (O(n^2)).

    Parameters
    ----------
    k : int
        Number of successes.
    probs : array_like of shape (n,)
        Success probability of each trial, in [0, 1].

    Returns
    -------
    float

    References
    ----------
    .. [1] Pearson, R. G., Raxworthy, C. J., Nakamura, M. & Peterson, A. T. (2007).
       Predicting species distributions from small numbers of occurrence records: a
       test case using cryptic geckos in Madagascar. J. Biogeography 34:102-117.

    Examples
    --------
    >>> poisson_binomial_sf(2, [0.5, 0.5])
    0.25
    """
    p = np.asarray(probs, dtype=float).ravel()
    if np.any(~np.isfinite(p)) or np.any(p < 0) or np.any(p > 1):
        raise InputError("`probs` must be probabilities in [0, 1].")
    k = int(k)
    if k <= 0:
        return 1.0
    if k > p.size:
        return 0.0
    dist = np.zeros(p.size + 1)
    dist[0] = 1.0
    for i, pi in enumerate(p):
        # After trial i, successes range over 0..i+1.
        dist[1 : i + 2] = dist[1 : i + 2] * (1.0 - pi) + dist[: i + 1] * pi
        dist[0] *= 1.0 - pi
    return float(min(1.0, dist[k:].sum()))


def omission_rate(test_scores, threshold: float) -> float:
    """Share of test records scoring below ``threshold`` (NaN without records)."""
    s = _finite_1d(test_scores, "test_scores")
    return float(np.mean(s < threshold)) if s.size else math.nan


def boyce_index(
    presence_scores, background_scores, *, window: float = 0.1, n_windows: int = 101
) -> float:
    """Continuous Boyce index: Spearman correlation of P/E with suitability.

    Windows of width ``window * (max - min)`` of the background scores slide over that
    range (``n_windows`` centres, evenly spaced, ends inclusive).  In each window
    ``P`` is the share of presences and ``E`` the share of background inside it;
    windows without background are skipped.

    Parameters
    ----------
    presence_scores, background_scores : array_like
    window : float, default 0.1
        Window width as a fraction of the suitability range.
    n_windows : int, default 101

    Returns
    -------
    float in [-1, 1]; NaN when fewer than 2 windows remain or P/E is constant.

    References
    ----------
    .. [1] Hirzel, A. H., Le Lay, G., Helfer, V., Randin, C. & Guisan, A. (2006).
       Evaluating the ability of habitat suitability models to predict species
       presences. Ecological Modelling 199:142-152.
    """
    p = np.sort(_finite_1d(presence_scores, "presence_scores"))
    b = np.sort(_finite_1d(background_scores, "background_scores"))
    if p.size == 0 or b.size == 0:
        return math.nan
    lo, hi = float(b[0]), float(b[-1])
    if hi <= lo:
        return math.nan
    width = float(window) * (hi - lo)
    centres = np.linspace(lo + width / 2, hi - width / 2, int(n_windows))
    left, right = centres - width / 2, centres + width / 2

    def share(sorted_vals):
        inside = np.searchsorted(sorted_vals, right, side="right") - np.searchsorted(
            sorted_vals, left, side="left"
        )
        return inside / sorted_vals.size

    P, E = share(p), share(b)
    ok = E > 0
    if ok.sum() < 2:
        return math.nan
    ratio = P[ok] / E[ok]
    if np.ptp(ratio) == 0:
        return math.nan
    return float(spearmanr(centres[ok], ratio).statistic)


def tss_max(presence_scores, background_scores) -> float:
    """True skill statistic ``sensitivity + specificity - 1`` at its maximum.

    The threshold ranges over the observed scores (a cell is "present" when its score is
    ``>=`` the threshold).

    References
    ----------
    .. [1] Allouche, O., Tsoar, A. & Kadmon, R. (2006). Assessing the accuracy of
       species distribution models: prevalence, kappa and the true skill statistic
       (TSS). J. Applied Ecology 43:1223-1232.
    """
    p = np.sort(_finite_1d(presence_scores, "presence_scores"))
    b = np.sort(_finite_1d(background_scores, "background_scores"))
    if p.size == 0 or b.size == 0:
        return math.nan
    cand = np.unique(np.r_[p, b, np.inf])
    sens = 1.0 - np.searchsorted(p, cand, side="left") / p.size
    spec = np.searchsorted(b, cand, side="left") / b.size
    return float(np.max(sens + spec) - 1.0)


# --- partitions ---------------------------------------------------------------------
def block_partition(presence_xy, background_xy) -> tuple[np.ndarray, np.ndarray]:
    """Four spatial blocks split at the records' median longitude and latitude.

    The records are split at their median x (longitude), then each half at its own
    median y (latitude), giving four groups of nearly equal size; background points are
    assigned with the same cut lines.  Points on a cut line go to the lower side.

    Parameters
    ----------
    presence_xy : array_like of shape (n, 2)
        Record coordinates (x, y) in one CRS (e.g. longitude, latitude).
    background_xy : array_like of shape (m, 2)
        Background coordinates in the same CRS.

    Returns
    -------
    presence_groups, background_groups : ndarray of int in 0..3

    References
    ----------
    .. [1] Radosavljevic, A. & Anderson, R. P. (2014). J. Biogeography 41:629-643
       (spatially blocked partitions of presence and background).
    """
    pxy = _xy(presence_xy, "presence_xy")
    bxy = _xy(background_xy, "background_xy")
    x_cut = float(np.median(pxy[:, 0]))
    p_east = pxy[:, 0] > x_cut
    b_east = bxy[:, 0] > x_cut
    pg = np.zeros(len(pxy), dtype=int)
    bg = np.zeros(len(bxy), dtype=int)
    for half, (pm, bm) in enumerate(((~p_east, ~b_east), (p_east, b_east))):
        y_cut = float(np.median(pxy[pm, 1])) if pm.any() else 0.0
        pg[pm] = 2 * half + (pxy[pm, 1] > y_cut)
        bg[bm] = 2 * half + (bxy[bm, 1] > y_cut)
    return pg, bg


def checkerboard_partition(
    presence_xy, background_xy, block_size: float
) -> tuple[np.ndarray, np.ndarray]:
    """Two groups alternating over square blocks of side ``block_size`` (CRS units).

    Group = ``(floor(x / s) + floor(y / s)) mod 2``, for records and background alike.

    References
    ----------
    .. [1] Radosavljevic, A. & Anderson, R. P. (2014). J. Biogeography 41:629-643.
    """
    if not (np.isfinite(block_size) and block_size > 0):
        raise InputError(f"block_size must be a positive length; got {block_size!r}.")
    pxy = _xy(presence_xy, "presence_xy")
    bxy = _xy(background_xy, "background_xy")

    def group(xy):
        return (
            (np.floor(xy[:, 0] / block_size) + np.floor(xy[:, 1] / block_size)) % 2
        ).astype(int)

    return group(pxy), group(bxy)


def random_kfold_partition(
    n_presence: int, n_background: int, k: int = 5, random_state=0
) -> tuple[np.ndarray, np.ndarray]:
    """Random folds of near-equal size (the non-spatial baseline)."""
    if int(k) < 2 or int(k) > n_presence:
        raise InputError(
            f"k={k!r} folds need 2 <= k <= number of records ({n_presence})."
        )
    rng = np.random.default_rng(random_state)
    pg = rng.permutation(np.arange(n_presence) % k)
    bg = rng.permutation(np.arange(n_background) % k)
    return pg, bg


# --- inputs and parameters ----------------------------------------------------------
@dataclass(frozen=True, eq=False)
class Points:
    """Predictor values at a set of places, with where the places are.

    One value each for the records (presence), the background and the study area
    of :func:`evaluate_family`, :func:`jackknife` and :func:`null_model_test`.

    Attributes
    ----------
    env : array_like of shape (n, p)
        Predictor values, one row per place.
    xy : array_like of shape (n, 2), optional
        Coordinates of the rows: longitude and latitude (degrees) when ``lonlat``,
        else projected x and y (km).  Without them the spatial partitions, the
        buffered jackknife and the pattern-keeping null model are not available.
    area_km2 : array_like of shape (n,), optional
        Ground area of each row's cell (km²), weighting the study area's share
        predicted present; equal weights when omitted.
    lonlat : bool, default True
        ``xy`` are longitude/latitude degrees (else x, y in km).

    Examples
    --------
    >>> import numpy as np
    >>> records = Points(np.array([[12.5, 800.0], [13.1, 950.0], [11.8, 700.0]]),
    ...                  xy=np.array([[10.0, 45.0], [10.2, 45.1], [10.1, 44.9]]))
    >>> records.n, records.lonlat
    (3, True)
    """

    env: np.ndarray
    xy: np.ndarray | None = None
    area_km2: np.ndarray | None = None
    lonlat: bool = True

    @property
    def n(self) -> int:
        """Number of places (rows of ``env``)."""
        return int(np.shape(self.env)[0])


@dataclass(frozen=True)
class EvaluationParameters:
    """How :func:`evaluate_family` holds records out and tests the model.

    Attributes
    ----------
    jackknife_below : int, default 25
        Use the jackknife when there are fewer records than this
        (``[evaluation] jackknife_below``).
    partition : {"quadrants", "squares", "random"}, default "quadrants"
        Folds from this many records on: "quadrants", four spatial blocks at the
        records' medians (:func:`block_partition`); "squares", two groups of
        alternating squares (:func:`checkerboard_partition`); "random", random
        folds.
    k_folds : int, default 5
        Folds of "random".
    square_size : float, optional
        Side of the squares of "squares", in the units of the coordinates
        (degrees or km); default a quarter of the larger side of the records'
        bounding box.
    n_null : int, default 99
        Null-model replicates (0 skips the test; ``[evaluation] n_null``).
    random_state : int, default 0
        Seed of every random draw (fold, replicate and model seeds are drawn from
        it up front).
    cluster_km : float, optional
        With record coordinates: records chained by gaps of at most this (km) form
        one spatial cluster; the jackknife holds out whole clusters (a buffered
        leave-one-out) and the null model moves each cluster on its own.  None or
        0: the published leave-one-out, and the null model moves the whole
        pattern.

    Examples
    --------
    >>> EvaluationParameters(partition="squares", n_null=0).k_folds
    5
    """

    jackknife_below: int = default("evaluation", "jackknife_below")
    partition: str = "quadrants"
    k_folds: int = 5
    square_size: float | None = None
    n_null: int = default("evaluation", "n_null")
    random_state: int = 0
    cluster_km: float | None = None

    def __post_init__(self):
        if self.partition not in METHODS[1:]:
            raise InputError(
                f"Unknown partition {self.partition!r}; use one of "
                f"{', '.join(METHODS[1:])}."
            )

    @classmethod
    def from_settings(cls, settings, **changes) -> EvaluationParameters:
        """The parameters of a loaded project (``[evaluation]``), with ``changes`` on
        top (the taxon's ``random_state``, the grid's ``cluster_km``)."""
        values = dict(jackknife_below=settings.evaluation.jackknife_below,
                      n_null=settings.evaluation.n_null)
        values.update(changes)
        return cls(**values)


def _points(value, name: str) -> Points:
    if not isinstance(value, Points):
        raise TypeError(
            f"`{name}` must be a Points value (predictor rows with their coordinates), "
            f"e.g. Points(env, xy=xy); got {type(value).__name__}."
        )
    return value


def _lonlat(*places) -> bool:
    """Whether the coordinates of these places are longitude/latitude (one answer)."""
    kinds = {p.lonlat for p in places if p is not None and p.xy is not None}
    if len(kinds) > 1:
        raise InputError(
            "Some coordinates are longitude/latitude and some are km (Points.lonlat "
            "differs); give every set of places in one kind."
        )
    return kinds.pop() if kinds else True


# --- fitting tasks (top-level functions so process pools can pickle them) ---------------
@dataclass
class _FitTask:
    family: str
    params: dict
    seed: int
    train: np.ndarray
    background: np.ndarray
    test: np.ndarray | None = None
    test_background: np.ndarray | None = None
    study_area: np.ndarray | None = None
    study_area_weights: np.ndarray | None = None


#: Family name under which :func:`evaluate_family` evaluates the consensus of several
#: families (parameters: ``families`` and ``weights`` of
#: :class:`screener.models.ensemble.ConsensusModel`).
CONSENSUS = "consensus"


def _make(family, params, seed):
    params = dict(params or {})
    if family == CONSENSUS:
        from screener.models.ensemble import ConsensusModel

        return ConsensusModel(random_state=int(seed), **params)
    if accepts_random_state(family):
        params["random_state"] = int(seed)
    return make_model(family, **params)


def _run_fold(task: _FitTask) -> dict:
    model = _make(task.family, task.params, task.seed).fit(task.train, task.background)
    train_scores = np.asarray(training_presence_scores(model, task.train), float)
    train_scores = train_scores[np.isfinite(train_scores)]
    if train_scores.size == 0:
        train_scores = model.predict(task.train)
    mtp = float(train_scores.min())
    p10 = percentile_training_presence(train_scores, 10.0)
    out = {"mtp": mtp, "p10": p10}
    if task.test is not None:
        out["test_scores"] = model.predict(task.test)
    if task.test_background is not None:
        out["test_background_scores"] = model.predict(task.test_background)
    if task.study_area is not None:
        s = model.predict(task.study_area)
        w = task.study_area_weights
        suitable = s >= mtp
        out["share_present"] = float(
            suitable.mean() if w is None else np.sum(w * suitable) / np.sum(w)
        )
    return out


def _training_auc(model, presence, background) -> float:
    """AUC of a model's training scores (out-of-bag for the forest) vs background."""
    s = np.asarray(training_presence_scores(model, presence), float)
    return auc(s[np.isfinite(s)], model.predict(background))


def _run_null(task: _FitTask) -> float:
    model = _make(task.family, task.params, task.seed).fit(task.train, task.background)
    return _training_auc(model, task.train, task.background)


# --- jackknife ----------------------------------------------------------------------
@dataclass
class JackknifeResult:
    """Outcome of the leave-one-out jackknife (Pearson et al. 2007).

    Attributes
    ----------
    successes : int
        Models whose held-out records score at or above the model's lowest training
        presence (the median of them, when a model holds out a spatial cluster).
    n : int
        Number of models (= records in the plain leave-one-out; = spatial clusters
        in the buffered one).
    p_value : float
        ``P(X >= successes)``, X Poisson-binomial with the ``share_present`` values.
    share_present : ndarray of shape (n,)
        (Area-weighted) share of the study area each model predicts present.
    thresholds : ndarray of shape (k,)
        Per held-out record (``k`` of them), its model's lowest training presence.
    p10_thresholds : ndarray of shape (k,)
        Per held-out record, its model's 10th-percentile training presence.
    left_out_scores : ndarray of shape (k,)
        Score of each held-out record under the model fitted without it.
    fold_auc : ndarray of shape (k,)
        Per held-out record, its AUC against the background under its model (the
        share of background scoring below it, ties one half).
    buffer_km : float
        Records chained to the held-out one by gaps of at most this were held out
        with it (0 = plain leave-one-out).
    """

    successes: int
    n: int
    p_value: float
    share_present: np.ndarray
    thresholds: np.ndarray
    p10_thresholds: np.ndarray
    left_out_scores: np.ndarray
    fold_auc: np.ndarray
    buffer_km: float = 0.0


def _seeds(rng, size):
    return [int(s) for s in rng.integers(0, 2**31 - 1, size=size)]


def _old_jackknife(family, params, presence, background, study_area=None,
                   study_area_weights=None, random_state=0, *, map_fn=map,
                   presence_xy=None, buffer_km=0.0, lonlat=True):
    """The old form of :func:`jackknife` (arrays and keywords) in the new form."""
    study = None if study_area is None else Points(
        study_area, area_km2=study_area_weights, lonlat=lonlat)
    parameters = EvaluationParameters(random_state=random_state, cluster_km=buffer_km)
    return ((family, params, Points(presence, presence_xy, lonlat=lonlat),
             Points(background, lonlat=lonlat), study, parameters), {"map_fn": map_fn})


def _old_form_of(old, new_call: str):
    """A translator for :func:`screener.errors.accepts_old_form`: a call whose
    ``presence`` is not a :class:`Points` is in the old form."""
    name = old.__name__.removeprefix("_old_")

    def translate(*args, **kwargs):
        presence = args[2] if len(args) > 2 else kwargs.get("presence")
        if isinstance(presence, Points):
            return None
        new_args, new_kwargs = old(*args, **kwargs)
        return new_args, new_kwargs, (
            f"{name}() with predictor arrays and coordinate keywords is replaced by "
            f"{new_call}; the old form stops working in the next release."
        )

    return translate


@accepts_old_form(_old_form_of(_old_jackknife, (
    "jackknife(family, params, Points(presence, xy=presence_xy, lonlat=lonlat), "
    "Points(background), Points(study_area, area_km2=study_area_weights), "
    "EvaluationParameters(random_state=random_state, cluster_km=buffer_km), "
    "map_fn=map_fn)")))
def jackknife(
    family: str,
    params: dict | None,
    presence: Points,
    background: Points,
    study_area: Points | None = None,
    parameters: EvaluationParameters | None = None,
    *,
    map_fn: Callable = map,
) -> JackknifeResult:
    """Leave-one-out jackknife test for small samples.

    Model ``i`` is fitted without record ``i`` and thresholded at its own lowest
    training presence (out-of-bag scores for the forest); it succeeds when record ``i``
    scores at or above that threshold.  The p-value is ``P(X >= successes)`` with X
    Poisson-binomial, trial ``i`` succeeding with the share of the study area model
    ``i`` predicts present (area-weighted when weights are given).

    With the records' coordinates and ``parameters.cluster_km > 0`` the jackknife is
    spatially buffered: model ``i`` is also fitted without the records of record
    ``i``'s spatial cluster (records within ``cluster_km`` of it, of those, and so on:
    :func:`screener.randomisation.spatial_clusters`), so a held-out record is not
    predicted by its own neighbours (records of one cluster share their environment,
    and predicting one from the others says little about the niche).  A record
    leaving fewer than 2 records for training gets no model and does not count
    (``n`` is the number of models).

    Parameters
    ----------
    family : str
        Model family key.
    params : dict or None
        Family parameters.
    presence : Points
        The records (n >= 3); their ``xy`` for the buffered jackknife.
    background : Points
    study_area : Points, optional
        The study-area cells (all valid cells of the accessible area, or a sample)
        with their ``area_km2`` (equal weights when omitted); the background when
        omitted.
    parameters : EvaluationParameters, optional
        ``random_state`` seeds the per-model seeds (drawn up front); records chained
        to the held-out one by gaps of at most ``cluster_km`` (km) are left out of
        its training set too (None or 0: the published leave-one-out).
    map_fn : callable, default builtin ``map``
        ``map``-like callable used to run the n fits (e.g. an executor's ``map``).
        The old form ``jackknife(family, params, presence_array, background_array,
        study_area, study_area_weights, random_state, presence_xy=..., buffer_km=...,
        lonlat=...)`` still works for one release, with a
        :class:`~screener.errors.ScreenerDeprecationWarning`.

    Returns
    -------
    JackknifeResult

    References
    ----------
    .. [1] Pearson, R. G., Raxworthy, C. J., Nakamura, M. & Peterson, A. T. (2007).
       Predicting species distributions from small numbers of occurrence records: a
       test case using cryptic geckos in Madagascar. J. Biogeography 34:102-117.
    .. [2] Roberts, D. R. et al. (2017). Cross-validation strategies for data with
       temporal, spatial, hierarchical, or phylogenetic structure. Ecography 40:913-929
       (buffered leave-one-out; from memory).
    """
    parameters = parameters or EvaluationParameters()
    places = _points(presence, "presence"), _points(background, "background")
    lonlat = _lonlat(*places)
    presence_xy, buffer_km = places[0].xy, parameters.cluster_km or 0.0
    presence = check_predictors(places[0].env, "presence", min_rows=3)
    background = check_predictors(
        places[1].env, "background", n_features=presence.shape[1]
    )
    study_area, weights = _study_area(study_area, background)
    n = presence.shape[0]
    seeds = _seeds(np.random.default_rng(parameters.random_state), n)
    groups = _jackknife_groups(presence_xy, n, buffer_km, lonlat)
    tasks, held = [], []
    for g in groups:
        keep = np.ones(n, bool)
        keep[g] = False
        if keep.sum() < 2:
            continue
        held.append(g)
        tasks.append(
            _FitTask(
                family,
                params or {},
                seeds[g[0]],
                presence[keep],
                background,
                test=presence[g],
                test_background=background,
                study_area=study_area,
                study_area_weights=weights,
            )
        )
    n_skipped = sum(len(g) for g in groups) - sum(len(g) for g in held)
    if n_skipped:
        log.info(
            "buffered jackknife: %d of %d records leave fewer than 2 records for "
            "training and get no model", n_skipped, n)
    if not held:
        empty = np.zeros(0)
        return JackknifeResult(0, 0, float("nan"), empty, empty, empty, empty, empty,
                               buffer_km=float(buffer_km))
    results = list(map_fn(_run_fold, tasks))
    sizes = [len(g) for g in held]
    thresholds = np.repeat([r["mtp"] for r in results], sizes)
    p10 = np.repeat([r["p10"] for r in results], sizes)
    left = np.concatenate([np.asarray(r["test_scores"], float) for r in results])
    share = np.array([r["share_present"] for r in results])
    fold_auc = np.concatenate([
        [auc(np.array([v]), r["test_background_scores"]) for v in r["test_scores"]]
        for r in results
    ])
    # one trial per model: its held-out records (one, or one spatial cluster) succeed
    # when their median scores at or above the model's lowest training presence
    successes = int(sum(
        float(np.median(r["test_scores"])) >= r["mtp"] for r in results
    ))
    return JackknifeResult(
        successes=successes,
        n=len(held),
        p_value=poisson_binomial_sf(successes, share),
        share_present=share,
        thresholds=thresholds,
        p10_thresholds=p10,
        left_out_scores=left,
        fold_auc=fold_auc,
        buffer_km=float(buffer_km) if any(len(g) > 1 for g in groups) else 0.0,
    )


def _jackknife_groups(presence_xy, n, buffer_km, lonlat) -> list[np.ndarray]:
    """Records held out together: each record alone, or each spatial cluster."""
    if presence_xy is None or not buffer_km > 0:
        return [np.array([i]) for i in range(n)]
    xy = _xy(presence_xy, "presence_xy")
    if len(xy) != n:
        raise InputError(
            f"`presence_xy` has {len(xy)} rows for {n} records; give one per record."
        )
    labels = spatial_clusters(xy, buffer_km, lonlat=lonlat)
    _, first = np.unique(labels, return_index=True)
    return [np.flatnonzero(labels == labels[i]) for i in np.sort(first)]


def _study_area(study_area: Points | None, background):
    """Study-area rows and their cell areas (the background, unweighted, if None)."""
    if study_area is None:
        return background, None
    weights = _points(study_area, "study_area").area_km2
    study_area = check_predictors(
        study_area.env, "study_area", n_features=background.shape[1]
    )
    if weights is None:
        return study_area, None
    w = np.asarray(weights, dtype=float).ravel()
    if w.shape[0] != study_area.shape[0] or not np.all(np.isfinite(w)) or np.any(w < 0):
        raise InputError(
            f"`study_area.area_km2` must be {study_area.shape[0]} non-negative cell "
            f"areas (km²), one per study-area row; got shape {w.shape}."
        )
    return study_area, w


# --- null model ---------------------------------------------------------------------
@dataclass
class NullModelResult:
    """Observed training AUC against AUCs of models fitted to random points.

    Attributes
    ----------
    observed : float
    null : ndarray of shape (R,)
    p_value : float
        ``(1 + #{null >= observed}) / (1 + R)``.
    structured : bool
        The random records kept the records' spatial pattern.
    """

    observed: float
    null: np.ndarray
    p_value: float
    structured: bool = False


def _old_null_model_test(family, params, presence, background, study_area=None, *,
                         observed_auc=None, n_null=default("evaluation", "n_null"),
                         random_state=0, map_fn=map, presence_xy=None,
                         study_area_xy=None, lonlat=True, cluster_km=None):
    """The old form of :func:`null_model_test` in the new form."""
    records = Points(presence, presence_xy, lonlat=lonlat)
    if study_area is None:  # the coordinates were those of the background
        bg, study = Points(background, study_area_xy, lonlat=lonlat), None
    else:
        bg = Points(background, lonlat=lonlat)
        study = Points(study_area, study_area_xy, lonlat=lonlat)
    parameters = EvaluationParameters(n_null=n_null, random_state=random_state,
                                cluster_km=cluster_km)
    return ((family, params, records, bg, study, parameters),
            {"observed_auc": observed_auc, "map_fn": map_fn})


@accepts_old_form(_old_form_of(_old_null_model_test, (
    "null_model_test(family, params, Points(presence, xy=presence_xy, lonlat=lonlat), "
    "Points(background), Points(study_area, xy=study_area_xy), "
    "EvaluationParameters(n_null=n_null, random_state=random_state, "
    "cluster_km=cluster_km), observed_auc=observed_auc, map_fn=map_fn)")))
def null_model_test(
    family: str,
    params: dict | None,
    presence: Points,
    background: Points,
    study_area: Points | None = None,
    parameters: EvaluationParameters | None = None,
    *,
    observed_auc: float | None = None,
    map_fn: Callable = map,
) -> NullModelResult:
    """Null-model test of the training AUC (Raes & ter Steege 2007).

    Each replicate takes ``n`` study-area rows as random "records", fits the same
    family with the same parameters to them against the background, and records its
    training AUC.  When the records' coordinates and the study area's are given, the
    random records keep the records' spatial pattern (:func:`pattern_draws`): ten
    records in two clusters are compared with ten records in two clusters, not with
    ten scattered ones, which would make any clustered sample look significant.
    Without coordinates the rows are drawn at random (without replacement).  Training
    scores are those of :func:`screener.models.training_presence_scores`.

    Parameters
    ----------
    family, params, presence, background
        As in :func:`jackknife`.
    study_area : Points, optional
        Rows records may be drawn from (the background when omitted).  With its
        ``xy`` (the background's when omitted) and the records' ``xy`` the random
        records keep the records' pattern.
    parameters : EvaluationParameters, optional
        ``n_null`` replicates, seeded from ``random_state``.  With coordinates,
        records chained by gaps of at most ``cluster_km`` (km) form one spatial
        cluster, and each cluster is moved on its own
        (:func:`screener.randomisation.spatial_clusters`); when None the whole
        record pattern moves as one.  Moving clusters separately keeps the
        clustering without asking a pattern that spans the whole study area to fit
        in it elsewhere.
    observed_auc : float, optional
        Training AUC of the model fitted to the real records; computed when omitted.
    map_fn : callable, default builtin ``map``
        The old form (arrays, ``n_null=``, ``random_state=``, ``presence_xy=``,
        ``study_area_xy=``, ``lonlat=``, ``cluster_km=``) still works for one
        release, with a :class:`~screener.errors.ScreenerDeprecationWarning`.

    Returns
    -------
    NullModelResult

    References
    ----------
    .. [1] Raes, N. & ter Steege, H. (2007). A null-model for significance testing of
       presence-only species distribution models. Ecography 30:727-736.
    .. [2] Fortin, M.-J. & Dale, M. R. T. (2005). Spatial Analysis: A Guide for
       Ecologists. Cambridge University Press.
    """
    parameters = parameters or EvaluationParameters()
    records, bg = _points(presence, "presence"), _points(background, "background")
    drawn_from = bg if study_area is None else _points(study_area, "study_area")
    lonlat = _lonlat(records, drawn_from)
    presence_xy, study_area_xy = records.xy, drawn_from.xy
    n_null, cluster_km = parameters.n_null, parameters.cluster_km
    presence = check_predictors(records.env, "presence", min_rows=2)
    background = check_predictors(
        bg.env, "background", n_features=presence.shape[1]
    )
    pool, _ = _study_area(study_area, background)
    n = presence.shape[0]
    if pool.shape[0] < n:
        raise InputError(
            f"The study area has {pool.shape[0]} cells, fewer than the {n} records; "
            "the null model needs at least as many cells as records."
        )
    rng = np.random.default_rng(parameters.random_state)
    obs_seed, pattern_seed, *seeds = _seeds(rng, int(n_null) + 2)
    if observed_auc is None:
        model = _make(family, params, obs_seed).fit(presence, background)
        observed_auc = _training_auc(model, presence, background)
    structured = presence_xy is not None and study_area_xy is not None
    if structured:
        clusters = (
            None if cluster_km is None
            else spatial_clusters(presence_xy, cluster_km, lonlat=lonlat)
        )
        draws = pattern_draws(presence_xy, study_area_xy, len(seeds), pattern_seed,
                              lonlat=lonlat, clusters=clusters)
    else:
        draws = [np.random.default_rng(s).choice(pool.shape[0], size=n, replace=False)
                 for s in seeds]
    tasks = [_FitTask(family, params or {}, s, pool[idx], background)
             for s, idx in zip(seeds, draws, strict=True)]
    null = np.array(list(map_fn(_run_null, tasks)), dtype=float)
    p = (1.0 + np.sum(null >= observed_auc)) / (1.0 + null.size)
    return NullModelResult(observed=float(observed_auc), null=null, p_value=float(p),
                           structured=structured)


# --- one entry point ----------------------------------------------------------------
@dataclass
class FamilyEvaluation:
    """Evaluation of one model family for one taxon (a row of evaluation.csv).

    Attributes
    ----------
    family : str
    n_records : int
    method : str
        "jackknife", "quadrants", "squares" or "random".
    auc : float
        Test AUC (mean over folds; for the jackknife, the mean over models of the
        left-out record's AUC against the background).
    auc_train : float
        AUC of the model fitted to all records, on its training records (their
        out-of-bag scores for the forest) against the background.
    auc_null_p : float
        Null-model p-value of ``auc_train`` (NaN when not run).
    omission_mtp, omission_p10 : float
        Omission of test records at the training MTP and 10th-percentile thresholds.
    boyce : float
        Continuous Boyce index on test data (NaN for the jackknife: one test record per
        model).
    tss : float
        Maximum TSS on test data (NaN for the jackknife).
    jackknife_successes : int or None
    jackknife_p : float or None
    threshold_mtp : float
        MTP of the model fitted to all records (out-of-bag for the forest).
    n_folds : int
        Folds that had test records.
    note : str
        Why a metric is empty, when one is.
    """

    family: str
    n_records: int
    method: str
    auc: float = math.nan
    auc_train: float = math.nan
    auc_null_p: float = math.nan
    omission_mtp: float = math.nan
    omission_p10: float = math.nan
    boyce: float = math.nan
    tss: float = math.nan
    jackknife_successes: int | None = None
    jackknife_p: float | None = None
    threshold_mtp: float = math.nan
    n_folds: int = 0
    note: str = ""
    extra: dict = field(default_factory=dict, repr=False)

    def as_row(self) -> dict:
        """A flat dict for evaluation.csv (``family`` is written as ``algorithm``)."""
        row = asdict(self)
        row.pop("extra")
        row["algorithm"] = row.pop("family")
        order = [
            "algorithm",
            "n_records",
            "method",
            "auc",
            "auc_train",
            "auc_null_p",
            "threshold_mtp",
            "omission_mtp",
            "omission_p10",
            "boyce",
            "tss",
            "jackknife_successes",
            "jackknife_p",
            "n_folds",
            "note",
        ]
        return {k: row[k] for k in order}


def _nanmean(values) -> float:
    arr = np.asarray([v for v in values if v is not None], dtype=float)
    arr = arr[np.isfinite(arr)]
    return float(arr.mean()) if arr.size else math.nan


def _old_evaluate_family(family, params, presence, background, *, presence_xy=None,
                         background_xy=None, study_area=None, study_area_weights=None,
                         jackknife_below=default("evaluation", "jackknife_below"),
                         partition="quadrants", k_folds=5, checkerboard_size=None,
                         n_null=default("evaluation", "n_null"), random_state=0,
                         map_fn=map, study_area_xy=None, lonlat=True, cluster_km=None):
    """The old form of :func:`evaluate_family` in the new form."""
    study = None if study_area is None else Points(
        study_area, study_area_xy, study_area_weights, lonlat)
    parameters = EvaluationParameters(
        jackknife_below=jackknife_below, partition=partition, k_folds=k_folds,
        square_size=checkerboard_size, n_null=n_null, random_state=random_state,
        cluster_km=cluster_km)
    return ((family, params, Points(presence, presence_xy, lonlat=lonlat),
             Points(background, background_xy, lonlat=lonlat), study, parameters),
            {"map_fn": map_fn})


@accepts_old_form(_old_form_of(_old_evaluate_family, (
    "evaluate_family(family, params, Points(presence, xy=presence_xy, lonlat=lonlat), "
    "Points(background, xy=background_xy), Points(study_area, xy=study_area_xy, "
    "area_km2=study_area_weights), EvaluationParameters(jackknife_below=..., "
    "partition=..., k_folds=..., square_size=checkerboard_size, n_null=..., "
    "random_state=..., cluster_km=...), map_fn=map_fn)")))
def evaluate_family(
    family: str,
    params: dict | None,
    presence: Points,
    background: Points,
    study_area: Points | None = None,
    parameters: EvaluationParameters | None = None,
    *,
    map_fn: Callable = map,
) -> FamilyEvaluation:
    """Evaluate one family: jackknife below ``jackknife_below`` records, else folds.

    Parameters
    ----------
    family : str
    params : dict or None
    presence : Points
        The records (n >= 3).
    background : Points
        The background.  With both ``xy`` the spatial partitions are available
        (without them "random" is used), and a family whose ``fit`` takes
        ``groups`` (ppm) gets the records' spatial blocks (:func:`block_partition`)
        for the mapped model.
    study_area : Points, optional
        Study-area rows with their cell areas (``area_km2``) and coordinates, for
        the jackknife and the null model; the background when omitted.
    parameters : EvaluationParameters, optional
        Jackknife below ``jackknife_below`` records, else the ``partition`` folds;
        ``n_null`` null-model replicates (0 skips the test; with the records' and
        the study area's coordinates the null records keep the records' spatial
        pattern, :func:`pattern_draws`); ``cluster_km``: the jackknife holds out
        whole spatial clusters and the null model moves each cluster on its own
        (:func:`jackknife`, :func:`null_model_test`).  Defaults when omitted.
    map_fn : callable, default builtin ``map``
        The old form (arrays and one keyword per option) still works for one
        release, with a :class:`~screener.errors.ScreenerDeprecationWarning`.

    Returns
    -------
    FamilyEvaluation

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(0)
    >>> records = Points(rng.normal(0.0, 0.5, size=(8, 2)))
    >>> background = Points(rng.normal(0.0, 2.0, size=(200, 2)))
    >>> ev = evaluate_family("ellipsoid", {}, records, background,
    ...                      parameters=EvaluationParameters(n_null=0))
    >>> ev.method, ev.n_folds
    ('jackknife', 8)
    """
    parameters = parameters or EvaluationParameters()
    places = _points(presence, "presence"), _points(background, "background")
    _lonlat(*places, study_area)
    presence_xy, background_xy = places[0].xy, places[1].xy
    cluster_km = parameters.cluster_km
    presence = check_predictors(places[0].env, "presence", min_rows=3)
    background = check_predictors(
        places[1].env, "background", n_features=presence.shape[1]
    )
    n = presence.shape[0]
    rng = np.random.default_rng(parameters.random_state)
    full_seed, jk_seed, part_seed, fold_seed, null_seed = _seeds(rng, 5)

    fit_kw = {}
    takes_groups = family == CONSENSUS or accepts_groups(family)
    if presence_xy is not None and background_xy is not None and takes_groups:
        # Families that choose their own complexity by held-out blocks (ppm) get the
        # records' spatial blocks for the mapped model.
        fit_kw["groups"] = block_partition(presence_xy, background_xy)[0]
    full = _make(family, params, full_seed).fit(presence, background, **fit_kw)
    train_scores = training_presence_scores(full, presence)
    bg_scores = full.predict(background)
    finite = np.asarray(train_scores, float)
    finite = finite[np.isfinite(finite)]
    auc_train = auc(finite, bg_scores)
    ev = FamilyEvaluation(
        family=family,
        n_records=n,
        method="jackknife",
        auc_train=auc_train,
        threshold_mtp=float(finite.min()) if finite.size else math.nan,
    )
    ev.extra["model"] = full  # the fitted full-data model, for mapping

    if n < parameters.jackknife_below:
        jk = jackknife(family, params, *places, study_area,
                       replace(parameters, random_state=jk_seed), map_fn=map_fn)
        ev.auc = _nanmean(jk.fold_auc)
        ev.omission_mtp = _nanmean(jk.left_out_scores < jk.thresholds)
        ev.omission_p10 = _nanmean(jk.left_out_scores < jk.p10_thresholds)
        ev.jackknife_successes = jk.successes
        ev.jackknife_p = jk.p_value
        ev.n_folds = jk.n
        ev.note = (
            "Boyce and TSS left empty: the jackknife holds out one record per model, "
            "and both need several held-out records scored by the same model."
        )
        n_held = int(np.asarray(jk.left_out_scores).size)
        if n_held == 0:
            ev.note = (
                f"No jackknife: the {n} records form spatial clusters too large to hold "
                f"out (records within {cluster_km or 0.0:.1f} km chain into one), "
                "leaving fewer than 2 records to train on; AUC, omission and the "
                "jackknife p are left empty. Judge this model with independent "
                "records, such as the finds of a survey."
            )
        elif n_held < n:
            ev.note += (
                f" {n - n_held} of {n} records lie in a cluster too large to hold out "
                "and were not tested."
            )
        ev.extra["jackknife"] = jk
    else:
        method, pg, bgg = _partition(
            parameters.partition,
            n,
            background.shape[0],
            presence_xy,
            background_xy,
            parameters.k_folds,
            parameters.square_size,
            part_seed,
        )
        ev.method = method
        groups = [g for g in np.unique(pg)]
        seeds = _seeds(np.random.default_rng(fold_seed), len(groups))
        tasks = []
        for g, s in zip(groups, seeds, strict=True):
            tasks.append(
                _FitTask(
                    family,
                    params or {},
                    s,
                    presence[pg != g],
                    background[bgg != g],
                    test=presence[pg == g],
                    test_background=background[bgg == g],
                )
            )
        results = list(map_fn(_run_fold, tasks))
        aucs, om_mtp, om_p10, boyces, tsss = [], [], [], [], []
        for r in results:
            t, tb = r["test_scores"], r["test_background_scores"]
            om_mtp.append(omission_rate(t, r["mtp"]))
            om_p10.append(omission_rate(t, r["p10"]))
            if tb.size:
                aucs.append(auc(t, tb))
                boyces.append(boyce_index(t, tb))
                tsss.append(tss_max(t, tb))
        ev.auc, ev.omission_mtp, ev.omission_p10 = (
            _nanmean(aucs),
            _nanmean(om_mtp),
            _nanmean(om_p10),
        )
        ev.boyce, ev.tss = _nanmean(boyces), _nanmean(tsss)
        ev.n_folds = len(results)

    if parameters.n_null and parameters.n_null > 0:
        fixed = dict(params or {})
        if hasattr(full, "selected_params"):
            fixed.update(full.selected_params())
        nm = null_model_test(family, fixed, *places, study_area,
                             replace(parameters, random_state=null_seed),
                             observed_auc=auc_train, map_fn=map_fn)
        ev.auc_null_p = nm.p_value
        ev.extra["null_model"] = nm
    return ev


def _partition(partition, n, m, presence_xy, background_xy, k_folds, size, seed):
    if partition != "random" and (presence_xy is None or background_xy is None):
        log.info(
            "No coordinates given for %s partitions; using random folds", partition
        )
        partition = "random"
    if partition == "quadrants":
        pg, bg = block_partition(presence_xy, background_xy)
    elif partition == "squares":
        pxy = _xy(presence_xy, "presence_xy")
        if size is None:
            size = float(np.max(np.ptp(pxy, axis=0))) / 4.0 or 1.0
        pg, bg = checkerboard_partition(pxy, background_xy, size)
    else:
        pg, bg = random_kfold_partition(n, m, k_folds, seed)
    return partition, pg, bg
