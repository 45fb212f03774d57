"""Field sheets: one printed page per top-ranked site, as a multi-page PDF.

Each page holds the project name, the date and the tool version; which taxon's model
the site's suitability comes from and at which threshold; a locator map and a zoomed
map of the site (hillshade with elevation contours where an elevation layer exists);
the representative point in decimal degrees and in UTM (zone and latitude band),
rounded to the precision the cell size supports; the elevation band; the walk in from
the named start point (route length, ascent, descent, hours and days at a stated
walking day); why the site ranks where it does (its weighted score components); the
suggested sampling points with their elevations; and every caution in full.  Greys,
hatching, line styles and markers carry every distinction, so a black-and-white print
reads the same as the screen.
"""

from __future__ import annotations

import datetime as dt
import logging
import math
import os
import textwrap
from dataclasses import dataclass
from pathlib import Path

import matplotlib
import numpy as np
import pandas as pd
from matplotlib.backends.backend_pdf import PdfPages
from matplotlib.figure import Figure
from pyproj import Transformer

from screener.errors import InputError, OutputError
from screener.grid import geodesic_distance_km
from screener.project import default
from screener.outputs import maps
from screener import __version__
from screener.outputs.cautions import CAUTIONS
from screener.outputs.gpx import elevation_band, sampling_waypoint_names
from screener.outputs._figure import literal_text
from screener.outputs.privacy import FULL_PRECISION_MARKER, has_full_precision_sensitive

__all__ = [
    "PAGE_SIZES_IN",
    "UTMPosition",
    "coordinate_precision",
    "site_model",
    "utm_zone",
    "utm_position",
    "suggest_sampling_points",
    "site_cell_mask",
    "site_sampling_points",
    "plan_sampling_points",
    "write_field_sheets",
]

log = logging.getLogger(__name__)

#: Page sizes in inches (width, height): ISO A4 (210 x 297 mm) and US letter.
PAGE_SIZES_IN = {"A4": (210 / 25.4, 297 / 25.4), "letter": (8.5, 11.0)}

_BANDS = "CDEFGHJKLMNPQRSTUVWX"  # 8-degree latitude bands from 80S; I and O skipped


@dataclass(frozen=True)
class UTMPosition:
    """A point in the Universal Transverse Mercator grid (WGS84 datum).

    Attributes
    ----------
    zone : int
        Zone number, 1-60.
    band : str
        Latitude band letter (C-X, without I and O).
    hemisphere : str
        "N" or "S"; southern northings carry the 10,000 km false northing.
    easting, northing : float
        Metres.
    epsg : int
        EPSG code of the zone's CRS (326zz north, 327zz south).
    """

    zone: int
    band: str
    hemisphere: str
    easting: float
    northing: float
    epsg: int

    def __str__(self) -> str:
        return f"{self.zone}{self.band} {self.easting:.0f} E {self.northing:.0f} N"


def utm_zone(lon: float, lat: float) -> tuple[int, str]:
    """UTM zone number and latitude band of a point.

    Zones are 6 degrees wide from 180 W; the exceptions of southern Norway (zone 32V
    widened to 3 E) and Svalbard (zones 31X, 33X, 35X, 37X) are applied.

    Parameters
    ----------
    lon, lat : float
        WGS84 degrees; latitude within [-80, 84] (UTM's range; polar areas use UPS).

    Returns
    -------
    (int, str)

    Raises
    ------
    screener.errors.InputError
        Latitude outside the UTM range or coordinates not finite.

    Examples
    --------
    >>> utm_zone(-0.1, 51.5), utm_zone(36.8, -1.3), utm_zone(5.3, 60.4)
    ((30, 'U'), (37, 'M'), (32, 'V'))
    """
    lon = float(lon)
    lat = float(lat)
    if not (math.isfinite(lon) and math.isfinite(lat)) or not -80 <= lat <= 84:
        raise InputError(
            f"point ({lon!r}, {lat!r}) is outside the UTM range (latitude -80 to 84); "
            "give polar positions in decimal degrees only."
        )
    lon = (lon + 180.0) % 360.0 - 180.0
    zone = int(math.floor((lon + 180.0) / 6.0)) + 1
    zone = min(zone, 60)
    band = _BANDS[min(int(math.floor((lat + 80.0) / 8.0)), len(_BANDS) - 1)]
    if band == "V" and 3.0 <= lon < 12.0:
        zone = 32
    if band == "X" and 0.0 <= lon < 42.0:
        zone = 31 if lon < 9 else 33 if lon < 21 else 35 if lon < 33 else 37
    return zone, band


