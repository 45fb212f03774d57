"""Occurrence-record intake: read, check every row, keep one record per cell.

Every row that is not kept is reported with its line number and reason; nothing is
dropped silently.  Only :func:`read_records` touches files; :func:`validate_records`
works on rows already in memory.
"""

from __future__ import annotations

import codecs
import csv
import io
import logging
import math
import re
import unicodedata
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from screener.errors import InputError, RecordsError, suggest
from screener.grid import Grid
from screener.project import default
from screener.results import RecordDrop, TaxonRecords

__all__ = [
    "RecordSet",
    "RawRecords",
    "read_records",
    "parse_records_text",
    "validate_records",
    "parse_coordinate",
    "close_pairs",
    "thin_by_distance",
    "summarise_drops",
    "drop_summary_lines",
    "read_points_csv",
]

log = logging.getLogger(__name__)

#: Invisible characters refused in taxon names: the bidirectional embeddings,
#: overrides, isolates and marks, which reorder how a name (and a file name made from
#: it) is displayed (Unicode Standard Annex #9; Unicode Technical Report #36, "bidi
#: spoofing"), the zero-width space, the word joiner and the byte-order mark, which
#: make two different names look alike.  Zero-width joiners and non-joiners stay:
#: several scripts need them.
INVISIBLE_IN_NAMES = frozenset(
    "\u200b\u200e\u200f\u061c\u2060\ufeff"
    + "".join(map(chr, range(0x202A, 0x202F)))
    + "".join(map(chr, range(0x2066, 0x206A)))
)

#: Fewest records a taxon may keep before the run stops (``[occurrences] min_records``).
MIN_RECORDS = default("occurrences", "min_records")


@dataclass
class RawRecords:
    """Rows of a record file before validation.

    Attributes
    ----------
    path : str
        Where they came from (for messages).
    columns : list of str
        Header, as written.
    taxon, a, b : list of str
        Raw cells of the taxon column and of the two coordinate columns.
    lines : list of int
        Line number of each row (header is line 1).
    coords : str
        ``"lonlat"`` (WGS84 longitude/latitude) or ``"xy"`` (grid CRS).
    extra : dict of str to list
        Other columns, kept for the updated record file after a survey.
    delimiter : str
        The file's delimiter (comma, semicolon or tab).
    split_numbers : dict of int to str
        Line -> cell counts of a row whose coordinates look split in two at a decimal
        comma (a comma-separated file with unquoted ``84,8``); such rows are dropped.
    """

    path: str
    columns: list
    taxon: list
    a: list
    b: list
    lines: list
    coords: str
    decimal_comma: bool = False
    extra: dict = field(default_factory=dict)
    darwin_core: bool = False
    delimiter: str = ","
    split_numbers: dict = field(default_factory=dict)

    def occurrence_ids(self) -> dict:
        """Line number -> Darwin Core occurrenceID (empty when the file has none)."""
        from screener.darwincore import find_term

        cols = list(self.extra)
        i = find_term(cols, "occurrenceID")
        if i is None:
            return {}
        return {ln: v.strip() for ln, v in zip(self.lines, self.extra[cols[i]]) if v.strip()}


@dataclass
class RecordSet:
    """Validated records of every taxon.

    Attributes
    ----------
    taxa : dict of str to TaxonRecords
        In order of first appearance in the file.
    dropped : list of RecordDrop
        Every row not kept, with line number and reason.
    n_rows : int
        Data rows read.
    path : str
    occurrence_ids : dict of int to str
        Line number -> Darwin Core occurrenceID, where the file gives one.
    notes : list of str
        Darwin Core notes: records kept despite a georeferencing flag, datums assumed.
    """

    taxa: dict
    dropped: list
    n_rows: int
    path: str = ""
    occurrence_ids: dict = field(default_factory=dict)
    notes: list = field(default_factory=list)

    def summary_lines(self) -> list:
        """Plain-words lines for the console and the report."""
        out = []
        per_taxon = {}
        for d in self.dropped:
            per_taxon.setdefault(d.taxon, []).append(d)
        for name, rec in self.taxa.items():
            n_drop = len(per_taxon.get(name, []))
            out.append(f"{name}: {rec.n} kept, {n_drop} dropped")
        for d in self.dropped:
            who = d.taxon or "(no taxon)"
            oid = f", {d.occurrence_id}" if d.occurrence_id else ""
            out.append(f"  line {d.line} ({who}{oid}): {d.reason}")
        out.extend(f"Note: {n}" for n in self.notes)
        return out


