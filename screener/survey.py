"""After the survey: read field results, test the predictions, update the records.

Field results are a CSV with one row per visit and taxon: ``site_id`` (of a ranked
site) or ``longitude``/``latitude`` (WGS84 degrees), ``date`` (YYYY-MM-DD), ``taxon``,
``outcome`` (``found``, ``not-found`` or ``new-lineage``) and ``effort_hours``.

Two tests of the predictions are reported:

* **Hit rate of the visited sites.**  Of ``n`` visited predicted sites, ``k`` gave a
  find (``found`` or ``new-lineage``).  Under the null hypothesis a visit finds the
  clade no more often than the share ``p`` of the study area predicted suitable, so
  ``P(X >= k)`` with ``X ~ Binomial(n, p)`` (a one-sided binomial test, as used for
  test records against a thresholded map by Anderson et al. 2002).
* **AUC on the new records.**  Suitability at the new find localities against
  suitability at background cells of the study area; the new records are independent
  test data.  AUC = U / (n1 n0) with U the Mann-Whitney statistic.

A site where nothing was found is not evidence of absence: detection depends on
season, weather and effort.

References
----------
.. [1] Anderson, R. P., Gomez-Laverde, M. & Peterson, A. T. (2002). Geographical
   distributions of spiny pocket mice in South America: insights from predictive
   models. Ecological Modelling 162: 211-232 (from memory).
.. [2] Mann, H. B. & Whitney, D. R. (1947). On a test of whether one of two random
   variables is stochastically larger than the other. Ann. Math. Statist. 18: 50-60.
"""

from __future__ import annotations

import csv
import datetime as dt
import html
import logging
import math
import os
import re
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
from scipy import stats

from screener.errors import InputError
from screener.project import default

__all__ = [
    "OUTCOMES",
    "FIND_OUTCOMES",
    "SurveyScore",
    "read_field_results",
    "score_survey",
    "render_survey_report",
    "updated_records",
]

log = logging.getLogger(__name__)

OUTCOMES = ("found", "not-found", "new-lineage")
FIND_OUTCOMES = ("found", "new-lineage")
_MAX_LISTED = 20


def read_field_results(path) -> pd.DataFrame:
    """Read and validate a field-results CSV.

    Parameters
    ----------
    path : str or os.PathLike

    Returns
    -------
    pandas.DataFrame
        Columns ``line, site_id, longitude, latitude, date, taxon, outcome,
        effort_hours``; ``line`` is the line number in the file (header = 1),
        ``date`` a :class:`datetime.date`, missing coordinates and effort NaN,
        missing ``site_id`` "".

    Raises
    ------
    screener.errors.InputError
        The file cannot be read, a column is missing, or rows are invalid; the
        message lists every bad row (up to 20) with its line number.
    """
    import io

    from screener.records import detect_delimiter

    path = Path(os.fspath(path))
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise InputError(f"cannot open field results {path}: {exc}") from exc
    try:
        text = data.decode("utf-8-sig")
        delimiter = detect_delimiter(text)
        return _read_field_rows(io.StringIO(text, newline=""), path, delimiter)
    except (UnicodeDecodeError, csv.Error) as exc:
        raise InputError(
            f"{path} is not a readable CSV file of field results ({exc}); save it as "
            "UTF-8 CSV with the columns site_id or longitude/latitude, date, taxon, "
            "outcome, effort_hours."
        ) from None