def utm_position(lon: float, lat: float) -> UTMPosition:
    """Project a WGS84 point into its own UTM zone (with pyproj).

    Examples
    --------
    >>> p = utm_position(36.8, -1.3)
    >>> p.zone, p.band, p.hemisphere, p.epsg
    (37, 'M', 'S', 32737)
    """
    zone, band = utm_zone(lon, lat)
    south = float(lat) < 0
    epsg = (32700 if south else 32600) + zone
    tr = Transformer.from_crs("EPSG:4326", f"EPSG:{epsg}", always_xy=True)
    e, n = tr.transform(float(lon), float(lat))
    return UTMPosition(zone, band, "S" if south else "N", float(e), float(n), epsg)


#: Threshold names in words, for people.
THRESHOLD_WORDS = {
    "mtp": "minimum training presence",
    "p10": "10th-percentile training presence",
    "relaxed": "relaxed",
    "maxsss": "maximum sensitivity plus specificity",
}

#: Ground length of one degree of latitude, km (about 110.6-111.7 on WGS84; the mean
#: is used only to choose how many decimals to print; from memory).
_KM_PER_DEG_LAT = 111.32


def coordinate_precision(grid) -> tuple[int, int]:
    """Decimals of degrees and the UTM rounding step (m) that match the cell size.

    Coordinates are printed to the coarsest step no larger than half a cell: more
    digits would claim a precision the model's cells do not have.

    Returns
    -------
    (int, int)
        Decimals for decimal degrees, and the step in metres for UTM.

    Examples
    --------
    A 0.005 degree cell (about 0.55 km) gives 3 decimals (about 0.1 km) and 100 m:

    >>> from affine import Affine
    >>> from screener.grid import Grid
    >>> coordinate_precision(Grid("EPSG:4326", Affine(0.005, 0, 85, 0, -0.005, -14),
    ...                           (10, 10)))
    (3, 100)
    """
    cell_m = 1000.0 * float(
        min(np.median(np.asarray(grid.ew_step_km)), np.median(np.asarray(grid.ns_step_km)))
    )
    half_m = max(cell_m / 2.0, 1e-3)
    decimals = max(0, math.ceil(-math.log10(half_m / 1000.0 / _KM_PER_DEG_LAT)))
    step_m = int(10 ** max(0, math.floor(math.log10(half_m))))
    return decimals, step_m


def site_model(result, site) -> tuple:
    """The taxon whose model gives the site its suitability, and that taxon's
    threshold in use.

    The site's suitability is the highest of any taxon's at each cell; the taxon is
    the one highest at the site's representative cell
    (:func:`screener.evidence.site_taxon`).

    Returns
    -------
    (str, screener.results.Threshold or None, str)
        Taxon, its threshold in use, and the threshold's name.
    """
    from screener.evidence import site_taxon

    if not result.taxa:
        return "", None, ""
    taxon = site_taxon(result, site)
    use = str((result.settings.get("thresholds") or {}).get("use", default("thresholds", "use")))
    return taxon, (result.taxa[taxon].thresholds or {}).get(use), use


# --- sampling points ---------------------------------------------------------------
def site_cell_mask(grid, geometry) -> np.ndarray:
    """Boolean (rows, cols) mask of the valid cells whose centres fall in a polygon.

    Small polygons that hold no cell centre fall back to every touched cell.
    """
    from rasterio import features

    m = features.geometry_mask(
        [geometry], out_shape=grid.shape, transform=grid.transform, invert=True
    )
    if not m.any():
        m = features.geometry_mask(
            [geometry],
            out_shape=grid.shape,
            transform=grid.transform,
            invert=True,
            all_touched=True,
        )
    return m & grid.mask


