"""Run the stages in order: intake, models, overlap, candidate sites, outputs.

This module and :mod:`screener.cli` are the only places that put stages together;
each stage is a plain function that a notebook user can call on the same values.
Work is cached by input hashes and settings (:mod:`screener.cache`), so a rerun with
new ranking weights refits nothing, and a run interrupted with Ctrl-C resumes
without redoing finished stages.
"""

from __future__ import annotations

import dataclasses
import importlib.metadata as md
import itertools
import logging
import platform
import time
import warnings
import zlib

import geopandas as gpd
import numpy as np
import pandas as pd
import rasterio

from screener import __version__
from screener.access import walk_from_start_points
from screener.cache import StageCache, digest
from screener.intake import (
    Intake,
    check_project,
    file_sha256,
    input_paths,
    layer_paths,
    load_inputs,
    reproduction_settings,
)
from screener.isolation import (
    Clade,
    IsolationParameters,
    SiteLayers,
    find_candidates,
    paths_geodataframe,
    sites_geodataframe,
)
from screener.layers import hillshade
from screener.models.ensemble import clade_agreement
from screener.models.mapping import geographic_refit, geographic_test_cost
from screener.models.taxon import fit_taxon, taxon_seed
from screener.novelty import mess_map
from screener.outputs.sheets import plan_sampling_points
from screener.outputs.run_folder import locate_run_inputs, relocate
from screener.outputs.staging import check_output_folder, new_run_id, staged_output
from screener.outputs.tables import OVERLAP_COLUMNS
from screener.outputs.writer import write_outputs
from screener.overlap import (
    EnvironmentalSpaceParameters,
    OverlapTaxon,
    OverlapTestParameters,
    SharedSpace,
    compare_pair,
    correct_for_multiplicity,
    shared_available_cells,
)
from screener.parallel import Executor, default_n_workers, make_executor
from screener.progress import Progress
from screener.project import Settings
from screener.randomisation import cluster_link_km
from screener.ranking import assign_site_ids, group_sites, rank_sites
from screener.records import drop_summary_lines, summarise_drops
from screener.results import OverlapResult, PlanResult, RunResult, TaxonResult
from screener.robustness import RefitPlan, record_resampling
from screener.routes import walking_routes
from screener.slices import analyse_slices, site_mean

__all__ = [
    "Intake",
    "Progress",
    "load_inputs",
    "model_taxon",
    "compare_taxa",
    "plan_sites",
    "run_project",
    "check_project",
    "taxon_seed",
    "file_sha256",
    "input_paths",
    "layer_paths",
    "locate_run_inputs",
    "relocate",
    "reproduction_settings",
]

log = logging.getLogger(__name__)


# --------------------------------------------------------------------------- models
def model_taxon(
    intake: Intake,
    taxon: str,
    *,
    executor: Executor | None = None,
    progress: Progress | None = None,
) -> TaxonResult:
    """Fit, evaluate, threshold and map every model family for one taxon
    (:func:`screener.models.taxon.fit_taxon` on the intake's values).

    Parameters
    ----------
    intake : Intake
    taxon : str
    executor : screener.parallel.Executor, optional
        Runs independent evaluation tasks (and streamed stacks window by window) on
        its workers; None runs everything in this process.
    progress : Progress, optional

    Returns
    -------
    TaxonResult
    """
    progress = progress or Progress(None)
    s = intake.settings
    return fit_taxon(intake.records.taxa[taxon], intake.predictor_stack(), s,
                     seed=taxon_seed(s.project.random_state, taxon), slices=intake.slices,
                     map_fn=executor.map if executor is not None else map,
                     step=progress.step)


