"""Generalising the coordinates of sensitive records before they are shared.

Localities of threatened or collectable taxa are snapped to the centre of the cell
that contains them on a fixed, documented latitude/longitude grid (0.1 degree by
default, about 11 km north-south).  The grid is anchored at longitude 0, latitude 0,
so that generalised coordinates from different runs and different people agree and
cannot be averaged back towards the true locality.

Full-precision outputs are marked with :data:`FULL_PRECISION_MARKER`.

References
----------
.. [1] Chapman, A. D. (2020). Current Best Practices for Generalizing Sensitive
   Species Occurrence Data. GBIF Secretariat, Copenhagen.
"""

from __future__ import annotations

import copy
import logging
import re
from dataclasses import replace

import numpy as np

__all__ = [
    "FULL_PRECISION_MARKER",
    "sensitive_taxa",
    "withhold_coordinates",
    "DEFAULT_GRID_DEG",
    "generalise_coordinates",
    "generalised_result",
    "has_full_precision_sensitive",
    "shareable_result",
]

log = logging.getLogger(__name__)

#: Marker printed on every output that holds sensitive coordinates at full precision.
FULL_PRECISION_MARKER = "FULL PRECISION: do not share"

#: Default generalisation grid in degrees (Chapman 2020 lists 0.1 degree as a common
#: level for sensitive taxa).
DEFAULT_GRID_DEG = 0.1


def _check_grid_deg(grid_deg: float) -> float:
    g = float(grid_deg)
    if not np.isfinite(g) or g <= 0 or g > 90:
        raise ValueError(f"grid_deg must be in (0, 90] degrees; got {grid_deg!r}")
    return g


def generalise_coordinates(lon, lat, grid_deg: float = DEFAULT_GRID_DEG):
    """Snap coordinates to the centre of their cell on a fixed degree grid.

    Parameters
    ----------
    lon, lat : array_like
        WGS84 longitude and latitude in degrees.
    grid_deg : float, default 0.1
        Cell size of the generalisation grid in degrees.  Cells are anchored at
        (0, 0): the cell of index ``k`` spans ``[k * grid_deg, (k + 1) * grid_deg)``.

    Returns
    -------
    lon_g, lat_g : ndarray of float
        Centres of the containing cells, degrees.  Longitudes are wrapped to
        [-180, 180); latitudes stay within [-90, 90] (points on a pole fall in the
        last cell before it).  NaN stays NaN.

    Notes
    -----
    A point on a cell edge belongs to the cell to its north / east.  The largest
    displacement is half a cell diagonal, about 7.9 km at the equator for 0.1 degree.

    References
    ----------
    .. [1] Chapman, A. D. (2020). Current Best Practices for Generalizing Sensitive
       Species Occurrence Data. GBIF Secretariat.

    Examples
    --------
    >>> lon, lat = generalise_coordinates([12.3456, -0.01], [-3.2111, 45.0])
    >>> [round(float(v), 2) for v in lon], [round(float(v), 2) for v in lat]
    ([12.35, -0.05], [-3.25, 45.05])
    """
    g = _check_grid_deg(grid_deg)
    lon = np.asarray(lon, dtype=float)
    lat = np.asarray(lat, dtype=float)
    with np.errstate(invalid="ignore"):
        if np.any(np.abs(lat[np.isfinite(lat)]) > 90):
            raise ValueError("latitudes must lie within [-90, 90] degrees")
        wrapped = (lon + 180.0) % 360.0 - 180.0
        # Round first so that values written as 12.3 do not fall a cell short through
        # binary representation (12.3 / 0.1 = 122.99999999999999).
        kx = np.floor(np.round(wrapped / g, 9))
        ky = np.floor(np.round(lat / g, 9))
        ky_max = np.ceil(90.0 / g) - 1
        ky = np.clip(ky, -ky_max - 1, ky_max)
        lon_g = (kx + 0.5) * g
        lat_g = np.clip((ky + 0.5) * g, -90.0, 90.0)
        lon_g = np.where(lon_g >= 180.0, lon_g - 360.0, lon_g)
    return lon_g, lat_g


def sensitive_taxa(result):
    """Names of the sensitive taxa of a run, or True when every taxon is sensitive.

    Taxa flagged on their records, plus those named by ``[occurrences] sensitive``
    (which also covers a sensitive taxon whose every record was dropped).
    """
    named = ((getattr(result, "settings", None) or {}).get("occurrences") or {}).get(
        "sensitive", False)
    if named is True:
        return True
    out = set(named or ())
    out.update(n for n, t in (getattr(result, "taxa", None) or {}).items()
               if getattr(t.records, "sensitive", False))
    return out