def suggest_sampling_points(
    grid,
    site_mask,
    suitability,
    n: int = 5,
    min_spacing_km: float | None = None,
    *,
    site_id: str = "",
) -> pd.DataFrame:
    """Pick well-spread, highly suitable cells of a site as sampling points.

    The best cell is taken first; every cell closer than ``min_spacing_km`` to it is
    then set aside and the best remaining cell is taken, until ``n`` points are
    chosen or no cell is left.  Distances are geodesic (WGS84) between cell centres.

    Parameters
    ----------
    grid : screener.grid.Grid
    site_mask : ndarray of bool, shape (n_rows, n_cols)
        Cells of the site.
    suitability : ndarray of float, shape (n_rows, n_cols)
        NaN cells are never chosen.
    n : int, default 5
        Number of points wanted.
    min_spacing_km : float, optional
        Minimum distance between chosen points in km.  By default half the side of
        a square holding the site's area divided by ``n``:
        ``0.5 * sqrt(area_km2 / n)``.
    site_id : str, default ""
        Written into the ``site_id`` column.

    Returns
    -------
    pandas.DataFrame
        Columns ``site_id, point_id, longitude, latitude, x, y, suitability, row,
        col``; ``point_id`` counts from 1 in order of choice (best first).  Fewer than
        ``n`` rows when the site is too small for the spacing.
    """
    if n < 1:
        raise ValueError(f"n must be at least 1; got {n!r}")
    site_mask = np.asarray(site_mask, bool)
    s = np.asarray(suitability, float)
    if site_mask.shape != tuple(grid.shape) or s.shape != tuple(grid.shape):
        raise ValueError(
            f"site_mask {site_mask.shape} and suitability {s.shape} must have the "
            f"grid's shape {grid.shape}"
        )
    cols_out = [
        "site_id",
        "point_id",
        "longitude",
        "latitude",
        "x",
        "y",
        "suitability",
        "row",
        "col",
    ]
    cells = site_mask & np.isfinite(s)
    rows, cols = np.nonzero(cells)
    if rows.size == 0:
        return pd.DataFrame(columns=cols_out)
    vals = s[rows, cols]
    if min_spacing_km is None:
        area = float(np.asarray(grid.cell_area_km2)[rows, cols].sum())
        min_spacing_km = 0.5 * math.sqrt(area / n)
    if not min_spacing_km >= 0:
        raise ValueError(f"min_spacing_km must be >= 0; got {min_spacing_km!r}")
    lon, lat = grid.lonlat(rows, cols)
    lon = np.atleast_1d(np.asarray(lon, float))
    lat = np.atleast_1d(np.asarray(lat, float))
    free = np.ones(rows.size, bool)
    chosen = []
    for _ in range(n):
        if not free.any():
            break
        cand = np.flatnonzero(free)
        i = int(cand[np.argmax(vals[cand])])
        chosen.append(i)
        d = np.atleast_1d(geodesic_distance_km(lon[i], lat[i], lon, lat))
        free &= d >= min_spacing_km
        free[i] = False
    idx = np.array(chosen, int)
    x, y = grid.xy(rows[idx], cols[idx])
    return pd.DataFrame(
        {
            "site_id": [site_id] * idx.size,
            "point_id": np.arange(1, idx.size + 1),
            "longitude": lon[idx],
            "latitude": lat[idx],
            "x": np.asarray(x, float),
            "y": np.asarray(y, float),
            "suitability": vals[idx],
            "row": rows[idx],
            "col": cols[idx],
        }
    )


def _clade_suitability(result) -> np.ndarray:
    from screener.isolation import clade_suitability

    if not result.taxa:
        return np.full(result.grid.shape, np.nan)
    return clade_suitability({n: t.suitability for n, t in result.taxa.items()})


def plan_sampling_points(result):
    """Suggested sampling points for the top sites (for sheets and GPX), or None.

    Returns
    -------
    pandas.DataFrame or None
        ``site_id, point_id, longitude, latitude, x, y, suitability`` for up to
        ``[outputs] sampling_points`` points in each of the ``[outputs] field_sheets``
        best sites.
    """
    so = result.settings.get("outputs", {})
    n_pts = int(so.get("sampling_points", default("outputs", "sampling_points")))
    top = int(so.get("field_sheets", default("outputs", "field_sheets")))
    cand = result.candidates
    if cand is None or not len(result.sites) or n_pts <= 0:
        return None
    clade = _clade_suitability(result)
    frames = []
    for _, site in result.sites.head(top).iterrows():
        site_mask = cand.patch_labels == int(site["rank"])
        if not site_mask.any():
            continue
        pts = suggest_sampling_points(result.grid, site_mask, clade, n=n_pts)
        pts["site_id"] = site["site_id"]
        frames.append(pts)
    return pd.concat(frames, ignore_index=True) if frames else None