def _read_field_rows(fh, path, delimiter: str = ",") -> pd.DataFrame:
    """The rows of an open field-results file, checked (see read_field_results)."""
    reader = csv.DictReader(fh, delimiter=delimiter)
    header = [h.strip().lower() for h in (reader.fieldnames or [])]
    reader.fieldnames = header
    required = ["date", "taxon", "outcome"]
    missing = [c for c in required if c not in header]
    has_site = "site_id" in header
    has_xy = "longitude" in header and "latitude" in header
    if missing or not (has_site or has_xy):
        if not (has_site or has_xy):
            missing.append("site_id or longitude+latitude")
        raise InputError(
            f"{path}: missing column(s) {', '.join(missing)}; the header has "
            f"{header}. Expected site_id or longitude/latitude, date, taxon, "
            "outcome, effort_hours."
        )
    rows, problems = [], []
    for raw in reader:
        line = reader.line_num  # last physical line of this record
        extra = [c for c in raw.pop(None, None) or [] if c.strip()]
        if extra:
            problems.append(
                f"line {line}: {len(header) + len(extra)} cells but the header has "
                f"{len(header)} columns: in a comma-separated file a decimal comma (3,5) or a "
                "comma in unquoted text splits a cell in two. Save the file with "
                "semicolons between the columns, or write decimal points and quote text "
                "holding commas"
            )
            continue
        rec, errs = _parse_row(raw, line, decimal_comma=delimiter != ",")
        problems += errs
        if not errs:
            rows.append(rec)
    if problems:
        shown = problems[:_MAX_LISTED]
        more = len(problems) - len(shown)
        raise InputError(
            f"{path}: {len(problems)} problem(s) in the field results:\n  "
            + "\n  ".join(shown)
            + (f"\n  ... and {more} more" if more > 0 else "")
            + "\nFix these rows and run again."
        )
    cols = [
        "line",
        "site_id",
        "longitude",
        "latitude",
        "date",
        "taxon",
        "outcome",
        "effort_hours",
    ]
    return pd.DataFrame(rows, columns=cols)


_DECIMAL_COMMA = re.compile(r"[-+]?\d*,\d+")


def _float(raw, key, decimal_comma: bool = False):
    """A number cell: decimal commas are read in semicolon- or tab-separated files
    and, quoted, in comma-separated ones; where a comma-separated file's comma could
    also group thousands (``"1,500"`` hours) the cell is refused, not guessed."""
    v = (raw.get(key) or "").strip()
    if v == "":
        return math.nan, None
    if _DECIMAL_COMMA.fullmatch(v):
        degrees = key in ("longitude", "latitude")  # degrees have no thousands
        if not (decimal_comma or degrees) and len(v.split(",")[1]) == 3:
            return math.nan, (f"{key} {v!r} could be {v.replace(',', '.')} or "
                              f"{v.replace(',', '')}: write it with a decimal point")
        v = v.replace(",", ".")
    try:
        f = float(v)
    except ValueError:
        return math.nan, f"{key} {v!r} is not a number"
    if not math.isfinite(f):
        return math.nan, f"{key} {v!r} is not a finite number"
    return f, None


def _parse_row(raw, line, decimal_comma: bool = False):
    errs = []
    where = f"line {line}"
    site_id = (raw.get("site_id") or "").strip()
    lon, e1 = _float(raw, "longitude", decimal_comma)
    lat, e2 = _float(raw, "latitude", decimal_comma)
    errs += [f"{where}: {e}" for e in (e1, e2) if e]
    if not e1 and not e2:
        if math.isnan(lon) != math.isnan(lat):
            errs.append(f"{where}: give both longitude and latitude, or neither")
        elif not math.isnan(lat) and not (-90 <= lat <= 90 and -180 <= lon <= 360):
            errs.append(
                f"{where}: coordinates ({lon}, {lat}) are outside the globe "
                "(longitude -180..180, latitude -90..90)"
            )
    if not site_id and (math.isnan(lon) or math.isnan(lat)) and not (e1 or e2):
        errs.append(f"{where}: give a site_id or longitude and latitude")
    date_txt = (raw.get("date") or "").strip()
    try:
        date = dt.date.fromisoformat(date_txt)
    except ValueError:
        date = None
        errs.append(f"{where}: date {date_txt!r} is not YYYY-MM-DD")
    taxon = (raw.get("taxon") or "").strip()
    if not taxon:
        errs.append(f"{where}: taxon is empty")
    outcome = (raw.get("outcome") or "").strip().lower().replace("_", "-")
    if outcome not in OUTCOMES:
        errs.append(
            f"{where}: outcome {raw.get('outcome')!r} is not one of "
            f"{', '.join(OUTCOMES)}"
        )
    effort, e3 = _float(raw, "effort_hours", decimal_comma)
    if e3:
        errs.append(f"{where}: {e3}")
    elif effort < 0:
        errs.append(f"{where}: effort_hours {effort} is negative")
    return (
        {
            "line": line,
            "site_id": site_id,
            "longitude": lon,
            "latitude": lat,
            "date": date,
            "taxon": taxon,
            "outcome": outcome,
            "effort_hours": effort,
        },
        errs,
    )


