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

Each step is a plain function over typed values, chained by :func:`find_candidates`:
:func:`suitable_cells` -> :func:`find_patches` -> :func:`known_ranges` ->
:func:`unoccupied_patches` and :func:`within_range_parts` -> :func:`site_layout` ->
:func:`cost_graph` and :func:`cost_to_ranges` -> :func:`screener.gaps.separating_gaps`
-> :func:`least_cost_paths` -> :func:`classify_sites` -> :func:`between_ranges`,
:func:`site_corridors` and :func:`barrier_raster` -> :func:`merge_threshold_sets`.
The inputs are a :class:`Clade` (maps, records, :class:`SiteLayers`) and one
:class:`IsolationParameters`.

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

from screener.columns import CANDIDATES, find_column
from screener.costdistance import CostGraph, least_cost_path, step_lengths_km
from screener.errors import InputError, RecordsError
from screener.gaps import SeparatingGaps, separating_gaps
from screener.grid import Grid
from screener.project import default, setting

__all__ = [
    "CandidateSet",
    "Clade",
    "IsolationParameters",
    "KnownRanges",
    "PathProfile",
    "Patches",
    "RangeCosts",
    "SiteLayers",
    "SiteLayout",
    "STAGE_COLUMNS",
    "SitePaths",
    "ThresholdSetSites",
    "barrier_raster",
    "between_ranges",
    "clade_suitability",
    "classify_sites",
    "cost_graph",
    "cost_to_ranges",
    "find_candidates",
    "find_patches",
    "gap_resolution_note",
    "known_ranges",
    "least_cost_paths",
    "merge_threshold_sets",
    "nearest_records",
    "path_profile",
    "paths_geodataframe",
    "ranges_table",
    "resistance_from_suitability",
    "site_columns",
    "site_corridors",
    "site_layout",
    "sites_geodataframe",
    "straight_line_to_ranges",
    "suitable_cells",
    "unoccupied_patches",
    "within_range_parts",
]

log = logging.getLogger(__name__)


_EIGHT = np.ones((3, 3), dtype=bool)
_KIND_ORDER = {"isolated": 0, "near-range": 1, "within-range": 2}


# --------------------------------------------------------------------------------------
# parameters and inputs


#: Default minimum area of an unoccupied patch, km² (``[isolation] min_patch_km2``).
MIN_PATCH_KM2 = default("isolation", "min_patch_km2")
#: Default minimum gap, km (``[isolation] min_gap_km``).
MIN_GAP_KM = default("isolation", "min_gap_km")
#: Default distance from every record beyond which suitable cells inside a known
#: range count as a ``within-range`` site, km (``[isolation] within_range_min_km``).
WITHIN_RANGE_MIN_KM = default("isolation", "within_range_min_km")
#: Default resistance from suitability (``[isolation] resistance``).
RESISTANCE = default("isolation", "resistance")
#: Default slack of the least-cost corridors (fraction of the least cost); not a
#: project setting.  See :func:`between_ranges` and :func:`site_corridors`.
CORRIDOR_SLACK = 0.05
#: Floor of suitability in the negative-log resistance.
LOG_EPS = 1e-3

_RESISTANCES = setting("isolation", "resistance").choices


@dataclass(frozen=True)
class IsolationParameters:
    """Every setting of the isolation stage, in one checked value.

    Defaults are those of the project file's ``[isolation]`` section
    (:func:`screener.project.default`); :meth:`from_settings` reads a loaded project.

    Attributes
    ----------
    min_gap_km : float
        Separating gaps at least this long (km of unsuitable ground) make an
        unoccupied patch ``isolated``; shorter ones ``near-range``.  Which length
        separates the two is common practice for small terrestrial vertebrates and
        plants with limited dispersal; adjust per clade.
    min_patch_km2 : float
        Smallest unoccupied patch or within-range part kept as a site, km² (about
        what one survey day covers on foot; smaller patches are mostly single-cell
        noise of the maps).
    within_range_min_km : float
        Suitable cells of a known range farther than this (km, geodesic) from every
        record form ``within-range`` sites.
    resistance : {"linear", "log"}
        Resistance from the clade suitability ``s``: ``1 - s`` or ``-ln(max(s,
        1e-3))`` (:func:`resistance_from_suitability`).
    corridor_slack : float
        A cell lies on the least-cost corridor between two sources when the two
        accumulated costs sum to at most ``(1 + corridor_slack)`` times the least
        cost between them (dimensionless).
    threshold_names : tuple of two str
        Names of the primary threshold set and of the check set, written into the
        ``threshold_set`` and ``stability`` columns (``("relaxed", "mtp")`` when the
        relaxed thresholds define suitable cells).
    backend : {"auto", "mcp", "dijkstra", "tiled"}
        Cost-distance solver (:class:`~screener.costdistance.CostGraph`).
    memory_mb : float or None
        Working memory of the cost-distance solver, MB (None: no limit).

    Raises
    ------
    InputError
        On a negative or non-finite distance, area or slack, an unknown resistance,
        or ``threshold_names`` that are not two distinct names.

    Examples
    --------
    >>> p = IsolationParameters(min_gap_km=8)
    >>> p.min_gap_km, p.resistance
    (8.0, 'linear')
    """

    min_gap_km: float = MIN_GAP_KM
    min_patch_km2: float = MIN_PATCH_KM2
    within_range_min_km: float = WITHIN_RANGE_MIN_KM
    resistance: str = RESISTANCE
    corridor_slack: float = CORRIDOR_SLACK
    threshold_names: tuple = ("mtp", "relaxed")
    backend: str = "auto"
    memory_mb: float | None = None

    def __post_init__(self):
        for name in ("min_gap_km", "min_patch_km2", "within_range_min_km",
                     "corridor_slack"):
            v = getattr(self, name)
            try:
                ok = bool(np.isfinite(v)) and v >= 0
            except TypeError:
                ok = False
            if not ok:
                raise InputError(f"`{name}` must be a finite number >= 0; got {v!r}.")
            object.__setattr__(self, name, float(v))
        if self.resistance not in _RESISTANCES:
            raise InputError(
                f"resistance must be 'linear' or 'log'; got {self.resistance!r}."
            )
        names = tuple(self.threshold_names)
        if len(names) != 2 or names[0] == names[1] or not all(
            isinstance(n, str) and n for n in names
        ):
            raise InputError(
                "`threshold_names` must be two different names (primary set, check "
                f"set), e.g. ('mtp', 'relaxed'); got {self.threshold_names!r}."
            )
        object.__setattr__(self, "threshold_names", names)

    @classmethod
    def from_settings(cls, settings, **changes) -> IsolationParameters:
        """The parameters of a loaded project (``[isolation]`` and the solver memory
        of ``[compute]``), with ``changes`` on top (e.g. ``threshold_names``)."""
        iso = settings.isolation
        values = dict(
            min_gap_km=iso.min_gap_km,
            min_patch_km2=iso.min_patch_km2,
            within_range_min_km=iso.within_range_min_km,
            resistance=iso.resistance,
            memory_mb=settings.compute.memory_mb or None,
        )
        values.update(changes)
        return cls(**values)