def site_sampling_points(
    result, *, top_n: int | None = None, n: int = 5, min_spacing_km: float | None = None
) -> pd.DataFrame:
    """Sampling points for the top sites: the run's own, or suggested here.

    Uses ``result.sampling_points`` for every site it covers and
    :func:`suggest_sampling_points` on the highest suitability of any taxon for the
    others.
    """
    sites = result.sites if top_n is None else result.sites.iloc[: int(top_n)]
    have = result.sampling_points
    suit = None
    parts = []
    for site in sites.to_dict("records"):
        sid = str(site["site_id"])
        if (
            have is not None
            and len(have)
            and (have["site_id"].astype(str) == sid).any()
        ):
            parts.append(have[have["site_id"].astype(str) == sid])
            continue
        if suit is None:
            suit = _clade_suitability(result)
        mask = site_cell_mask(result.grid, site["geometry"])
        parts.append(
            suggest_sampling_points(
                result.grid, mask, suit, n=n, min_spacing_km=min_spacing_km, site_id=sid
            )
        )
    parts = [p for p in parts if len(p)]
    if not parts:
        return pd.DataFrame(
            columns=[
                "site_id",
                "point_id",
                "longitude",
                "latitude",
                "x",
                "y",
                "suitability",
                "elevation_m",
            ]
        )
    out = pd.concat(parts, ignore_index=True)
    out["elevation_m"] = np.nan
    if result.elevation is not None and len(out):
        if {"row", "col"} <= set(out.columns):
            rows = out["row"].to_numpy(int)
            cols = out["col"].to_numpy(int)
        else:
            rows, cols, _ = result.grid.rowcol(out["x"].to_numpy(float),
                                               out["y"].to_numpy(float))
        out["elevation_m"] = np.asarray(result.elevation, float)[rows, cols]
    return out


# --- the page ----------------------------------------------------------------------
def _float0(v) -> float:
    """A number or NaN (for shares that may be missing)."""
    try:
        return float(v)
    except (TypeError, ValueError):
        return math.nan


def _num(v, spec=".2f", missing="not estimated"):
    try:
        f = float(v)
    except (TypeError, ValueError):
        return missing
    return format(f, spec) if math.isfinite(f) else missing


def _share_pct(v) -> str:
    """A share of a site's cells (0-1) as a percentage, or 'not estimated'."""
    pct = _num(100 * _float0(v), ".0f")
    return pct if pct == "not estimated" else f"{pct}%"


def _walk_lines(result, site) -> list[str]:
    route = (getattr(result, "routes", None) or {}).get(str(site["site_id"]))
    day = float((result.settings.get("access") or {}).get("walking_day_hours", default("access", "walking_day_hours")))
    if route is None:
        walk = site.get("walk_hours")
        if _num(walk) == "not estimated":
            return ["Walk in: not estimated (no start points or no elevation layer)."]
        return [f"Walk in: {_num(walk, '.1f')} h from the nearest start point "
                "(slope-only estimate; no route traced)."]
    return [
        f"Walk in from {route.start_name}: {route.distance_km:.1f} km along the "
        f"route, ascent {route.ascent_m:,.0f} m, descent {route.descent_m:,.0f} m, "
        f"about {route.hours:.1f} h walking",
        f"    = {route.days(day)} day(s) at a {day:g} h walking day (common practice "
        "6-8 h); slope-only estimate: add time for vegetation, rivers and loads.",
    ]