_HEMI = re.compile(r"^\s*([NSEW]|[nsew](?=\s))?\s*(.*?)\s*([NSEW]|(?<=\s)[nsew])?\s*$")
_DMS_SEP = re.compile(r"[°º'′\"″:dms\s]+")
def parse_coordinate(text: str, *, decimal_comma: bool = False):
    """Parse a coordinate written in decimal degrees or degrees-minutes-seconds.

    Parameters
    ----------
    text : str
        E.g. ``"-8.25"``, ``"8°15'00\\"S"``, ``"8 15 0 S"``, ``"S 8° 15.5'"``.
    decimal_comma : bool, default False
        Read ``"8,25"`` as 8.25.

    Returns
    -------
    value : float or None
        Decimal degrees (negative south/west), None when unreadable.
    how : str
        ``"decimal"`` or ``"dms"``, or the reason it could not be read.

    Examples
    --------
    >>> parse_coordinate("8°15'36\\"S")
    (-8.26, 'dms')
    >>> parse_coordinate("12,5", decimal_comma=True)
    (12.5, 'decimal')
    """
    s = (text or "").strip()
    if not s:
        return None, "is empty"
    t = s.replace(",", ".") if decimal_comma else s
    try:
        v = float(t)
    except ValueError:
        pass
    else:
        if not math.isfinite(v):
            return None, f"{s!r} is not a finite number"
        return v, "decimal"
    if "," in s and not decimal_comma and re.fullmatch(r"[-+]?\d+,\d+", s):
        return None, f"{s!r} uses a decimal comma; set decimal = \",\" under [occurrences]"
    m = _HEMI.match(s)
    body = m.group(2) if m else s
    hem1, hem2 = (m.group(1), m.group(3)) if m else (None, None)
    if hem1 and hem2:
        return None, f"{s!r} names two hemispheres"
    hem = (hem1 or hem2 or "").upper()
    sign = 1.0
    if body.startswith("-"):
        sign, body = -1.0, body[1:]
    parts = [p for p in _DMS_SEP.split(body) if p]
    looks_dms = bool(hem) or any(ch in s for ch in "°º'′\"″:")
    if looks_dms and 1 <= len(parts) <= 3:
        try:
            nums = [float(p.replace(",", ".")) for p in parts]
        except ValueError:
            nums = None
        if nums is not None:
            deg = nums[0]
            mnt = nums[1] if len(nums) > 1 else 0.0
            sec = nums[2] if len(nums) > 2 else 0.0
            if mnt >= 60 or sec >= 60 or mnt < 0 or sec < 0:
                return None, f"{s!r} has minutes or seconds outside 0-60"
            v = sign * (deg + mnt / 60.0 + sec / 3600.0)
            if hem in ("S", "W"):
                if sign < 0:
                    return None, f"{s!r} has both a minus sign and hemisphere {hem}"
                v = -v
            return round(v, 10), "dms"
    return None, f"{s!r} is not a number or a degrees-minutes-seconds coordinate"


def _decode(data: bytes, path: str, encoding: str | None) -> str:
    if encoding:
        try:
            if codecs.lookup(encoding).name == "utf-8":
                encoding = "utf-8-sig"  # a byte-order mark is not part of the header
            return data.decode(encoding)
        except (UnicodeDecodeError, LookupError) as exc:
            raise RecordsError(
                f"{path} cannot be read with encoding {encoding!r} ({exc}); "
                "check [occurrences] encoding."
            ) from None
    try:
        return data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        line = data[: exc.start].count(b"\n") + 1
        raise RecordsError(
            f"{path} is not valid UTF-8 (byte 0x{data[exc.start]:02x} on line {line}). "
            "Save the file as UTF-8, or name its encoding under [occurrences], "
            'e.g. encoding = "latin-1".'
        ) from None


_INTEGER = re.compile(r"\s*[-+]?\d+\s*")
_DIGITS = re.compile(r"\d+\s*")


def unneutralise_cell(value: str) -> str:
    """A cell as it was before :func:`screener.outputs.tables.neutralise_cell`: the
    leading ``'`` that keeps a spreadsheet from running ``=...``, ``+...``, ``-...`` or
    ``@...`` as a formula is removed, so a file the screener wrote (the updated record
    file of a debrief) reads back with the names and coordinates it was given.

    >>> unneutralise_cell("'=cmd"), unneutralise_cell("'-14,5"), unneutralise_cell("O'Neill")
    ('=cmd', '-14,5', "O'Neill")
    """
    from screener.outputs.tables import FORMULA_STARTS

    if value.startswith("'") and value[1:2] and value[1] in FORMULA_STARTS:
        return value[1:]
    return value


def detect_delimiter(text: str) -> str:
    """The delimiter of a record file: the most frequent of comma, semicolon and tab
    on the first non-blank line (comma when none occurs)."""
    first = next((ln for ln in text.splitlines() if ln.strip()), "")
    counts = {d: first.count(d) for d in (",", ";", "\t")}
    delim = max(counts, key=counts.get)
    return delim if counts[delim] else ","