@dataclass(frozen=True, eq=False)
class SiteLayers:
    """Optional rasters summarised per site (each of shape (n_rows, n_cols)).

    Attributes
    ----------
    agreement : ndarray or None
        Model agreement in [0, 1]; the mean over a site's cells is reported.
    mess : ndarray or None
        MESS; the share of a site's cells below 0 is ``novel_share``.
    elevation : ndarray or None
        Metres; the minimum and maximum over a site's cells are reported.
    clamped : ndarray or None
        1 where some taxon's model was clamped (a predictor beyond its calibration
        range), 0 elsewhere; the share of a site's cells at 1 is ``clamped_share``.
    """

    agreement: np.ndarray | None = None
    mess: np.ndarray | None = None
    elevation: np.ndarray | None = None
    clamped: np.ndarray | None = None


@dataclass(frozen=True, eq=False)
class Clade:
    """The maps and records of a clade of sister taxa on one grid: the stage's input.

    Attributes
    ----------
    grid : Grid
    suitability : dict of str to ndarray (n_rows, n_cols)
        One map per taxon in [0, 1], NaN outside ``grid.mask``; the order of the
        keys is the order of the taxa in every output (ties go to the first).
    records : dict of str to tuple (rows, cols)
        Record cells per taxon, checked on construction and held as int64 arrays.
    layers : SiteLayers
        Rasters summarised per site.
    resistance : ndarray or None
        A resistance raster (cost per km) instead of one from the clade suitability.
    impassable : ndarray of bool or None
        Cells no path may cross (e.g. open water for a terrestrial taxon).

    Raises
    ------
    InputError, RecordsError
        On no maps, maps of another shape than the grid, or records missing, not
        whole numbers, of unequal lengths or off the grid.
    """

    grid: Grid
    suitability: dict
    records: dict
    layers: SiteLayers = field(default_factory=SiteLayers)
    resistance: np.ndarray | None = None
    impassable: np.ndarray | None = None

    def __post_init__(self):
        grid = self.grid
        if not self.suitability:
            raise InputError("`suitability` is empty: give one map per taxon.")
        for t, s in self.suitability.items():
            if np.shape(s) != grid.shape:
                raise InputError(
                    f"The suitability map of {t!r} has shape {np.shape(s)}, but the grid "
                    f"is {grid.shape}; predict every taxon on the same grid."
                )
        missing = [t for t in self.suitability if t not in self.records]
        if missing:
            raise RecordsError(
                f"No records given for {missing}; every taxon with a suitability map "
                "needs its (rows, cols) records."
            )
        checked = {}
        for t in self.suitability:
            given = [np.atleast_1d(np.asarray(v)) for v in self.records[t]]
            if len(given) != 2:
                raise RecordsError(
                    f"Records of {t!r} must be a pair of arrays (rows, cols); got "
                    f"{len(given)} arrays."
                )
            for v in given:
                if v.size and not (np.issubdtype(v.dtype, np.number)
                                   and np.all(np.isfinite(v)) and np.all(v == np.round(v))):
                    raise RecordsError(
                        f"Records of {t!r} must be whole row and column numbers of the "
                        f"grid; got {v[:3].tolist()}...  Convert coordinates with "
                        "Grid.rowcol first."
                    )
            rows, cols = (v.astype(np.int64) for v in given)
            if rows.shape != cols.shape or rows.size == 0:
                raise RecordsError(
                    f"Records of {t!r} must be two equal-length, non-empty arrays "
                    f"(rows, cols); got {rows.shape} and {cols.shape}."
                )
            bad = (rows < 0) | (rows >= grid.n_rows) | (cols < 0) | (cols >= grid.n_cols)
            if bad.any():
                raise RecordsError(
                    f"{int(bad.sum())} records of {t!r} lie outside the grid "
                    f"{grid.shape} (first: row {rows[bad][0]}, col {cols[bad][0]}); "
                    "check the CRS and the (row, col) order."
                )
            off = ~grid.mask[rows, cols]
            if off.any():
                log.warning("%d records of %r fall on nodata cells", int(off.sum()), t)
            checked[t] = (rows, cols)
        object.__setattr__(self, "suitability", dict(self.suitability))
        object.__setattr__(self, "records", checked)

    @property
    def taxa(self) -> list:
        """Taxon names, in the order of ``suitability``."""
        return list(self.suitability)

    def check_thresholds(self, thresholds, name: str = "thresholds") -> dict:
        """``thresholds`` as a dict of float per taxon.

        Raises
        ------
        InputError
            When a taxon has no threshold or one that is not a finite number.
        """
        missing = [t for t in self.taxa if t not in thresholds]
        if missing:
            raise InputError(
                f"`{name}` has no threshold for {missing}; give one per taxon "
                f"(keys: {sorted(thresholds)})."
            )
        for t in self.taxa:
            try:
                ok = bool(np.isfinite(float(thresholds[t])))
            except (TypeError, ValueError):
                ok = False
            if not ok:
                raise InputError(
                    f"`{name}` of {t!r} must be a finite number; got {thresholds[t]!r} "
                    "(a threshold from records that all fall on nodata cells?)."
                )
        return {t: thresholds[t] for t in self.taxa}

    def masked_suitability(self) -> np.ndarray:
        """The clade suitability (:func:`clade_suitability`), NaN off ``grid.mask``."""
        clade = clade_suitability(self.suitability)  # a new array: masked in place
        clade[~self.grid.mask] = np.nan
        return clade


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


def _site_stats(grid, sc: _SiteCells, clade, layers: SiteLayers):
    """Area, suitability, agreement, MESS, clamping and elevation per site, in one
    banded pass."""
    agreement, mess = layers.agreement, layers.mess
    elevation, clamped = layers.elevation, layers.clamped
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
        if mess is not None:
            x = sc.take(mess, r0, r1, at).astype(np.float64)
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
        "novel_share": share(nov, mess),
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



# --------------------------------------------------------------------------------------
# the chain: patches -> known ranges -> sites -> costs -> kinds -> corridors


