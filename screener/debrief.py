"""After the trip: score a finished run's predictions against what the team found.

Reads a run's output folder (run.json, the consensus suitability maps, the ranges at
the minimum training presence and candidates.gpkg), the field results, and writes a
short report, an updated copy of the record file and a project file for the next run.
The input record file is never edited in place.  A new lineage with fewer records
than the run's ``min_records`` stays in the record file (with a note) and is left out
of the next project's ``[project] taxa``, so the next run does not stop on it.
"""

from __future__ import annotations

import io
import json
from pathlib import Path

import numpy as np

from screener.errors import InputError
from screener.outputs.run_folder import RunFolder, locate_run_inputs, relocate
from screener.project import default

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

    run, _ = RunFolder.read(run_dir)
    run_dir = run.root
    prov, moved = locate_run_inputs(run.run_json)
    taxa = run.stems
    suit, predicted, grid = {}, None, None
    for name in taxa:
        p = run.suitability(name)
        r = run.range_map(name, "mtp")
        if not p.exists() or not r.exists():
            raise InputError(f"{p} or {r} is missing from the run folder {run_dir}.")
        try:
            with rasterio.open(p) as src:
                m = np.ma.filled(src.read(1, masked=True).astype(np.float32), np.nan)
                if grid is None:
                    grid = Grid(src.crs, src.transform, (src.height, src.width),
                                np.isfinite(m))
            with rasterio.open(r) as src:
                rng = src.read(1) == 1
        except rasterio.errors.RasterioError as exc:
            raise InputError(f"A map of {name!r} in {run_dir} cannot be read ({exc}); the "
                             "run folder is damaged: run again.") from None
        suit[name] = m
        predicted = rng if predicted is None else (predicted | rng)
    import pandas as pd

    gpkg, ev_csv = run.candidates_gpkg, run.evaluation_csv
    for f in (gpkg, ev_csv):
        if not f.exists():
            raise InputError(f"{f} is missing from the run folder {run_dir}; it is not a "
                             "complete run folder: run again.")
    try:
        sites = gpd.read_file(gpkg, layer="sites")
    except Exception as exc:  # the GeoPackage readers raise several error types
        raise InputError(f"{gpkg} cannot be read ({type(exc).__name__}: {exc}); the run "
                         "folder is damaged: run again.") from None
    # taxon names stay text: a taxon named "1" or "NA" is not a number or missing
    try:
        ev = pd.read_csv(ev_csv, dtype={"taxon": str, "algorithm": str},
                         keep_default_na=False, na_values={"threshold_mtp": [""]})
        ens = ev[ev["algorithm"] == "ensemble"].set_index("taxon")["threshold_mtp"]
        ens = pd.to_numeric(ens)
    except (UnicodeDecodeError, pd.errors.ParserError, KeyError, ValueError) as exc:
        raise InputError(f"{ev_csv} cannot be read ({type(exc).__name__}: {exc}); the run "
                         "folder is damaged: run again.") from None
    missing = [name for name in taxa if name not in ens.index]
    if missing:
        raise InputError(f"{ev_csv} has no ensemble row for {missing[0]!r}; the run folder "
                         "is damaged: run again.")
    mtp = {name: float(ens[name]) for name in taxa}
    return {"grid": grid, "suitability": suit, "predicted": predicted, "sites": sites,
            "provenance": prov, "mtp": mtp, "moved": moved}


def _toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (int, float)):
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v)  # a TOML basic string uses the same escapes
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_toml_value(x) for x in v if x is not None) + "]"
    if isinstance(v, dict):
        body = ", ".join(f"{json.dumps(str(k))} = {_toml_value(x)}"
                         for k, x in v.items() if x is not None)
        return "{" + body + "}"
    raise TypeError(f"cannot write {v!r} to TOML")


def next_project_text(settings: dict, records_file: str, taxa) -> str:
    """TOML text of the next run's project: the run's settings with the updated
    record file and ``[project] taxa`` limited to ``taxa``."""
    lines = ["# Project for the next run, written by `screener debrief`.", ""]
    for section, body in settings.items():
        body = dict(body or {})
        if section == "occurrences":
            body["path"] = records_file
        if section == "project":
            body["taxa"] = list(taxa)
        items = [(k, v) for k, v in body.items() if v is not None]
        if not items:
            continue
        lines.append(f"[{section}]")
        lines += [f"{k} = {_toml_value(v)}" for k, v in items]
        lines.append("")
    return "\n".join(lines)