def parse_records_text(
    text: str,
    path: str = "<records>",
    *,
    taxon_column: str = "taxon",
    decimal: str | None = None,
) -> RawRecords:
    """Split record text into columns and find the taxon and coordinate columns.

    Accepts comma, semicolon or tab separated text; a semicolon file whose numbers
    use decimal commas is read as such.  Columns are matched without regard to case
    or surrounding spaces.

    Raises
    ------
    RecordsError
        Empty file, header only, or missing columns (with the nearest name offered).
    """
    if not text.strip():
        raise RecordsError(f"{path} is empty: it needs a header row and one row per record.")
    delim = detect_delimiter(text)
    reader = csv.reader(io.StringIO(text), delimiter=delim)
    rows = []  # (first physical line of the record, its cells)
    try:
        last = 0
        for row in reader:
            rows.append((last + 1, row))
            last = reader.line_num  # counts the newlines inside quoted fields too
    except csv.Error as exc:
        raise RecordsError(f"{path} is not a readable CSV file ({exc}).") from None
    rows = [(ln, [unneutralise_cell(c) for c in row]) for ln, row in rows]
    header = None
    body = []
    for line_no, row in rows:
        if header is None:
            if not any(c.strip() for c in row):
                continue
            header = [c.strip() for c in row]
            header_line = line_no
            continue
        body.append((line_no, row))
    if header is None:
        raise RecordsError(f"{path} is empty: it needs a header row and one row per record.")
    lower = [h.lower() for h in header]
    body = [(ln, r) for ln, r in body if any(c.strip() for c in r)]
    if not body:
        raise RecordsError(
            f"{path} has a header (line {header_line}) but no records below it."
        )

    def find(name):
        return lower.index(name.lower()) if name.lower() in lower else None

    from screener.darwincore import find_term

    dwc = find_term(header, "decimalLongitude") is not None and find_term(
        header, "decimalLatitude") is not None
    it = find(taxon_column)
    if it is None and dwc and taxon_column == "taxon":
        it = find_term(header, "scientificName")
    if it is None:
        raise RecordsError(
            f"{path} has no {taxon_column!r} column (columns: {', '.join(header)})."
            + _misspelt(taxon_column, header)
        )
    ilon, ilat, ix, iy = find("longitude"), find("latitude"), find("x"), find("y")
    if dwc:
        ilon, ilat = find_term(header, "decimalLongitude"), find_term(header, "decimalLatitude")
    if ilon is not None and ilat is not None:
        ia, ib, coords = ilon, ilat, "lonlat"
    elif ix is not None and iy is not None:
        ia, ib, coords = ix, iy, "xy"
    else:
        missing = [c for c, i in (("longitude", ilon), ("latitude", ilat)) if i is None]
        hint = "".join(_misspelt(m, header) for m in missing)
        raise RecordsError(
            f"{path} needs columns longitude and latitude (WGS84 degrees) or x and y "
            f"(grid CRS); it has {', '.join(header)}." + hint
        )
    a_vals = [r[ia] if ia < len(r) else "" for _, r in body]
    b_vals = [r[ib] if ib < len(r) else "" for _, r in body]
    if decimal is None:
        # decimal commas: semicolon or tab files whose coordinates look like "12,5"
        pat = re.compile(r"^\s*[-+]?\d+,\d+\s*$")
        n_comma = sum(bool(pat.match(v)) for v in a_vals + b_vals)
        # A quoted "84,5" in a comma file can only be a decimal comma for degrees;
        # for x/y (metres) it could be a thousands separator, so only there the
        # delimiter decides.
        decimal_comma = n_comma > 0 and (delim != "," or coords == "lonlat")
    else:
        decimal_comma = decimal == ","
    extra = {
        h: [r[i] if i < len(r) else "" for _, r in body]
        for i, h in enumerate(header)
        if i not in (it, ia, ib)
    }
    split = {}
    if delim == ",":
        # "84,82912" unquoted in a comma file: the row gains a cell and the coordinate
        # columns hold "84" and "82912"; reading them would place the record elsewhere
        for ln, r in body:
            if any(c.strip() for c in r[len(header):]) and any(
                    i + 1 < len(r) and _INTEGER.fullmatch(r[i]) and _DIGITS.fullmatch(r[i + 1])
                    for i in (ia, ib)):
                split[ln] = f"{len(r)} cells, the header {len(header)}"
    return RawRecords(
        path=str(path),
        columns=header,
        taxon=[(r[it] if it < len(r) else "").strip() for _, r in body],
        a=a_vals,
        b=b_vals,
        lines=[ln for ln, _ in body],
        coords=coords,
        decimal_comma=decimal_comma,
        extra=extra,
        darwin_core=dwc,
        delimiter=delim,
        split_numbers=split,
    )


def _misspelt(expected: str, header) -> str:
    """`` Column 'longitud' looks like 'longitude' (did you mean 'longitude'?).``"""
    import difflib

    m = difflib.get_close_matches(expected.lower(), [h.lower() for h in header], 1, 0.6)
    if not m:
        return ""
    found = header[[h.lower() for h in header].index(m[0])]
    return f" Column {found!r} looks misspelt: did you mean {expected!r}? Rename it."


def read_records(path, *, encoding=None, taxon_column="taxon", decimal=None) -> RawRecords:
    """Read a record CSV file into :class:`RawRecords` (no validation yet).

    Raises
    ------
    RecordsError
        Missing file, undecodable bytes, empty file, missing columns.
    """
    p = Path(path)
    if not p.exists():
        raise RecordsError(f"Record file {p} does not exist; check [occurrences] path.")
    if p.is_dir():
        raise RecordsError(f"Record path {p} is a folder; give the CSV file itself.")
    import zipfile

    if zipfile.is_zipfile(p):
        return _archive_records(p, taxon_column)
    text = _decode(p.read_bytes(), str(p), encoding)
    return parse_records_text(text, str(p), taxon_column=taxon_column, decimal=decimal)


