"""Records in Darwin Core, the biodiversity data standard (TDWG).

A museum or survey export comes as a plain CSV/TSV whose header uses Darwin Core
term names, or as a Darwin Core Archive: a zip whose ``meta.xml`` names the core
data file, its delimiters and which column holds which term.  Both become the
same :class:`~screener.records.RawRecords` as the screener's own record files.

:func:`screen_records` then applies what only Darwin Core records carry: the
geodetic datum (other datums transformed to WGS84 with pyproj), the coordinate
uncertainty, the basis of record, the event date, and the georeferencing errors
that can be checked without outside data.

Term names follow the Darwin Core standard (TDWG, Darwin Core Quick Reference
Guide; term names from memory).
"""

from __future__ import annotations

import csv
import io
import logging
import re
import xml.etree.ElementTree as ET
import zipfile
from dataclasses import dataclass, field
from datetime import date
from pathlib import Path

import numpy as np

from screener.errors import RecordsError

__all__ = ["TERMS", "DarwinCoreOptions", "read_archive", "screen_records", "find_term",
           "REPEATED_TAXA"]

log = logging.getLogger(__name__)

#: Darwin Core terms the screener reads (TDWG Darwin Core standard; from memory)
TERMS = (
    "occurrenceID",
    "scientificName",
    "decimalLongitude",
    "decimalLatitude",
    "geodeticDatum",
    "coordinateUncertaintyInMeters",
    "basisOfRecord",
    "eventDate",
)

#: rowType of an occurrence core in meta.xml
OCCURRENCE_ROW_TYPE = "http://rs.tdwg.org/dwc/terms/Occurrence"

#: identical coordinates shared by at least this many taxa are flagged as a likely
#: placeholder (a country, province or collection centroid): our choice
REPEATED_TAXA = 10

#: datum texts that mean "not given": read as WGS84 (common practice), with a note
_UNKNOWN_DATUM = {"", "unknown", "not recorded", "notrecorded", "none", "na", "n/a"}


@dataclass(frozen=True)
class DarwinCoreOptions:
    """Settings of the Darwin Core checks.

    Attributes
    ----------
    max_uncertainty_m : float
        Records whose coordinateUncertaintyInMeters exceeds this are dropped;
        0 means the size of the record's grid cell (its longer side).
    basis_of_record : tuple of str
        Keep only these basisOfRecord values (case and underscores ignored); empty
        keeps all.
    date_from, date_to : str
        Keep only records whose eventDate lies within (ISO 8601: "1990",
        "1990-05", "1990-05-17"); empty = open.
    flagged : str
        "drop" (default) or "keep" records with a georeferencing flag (kept ones
        are listed as warnings).
    """

    max_uncertainty_m: float = 0.0
    basis_of_record: tuple = ()
    date_from: str = ""
    date_to: str = ""
    flagged: str = "drop"


@dataclass
class Screened:
    """What :func:`screen_records` decided per row.

    Attributes
    ----------
    keep : ndarray of bool
        Rows passed on to the usual checks.
    reasons : dict of int to str
        Row index -> reason it was dropped.
    lon, lat : list of str
        Coordinates to use (transformed to WGS84 where the datum was another).
    notes : list of str
        Plain-words notes for the console and report (flags kept, datums assumed).
    """

    keep: np.ndarray
    reasons: dict
    lon: list
    lat: list
    notes: list = field(default_factory=list)


def find_term(columns, term: str):
    """Index of the column named ``term`` (case-insensitive, namespace ignored)."""
    want = term.lower()
    for i, c in enumerate(columns):
        name = str(c).strip().rsplit("/", 1)[-1].rsplit(":", 1)[-1].lower()
        if name == want:
            return i
    return None


def _unescape(text: str | None, default: str) -> str:
    if text is None:
        return default
    return (text.replace("\\t", "\t").replace("\\n", "\n").replace("\\r", "\r")
            .replace("\\\\", "\\"))