def _check_field_sites(fr, site_ids, path) -> None:
    """A row given by site only must name a site of the run (a typo such as S1 for
    S01 would otherwise drop the visit from the hit rate without a word)."""
    from screener.errors import suggest

    for _, row in fr.iterrows():
        sid = row["site_id"]
        no_xy = not (np.isfinite(row["longitude"]) and np.isfinite(row["latitude"]))
        if sid and no_xy and sid not in site_ids:
            raise InputError(
                f"{path} line {int(row['line'])}: site_id {sid!r} is not a site of the run "
                + (f"({', '.join(site_ids[:10])}{' ...' if len(site_ids) > 10 else ''})."
                   if site_ids else "(it ranked no sites).")
                + suggest(sid, site_ids)
                + " Correct it, or give the longitude and latitude of the visit."
            )


def _check_field_taxa(fr, run_taxa, path) -> None:
    """Every field taxon is a run taxon, or its row says it is a new lineage."""
    from screener.errors import suggest

    for _, row in fr.iterrows():
        t = row["taxon"]
        if row["outcome"] == "new-lineage" or not t or t in run_taxa:
            continue
        raise InputError(
            f"{path} line {int(row['line'])}: taxon {t!r} is not a taxon of the run "
            f"({', '.join(run_taxa)})." + suggest(t, run_taxa)
            + " If it is a lineage the run did not model, set its outcome to new-lineage."
        )


