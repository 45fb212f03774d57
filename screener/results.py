"""Typed values handed from stage to stage and to the writers.

Every stage returns plain values (numpy arrays, pandas/geopandas frames, dataclasses);
:class:`RunResult` gathers what one run produced so writers, the report and a notebook
user see the same objects.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:  # names for the annotations only: results.py imports no stage
    import geopandas as gpd
    import pandas as pd

    from screener.grid import Grid
    from screener.isolation import CandidateSet
    from screener.slices import SliceSet

__all__ = [
    "RecordDrop",
    "TaxonRecords",
    "Threshold",
    "TaxonResult",
    "OverlapResult",
    "PlanResult",
    "RunResult",
]


@dataclass(frozen=True)
class RecordDrop:
    """One record row that intake did not keep, and why.

    Attributes
    ----------
    line : int
        Line number in the source file (the header is line 1).
    taxon : str
        Taxon named on the row ("" when the taxon cell itself was bad).
    reason : str
        Plain-words reason, e.g. "latitude 95.0 is beyond +/-90".
    occurrence_id : str
        The record's Darwin Core occurrenceID ("" when the file has none).
    """

    line: int
    taxon: str
    reason: str
    occurrence_id: str = ""


@dataclass(eq=False)
class TaxonRecords:
    """The kept records of one taxon, one per grid cell.

    Attributes
    ----------
    taxon : str
    lon, lat : ndarray of float, shape (n,)
        WGS84 degrees.
    x, y : ndarray of float, shape (n,)
        Grid CRS coordinates.
    rows, cols : ndarray of int, shape (n,)
        Grid cells.
    lines : ndarray of int, shape (n,)
        Source line numbers.
    sensitive : bool
        True when coordinates must be generalised in shareable outputs.
    """

    taxon: str
    lon: np.ndarray
    lat: np.ndarray
    x: np.ndarray
    y: np.ndarray
    rows: np.ndarray
    cols: np.ndarray
    lines: np.ndarray
    sensitive: bool = False

    @property
    def n(self) -> int:
        return int(len(self.rows))


@dataclass(frozen=True)
class Threshold:
    """A suitability threshold, its area and its omission of training records.

    Attributes
    ----------
    name : str
        "mtp", "p10", "relaxed" or "maxsss".
    value : float
        Suitability cut-off; a cell is suitable when its value is >= this.
    area_km2 : float
        Ground area of the cells at or above the cut-off.
    training_omission : float
        Share of training records below the cut-off.
    """

    name: str
    value: float
    area_km2: float
    training_omission: float


@dataclass(eq=False)
class TaxonResult:
    """What the model stage produced for one taxon.

    Attributes
    ----------
    taxon : str
    records : TaxonRecords
    suitability : ndarray of float32, shape (n_rows, n_cols)
        Consensus suitability in [0, 1], NaN outside the valid mask.
    family_maps : dict of str to ndarray
        Per-family suitability maps (same convention).
    agreement : ndarray or None
        Share of families that call a cell suitable at their own threshold.
    mess : ndarray or None
        Multivariate environmental similarity surface; < 0 is novel environment.
    clamped : ndarray of float32 or None
        1 where a predictor lies outside the taxon's calibration range (records and
        background), so its mapped suitability was clamped (or extrapolated with
        ``[models] clamp = false``); 0 inside; NaN off the mask.
    most_dissimilar : ndarray of int16 or None
        Index of the layer that is most dissimilar at each cell (-1 outside mask).
    thresholds : dict of str to Threshold
        Consensus-map thresholds ("mtp", "relaxed", ...).
    accessible : ndarray of bool
        The accessible area (calibration area) used for background.
    evaluation : list of dict
        Rows of evaluation.csv for this taxon (one per family plus the ensemble).
    presence_env, background_env : ndarray or None
        Predictor values at the records, shape (n, p), and at the background cells,
        shape (m, p), as used for calibration.
    background_cells : tuple of ndarray or None
        ``(rows, cols)`` of the background cells.
    seed : int or None
        Seed of this taxon's random draws.
    ensemble_weights : dict of str to float
        Weight of each family in the consensus map.
    slice_maps : dict of str to dict of str to ndarray
        Per time slice, each family's fitted model mapped over the slice's layers
        (the same model as above, not refitted; float32, NaN off the slice's mask).
    """

    taxon: str
    records: TaxonRecords
    suitability: np.ndarray
    family_maps: dict = field(default_factory=dict)
    agreement: np.ndarray | None = None
    mess: np.ndarray | None = None
    clamped: np.ndarray | None = None
    most_dissimilar: np.ndarray | None = None
    thresholds: dict = field(default_factory=dict)
    accessible: np.ndarray | None = None
    evaluation: list = field(default_factory=list)
    figures: dict = field(default_factory=dict)
    presence_env: np.ndarray | None = None
    background_env: np.ndarray | None = None
    background_cells: tuple | None = None
    seed: int | None = None
    ensemble_weights: dict = field(default_factory=dict)
    slice_maps: dict = field(default_factory=dict)


@dataclass(frozen=True, eq=False)
class OverlapResult:
    """What the overlap stage produced for every pair of taxa.

    Attributes
    ----------
    table : pandas.DataFrame
        Rows of overlap.csv (no rows with fewer than two taxa).
    readings : list of str
        Plain-words reading per pair.
    comparisons : list
        :class:`screener.overlap.PairComparison` per pair (null distributions etc.).
    """

    table: pd.DataFrame
    readings: list = field(default_factory=list)
    comparisons: list = field(default_factory=list)


@dataclass(frozen=True, eq=False)
class PlanResult:
    """What the site stage produced: ranked sites and the rasters behind them.

    Attributes
    ----------
    sites : geopandas.GeoDataFrame
        Candidate sites, best first, with the columns of candidates.csv.
    paths : geopandas.GeoDataFrame or None
        Least-cost paths (LineStrings).
    barrier : ndarray or None
        Barrier map (float32), NaN where no barrier.
    access_hours : ndarray or None
        Walking hours from the nearest start point.
    candidates : screener.isolation.CandidateSet
        Patch labels and cost surfaces behind the sites.
    clade_mess : ndarray or None
        MESS against the pooled calibration background of all taxa.
    routes : dict
        Walking route to each reachable site (site_id -> route), when start points are
        given.
    start_points : pandas.DataFrame or None
        The start points the routes begin at.
    slices : screener.slices.SliceSet or None
        Time slices: projections, climatic stability and the sites' history.
    """

    sites: gpd.GeoDataFrame
    paths: gpd.GeoDataFrame | None
    barrier: np.ndarray | None
    access_hours: np.ndarray | None
    candidates: CandidateSet
    clade_mess: np.ndarray | None
    routes: dict = field(default_factory=dict)
    start_points: pd.DataFrame | None = None
    slices: SliceSet | None = None


@dataclass(frozen=True, eq=False)
class RunResult:
    """Everything one run produced, for writers, the report and notebooks.

    Frozen: a changed copy is made with :func:`dataclasses.replace`.

    Attributes
    ----------
    grid : screener.grid.Grid
    layer_names : list of str
    elevation : ndarray or None
        Elevation in metres where an elevation layer is named, else None.
    taxa : dict of str to TaxonResult
    dropped : list of RecordDrop
        Every record row intake did not keep.
    overlap : pandas.DataFrame
        Rows of overlap.csv.
    overlap_readings : list of str
        Plain-words reading per pair.
    sites : geopandas.GeoDataFrame
        Candidate sites, best first (rank 1 first), polygons in the grid CRS, with the
        columns of candidates.csv.
    paths : geopandas.GeoDataFrame or None
        Least-cost paths as LineStrings, one per isolated / near-range site.
    barrier : ndarray or None
        Barrier map (float32), NaN where no barrier.
    access_hours : ndarray or None
        Walking hours from the nearest start point.
    sampling_points : pandas.DataFrame or None
        Suggested sampling points per site: site_id, point_id, longitude, latitude, x, y,
        suitability.
    settings : dict
        The resolved settings of the run.
    provenance : dict
        Versions, input hashes, seeds, timings, warnings.
    warnings : list of str
        Warnings raised during the run, in plain words.
    intake_summary : list of str
        Plain-words lines on the grid, layers and records (what intake kept/dropped).
    comparisons : list
        :class:`screener.overlap.PairComparison` per pair (null distributions etc.).
    candidates : screener.isolation.CandidateSet or None
        Rasters behind the sites (patch labels, cost surfaces).
    routes : dict of str to screener.routes.WalkingRoute
        Walking route from the nearest start point to each reachable site, by
        site id (empty without start points and elevation).
    start_points : pandas.DataFrame or None
        The start points (``name``, ``longitude``, ``latitude``) on the grid.
    clade_mess : ndarray or None
        MESS against the pooled calibration background of all taxa.
    slices : screener.slices.SliceSet or None
        Time slices: projections, climatic stability and the sites' history.
    """

    grid: Grid
    layer_names: list
    taxa: dict
    sites: gpd.GeoDataFrame
    dropped: list = field(default_factory=list)
    overlap: pd.DataFrame | None = None
    overlap_readings: list = field(default_factory=list)
    paths: gpd.GeoDataFrame | None = None
    barrier: np.ndarray | None = None
    elevation: np.ndarray | None = None
    hillshade: np.ndarray | None = None
    access_hours: np.ndarray | None = None
    sampling_points: pd.DataFrame | None = None
    settings: dict = field(default_factory=dict)
    provenance: dict = field(default_factory=dict)
    warnings: list = field(default_factory=list)
    figures: dict = field(default_factory=dict)
    intake_summary: list = field(default_factory=list)
    comparisons: list = field(default_factory=list)
    candidates: CandidateSet | None = None
    clade_mess: np.ndarray | None = None
    routes: dict = field(default_factory=dict)
    start_points: pd.DataFrame | None = None
    slices: SliceSet | None = None