def _archive_records(path: Path, taxon_column: str) -> RawRecords:
    """Rows of a Darwin Core Archive's occurrence core as :class:`RawRecords`."""
    from screener.darwincore import find_term, read_archive

    header, rows, where = read_archive(path)
    if not rows:
        raise RecordsError(f"{where} has no occurrence rows.")
    it = find_term(header, taxon_column) if taxon_column != "taxon" else None
    if it is None:
        it = find_term(header, "scientificName" if taxon_column == "taxon" else taxon_column)
    ilon, ilat = find_term(header, "decimalLongitude"), find_term(header, "decimalLatitude")
    missing = [t for t, i in ((taxon_column if taxon_column != "taxon" else "scientificName",
                               it), ("decimalLongitude", ilon), ("decimalLatitude", ilat))
               if i is None]
    if missing:
        raise RecordsError(
            f"{where}: meta.xml maps no column to {', '.join(missing)} "
            f"(terms: {', '.join(header)})." + _misspelt(missing[0], header)
        )
    return RawRecords(
        path=where,
        columns=header,
        taxon=[r[it].strip() for _, r in rows],
        a=[r[ilon] for _, r in rows],
        b=[r[ilat] for _, r in rows],
        lines=[ln for ln, _ in rows],
        coords="lonlat",
        extra={h: [r[i] for _, r in rows] for i, h in enumerate(header)
               if i not in (it, ilon, ilat)},
        darwin_core=True,
    )



def _longitudes_onto_grid(lon, lat, grid):
    """Longitudes moved by whole turns (360 degrees) where that puts an off-grid point
    on a geographic grid: records in -180..180 on a 0..360 grid and the other way round.
    Points that are off the grid either way keep the longitude they were given."""
    x, y = grid.from_lonlat(lon, lat)
    _, _, inside = grid.rowcol(x, y)
    west = grid.bounds[0]
    wrapped = west + np.mod(lon - west, 360.0)
    move = ~inside & (wrapped != lon)
    if move.any():
        wx, wy = grid.from_lonlat(wrapped[move], lat[move])
        _, _, ok = grid.rowcol(wx, wy)
        idx = np.flatnonzero(move)[ok]
        lon = lon.copy()
        lon[idx] = wrapped[move][ok]
    return lon

def _on_grid(lon, lat, grid) -> np.ndarray:
    """True where a longitude/latitude falls on a valid cell of the grid (longitudes
    in either convention, -180..180 or 0..360)."""
    lon, lat = np.asarray(lon, float), np.asarray(lat, float)
    if grid.is_geographic:
        lon = _longitudes_onto_grid(lon, lat, grid)
    x, y = grid.from_lonlat(lon, lat)
    r, c, inside = grid.rowcol(np.atleast_1d(x), np.atleast_1d(y))
    on = inside.copy()
    on[inside] = grid.mask[r[inside], c[inside]]
    return on


