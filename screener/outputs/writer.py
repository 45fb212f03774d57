"""Write a finished run into its output folder: rasters, tables, vectors, sheets, report.

The layout (every file name) is :class:`screener.outputs.run_folder.RunFolder`'s; this
module decides what goes into each file.  It is the only place that writes a run's
outputs; :func:`screener.pipeline.run_project` calls it inside a staging folder.
"""

from __future__ import annotations

import dataclasses
import json
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd

from screener.columns import CANDIDATES, empty_frame
from screener.outputs import gpx, report, sheets
from screener.outputs.mappage import render_map_page
from screener.outputs.privacy import shareable_result
from screener.outputs.rasters import write_raster
from screener.outputs.run_folder import RunFolder, input_locations
from screener.outputs.tables import (
    CANDIDATE_COLUMNS,
    EVALUATION_COLUMNS,
    OVERLAP_COLUMNS,
    neutralise_frame,
    write_csv,
)
from screener.outputs.timeslices import write_slice_rasters
from screener.overlap import pairwise_table
from screener.project import default
from screener.results import RunResult

__all__ = ["write_outputs"]


def write_outputs(result: RunResult, folder, *, progress=None) -> list:
    """Write every output of a run into ``folder`` (which must exist).

    The file names come from :class:`screener.outputs.run_folder.RunFolder`.

    Parameters
    ----------
    result : RunResult
    folder : path-like
    progress : object with a ``step(text)`` method, optional
        Receives a line per group of files (e.g. :class:`screener.progress.Progress`).

    Returns
    -------
    list of str
        The files written, relative to ``folder`` (run.json included).
    """
    step = progress.step if progress is not None else (lambda text: None)
    run = RunFolder.for_taxa(folder, result.taxa)
    grid = result.grid
    s = result.settings
    written = []

    def rel(p):
        written.append(run.relative(p))

    run.make_subfolders()
    step("rasters")
    for name, t in result.taxa.items():
        rel(write_raster(run.suitability(name), t.suitability, grid,
                         description=f"consensus suitability of {name}"))
        for fam, m in t.family_maps.items():
            rel(write_raster(run.suitability(name, fam), m, grid,
                             description=f"{fam} suitability of {name}"))
        if t.agreement is not None:
            rel(write_raster(run.agreement(name), t.agreement,
                             grid, description="share of families calling the cell suitable"))
        for key, th in t.thresholds.items():
            if key in ("mtp", "relaxed"):
                binary = np.where(grid.mask, t.suitability >= th.value, False)
                rel(write_raster(run.range_map(name, key), binary, grid,
                                 description=f"suitable at {key} = {th.value:.4f}"))
        if t.mess is not None:
            rel(write_raster(run.mess(name), t.mess, grid,
                             description="MESS; < 0 = novel environment"))
        if t.most_dissimilar is not None:
            rel(write_raster(run.most_dissimilar(name),
                             t.most_dissimilar.astype(np.int32), grid,
                             description="index of the most dissimilar layer: "
                             + ", ".join(f"{i}={n}" for i, n in enumerate(result.layer_names))))
    if result.slices is not None:
        for p in write_slice_rasters(result, run):
            rel(p)
    if result.barrier is not None:
        rel(write_raster(run.barrier_tif, result.barrier, grid,
                         description="depth of unsuitable gaps between sister ranges"))
    if result.access_hours is not None:
        ah = np.where(np.isfinite(result.access_hours), result.access_hours, np.nan)
        rel(write_raster(run.access_hours_tif, ah, grid,
                         description="walking hours from the nearest start point"))
    step("tables")
    ev = pd.DataFrame([r for t in result.taxa.values() for r in t.evaluation])
    rel(write_csv(run.evaluation_csv, ev, EVALUATION_COLUMNS))
    rel(write_csv(run.overlap_csv, result.overlap, OVERLAP_COLUMNS))
    if len(result.taxa) > 2 and result.comparisons:
        pw = pairwise_table(result.comparisons)
        neutralise_frame(pw).to_csv(run.overlap_pairwise_csv, float_format="%.10g",
                                    lineterminator="\n")
        rel(run.overlap_pairwise_csv)
    so = s.get("outputs", {})
    if _output_setting(so, "full_precision"):
        shareable = result  # asked for: every output is marked full precision
    else:
        shareable = shareable_result(
            result, sites=_output_setting(so, "generalise_sites"),
            grid_deg=_output_setting(so, "generalise_deg"),
        )
    dropped = pd.DataFrame(
        [{"line": d.line, "occurrence_id": d.occurrence_id, "taxon": d.taxon,
          "reason": d.reason} for d in shareable.dropped],
        columns=["line", "occurrence_id", "taxon", "reason"],
    )
    rel(write_csv(run.dropped_records_csv, dropped))
    sites = shareable.sites
    rel(write_csv(run.candidates_csv, sites, CANDIDATE_COLUMNS))
    gpkg = run.candidates_gpkg
    if len(sites):
        _casefold_unique_columns(sites).to_file(gpkg, layer="sites", driver="GPKG")
    else:
        # no site: the layer still has the contract columns with their types
        gpd.GeoDataFrame(empty_frame(CANDIDATES), geometry=[],
                         crs=grid.pyproj_crs).to_file(gpkg, layer="sites", driver="GPKG")
    if shareable.paths is not None and len(shareable.paths):  # none for generalised sites
        shareable.paths.to_file(gpkg, layer="least_cost_paths", driver="GPKG")
    rel(gpkg)
    step("waypoints, field sheets and report")
    # routes end at the exact site points: left out when sites are generalised
    exact_sites = not _output_setting(so, "generalise_sites")
    rel(gpx.write_gpx(
        run.sites_gpx, sites,
        sheets.site_sampling_points(shareable, top_n=_output_setting(so, "field_sheets")),
        start_points=result.start_points,
        routes=result.routes if exact_sites else None,
    ))
    rel(sheets.write_field_sheets(
        run.field_sheets_pdf, shareable, top_n=_output_setting(so, "field_sheets"),
        page_size=_output_setting(so, "page_size"),
    ))
    html = report.render_report(shareable)
    run.report_html.write_text(html, encoding="utf-8")
    rel(run.report_html)
    page = shareable if exact_sites else _without_routes(shareable)
    run.map_html.write_text(render_map_page(page), encoding="utf-8")
    rel(run.map_html)
    prov = dict(result.provenance)
    prov["taxa"] = dict(run.stems)
    prov["outputs"] = sorted(written + [run.relative(run.run_json)])
    prov.update(input_locations(prov, folder))
    run.run_json.write_text(json.dumps(_jsonable(prov), indent=2, sort_keys=True)
                            + "\n", encoding="utf-8")
    return prov["outputs"]


def _casefold_unique_columns(frame):
    """Columns renamed so no two differ only by case (GeoPackage, like SQLite, ignores
    case in field names): the second of a clash gets ``_2``, the third ``_3``."""
    seen, names = set(), []
    for c in frame.columns:
        name, k = str(c), 1
        while name.casefold() in seen:
            k += 1
            name = f"{c}_{k}"
        seen.add(name.casefold())
        names.append(name if name != str(c) else c)
    out = frame.copy()
    out.columns = names
    return out


def _without_routes(result: RunResult) -> RunResult:
    """A copy without walking routes (they end at exact site points)."""
    return dataclasses.replace(result, routes={})


def _jsonable(obj):
    if isinstance(obj, dict):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (np.floating, float)):
        v = float(obj)
        return v if np.isfinite(v) else None
    if isinstance(obj, Path):
        return str(obj)
    return obj




def _output_setting(outputs: dict, key: str):
    """``[outputs] key`` of a run's settings, or its default when the run has none."""
    return outputs.get(key, default("outputs", key))
