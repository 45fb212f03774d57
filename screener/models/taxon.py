"""The per-taxon modelling stage: background, one fit per family, consensus.

:func:`fit_taxon` turns one taxon's records and the predictor stack into a
:class:`~screener.results.TaxonResult` in four small steps, each returning one typed
value:

1. :func:`sample_taxon` -- the accessible area, the background draw and the
   predictor values at records and background (:class:`TaxonSample`);
2. :func:`fit_family` -- per model family: evaluation, the fitted model mapped over
   the grid and each time slice, thresholds, response curves and importance
   (:class:`FamilyFit`);
3. :func:`evaluation_rows` -- the rows of evaluation.csv, the consensus evaluated like
   a family;
4. the consensus map, its thresholds, agreement, MESS and outside-range maps
   (in :func:`fit_taxon`).

The pipeline calls :func:`fit_taxon` once per taxon; a notebook can call each step.
"""

from __future__ import annotations

import zlib
from dataclasses import dataclass, field, replace

import numpy as np

from screener.background import Background, accessible_area, draw_background
from screener.evaluation import (
    CONSENSUS,
    EvaluationParameters,
    FamilyEvaluation,
    Points,
    evaluate_family,
)
from screener.evaluation import auc as auc_fn
from screener.layers import LayerStack
from screener.models import family_params
from screener.models.base import ClampedModel, training_presence_scores
from screener.models.ensemble import agreement_map, ensemble_weights, weighted_mean_map
from screener.models.inspect import permutation_importance, response_curves
from screener.models.mapping import outside_map, predict_map
from screener.novelty import mess_map
from screener.randomisation import cluster_link_km
from screener.results import TaxonRecords, TaxonResult
from screener.thresholds import compute_thresholds

__all__ = [
    "TaxonSample",
    "FamilyFit",
    "taxon_seed",
    "family_params",
    "sample_taxon",
    "fit_family",
    "evaluation_rows",
    "fit_taxon",
]


def taxon_seed(random_state: int, taxon: str) -> int:
    """Seed of one taxon's random draws: adding a taxon does not change the others'."""
    ss = np.random.SeedSequence([int(random_state) & 0xFFFFFFFF, zlib.crc32(taxon.encode())])
    return int(ss.generate_state(1)[0])



@dataclass(frozen=True, eq=False)
class TaxonSample:
    """One taxon's records and background, in geographic and environmental space.

    Attributes
    ----------
    records : TaxonRecords
    seed : int
        Seed of the taxon's random draws (:func:`taxon_seed`).
    accessible : ndarray of bool, shape (n_rows, n_cols)
        Accessible area (the record cells included).
    background : screener.background.Background
        Background cells drawn from the accessible area.
    presence_env, background_env : ndarray of shape (n, n_layers)
        Predictor values at the records and at the background cells.
    presence_xy, background_xy : ndarray of shape (n, 2)
        Longitude and latitude (degrees) of the records and background cells.
    """

    records: TaxonRecords
    seed: int
    accessible: np.ndarray
    background: Background
    presence_env: np.ndarray
    background_env: np.ndarray
    presence_xy: np.ndarray
    background_xy: np.ndarray


@dataclass(frozen=True, eq=False)
class FamilyFit:
    """One model family fitted, evaluated and mapped for one taxon.

    Attributes
    ----------
    family : str
    evaluation : screener.evaluation.FamilyEvaluation
    baselines : dict
        ``auc_<partition>`` and ``omission_mtp_<partition>`` of the non-spatial and
        checkerboard baselines (empty under the jackknife).
    suitability : ndarray of float32
        The fitted model mapped over the grid (clamped when ``[models] clamp``).
    slice_maps : dict of str to ndarray
        The same model mapped on each time slice.
    thresholds : dict of str to Threshold
    record_scores, background_scores : ndarray
        The model's scores at the training records and the background.
    curves, importance : dict
        Response curves and permutation importance (for the report).
    """

    family: str
    evaluation: FamilyEvaluation
    baselines: dict
    suitability: np.ndarray
    slice_maps: dict
    thresholds: dict
    record_scores: np.ndarray
    background_scores: np.ndarray
    curves: dict = field(default_factory=dict)
    importance: dict = field(default_factory=dict)