# --------------------------------------------------------------------------- overlap
def compare_taxa(intake: Intake, taxa: dict, *, executor: Executor | None = None,
                 progress=None) -> OverlapResult:
    """Niche overlap and its tests for every pair of taxa.

    Returns
    -------
    OverlapResult
        Rows of overlap.csv, a plain-words reading and the
        :class:`screener.overlap.PairComparison` of every pair.
    """

    progress = progress or Progress(None)
    s = intake.settings
    grid = intake.grid
    names = list(taxa)
    rows, comparisons = [], []
    areas = np.asarray(grid.cell_area_km2, float)
    cluster_km = cluster_link_km(grid, s.occurrences.cluster_cells)
    for a, b in itertools.combinations(names, 2):
        ta, tb = taxa[a], taxa[b]
        seed = int(np.random.SeedSequence(
            [s.project.random_state, zlib.crc32(f"{a}\x00{b}".encode())]
        ).generate_state(1)[0])
        refit, skipped = geographic_refit(s, intake.predictor_stack(), ta.background_env,
                                          tb.background_env, seed=ta.seed)
        if skipped:
            progress.step(skipped)
        progress.step(
            f"{a} vs {b}: {s.overlap.n_replicates} replicates"
            + (" (environmental and geographic)" if refit else " (environmental)")
        )
        avail = shared_available_cells(
            grid, ta.accessible, tb.accessible,
            study_area=s.overlap.available_environment == "study_area",
            max_points=s.background.max_points, random_state=seed,
        )
        cmp = compare_pair(
            _overlap_taxon(grid, a, ta),
            _overlap_taxon(grid, b, tb),
            shared=SharedSpace(
                cell_area_km2=areas,
                env_available=intake.predictor_stack().values_at(*avail),
                predictor_names=intake.predictor_stack().names,
            ),
            test_parameters=OverlapTestParameters.from_settings(
                s, random_state=seed, cluster_km=cluster_km,
                geographic_budget_s=float("inf"),
            ),
            space_parameters=EnvironmentalSpaceParameters.from_settings(s),
            executor=executor,
            geographic_fit_predict=refit,
        )
        comparisons.append(cmp)
    # one Holm correction over every p-value of the run, then the tables and readings
    correct_for_multiplicity(comparisons, s.overlap.alpha)
    for cmp in comparisons:
        rows.extend(cmp.rows())
    readings = [cmp.plain_reading() for cmp in comparisons]

    df = pd.DataFrame(rows) if rows else pd.DataFrame(columns=OVERLAP_COLUMNS)
    return OverlapResult(df, readings, comparisons)


def _overlap_taxon(grid, name: str, t):
    """One taxon's map, records, background and accessible area for the overlap
    tests, with longitude, latitude of its records and background cells (row order of
    their predictor rows) so the tests can keep the records' spatial structure."""
    bg_xy = None
    if t.background_cells is not None:
        bg_xy = np.column_stack(grid.lonlat(*t.background_cells))
    return OverlapTaxon(
        name=name,
        map=t.suitability,
        env_records=t.presence_env,
        env_background=t.background_env,
        xy_records=np.column_stack([t.records.lon, t.records.lat]),
        xy_background=bg_xy,
        cells=np.ravel_multi_index((t.records.rows, t.records.cols), grid.shape),
        accessible=t.accessible,
    )