@dataclass(frozen=True, eq=False)
class Patches:
    """8-connected components of a boolean raster, with their ground areas.

    Attributes
    ----------
    labels : ndarray of int32, shape (n_rows, n_cols)
        Component 1..n on its cells, 0 elsewhere.
    n : int
        Number of components.
    area_km2 : ndarray of float64, shape (n,)
        Geodesic ground area of component ``i`` at index ``i - 1``, km².
    suitable : ndarray of bool, shape (n_rows, n_cols), or None
        The raster the components were found in (None in a compacted set,
        :meth:`ThresholdSetSites.compact`).
    """

    labels: np.ndarray
    n: int
    area_km2: np.ndarray
    suitable: np.ndarray | None


def find_patches(grid: Grid, suitable: np.ndarray) -> Patches:
    """Patches: 8-connected components of the suitable cells and their areas.

    Parameters
    ----------
    grid : Grid
    suitable : ndarray of bool, shape (n_rows, n_cols)
        E.g. from :func:`suitable_cells`.

    Returns
    -------
    Patches
        Areas are sums of the grid's geodesic cell areas, km².

    Examples
    --------
    >>> from affine import Affine
    >>> g = Grid("EPSG:32633", Affine(1000, 0, 500000, 0, -1000, 5000000), (3, 4))
    >>> p = find_patches(g, np.array([[1, 0, 0, 1], [1, 0, 0, 0], [0, 0, 1, 1]], bool))
    >>> p.n, p.area_km2.round(2).tolist()  # ground areas: UTM's scale factor aside
    (3, [2.0, 1.0, 2.0])
    """
    suitable = np.asarray(suitable, dtype=bool)
    labels, n = ndi.label(suitable, structure=_EIGHT)
    return Patches(labels, int(n), _area_by_label(grid, labels, n), suitable)


@dataclass(frozen=True, eq=False)
class KnownRanges:
    """Patches holding records, and the cost-distance sources of each taxon.

    Attributes
    ----------
    ids : ndarray of int64
        Patch labels of the known ranges, ascending.
    taxa : dict of int to list of str
        Taxa recorded in each known range.
    sources : dict of str to ndarray of bool (n_rows, n_cols)
        Per taxon: the cells of its ranges and its record cells (on the grid mask).
    n_records : dict of int to int
        Records (all taxa) in each known range.
    """

    ids: np.ndarray
    taxa: dict
    sources: dict
    n_records: dict

    def lookup(self, n_patches: int) -> np.ndarray:
        """Bool per patch label 0..n_patches: is it a known range?"""
        out = np.zeros(n_patches + 1, bool)
        out[self.ids] = True
        return out

    def all_sources(self) -> np.ndarray:
        """Union of every taxon's sources."""
        taxa = list(self.sources)
        out = self.sources[taxa[0]].copy()
        for t in taxa[1:]:
            out |= self.sources[t]
        return out


def known_ranges(grid: Grid, patches: Patches, records: dict) -> KnownRanges:
    """Known ranges: the patches that hold records of any taxon.

    Parameters
    ----------
    grid : Grid
    patches : Patches
    records : dict of str to tuple (rows, cols)
        Record cells per taxon (e.g. :attr:`Clade.records`).

    Returns
    -------
    KnownRanges
        A record on an unsuitable cell makes no range but is still a source of its
        taxon's cost distance.
    """
    labels = patches.labels
    range_taxa: dict[int, list] = {}
    sources = {}
    for t, (rows, cols) in records.items():
        rows, cols = np.asarray(rows, np.int64), np.asarray(cols, np.int64)
        pids = np.unique(labels[rows, cols])
        pids = pids[pids > 0]
        for pid in pids:
            range_taxa.setdefault(int(pid), []).append(t)
        in_pids = np.zeros(patches.n + 1, bool)
        in_pids[pids] = True
        src = in_pids[labels]
        src[rows, cols] = True
        src &= grid.mask
        sources[t] = src
    ids = np.array(sorted(range_taxa), dtype=np.int64)
    rec_r, rec_c, _ = _pooled_records(records)
    at = labels[rec_r, rec_c]
    n_records = {int(pid): int(np.sum(at == pid)) for pid in ids}
    return KnownRanges(ids, range_taxa, sources, n_records)


def _pooled_records(records: dict):
    """Rows, columns and taxon of every record, taxa in order."""
    taxa = list(records)
    rows = np.concatenate([np.asarray(records[t][0], np.int64) for t in taxa])
    cols = np.concatenate([np.asarray(records[t][1], np.int64) for t in taxa])
    taxon = np.concatenate([[t] * len(records[t][0]) for t in taxa])
    return rows, cols, taxon


def unoccupied_patches(patches: Patches, ranges: KnownRanges,
                       min_patch_km2: float) -> np.ndarray:
    """Labels of the patches without records whose area reaches ``min_patch_km2`` (km²).

    Returns
    -------
    ndarray of int64, ascending
    """
    keep = (~ranges.lookup(patches.n)[1:]) & (patches.area_km2 >= min_patch_km2)
    return np.flatnonzero(keep) + 1


def within_range_parts(grid: Grid, patches: Patches, ranges: KnownRanges, records: dict,
                       *, min_km: float, min_patch_km2: float) -> Patches:
    """Parts of the known ranges far from every record: likely unrecorded populations.

    Parameters
    ----------
    grid : Grid
    patches : Patches
    ranges : KnownRanges
    records : dict of str to tuple (rows, cols)
    min_km : float
        Cells of a known range farther than this from every record (km, geodesic,
        cell centre to record cell centre) are candidates.
    min_patch_km2 : float
        Smallest part kept, km².

    Returns
    -------
    Patches
        8-connected components of those cells with at least ``min_patch_km2``,
        numbered 1..n in raster order of their first cell.
    """
    in_range = ranges.lookup(patches.n)[patches.labels]
    far = np.zeros(grid.shape, bool)
    if in_range.any():
        rec_r, rec_c, _ = _pooled_records(records)
        near = _Nearest(grid, rec_r, rec_c)
        # band by band, so the cell lists and distances stay small on big grids
        for r0, r1 in _row_bands(grid.shape):
            rr, cc = np.nonzero(in_range[r0:r1])
            if rr.size:
                d, _ = near.query(rr + r0, cc)
                far[rr + r0, cc] = d > min_km
    del in_range
    parts = find_patches(grid, far)
    ok = np.flatnonzero(parts.area_km2 >= min_patch_km2) + 1
    lut = np.zeros(parts.n + 1, dtype=np.int32)
    lut[ok] = np.arange(1, ok.size + 1)
    labels = lut[parts.labels]
    return Patches(labels, int(ok.size), parts.area_km2[ok - 1], labels > 0)