@dataclass
class SurveyScore:
    """How the predictions fared in the field.

    Attributes
    ----------
    n_visited, n_hits : int
        Visited predicted sites, and those with at least one find.
    area_share : float
        Share of the study area (by ground area) predicted suitable.
    hit_rate : float
        ``n_hits / n_visited`` (NaN when nothing was visited).
    binomial_p : float
        One-sided ``P(X >= n_hits)``, ``X ~ Binomial(n_visited, area_share)``.
    n_new_records : int
        Find localities on the grid used as test presences.
    n_new_in_predicted : int
        Of those, how many fall in cells predicted suitable.
    records_binomial_p : float
        The same binomial test for the new records themselves.
    auc : float
        AUC of suitability at the new records against background cells.
    n_background : int
    n_new_lineage : int
        Rows reported as a new lineage.
    per_site : pandas.DataFrame
        One row per ranked site: site_id, rank, kind, visited, found, effort_hours.
    unmatched : list of str
        Field rows that matched no site and lay off the grid, in plain words.
    finds_without_locality : list of str
        Finds given by site only: they count for the hit rate but are neither test
        records nor new records.
    """

    n_visited: int
    n_hits: int
    area_share: float
    hit_rate: float
    binomial_p: float
    n_new_records: int
    n_new_in_predicted: int
    records_binomial_p: float
    auc: float
    n_background: int
    n_new_lineage: int
    per_site: pd.DataFrame
    unmatched: list = field(default_factory=list)
    finds_without_locality: list = field(default_factory=list)


def _clade_map(suitability) -> np.ndarray:
    if isinstance(suitability, Mapping):
        maps = [
            np.asarray(getattr(v, "suitability", v), float)
            for v in suitability.values()
        ]
        if not maps:
            raise InputError("no suitability maps were given to score the survey")
        from screener.isolation import clade_suitability

        return clade_suitability(dict(enumerate(maps)))
    return np.asarray(suitability, float)