def validate_records(
    raw: RawRecords,
    grid: Grid,
    *,
    min_records: int = MIN_RECORDS,
    thin_km: float = default("occurrences", "thin_km"),
    sensitive=(),
    taxa=None,
    random_state=0,
    darwin_core=None,
) -> RecordSet:
    """Check every row, place records on the grid, keep one per cell per taxon.

    Parameters
    ----------
    raw : RawRecords
    grid : Grid
        Records must fall on its valid cells.
    min_records : int, default 3
        A taxon keeping fewer records stops the run.
    thin_km : float, default 0
        If > 0, thin each taxon so no two records are closer than this (km).
    sensitive : bool or sequence of str, default ()
        Taxa whose coordinates are generalised in shareable outputs (True = all).
    taxa : sequence of str, optional
        Only these taxa (others are reported as dropped with the reason).
    random_state : int, default 0
        Seed of the thinning shuffles.
    darwin_core : screener.darwincore.DarwinCoreOptions, optional
        Checks of Darwin Core records (datum, uncertainty, basis of record, dates,
        georeferencing flags); defaults apply when the file uses Darwin Core terms.

    Returns
    -------
    RecordSet

    Raises
    ------
    RecordsError
        A taxon is left with fewer than ``min_records`` records, or nothing is left.
    """
    for t, line in zip(raw.taxon, raw.lines):
        ctrl = next((c for c in t if unicodedata.category(c) == "Cc"), None)
        if ctrl is not None:
            raise RecordsError(
                f"{raw.path} line {line}: the taxon name {t!r} holds the control character "
                f"{ctrl!r}, which breaks files and terminals; remove it (names hold "
                "letters, digits, spaces and punctuation)."
            )
        hidden = next((c for c in t if c in INVISIBLE_IN_NAMES), None)
        if hidden is not None:
            raise RecordsError(
                f"{raw.path} line {line}: the taxon name {t!r} holds the invisible "
                f"character U+{ord(hidden):04X} ({unicodedata.name(hidden, 'unnamed')}), "
                "which makes a name display differently from what it is (reordered "
                "text, or two names that look the same); remove it."
            )
    dropped: list = []
    keep_taxon, keep_a, keep_b, keep_line = [], [], [], []
    wanted = set(taxa) if taxa else None
    rows_a, rows_b, screened = raw.a, raw.b, None
    if raw.darwin_core and raw.coords == "lonlat":
        from screener.darwincore import DarwinCoreOptions, screen_records

        screened = screen_records(raw, grid, darwin_core or DarwinCoreOptions())
        rows_a, rows_b = screened.lon, screened.lat
    # longitudes are read in either common convention, -180..180 or 0..360
    lon_max, lon_range = 360.0, "the range -180 to 360"
    for k, (t, a, b, line) in enumerate(zip(raw.taxon, rows_a, rows_b, raw.lines)):
        if screened is not None and not screened.keep[k] and t:
            dropped.append(RecordDrop(line, t, screened.reasons[k]))
            continue
        if not t:
            dropped.append(RecordDrop(line, "", "the taxon cell is empty"))
            continue
        if line in raw.split_numbers:
            dropped.append(RecordDrop(line, t, (
                f"the row has more cells than the header ({raw.split_numbers[line]}): "
                "numbers written with a decimal comma in a comma-separated file split in "
                "two")))
            continue
        if wanted is not None and t not in wanted:
            dropped.append(RecordDrop(line, t, "taxon not in [project] taxa"))
            continue
        va, why_a = parse_coordinate(a, decimal_comma=raw.decimal_comma)
        vb, why_b = parse_coordinate(b, decimal_comma=raw.decimal_comma)
        na, nb = ("longitude", "latitude") if raw.coords == "lonlat" else ("x", "y")
        if va is None or vb is None:
            parts = []
            if va is None:
                parts.append(f"{na} {why_a}")
            if vb is None:
                parts.append(f"{nb} {why_b}")
            dropped.append(RecordDrop(line, t, "; ".join(parts)))
            continue
        if raw.coords == "lonlat":
            if abs(vb) > 90:
                if abs(va) <= 90 and abs(vb) <= 360 and _on_grid([vb], [va], grid)[0]:
                    reason = (
                        f"latitude {vb:g} is beyond +/-90; with longitude and latitude "
                        "swapped it would fall on the grid: the columns look swapped"
                    )
                else:
                    reason = f"latitude {vb:g} is beyond +/-90"
                dropped.append(RecordDrop(line, t, reason))
                continue
            if not -180 <= va <= lon_max:
                dropped.append(RecordDrop(line, t, f"longitude {va:g} is beyond {lon_range}"))
                continue
        keep_taxon.append(t)
        keep_a.append(va)
        keep_b.append(vb)
        keep_line.append(line)

    a = np.asarray(keep_a, dtype=float)
    b = np.asarray(keep_b, dtype=float)
    if raw.coords == "lonlat" and a.size:
        if grid.is_geographic:
            a = _longitudes_onto_grid(a, b, grid)
        else:
            a = np.where(a > 180, a - 360.0, a)
    if raw.coords == "lonlat":
        lon, lat = a, b
        x, y = grid.from_lonlat(lon, lat) if a.size else (a, b)
        x, y = np.asarray(x, float), np.asarray(y, float)
    else:
        x, y = a, b
        lon, lat = grid.to_lonlat(x, y) if a.size else (a, b)
        lon, lat = np.asarray(lon, float), np.asarray(lat, float)
    rows, cols, inside = grid.rowcol(x, y) if a.size else (a, a, a.astype(bool))

    # swapped coordinates that still parse: does the swapped point land on the grid?
    swapped_on_grid = np.zeros(a.size, dtype=bool)
    if raw.coords == "lonlat" and a.size and (~inside).any():
        out = ~inside & (np.abs(lon) <= 90)
        if out.any():
            swapped_on_grid[np.flatnonzero(out)] = _on_grid(lat[out], lon[out], grid)

    per_taxon: dict = {}
    seen_exact: dict = {}
    seen_cell: dict = {}
    for i, (t, line) in enumerate(zip(keep_taxon, keep_line)):
        coord_txt = (
            f"({lon[i]:.5f}, {lat[i]:.5f})" if raw.coords == "lonlat" else f"({x[i]:g}, {y[i]:g})"
        )
        if not inside[i]:
            reason = f"{coord_txt} is outside the grid"
            if swapped_on_grid[i]:
                reason += (
                    "; with longitude and latitude swapped it would fall on the grid: "
                    "check the column order"
                )
            dropped.append(RecordDrop(line, t, reason))
            continue
        r, c = int(rows[i]), int(cols[i])
        if not grid.mask[r, c]:
            dropped.append(
                RecordDrop(line, t, f"{coord_txt} falls on a nodata cell (row {r}, col {c})")
            )
            continue
        key = (t, keep_a[i], keep_b[i])
        if key in seen_exact:
            dropped.append(RecordDrop(line, t, f"exact duplicate of line {seen_exact[key]}"))
            continue
        seen_exact[key] = line
        ck = (t, r, c)
        if ck in seen_cell:
            dropped.append(
                RecordDrop(
                    line,
                    t,
                    f"same grid cell as line {seen_cell[ck]} (one record per cell is kept)",
                )
            )
            continue
        seen_cell[ck] = line
        per_taxon.setdefault(t, []).append(i)

    if sensitive is True:
        sens = set(per_taxon)
    else:
        sens = set(sensitive or ())
    taxa_out = {}
    for t, idx in per_taxon.items():
        idx = np.asarray(idx, dtype=int)
        if thin_km and thin_km > 0 and idx.size > 1:
            kept = thin_by_distance(lon[idx], lat[idx], thin_km, random_state=random_state)
            for j in np.setdiff1d(np.arange(idx.size), kept):
                dropped.append(
                    RecordDrop(
                        keep_line[idx[j]],
                        t,
                        f"thinned: closer than {thin_km:g} km to another kept record",
                    )
                )
            idx = idx[np.sort(kept)]
        taxa_out[t] = TaxonRecords(
            taxon=t,
            lon=lon[idx],
            lat=lat[idx],
            x=x[idx],
            y=y[idx],
            rows=rows[idx].astype(np.int64),
            cols=cols[idx].astype(np.int64),
            lines=np.asarray(keep_line, dtype=np.int64)[idx],
            sensitive=t in sens,
        )
    ids = raw.occurrence_ids()
    if ids:
        dropped = [RecordDrop(d.line, d.taxon, d.reason, ids.get(d.line, "")) for d in dropped]
    dropped.sort(key=lambda d: d.line)
    result = RecordSet(taxa_out, dropped, len(raw.lines), raw.path, ids,
                       list(screened.notes) if screened is not None else [])

    in_file = [t for t in dict.fromkeys(raw.taxon) if t]
    named = [t for t in in_file if wanted is None or t in wanted]
    if not in_file:
        raise RecordsError(
            f"{raw.path} has no rows with a taxon name: fill in the taxon column."
        )
    if sensitive is not True and sensitive:
        unknown = [t for t in sensitive if t not in in_file]
        if unknown:
            raise RecordsError(
                f"[occurrences] sensitive names {unknown[0]!r}, which is no taxon in "
                f"{raw.path}, so nothing would be protected under that name."
                + suggest(unknown[0], in_file) + f" Taxa in the file: {', '.join(in_file)}."
            )
    if wanted is not None:
        absent = [t for t in (taxa or ()) if t not in in_file]
        if absent:
            raise RecordsError(
                f"[project] taxa names {absent[0]!r}, which does not appear in "
                f"{raw.path}." + suggest(absent[0], in_file)
                + f" Taxa in the file: {', '.join(in_file)}."
            )
    few = [(t, taxa_out[t].n if t in taxa_out else 0) for t in named]
    few = [(t, n) for t, n in few if n < min_records]
    if few:
        detail = "; ".join(f"{t}: {n} kept" for t, n in few)
        reasons = _reason_digest(dropped, {t for t, _ in few})
        raise RecordsError(
            f"Too few usable records in {raw.path} ({detail}); at least {min_records} "
            f"per taxon are needed.{reasons} Fix those rows (`screener check` lists "
            "every dropped row), lower [occurrences] min_records, or leave the taxon "
            "out with [project] taxa.",
            result,
        )
    return result