@dataclass(frozen=True, eq=False)
class SiteLayout:
    """Which cells belong to which site at one set of thresholds.

    Attributes
    ----------
    cells : ndarray of int32, shape (n_rows, n_cols)
        Site number per cell, 0 elsewhere: 1..``n_unoccupied`` are unoccupied
        patches (in label order), the rest within-range parts.
    patch_ids : ndarray of int64
        Patch label of each unoccupied-patch site (site ``k`` at index ``k - 1``).
    n_sites : int
    """

    cells: np.ndarray
    patch_ids: np.ndarray
    n_sites: int

    @property
    def n_unoccupied(self) -> int:
        return int(self.patch_ids.size)


def site_layout(patches: Patches, unoccupied: np.ndarray, parts: Patches) -> SiteLayout:
    """Number the sites: unoccupied patches first, then within-range parts.

    Parameters
    ----------
    patches : Patches
    unoccupied : ndarray of int
        Labels of the unoccupied patches kept (:func:`unoccupied_patches`).
    parts : Patches
        Within-range parts (:func:`within_range_parts`).
    """
    lut = np.zeros(patches.n + 1, dtype=np.int32)
    lut[unoccupied] = np.arange(1, unoccupied.size + 1)
    cells = lut[patches.labels]
    if parts.n:
        at = parts.labels > 0
        cells[at] = parts.labels[at] + unoccupied.size
    n_sites = int(cells.max()) if cells.size else 0
    return SiteLayout(cells, np.asarray(unoccupied, np.int64), n_sites)


def cost_graph(clade: Clade, parameters: IsolationParameters,
               suitability: np.ndarray | None = None) -> CostGraph:
    """The cost graph over the clade's resistance, built once for every source set.

    Parameters
    ----------
    clade : Clade
        Its ``resistance`` raster when given, else resistance from the clade
        suitability (``parameters.resistance``); ``impassable`` cells are ``inf``.
    parameters : IsolationParameters
        ``resistance``, ``backend`` and ``memory_mb``.
    suitability : ndarray, optional
        The clade suitability (:meth:`Clade.masked_suitability`), when already made.

    Returns
    -------
    CostGraph
        Costs in resistance units x km.

    References
    ----------
    .. [1] Adriaensen, F. et al. (2003). Landscape and Urban Planning 64:233-247
       (least-cost modelling).
    """
    if clade.resistance is None:
        if suitability is None:
            suitability = clade.masked_suitability()
        res = resistance_from_suitability(suitability, parameters.resistance)
    else:
        res = np.asarray(clade.resistance, dtype=np.float64)
    if clade.impassable is not None:
        res = np.where(np.asarray(clade.impassable, bool), np.inf, res)
    # `res` is ours unless the caller passed a raster
    own = clade.resistance is None or clade.impassable is not None
    return CostGraph(clade.grid, res, backend=parameters.backend, copy=not own,
                     memory_mb=parameters.memory_mb)


@dataclass(frozen=True, eq=False)
class RangeCosts:
    """Accumulated cost from each taxon's known ranges, and its minimum per site.

    Attributes
    ----------
    surfaces : dict of str to CostSurface
        Per taxon, float32 costs (resistance units x km) with the traceback.
    to_site : dict of str to ndarray of float64, shape (n_sites,)
        Least cost of any of a site's cells (``inf`` where unreached).
    cheapest : dict of str to ndarray of int64, shape (n_sites, 2)
        The (row, col) of that cell (the first in raster order on ties).
    """

    surfaces: dict
    to_site: dict
    cheapest: dict

    def least(self) -> np.ndarray:
        """Cost from all ranges: the cell-wise minimum over taxa (float32)."""
        taxa = list(self.surfaces)
        # folded in place (np.minimum.reduce of a list would stack the surfaces)
        out = self.surfaces[taxa[0]].cost.copy()
        for t in taxa[1:]:
            np.minimum(out, self.surfaces[t].cost, out=out)
        return out

    def least_to_site(self) -> np.ndarray:
        """Least cost to each site over taxa, shape (n_sites,)."""
        return np.min([self.to_site[t] for t in self.to_site], axis=0)


def cost_to_ranges(graph: CostGraph, ranges: KnownRanges, layout: SiteLayout) -> RangeCosts:
    """Accumulated cost distance from each taxon's ranges, and to each site.

    One run of the solver per taxon, from :attr:`KnownRanges.sources`.  Per-site
    costs are reduced from the float64 surface; only a float32 copy and the
    solver's compact traceback are kept (5-6 bytes per cell per taxon).

    Parameters
    ----------
    graph : CostGraph
        From :func:`cost_graph`.
    ranges : KnownRanges
    layout : SiteLayout

    Returns
    -------
    RangeCosts

    References
    ----------
    .. [1] Adriaensen, F. et al. (2003). Landscape and Urban Planning 64:233-247.
    """
    sc = _SiteCells(layout.cells, layout.n_sites)
    n_cols = layout.cells.shape[1]
    surfaces, to_site, cheapest = {}, {}, {}
    for t, src in ranges.sources.items():
        surf = graph.run(src)
        c = surf.cost
        low = _Extreme(layout.n_sites, n_cols, largest=False)
        for r0, r1, at, k in sc.bands():
            low.update(k, sc.take(c, r0, r1, at), r0 * n_cols + at)
        to_site[t] = low.value(empty=np.inf)
        cheapest[t] = low.rowcol()
        surfaces[t] = replace(surf, cost=c.astype(np.float32))
        del surf, c
    return RangeCosts(surfaces, to_site, cheapest)


def nearest_records(grid: Grid, layout: SiteLayout, records: dict):
    """Geodesic distance (km) from each site to the nearest record, and its taxon.

    The minimum over the site's cells (cell centre to record cell centre).

    Returns
    -------
    km : ndarray of float64, shape (n_sites,)
    taxon : ndarray of object, shape (n_sites,)
        Taxon of that record (ties: the first cell in raster order, then the first
        record in taxon order).
    """
    rec_r, rec_c, rec_taxon = _pooled_records(records)
    near = _Nearest(grid, rec_r, rec_c)
    n = layout.n_sites
    km = np.full(n, np.inf)
    taxon = np.array([None] * n, dtype=object)
    # a band of rows at a time; bands come in raster order and only a strictly
    # nearer band replaces the running best, so ties go to the first cell
    for r0, _, at, lab in _SiteCells(layout.cells, n).bands():
        rr, cc = np.divmod(at, grid.n_cols)
        d, j = near.query(rr + r0, cc)
        order = np.lexsort((d, lab))
        first = order[np.r_[True, np.diff(lab[order]) != 0]]
        k = lab[first]
        better = d[first] < km[k]
        km[k[better]] = d[first][better]
        taxon[k[better]] = rec_taxon[j[first][better]]
    return km, taxon