def _facts(result, site, n_sites) -> list[str]:
    lon, lat = float(site["longitude"]), float(site["latitude"])
    decimals, step_m = coordinate_precision(result.grid)
    try:
        u = utm_position(lon, lat)
        utm = (f"{u.zone}{u.band} {_round_to(u.easting, step_m):.0f} E "
               f"{_round_to(u.northing, step_m):.0f} N (to {step_m} m)")
    except InputError:
        utm = "outside the UTM range (polar)"
    taxon, th, use = site_model(result, site)
    th_txt = (f"suitable at or above its {THRESHOLD_WORDS.get(use, use)} threshold, "
              f"{th.value:.3f}"
              if th is not None else "no threshold recorded")
    return [
        f"Rank {int(site['rank'])} of {n_sites}    kind: {site['kind']}    "
        f"area: {_num(site.get('area_km2'), ',.1f')} km²    elevation band: "
        f"{elevation_band(site)}",
        f"Point (WGS84): lat {lat:.{decimals}f}, lon {lon:.{decimals}f} "
        f"(to {decimals} decimals, matched to the cell size)    UTM: {utm}",
        f"Suitability from the {taxon} model (consensus of its families):",
        f"    {th_txt}",
        f"Suitability: mean {_num(site.get('mean_suitability'))}, max "
        f"{_num(site.get('max_suitability'))}    agreement "
        f"{_num(site.get('agreement'))}",
        f"Extrapolation: novel_share (MESS < 0) {_share_pct(site.get('novel_share'))} of "
        f"the site; clamped_share {_share_pct(site.get('clamped_share'))} (outside a "
        "model's calibration range)",
        f"Nearest known taxon: {site.get('nearest_taxon', 'n/a')}    nearest record "
        f"{_num(site.get('nearest_record_km'), '.1f')} km    gap "
        f"{_num(site.get('gap_km'), '.1f')} km    barrier depth "
        f"{_num(site.get('barrier_depth'))}",
        *_walk_lines(result, site),
        _robustness_line(site),
    ]


def _robustness_line(site) -> str:
    """How stable the site's rank is: under random weightings, and under refits."""
    lo, hi = _float0(site.get("rank_low")), _float0(site.get("rank_high"))
    if math.isfinite(lo) and math.isfinite(hi):
        text = f"Rank {lo:.0f}-{hi:.0f} in 90 % of random weightings of the score"
    else:
        text = "Rank under random weightings of the score: not estimated"
    shares = [(w, _float0(site.get(c))) for w, c in (("suitable", "refit_suitable"),
                                                       ("isolated", "refit_isolated"),
                                                       ("top sites", "refit_top_k"))]
    if any(math.isfinite(v) for _, v in shares):
        text += "; kept in bootstrap refits: " + ", ".join(
            f"{w} {_share_pct(v)}" for w, v in shares)
    else:
        text += "; bootstrap refits of the records: not run"
    return text


def _write_no_sites_sheet(path: Path, result, page_size: str) -> Path:
    """One page saying the run found no candidate site (a finished plan, not an error)."""
    project = str((result.settings.get("project") or {}).get("name") or "unnamed project")
    iso = result.settings.get("isolation") or {}
    use = (result.settings.get("thresholds") or {}).get("use", default("thresholds", "use"))
    text = (
        f"Field sheets: {project}\n\n"
        f"This run found no candidate site at the {use} thresholds (smallest patch "
        f"{iso.get('min_patch_km2', 'default')} km2, within-range sites beyond "
        f"{iso.get('within_range_min_km', 'default')} km of every record), so there is "
        "no site to survey from this plan. That is a result, not a failure: the "
        "models find no unrecorded suitable ground of that size. Relaxing the "
        "threshold or the minimum patch area may show smaller or weaker candidates; "
        "treat them with more caution.\n\n"
        f"screener {__version__}, written {dt.date.today().isoformat()}"
    )
    w, h = PAGE_SIZES_IN[page_size]
    fig = Figure(figsize=(w, h))
    lines = []
    for para in text.split("\n"):
        lines.extend(textwrap.wrap(para, 90) or [""])
    fig.text(0.08, 0.92, "\n".join(lines), va="top", ha="left", fontsize=9)
    try:
        with matplotlib.rc_context({"pdf.fonttype": 42}):
            with PdfPages(path, metadata={"Title": f"Field sheets: {project}",
                                          "Creator": "screener"}) as pdf:
                pdf.savefig(fig)
    except OSError as exc:
        raise OutputError(f"cannot write field sheets to {path}: {exc}") from exc
    log.info("no candidate sites: wrote a one-page note to %s", path)
    return path