def read_archive(path) -> tuple:
    """Read the core file of a Darwin Core Archive.

    Parameters
    ----------
    path : path-like
        A zip holding ``meta.xml`` and the core data file.

    Returns
    -------
    header : list of str
        Term names of the columns (short names, e.g. "decimalLatitude"); constant
        terms (``default=`` in meta.xml) come last.
    rows : list of (int, list of str)
        Line number in the core file and the cells of each data row.
    where : str
        ``archive.zip:occurrence.txt`` for messages.

    Raises
    ------
    RecordsError
        Not a zip, no meta.xml, a core that is not occurrences, a missing core
        file, undecodable text.
    """
    p = Path(path)
    try:
        zf = zipfile.ZipFile(p)
    except zipfile.BadZipFile:
        raise RecordsError(f"{p} is not a readable zip file (Darwin Core Archive).") from None
    with zf:
        names = {n.rsplit("/", 1)[-1]: n for n in zf.namelist()}
        if "meta.xml" not in names:
            raise RecordsError(
                f"{p} has no meta.xml, so it is not a Darwin Core Archive; give the "
                "archive as exported, or the occurrence file itself as CSV/TSV."
            )
        try:
            root = ET.fromstring(zf.read(names["meta.xml"]))
        except ET.ParseError as exc:
            raise RecordsError(f"{p}: meta.xml is not valid XML ({exc}).") from None
        core = next((el for el in root.iter() if el.tag.rsplit("}", 1)[-1] == "core"), None)
        if core is None:
            raise RecordsError(f"{p}: meta.xml describes no core file.")
        row_type = core.get("rowType", "")
        if row_type.rstrip("/") != OCCURRENCE_ROW_TYPE:
            raise RecordsError(
                f"{p}: the archive's core is {row_type or 'unnamed'}, not occurrences "
                f"({OCCURRENCE_ROW_TYPE}); export an occurrence-core archive."
            )
        loc = next((el.text for el in core.iter() if el.tag.rsplit("}", 1)[-1] == "location"),
                   None)
        if not loc or loc.strip().rsplit("/", 1)[-1] not in names:
            raise RecordsError(f"{p}: the core file {loc!r} named in meta.xml is missing.")
        data = zf.read(names[loc.strip().rsplit("/", 1)[-1]])
    encoding = core.get("encoding", "UTF-8")
    try:
        text = data.decode("utf-8-sig" if encoding.upper().replace("-", "") == "UTF8"
                           else encoding)
    except (UnicodeDecodeError, LookupError) as exc:
        raise RecordsError(f"{p}:{loc}: cannot be decoded as {encoding} ({exc}).") from None
    delim = _unescape(core.get("fieldsTerminatedBy"), ",")
    quote = _unescape(core.get("fieldsEnclosedBy"), '"')
    skip = int(core.get("ignoreHeaderLines", "0") or 0)
    cols: dict = {}
    defaults: dict = {}
    for el in core:
        tag = el.tag.rsplit("}", 1)[-1]
        term = (el.get("term") or "").rsplit("/", 1)[-1]
        if tag == "id" and el.get("index") is not None:
            cols.setdefault(int(el.get("index")), "id")
        elif tag == "field" and term:
            if el.get("index") is not None:
                cols[int(el.get("index"))] = term
            elif el.get("default") is not None:
                defaults[term] = el.get("default")
    if not cols:
        raise RecordsError(f"{p}: meta.xml maps no column of {loc} to a term.")
    width = max(cols) + 1
    header = [cols.get(i, f"column{i + 1}") for i in range(width)] + list(defaults)
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=delim,
                        quotechar=quote or '"', quoting=csv.QUOTE_MINIMAL if quote
                        else csv.QUOTE_NONE)
    rows = []
    start = 1
    try:
        for row in reader:
            line = start
            start = reader.line_num + 1
            if line <= skip or not any(c.strip() for c in row):
                continue
            cells = (row + [""] * width)[:width] + list(defaults.values())
            rows.append((line, cells))
    except csv.Error as exc:
        raise RecordsError(f"{p}:{loc} line {start}: unreadable row ({exc}).") from None
    return header, rows, f"{p}:{loc}"


# ------------------------------------------------------------------- event dates
_DATE = re.compile(r"^\s*(\d{4})(?:-(\d{1,2})(?:-(\d{1,2}))?)?(?:[T ].*)?\s*$")


def _span(text: str):
    """First and last day of an ISO 8601 date, month, year or interval; None if unreadable."""
    import calendar

    parts = text.strip().split("/")
    if len(parts) > 2 or not parts[0]:
        return None
    out = []
    for k, part in enumerate(parts):
        m = _DATE.match(part)
        if not m:
            return None
        y, mo, d = int(m.group(1)), m.group(2), m.group(3)
        try:
            if mo is None:
                first, last = date(y, 1, 1), date(y, 12, 31)
            elif d is None:
                mo = int(mo)
                first = date(y, mo, 1)
                last = date(y, mo, calendar.monthrange(y, mo)[1])
            else:
                first = last = date(y, int(mo), int(d))
        except ValueError:
            return None
        out.append((first, last))
    if len(out) == 1:
        return out[0]
    if out[1][1] < out[0][0]:
        return None
    return out[0][0], out[1][1]