@dataclass(frozen=True, eq=False)
class SitePaths:
    """Least-cost paths from the unoccupied-patch sites back to the nearest range.

    Attributes
    ----------
    paths : dict of int to ndarray (n, 2)
        (row, col) cells per site number, from the site's cheapest cell to the range;
        only for sites some range reaches.
    nearest_taxon : ndarray of object, shape (n_unoccupied,)
        Taxon whose ranges are cheapest to reach (ties: the first taxon); None where
        unreached.
    cost_distance : ndarray of float64, shape (n_unoccupied,)
        That least cost (resistance units x km; ``inf`` where unreached).
    barrier_depth : ndarray of float64, shape (n_unoccupied,)
        ``1 - s`` at the least suitable unsuitable cell on the path (0 if none; NaN
        where unreached).
    length_km : ndarray of float64, shape (n_unoccupied,)
        Ground length of the path, km (NaN where unreached).
    """

    paths: dict
    nearest_taxon: np.ndarray
    cost_distance: np.ndarray
    barrier_depth: np.ndarray
    length_km: np.ndarray


def least_cost_paths(grid: Grid, patches: Patches, layout: SiteLayout, costs: RangeCosts,
                     suitability: np.ndarray) -> SitePaths:
    """Least-cost path of every unoccupied-patch site, and what it crosses.

    Parameters
    ----------
    grid : Grid
    patches : Patches
        Its ``suitable`` cells tell suitable from unsuitable ground.
    layout : SiteLayout
    costs : RangeCosts
    suitability : ndarray
        The clade suitability (for the barrier depth, :func:`path_profile`).

    Returns
    -------
    SitePaths

    References
    ----------
    .. [1] Adriaensen, F. et al. (2003). Landscape and Urban Planning 64:233-247.
    """
    n = layout.n_unoccupied
    taxa = list(costs.to_site)
    out = SitePaths({}, np.array([None] * n, dtype=object), np.full(n, np.inf),
                    np.full(n, np.nan), np.full(n, np.nan))
    for k in range(n):
        t_best = min(taxa, key=lambda t: costs.to_site[t][k])  # ties: first taxon
        cd = float(costs.to_site[t_best][k])
        out.cost_distance[k] = cd
        if not np.isfinite(cd):
            continue
        path = least_cost_path(costs.surfaces[t_best], costs.cheapest[t_best][k])
        path = path[::-1].copy()
        prof = path_profile(grid, path, patches.suitable, suitability)
        out.paths[k + 1] = path
        out.nearest_taxon[k] = t_best
        out.barrier_depth[k] = prof.barrier_depth
        out.length_km[k] = prof.length_km
    return out


def straight_line_to_ranges(grid: Grid, ranges: KnownRanges, layout: SiteLayout, sites):
    """Geodesic km from the edge of each given site to the nearest range edge.

    For sites no least-cost path reaches (an island across the sea).

    Parameters
    ----------
    grid : Grid
    ranges : KnownRanges
    layout : SiteLayout
    sites : iterable of int
        Site numbers.

    Returns
    -------
    dict of int to tuple (float, str or None)
        Distance (``inf`` when there is no range) and the taxon of that range cell
        (the first taxon on shared cells).
    """
    sites = list(sites)
    if not sites:
        return {}
    edge = _boundary(ranges.all_sources())
    near = _Nearest(grid, *np.nonzero(edge))
    er, ec = np.nonzero(edge)
    edge_taxon = np.empty(er.size, dtype=object)
    for t in list(ranges.sources)[::-1]:  # first taxon wins on shared cells
        edge_taxon[ranges.sources[t][er, ec]] = t
    out = {}
    for sid in sites:
        here = layout.cells == sid
        cells = np.nonzero(here)
        rim = _boundary(here)[cells]
        d, j = near.query(cells[0][rim], cells[1][rim])
        i = int(np.argmin(d)) if d.size else -1
        taxon = edge_taxon[j[i]] if i >= 0 and j[i] >= 0 else None
        out[sid] = (float(d[i]) if i >= 0 else np.inf, taxon)
    return out


def classify_sites(grid: Grid, ranges: KnownRanges, layout: SiteLayout,
                   gaps: SeparatingGaps, paths: SitePaths, min_gap_km: float) -> dict:
    """Kind of every site, and the columns that say why.

    ``within-range`` for the within-range parts; ``near-range`` for an unoccupied
    patch whose separating gap is shorter than ``min_gap_km`` (km); ``isolated`` for
    one whose gap is at least that long or that no path reaches (then ``gap_km`` is
    the straight-line geodesic distance to the nearest range,
    :func:`straight_line_to_ranges`).

    Parameters
    ----------
    grid : Grid
    ranges : KnownRanges
    layout : SiteLayout
    gaps : SeparatingGaps
        Separating gap of every patch (:func:`screener.gaps.separating_gaps`).
    paths : SitePaths
    min_gap_km : float

    Returns
    -------
    dict of str to ndarray, shape (n_sites,)
        ``kind``, ``cost_distance``, ``nearest_taxon`` (None for within-range parts:
        see :func:`nearest_records`), ``gap_km``, ``unsuitable_km``,
        ``stepping_stones``, ``barrier_depth``, ``path_km``.
    """
    n, n_unocc = layout.n_sites, layout.n_unoccupied
    pid = layout.patch_ids
    out = {
        "kind": np.array(["within-range"] * n, dtype=object),
        "cost_distance": np.zeros(n),
        "nearest_taxon": np.array([None] * n, dtype=object),
        "gap_km": np.zeros(n),
        "unsuitable_km": np.zeros(n),
        "stepping_stones": np.zeros(n, dtype=np.int64),
        "barrier_depth": np.full(n, np.nan),
        "path_km": np.zeros(n),
    }
    u = slice(0, n_unocc)
    out["unsuitable_km"][u] = np.asarray(gaps.unsuitable_km, float)[pid]
    out["stepping_stones"][u] = np.asarray(gaps.stepping_stones)[pid]
    out["cost_distance"][u] = paths.cost_distance
    out["nearest_taxon"][u] = paths.nearest_taxon
    out["barrier_depth"][u] = paths.barrier_depth
    out["path_km"][u] = paths.length_km
    reached = np.isfinite(paths.cost_distance)
    gap = np.asarray(gaps.gap_km, float)[pid]
    out["gap_km"][u] = gap
    out["kind"][u] = np.where(reached & (gap < min_gap_km), "near-range", "isolated")
    unreached = np.flatnonzero(~reached) + 1
    for sid, (km, taxon) in straight_line_to_ranges(grid, ranges, layout,
                                                   unreached).items():
        out["gap_km"][sid - 1] = km
        out["nearest_taxon"][sid - 1] = taxon
    return out