# --------------------------------------------------------------------------- sites
def plan_sites(intake: Intake, taxa: dict, *, executor: Executor | None = None,
               progress=None) -> PlanResult:
    """Candidate sites, least-cost paths, barriers, access and the ranked plan.

    ``executor`` runs the clade MESS and the time slices window by window on its
    workers when the layers are streamed, and the bootstrap refits of the records;
    None runs everything in this process.

    Returns
    -------
    PlanResult
        Sites (best first), least-cost paths, barrier and walking-time maps, the
        :class:`screener.isolation.CandidateSet`, the clade MESS, walking routes and
        the time slices.
    """

    progress = progress or Progress(None)
    map_fn = executor.map if executor is not None else None
    s = intake.settings
    grid = intake.grid
    use = s.thresholds.use
    suit = {n: t.suitability for n, t in taxa.items()}
    th_main = {n: t.thresholds[use].value for n, t in taxa.items()}
    # stability is checked against the other set, whichever one is primary
    other = "relaxed" if use == "mtp" else "mtp"
    th_relaxed = {n: t.thresholds[other].value for n, t in taxa.items()}
    records = {n: (t.records.rows, t.records.cols) for n, t in taxa.items()}
    agreement = clade_agreement((t.agreement for t in taxa.values()), grid.mask)
    # MESS of every cell against the pooled calibration background of the clade
    clade_mess, _ = mess_map(intake.predictor_stack(),
                             np.vstack([t.background_env for t in taxa.values()]),
                             map_fn=map_fn)
    clamped = None
    for t in taxa.values():
        if getattr(t, "clamped", None) is not None:
            clamped = t.clamped.copy() if clamped is None else np.fmax(clamped, t.clamped)
    progress.step("patches, known ranges and cost distance")
    clade = Clade(grid, suit, records, layers=SiteLayers(
        agreement=agreement, mess=clade_mess, elevation=intake.elevation,
        clamped=clamped))
    cand = find_candidates(clade, th_main, th_relaxed, IsolationParameters.from_settings(
        s, threshold_names=(use, other)))
    sites = cand.sites.copy()
    slices = None
    if intake.slices:
        progress.step(f"time slices: {', '.join(sl.name for sl in intake.slices)} "
                      "(projection, stability, isolation per slice)")
        slices = analyse_slices(
            grid, intake.slices, taxa, cand, th_main,
            method=s.slices.stability,
            isolation=IsolationParameters.from_settings(s),
            map_fn=map_fn,
        )
        sites = sites.merge(slices.history, on="site_id", how="left")
        sites["climatic_stability"] = site_mean(grid, cand.patch_labels,
                                                 slices.clade_stability,
                                                 sites["site_id"].to_numpy(np.int64))
    access_hours = None
    routes, starts = {}, None
    if intake.start_points is not None and intake.elevation is not None:
        progress.step("walking time from start points (Tobler's hiking function)")
        walk, starts = walk_from_start_points(
            grid, intake.elevation, intake.start_points, off_track=s.access.off_track,
            memory_mb=s.compute.memory_mb or None, source=s.access.start_points)
        access_hours = walk.cost
        sites["walk_hours"] = access_hours[
            sites["row"].to_numpy(int), sites["col"].to_numpy(int)
        ]
        routes = walking_routes(grid, intake.elevation, walk, starts, sites)
    else:
        sites["walk_hours"] = np.nan
    surveyed = _surveyed_points(intake, taxa)
    progress.step(f"ranking {len(sites)} sites ({s.ranking.n_draws} weight draws)")
    ranked = rank_sites(
        sites,
        s.ranking.weights or None,
        top_k=s.ranking.top_k,
        n_draws=s.ranking.n_draws,
        random_state=s.project.random_state,
        max_walk_hours=s.access.max_walk_hours or None,
        surveys=surveyed,
    )
    ranked = group_sites(ranked)
    gdf = sites_geodataframe(grid, cand)
    gdf = gdf[["site_id", "geometry"]].merge(ranked, on="site_id", how="right")
    gdf = gdf.sort_values("rank", kind="stable").reset_index(drop=True)

    gdf = gpd.GeoDataFrame(gdf, geometry="geometry", crs=grid.pyproj_crs)
    paths = paths_geodataframe(grid, cand)
    gdf, paths, cand, ids = assign_site_ids(gdf, paths, cand)
    shares = np.full((3, len(gdf)), np.nan)
    if s.ranking.n_refits > 0 and len(gdf):
        progress.step(f"record resampling: {s.ranking.n_refits} bootstrap refits of "
                      f"{s.models.families[0]} per taxon")
        plan = RefitPlan.for_plan(s, intake.predictor_stack(), taxa, cand.patch_labels,
                                  len(gdf))
        shares = record_resampling(plan, s.ranking.n_refits,
                                   random_state=s.project.random_state,
                                   map_fn=map_fn or map)
    for name, row in zip(("refit_suitable", "refit_isolated", "refit_top_k"), shares,
                         strict=True):
        gdf[name] = row
    if slices is not None:
        hist = slices.history[slices.history["site_id"].isin(list(ids))].copy()
        hist["site_id"] = hist["site_id"].map(ids).astype(object)
        slices = dataclasses.replace(slices, history=hist)
    return PlanResult(
        sites=gdf, paths=paths, barrier=cand.barrier, access_hours=access_hours,
        candidates=cand, clade_mess=clade_mess,
        routes={ids[int(k)]: dataclasses.replace(v, site_id=ids[int(k)])
                for k, v in routes.items() if int(k) in ids},
        start_points=starts, slices=slices,
    )