def score_survey(
    field_results: pd.DataFrame,
    sites,
    grid,
    suitability,
    *,
    threshold: float | None = None,
    area_share: float | None = None,
    n_background: int = 10_000,
    random_state=0,
) -> SurveyScore:
    """Test the predictions against what the survey found.

    Parameters
    ----------
    field_results : pandas.DataFrame
        As returned by :func:`read_field_results`.
    sites : geopandas.GeoDataFrame
        The ranked sites (``site_id``, ``rank``, ``kind``, polygons in the grid CRS).
        Rows given by coordinates are matched to the site whose polygon holds them.
    grid : screener.grid.Grid
    suitability : ndarray or mapping of str to ndarray
        Suitability map(s); several are combined by their cell-wise maximum.
    threshold : float, optional
        Cells at or above it count as predicted suitable.  Needed unless
        ``area_share`` is given; both may be given.
    area_share : float, optional
        Share of the study area predicted suitable, in (0, 1).  Computed from
        ``threshold`` and the ground cell areas when omitted.
    n_background : int, default 10000
        Background cells drawn without replacement for the AUC (all valid cells when
        there are fewer).
    random_state : int or numpy.random.Generator, default 0

    Returns
    -------
    SurveyScore

    References
    ----------
    .. [1] Anderson, R. P. et al. (2002). Ecological Modelling 162: 211-232.
    """
    s = _clade_map(suitability)
    if s.shape != tuple(grid.shape):
        raise InputError(f"suitability map has shape {s.shape}, the grid {grid.shape}")
    valid = grid.mask & np.isfinite(s)
    if threshold is None and area_share is None:
        raise InputError(
            "give the suitability threshold or the predicted area share "
            "to test the hit rate against."
        )
    if area_share is None:
        areas = np.asarray(grid.cell_area_km2, float)
        area_share = float(areas[valid & (s >= threshold)].sum() / areas[valid].sum())
    area_share = float(area_share)
    if not 0 < area_share < 1:
        raise InputError(f"area_share must be in (0, 1); got {area_share!r}")

    fr = field_results.reset_index(drop=True)
    site_ids = sites["site_id"].astype(str).tolist()
    sid = fr["site_id"].astype(str).where(fr["site_id"].astype(str).isin(site_ids), "")
    lon = fr["longitude"].to_numpy(float)
    lat = fr["latitude"].to_numpy(float)
    has_xy = np.isfinite(lon) & np.isfinite(lat)
    x = np.full(len(fr), np.nan)
    y = np.full(len(fr), np.nan)
    if has_xy.any():
        xx, yy = grid.from_lonlat(lon[has_xy], lat[has_xy])
        x[has_xy], y[has_xy] = xx, yy
    # Rows given by coordinates only: the site whose polygon holds the point.
    need = (sid == "") & has_xy
    if need.any():
        import geopandas as gpd

        pts = gpd.GeoDataFrame(
            geometry=gpd.points_from_xy(x[need], y[need]),
            crs=sites.crs,
            index=np.flatnonzero(need),
        )
        hit = gpd.sjoin(
            pts, sites[["site_id", "geometry"]], how="left", predicate="within"
        )
        hit = hit[~hit.index.duplicated()]
        sid.loc[hit.index] = hit["site_id"].fillna("").astype(str).to_numpy()
    # Rows given by site only: the site's representative point.
    site_xy = sites.set_index(sites["site_id"].astype(str))[["x", "y"]]
    only_site = ~has_xy & (sid != "")
    x[only_site] = site_xy.loc[sid[only_site], "x"].to_numpy()
    y[only_site] = site_xy.loc[sid[only_site], "y"].to_numpy()
    find = fr["outcome"].isin(FIND_OUTCOMES).to_numpy()

    per_site = sites[["site_id", "rank", "kind"]].copy()
    per_site["site_id"] = per_site["site_id"].astype(str)
    grouped = pd.DataFrame(
        {"site_id": sid, "find": find, "effort": fr["effort_hours"].to_numpy(float)}
    )
    grouped = grouped[grouped["site_id"] != ""]
    agg = grouped.groupby("site_id").agg(
        found=("find", "any"), effort_hours=("effort", "sum")
    )
    per_site = per_site.merge(agg, left_on="site_id", right_index=True, how="left")
    per_site["visited"] = per_site["found"].notna()
    per_site["found"] = per_site["found"].astype("boolean").fillna(False).astype(bool)
    n_visited = int(per_site["visited"].sum())
    n_hits = int((per_site["visited"] & per_site["found"]).sum())
    if n_visited:
        p_sites = float(
            stats.binomtest(n_hits, n_visited, area_share, alternative="greater").pvalue
        )
        hit_rate = n_hits / n_visited
    else:
        p_sites, hit_rate = math.nan, math.nan

    rows, cols, inside = grid.rowcol(x, y)
    on = inside.copy()
    on[inside] = valid[rows[inside], cols[inside]]
    unmatched = [
        f"line {int(fr.loc[i, 'line'])}: no ranked site and off the grid"
        for i in np.flatnonzero((sid == "") & ~on)
    ]
    # Test records are find *localities*: a find given only by its site would stand
    # at the site's representative point, the site's most suitable cell, and make
    # the AUC circular.  Such finds count for the hit rate only.
    new = find & on & has_xy
    no_locality = [
        f"line {int(fr.loc[i, 'line'])}: a find given by site only (no coordinates)"
        for i in np.flatnonzero(find & ~has_xy)
    ]
    # One test presence per cell and taxon, as for the training records.
    keys = pd.DataFrame(
        {"r": rows[new], "c": cols[new], "t": fr.loc[new, "taxon"].to_numpy()}
    ).drop_duplicates()
    pres = s[keys["r"].to_numpy(), keys["c"].to_numpy()]
    n_new = int(pres.size)
    n_in = int(np.sum(pres >= threshold)) if threshold is not None else 0
    p_rec = (
        float(stats.binomtest(n_in, n_new, area_share, alternative="greater").pvalue)
        if n_new and threshold is not None
        else math.nan
    )
    rng = np.random.default_rng(random_state)
    vr, vc = np.nonzero(valid)
    take = min(int(n_background), vr.size)
    pick = rng.choice(vr.size, size=take, replace=False)
    bg = s[vr[pick], vc[pick]]
    if n_new and take:
        u = stats.mannwhitneyu(pres, bg, alternative="two-sided").statistic
        auc = float(u) / (n_new * take)
    else:
        auc = math.nan
    log.info(
        "survey: %d of %d visited sites with finds; AUC %.3f on %d records",
        n_hits,
        n_visited,
        auc,
        n_new,
    )
    return SurveyScore(
        n_visited=n_visited,
        n_hits=n_hits,
        area_share=area_share,
        hit_rate=hit_rate,
        binomial_p=p_sites,
        n_new_records=n_new,
        n_new_in_predicted=n_in,
        records_binomial_p=p_rec,
        auc=auc,
        n_background=take,
        n_new_lineage=int((fr["outcome"] == "new-lineage").sum()),
        finds_without_locality=no_locality,
        per_site=per_site[
            ["site_id", "rank", "kind", "visited", "found", "effort_hours"]
        ].reset_index(drop=True),
        unmatched=unmatched,
    )