def between_ranges(costs: RangeCosts, layout: SiteLayout, slack: float) -> np.ndarray:
    """Does a site have a cell on a least-cost corridor between two taxa's ranges?

    A cell lies on the corridor between taxa A and B when ``cost_A + cost_B <= (1 +
    slack) * min(cost_A + cost_B)``.  Pairs whose ranges share a patch (least cost
    0) or are not connected have no corridor.

    Returns
    -------
    ndarray of bool, shape (n_sites,)

    References
    ----------
    .. [1] Adriaensen, F. et al. (2003). Landscape and Urban Planning 64:233-247.
    """
    corridor = np.zeros(layout.cells.shape, bool)
    for a, b in combinations(list(costs.surfaces), 2):
        tot = costs.surfaces[a].cost + costs.surfaces[b].cost
        lcd = float(np.min(tot))
        if not np.isfinite(lcd) or lcd <= 0:
            continue  # unconnected, or the two ranges touch: no gap between them
        corridor |= tot <= lcd * (1 + slack)
    return _labels_touching(layout.cells, corridor, layout.n_sites)


def site_corridors(graph: CostGraph, layout: SiteLayout, cost_all: np.ndarray,
                   site_cost: np.ndarray, slack: float) -> np.ndarray:
    """Cells on the least-cost corridor between the known ranges and a site.

    One cost run from the cells of every unoccupied-patch site; each cell is tested
    against the site it is cheapest to reach from (the one its traceback ends at):
    on the corridor when ``cost_from_ranges + cost_from_site <= (1 + slack) *
    least cost of that site``.  Sites the ranges do not reach, or that touch them
    (least cost 0), have no corridor.  One run instead of one per site: a cell on
    the corridor of a site that lies behind a nearer site is tested against the
    nearer one, so :func:`barrier_raster` adds every site's least-cost path.

    Parameters
    ----------
    graph : CostGraph
    layout : SiteLayout
    cost_all : ndarray, shape (n_rows, n_cols)
        Cost from all ranges (:meth:`RangeCosts.least`).
    site_cost : ndarray, shape (n_sites,)
        Least cost of each site (:meth:`RangeCosts.least_to_site`).
    slack : float

    Returns
    -------
    ndarray of bool, shape (n_rows, n_cols)
    """
    from screener.gaps import nearest_source_label

    cells, n_unocc = layout.cells, layout.n_unoccupied
    unocc = (cells > 0) & (cells <= n_unocc)
    if not unocc.any():
        return np.zeros(cells.shape, bool)
    surf = graph.run(unocc, dtype=np.float32)
    near = nearest_source_label(surf.predecessor.ravel(), np.where(unocc, cells, 0))
    limit = np.full(n_unocc + 1, -np.inf)
    lc = np.asarray(site_cost[:n_unocc], dtype=np.float64)
    ok = np.isfinite(lc) & (lc > 0)
    limit[1:][ok] = lc[ok] * (1.0 + slack)
    out = (cost_all + surf.cost).ravel() <= limit[near]
    return out.reshape(cells.shape)


def barrier_raster(grid: Grid, corridor: np.ndarray, paths: dict, suitable: np.ndarray,
                   suitability: np.ndarray) -> np.ndarray:
    """Barrier depth ``1 - s`` on the unsuitable cells of the corridors and paths.

    Parameters
    ----------
    grid : Grid
    corridor : ndarray of bool, shape (n_rows, n_cols)
        Corridor cells (:func:`site_corridors`); not changed.
    paths : dict of int to ndarray (n, 2)
        Least-cost paths, whose cells count as corridor (a site reached through
        another site's corridor is tested against that nearer site; its path still
        counts).
    suitable : ndarray of bool
    suitability : ndarray
        The clade suitability.

    Returns
    -------
    ndarray of float32, shape (n_rows, n_cols)
        ``1 - s`` there, 0 elsewhere on valid cells, NaN off the mask.
    """
    on = np.array(corridor, dtype=bool)
    for path in paths.values():
        on[path[:, 0], path[:, 1]] = True
    barrier = (1.0 - suitability).astype(np.float32, copy=False)
    on &= ~suitable
    barrier[~on] = 0.0
    barrier[~grid.mask] = np.nan
    return barrier


@dataclass(frozen=True, eq=False)
class ThresholdSetSites:
    """Everything found at one set of thresholds.

    Attributes
    ----------
    thresholds : dict of str to float
    patches : Patches
    ranges : KnownRanges
    layout : SiteLayout
    columns : dict of str to ndarray, shape (n_sites,)
        Per-site columns in site-number order (``row``/``col``: the most suitable cell).
    paths : dict of int to ndarray (n, 2)
        By site number.
    cost : dict of str to ndarray of float32
        Cost from each taxon's ranges (empty unless the rasters were kept).
    cost_all : ndarray of float32 or None
    barrier : ndarray of float32 or None
    """

    thresholds: dict
    patches: Patches
    ranges: KnownRanges
    layout: SiteLayout
    columns: dict
    paths: dict
    cost: dict
    cost_all: np.ndarray | None
    barrier: np.ndarray | None

    def compact(self) -> ThresholdSetSites:
        """The same with labels and site cells in the smallest integer types and
        without the suitable cells and cost sources (a set kept only for comparison
        while another runs)."""
        labels = self.patches.labels
        cells = self.layout.cells
        return replace(
            self,
            patches=replace(self.patches, suitable=None, labels=labels.astype(
                np.min_scalar_type(int(labels.max()) if labels.size else 0), copy=False)),
            ranges=replace(self.ranges, sources={}),
            layout=replace(self.layout, cells=cells.astype(
                np.min_scalar_type(self.layout.n_sites), copy=False)),
        )


