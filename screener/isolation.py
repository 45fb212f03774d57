"""Candidate survey sites: suitable patches cut off from the known ranges.

The stage works on the thresholded suitability maps of a clade of sister taxa:

1. A cell is *suitable for the clade* when any taxon's map reaches that taxon's
   threshold (``s_t >= threshold_t``, inclusive, so every record cell passes its MTP).
2. *Patches* are 8-connected components of suitable cells (``scipy.ndimage.label``);
   unoccupied patches smaller than ``min_patch_km2`` (geodesic area) are dropped.
3. *Known ranges* are patches holding records of any taxon.
4. *Resistance* comes from the clade's suitability ``s = max over taxa``: ``1 - s``
   (``"linear"``, default) or ``-ln(max(s, eps))`` (``"log"``); cells outside the grid
   mask and user-given impassable cells cannot be crossed.
5. Accumulated cost distance (:mod:`screener.costdistance`) from each taxon's ranges
   (and their record cells); the cost from all ranges is the cell-wise minimum.
6. Each unoccupied patch gets its least-cost distance, the nearest taxon, the
   least-cost path from the patch's cheapest cell back to that taxon's range and,
   along the path, the **gap** (longest run of unsuitable cells as ground length) and
   the **barrier depth** (``1 - s`` at the least suitable unsuitable cell crossed;
   the barrier raster holds the same quantity cell by cell).  Kinds:

   ``within-range``
       suitable cells inside a known range's patch farther than ``within_range_min_km``
       from every record, grouped into 8-connected sub-patches: likely unrecorded
       populations of a known taxon.
   ``near-range``
       an unoccupied patch reached across a gap shorter than ``min_gap_km``.
   ``isolated``
       an unoccupied patch whose gap is at least ``min_gap_km``, or that no path over
       valid cells reaches (an island across the sea); for the latter the cost
       distance is ``inf`` and ``gap_km`` is the straight-line geodesic distance to the
       nearest range cell.

The analysis runs at the caller's MTP thresholds and, optionally, at relaxed
thresholds; the ``stability`` column says where a site was found.

Predictions are hypotheses for survey, not evidence of presence or of an undescribed
lineage.  Isolated patches are often remote: plan for field safety, obtain permits and
landholder or community consent, clean gear between sites (biosecurity), and treat the
coordinates of new finds as sensitive.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, field, replace
from itertools import combinations

import numpy as np
import pandas as pd
from pyproj import Transformer
from scipy import ndimage as ndi
from scipy.spatial import cKDTree

from screener.costdistance import CostGraph, least_cost_path, step_lengths_km
from screener.errors import InputError, RecordsError
from screener.gaps import separating_gaps
from screener.grid import Grid
from screener.project import default

__all__ = [
    "CandidateSet",
    "PathProfile",
    "clade_suitability",
    "find_candidates",
    "gap_resolution_note",
    "path_profile",
    "paths_geodataframe",
    "resistance_from_suitability",
    "sites_geodataframe",
    "suitable_cells",
]

log = logging.getLogger(__name__)

#: Default minimum area of an unoccupied patch, km².  About what one survey day can
#: cover on foot; smaller patches are mostly single-cell noise of the maps.
MIN_PATCH_KM2 = default("isolation", "min_patch_km2")
#: Default minimum gap (km of unsuitable ground on the least-cost path) for a patch to
#: count as ``isolated`` rather than ``near-range`` (common practice for small
#: terrestrial vertebrates and plants with limited dispersal; adjust per clade).
MIN_GAP_KM = default("isolation", "min_gap_km")
#: Default distance from every record beyond which suitable cells inside a known
#: range count as a ``within-range`` site, km.
WITHIN_RANGE_MIN_KM = default("isolation", "within_range_min_km")
#: Default slack of the least-cost corridor between two taxa's ranges (fraction of
#: the least cost between them); see :func:`find_candidates`.
CORRIDOR_SLACK = 0.05
#: Floor of suitability in the negative-log resistance.
LOG_EPS = 1e-3

_EIGHT = np.ones((3, 3), dtype=bool)
_KIND_ORDER = {"isolated": 0, "near-range": 1, "within-range": 2}


# --------------------------------------------------------------------------------------
# small building blocks


def clade_suitability(suitability: dict) -> np.ndarray:
    """Cell-wise maximum over the taxa's suitability maps (NaN where all are NaN).

    Parameters
    ----------
    suitability : dict of str to ndarray (n_rows, n_cols)

    Returns
    -------
    ndarray of float32 or float64
        float32 when every map is float32 (as the pipeline writes them), else float64.
    """
    maps = [np.asarray(v) for v in suitability.values()]
    dtype = np.result_type(np.float32, *[m.dtype for m in maps])
    out = maps[0].astype(dtype, copy=True)
    for m in maps[1:]:  # folded in place: no stack of every map
        np.fmax(out, m, out=out)
    return out


def gap_resolution_note(grid: Grid, min_gap_km: float) -> str | None:
    """A message when ``min_gap_km`` is shorter than two cells (else None).

    Gaps are measured in whole cells (a run of ``k`` unsuitable cells measures ``k``
    cell widths), so a threshold below two cell widths makes a single unsuitable
    cell (often one misclassified cell of the maps) enough to call a patch isolated.

    Parameters
    ----------
    grid : Grid
    min_gap_km : float
        km.
    """
    steps = [np.asarray(grid.ew_step_km, float)]
    if grid.n_rows > 1:
        steps.append(np.asarray(grid.ns_step_km, float))
    cell_km = float(max(np.max(s) for s in steps))
    if min_gap_km < 2 * cell_km:
        return (
            f"min_gap_km = {min_gap_km:g} km is less than two cells ({2 * cell_km:.2f} "
            f"km on this grid: cells are up to {cell_km:.2f} km across); a single "
            "unsuitable cell then makes a patch isolated. Raise [isolation] min_gap_km "
            "or use a finer grid; gap_km per site shows how close each call is."
        )
    return None


def suitable_cells(grid: Grid, suitability: dict, thresholds: dict) -> np.ndarray:
    """Cells where any taxon's suitability reaches its threshold (inclusive).

    Returns
    -------
    ndarray of bool, shape (n_rows, n_cols); False outside ``grid.mask``.
    """
    out = np.zeros(grid.shape, dtype=bool)
    for taxon, s in suitability.items():
        with np.errstate(invalid="ignore"):
            out |= np.asarray(s) >= thresholds[taxon]
    return out & grid.mask


def resistance_from_suitability(
    suitability: np.ndarray, kind: str = "linear", eps: float = LOG_EPS
) -> np.ndarray:
    """Resistance (cost per km) from suitability in [0, 1].

    Parameters
    ----------
    suitability : ndarray
        NaN cells stay NaN (impassable downstream).
    kind : {"linear", "log"}, default "linear"
        ``"linear"``: ``r = 1 - s``; ``"log"``: ``r = -ln(max(s, eps))``.
    eps : float, default 1e-3

    Examples
    --------
    >>> resistance_from_suitability(np.array([0.0, 0.5, 1.0])).tolist()
    [1.0, 0.5, 0.0]
    """
    if kind == "linear":
        # float64 arithmetic, cast block by block (no float64 copy of the input)
        return np.subtract(1.0, suitability, dtype=np.float64)
    s = np.asarray(suitability, dtype=np.float64)
    if kind == "log":
        with np.errstate(invalid="ignore"):
            return -np.log(np.where(np.isnan(s), np.nan, np.maximum(s, eps)))
    raise InputError(f"resistance must be 'linear' or 'log'; got {kind!r}.")


@dataclass(frozen=True)
class PathProfile:
    """What a least-cost path crosses.

    Attributes
    ----------
    gap_km : float
        Ground length of the longest run of unsuitable cells, km.
    barrier_depth : float
        Deepest barrier on the path: the largest ``1 - s`` (clade suitability) over
        its unsuitable cells; 0 when every cell is suitable.  The same quantity as
        the barrier raster (:attr:`CandidateSet.barrier`).
    length_km : float
        Ground length of the whole path, km (sum of its step lengths).
    n_unsuitable : int
        Unsuitable cells on the path.
    """

    gap_km: float
    barrier_depth: float
    length_km: float
    n_unsuitable: int


def path_profile(
    grid: Grid, path, suitable: np.ndarray, suitability: np.ndarray
) -> PathProfile:
    """Gap length and barrier depth along a path of 8-neighbour cells.

    Parameters
    ----------
    grid : Grid
    path : ndarray of shape (n, 2)
        (row, col) cells.
    suitable : ndarray of bool, shape (n_rows, n_cols)
    suitability : ndarray of shape (n_rows, n_cols)
        Clade suitability.

    Notes
    -----
    Each cell owns half of the step before it and half of the step after it, so a run
    of ``k`` unsuitable cells crossed in a straight line measures ``k`` cell widths:
    the ground between the edges of the suitable cells on either side.  Step lengths
    are the grid's geodesic centre-to-centre distances.
    """
    path = np.asarray(path, dtype=np.int64)
    if len(path) == 0:
        return PathProfile(np.nan, np.nan, np.nan, 0)
    steps = step_lengths_km(grid, path)
    share = np.zeros(len(path))
    share[:-1] += steps / 2
    share[1:] += steps / 2
    bad = ~suitable[path[:, 0], path[:, 1]]
    gap = 0.0
    if bad.any():
        lab, n = ndi.label(bad)
        gap = float(np.max(ndi.sum(share, lab, np.arange(1, n + 1))))
    # index first: converting the whole map per path would cost a grid copy per site
    s_path = np.asarray(suitability)[path[:, 0], path[:, 1]].astype(float)
    depth = float(np.nanmax(1.0 - s_path[bad])) if bad.any() else 0.0
    return PathProfile(gap, depth, float(steps.sum()), int(bad.sum()))


class _Nearest:
    """Nearest of a set of cells by geodesic distance (KD-tree on ECEF, then Geod)."""

    _ecef = Transformer.from_crs("EPSG:4326", "EPSG:4978", always_xy=True)

    def __init__(self, grid: Grid, rows, cols):
        self.grid = grid
        self.lon, self.lat = grid.lonlat(np.asarray(rows), np.asarray(cols))
        self.lon = np.atleast_1d(self.lon)
        self.lat = np.atleast_1d(self.lat)
        self.tree = cKDTree(self._xyz(self.lon, self.lat)) if self.lon.size else None

    def _xyz(self, lon, lat):
        x, y, z = self._ecef.transform(lon, lat, np.zeros_like(lon))
        return np.column_stack([x, y, z])

    def query(self, rows, cols, chunk: int = 1 << 18):
        """Geodesic km to the nearest cell of the set, and its index.

        Cells are handled ``chunk`` at a time so temporaries stay small on big grids.
        """
        rows = np.atleast_1d(np.asarray(rows))
        cols = np.atleast_1d(np.asarray(cols))
        n = rows.size
        if self.tree is None or n == 0:
            return np.full(n, np.inf), np.full(n, -1)
        d_out = np.empty(n, dtype=np.float64)
        j_out = np.empty(n, dtype=np.int64)
        for a in range(0, n, chunk):
            b = min(n, a + chunk)
            lon, lat = self.grid.lonlat(rows[a:b], cols[a:b])
            lon, lat = np.atleast_1d(lon), np.atleast_1d(lat)
            _, j = self.tree.query(self._xyz(lon, lat))
            _, _, d = self.grid.geod.inv(lon, lat, self.lon[j], self.lat[j])
            d_out[a:b] = np.asarray(d, float) / 1000.0
            j_out[a:b] = j
        return d_out, j_out


def _row_bands(shape: tuple):
    """``(r0, r1)`` bands of whole rows of about ``_BAND_CELLS`` cells, in raster order."""
    n_rows, n_cols = shape
    band = max(1, _BAND_CELLS // max(n_cols, 1))
    for r0 in range(0, n_rows, band):
        yield r0, min(r0 + band, n_rows)


def _area_by_label(grid: Grid, labels: np.ndarray, n: int) -> np.ndarray:
    """Ground area (km²) of labels 1..n, summed a band of rows at a time (no
    whole-grid float64 copy of the cell areas)."""
    area = grid.cell_area_km2
    out = np.zeros(n + 1)
    for r0, r1 in _row_bands(grid.shape):
        out += np.bincount(
            labels[r0:r1].ravel(),
            weights=np.asarray(area[r0:r1], dtype=np.float64).ravel(),
            minlength=n + 1,
        )
    return out[1:]


def _boundary(mask: np.ndarray) -> np.ndarray:
    return mask & ~ndi.binary_erosion(mask, structure=_EIGHT, border_value=0)


# --------------------------------------------------------------------------------------
# results


@dataclass(frozen=True, eq=False)
class CandidateSet:
    """Candidate survey sites and the rasters behind them.

    Attributes
    ----------
    sites : pandas.DataFrame
        One row per site (columns listed in :func:`find_candidates`).
    patch_labels : ndarray of int32, shape (n_rows, n_cols)
        ``site_id`` on a site's cells (the site's rank after
        :meth:`with_site_ids`), ``-range_id`` on known-range patches at the MTP
        thresholds, 0 elsewhere.
    paths : dict of int to ndarray (n, 2)
        Least-cost path (row, col) per site, from the site's cheapest cell to the
        range; absent for within-range and unreached sites.
    barrier : ndarray of float32, shape (n_rows, n_cols)
        ``1 - s`` (clade suitability) on unsuitable cells of least-cost corridors
        between different taxa's ranges, 0 elsewhere on valid cells, NaN off the mask.
    cost : dict of str to ndarray of float32
        Accumulated cost from each taxon's ranges at the MTP thresholds.
    cost_all : ndarray of float32
        Accumulated cost from all ranges (cell-wise minimum of ``cost``).
    ranges : pandas.DataFrame
        Known-range patches at the MTP thresholds: ``range_id``, ``taxa``,
        ``area_km2``, ``n_cells``, ``n_records``.
    """

    sites: pd.DataFrame
    patch_labels: np.ndarray
    paths: dict
    barrier: np.ndarray
    cost: dict
    cost_all: np.ndarray
    ranges: pd.DataFrame
    thresholds: dict = field(default_factory=dict)
    relaxed_thresholds: dict | None = None
    #: messages for the reader about the run (e.g. a ``min_gap_km`` below two cells)
    warnings: tuple = ()

    def with_site_ids(self, numbers: dict, ids: dict) -> CandidateSet:
        """The same set under the plan's identifiers.

        Parameters
        ----------
        numbers : dict of int to int
            Site number (``site_id`` as found) to its rank; ``patch_labels`` then holds
            the rank on each site's cells (sites not in the plan become 0).
        ids : dict of int to str
            Site number to its identifier (``S01``), for ``sites`` and ``paths``.
        """
        n = int(self.patch_labels.max()) if self.patch_labels.size else 0
        lut = np.zeros(max(n, 0) + 1, dtype=np.int32)
        for k, v in numbers.items():
            if 0 < int(k) <= n:
                lut[int(k)] = int(v)
        lab = self.patch_labels
        out = np.where(lab > 0, lut[np.clip(lab, 0, None)], lab).astype(np.int32)
        sites = self.sites[self.sites["site_id"].isin(list(ids))].copy()
        sites["site_id"] = sites["site_id"].map(ids).astype(object)
        paths = {ids[k]: v for k, v in self.paths.items() if k in ids}
        return replace(self, sites=sites, patch_labels=out, paths=paths)


@dataclass
class _Stage:
    """Everything found at one set of thresholds."""

    labels: np.ndarray
    range_ids: np.ndarray
    range_taxa: dict
    cost: dict  # empty unless full
    site_cells: np.ndarray  # local site number per cell, 0 elsewhere
    rows: list
    paths: dict
    barrier: np.ndarray | None
    cost_all: np.ndarray | None
    records_per_range: dict
    patch_area: np.ndarray


# --------------------------------------------------------------------------------------
# the analysis


def _check_inputs(grid, suitability, thresholds, records, name):
    if not suitability:
        raise InputError("`suitability` is empty: give one map per taxon.")
    taxa = list(suitability)
    for t in taxa:
        s = np.asarray(suitability[t])
        if s.shape != grid.shape:
            raise InputError(
                f"The suitability map of {t!r} has shape {s.shape}, but the grid is "
                f"{grid.shape}; predict every taxon on the same grid."
            )
    missing = [t for t in taxa if t not in thresholds]
    if missing:
        raise InputError(
            f"`{name}` has no threshold for {missing}; give one per taxon "
            f"(keys: {sorted(thresholds)})."
        )
    missing = [t for t in taxa if t not in records]
    if missing:
        raise RecordsError(
            f"No records given for {missing}; every taxon with a suitability map needs "
            "its (rows, cols) records."
        )
    out = {}
    for t in taxa:
        rows, cols = (np.atleast_1d(np.asarray(v)).astype(np.int64) for v in records[t])
        if rows.shape != cols.shape or rows.size == 0:
            raise RecordsError(
                f"Records of {t!r} must be two equal-length, non-empty arrays (rows, "
                f"cols); got {rows.shape} and {cols.shape}."
            )
        bad = (rows < 0) | (rows >= grid.n_rows) | (cols < 0) | (cols >= grid.n_cols)
        if bad.any():
            raise RecordsError(
                f"{int(bad.sum())} records of {t!r} lie outside the grid {grid.shape} "
                f"(first: row {rows[bad][0]}, col {cols[bad][0]}); check the CRS and "
                "the (row, col) order."
            )
        off = ~grid.mask[rows, cols]
        if off.any():
            log.warning("%d records of %r fall on nodata cells", int(off.sum()), t)
        out[t] = (rows, cols)
    return taxa, out


#: cells per band of rows in the banded passes (per-site reductions, nearest-record
#: queries, areas by label)
_BAND_CELLS = 1 << 20


class _SiteCells:
    """Per-site reductions over the grid, a band of rows at a time.

    Sites may cover most of a large grid, so nothing here holds a value per site
    cell: each pass reads the label raster and the value rasters one band (about
    ``_BAND_CELLS`` cells) at a time and keeps a value per site.  Bands come in
    raster order, so "first" below means first from the north-west.
    """

    def __init__(self, site_cells: np.ndarray, n_sites: int):
        self.site_cells = site_cells
        self.n = n_sites

    def bands(self):
        """Yield ``(r0, r1, at, k)``: the band's rows, the flat indices of its site
        cells within the band and their site numbers (0-based)."""
        for r0, r1 in _row_bands(self.site_cells.shape):
            lab = self.site_cells[r0:r1].ravel()
            at = np.flatnonzero(lab)
            if at.size:
                yield r0, r1, at, lab[at] - 1

    @staticmethod
    def take(array, r0, r1, at) -> np.ndarray:
        """Values of ``array`` at a band's site cells (``array`` may be a broadcast view)."""
        return np.asarray(array[r0:r1]).reshape(-1)[at]