def _round_to(v: float, step: float) -> float:
    return round(float(v) / step) * step


_HATCHES = ["", "///", "...", "xxx", "\\\\\\", "ooo", "---", "+++"]


def _score_panel(ax, site, score_cols):
    vals = [float(site.get(c, np.nan)) for c in score_cols]
    names = [c.removeprefix("score_").replace("_", " ") for c in score_cols]
    y = np.arange(len(vals))[::-1]
    for yi, v, h in zip(y, vals, _HATCHES * 4, strict=False):
        ax.barh(
            yi,
            v if math.isfinite(v) else 0.0,
            color="0.75",
            edgecolor="black",
            hatch=h,
            linewidth=0.6,
        )
        ax.text(
            v if math.isfinite(v) else 0.0,
            yi,
            f" {_num(v, '.3f', 'n/a')}",
            va="center",
            fontsize=7,
        )
    ax.set_yticks(y, names, fontsize=7)
    ax.tick_params(axis="x", labelsize=6)
    ax.axvline(0, color="black", linewidth=0.6)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    ax.set_title(
        f"Why it ranks here: weighted score components "
        f"(total {_num(site.get('score'), '.3f', 'n/a')})",
        fontsize=8,
        loc="left",
    )


def _points_table(ax, result, site, points):
    ax.axis("off")
    ax.set_title(
        "Suggested sampling points (best cells, spread apart)", fontsize=8, loc="left"
    )
    if points is None or len(points) == 0:
        ax.text(
            0,
            0.8,
            "No sampling points could be placed in this site.",
            fontsize=7,
            transform=ax.transAxes,
        )
        return
    decimals, step_m = coordinate_precision(result.grid)
    rows = []
    names = sampling_waypoint_names(site, points)
    for p, name in zip(points.to_dict("records"), names, strict=True):
        try:
            u = utm_position(p["longitude"], p["latitude"])
            utm = (f"{u.zone}{u.band} {_round_to(u.easting, step_m):.0f} "
                   f"{_round_to(u.northing, step_m):.0f}")
        except InputError:
            utm = "n/a"
        rows.append(
            [
                name,
                f"{p['latitude']:.{decimals}f}",
                f"{p['longitude']:.{decimals}f}",
                utm,
                _num(p.get("elevation_m"), ",.0f", "n/a"),
                _num(p.get("suitability")),
            ]
        )
    tab = ax.table(
        cellText=rows,
        colLabels=["waypoint", "lat", "lon", "UTM (E N)", "elevation (m)", "suitability"],
        loc="upper left",
        cellLoc="left",
        colLoc="left",
        colWidths=[0.12, 0.15, 0.15, 0.28, 0.14, 0.14],
    )
    tab.auto_set_font_size(False)
    tab.set_fontsize(7)
    for cell in tab.get_celld().values():
        cell.set_linewidth(0.4)


def _caution_lines(width: int = 140) -> list:
    """Every caution in full, wrapped: (text, is_heading_line) pairs."""
    out = []
    for heading, text in CAUTIONS:
        wrapped = textwrap.wrap(f"{heading}: {text}", width, break_on_hyphens=False)
        for k, line in enumerate(wrapped):
            out.append((line, k == 0))
    return out


#: Characters of 7.5 pt text that fit between the page margins of A4 and letter
_FACT_CHARS = 125