def _f(v, spec=".3f"):
    return (
        "n/a"
        if v is None or (isinstance(v, float) and math.isnan(v))
        else format(v, spec)
    )


def render_survey_report(score: SurveyScore) -> str:
    """A short markdown summary of a :class:`SurveyScore` (user text escaped)."""
    lines = [
        "# Survey results against the predictions",
        "",
        f"- Visited predicted sites: {score.n_visited}; with a find: {score.n_hits} "
        f"(hit rate {_f(score.hit_rate, '.2f')}).",
        f"- Share of the study area predicted suitable: {_f(score.area_share)}.",
        f"- One-sided binomial test of the hit rate against that share "
        f"(Anderson et al. 2002): p = {_f(score.binomial_p, '.4g')}.",
        f"- New find localities (finds with their own coordinates) used as test "
        f"records: {score.n_new_records}, of which "
        f"{score.n_new_in_predicted} in predicted suitable cells "
        f"(binomial p = {_f(score.records_binomial_p, '.4g')}).",
        f"- AUC of the new records against {score.n_background} background cells: "
        f"{_f(score.auc)} (0.5 = no better than random).",
        f"- Rows reporting a new lineage: {score.n_new_lineage}.",
        "",
        "| rank | site | kind | visited | found | effort (h) |",
        "| --- | --- | --- | --- | --- | --- |",
    ]
    for r in score.per_site.to_dict("records"):
        lines.append(
            f"| {int(r['rank'])} | {html.escape(str(r['site_id']))} | "
            f"{html.escape(str(r['kind']))} | {'yes' if r['visited'] else 'no'} | "
            f"{'yes' if r['found'] else 'no'} | {_f(r['effort_hours'], '.1f')} |"
        )
    if score.unmatched:
        lines += ["", "Rows not used:", ""]
        lines += [f"- {html.escape(u)}" for u in score.unmatched]
    if score.finds_without_locality:
        lines += [
            "",
            "Finds without their own coordinates (counted for the hit rate; not test "
            "records and not added to the record file; add the coordinates where the "
            "animal was found):",
            "",
        ]
        lines += [f"- {html.escape(u)}" for u in score.finds_without_locality]
    lines += [
        "",
        "A site where nothing was found is not evidence of absence: "
        "detection depends on season, weather and effort. Small numbers of "
        "visits give tests of little power.",
        "",
    ]
    return "\n".join(lines)