class _Extreme:
    """Running largest (or smallest) value per site and the first cell holding it."""

    def __init__(self, n: int, n_cols: int, *, largest: bool):
        self.largest = largest
        self.n_cols = n_cols
        self.key = np.full(n, -np.inf)  # the value, negated when looking for the smallest
        self.pos = np.full(n, -1, dtype=np.int64)

    def update(self, k, values, flat):
        """Fold in one band: site numbers ``k``, values and grid flat indices ``flat``
        (raster order).  NaN counts as the worst value."""
        v = np.asarray(values, dtype=np.float64)
        key = v if self.largest else -v
        key = np.where(np.isnan(key), -np.inf, key)
        n = self.key.size
        band = np.full(n, -np.inf)
        np.maximum.at(band, k, key)
        hit = key == band[k]
        first = np.full(n, np.iinfo(np.int64).max)
        np.minimum.at(first, k[hit], flat[hit])
        seen = first < np.iinfo(np.int64).max
        # a later band wins only when strictly better: ties stay with the first cell
        upd = seen & ((self.pos < 0) | (band > self.key))
        self.key[upd] = band[upd]
        self.pos[upd] = first[upd]

    def value(self, empty=np.nan) -> np.ndarray:
        """The extreme value per site (``empty`` for a site with no cells)."""
        v = self.key if self.largest else -self.key
        return np.where(self.pos >= 0, v, empty)

    def rowcol(self) -> np.ndarray:
        out = np.zeros((self.pos.size, 2), dtype=np.int64)
        ok = self.pos >= 0
        out[ok, 0], out[ok, 1] = np.divmod(self.pos[ok], self.n_cols)
        return out