#: (substring of a drop reason, short description of the kind, advice shown once)
_DROP_KINDS = [
    ("columns look swapped", "with a latitude beyond +/-90 that would be on the grid with "
     "longitude and latitude swapped", "check which column holds which coordinate"),
    ("taxon cell is empty", "with an empty taxon cell", "fill in the taxon column"),
    ("would fall on the grid", "outside the grid that would be on it with longitude "
     "and latitude swapped", "check which column holds which coordinate"),
    ("split in two", "with numbers split in two at a decimal comma",
     "save the file with semicolons between the columns, or with decimal points, or "
     "quote the numbers"),
    ("decimal comma", "written with a decimal comma", 'set decimal = "," under [occurrences]'),
    ("outside the grid", "outside the grid",
     "check the coordinates (longitude/latitude are WGS84 degrees, x/y are in the "
     "layers' CRS) and the layers' extent"),
    ("nodata cell", "on nodata cells of the layers", ""),
    ("is empty", "with an empty coordinate", ""),
    ("not a number", "with a coordinate that is not a number", ""),
    ("not a finite number", "with a coordinate that is not a finite number", ""),
    ("beyond", "with latitude beyond +/-90 or longitude beyond -180 to 360", ""),
    ("duplicate", "exact duplicates", ""),
    ("same grid cell", "in a grid cell already taken (one record per cell is kept)", ""),
    ("thinned", "thinned", "lower [occurrences] thin_km"),
    ("not in [project] taxa", "of taxa not listed in [project] taxa", ""),
    ("georeferencing flag", "with a georeferencing flag",
     'check the coordinates, or set flagged_records = "keep" under [occurrences]'),
    ("coordinate uncertainty", "with a coordinate uncertainty larger than the limit",
     "raise [occurrences] max_uncertainty_m"),
    ("basisOfRecord", "of another basisOfRecord", "widen [occurrences] basis_of_record"),
    ("eventDate", "outside the date range or without a date",
     "widen [occurrences] date_from/date_to"),
]


def _drop_kind(reason: str):
    for needle, kind, advice in _DROP_KINDS:
        if needle in reason:
            return kind, advice
    # an unlisted reason: its wording without numbers or quoted values (which can be
    # coordinates of sensitive taxa)
    return re.sub(r"'[^']*'|-?\d+(?:[.,]\d+)?", "...", reason), ""