def _page(result, site, points, *, page_size, n_sites, marker, score_cols, header):
    w, h = PAGE_SIZES_IN[page_size]
    fig = Figure(figsize=(w, h))
    fig.text(
        0.06,
        0.972,
        f"Field sheet: site {site['site_id']} (rank {int(site['rank'])})",
        fontsize=13,
        fontweight="bold",
        va="top",
    )
    fig.text(0.06, 0.949, header, fontsize=7.5, va="top")
    fig.text(
        0.06,
        0.935,
        "A hypothesis for survey, not a known locality.",
        fontsize=8,
        va="top",
        style="italic",
    )
    if marker:
        fig.text(
            0.94,
            0.972,
            marker,
            fontsize=9,
            fontweight="bold",
            ha="right",
            va="top",
            bbox={"facecolor": "white", "edgecolor": "black"},
        )
    loc_ax = fig.add_axes((0.06, 0.69, 0.25, 0.22))
    maps.plot_locator(result, site, ax=loc_ax)
    loc_ax.set_title("Locator", fontsize=8, loc="left")
    zoom_ax = fig.add_axes((0.40, 0.65, 0.54, 0.27))
    route = (getattr(result, "routes", None) or {}).get(str(site["site_id"]))
    maps.plot_site_zoom(result, site, ax=zoom_ax, points=points, route=route,
                        caption=False)
    zoom_ax.set_title("Site", fontsize=8, loc="left")
    y = 0.625
    for fact in _facts(result, site, n_sites):
        # long names (taxa, start points) wrap rather than run off the page
        for line in textwrap.wrap(fact, _FACT_CHARS, subsequent_indent="    ",
                                  break_on_hyphens=False) or [""]:
            fig.text(0.06, y, line, fontsize=7.5, va="top")
            y -= 0.0155
    if score_cols:
        sc_ax = fig.add_axes((0.22, y - 0.085, 0.5, 0.07))
        _score_panel(sc_ax, site, score_cols)
        y -= 0.11
    pt_ax = fig.add_axes((0.06, y - 0.085, 0.88, 0.075))
    _points_table(pt_ax, result, site, points)
    y -= 0.10
    fig.text(0.06, y, "Cautions", fontsize=9, fontweight="bold", va="top")
    y -= 0.015
    for line, first in _caution_lines():
        fig.text(0.06 if first else 0.075, y, line, fontsize=6.8, va="top")
        y -= 0.0113
    if y < 0.0:
        log.warning("field sheet of site %s runs off the page", site["site_id"])
    return fig


def write_field_sheets(path, result, *, top_n: int = 10, page_size: str = "A4") -> Path:
    """Write one field-sheet page per top-ranked site to a PDF.

    Parameters
    ----------
    path : str or os.PathLike
        Output PDF; overwritten if it exists.
    result : screener.results.RunResult
    top_n : int, default 10
        Number of sites (best first).
    page_size : {"A4", "letter"}, default "A4"

    Returns
    -------
    pathlib.Path

    Raises
    ------
    screener.errors.InputError
        Unknown page size, or a result without sites.
    screener.errors.OutputError
        The file cannot be written.

    Notes
    -----
    Fonts are embedded as TrueType (``pdf.fonttype`` 42) so the text stays
    searchable and copyable.  When a sensitive taxon's records are at full precision
    every page carries the marker "FULL PRECISION: do not share".
    """
    if page_size not in PAGE_SIZES_IN:
        raise InputError(
            f"page_size {page_size!r} is not known; use one of {sorted(PAGE_SIZES_IN)}."
        )
    sites = result.sites
    path = Path(os.fspath(path))
    if sites is None or len(sites) == 0:
        return _write_no_sites_sheet(path, result, page_size)
    top = sites.iloc[: int(top_n)]
    points = site_sampling_points(result, top_n=top_n)
    score_cols = [c for c in sites.columns if str(c).startswith("score_")]
    marker = FULL_PRECISION_MARKER if has_full_precision_sensitive(result) else None
    project = str((result.settings.get("project") or {}).get("name") or "unnamed project")
    header = (f"Project: {project}    written {dt.date.today().isoformat()}    "
              f"screener {__version__}")
    meta = {
        "Title": f"Field sheets: {project}",
        "Creator": "screener",
        "Subject": "Survey hypotheses, not known localities",
    }
    try:
        with matplotlib.rc_context({"pdf.fonttype": 42, "font.size": 8}):
            with PdfPages(path, metadata=meta) as pdf:
                for site in top.to_dict("records"):
                    pts = points[points["site_id"].astype(str) == str(site["site_id"])]
                    fig = _page(
                        result,
                        site,
                        pts,
                        page_size=page_size,
                        n_sites=len(sites),
                        marker=marker,
                        score_cols=score_cols,
                        header=header,
                    )
                    pdf.savefig(literal_text(fig))
    except OSError as exc:
        raise OutputError(f"cannot write field sheets to {path}: {exc}") from exc
    log.info("wrote %d field sheets to %s", len(top), path)
    return path