def _site_stats(grid, sc: _SiteCells, clade, agreement, novelty, elevation,
                clamped=None):
    """Area, suitability, agreement, novelty, clamping and elevation per site, in one
    banded pass."""
    n = sc.n
    area = grid.cell_area_km2
    n_cols = grid.n_cols
    n_cells = np.zeros(n, dtype=np.int64)
    a_sum, sa_sum = np.zeros(n), np.zeros(n)
    s_max = np.full(n, -np.inf)
    ag = [np.zeros(n), np.zeros(n)]
    nov = [np.zeros(n), np.zeros(n)]
    clm = [np.zeros(n), np.zeros(n)]
    e_min, e_max = np.full(n, np.inf), np.full(n, -np.inf)
    best = _Extreme(n, n_cols, largest=True)

    def bc(k, w=None):
        return np.bincount(k, weights=w, minlength=n)

    for r0, r1, at, k in sc.bands():
        a = sc.take(area, r0, r1, at).astype(np.float64)
        sv = sc.take(clade, r0, r1, at).astype(np.float64)
        s0 = np.where(np.isfinite(sv), sv, 0.0)
        n_cells += bc(k)
        a_sum += bc(k, a)
        sa_sum += bc(k, s0 * a)
        np.maximum.at(s_max, k, s0)
        best.update(k, sv, r0 * n_cols + at)
        if agreement is not None:
            x = sc.take(agreement, r0, r1, at).astype(np.float64)
            ok = np.isfinite(x)
            ag[0] += bc(k, np.where(ok, x, 0.0))
            ag[1] += bc(k, ok.astype(np.float64))
        if novelty is not None:
            x = sc.take(novelty, r0, r1, at).astype(np.float64)
            ok = np.isfinite(x)
            nov[0] += bc(k, (ok & (x < 0)).astype(np.float64))
            nov[1] += bc(k, ok.astype(np.float64))
        if clamped is not None:
            x = sc.take(clamped, r0, r1, at).astype(np.float64)
            ok = np.isfinite(x)
            clm[0] += bc(k, (ok & (x > 0)).astype(np.float64))
            clm[1] += bc(k, ok.astype(np.float64))
        if elevation is not None:
            x = sc.take(elevation, r0, r1, at).astype(np.float64)
            ok = np.isfinite(x)
            np.minimum.at(e_min, k[ok], x[ok])
            np.maximum.at(e_max, k[ok], x[ok])

    def share(num_den, given):
        num, den = num_den
        if given is None:
            return np.full(n, np.nan)
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(den > 0, num / np.where(den > 0, den, 1), np.nan)

    with np.errstate(invalid="ignore", divide="ignore"):
        mean_s = sa_sum / a_sum
    stats = {
        "area_km2": a_sum,
        "n_cells": n_cells,
        "mean_suitability": mean_s,
        "max_suitability": s_max,
        "agreement": share(ag, agreement),
        "novel_share": share(nov, novelty),
        "clamped_share": share(clm, clamped),
        "elevation_min": np.where(np.isfinite(e_min), e_min, np.nan),
        "elevation_max": np.where(np.isfinite(e_max), e_max, np.nan),
    }
    return stats, best.rowcol()