def has_full_precision_sensitive(result) -> bool:
    """True when a RunResult holds records of a sensitive taxon at full precision.

    A result made by :func:`generalised_result` carries
    ``provenance["generalised"]`` and returns False.
    """
    if (getattr(result, "provenance", None) or {}).get("generalised"):
        return False
    return bool(sensitive_taxa(result))


#: a coordinate pair as intake writes it in a reason: "(84.81234, -14.78901)"
_PAIR = re.compile(r"\((-?\d+(?:\.\d+)?), (-?\d+(?:\.\d+)?)\)")
#: any other number with a fractional part (one coordinate, a raw cell value)
_NUMBER = re.compile(r"-?\d+[.,]\d+(?:[eE][-+]?\d+)?(?![\d.])(?! ?km)")
#: a grid cell named in a reason
_CELL = re.compile(r" ?\(row \d+, col \d+\)")
#: a coordinate cell quoted as written (one that could not be read, e.g. a
#: degrees-minutes-seconds value with a typo): "longitude '84 49 44 X'"
_QUOTED = re.compile(r"\b(longitude|latitude|x|y) ('(?:[^'\\]|\\.)*'|\"(?:[^\"\\]|\\.)*\")")


def withhold_coordinates(reason: str, grid_deg: float = DEFAULT_GRID_DEG) -> str:
    """A dropped-row reason with its coordinates generalised or withheld.

    A longitude/latitude pair becomes the centre of its generalisation cell; a
    coordinate cell quoted as written, any other number with a fractional part (a
    single coordinate, a raw cell value) and a named grid cell are withheld.
    """
    g = _check_grid_deg(grid_deg)

    def pair(m):
        lon, lat = float(m.group(1)), float(m.group(2))
        if abs(lat) > 90:
            return "(coordinates withheld)"
        glon, glat = generalise_coordinates(lon, lat, g)
        return f"(about {float(glon):.3f}, {float(glat):.3f}, generalised to {g:g} degrees)"

    text = _PAIR.sub(pair, _QUOTED.sub(r"\1 [withheld]", reason))
    parts = re.split(r"(\(about [^)]*\))", text)
    parts = [p if p.startswith("(about ") else _CELL.sub("", _NUMBER.sub("[withheld]", p))
             for p in parts]
    return "".join(parts)


def _withhold_dropped(dropped, sensitive, g):
    out = []
    for d in dropped or []:
        if sensitive is True or d.taxon in sensitive or not d.taxon:
            d = replace(d, reason=withhold_coordinates(d.reason, g))
        out.append(d)
    return out


def _generalise_records(records, grid, g):
    lon_g, lat_g = generalise_coordinates(records.lon, records.lat, g)
    x, y = grid.from_lonlat(lon_g, lat_g)
    x = np.asarray(x, float)
    y = np.asarray(y, float)
    rows, cols, inside = grid.rowcol(x, y)
    if not np.all(inside):
        # The generalised centre can fall just off the grid: keep the original cell
        # so cell-based statistics stay defined; the coordinates are generalised.
        rows = np.where(inside, rows, records.rows)
        cols = np.where(inside, cols, records.cols)
    return replace(
        records,
        lon=lon_g,
        lat=lat_g,
        x=x,
        y=y,
        rows=np.asarray(rows),
        cols=np.asarray(cols),
    )


def generalised_result(
    result,
    *,
    sites: bool = False,
    all_taxa: bool = False,
    grid_deg: float = DEFAULT_GRID_DEG,
):
    """A copy of a RunResult whose shareable coordinates are generalised.

    Parameters
    ----------
    result : screener.results.RunResult
        Left unchanged.
    sites : bool, default False
        Also generalise the candidate sites: their representative coordinates are
        snapped, polygons are replaced by the generalisation cell that holds the
        representative point, least-cost paths and walking routes are dropped and
        sampling points are snapped (duplicates within a site removed).
    all_taxa : bool, default False
        Generalise the records of every taxon, not only those flagged sensitive.
    grid_deg : float, default 0.1
        Generalisation cell size in degrees.

    Returns
    -------
    RunResult
        A shallow copy: maps are shared with the input, records and tables are new.
        ``provenance["generalised"]`` records what was done.

    References
    ----------
    .. [1] Chapman, A. D. (2020). Current Best Practices for Generalizing Sensitive
       Species Occurrence Data. GBIF Secretariat.
    """
    g = _check_grid_deg(grid_deg)
    grid = result.grid
    taxa, done = {}, []
    sensitive = True if all_taxa else sensitive_taxa(result)
    dropped = _withhold_dropped(result.dropped, sensitive, g) if sensitive else list(
        result.dropped or [])
    for name, tr in result.taxa.items():
        tr2 = copy.copy(tr)
        # named in the settings or flagged on the records (either is enough)
        if all_taxa or sensitive is True or name in sensitive or tr.records.sensitive:
            tr2.records = _generalise_records(tr.records, grid, g)
            done.append(name)
        taxa[name] = tr2
    changes = {}
    if sites:
        # least-cost paths and walking routes end at the exact site cells
        changes = {"sites": _generalise_sites(result.sites, grid, g), "paths": None,
                   "routes": {},
                   "sampling_points": _generalise_points(result.sampling_points, grid, g)}
    provenance = dict(result.provenance or {})
    provenance["generalised"] = {
        "grid_deg": g,
        "taxa": done,
        "sites": bool(sites),
        "reference": "Chapman 2020, GBIF Secretariat",
    }
    if done and result.comparisons:
        changes["comparisons"] = _withhold_record_scores(result.comparisons, set(done))
    out = replace(result, taxa=taxa, dropped=dropped, provenance=provenance, figures={},
                  **changes)
    log.info("generalised records of %d taxa to %.3g degree", len(done), g)
    return out


