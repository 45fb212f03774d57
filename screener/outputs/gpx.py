"""Waypoints and walking tracks of the ranked sites, as GPX 1.1.

One waypoint per candidate site, named by its site id (``S01``, ``S02``, ...), one per
suggested sampling point (``S01-2``, ``S01-3``, ...), one per start point, and for
each site with a walking route a track from its start point along the route the
access stage computed.  A site's best sampling point usually *is* its representative
point; it is then written once, under the site's name, so a handheld does not show
two flags on one spot.  The description holds kind, rank, suitability and elevation.

References
----------
.. [1] TopoGrafix (2004). GPX 1.1 Schema Documentation,
   http://www.topografix.com/GPX/1/1/ (the open GPX 1.1 standard).
"""

from __future__ import annotations

import logging
import math
import os
import xml.etree.ElementTree as ET
from pathlib import Path

from screener.errors import InputError, OutputError

__all__ = ["GPX_NAMESPACE", "sampling_waypoint_names", "write_gpx"]

log = logging.getLogger(__name__)

GPX_NAMESPACE = "http://www.topografix.com/GPX/1/1"
_SITE_SYMBOL = "Flag, Blue"
_POINT_SYMBOL = "Waypoint"
_START_SYMBOL = "Trailhead"
#: Two points closer than this (degrees, about 1 cm) are the same place.
_SAME_PLACE_DEG = 1e-7


def sampling_waypoint_names(site, points) -> list:
    """Waypoint name of each sampling point of a site.

    A point at the site's own representative point takes the site's name (it is the
    same waypoint); the others are ``<site id>-<point id>``.

    Parameters
    ----------
    site : mapping
        A row of the site table (``site_id``, ``longitude``, ``latitude``).
    points : pandas.DataFrame
        Its sampling points (``point_id``, ``longitude``, ``latitude``).

    Examples
    --------
    >>> import pandas as pd
    >>> site = {"site_id": "S04", "longitude": 85.1, "latitude": -14.7}
    >>> pts = pd.DataFrame({"point_id": [1, 2], "longitude": [85.1, 85.11],
    ...                     "latitude": [-14.7, -14.71]})
    >>> sampling_waypoint_names(site, pts)
    ['S04', 'S04-2']
    """
    sid = str(site["site_id"])
    out = []
    for p in points.to_dict("records"):
        same = (
            abs(float(p["longitude"]) - float(site["longitude"])) < _SAME_PLACE_DEG
            and abs(float(p["latitude"]) - float(site["latitude"])) < _SAME_PLACE_DEG
        )
        out.append(sid if same else f"{sid}-{int(p['point_id'])}")
    return out


def _fmt(value, spec: str, missing: str = "n/a") -> str:
    try:
        v = float(value)
    except (TypeError, ValueError):
        return missing
    return format(v, spec) if math.isfinite(v) else missing


def elevation_band(site) -> str:
    """Elevation band of a site row as text, e.g. ``"1200-1450 m"``."""
    lo, hi = site.get("elevation_min"), site.get("elevation_max")
    if _fmt(lo, ".0f") == "n/a" or _fmt(hi, ".0f") == "n/a":
        return "elevation n/a"
    return f"{float(lo):.0f}-{float(hi):.0f} m"


def _check_lonlat(lon, lat, where: str):
    lon = float(lon)
    lat = float(lat)
    if not (math.isfinite(lon) and math.isfinite(lat)) or abs(lat) > 90:
        raise InputError(
            f"{where} has no valid longitude/latitude ({lon!r}, {lat!r}); "
            "check the site table's longitude and latitude columns."
        )
    lon = (lon + 180.0) % 360.0 - 180.0  # GPX longitudes lie in [-180, 180)
    return lon, lat


def _wpt(parent, lon, lat, name, cmt, desc, sym, kind=None, ele=None):
    wpt = ET.SubElement(parent, "wpt", lat=f"{lat:.6f}", lon=f"{lon:.6f}")
    # Child order follows the schema's wptType sequence.
    if ele is not None and _fmt(ele, ".1f") != "n/a":
        ET.SubElement(wpt, "ele").text = f"{float(ele):.1f}"
    ET.SubElement(wpt, "name").text = name
    ET.SubElement(wpt, "cmt").text = cmt
    ET.SubElement(wpt, "desc").text = desc
    ET.SubElement(wpt, "sym").text = sym
    if kind:
        ET.SubElement(wpt, "type").text = kind
    return wpt