def updated_records(
    original_records: pd.DataFrame,
    field_results: pd.DataFrame,
    *,
    grid=None,
    modelled_taxa=None,
    min_records: int = default("occurrences", "min_records"),
) -> pd.DataFrame:
    """The record table plus the survey's new finds, for the next run.

    Parameters
    ----------
    original_records : pandas.DataFrame
        The record table as read (``taxon`` and ``longitude``/``latitude``, or
        ``x``/``y`` in the grid CRS).  Not modified.
    field_results : pandas.DataFrame
        From :func:`read_field_results`; rows with outcome found or new-lineage and
        their own coordinates are added at those coordinates (finds given by site
        only are left out: a site point is not a locality).
    grid : screener.grid.Grid, optional
        Needed when the record table has ``x``/``y`` instead of longitude/latitude.
    modelled_taxa : iterable of str, optional
        Taxa the run modelled.  A taxon not among them with fewer than
        ``min_records`` rows in the result is kept in the table but marked in the
        ``note`` column as left out of modelling.
    min_records : int, default ``[occurrences] min_records`` (3)
        The run's ``[occurrences] min_records``.

    Returns
    -------
    pandas.DataFrame
        A new table: the original rows, then one row per find, with a ``source``
        column ("input" for the original rows unless it already had one) and a
        ``note`` column.

    Raises
    ------
    screener.errors.InputError
        The record table lacks the columns needed to add a find.
    """
    orig = original_records.copy()
    if "taxon" not in orig.columns:
        raise InputError("the record table has no 'taxon' column")
    use_xy = not {"longitude", "latitude"} <= set(orig.columns)
    if use_xy and not ({"x", "y"} <= set(orig.columns) and grid is not None):
        raise InputError(
            "the record table has neither longitude/latitude nor x/y "
            "with a grid to convert them; pass grid=..."
        )
    if "source" not in orig.columns:
        orig["source"] = "input"
    if "note" not in orig.columns:
        orig["note"] = ""
    finds = field_results[field_results["outcome"].isin(FIND_OUTCOMES)]
    new_rows = []
    for r in finds.to_dict("records"):
        lon, lat = r["longitude"], r["latitude"]
        if not (np.isfinite(lon) and np.isfinite(lat)):
            continue  # listed in the debrief as a find without a locality
        row = {c: pd.NA for c in orig.columns}
        row["taxon"] = r["taxon"]
        if use_xy:
            xx, yy = grid.from_lonlat(lon, lat)
            row["x"], row["y"] = float(xx), float(yy)
        else:
            row["longitude"], row["latitude"] = float(lon), float(lat)
        for key in ("date", "site_id", "effort_hours"):
            if key in orig.columns:
                row[key] = r[key]
        row["source"] = f"field survey {r['date']} ({r['outcome']})"
        row["note"] = ""
        new_rows.append(row)
    out = orig
    if new_rows:
        out = pd.concat(
            [orig, pd.DataFrame(new_rows, columns=orig.columns)], ignore_index=True
        )
    if modelled_taxa is not None:
        counts = out["taxon"].astype(str).value_counts()
        known = {str(t) for t in modelled_taxa}
        for taxon, n in counts.items():
            if taxon not in known and n < int(min_records):
                out.loc[out["taxon"].astype(str) == taxon, "note"] = (
                    f"{n} record(s), fewer than min_records = {int(min_records)}: kept "
                    "here, left out of modelling until more records are found"
                )
    return out