def sample_taxon(records: TaxonRecords, stack: LayerStack, settings, seed: int) -> TaxonSample:
    """Accessible area, background draw and predictor values of one taxon.

    The accessible area holds the cells within ``[background] buffer_km`` of a record
    (geodesic km) and the record cells themselves; up to ``[background] max_points``
    background cells are drawn from it with ``seed``.
    """
    grid = stack.grid
    acc = accessible_area(grid, records.lon, records.lat, settings.background.buffer_km)
    acc[records.rows, records.cols] = True
    bg = draw_background(grid, acc, max_points=settings.background.max_points,
                         random_state=seed)
    return TaxonSample(
        records=records,
        seed=seed,
        accessible=acc,
        background=bg,
        presence_env=stack.values_at(records.rows, records.cols),
        background_env=stack.values_at(bg.rows, bg.cols),
        presence_xy=np.column_stack([records.lon, records.lat]),
        background_xy=np.column_stack(grid.lonlat(bg.rows, bg.cols)),
    )


def fit_family(family: str, sample: TaxonSample, stack: LayerStack, settings, *,
               slices=(), map_fn=map) -> FamilyFit:
    """Evaluate, fit, map and threshold one model family for one taxon.

    The evaluated model is the one mapped (fitted once).  With at least
    ``[evaluation] jackknife_below`` records the spatial blocks are the main estimate
    and alternating squares and random folds are computed as baselines, to show how
    much spatial structure matters.  Response curves are held at the records'
    medians, so each curve crosses the niche.
    """
    s = settings
    P, B = sample.presence_env, sample.background_env
    params = family_params(s, family)
    records, background = _points(sample)
    parameters = EvaluationParameters.from_settings(
        s, random_state=sample.seed,
        cluster_km=cluster_link_km(stack.grid, s.occurrences.cluster_cells))
    ev = evaluate_family(family, params, records, background, parameters=parameters,
                         map_fn=map_fn)
    model = ev.extra["model"]
    baselines = {}
    if sample.records.n >= s.evaluation.jackknife_below:
        for part in ("squares", "random"):
            other = evaluate_family(
                family, params, records, background,
                parameters=replace(parameters, partition=part, n_null=0), map_fn=map_fn)
            baselines.update({f"auc_{part}": other.auc,
                              f"omission_mtp_{part}": other.omission_mtp})
    mapped = ClampedModel.from_rows(model, P, B) if s.models.clamp else model
    suitability = predict_map(mapped, stack, map_fn=map_fn)
    scores = training_presence_scores(model, P)
    b_scores = model.predict(B)
    areas = np.asarray(stack.grid.cell_area_km2, float)
    thresholds = compute_thresholds(scores, suitability, areas, relax=s.thresholds.relax,
                                    background_scores=b_scores)
    # the same fitted model on each time slice, clamped like the main map
    slice_maps = {sl.name: predict_map(mapped, sl.stack, map_fn=map_fn) for sl in slices}
    return FamilyFit(
        family=family,
        evaluation=ev,
        baselines=baselines,
        suitability=suitability,
        slice_maps=slice_maps,
        thresholds=thresholds,
        record_scores=scores,
        background_scores=b_scores,
        curves=response_curves(model, B, names=stack.names, at=np.median(P, axis=0)),
        importance=permutation_importance(model, P, B, random_state=sample.seed,
                                          names=stack.names),
    )


def _points(sample: TaxonSample) -> tuple:
    """The records and the background of a sample as evaluation :class:`Points`
    (the background is also the study area of the jackknife and the null model)."""
    return (Points(sample.presence_env, sample.presence_xy),
            Points(sample.background_env, sample.background_xy))


def _threshold_columns(th: dict) -> dict:
    out = {}
    for name, t in th.items():
        out[f"threshold_{name}"] = t.value
        out[f"area_km2_{name}"] = t.area_km2
        out[f"training_omission_{name}"] = t.training_omission
    if "mtp" in th:
        out["omission_mtp_train"] = th["mtp"].training_omission
    return out