def _taxon_fit(grid, sc: _SiteCells, suitability, thresholds, taxa) -> dict:
    """Whose niche each site fits: per taxon, the site's area-weighted mean suitability
    minus the taxon's threshold (``margin_<taxon>``; negative = below it);
    ``suitable_for``: the taxa whose margin is >= 0, best first (the best-fitting
    taxon alone when none reaches its threshold on average); ``niche_fit``: how far
    into the niche of the taxon it fits best the site lies, ``margin / (1 -
    threshold)`` clipped to [0, 1] (0 at the threshold, 1 fully suitable), the
    suitability component of the ranking."""
    n = sc.n
    area = grid.cell_area_km2
    a_sum = np.zeros(n)
    s_sum = {t: np.zeros(n) for t in taxa}
    for r0, r1, at, k in sc.bands():
        a = sc.take(area, r0, r1, at).astype(np.float64)
        a_sum += np.bincount(k, weights=a, minlength=n)
        for t in taxa:
            v = sc.take(suitability[t], r0, r1, at).astype(np.float64)
            s_sum[t] += np.bincount(k, weights=np.where(np.isfinite(v), v, 0.0) * a,
                                    minlength=n)
    out = {}
    depth = np.full(n, -np.inf)
    with np.errstate(invalid="ignore", divide="ignore"):
        for t in taxa:
            thr = float(thresholds[t])
            out[f"margin_{t}"] = s_sum[t] / a_sum - thr
            d = out[f"margin_{t}"] / (1.0 - thr) if thr < 1 else np.zeros(n)
            depth = np.fmax(depth, np.nan_to_num(d, nan=-np.inf))
    out["niche_fit"] = np.clip(depth, 0.0, 1.0)
    m = np.column_stack([out[f"margin_{t}"] for t in taxa]) if n else np.zeros((0, 1))
    fits = []
    for i in range(n):
        order = np.argsort(-np.nan_to_num(m[i], nan=-np.inf), kind="stable")
        names = [taxa[j] for j in order if m[i, j] >= 0] or [taxa[order[0]]]
        fits.append(",".join(names))
    out["suitable_for"] = np.array(fits, dtype=object)
    return out


def _labels_touching(labels: np.ndarray, mask: np.ndarray, n: int) -> np.ndarray:
    """For labels 1..n: does any of the label's cells lie where ``mask`` is True?
    (a band of rows at a time)."""
    out = np.zeros(n + 1, dtype=bool)
    for r0, r1 in _row_bands(labels.shape):
        out[labels[r0:r1][mask[r0:r1]]] = True
    return out[1:]