def date_limit(text: str, which: str, setting: str):
    """The first (``which="from"``) or last day of a date setting; None when empty."""
    if not text:
        return None
    span = _span(text)
    if span is None or "/" in text:
        raise RecordsError(
            f"[occurrences] {setting} = {text!r} is not a date; write it as 1990, "
            "1990-05 or 1990-05-17."
        )
    return span[0] if which == "from" else span[1]


# ------------------------------------------------------------------------ datums
def _datum_transformer(text: str, cache: dict):
    """(transformer or None, error text or None) for a geodeticDatum value."""
    key = text.strip()
    if key in cache:
        return cache[key]
    from pyproj import CRS, Transformer

    try:
        crs = CRS.from_user_input(key)
    except Exception:  # pyproj raises CRSError and others
        crs = None
    if crs is not None and crs.is_projected:
        res = (None, f"geodeticDatum {key!r} is a projected CRS; decimalLongitude and "
                     "decimalLatitude must be degrees")
    elif crs is None or not crs.is_geographic:
        res = (None, f"geodeticDatum {key!r} is not a datum pyproj knows")
    elif crs.to_epsg() == 4326 or crs.equals(CRS.from_epsg(4326), ignore_axis_order=True):
        res = (None, None)
    else:
        res = (Transformer.from_crs(crs, "EPSG:4326", always_xy=True), None)
    cache[key] = res
    return res


def _norm_basis(text: str) -> str:
    return text.replace("_", "").replace(" ", "").lower()


def screen_records(raw, grid, options: DarwinCoreOptions) -> Screened:
    """Darwin Core checks of every row, before the usual record checks.

    Parameters
    ----------
    raw : screener.records.RawRecords
        Read from a Darwin Core file (``raw.extra`` holds the other terms).
    grid : screener.grid.Grid
        For the cell size (the default uncertainty limit).
    options : DarwinCoreOptions

    Returns
    -------
    Screened

    Raises
    ------
    RecordsError
        A geodeticDatum that pyproj does not know (the line and value are named),
        or a filter asked for a term the file does not have.
    """
    from screener.records import parse_coordinate

    n = len(raw.lines)
    cols = list(raw.extra)

    def column(term):
        i = find_term(cols, term)
        return raw.extra[cols[i]] if i is not None else None

    datum = column("geodeticDatum")
    unc = column("coordinateUncertaintyInMeters")
    basis = column("basisOfRecord")
    when = column("eventDate")
    if options.basis_of_record and basis is None:
        raise RecordsError(
            f"{raw.path} has no basisOfRecord column, so [occurrences] basis_of_record "
            "cannot be applied; remove the setting or export the term."
        )
    if (options.date_from or options.date_to) and when is None:
        raise RecordsError(
            f"{raw.path} has no eventDate column, so [occurrences] date_from/date_to "
            "cannot be applied; remove them or export the term."
        )
    lo = date_limit(options.date_from, "from", "date_from")
    hi = date_limit(options.date_to, "to", "date_to")
    wanted = {_norm_basis(b) for b in options.basis_of_record}
    keep = np.ones(n, dtype=bool)
    reasons: dict = {}
    lon = list(raw.a)
    lat = list(raw.b)
    notes: list = []
    cache: dict = {}
    assumed = 0
    moved: dict = {}
    values = np.full((n, 2), np.nan)

    def drop(i, why):
        keep[i] = False
        reasons[i] = why

    for i in range(n):
        if wanted and _norm_basis(basis[i]) not in wanted:
            drop(i, f"basisOfRecord {basis[i] or '(empty)'!r} is not among "
                    f"[occurrences] basis_of_record")
            continue
        if lo is not None or hi is not None:
            span = _span(when[i]) if when[i].strip() else None
            if span is None:
                drop(i, f"eventDate {when[i]!r} is not an ISO 8601 date, so the date "
                        "range cannot be checked" if when[i].strip()
                     else "no eventDate, so the date range cannot be checked")
                continue
            if lo is not None and span[0] < lo:
                drop(i, f"eventDate {when[i]} is before date_from {options.date_from}")
                continue
            if hi is not None and span[1] > hi:
                drop(i, f"eventDate {when[i]} is after date_to {options.date_to}")
                continue
        va, _ = parse_coordinate(raw.a[i], decimal_comma=raw.decimal_comma)
        vb, _ = parse_coordinate(raw.b[i], decimal_comma=raw.decimal_comma)
        if va is None or vb is None:
            continue  # the usual checks report unreadable coordinates
        text = datum[i].strip() if datum is not None else ""
        if text.lower() in _UNKNOWN_DATUM:
            assumed += bool(datum is not None)
        else:
            tr, err = _datum_transformer(text, cache)
            if err:
                raise RecordsError(
                    f"{raw.path} line {raw.lines[i]}: {err}. Give it as an EPSG code "
                    "(e.g. EPSG:4267 for NAD27) or transform the coordinates to WGS84 "
                    "before the run."
                )
            if tr is not None and abs(vb) <= 90 and abs(va) <= 180:
                va, vb = tr.transform(va, vb)
                lon[i], lat[i] = repr(float(va)), repr(float(vb))
                moved[text] = moved.get(text, 0) + 1
        values[i] = (va, vb)
    for text, k in moved.items():
        notes.append(f"{k} records on geodeticDatum {text!r}: transformed to WGS84 with pyproj")
    if assumed:
        notes.append(f"{assumed} records give no geodeticDatum (empty, unknown or not "
                     "recorded): read as WGS84")
    _flag_georeferencing(raw, values, keep, reasons, options, notes)
    if unc is not None:
        _check_uncertainty(raw, unc, values, keep, reasons, grid, options)
    return Screened(keep, reasons, lon, lat, notes)