def _surveyed_points(intake: Intake, taxa: dict):
    """Longitude/latitude of places already surveyed (file and/or record localities)."""
    pts = []
    if intake.surveyed is not None:
        pts.append(intake.surveyed[["longitude", "latitude"]].to_numpy(float))
    if intake.settings.survey.records_as_surveys:
        for t in taxa.values():
            pts.append(np.column_stack([t.records.lon, t.records.lat]))
    if not pts:
        return None
    both = np.vstack(pts)
    return both[:, 0], both[:, 1]


# --------------------------------------------------------------------------- run
def _versions() -> dict:

    out = {"screener": __version__, "python": platform.python_version()}
    for pkg in ["numpy", "scipy", "scikit-learn", "scikit-image", "geopandas", "rasterio",
                "pyproj", "shapely", "matplotlib", "pandas"]:
        try:
            out[pkg] = md.version(pkg)
        except md.PackageNotFoundError:
            out[pkg] = None
    try:
        out["gdal"] = rasterio.__gdal_version__
    except Exception:  # pragma: no cover
        out["gdal"] = None
    return out


#: Families whose fits take a tenth of a second or more: their replicates are worth
#: sending to worker processes.
SLOW_FAMILIES = ("ppm", "forest")


#: "auto" also runs a run on local processes when its geographic-space overlap tests
#: are estimated to take at least this many seconds serially (and two or more cores
#: are free): each replicate refits and maps a model, tens of milliseconds a task
PARALLEL_OVERLAP_S = 10.0


def geographic_test_seconds(intake: Intake) -> float:
    """Estimated serial seconds of a run's geographic-space overlap tests: pairs x
    :func:`~screener.models.mapping.geographic_test_cost` (a fixed cost model, the
    same on every machine); 0 when they will not run."""
    n = len(intake.records.taxa)
    if n < 2:
        return 0.0
    per_pair, _ = geographic_test_cost(intake.settings, int(intake.grid.mask.sum()),
                                       streamed=intake.stack.streamed)
    return n * (n - 1) // 2 * per_pair


def resolve_scheduler(scheduler: str, intake: Intake) -> str:
    """Turn ``"auto"`` into "processes" or "serial"; other values pass through.

    "auto" picks local processes when tasks are heavy enough to repay the pool's
    start-up and per-task costs: a slow family (ppm, forest) is fitted per replicate,
    the layers are streamed from disk (prediction windows), or the geographic-space
    overlap tests refit models for at least :data:`PARALLEL_OVERLAP_S` seconds
    (:func:`geographic_test_seconds`) and two or more cores are free.  Otherwise
    tasks take milliseconds and serial is faster (measured on the demo: see
    docs/performance.md).  Results are the same under every scheduler.
    """
    if scheduler != "auto":
        return scheduler
    s = intake.settings
    heavy = (any(f in SLOW_FAMILIES for f in s.models.families) or intake.stack.streamed
             or (default_n_workers() >= 2
                 and geographic_test_seconds(intake) >= PARALLEL_OVERLAP_S))
    return "processes" if heavy else "serial"


def make_run_executor(scheduler: str, n_workers: int = 0):
    """Executor for a run: "serial", "processes", "dask" (local) or a Dask address."""

    n = n_workers or None
    if scheduler in ("serial", "processes"):
        return make_executor(scheduler, n_workers=n)
    if scheduler in ("dask", "dask-local"):
        return make_executor("dask", n_workers=n)
    return make_executor("dask", address=scheduler)