def _sites_at(clade: Clade, suitability: np.ndarray, graphs: list, thresholds: dict,
              parameters: IsolationParameters, *, full: bool, last: bool):
    """Run the chain at one set of thresholds.

    ``full=False`` (the check set) keeps no rasters beyond the labels and site
    cells.  ``graphs`` holds the one cost graph; the ``last`` set takes it out once
    its surfaces are built, so the solver's resistance is freed for the rest.
    """
    grid, taxa, p = clade.grid, clade.taxa, parameters
    graph = graphs.pop() if last else graphs[0]
    suitable = suitable_cells(grid, clade.suitability, thresholds)
    patches = find_patches(grid, suitable)
    del suitable
    ranges = known_ranges(grid, patches, clade.records)
    parts = within_range_parts(grid, patches, ranges, clade.records,
                               min_km=p.within_range_min_km, min_patch_km2=p.min_patch_km2)
    layout = site_layout(patches, unoccupied_patches(patches, ranges, p.min_patch_km2),
                         parts)
    del parts
    # separating gap of every patch: minimax over all routes from the ranges, suitable
    # patches (of any size) as stepping stones; on the cells the cost graph may cross
    gaps = separating_gaps(grid, patches.labels, patches.n, ranges.ids,
                           passable=graph.passable, backend=graph.backend,
                           memory_mb=p.memory_mb)
    sc = _SiteCells(layout.cells, layout.n_sites)
    columns, best = _site_stats(grid, sc, suitability, clade.layers)
    columns.update(_taxon_fit(grid, sc, clade.suitability, thresholds, taxa))
    costs = cost_to_ranges(graph, ranges, layout)
    cost_all = corridor = None
    if full:
        cost_all = costs.least()
        corridor = site_corridors(graph, layout, cost_all, costs.least_to_site(),
                                  p.corridor_slack)
    del graph
    rec_km, rec_taxon = nearest_records(grid, layout, clade.records)
    paths = least_cost_paths(grid, patches, layout, costs, suitability)
    kinds = classify_sites(grid, ranges, layout, gaps, paths, p.min_gap_km)
    within = slice(layout.n_unoccupied, layout.n_sites)
    kinds["nearest_taxon"][within] = rec_taxon[within]
    columns.update(kinds)
    columns["row"], columns["col"] = best[:, 0], best[:, 1]
    for t in taxa:
        columns[f"cost_to_{t}"] = costs.to_site[t]
    columns["nearest_record_km"] = rec_km
    columns["between_ranges"] = between_ranges(costs, layout, p.corridor_slack)
    barrier = None
    if full:
        barrier = barrier_raster(grid, corridor, paths.paths, patches.suitable, suitability)
    del corridor
    return ThresholdSetSites(
        thresholds=dict(thresholds), patches=patches, ranges=ranges, layout=layout,
        columns=columns, paths=paths.paths,
        cost={t: s.cost for t, s in costs.surfaces.items()} if full else {},
        cost_all=cost_all, barrier=barrier,
    )


def merge_threshold_sets(grid: Grid, primary: ThresholdSetSites,
                         check: ThresholdSetSites | None, names: tuple) -> CandidateSet:
    """One table of sites from the primary threshold set and the check set.

    Every site of the primary set is kept, with ``stability`` ``"both"`` when it
    touches a site of the check set and ``"<primary>-only"`` otherwise; sites of the
    check set that touch no primary site are added as ``"<check>-only"``.  Sites are
    numbered 1.. in order: primary set first, then by kind (isolated, near-range,
    within-range), larger area first, then north-west first.

    Parameters
    ----------
    grid : Grid
    primary : ThresholdSetSites
        With its rasters (``cost``, ``barrier``).
    check : ThresholdSetSites or None
        None: ``stability`` is ``"untested"``.
    names : tuple of two str
        Names of the primary and the check set.

    Returns
    -------
    CandidateSet
        ``relaxed_block`` is the patch holding a site at the broader of the two sets
        (all thresholds lower or equal), -1 outside every patch.
    """
    p_name, s_name = names
    n_p = primary.layout.n_sites
    parts = [_select(primary.columns, np.arange(n_p))]
    parts[0].update(threshold_set=np.array([p_name] * n_p, dtype=object))
    if check is None:
        parts[0]["stability"] = np.array(["untested"] * n_p, dtype=object)
    else:
        n_c = check.layout.n_sites
        both = _labels_touching(primary.layout.cells, check.layout.cells > 0, n_p)
        parts[0]["stability"] = np.where(both, "both", f"{p_name}-only").astype(object)
        only = np.flatnonzero(~_labels_touching(check.layout.cells,
                                                primary.layout.cells > 0, n_c))
        extra = _select(check.columns, only)
        extra["threshold_set"] = np.array([s_name] * only.size, dtype=object)
        extra["stability"] = np.array([f"{s_name}-only"] * only.size, dtype=object)
        parts.append(extra)
    local = [np.arange(1, n_p + 1)] + ([only + 1] if check is not None else [])
    cols = {c: np.concatenate([part[c] for part in parts]) for c in parts[0]}
    local = np.concatenate(local)
    from_primary = np.arange(local.size) < n_p
    # blocks for grouping come from the broader of the two sets
    block_labels = primary.patches.labels
    if check is not None and all(
        check.thresholds[t] <= primary.thresholds[t] for t in primary.thresholds
    ):
        block_labels = check.patches.labels
    block = block_labels[cols["row"], cols["col"]].astype(np.int64)
    cols["relaxed_block"] = np.where(block > 0, block, -1)
    kind_order = np.array([_KIND_ORDER[k] for k in cols["kind"]], dtype=np.int64)
    order = np.lexsort((cols["col"], cols["row"], -cols["area_km2"], kind_order,
                        ~from_primary))
    cols = {c: v[order] for c, v in cols.items()}
    local, from_primary = local[order], from_primary[order]
    site_id = np.arange(1, local.size + 1, dtype=np.int64)
    cols["site_id"] = site_id
    # site ids painted through one lookup table per threshold set: primary sites are
    # disjoint, and check-only sites touch no primary site
    lut_p = np.zeros(n_p + 1, dtype=np.int32)
    lut_p[local[from_primary]] = site_id[from_primary]
    paths = {}
    for sid, k, mine in zip(site_id.tolist(), local.tolist(), from_primary.tolist(),
                            strict=True):
        path = (primary if mine else check).paths.get(k)
        if path is not None:
            paths[sid] = path
    site_lab = lut_p[primary.layout.cells]
    if check is not None:
        lut_c = np.zeros(check.layout.n_sites + 1, dtype=np.int32)
        lut_c[local[~from_primary]] = site_id[~from_primary]
        only_lab = lut_c[check.layout.cells]
        site_lab = np.where(only_lab > 0, only_lab, site_lab)
        del only_lab
    labels = primary.patches.labels
    in_range = primary.ranges.lookup(primary.patches.n)[labels] & (site_lab == 0)
    site_lab[in_range] = -labels[in_range]
    del in_range
    return CandidateSet(
        sites=_site_table(grid, cols, list(primary.thresholds)),
        patch_labels=site_lab,
        paths=paths,
        barrier=primary.barrier,
        cost=primary.cost,
        cost_all=primary.cost_all,
        ranges=ranges_table(primary.patches, primary.ranges),
        thresholds=dict(primary.thresholds),
        relaxed_thresholds=None if check is None else dict(check.thresholds),
    )