def _site_corridors(graph, site_cells, n_unocc, cost_all, site_cost, slack):
    """Cells on the least-cost corridor between the known ranges and a site.

    One cost run from the cells of every unoccupied-patch site; each cell is tested
    against the site it is cheapest to reach from (the one its traceback ends at):
    on the corridor when ``cost_from_ranges + cost_from_site <= (1 + slack) *
    least cost of that site``.  Sites the ranges do not reach, or that touch them
    (least cost 0), have no corridor.  One run instead of one per site: a cell on
    the corridor of a site that lies behind a nearer site is tested against the
    nearer one, so the caller adds every site's least-cost path to the corridors.
    """
    from screener.gaps import nearest_source_label

    shape = site_cells.shape
    unocc = (site_cells > 0) & (site_cells <= n_unocc)
    if not unocc.any():
        return np.zeros(shape, bool)
    surf = graph.run(unocc, dtype=np.float32)
    near = nearest_source_label(surf.predecessor.ravel(), np.where(unocc, site_cells, 0))
    limit = np.full(n_unocc + 1, -np.inf)
    lc = np.asarray(site_cost[:n_unocc], dtype=np.float64)
    ok = np.isfinite(lc) & (lc > 0)
    limit[1:][ok] = lc[ok] * (1.0 + slack)
    out = (cost_all + surf.cost).ravel() <= limit[near]
    return out.reshape(shape)


def _run_stage(grid, graphs, suitability, clade, thresholds, records, taxa, p, *, full=True,
               last=False):
    """Sites at one set of thresholds.  ``full=False`` (the relaxed set) keeps no
    rasters beyond the labels and site cells: only the MTP set's are returned.
    ``graphs`` holds the one cost graph; the ``last`` stage empties it once its
    surfaces are built, so the solver's resistance is freed for the rest."""
    graph = graphs[0]
    suitable = suitable_cells(grid, suitability, thresholds)
    labels, n_patches = ndi.label(suitable, structure=_EIGHT)
    patch_area = _area_by_label(grid, labels, n_patches)

    # known ranges and sources per taxon
    range_taxa: dict[int, list] = {}
    sources = {}
    for t in taxa:
        rows, cols = records[t]
        pids = np.unique(labels[rows, cols])
        pids = pids[pids > 0]
        for pid in pids:
            range_taxa.setdefault(int(pid), []).append(t)
        in_pids = np.zeros(n_patches + 1, bool)
        in_pids[pids] = True
        src = in_pids[labels]
        src[rows, cols] = True
        src &= grid.mask
        sources[t] = src
    range_ids = np.array(sorted(range_taxa), dtype=np.int64)

    # records, for distances
    rec_r = np.concatenate([records[t][0] for t in taxa])
    rec_c = np.concatenate([records[t][1] for t in taxa])
    rec_taxon = np.concatenate([[t] * len(records[t][0]) for t in taxa])
    near_rec = _Nearest(grid, rec_r, rec_c)

    site_cells = np.zeros(grid.shape, dtype=np.int32)
    # unoccupied patches
    is_range = np.zeros(n_patches + 1, bool)
    is_range[range_ids] = True
    keep = (~is_range[1:]) & (patch_area >= p["min_patch_km2"])
    cand = np.flatnonzero(keep) + 1
    lut = np.zeros(n_patches + 1, dtype=np.int32)
    lut[cand] = np.arange(1, cand.size + 1)
    site_cells = lut[labels]
    n_unocc = cand.size

    # within-range sub-patches
    in_range = is_range[labels] & suitable
    if in_range.any():
        # band by band, so the cell lists and distances stay small on big grids
        far = np.zeros(grid.shape, bool)
        for r0, r1 in _row_bands(grid.shape):
            rr, cc = np.nonzero(in_range[r0:r1])
            if rr.size:
                d, _ = near_rec.query(rr + r0, cc)
                far[rr + r0, cc] = d > p["within_range_min_km"]
        del in_range
        sub, n_sub = ndi.label(far, structure=_EIGHT)
        del far
        if n_sub:
            sub_area = _area_by_label(grid, sub, n_sub)
            ok = np.flatnonzero(sub_area >= p["min_patch_km2"]) + 1
            lut2 = np.zeros(n_sub + 1, dtype=np.int32)
            lut2[ok] = np.arange(n_unocc + 1, n_unocc + 1 + ok.size)
            in_sub = sub > 0
            site_cells[in_sub] = lut2[sub[in_sub]]
            del in_sub
        del sub
    n_sites = int(site_cells.max()) if site_cells.size else 0

    # separating gap of every patch: minimax over all routes from the ranges, suitable
    # patches (of any size) as stepping stones; on the cells the cost graph may cross
    sep = separating_gaps(
        grid, labels, n_patches, range_ids, passable=graph.passable,
        backend=graph.backend, memory_mb=p["memory_mb"],
    )

    sc = _SiteCells(site_cells, n_sites)
    stats, best = _site_stats(grid, sc, clade, p["agreement"], p["novelty"], p["elevation"],
                               p.get("clamped"))
    stats.update(_taxon_fit(grid, sc, suitability, thresholds, taxa))
    # One cost-distance run per taxon.  Per-site costs are reduced from the float64
    # surface; only a float32 copy and the solver's compact traceback are kept (5-6
    # bytes per cell per taxon, for paths, corridors and the all-range surface).
    cost_to = {}
    cheapest = {}
    cost = {}
    for t in taxa:
        surf = graph.run(sources[t])
        c = surf.cost
        low = _Extreme(n_sites, grid.n_cols, largest=False)
        for r0, r1, at, k in sc.bands():
            low.update(k, sc.take(c, r0, r1, at), r0 * grid.n_cols + at)
        cost_to[t] = low.value(empty=np.inf)
        cheapest[t] = low.rowcol()
        cost[t] = replace(surf, cost=c.astype(np.float32))
        del surf, c
    cost_all = None
    site_corridor = None
    if full:
        # folded in place (np.minimum.reduce of a list would stack the surfaces)
        cost_all = cost[taxa[0]].cost.copy()
        for t in taxa[1:]:
            np.minimum(cost_all, cost[t].cost, out=cost_all)
        site_corridor = _site_corridors(
            graph, site_cells, n_unocc, cost_all,
            np.min([cost_to[t] for t in taxa], axis=0), p["corridor_slack"],
        )
    del graph
    if last:
        graphs.clear()
    all_src = sources[taxa[0]].copy()
    for t in taxa[1:]:
        all_src |= sources[t]

    # nearest record per site (min over the site's cells), a band of rows at a time;
    # bands come in raster order and only a strictly nearer band replaces the running
    # best, so ties go to the first cell in raster order
    nearest_record = np.full(n_sites, np.inf)
    nearest_rec_taxon = np.array([None] * n_sites, dtype=object)
    for r0, _, at, lab in sc.bands():
        rr, cc = np.divmod(at, grid.n_cols)
        d, j = near_rec.query(rr + r0, cc)
        order = np.lexsort((d, lab))
        first = order[np.r_[True, np.diff(lab[order]) != 0]]
        k = lab[first]
        better = d[first] < nearest_record[k]
        nearest_record[k[better]] = d[first][better]
        nearest_rec_taxon[k[better]] = rec_taxon[j[first][better]]

    # straight-line distance to ranges, for sites no path reaches
    range_edge = _boundary(all_src)
    near_range = _Nearest(grid, *np.nonzero(range_edge))
    er, ec = np.nonzero(range_edge)
    edge_taxon = np.empty(er.size, dtype=object)
    for t in taxa[::-1]:  # first taxon wins on shared cells
        edge_taxon[sources[t][er, ec]] = t

    rows_out = []
    paths = {}
    for k in range(n_sites):
        sid = k + 1
        costs_k = {t: float(cost_to[t][k]) for t in taxa}
        rec = {"_local": sid, "row": int(best[k, 0]), "col": int(best[k, 1])}
        for t in taxa:
            rec[f"cost_to_{t}"] = costs_k[t]
        if sid > n_unocc:
            rec["kind"] = "within-range"
            rec["cost_distance"] = 0.0
            rec["nearest_taxon"] = nearest_rec_taxon[k]
            rec["gap_km"] = 0.0
            rec["unsuitable_km"] = 0.0
            rec["stepping_stones"] = 0
            rec["barrier_depth"] = np.nan
            rec["path_km"] = 0.0
        else:
            pid = int(cand[k])
            rec["unsuitable_km"] = float(sep.unsuitable_km[pid])
            rec["stepping_stones"] = int(sep.stepping_stones[pid])
            t_best = min(taxa, key=lambda t: costs_k[t])  # ties: first taxon
            cd = costs_k[t_best]
            rec["cost_distance"] = cd
            if np.isfinite(cd):
                end = cheapest[t_best][k]
                path = least_cost_path(cost[t_best], end)[::-1].copy()
                prof = path_profile(grid, path, suitable, clade)
                paths[sid] = path
                rec["nearest_taxon"] = t_best
                gap = float(sep.gap_km[pid])
                rec["gap_km"] = gap
                rec["barrier_depth"] = prof.barrier_depth
                rec["path_km"] = prof.length_km
                rec["kind"] = "near-range" if gap < p["min_gap_km"] else "isolated"

            else:
                cells = np.nonzero(site_cells == sid)
                cells = (
                    cells[0][_boundary(site_cells == sid)[cells]],
                    cells[1][_boundary(site_cells == sid)[cells]],
                )
                d, j = near_range.query(*cells)
                i = int(np.argmin(d)) if d.size else -1
                rec["nearest_taxon"] = (
                    edge_taxon[j[i]] if i >= 0 and j[i] >= 0 else None
                )
                rec["gap_km"] = float(d[i]) if i >= 0 else np.inf
                rec["barrier_depth"] = np.nan
                rec["path_km"] = np.nan
                rec["kind"] = "isolated"
        rec["nearest_record_km"] = float(nearest_record[k])
        for key, v in stats.items():
            rec[key] = v[k]
        rows_out.append(rec)

    # least-cost corridors between different taxa's ranges
    corridor = np.zeros(grid.shape, bool)
    for a, b in combinations(taxa, 2):
        tot = cost[a].cost + cost[b].cost
        lcd = float(np.min(tot))
        if not np.isfinite(lcd) or lcd <= 0:
            continue  # unconnected, or the two ranges touch: no gap between them
        corridor |= tot <= lcd * (1 + p["corridor_slack"])
    between = _labels_touching(site_cells, corridor, n_sites)
    for k, rec in enumerate(rows_out):
        rec["between_ranges"] = bool(between[k])
    del corridor
    barrier = None
    if full:
        # barrier depth (1 - s) on the unsuitable cells of the range-site corridors
        # and of every site's least-cost path (a site reached through another site's
        # corridor is tested against that nearer site above; its path still counts)
        for path in paths.values():
            site_corridor[path[:, 0], path[:, 1]] = True
        barrier = (1.0 - clade).astype(np.float32, copy=False)
        site_corridor &= ~suitable
        barrier[~site_corridor] = 0.0
        barrier[~grid.mask] = np.nan
    del site_corridor

    per_range = {
        int(pid): int(np.sum(labels[rec_r, rec_c] == pid)) for pid in range_ids
    }
    return _Stage(
        labels,
        range_ids,
        range_taxa,
        {t: cost[t].cost for t in taxa} if full else {},
        site_cells,
        rows_out,
        paths,
        barrier,
        cost_all,
        per_range,
        patch_area,
    )