def _taxon_key(intake: Intake, taxon: str) -> str:

    s = intake.settings
    rec = intake.records.taxa[taxon]
    layer_hashes = [intake.input_hashes.get(str(p)) for p in layer_paths(s)[0]]
    layer_settings = {k: v for k, v in s.layers.items() if k != "paths"}
    # slice layers by content, not by path: a project folder that is copied or moved
    # keeps its cache
    slice_hashes = {name: [intake.input_hashes.get(str(p)) for p in paths]
                    for name, paths in s.slices.layers.items()}
    slices = {k: v for k, v in s.as_dict()["slices"].items()
              if k not in ("stability", "layers")}
    return digest(
        "taxon-model",
        taxon,
        layer_hashes,
        layer_settings,
        slice_hashes,
        slices,
        intake.predictors,
        rec.rows,
        rec.cols,
        rec.lon,
        rec.lat,
        s.project.random_state,
        dict(s.background),
        dict(s.models),
        dict(s.evaluation),
        dict(s.thresholds),
    )


def run_analysis(
    settings: Settings,
    *,
    echo=None,
    scheduler: str | None = None,
    cache_dir=None,
    intake: Intake | None = None,
) -> RunResult:
    """Run every analysis stage and return the :class:`RunResult` (writes nothing).

    Parameters
    ----------
    settings : Settings
    echo : callable, optional
        Receives progress lines (e.g. ``print``).
    scheduler : str, optional
        Overrides ``[compute] scheduler``.
    cache_dir : path-like, optional
        Stage cache folder; None caches nothing.
    intake : Intake, optional
        Already loaded inputs.
    """

    s = settings
    progress = Progress(echo, n_stages=5)
    cache = StageCache(cache_dir)
    t_start = time.perf_counter()
    progress.stage("Reading and checking layers and records")
    if intake is None:
        intake = load_inputs(s, progress=progress, cache_dir=cache_dir)
    for line in intake.summary_lines()[:3]:
        progress.step(line)
    sched = resolve_scheduler(scheduler or s.compute.scheduler, intake)
    progress.step(f"scheduler: {sched}")
    with make_run_executor(sched, s.compute.n_workers) as executor:
        progress.stage(
            f"Fitting {', '.join(s.models.families)} for {len(intake.records.taxa)} taxa"
        )
        taxa = {}
        for name in intake.records.taxa:
            key = _taxon_key(intake, name)
            res = cache.get("taxon", key)
            if res is None:
                res = model_taxon(intake, name, executor=executor, progress=progress)
                cache.put("taxon", key, res)
            else:
                progress.step(f"{name}: reused cached models")
                # the records as read now: the cached stage may come from a run with
                # other settings that do not change the models ([occurrences] sensitive)
                res = dataclasses.replace(res, records=intake.records.taxa[name])
            taxa[name] = res
        progress.stage("Niche overlap between sister taxa")
        if len(taxa) >= 2:
            okey = digest("overlap", OverlapResult.__name__,
                          [_taxon_key(intake, n) for n in taxa], dict(s.overlap),
                          dict(s.models), s.project.random_state)
            overlap = cache.get("overlap", okey)
            if overlap is None:
                overlap = compare_taxa(intake, taxa, executor=executor, progress=progress)
                cache.put("overlap", okey, overlap)
            else:
                progress.step("reused cached overlap tests")
        else:
            overlap = OverlapResult(pd.DataFrame(columns=OVERLAP_COLUMNS))
            progress.step("one taxon only: no overlap to measure")
        progress.stage("Candidate sites, barriers and the ranked plan")
        plan = plan_sites(intake, taxa, executor=executor, progress=progress)
    progress.done()
    shade = hillshade(intake.grid, intake.elevation) if intake.elevation is not None else None
    warns = list(intake.warnings) + list(cache.problems)
    if not len(plan.sites):
        warns.append(
            "No candidate sites: no suitable patch outside the known ranges passed the "
            "isolation settings ([isolation] min_patch_km2, min_gap_km) at these "
            "thresholds. The plan is empty; the models, maps and overlap results are "
            "complete and written."
        )
    warns.extend(plan.candidates.warnings)
    novel = plan.sites["novel_share"].fillna(0) > 0 if len(plan.sites) else []
    if len(plan.sites) and np.any(novel):
        ids = plan.sites.loc[novel, "site_id"].tolist()
        warns.append(
            f"{len(ids)} sites include novel environments (MESS < 0): predictions there "
            "extrapolate beyond the calibration data; treat them with extra caution."
        )
    provenance = {
        "screener_version": __version__,
        "versions": _versions(),
        "settings": s.as_dict(),
        "project_file": str(s.path) if s.path else None,
        "input_hashes": intake.input_hashes,
        "layers": [o.as_dict() for o in intake.layer_origins],
        "seeds": {"random_state": s.project.random_state,
                  **{n: t.seed for n, t in taxa.items()}},
        "timings_s": dict(progress.timings),
        "elapsed_s": round(time.perf_counter() - t_start, 3),
        "scheduler": sched,
        "cache": {"folder": str(cache_dir) if cache_dir else None,
                  "hits": cache.hits, "misses": cache.misses},
        "warnings": warns,
        "platform": platform.platform(),
    }
    dropped = intake.records.dropped
    if dropped:
        lines = drop_summary_lines(dropped)
        warns.append(lines[0] + " " + "; ".join(ln.strip() for ln in lines[1:]) + ".")
        provenance["dropped_rows"] = {"total": len(dropped),
                                      "by_reason": summarise_drops(dropped),
                                      "full_list": "dropped_records.csv"}
    return RunResult(
        grid=intake.grid,
        layer_names=intake.predictors,
        taxa=taxa,
        sites=plan.sites,
        dropped=intake.records.dropped,
        overlap=overlap.table,
        overlap_readings=overlap.readings,
        paths=plan.paths,
        barrier=plan.barrier,
        elevation=intake.elevation,
        hillshade=shade,
        access_hours=plan.access_hours,
        sampling_points=None,
        settings=s.as_dict(),
        provenance=provenance,
        warnings=warns,
        intake_summary=intake.summary_lines(),
        comparisons=overlap.comparisons,
        candidates=plan.candidates,
        clade_mess=plan.clade_mess,
        routes=plan.routes,
        start_points=plan.start_points,
        slices=plan.slices,
    )