def _flag_georeferencing(raw, values, keep, reasons, options, notes):
    """Coordinates at 0,0, equal longitude and latitude, whole degrees, or shared by many taxa."""
    n = len(raw.lines)
    flags: dict = {}
    by_point: dict = {}
    for i in range(n):
        va, vb = values[i]
        if not np.isfinite(va):
            continue
        if va == 0 and vb == 0:
            flags[i] = "coordinates at 0, 0 (a common placeholder for missing coordinates)"
        elif va == vb:
            flags[i] = (f"longitude equals latitude ({va:g}): one value was probably "
                        "copied into both columns")
        elif float(va).is_integer() and float(vb).is_integer():
            flags[i] = (f"coordinates ({va:g}, {vb:g}) are whole degrees: probably rounded "
                        "(up to about 111 km off)")
        by_point.setdefault((va, vb), set()).add(raw.taxon[i])
    for i in range(n):
        va, vb = values[i]
        if i in flags or not np.isfinite(va):
            continue
        shared = by_point[(va, vb)]
        if len(shared) >= REPEATED_TAXA:
            flags[i] = (f"coordinates ({va:g}, {vb:g}) are shared by {len(shared)} taxa: "
                        "probably a placeholder (an area or collection centroid)")
    for i, why in sorted(flags.items()):
        if not keep[i]:
            continue
        if options.flagged == "drop" or why.startswith("coordinates at 0, 0"):
            keep[i] = False
            reasons[i] = f"georeferencing flag: {why}"
        else:
            notes.append(f"line {raw.lines[i]} ({raw.taxon[i]}) kept despite a "
                         f"georeferencing flag: {why}")


def _check_uncertainty(raw, unc, values, keep, reasons, grid, options):
    """Drop records whose coordinate uncertainty exceeds the limit (default: a cell)."""
    ok = keep & np.isfinite(values[:, 0])
    idx = np.flatnonzero(ok)
    if not idx.size:
        return
    limit = np.full(len(raw.lines), float(options.max_uncertainty_m))
    if options.max_uncertainty_m <= 0:
        x, y = grid.from_lonlat(values[idx, 0], values[idx, 1])
        rows, _, inside = grid.rowcol(np.asarray(x, float), np.asarray(y, float))
        ew = np.asarray(grid.ew_step_km, float)
        ns = np.asarray(grid.ns_step_km, float)
        r = np.clip(np.asarray(rows, int), 0, grid.n_rows - 1)
        side = ew[r]
        if ns.size:
            side = np.maximum(side, ns[np.clip(r, 0, ns.size - 1)])
        limit[idx] = np.where(inside, side * 1000.0, np.inf)
    for i in idx:
        text = unc[i].strip()
        if not text:
            continue
        try:
            u = float(text)
        except ValueError:
            keep[i] = False
            reasons[i] = f"coordinateUncertaintyInMeters {text!r} is not a number"
            continue
        if u > limit[i]:
            what = ("the cell size" if options.max_uncertainty_m <= 0
                    else "[occurrences] max_uncertainty_m")
            keep[i] = False
            reasons[i] = (f"coordinate uncertainty {u:,.0f} m is larger than {what} "
                          f"({limit[i]:,.0f} m)")