def find_candidates(
    grid: Grid,
    suitability: dict,
    thresholds: dict,
    records: dict,
    *,
    relaxed_thresholds: dict | None = None,
    threshold_names: tuple = ("mtp", "relaxed"),
    min_gap_km: float = MIN_GAP_KM,
    min_patch_km2: float = MIN_PATCH_KM2,
    within_range_min_km: float = WITHIN_RANGE_MIN_KM,
    resistance="linear",
    impassable=None,
    corridor_slack: float = CORRIDOR_SLACK,
    agreement=None,
    novelty=None,
    elevation=None,
    clamped=None,
    backend: str = "auto",
    memory_mb: float | None = None,
) -> CandidateSet:
    """Find suitable patches cut off from the known ranges of a clade.

    Parameters
    ----------
    grid : Grid
    suitability : dict of str to ndarray (n_rows, n_cols)
        One map per taxon in [0, 1], NaN outside ``grid.mask``.
    thresholds : dict of str to float
        Per-taxon threshold (e.g. minimum training presence); inclusive.
    records : dict of str to tuple (rows, cols)
        Record cells per taxon.
    relaxed_thresholds : dict of str to float, optional
        A second set (usually broader); sites found only there are
        ``<second name>-only``.
    threshold_names : tuple of str, default ("mtp", "relaxed")
        Names of ``thresholds`` and ``relaxed_thresholds``, written into the
        ``threshold_set`` and ``stability`` columns (e.g. ``("relaxed", "mtp")``
        when the relaxed thresholds define suitable cells and the MTP is the check).
    min_gap_km : float, default 5.0
        Gaps at least this long (km) make an unoccupied patch ``isolated``.
    min_patch_km2 : float, default 1.0
        Smallest unoccupied patch or within-range sub-patch kept, km².
    within_range_min_km : float, default 10.0
        Suitable cells of a known range farther than this (km, geodesic) from every
        record form ``within-range`` sites.
    resistance : {"linear", "log"} or ndarray, default "linear"
        Resistance from the clade suitability, or a resistance raster.
    impassable : ndarray of bool, optional
        Cells no path may cross (e.g. open water for a terrestrial taxon).
    corridor_slack : float, default 0.05
        A cell lies on the least-cost corridor between taxa A and B when
        ``cost_A + cost_B <= (1 + corridor_slack) * min(cost_A + cost_B)``.
        ``between_ranges`` is True for a site with a cell on such a corridor.  Pairs
        whose ranges share a patch (least cost 0) or are not connected are skipped.
    agreement, novelty, elevation : ndarray (n_rows, n_cols), optional
        Model agreement (mean reported), MESS (share of cells < 0 reported) and
        elevation (min and max reported).
    clamped : ndarray (n_rows, n_cols), optional
        1 where some taxon's model was clamped (a predictor beyond its calibration
        range), 0 elsewhere; the share of a site's cells at 1 is ``clamped_share``.
    backend : {"auto", "mcp", "dijkstra", "tiled"}, default "auto"
        Cost-distance solver (:class:`~screener.costdistance.CostGraph`).
    memory_mb : float, optional
        Working memory for the cost-distance solver (MB); grids whose whole-grid
        solver would need more are solved tile by tile (the same costs).  The
        stage's own whole-grid arrays (labels, site cells and a float32 cost surface
        with a traceback per taxon and threshold set) come on top.

    Returns
    -------
    CandidateSet
        ``sites`` columns: ``site_id, kind, threshold_set, row, col, x, y, longitude,
        latitude, area_km2, n_cells, mean_suitability, max_suitability, agreement,
        novel_share, clamped_share, elevation_min, elevation_max, cost_distance, cost_to_<taxon>,
        nearest_taxon, gap_km, barrier_depth, path_km, nearest_record_km,
        between_ranges, stability, relaxed_block``.  ``row``/``col`` is the site's
        most suitable cell; ``mean_suitability`` is area-weighted; ``stability`` is
        ``"both"`` (a candidate at both threshold sets), ``"<first>-only"``,
        ``"<second>-only"`` (names from ``threshold_names``) or ``"untested"`` (no
        second set); ``threshold_set`` names the set a site was found at;
        ``relaxed_block`` is the patch holding the site at the broader of the two
        sets (the relaxed thresholds unless told otherwise)
        (used by :func:`screener.ranking.group_sites`).

    Raises
    ------
    InputError, RecordsError
        On mismatched shapes, missing thresholds or records off the grid.

    References
    ----------
    .. [1] Adriaensen, F. et al. (2003). Landscape and Urban Planning 64:233-247
       (least-cost modelling).
    .. [2] Pearson, R. G. et al. (2007). J. Biogeography 34:102-117 (lowest presence
       threshold).
    """
    taxa, recs = _check_inputs(grid, suitability, thresholds, records, "thresholds")
    if relaxed_thresholds is not None:
        _check_inputs(
            grid, suitability, relaxed_thresholds, records, "relaxed_thresholds"
        )
    for name, v in (
        ("min_gap_km", min_gap_km),
        ("min_patch_km2", min_patch_km2),
        ("within_range_min_km", within_range_min_km),
        ("corridor_slack", corridor_slack),
    ):
        if not np.isfinite(v) or v < 0:
            raise InputError(f"`{name}` must be a finite number >= 0; got {v!r}.")
    notes = []
    short = gap_resolution_note(grid, min_gap_km)
    if short:
        log.warning(short)
        notes.append(short)
    clade = clade_suitability(suitability)  # a new array: masked in place
    clade[~grid.mask] = np.nan
    if isinstance(resistance, str):
        res = resistance_from_suitability(clade, resistance)
    else:
        res = np.asarray(resistance, dtype=np.float64)
    if impassable is not None:
        res = np.where(np.asarray(impassable, bool), np.inf, res)
    # built once, run per source set; `res` is ours unless the caller passed a raster
    own = isinstance(resistance, str) or impassable is not None
    graphs = [CostGraph(grid, res, backend=backend, copy=not own, memory_mb=memory_mb)]
    del res
    p = {
        "min_gap_km": float(min_gap_km),
        "min_patch_km2": float(min_patch_km2),
        "within_range_min_km": float(within_range_min_km),
        "corridor_slack": float(corridor_slack),
        "agreement": agreement,
        "novelty": novelty,
        "clamped": clamped,
        "elevation": elevation,
        "memory_mb": memory_mb,
    }

    # The relaxed set runs first and keeps only its labels and site cells, so that
    # its other rasters are gone before the MTP set, whose rasters are returned, is
    # built.  Sites are matched across the sets by label lookups a band at a time (no
    # list of every site's cells: sites may cover most of the grid).
    relaxed = None
    if relaxed_thresholds is not None:
        relaxed = _run_stage(
            grid, graphs, suitability, clade, relaxed_thresholds, recs, taxa, p, full=False
        )
        # the smallest integer types that hold them, while the MTP set runs
        relaxed.labels = relaxed.labels.astype(
            np.min_scalar_type(int(relaxed.labels.max())), copy=False
        )
        relaxed.site_cells = relaxed.site_cells.astype(
            np.min_scalar_type(len(relaxed.rows)), copy=False
        )
    mtp = _run_stage(grid, graphs, suitability, clade, thresholds, recs, taxa, p, last=True)

    rows, paths_out = [], {}
    entries = []
    if relaxed is not None:
        mtp_in_relaxed = _labels_touching(
            mtp.site_cells, relaxed.site_cells > 0, len(mtp.rows)
        )
        relaxed_in_mtp = _labels_touching(
            relaxed.site_cells, mtp.site_cells > 0, len(relaxed.rows)
        )
    # blocks for grouping come from the broader of the two sets
    p_name, s_name = threshold_names
    block_labels = mtp.labels
    if relaxed is not None and all(
        relaxed_thresholds[t] <= thresholds[t] for t in taxa
    ):
        block_labels = relaxed.labels
    for rec in mtp.rows:
        if relaxed is None:
            stab = "untested"
        else:
            stab = "both" if mtp_in_relaxed[rec["_local"] - 1] else f"{p_name}-only"
        block = int(block_labels[rec["row"], rec["col"]])
        entries.append((rec, p_name, stab, block, mtp.paths.get(rec["_local"])))
    if relaxed is not None:
        for rec in relaxed.rows:
            if relaxed_in_mtp[rec["_local"] - 1]:
                continue
            block = int(block_labels[rec["row"], rec["col"]])
            entries.append(
                (rec, s_name, f"{s_name}-only", block, relaxed.paths.get(rec["_local"]))
            )
    entries.sort(
        key=lambda e: (
            e[1] != p_name,
            _KIND_ORDER[e[0]["kind"]],
            -e[0]["area_km2"],
            e[0]["row"],
            e[0]["col"],
        )
    )
    # site ids painted through one lookup table per threshold set: MTP sites are
    # disjoint, and relaxed-only sites touch no MTP site
    lut_mtp = np.zeros(len(mtp.rows) + 1, dtype=np.int32)
    lut_relaxed = np.zeros(len(relaxed.rows) + 1 if relaxed is not None else 1, np.int32)
    for sid, (rec, tset, stab, block, path) in enumerate(entries, start=1):
        row = {k: v for k, v in rec.items() if k != "_local"}
        row.update(
            site_id=sid,
            threshold_set=tset,
            stability=stab,
            relaxed_block=block if block > 0 else -1,
        )
        rows.append(row)
        (lut_mtp if tset == p_name else lut_relaxed)[rec["_local"]] = sid
        if path is not None:
            paths_out[sid] = path
    site_lab = lut_mtp[mtp.site_cells]
    mtp.site_cells = None
    if relaxed is not None:
        only = lut_relaxed[relaxed.site_cells]
        relaxed = None
        site_lab = np.where(only > 0, only, site_lab)
        del only
    is_range = np.zeros(int(mtp.labels.max()) + 1, dtype=bool)
    is_range[mtp.range_ids] = True
    in_range = is_range[mtp.labels] & (site_lab == 0)
    site_lab[in_range] = -mtp.labels[in_range]
    del in_range

    cols = (
        [
            "site_id",
            "kind",
            "threshold_set",
            "row",
            "col",
            "x",
            "y",
            "longitude",
            "latitude",
            "area_km2",
            "n_cells",
            "mean_suitability",
            "max_suitability",
            "agreement",
            "novel_share",
            "clamped_share",
            "elevation_min",
            "elevation_max",
            "cost_distance",
        ]
        + [f"cost_to_{t}" for t in taxa]
        + [
            "nearest_taxon",
            "suitable_for",
            "niche_fit",
        ]
        + [f"margin_{t}" for t in taxa]
        + [
            "gap_km",
            "unsuitable_km",
            "stepping_stones",
            "barrier_depth",
            "path_km",
            "nearest_record_km",
            "between_ranges",
            "stability",
            "relaxed_block",
        ]
    )
    sites = pd.DataFrame(
        rows, columns=[c for c in cols if c not in ("x", "y", "longitude", "latitude")]
    )
    if len(sites):
        r_ = sites["row"].to_numpy()
        c_ = sites["col"].to_numpy()
        x, y = grid.xy(r_, c_)
        lon, lat = grid.lonlat(r_, c_)
        sites["x"], sites["y"] = np.atleast_1d(x), np.atleast_1d(y)
        sites["longitude"], sites["latitude"] = np.atleast_1d(lon), np.atleast_1d(lat)
    else:
        for c in ("x", "y", "longitude", "latitude"):
            sites[c] = pd.Series(dtype=float)
    sites = sites[cols]
    for c in ("nearest_taxon", "suitable_for"):
        sites[c] = sites[c].astype(object)

    ranges = pd.DataFrame(
        {
            "range_id": mtp.range_ids.astype(np.int64),
            "taxa": [",".join(mtp.range_taxa[int(i)]) for i in mtp.range_ids],
            "area_km2": [float(mtp.patch_area[i - 1]) for i in mtp.range_ids],
            "n_cells": [int(n) for n in np.bincount(
                mtp.labels.ravel(), minlength=int(mtp.labels.max()) + 1)[mtp.range_ids]],
            "n_records": [mtp.records_per_range[int(i)] for i in mtp.range_ids],
        }
    )
    log.info(
        "%d candidate sites (%s)",
        len(sites),
        sites["kind"].value_counts().to_dict() if len(sites) else {},
    )
    return CandidateSet(
        sites=sites,
        patch_labels=site_lab,
        paths=paths_out,
        barrier=mtp.barrier,
        cost=mtp.cost,
        cost_all=mtp.cost_all,
        ranges=ranges,
        thresholds=dict(thresholds),
        relaxed_thresholds=None
        if relaxed_thresholds is None
        else dict(relaxed_thresholds),
        warnings=tuple(notes),
    )