def run_project(
    settings: Settings,
    out_dir,
    *,
    overwrite: bool = False,
    echo=None,
    scheduler: str | None = None,
    cache_dir="auto",
) -> RunResult:
    """Run a project end to end and write its outputs into ``out_dir``.

    Everything is written into a staging folder beside ``out_dir`` and renamed into
    place at the end, so a failed or interrupted run leaves no half-written folder.

    Parameters
    ----------
    settings : Settings
    out_dir : path-like
    overwrite : bool, default False
        Replace an existing ``out_dir``, if an earlier run wrote it (it holds the run
        marker) and it holds none of this run's inputs.
    echo : callable, optional
        Receives progress lines.
    scheduler : str, optional
        "serial", "processes", "dask" or a Dask scheduler address.
    cache_dir : path-like, "auto" or None, default "auto"
        "auto" = ``.screener-cache`` beside the project file; None = no cache.

    Returns
    -------
    RunResult
    """

    inputs = input_paths(settings)
    out = check_output_folder(out_dir, overwrite=overwrite, inputs=inputs)
    if cache_dir == "auto":
        cache_dir = (settings.base_dir / ".screener-cache") if settings.path else None
    if cache_dir is not None:
        log.info("stage cache: %s (safe to delete)", cache_dir)
    result = run_analysis(settings, echo=echo, scheduler=scheduler, cache_dir=cache_dir)
    run_id = new_run_id()
    result = dataclasses.replace(result, sampling_points=plan_sampling_points(result),
                                 provenance={**result.provenance, "run_id": run_id})
    progress = Progress(echo, n_stages=5)
    progress.i = 4
    progress.stage(f"Writing outputs to {out}")
    with staged_output(out, overwrite=overwrite, inputs=inputs, run_id=run_id) as stage:
        write_outputs(result, stage, progress=progress)
    progress.done()
    return result