def summarise_drops(dropped, n_first: int = 5) -> list:
    """Dropped rows counted by reason, most frequent first.

    Returns
    -------
    list of dict
        ``reason`` (plain words, no coordinates), ``rows`` (count), ``first_lines``
        (the first ``n_first`` line numbers) and ``advice`` ("" if none).
    """
    groups: dict = {}
    for d in dropped:
        groups.setdefault(_drop_kind(d.reason), []).append(d.line)
    out = []
    for (kind, advice), lines in sorted(groups.items(), key=lambda kv: -len(kv[1])):
        lines = sorted(lines)
        out.append({"reason": kind, "rows": len(lines), "first_lines": lines[:n_first],
                    "advice": advice})
    return out


def drop_summary_lines(dropped, where: str = "dropped_records.csv") -> list:
    """Console lines: rows dropped per reason, the first lines, where the full list is."""
    if not dropped:
        return []
    out = [f"Dropped {len(dropped)} record row(s); the full list is in {where}:"]
    for g in summarise_drops(dropped):
        more = ", ..." if g["rows"] > len(g["first_lines"]) else ""
        lines = ", ".join(map(str, g["first_lines"])) + more
        out.append(f"  {g['rows']} {g['reason']} (line{'s' if g['rows'] > 1 else ''} "
                   f"{lines})" + (f": {g['advice']}" if g["advice"] else ""))
    return out


def _reason_digest(dropped, taxa) -> str:
    """Short summary of why rows of ``taxa`` were dropped: counts by kind, lines, advice."""
    rows = [d for d in dropped if d.taxon in taxa]
    if not rows:
        return ""
    groups: dict = {}
    for d in rows:
        kind, advice = _drop_kind(d.reason)
        groups.setdefault((kind, advice), []).append(d)
    parts = []
    for (kind, advice), ds in sorted(groups.items(), key=lambda kv: -len(kv[1])):
        lines = ", ".join(str(d.line) for d in ds[:5]) + (", ..." if len(ds) > 5 else "")
        text = f"{len(ds)} {kind} (line{'s' if len(ds) > 1 else ''} {lines})"
        if advice:
            text += f": {advice}"
        parts.append(text)
    return f" Dropped rows of these taxa: {'; '.join(parts)}."


#: mean Earth radius (IUGG), km; only used to find candidate pairs, which are then
#: measured on the WGS84 ellipsoid
_EARTH_RADIUS_KM = 6371.0088


def close_pairs(lon, lat, min_km: float):
    """Pairs of points closer than ``min_km`` on the WGS84 ellipsoid.

    Candidates come from a ball tree with the haversine metric (scikit-learn) at a
    radius 1 % above ``min_km`` (the sphere and the ellipsoid differ by at most about
    0.6 %); each candidate is then measured geodesically (pyproj).

    Parameters
    ----------
    lon, lat : ndarray of shape (n,)
        Degrees.
    min_km : float
        Distance, km.

    Returns
    -------
    i, j : ndarray of int
        Each close pair once, ``i < j``.

    Examples
    --------
    >>> i, j = close_pairs([0.0, 0.01, 1.0], [0.0, 0.0, 0.0], 5.0)
    >>> list(zip(i.tolist(), j.tolist()))
    [(0, 1)]
    """
    from sklearn.neighbors import BallTree

    from screener.grid import geodesic_distance_km

    lon = np.asarray(lon, float)
    lat = np.asarray(lat, float)
    if lon.size < 2:
        return np.empty(0, np.int64), np.empty(0, np.int64)
    tree = BallTree(np.radians(np.column_stack([lat, lon])), metric="haversine")
    radius = 1.01 * min_km / _EARTH_RADIUS_KM
    neighbours = tree.query_radius(np.radians(np.column_stack([lat, lon])), r=radius)
    counts = np.fromiter((len(nb) for nb in neighbours), np.int64, lon.size)
    i = np.repeat(np.arange(lon.size), counts)
    j = np.concatenate(neighbours).astype(np.int64) if counts.sum() else i.copy()
    keep = i < j
    i, j = i[keep], j[keep]
    d = geodesic_distance_km(lon[i], lat[i], lon[j], lat[j])
    close = np.atleast_1d(d) < min_km
    return i[close], j[close]


def _greedy_keep(neighbours, nodes, rank):
    """One greedy pass over a group: remove the most crowded node (ties to the lowest
    ``rank``) until no two kept nodes are close.  ``neighbours[v]`` lists the close
    nodes of ``v`` (group-local indices 0..len(nodes)-1).  Returns a keep mask."""
    import heapq

    degree = [len(nb) for nb in neighbours]
    heap = [(-degree[v], rank[v], v) for v in range(len(nodes))]
    heapq.heapify(heap)
    alive = [True] * len(nodes)
    pop, push = heapq.heappop, heapq.heappush
    while heap:
        negdeg, r, v = pop(heap)
        if not alive[v] or -negdeg != degree[v]:
            continue  # removed already, or a stale entry
        if negdeg == 0:
            break  # the most crowded node left has no close neighbour: done
        alive[v] = False
        for u in neighbours[v]:
            if alive[u]:
                degree[u] -= 1
                push(heap, (-degree[u], rank[u], u))
    return np.asarray(alive, dtype=bool)