def write_gpx(
    path,
    sites,
    sampling_points=None,
    *,
    start_points=None,
    routes=None,
    creator: str = "screener",
    description: str | None = None,
) -> Path:
    """Write sites, sampling points, start points and walking tracks as GPX 1.1.

    Parameters
    ----------
    path : str or os.PathLike
        Output file; overwritten if it exists.
    sites : pandas.DataFrame or geopandas.GeoDataFrame
        Candidate sites with at least ``rank``, ``site_id``, ``kind``, ``longitude``,
        ``latitude`` (WGS84 degrees); ``mean_suitability``, ``max_suitability``,
        ``elevation_min`` and ``elevation_max`` (m) are used when present.
    sampling_points : pandas.DataFrame, optional
        ``site_id, point_id, longitude, latitude, suitability`` and optionally
        ``elevation_m``; points whose site is not in ``sites`` are skipped.
    start_points : pandas.DataFrame, optional
        ``name, longitude, latitude`` of villages, road ends or camps.
    routes : dict of str to screener.routes.WalkingRoute, optional
        Walking routes by site id; each becomes a track (sites not in ``sites`` are
        skipped).
    creator : str, default "screener"
        The GPX ``creator`` attribute.
    description : str, optional
        Text for the file's metadata description; a reminder that the waypoints are
        survey hypotheses by default.

    Returns
    -------
    pathlib.Path
        The written file.

    Raises
    ------
    screener.errors.InputError
        A site or point lacks valid coordinates, or required columns are missing.
    screener.errors.OutputError
        The file cannot be written.
    """
    path = Path(os.fspath(path))
    needed = ["rank", "site_id", "kind", "longitude", "latitude"]
    missing = [c for c in needed if c not in sites.columns]
    if missing:
        raise InputError(
            f"the site table lacks column(s) {missing}; waypoints need {needed}."
        )
    root = ET.Element(
        "gpx",
        {"version": "1.1", "creator": str(creator), "xmlns": GPX_NAMESPACE},
    )
    meta = ET.SubElement(root, "metadata")
    ET.SubElement(meta, "name").text = "Candidate survey sites"
    ET.SubElement(meta, "desc").text = description or (
        "Predicted survey targets ranked by the screener: hypotheses for survey, not "
        "known localities. Walking tracks are model estimates from slope alone. Check "
        "permits, access and safety before any visit."
    )
    site_rows = {str(site["site_id"]): site for site in sites.to_dict("records")}
    # sampling points with their waypoint names; the one at a site's own point is the
    # site's waypoint, which then carries its elevation
    named, site_ele = [], {}
    if sampling_points is not None and len(sampling_points):
        pts = sampling_points[sampling_points["site_id"].astype(str).isin(site_rows)]
        for sid, group in pts.groupby(pts["site_id"].astype(str), sort=False):
            names = sampling_waypoint_names(site_rows[sid], group)
            for j, (pt, name) in enumerate(
                zip(group.to_dict("records"), names, strict=True)
            ):
                if name == sid:
                    site_ele[sid] = pt.get("elevation_m")
                else:
                    named.append((sid, j, pt, name))
    for i, (sid, site) in enumerate(site_rows.items()):
        rank = int(site["rank"])
        lon, lat = _check_lonlat(site["longitude"], site["latitude"], f"site row {i}")
        desc = (
            f"{site['kind']}, rank {rank}, suitability mean "
            f"{_fmt(site.get('mean_suitability'), '.2f')} max "
            f"{_fmt(site.get('max_suitability'), '.2f')}, {elevation_band(site)}"
        )
        _wpt(root, lon, lat, sid, f"site {sid}, rank {rank}", desc, _SITE_SYMBOL,
             str(site["kind"]), ele=site_ele.get(sid))
    n_points = 0
    for sid, j, pt, name in named:
        site = site_rows[sid]
        lon, lat = _check_lonlat(
            pt["longitude"], pt["latitude"], f"sampling point {j} of site {sid}"
        )
        desc = (
            f"sampling point {int(pt['point_id'])} of site {sid} (rank "
            f"{int(site['rank'])}), suitability {_fmt(pt.get('suitability'), '.2f')}"
        )
        _wpt(root, lon, lat, name, f"site {sid}", desc, _POINT_SYMBOL,
             ele=pt.get("elevation_m"))
        n_points += 1
    n_starts = 0
    if start_points is not None and len(start_points):
        for j, sp in enumerate(start_points.to_dict("records")):
            lon, lat = _check_lonlat(sp["longitude"], sp["latitude"], f"start point {j}")
            name = str(sp.get("name") or f"start {j + 1}")
            _wpt(root, lon, lat, name, "start point", f"start point {name}",
                 _START_SYMBOL, "start point", ele=sp.get("elevation_m"))
            n_starts += 1
    n_tracks = 0
    routes = {str(k): v for k, v in (routes or {}).items()}
    for sid in site_rows:  # in rank order
        route = routes.get(sid)
        if route is None:
            continue
        trk = ET.SubElement(root, "trk")
        ET.SubElement(trk, "name").text = f"{sid} route"
        ET.SubElement(trk, "cmt").text = f"walk from {route.start_name} to site {sid}"
        ET.SubElement(trk, "desc").text = (
            f"from {route.start_name}: {route.distance_km:.1f} km, "
            f"ascent {route.ascent_m:.0f} m, descent {route.descent_m:.0f} m, about "
            f"{route.hours:.1f} h walking (slope-only estimate)"
        )
        ET.SubElement(trk, "type").text = "walking route"
        seg = ET.SubElement(trk, "trkseg")
        for lon, lat, ele in zip(route.lon, route.lat, route.elevation_m, strict=True):
            lon, lat = _check_lonlat(lon, lat, f"route of site {sid}")
            pt = ET.SubElement(seg, "trkpt", lat=f"{lat:.6f}", lon=f"{lon:.6f}")
            if math.isfinite(float(ele)):
                ET.SubElement(pt, "ele").text = f"{float(ele):.1f}"
        n_tracks += 1
    ET.indent(root)
    data = ET.tostring(root, encoding="utf-8", xml_declaration=True)
    try:
        path.write_bytes(data + b"\n")
    except OSError as exc:
        raise OutputError(f"cannot write waypoints to {path}: {exc}") from exc
    log.info(
        "wrote %d site, %d point and %d start waypoints and %d tracks to %s",
        len(site_rows), n_points, n_starts, n_tracks, path,
    )
    return path