def evaluation_rows(sample: TaxonSample, fits: dict, weights: dict, consensus_thresholds,
                    settings, *, map_fn=map, cluster_km: float | None = None) -> list:
    """Rows of evaluation.csv for one taxon: one per family, then the ensemble.

    The consensus map is evaluated like a family: the same jackknife or spatial
    blocks and pattern-keeping null model (spatial clusters of ``cluster_km``), the
    families refitted with the weights fixed.  Its ``auc_train`` and thresholds are those of the mapped consensus.
    """
    s = settings
    taxon, n = sample.records.taxon, sample.records.n
    rows = []
    for family, fit in fits.items():
        row = {"taxon": taxon, "algorithm": family}
        row.update({k: v for k, v in fit.evaluation.as_row().items()
                    if k not in ("family", "taxon")})
        row.setdefault("n_records", n)
        row.update(fit.baselines)
        row.update(_threshold_columns(fit.thresholds))
        row["ensemble_weight"] = weights[family]
        rows.append(row)
    ens = {"taxon": taxon, "algorithm": "ensemble", "n_records": n}
    if len(fits) > 1:
        records, background = _points(sample)
        ev_c = evaluate_family(
            CONSENSUS,
            {"families": {f: family_params(s, f) for f in fits}, "weights": weights},
            records, background,
            parameters=EvaluationParameters.from_settings(
                s, random_state=sample.seed, cluster_km=cluster_km),
            map_fn=map_fn,
        )
        ens.update({k: v for k, v in ev_c.as_row().items()
                    if k not in ("algorithm", "n_records")})
    else:
        ens.update({k: v for k, v in next(iter(fits.values())).evaluation.as_row().items()
                    if k not in ("algorithm", "n_records")})
    c_rec = sum(weights[f] * fits[f].record_scores for f in fits)
    c_bg = sum(weights[f] * fits[f].background_scores for f in fits)
    ens["auc_train"] = auc_fn(c_rec, c_bg)
    ens.update(_threshold_columns(consensus_thresholds))
    ens["ensemble_weight"] = 1.0
    rows.append(ens)
    return rows


def fit_taxon(records: TaxonRecords, stack: LayerStack, settings, *, seed: int,
              slices=(), map_fn=map, step=None) -> TaxonResult:
    """Fit, evaluate, threshold and map every model family for one taxon.

    Parameters
    ----------
    records : TaxonRecords
    stack : LayerStack
        The predictors.
    settings : screener.project.Settings
    seed : int
        The taxon's seed (:func:`taxon_seed`).
    slices : sequence of screener.slices.TimeSlice
        Time slices to map each fitted model on.
    map_fn : callable, default builtin map
        An executor's ``map``, for independent evaluation tasks and streamed stacks.
    step : callable, optional
        Receives a progress line per family.

    Returns
    -------
    TaxonResult
    """
    s = settings
    sample = sample_taxon(records, stack, s, seed)
    fits = {}
    for family in s.models.families:
        if step is not None:
            step(f"{records.taxon}: {family} model ({records.n} records, "
                 f"{sample.background.n} background)")
        fits[family] = fit_family(family, sample, stack, s, slices=slices, map_fn=map_fn)
    weights = ensemble_weights({f: fit.evaluation.auc for f, fit in fits.items()})
    family_maps = {f: fit.suitability for f, fit in fits.items()}
    consensus = weighted_mean_map(family_maps, weights)
    c_rec = sum(weights[f] * fits[f].record_scores for f in fits)
    c_bg = sum(weights[f] * fits[f].background_scores for f in fits)
    areas = np.asarray(stack.grid.cell_area_km2, float)
    c_th = compute_thresholds(c_rec, consensus, areas, relax=s.thresholds.relax,
                              background_scores=c_bg)
    P, B = sample.presence_env, sample.background_env
    mess, most = mess_map(stack, B, map_fn=map_fn)
    slice_maps = {}
    for f, fit in fits.items():
        for name, m in fit.slice_maps.items():
            slice_maps.setdefault(name, {})[f] = m
    return TaxonResult(
        taxon=records.taxon,
        records=records,
        suitability=consensus.astype(np.float32),
        family_maps=family_maps,
        agreement=agreement_map(family_maps,
                                {f: fit.thresholds["mtp"].value for f, fit in fits.items()}),
        mess=mess,
        clamped=outside_map(stack, ClampedModel.from_rows(None, P, B), map_fn=map_fn),
        most_dissimilar=most,
        thresholds=c_th,
        accessible=sample.accessible,
        evaluation=evaluation_rows(
            sample, fits, weights, c_th, s, map_fn=map_fn,
            cluster_km=cluster_link_km(stack.grid, s.occurrences.cluster_cells)),
        figures={"response_curves": {f: fit.curves for f, fit in fits.items()},
                 "importance": {f: fit.importance for f, fit in fits.items()}},
        presence_env=P,
        background_env=B,
        background_cells=(sample.background.rows, sample.background.cols),
        seed=seed,
        slice_maps=slice_maps,
        ensemble_weights=dict(weights),
    )
