"""After the trip: score a finished run's predictions against what the team found.

Reads a run's output folder (run.json, the consensus suitability maps, the ranges at
the minimum training presence and candidates.gpkg), the field results, and writes a
short report plus an updated copy of the record file for the next run.  The input
record file is never edited in place.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from screener.errors import InputError

__all__ = ["load_run_outputs", "debrief_run"]


def load_run_outputs(run_dir):
    """Grid, suitability maps, union of MTP ranges, sites and provenance of a run.

    Returns
    -------
    dict
        ``grid``, ``suitability`` (dict taxon -> map), ``predicted`` (bool map: any
        taxon's MTP range), ``sites`` (GeoDataFrame), ``provenance`` (dict).
    """
    import geopandas as gpd
    import rasterio

    from screener.grid import Grid

    run_dir = Path(run_dir)
    pj = run_dir / "run.json"
    if not pj.exists():
        raise InputError(
            f"{run_dir} holds no run.json; give the output folder of a `screener run`."
        )
    prov = json.loads(pj.read_text(encoding="utf-8"))
    taxa = prov.get("taxa") or {}
    if not taxa:
        raise InputError(f"{pj} lists no taxa; was the run finished with this version?")
    suit, predicted, grid = {}, None, None
    for name, safe in taxa.items():
        p = run_dir / "suitability" / f"{safe}.tif"
        r = run_dir / "ranges" / f"{safe}.mtp.tif"
        if not p.exists() or not r.exists():
            raise InputError(f"{p} or {r} is missing from the run folder {run_dir}.")
        with rasterio.open(p) as src:
            m = np.ma.filled(src.read(1, masked=True).astype(np.float32), np.nan)
            if grid is None:
                grid = Grid(src.crs, src.transform, (src.height, src.width), np.isfinite(m))
        with rasterio.open(r) as src:
            rng = src.read(1) == 1
        suit[name] = m
        predicted = rng if predicted is None else (predicted | rng)
    sites = gpd.read_file(run_dir / "candidates.gpkg", layer="sites")
    import pandas as pd

    ev = pd.read_csv(run_dir / "evaluation.csv")
    ens = ev[ev["algorithm"] == "ensemble"].set_index("taxon")["threshold_mtp"]
    mtp = {name: float(ens[name]) for name in taxa}
    return {"grid": grid, "suitability": suit, "predicted": predicted, "sites": sites,
            "provenance": prov, "mtp": mtp}


def debrief_run(field_results, run_dir, out_dir, *, overwrite: bool = False) -> list:
    """Score a run against field results and write the debrief into ``out_dir``.

    Writes ``debrief.md`` (the summary), ``debrief.json`` (the numbers),
    ``site_outcomes.csv`` and ``records_updated.csv`` (the run's record file plus the
    new finds, for the next run).

    Returns
    -------
    list of str
        Summary lines for the console.

    References
    ----------
    .. [1] Anderson, R. P. et al. (2002). Ecological Modelling 162:211-232 (binomial
       test of predictions against independent records).
    """
    import pandas as pd

    from screener.outputs.staging import check_output_folder, staged_output
    from screener.survey import read_field_results, render_survey_report, score_survey
    from screener.records import read_records
    from screener.survey import updated_records

    inputs = [Path(field_results), Path(run_dir)]
    out = check_output_folder(out_dir, overwrite=overwrite, inputs=inputs)
    run = load_run_outputs(run_dir)
    grid = run["grid"]
    fr = read_field_results(field_results)
    areas = np.asarray(grid.cell_area_km2, float)
    valid = grid.mask
    share = float(areas[run["predicted"] & valid].sum() / areas[valid].sum())
    # Each taxon's map relative to its own minimum training presence: >= 1 is inside
    # that taxon's predicted range, so threshold 1 reproduces the union of the ranges.
    relative = {n: m / run["mtp"][n] for n, m in run["suitability"].items()}
    score = score_survey(fr, run["sites"], grid, relative, threshold=1.0, area_share=share,
                         random_state=run["provenance"].get("seeds", {}).get("random_state", 0))
    rec_path = run["provenance"].get("settings", {}).get("occurrences", {}).get("path")
    if not rec_path or not Path(rec_path).exists():
        raise InputError(
            f"The run's record file {rec_path} is not where run.json says; the updated "
            "record file needs it."
        )
    occ = run["provenance"].get("settings", {}).get("occurrences", {})
    raw = read_records(rec_path, encoding=occ.get("encoding") or None,
                       taxon_column=occ.get("taxon_column", "taxon"))
    if raw.darwin_core:
        updated = _updated_darwin_core(raw, fr, run["sites"], grid)
    else:
        original = pd.read_csv(rec_path, dtype=str, keep_default_na=False)
        updated = updated_records(original, fr, sites=run["sites"], grid=grid)
    summary = {k: (v.item() if isinstance(v, np.generic) else v)
               for k, v in vars(score).items() if not isinstance(v, pd.DataFrame)}
    with staged_output(out, overwrite=overwrite, inputs=inputs + [Path(rec_path)]) as stage:
        (stage / "debrief.md").write_text(render_survey_report(score), encoding="utf-8")
        (stage / "debrief.json").write_text(
            json.dumps(summary, indent=2, sort_keys=True, default=str) + "\n", encoding="utf-8")
        score.per_site.to_csv(stage / "site_outcomes.csv", index=False, lineterminator="\n")
        updated.to_csv(stage / "records_updated.csv", index=False, lineterminator="\n")
    lines = [
        f"Visited predicted sites: {score.n_visited}, with a find: {score.n_hits}",
        f"Share of the area predicted suitable: {share:.3f}",
        f"Binomial test of the hit rate (Anderson et al. 2002): p = {score.binomial_p:.4g}",
        f"AUC of the new records: {score.auc:.3f}",
        f"Wrote {out} (records_updated.csv is the record file for the next run; the "
        "original was not changed)",
    ]
    return lines


def _updated_darwin_core(raw, field_results, sites, grid):
    """Updated records for a Darwin Core record file: every original column (with its
    occurrenceID) kept as read, finds added with Darwin Core terms filled in."""
    import pandas as pd

    from screener.darwincore import find_term
    from screener.survey import updated_records

    cols = list(raw.columns)
    by_name = {"taxon": raw.taxon, "longitude": raw.a, "latitude": raw.b}
    table = pd.DataFrame({**by_name, **raw.extra})
    updated = updated_records(table, field_results, sites=sites, grid=grid)
    new = updated.index >= len(table)
    out = pd.DataFrame(index=updated.index)
    for c in cols:
        if c in raw.extra:
            out[c] = updated[c]
        elif find_term([c], "decimalLongitude") is not None:
            out[c] = updated["longitude"]
        elif find_term([c], "decimalLatitude") is not None:
            out[c] = updated["latitude"]
        else:  # the taxon column (scientificName or the chosen rank)
            out[c] = updated["taxon"]
    if find_term(cols, "geodeticDatum") is not None:
        out.loc[new, cols[find_term(cols, "geodeticDatum")]] = "WGS84"
    if find_term(cols, "basisOfRecord") is not None:
        out.loc[new, cols[find_term(cols, "basisOfRecord")]] = "HumanObservation"
    out["source"] = updated["source"]
    return out