# --------------------------------------------------------------------------------------
# vector views


def sites_geodataframe(grid: Grid, candidates: CandidateSet):
    """Site polygons (cells dissolved per site) with the site attributes.

    Returns
    -------
    geopandas.GeoDataFrame
        One (Multi)Polygon per site in the grid's CRS.
    """
    import geopandas as gpd
    from rasterio.features import shapes
    from shapely.geometry import shape

    lab = candidates.patch_labels.astype(np.int32)
    geoms, ids = [], []
    for geom, value in shapes(
        lab, mask=lab > 0, transform=grid.transform, connectivity=8
    ):
        geoms.append(shape(geom))
        ids.append(int(value))
    crs = grid.pyproj_crs
    if not geoms:
        return gpd.GeoDataFrame(candidates.sites.copy(), geometry=[], crs=crs)
    parts = gpd.GeoDataFrame({"site_id": ids}, geometry=geoms, crs=crs)
    merged = parts.dissolve(by="site_id").reset_index()
    out = merged.merge(candidates.sites, on="site_id", how="right")
    return gpd.GeoDataFrame(out, geometry="geometry", crs=crs)


def paths_geodataframe(grid: Grid, candidates: CandidateSet):
    """Least-cost paths as LineStrings through the cell centres (grid CRS).

    Returns
    -------
    geopandas.GeoDataFrame
        Columns ``site_id``, ``kind``, ``nearest_taxon``, ``gap_km``, ``path_km``,
        geometry.
    """
    import geopandas as gpd
    from shapely.geometry import LineString, Point

    recs, geoms = [], []
    info = candidates.sites.set_index("site_id")
    for sid, path in candidates.paths.items():
        x, y = grid.xy(path[:, 0], path[:, 1])
        x, y = np.atleast_1d(x), np.atleast_1d(y)
        geoms.append(
            LineString(np.column_stack([x, y])) if len(x) > 1 else Point(x[0], y[0])
        )
        row = info.loc[sid]
        recs.append(
            {
                "site_id": int(sid),
                "kind": row["kind"],
                "nearest_taxon": row["nearest_taxon"],
                "gap_km": row["gap_km"],
                "path_km": row["path_km"],
            }
        )
    df = pd.DataFrame(
        recs, columns=["site_id", "kind", "nearest_taxon", "gap_km", "path_km"]
    )
    return gpd.GeoDataFrame(df, geometry=geoms, crs=grid.pyproj_crs)
