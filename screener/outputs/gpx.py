"""Waypoints of the ranked sites and their sampling points, as GPX 1.1.

One waypoint per candidate site (named ``S01``, ``S02``, ... by rank) and one per
suggested sampling point (``S01-1``, ``S01-2``, ...): short names that fit the
display of a handheld GPS.  The description holds kind, rank, suitability and
elevation band; the symbol is a generic one that most units know.

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

__all__ = ["GPX_NAMESPACE", "site_waypoint_name", "point_waypoint_name", "write_gpx"]

log = logging.getLogger(__name__)

GPX_NAMESPACE = "http://www.topografix.com/GPX/1/1"
_SITE_SYMBOL = "Flag, Blue"
_POINT_SYMBOL = "Waypoint"


def site_waypoint_name(rank: int) -> str:
    """Short waypoint name of a site from its rank.

    Examples
    --------
    >>> site_waypoint_name(3), site_waypoint_name(120)
    ('S03', 'S120')
    """
    return f"S{int(rank):02d}"


def point_waypoint_name(rank: int, point_id: int) -> str:
    """Short waypoint name of a sampling point.

    Examples
    --------
    >>> point_waypoint_name(1, 3)
    'S01-3'
    """
    return f"{site_waypoint_name(rank)}-{int(point_id)}"


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


def _wpt(parent, lon, lat, name, cmt, desc, sym, kind=None):
    wpt = ET.SubElement(parent, "wpt", lat=f"{lat:.6f}", lon=f"{lon:.6f}")
    # Child order follows the schema's wptType sequence.
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
    creator: str = "screener",
    description: str | None = None,
) -> Path:
    """Write the sites (and their sampling points) as GPX 1.1 waypoints.

    Parameters
    ----------
    path : str or os.PathLike
        Output file; overwritten if it exists.
    sites : pandas.DataFrame or geopandas.GeoDataFrame
        Candidate sites with at least ``rank``, ``site_id``, ``kind``, ``longitude``,
        ``latitude`` (WGS84 degrees); ``mean_suitability``, ``max_suitability``,
        ``elevation_min`` and ``elevation_max`` (m) are used when present.
    sampling_points : pandas.DataFrame, optional
        ``site_id, point_id, longitude, latitude, suitability``; points whose site is
        not in ``sites`` are skipped.
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
        "known localities. Check permits, access and safety before any visit."
    )
    rank_of = {}
    for i, site in enumerate(sites.to_dict("records")):
        rank = int(site["rank"])
        rank_of[str(site["site_id"])] = rank
        lon, lat = _check_lonlat(site["longitude"], site["latitude"], f"site row {i}")
        desc = (
            f"{site['kind']}, rank {rank}, suitability mean "
            f"{_fmt(site.get('mean_suitability'), '.2f')} max "
            f"{_fmt(site.get('max_suitability'), '.2f')}, {elevation_band(site)}"
        )
        _wpt(
            root,
            lon,
            lat,
            site_waypoint_name(rank),
            f"site {site['site_id']}",
            desc,
            _SITE_SYMBOL,
            str(site["kind"]),
        )
    n_points = 0
    if sampling_points is not None and len(sampling_points):
        for j, pt in enumerate(sampling_points.to_dict("records")):
            rank = rank_of.get(str(pt["site_id"]))
            if rank is None:
                continue
            lon, lat = _check_lonlat(
                pt["longitude"], pt["latitude"], f"sampling point row {j}"
            )
            name = point_waypoint_name(rank, pt["point_id"])
            desc = (
                f"sampling point {int(pt['point_id'])} of site rank {rank}, "
                f"suitability {_fmt(pt.get('suitability'), '.2f')}"
            )
            _wpt(root, lon, lat, name, f"site {pt['site_id']}", desc, _POINT_SYMBOL)
            n_points += 1
    ET.indent(root)
    data = ET.tostring(root, encoding="utf-8", xml_declaration=True)
    try:
        path.write_bytes(data + b"\n")
    except OSError as exc:
        raise OutputError(f"cannot write waypoints to {path}: {exc}") from exc
    log.info("wrote %d site and %d point waypoints to %s", len(rank_of), n_points, path)
    return path