#: greedy passes are spread over a group so that a group of this many records still
#: gets every pass; larger groups get proportionally fewer (at least one)
_THIN_PASS_BUDGET = 40_000


def thin_by_distance(lon, lat, min_km: float, *, n_repeats: int = 20, random_state=0):
    """Indices of a largest-found subset with no two points closer than ``min_km``.

    Greedy removal of the most crowded point, repeated over random orders for ties,
    keeping the largest set found (Aiello-Lammens et al. 2015).  Distances are
    geodesic (WGS84).  Close pairs are found with a spatial index
    (:func:`close_pairs`), and the greedy passes run on each group of mutually
    reachable close points separately, keeping each group's best pass: removals in
    one group never change another, so the result is at least as large as the best
    whole-set pass, and records with no close neighbour cost nothing.

    Parameters
    ----------
    lon, lat : ndarray of shape (n,)
        Degrees.
    min_km : float
        Minimum distance between kept records, km.
    n_repeats : int, default 20
        Greedy passes per group of close points.  A group of more than 2,000 points
        gets proportionally fewer (at least one), which bounds the time on very
        large record sets (about 1 s per pass over 1e5 points).
    random_state : int, default 0

    Returns
    -------
    ndarray of int
        Indices of kept points (sorted).

    References
    ----------
    .. [1] Aiello-Lammens, M. E., Boria, R. A., Radosavljevic, A., Vilela, B. &
       Anderson, R. P. (2015). Ecography 38:541-545.

    Examples
    --------
    >>> thin_by_distance([0.0, 0.01, 0.02, 1.0], [0.0, 0.0, 0.0, 0.0], 1.5).tolist()
    [0, 2, 3]
    """
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    lon = np.asarray(lon, float)
    lat = np.asarray(lat, float)
    n = lon.size
    if n < 2:
        return np.arange(n)
    i, j = close_pairs(lon, lat, min_km)
    if i.size == 0:
        return np.arange(n)
    graph = coo_matrix(
        (np.ones(2 * i.size, np.int8), (np.r_[i, j], np.r_[j, i])), shape=(n, n)
    ).tocsr()
    n_groups, group = connected_components(graph, directed=False)
    rng = np.random.default_rng(random_state)
    keep = np.ones(n, dtype=bool)
    order = np.argsort(group, kind="stable")
    bounds = np.searchsorted(group[order], np.arange(n_groups + 1))
    ptr, nbrs = graph.indptr, graph.indices
    local = np.empty(n, np.int64)
    n_repeats = max(1, int(n_repeats))
    for k in range(n_groups):
        nodes = order[bounds[k]:bounds[k + 1]]
        if nodes.size < 2:
            continue
        local[nodes] = np.arange(nodes.size)
        neighbours = [local[nbrs[ptr[v]:ptr[v + 1]]].tolist() for v in nodes]
        passes = min(n_repeats, max(1, _THIN_PASS_BUDGET // nodes.size))
        best = None
        for _ in range(passes):
            kept = _greedy_keep(neighbours, nodes, rng.permutation(nodes.size).tolist())
            if best is None or kept.sum() > best.sum():
                best = kept
        keep[nodes] = best
    return np.flatnonzero(keep)


def read_points_csv(path, what: str, need=("longitude", "latitude")):
    """Read a small CSV of points (start points, surveyed places) with checks.

    Parameters
    ----------
    path : path-like
    what : str
        What the points are, for messages ("start points").
    need : tuple of str
        Columns that must be there and hold numbers (decimal degrees, WGS84).

    Returns
    -------
    pandas.DataFrame
        Column names stripped and lower-cased; ``need`` columns as floats.

    Raises
    ------
    screener.errors.InputError
        The file cannot be parsed, a column is missing, a value is not a number, or
        coordinates are out of range; the message names the file and line.
    """
    text = _decode(Path(path).read_bytes(), str(path), None)
    try:
        df = pd.read_csv(io.StringIO(text))
    except Exception as exc:  # pandas raises several parser errors
        raise InputError(f"{path} ({what}) is not a readable CSV file: {exc}") from None
    df.columns = [str(c).strip().lower() for c in df.columns]
    for c in need:
        if c not in df.columns:
            raise InputError(
                f"{path} ({what}) needs a {c!r} column; it has {', '.join(df.columns)}."
                + suggest(c, df.columns)
            )
    for c in need:
        vals = pd.to_numeric(df[c], errors="coerce")
        bad = np.flatnonzero(vals.isna().to_numpy())
        if bad.size:
            raise InputError(
                f"{path} ({what}) line {int(bad[0]) + 2}: {c} {df[c].iloc[bad[0]]!r} is not "
                "a number (decimal degrees, WGS84)."
            )
        df[c] = vals
    if (df["latitude"].abs() > 90).any() or (df["longitude"].abs() > 180).any():
        i = int(np.flatnonzero((df["latitude"].abs() > 90) | (df["longitude"].abs() > 180))[0])
        raise InputError(
            f"{path} ({what}) line {i + 2}: coordinates out of range (longitude and "
            "latitude swapped?)."
        )
    return df