def _withhold_record_scores(comparisons, names: set) -> list:
    """Pair comparisons whose sensitive taxa keep no record positions.

    A record's principal-axis scores are its environment at full precision, and with
    the layers they point back to its cell (continuous layers rarely repeat a value
    combination); its coordinates are kept beside them for the tests.  Both are
    dropped for the taxa in ``names``; the smoothed densities and occupancy stay, so
    the niche figure still shows the niche, without the record points.
    """
    out = []
    for cmp in comparisons:
        space = cmp.space
        if space is not None:
            hidden = {}
            for which, name in (("a", cmp.taxon_a), ("b", cmp.taxon_b)):
                if name in names:
                    hidden[which] = replace(space.taxon(which),
                                            scores_records=np.empty((0, 2)),
                                            xy_records=None)
            if hidden:
                cmp = replace(cmp, space=replace(space, **hidden))
        out.append(cmp)
    return out


def shareable_result(
    result, *, sites: bool = False, grid_deg: float = DEFAULT_GRID_DEG
):
    """The result itself when no taxon is sensitive, else :func:`generalised_result`.

    Examples
    --------
    >>> class R:  # a stand-in with no taxa
    ...     taxa, provenance = {}, {}
    >>> r = R()
    >>> shareable_result(r) is r
    True
    """
    if not has_full_precision_sensitive(result) and not sites:
        return result
    return generalised_result(result, sites=sites, grid_deg=grid_deg)


def _generalise_points(points, grid, g):
    if points is None or len(points) == 0:
        return points
    pts = points.copy()
    lon_g, lat_g = generalise_coordinates(pts["longitude"], pts["latitude"], g)
    pts["longitude"] = lon_g
    pts["latitude"] = lat_g
    x, y = grid.from_lonlat(lon_g, lat_g)
    pts["x"] = np.asarray(x, float)
    pts["y"] = np.asarray(y, float)
    pts = pts.drop_duplicates(subset=["site_id", "longitude", "latitude"])
    return pts.reset_index(drop=True)


def _generalise_sites(sites, grid, g):
    if sites is None or len(sites) == 0:
        return sites
    import shapely
    from shapely.geometry import box

    out = sites.copy()
    lon_g, lat_g = generalise_coordinates(out["longitude"], out["latitude"], g)
    out["longitude"] = lon_g
    out["latitude"] = lat_g
    if "site_key" in out:  # derived from the location: generalised with it
        from screener.ranking import site_keys

        out["site_key"] = site_keys(lon_g, lat_g)
    x, y = grid.from_lonlat(lon_g, lat_g)
    out["x"] = np.asarray(x, float)
    out["y"] = np.asarray(y, float)
    if "row" in out and "col" in out:
        # the grid cell locates a site as precisely as its coordinates: it moves to
        # the grid cell nearest the generalised point
        t = grid.transform
        rows = np.floor((out["y"].to_numpy() - t.f) / t.e)
        cols = np.floor((out["x"].to_numpy() - t.c) / t.a)
        out["row"] = np.clip(np.nan_to_num(rows), 0, grid.n_rows - 1).astype(np.int64)
        out["col"] = np.clip(np.nan_to_num(cols), 0, grid.n_cols - 1).astype(np.int64)

    def _project(coords):
        px, py = grid.from_lonlat(coords[:, 0], coords[:, 1])
        return np.column_stack([px, py])

    cells = []
    for lo, la in zip(lon_g, lat_g, strict=True):
        cell = box(lo - g / 2, la - g / 2, lo + g / 2, la + g / 2).segmentize(g / 8)
        cells.append(shapely.transform(cell, _project))
    out = out.set_geometry(cells, crs=sites.crs)
    return out