def debrief_run(field_results, run_dir, out_dir, *, overwrite: bool = False,
                allow_changed_inputs: bool = False) -> list:
    """Score a run against field results and write the debrief into ``out_dir``.

    Writes ``debrief.md`` (the summary), ``debrief.json`` (the numbers),
    ``site_outcomes.csv``, ``records_updated.csv`` (the run's record file plus the
    new finds at their own coordinates) and ``project_next.toml`` (the run's settings
    with the updated record file; taxa with too few records left out of modelling).

    The run's record file must still have the SHA-256 that run.json recorded for it:
    the updated record file is that file plus the finds, so an edited run.json or a
    record file changed since the run is refused unless ``allow_changed_inputs``.

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
    from screener.outputs.tables import neutralise_frame
    from screener.survey import read_field_results, render_survey_report, score_survey
    from screener.records import read_records
    from screener.survey import updated_records

    inputs = [Path(field_results), Path(run_dir)]
    out = check_output_folder(out_dir, overwrite=overwrite, inputs=inputs)
    run = load_run_outputs(run_dir)
    grid = run["grid"]
    fr = read_field_results(field_results)
    _check_field_taxa(fr, list(run["suitability"]), field_results)
    _check_field_sites(fr, run["sites"]["site_id"].astype(str).tolist(), field_results)
    areas = np.asarray(grid.cell_area_km2, float)
    valid = grid.mask
    share = float(areas[run["predicted"] & valid].sum() / areas[valid].sum())
    # Each taxon's map relative to its own minimum training presence: >= 1 is inside
    # that taxon's predicted range, so threshold 1 reproduces the union of the ranges.
    relative = {n: m / run["mtp"][n] for n, m in run["suitability"].items()}
    score = score_survey(fr, run["sites"], grid, relative, threshold=1.0, area_share=share,
                         random_state=run["provenance"].get("seeds", {}).get("random_state", 0))
    settings = relocate(run["provenance"].get("settings", {}), run["moved"])
    rec_path = settings.get("occurrences", {}).get("path")
    if not rec_path or not Path(rec_path).exists():
        raise InputError(
            f"The run's record file {rec_path} is not where run.json says; the updated "
            "record file needs it."
        )
    _check_record_file_hash(rec_path, run, allow_changed_inputs)
    occ = settings.get("occurrences", {})
    # the record file read as `run` reads it: encoding, delimiter, decimal mark
    raw = read_records(rec_path, encoding=occ.get("encoding") or None,
                       taxon_column=occ.get("taxon_column")
                       or default("occurrences", "taxon_column"),
                       decimal=occ.get("decimal") or None)
    modelled = list(run["provenance"].get("taxa") or {})
    min_records = int(occ.get("min_records") or default("occurrences", "min_records"))
    updated, taxon_of = _updated_record_table(raw, fr, grid, modelled, min_records)
    taxon_of = taxon_of.astype(str)
    left_out = sorted(set(taxon_of[(updated["note"] != "").to_numpy()]))
    next_taxa = [t for t in dict.fromkeys(taxon_of) if t not in left_out]
    report = render_survey_report(score)
    if left_out:
        report += (
            "\nLeft out of the next run's modelling (kept in records_updated.csv with a "
            f"note; fewer than min_records = {min_records} records): "
            + ", ".join(left_out) + ". project_next.toml lists the taxa it models.\n"
        )
    summary = {k: (v.item() if isinstance(v, np.generic) else v)
               for k, v in vars(score).items() if not isinstance(v, pd.DataFrame)}
    with staged_output(out, overwrite=overwrite, inputs=inputs + [Path(rec_path)]) as stage:
        (stage / "debrief.md").write_text(report, encoding="utf-8")
        (stage / "debrief.json").write_text(
            json.dumps(summary, indent=2, sort_keys=True, default=str) + "\n", encoding="utf-8")
        neutralise_frame(score.per_site).to_csv(stage / "site_outcomes.csv", index=False,
                                                lineterminator="\n")
        # in the record file's own dialect: its delimiter and decimal mark
        neutralise_frame(updated).to_csv(stage / "records_updated.csv", index=False,
                                         sep=raw.delimiter, lineterminator="\n")
        (stage / "project_next.toml").write_text(
            next_project_text(settings, "records_updated.csv", next_taxa), encoding="utf-8")
    lines = [
        f"Visited predicted sites: {score.n_visited}, with a find: {score.n_hits}",
        f"Share of the area predicted suitable: {share:.3f}",
        f"Binomial test of the hit rate (Anderson et al. 2002): p = {score.binomial_p:.4g}",
        f"AUC of the new find localities: {score.auc:.3f} ({score.n_new_records} "
        "records with their own coordinates)",
        f"Wrote {out} (records_updated.csv and project_next.toml are for the next run; "
        "the original record file was not changed)",
    ]
    if score.finds_without_locality:
        lines.insert(-1, f"{len(score.finds_without_locality)} find(s) had no coordinates "
                     "of their own: see debrief.md")
    if left_out:
        lines.insert(-1, "Left out of the next run's modelling (too few records): "
                     + ", ".join(left_out))
    return lines


def _check_record_file_hash(rec_path, run, allow_changed_inputs: bool) -> None:
    """Refuse a record file whose SHA-256 is not the one the run recorded for it."""
    from screener.intake import file_sha256

    hashes = run["provenance"].get("input_hashes")
    recorded_as = {str(now): old for old, now in run["moved"].items()}
    old = recorded_as.get(str(rec_path), str(rec_path))
    recorded = hashes.get(old) if isinstance(hashes, dict) else None
    if allow_changed_inputs or (recorded is not None and recorded == file_sha256(rec_path)):
        return
    why = ("run.json holds no hash for it" if recorded is None
           else "it has changed since the run")
    raise InputError(
        f"The run's record file {rec_path} cannot be trusted: {why}. The updated record "
        "file is this file plus the finds, so it would carry other records. Use the "
        "run.json the run wrote and the record file it read, or pass "
        "--allow-changed-inputs to go on with the file as it is now."
    )


def _updated_record_table(raw, field_results, grid, modelled_taxa, min_records):
    """The updated record file as a table of text and the taxon of each row.

    Every original column is kept under its own name with its cells as read; the finds
    are added below with their coordinates written in the file's decimal mark (and, in
    a Darwin Core file, the Darwin Core terms filled in).
    """
    import pandas as pd

    from screener.darwincore import find_term
    from screener.survey import updated_records

    cols = list(raw.columns)
    a, b = ("longitude", "latitude") if raw.coords == "lonlat" else ("x", "y")
    table = pd.DataFrame({"taxon": raw.taxon, a: raw.a, b: raw.b, **raw.extra})
    updated = updated_records(table, field_results, grid=grid,
                              modelled_taxa=modelled_taxa, min_records=min_records)
    new = updated.index >= len(table)
    if raw.decimal_comma:
        for c in (a, b, "effort_hours"):
            if c in updated:
                updated.loc[new, c] = [
                    v if not isinstance(v, float) else repr(v).replace(".", ",")
                    for v in updated.loc[new, c]]

    def role(c):
        if raw.darwin_core and find_term([c], "decimalLongitude") is not None:
            return a
        if raw.darwin_core and find_term([c], "decimalLatitude") is not None:
            return b
        if c in raw.extra:
            return c
        low = c.strip().lower()
        return low if low in (a, b) else "taxon"  # the taxon column (any name)

    out = pd.DataFrame({c: updated[role(c)] for c in cols}, index=updated.index)
    if raw.darwin_core and find_term(cols, "geodeticDatum") is not None:
        out.loc[new, cols[find_term(cols, "geodeticDatum")]] = "WGS84"
    if raw.darwin_core and find_term(cols, "basisOfRecord") is not None:
        out.loc[new, cols[find_term(cols, "basisOfRecord")]] = "HumanObservation"
    out["source"] = updated["source"]
    out["note"] = updated["note"]
    return out, updated["taxon"]