def ranges_table(patches: Patches, ranges: KnownRanges) -> pd.DataFrame:
    """The known ranges as a table.

    Returns
    -------
    pandas.DataFrame
        ``range_id`` (patch label), ``taxa`` (comma-separated), ``area_km2`` (km²),
        ``n_cells``, ``n_records``.
    """
    labels = patches.labels
    return pd.DataFrame(
        {
            "range_id": ranges.ids.astype(np.int64),
            "taxa": [",".join(ranges.taxa[int(i)]) for i in ranges.ids],
            "area_km2": [float(patches.area_km2[i - 1]) for i in ranges.ids],
            "n_cells": [int(n) for n in np.bincount(
                labels.ravel(), minlength=int(labels.max()) + 1)[ranges.ids]],
            "n_records": [ranges.n_records[int(i)] for i in ranges.ids],
        }
    )


def _select(columns: dict, at: np.ndarray) -> dict:
    return {c: np.asarray(v)[at] for c, v in columns.items()}


#: The columns the stage makes, in the order it makes them (the order of the
#: GeoPackage ``sites`` layer).  Names, types, units and meanings are in the one
#: registry, :data:`screener.columns.CANDIDATES`; ``<taxon>`` stands for one column
#: per taxon.
STAGE_COLUMNS = (
    "site_id", "kind", "threshold_set", "row", "col", "x", "y", "longitude", "latitude",
    "area_km2", "n_cells", "mean_suitability", "max_suitability", "agreement",
    "novel_share", "clamped_share", "elevation_min", "elevation_max", "cost_distance",
    "cost_to_<taxon>", "nearest_taxon", "suitable_for", "niche_fit", "margin_<taxon>",
    "gap_km", "unsuitable_km", "stepping_stones", "barrier_depth", "path_km",
    "nearest_record_km", "between_ranges", "stability", "relaxed_block",
)


def site_columns(taxa) -> list:
    """Columns of :attr:`CandidateSet.sites`, in order, for these taxa.

    Examples
    --------
    >>> [c for c in site_columns(["A", "B"]) if c.startswith("margin_")]
    ['margin_A', 'margin_B']
    """
    out = []
    for name in STAGE_COLUMNS:
        if "<taxon>" in name:
            out.extend(name.replace("<taxon>", str(t)) for t in taxa)
        else:
            out.append(name)
    return out


_PANDAS_DTYPE = {"int": "int64", "float": "float64", "str": "object", "bool": "bool"}


def _site_table(grid: Grid, cols: dict, taxa) -> pd.DataFrame:
    """The sites as a table in :func:`site_columns` order, with coordinates; an empty
    table has the registry's types (:data:`screener.columns.CANDIDATES`)."""
    names = site_columns(taxa)
    r_, c_ = cols["row"], cols["col"]
    if not r_.size:
        # site_id is a number until the plan names the sites (S01, ...)
        return pd.DataFrame({
            c: pd.Series(dtype="int64" if c == "site_id"
                         else _PANDAS_DTYPE[find_column(CANDIDATES, c).dtype])
            for c in names
        })
    x, y = grid.xy(r_, c_)
    lon, lat = grid.lonlat(r_, c_)
    cols["x"], cols["y"] = np.atleast_1d(x), np.atleast_1d(y)
    cols["longitude"], cols["latitude"] = np.atleast_1d(lon), np.atleast_1d(lat)
    sites = pd.DataFrame({c: cols[c] for c in names})
    for c in ("nearest_taxon", "suitable_for"):
        sites[c] = sites[c].astype(object)
    return sites


def find_candidates(clade: Clade, thresholds: dict, relaxed_thresholds: dict | None = None,
                    parameters: IsolationParameters | None = None) -> CandidateSet:
    """Find suitable patches cut off from the known ranges of a clade.

    The whole chain (see the module docstring): :func:`suitable_cells`,
    :func:`find_patches`, :func:`known_ranges`, :func:`within_range_parts`,
    :func:`cost_to_ranges`, :func:`screener.gaps.separating_gaps`,
    :func:`least_cost_paths`, :func:`classify_sites`, :func:`between_ranges`,
    :func:`site_corridors` and :func:`merge_threshold_sets`.

    Parameters
    ----------
    clade : Clade
        Maps, records and the rasters summarised per site.
    thresholds : dict of str to float
        Per-taxon threshold that defines suitable cells (e.g. minimum training
        presence); inclusive.
    relaxed_thresholds : dict of str to float, optional
        A second set, the check (usually broader); sites found only there are
        ``<second name>-only``.
    parameters : IsolationParameters, optional
        Defaults: the project file's.

    Returns
    -------
    CandidateSet
        ``sites`` columns (:func:`site_columns`): ``site_id, kind, threshold_set,
        row, col, x, y, longitude, latitude, area_km2, n_cells, mean_suitability,
        max_suitability, agreement, novel_share, clamped_share, elevation_min,
        elevation_max, cost_distance, cost_to_<taxon>, nearest_taxon, suitable_for,
        niche_fit, margin_<taxon>, gap_km, unsuitable_km, stepping_stones,
        barrier_depth, path_km, nearest_record_km, between_ranges, stability,
        relaxed_block``.  ``row``/``col`` is the site's most suitable cell;
        ``mean_suitability`` is area-weighted; ``stability`` is ``"both"``,
        ``"<first>-only"``, ``"<second>-only"`` (names from
        ``parameters.threshold_names``) or ``"untested"`` (no second set).

    Raises
    ------
    InputError
        On a missing threshold or one that is not a finite number.

    References
    ----------
    .. [1] Adriaensen, F. et al. (2003). Landscape and Urban Planning 64:233-247
       (least-cost modelling).
    .. [2] Pearson, R. G. et al. (2007). J. Biogeography 34:102-117 (lowest presence
       threshold).
    """
    p = IsolationParameters() if parameters is None else parameters
    clade.check_thresholds(thresholds)
    if relaxed_thresholds is not None:
        clade.check_thresholds(relaxed_thresholds, "relaxed_thresholds")
    notes = []
    short = gap_resolution_note(clade.grid, p.min_gap_km)
    if short:
        log.warning(short)
        notes.append(short)
    suitability = clade.masked_suitability()
    graphs = [cost_graph(clade, p, suitability)]
    # The check set runs first and keeps only its labels and site cells, so that its
    # other rasters are gone before the primary set, whose rasters are returned, is
    # built.
    check = None
    if relaxed_thresholds is not None:
        check = _sites_at(clade, suitability, graphs, relaxed_thresholds, p,
                          full=False, last=False).compact()
    primary = _sites_at(clade, suitability, graphs, thresholds, p, full=True, last=True)
    out = merge_threshold_sets(clade.grid, primary, check, p.threshold_names)
    out = replace(out, thresholds=dict(thresholds),
                  relaxed_thresholds=None if relaxed_thresholds is None
                  else dict(relaxed_thresholds),
                  warnings=tuple(notes))
    log.info("%d candidate sites (%s)", len(out.sites),
             out.sites["kind"].value_counts().to_dict() if len(out.sites) else {})
    return out


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
