"""An invented demo scenario: the fictional island of Meruvane and its mountain frogs.

Everything here is made up and generated from a seed with numpy and scipy: the island,
its five massifs, the climate layers, the three sister taxa of the invented frog genus
*Nebrivex*, their museum records, the villages and the past surveys.  The scenario
exists so that the whole screener can be run, taught and tested end to end on data
that look like a real project, including the flaws a real records file has.

Meruvane lies in open ocean in the southern tropics (about 85 deg E, 14.75 deg S, on a
WGS84 longitude/latitude grid of 0.005 deg cells, about 0.54 km x 0.55 km).  Its
massifs are separated by lowland below :data:`LOWLAND_MAX_M`; three of them carry
records (one taxon each), one small leeward massif has far less suitable forest, and one
massif, Hullavar, is as cool and wet as the recorded ones but has no records at all:
the isolated candidate a run of the screener should find (:data:`DEMO_TRUTH`).

.. warning::
   The scenario is fiction.  On a real island, a suitability map is a hypothesis for a
   survey, not proof that a population exists; survey teams need permits and the
   consent of landholders, must follow amphibian biosecurity hygiene between massifs
   (disinfect boots and gear, since pathogens travel between sites on equipment), plan
   for the field hazards of steep cloud forest, and should generalise the coordinates
   of threatened taxa in anything they share.

Only :func:`write_demo_scenario` touches files; :func:`make_demo_scenario` returns
everything as plain arrays and dataclasses.
"""

from __future__ import annotations

import csv
import datetime as _dt
import io
import logging
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from affine import Affine
from scipy import ndimage

from screener.errors import InputError, OutputError
from screener.grid import Grid

__all__ = [
    "ISLAND_NAME",
    "SCENARIO_NAME",
    "GENUS",
    "TAXA",
    "DEFAULT_SEED",
    "SIZES",
    "CELL_DEG",
    "NODATA",
    "LOWLAND_MAX_M",
    "LAPSE_RATE_C_PER_KM",
    "LAYER_NAMES",
    "PAST_SLICE",
    "PAST_LAYER_NAMES",
    "Massif",
    "MASSIFS",
    "Niche",
    "NICHES",
    "MassifTruth",
    "DemoTruth",
    "DEMO_TRUTH",
    "DemoScenario",
    "demo_grid",
    "demo_truth",
    "niche_suitability",
    "make_demo_scenario",
    "write_demo_scenario",
]

logger = logging.getLogger(__name__)

#: Name of the invented island.
ISLAND_NAME = "Meruvane"
#: Name written to ``[project] name`` of the demo project file.
SCENARIO_NAME = "Meruvane mountain frogs (invented demo)"
#: Invented genus of montane frogs.
GENUS = "Nebrivex"
#: Seed used by ``demo_data/make_demo.py``.
DEFAULT_SEED = 20260917
#: Grid shapes ``(n_rows, n_cols)`` per size.
SIZES = {"full": (300, 400), "small": (100, 130)}
#: Cell size in degrees (about 0.54 km east-west and 0.55 km north-south here).
CELL_DEG = 0.005
#: Nodata value of the written GeoTIFFs (the sea).
NODATA = -9999.0
#: Every massif's upland (cells at or above this elevation, in m, 8-connected) is
#: separated from every other massif's by lowland below it.
LOWLAND_MAX_M = 300.0
#: Temperature lapse rate, deg C per km of elevation: that of the ICAO standard
#: atmosphere (6.5 K/km; from memory).
LAPSE_RATE_C_PER_KM = 6.5
#: Layer file stems, in the order they are written.
LAYER_NAMES = ("elevation", "temperature", "moisture", "cloud")
#: Name of the invented past time slice: a cold stage with a lower sea level.
PAST_SLICE = "cold_stage"
#: Layers written for the past slice (elevation does not change and is no predictor).
PAST_LAYER_NAMES = ("temperature", "moisture", "cloud")
#: Cold stage: cooling (deg C) in the west of the island, where an invented cold
#: current ran along the coast, and in the east; it changes linearly between.
PAST_COOLING_C = (8.0, 2.0)
#: Cold stage: the cloud belt sat this many m lower per deg C of cooling.
PAST_CLOUD_DROP_M_PER_C = 150.0
#: Cold stage: width (km) of the sea shelf exposed by the lower sea level.
PAST_SHELF_KM = 2.5

#: Centre of the island grid, WGS84 degrees (open Indian Ocean, no real land near).
_CENTRE_LON = 85.0
_CENTRE_LAT = -14.75
_SEA_LEVEL_T_C = 26.5
_LAT_T_C_PER_DEG = 0.3  # warmer towards the equator
#: Direction the trade wind blows *towards*, as (east, north): from the south-east.
_WIND_TOWARDS = (-math.sqrt(0.5), math.sqrt(0.5))
_CLOUD_BELT_M = 1650.0
#: Moisture (mm/yr) gained towards the windward coast and lost towards the lee coast.
_RAIN_SHADOW_MM = 1200.0


@dataclass(frozen=True)
class Massif:
    """One invented massif, laid out in fractions of the grid.

    Attributes
    ----------
    name : str
        Invented name.
    u, v : float
        Centre as fractions of the grid width (west to east) and height (north to
        south).
    peak_m : float
        Approximate summit elevation, m.
    sigma_frac : float
        Size of the massif's main bump as a fraction of the grid width.
    aspect : float
        Ratio of the long to the short axis.
    angle_deg : float
        Direction of the long axis, degrees anticlockwise from east.
    taxon : str or None
        The taxon recorded on the massif; None when it has no records.
    role : str
        ``"recorded"``, ``"unrecorded"`` (the isolated candidate) or ``"dry"`` (a
        leeward massif with far less suitable forest).
    """

    name: str
    u: float
    v: float
    peak_m: float
    sigma_frac: float
    aspect: float
    angle_deg: float
    taxon: str | None
    role: str


@dataclass(frozen=True)
class Niche:
    """Invented niche of one taxon: cool and wet.

    Suitability is ``exp(-0.5 ((T - t_opt_c) / t_width_c)^2) * logistic((M -
    moisture_half_mm) / moisture_width_mm)`` with ``T`` the mean annual temperature
    (deg C) and ``M`` the moisture index (mm/yr); see :func:`niche_suitability`.
    """

    t_opt_c: float
    t_width_c: float
    moisture_half_mm: float
    moisture_width_mm: float


#: The three invented sister taxa, in the order they appear in the records file.
TAXA = (f"{GENUS} tarvelli", f"{GENUS} quennomae", f"{GENUS} sorrakensis")

#: Niche of each taxon (similar, as sister taxa often are, but not identical).
NICHES = {
    TAXA[0]: Niche(16.0, 2.2, 2500.0, 450.0),
    TAXA[1]: Niche(15.5, 2.0, 2700.0, 450.0),
    TAXA[2]: Niche(14.5, 2.0, 2900.0, 450.0),
}

#: The five massifs.  Positions are fixed; the seed shapes their relief.
MASSIFS = (
    Massif("Askerra Range", 0.20, 0.56, 2150.0, 0.062, 1.6, 70.0, TAXA[0], "recorded"),
    Massif("Ovenni Hills", 0.46, 0.79, 1950.0, 0.058, 1.7, 15.0, TAXA[1], "recorded"),
    Massif("Sorrak Massif", 0.81, 0.64, 2350.0, 0.064, 1.5, 80.0, TAXA[2], "recorded"),
    Massif(
        "Hullavar Massif", 0.58, 0.22, 2300.0, 0.064, 1.5, 165.0, None, "unrecorded"
    ),
    Massif("Pelto Heights", 0.22, 0.22, 1600.0, 0.048, 1.4, 40.0, None, "dry"),
)

#: Invented villages and a road end: (name, u, v, kind), kind "coast" or "inland".
_START_POINTS = (
    ("Port Elvarre", 0.78, 0.92, "coast"),
    ("Kessa Landing", 0.04, 0.55, "coast"),
    ("Ruumi Bay", 0.50, 0.05, "coast"),
    ("Vassin", 0.30, 0.95, "coast"),
    ("Tollo road end", 0.58, 0.50, "inland"),
)

_CATALOGUE_PREFIX = "MVNC"  # invented: "Meruvane Natural Collection"
_N_CLEAN_RECORDS = {TAXA[0]: 13, TAXA[1]: 8, TAXA[2]: 11}
_N_SURVEYS_PER_MASSIF = 5


@dataclass(frozen=True)
class MassifTruth:
    """Where one massif of the demo is, in WGS84 degrees.

    Attributes
    ----------
    name, role : str
        As in :class:`Massif`.
    taxon : str or None
        Recorded taxon, or None.
    longitude, latitude : float
        Centre of the massif, degrees.
    bbox : tuple of float
        ``(west, south, east, north)`` in degrees: a box that holds the massif's whole
        upland (cells at or above :data:`LOWLAND_MAX_M`).
    """

    name: str
    role: str
    taxon: str | None
    longitude: float
    latitude: float
    bbox: tuple


@dataclass(frozen=True)
class DemoTruth:
    """What the demo was built to contain, so tests can check a run finds it.

    Attributes
    ----------
    island : str
        Island name.
    size : str
        ``"full"`` or ``"small"``.
    taxa : tuple of str
        Taxon names as written in ``occurrences.csv``.
    massifs : tuple of MassifTruth
        All massifs, in :data:`MASSIFS` order.
    unrecorded : MassifTruth
        The massif with no records that is as suitable as the recorded ones: the
        expected isolated candidate.
    lowland_max_m : float
        Elevation (m) below which the lowland separating the massifs lies.
    """

    island: str
    size: str
    taxa: tuple
    massifs: tuple
    unrecorded: MassifTruth
    lowland_max_m: float


@dataclass(frozen=True)
class DemoScenario:
    """Everything the demo consists of, before it is written.

    Attributes
    ----------
    grid : Grid
        EPSG:4326 grid; ``grid.mask`` is True on land.
    layers : dict of str to ndarray
        float32 arrays (n_rows, n_cols), NaN over the sea, keyed by
        :data:`LAYER_NAMES`: elevation (m), temperature (deg C), moisture (mm/yr),
        cloud (cloud cover, % of days: windward slopes cloudier).
    massif_id : ndarray of int, shape (n_rows, n_cols)
        Index into :data:`MASSIFS` of each massif's upland (cells at or above
        :data:`LOWLAND_MAX_M` connected to its summit); -1 elsewhere.
    occurrences : list of tuple
        Rows ``(taxon, longitude, latitude, catalogue)`` as written, flaws included.
    start_points : list of tuple
        Rows ``(name, longitude, latitude)``.
    surveys : list of tuple
        Rows ``(longitude, latitude, date, found)``, date ISO 8601, found bool.
    truth : DemoTruth
    seed : int
    past_layers : dict of str to ndarray
        The cold-stage slice (:data:`PAST_SLICE`): :data:`PAST_LAYER_NAMES` as float32
        arrays, NaN over its sea (a shelf is land then, see :func:`_past_climate`).
    """

    grid: Grid
    layers: dict
    massif_id: np.ndarray
    occurrences: list
    start_points: list
    surveys: list
    truth: DemoTruth
    seed: int
    past_layers: dict | None = None


# --- geometry ------------------------------------------------------------------------
def _check_size(size: str) -> tuple:
    if size not in SIZES:
        raise InputError(
            f"Unknown demo size {size!r}; use one of {sorted(SIZES)} "
            "('small' for tests, 'full' for the committed demo)."
        )
    return SIZES[size]


def demo_grid(size: str = "full") -> Grid:
    """The demo's WGS84 grid (all cells valid; the land mask comes with the terrain).

    Parameters
    ----------
    size : {"full", "small"}
        ``"full"`` is 300 x 400 cells, ``"small"`` 100 x 130, both of 0.005 deg and
        centred on the same point.

    Returns
    -------
    Grid

    Examples
    --------
    >>> g = demo_grid("small")
    >>> g.shape, g.res, g.is_geographic
    ((100, 130), (0.005, 0.005), True)
    """
    n_rows, n_cols = _check_size(size)
    west = _CENTRE_LON - n_cols * CELL_DEG / 2.0
    north = _CENTRE_LAT + n_rows * CELL_DEG / 2.0
    transform = Affine(CELL_DEG, 0.0, round(west, 6), 0.0, -CELL_DEG, round(north, 6))
    return Grid("EPSG:4326", transform, (n_rows, n_cols))


def _local_km(grid: Grid):
    """Mean cell width and height (km), and cell centres in km (x east, y south).

    Terrain is invented on a local tangent plane: over 1.5 deg of latitude the
    east-west cell width changes by under 1 %, which does not matter for fiction.
    """
    dx_km = float(np.mean(grid.ew_step_km))
    dy_km = float(np.mean(grid.ns_step_km))
    rows = (np.arange(grid.n_rows) + 0.5) * dy_km
    cols = (np.arange(grid.n_cols) + 0.5) * dx_km
    y_km, x_km = np.meshgrid(rows, cols, indexing="ij")
    return dx_km, dy_km, x_km, y_km


def _smooth_noise(
    rng: np.random.Generator, shape: tuple, sigma_cells: float
) -> np.ndarray:
    """Seeded white noise smoothed by a Gaussian filter, rescaled to unit std."""
    field = ndimage.gaussian_filter(
        rng.standard_normal(shape), sigma_cells, mode="reflect"
    )
    return (field - field.mean()) / field.std()


def _massif_shape(m: Massif, x_km, y_km, width_km: float, height_km: float):
    """Unit-peaked relief of one massif: a rotated elliptic bump plus a shoulder."""
    s = m.sigma_frac * width_km
    a = math.sqrt(m.aspect)
    th = math.radians(m.angle_deg)
    dx = x_km - m.u * width_km
    dn = -(y_km - m.v * height_km)  # northward offset
    along = dx * math.cos(th) + dn * math.sin(th)
    across = -dx * math.sin(th) + dn * math.cos(th)
    main = np.exp(-((along / (s * a)) ** 2 + (across / (s / a)) ** 2))
    # A lower shoulder along the long axis makes each massif a ridge, not a cone.
    shoulder = 0.55 * np.exp(
        -(((along - 0.9 * s * a) / (0.6 * s * a)) ** 2 + (across / (0.6 * s / a)) ** 2)
    )
    return np.maximum(main, shoulder)


def _terrain(grid: Grid, rng: np.random.Generator):
    """Elevation (m, NaN over the sea), land mask and massif labels."""
    n_rows, n_cols = grid.shape
    _, _, x_km, y_km = _local_km(grid)
    width_km = float(x_km[0, -1] + x_km[0, 0])
    height_km = float(y_km[-1, 0] + y_km[0, 0])
    n_coast = _smooth_noise(rng, grid.shape, n_cols / 14.0)
    n_low = _smooth_noise(rng, grid.shape, n_cols / 40.0)
    n_ridge = _smooth_noise(rng, grid.shape, n_cols / 60.0)
    n_fine = _smooth_noise(rng, grid.shape, n_cols / 160.0)

    shapes = [_massif_shape(m, x_km, y_km, width_km, height_km) for m in MASSIFS]
    u = x_km / width_km
    v = y_km / height_km
    island = 1.0 - ((u - 0.5) / 0.45) ** 2 - ((v - 0.5) / 0.43) ** 2
    island = island + 0.16 * np.tanh(n_coast) + 0.8 * np.maximum.reduce(shapes)
    land = island > 0
    # keep the main island only, with no inland sea, and a ring of sea at the edge
    labels, n = ndimage.label(land)
    if n > 1:
        sizes = ndimage.sum_labels(land, labels, index=np.arange(1, n + 1))
        land = labels == (1 + int(np.argmax(sizes)))
    land = ndimage.binary_fill_holes(land)
    land[:2, :] = land[-2:, :] = False
    land[:, :2] = land[:, -2:] = False

    lowland = 8.0 + 170.0 * (1.0 - np.exp(-3.0 * np.clip(island, 0.0, None)))
    lowland = lowland + 40.0 * np.tanh(n_low)
    relief = np.zeros(grid.shape)
    for m, shape in zip(MASSIFS, shapes, strict=True):
        carved = shape * (1.0 + 0.28 * np.tanh(n_ridge) + 0.12 * np.tanh(n_fine))
        carved = carved * (m.peak_m - 200.0) / carved.max()
        relief += carved
    elevation = np.clip(lowland + relief, 1.0, None)
    elevation = np.where(land, elevation, np.nan)

    upland, _ = ndimage.label(
        land & (elevation >= LOWLAND_MAX_M), structure=np.ones((3, 3))
    )
    massif_id = np.full(grid.shape, -1, dtype=np.int64)
    for k, shape in enumerate(shapes):
        peak = np.unravel_index(np.argmax(np.where(land, shape, -1.0)), grid.shape)
        lab = upland[peak]
        # Neither can happen with the fixed layout; guard against edits to it.
        if lab == 0:
            raise RuntimeError(f"demo massif {MASSIFS[k].name} has no upland")
        if np.any(massif_id[upland == lab] >= 0):
            raise RuntimeError(f"demo massif {MASSIFS[k].name} merged with another")
        massif_id[upland == lab] = k
    return elevation, land, massif_id


def _climate(grid: Grid, elevation: np.ndarray, land: np.ndarray, rng, *,
             cooling_c: float = 0.0, cloud_belt_m: float = _CLOUD_BELT_M):
    """Temperature (deg C), moisture (mm/yr) and cloud (%) on land; NaN over the sea.

    ``cooling_c`` lowers every temperature and ``cloud_belt_m`` sets the height of the
    cloud belt: the present climate by default, a colder one for the past slice.
    """
    n_rows, n_cols = grid.shape
    dx_km, dy_km, x_km, y_km = _local_km(grid)
    z = np.where(land, elevation, 0.0)
    _, lat = grid.lonlat(np.arange(n_rows)[:, None], np.zeros((1, n_cols)))
    lat = np.broadcast_to(np.asarray(lat, float), grid.shape)

    n_t = _smooth_noise(rng, grid.shape, n_cols / 30.0)
    n_m = _smooth_noise(rng, grid.shape, n_cols / 50.0)

    temperature = (
        _SEA_LEVEL_T_C
        - cooling_c
        - LAPSE_RATE_C_PER_KM * z / 1000.0
        + _LAT_T_C_PER_DEG * (lat - _CENTRE_LAT)
        + 0.3 * np.tanh(n_t)
    )

    # Windward slopes: the rise (m per km) met by air moving with the trade wind.
    zs = ndimage.gaussian_filter(z, 3.0 * n_cols / 400.0 + 1.0)
    dz_drow, dz_dcol = np.gradient(zs, dy_km, dx_km)
    east, north = _WIND_TOWARDS
    rise = dz_dcol * east + (-dz_drow) * north
    # Rain shadow: high ground upwind (south-east) dries the air reaching a cell.
    shift_km = 0.06 * float(x_km[0, -1])
    upwind = ndimage.shift(
        zs,
        (shift_km * north / dy_km, -shift_km * east / dx_km),
        order=1,
        mode="constant",
    )
    # Position across the island: -1 lee (north-west) to +1 windward (south-east).
    u = x_km / float(x_km[0, -1] + x_km[0, 0]) - 0.5
    v = y_km / float(y_km[-1, 0] + y_km[0, 0]) - 0.5
    across = np.clip((u + v) / 0.7, -1.0, 1.0)

    # The trade wind rains out as it crosses the island: the windward (south-east)
    # coast gets about 2700 mm/yr, the lee (north-west) coast a dry 400 mm/yr, at any
    # height.  This rain shadow across the island, not elevation, sets most of the
    # lowland's moisture, so moisture is not a copy of temperature (|r| about 0.6 on
    # the land cells; the screener warns above 0.7).
    base = 1500.0 + _RAIN_SHADOW_MM * across - 0.35 * np.clip(upwind - z, 0.0, None)
    w = np.where(z < cloud_belt_m, 1100.0, 650.0)
    belt = np.exp(-(((z - cloud_belt_m) / w) ** 2))
    # The trade-wind air has lost part of its water by the time it reaches the lee.
    orographic = (
        2600.0 * belt * (1.0 + 0.55 * np.tanh(rise / 60.0)) * (1.0 + 0.3 * across)
    )
    moisture = np.clip((base + orographic) * (1.0 + 0.06 * np.tanh(n_m)), 400.0, None)

    # Cloud cover follows which way a slope faces more than its height: orographic
    # cloud where the trade wind rises against windward slopes, clearer in the lee
    # (so that, unlike a cloud-belt layer, it is not a copy of elevation).
    n_c = _smooth_noise(rng, grid.shape, n_cols / 60.0)
    cloud = np.clip(20.0 + 35.0 * (1.0 + np.tanh(rise / 30.0)) + 8.0 * np.tanh(n_c),
                    0.0, 100.0)

    out = {}
    for name, arr, ndp in (
        ("temperature", temperature, 2),
        ("moisture", moisture, 0),
        ("cloud", cloud, 1),
    ):
        out[name] = np.where(land, np.round(arr, ndp), np.nan).astype(np.float32)
    return out


def _past_climate(grid: Grid, elevation: np.ndarray, land: np.ndarray, climate_ss):
    """The invented cold stage: cooler, a lower cloud belt and a lower sea level.

    The sea stood low enough to expose a shelf :data:`PAST_SHELF_KM` wide around the
    island.  A cold current ran along the west coast, so the west cooled by
    ``PAST_COOLING_C[0]`` and the east by ``PAST_COOLING_C[1]`` deg C (linearly
    between), and the cloud belt sat :data:`PAST_CLOUD_DROP_M_PER_C` m lower per deg C.
    The climate noise is the present's (same seed), so only these changes differ.
    In the cool, wet west the lowland between Pelto Heights and the Askerra Range
    became cloud forest; the warm north-east kept Hullavar apart.
    """
    dx_km, dy_km, x_km, _ = _local_km(grid)
    shelf = ndimage.distance_transform_edt(~land, sampling=(dy_km, dx_km)) <= PAST_SHELF_KM
    past_land = land | shelf
    past_land[:2, :] = past_land[-2:, :] = False
    past_land[:, :2] = past_land[:, -2:] = False
    u = x_km / float(x_km[0, -1] + x_km[0, 0])
    west, east = PAST_COOLING_C
    cooling = east + (west - east) * np.clip((0.45 - u) / 0.2, 0.0, 1.0)
    z = np.where(land, elevation, 0.0)
    layers = _climate(grid, z, past_land, np.random.default_rng(climate_ss),
                      cooling_c=cooling,
                      cloud_belt_m=_CLOUD_BELT_M - PAST_CLOUD_DROP_M_PER_C * cooling)
    return {name: layers[name] for name in PAST_LAYER_NAMES}


def niche_suitability(temperature, moisture, taxon: str) -> np.ndarray:
    """The invented true niche of a demo taxon, in [0, 1].

    Parameters
    ----------
    temperature : array_like
        Mean annual temperature, deg C.
    moisture : array_like
        Moisture index, mm/yr of rainfall.
    taxon : str
        One of :data:`TAXA`.

    Returns
    -------
    ndarray
        Suitability; NaN where an input is NaN.

    Examples
    --------
    >>> n = NICHES[TAXA[0]]
    >>> round(float(niche_suitability(n.t_opt_c, 1e9, TAXA[0])), 6)
    1.0
    """
    if taxon not in NICHES:
        raise InputError(f"{taxon!r} is not a demo taxon; use one of {list(TAXA)}.")
    n = NICHES[taxon]
    t = np.asarray(temperature, dtype=float)
    m = np.asarray(moisture, dtype=float)
    thermal = np.exp(-0.5 * ((t - n.t_opt_c) / n.t_width_c) ** 2)
    wet = 0.5 * (1.0 + np.tanh((m - n.moisture_half_mm) / (2.0 * n.moisture_width_mm)))
    return thermal * wet


# --- records, villages, surveys ------------------------------------------------------
def _cell_point(grid: Grid, rng, rows, cols):
    """Random points inside cells (rows, cols), rounded to 5 decimals (about 1 m)."""
    rows = np.asarray(rows, float)
    cols = np.asarray(cols, float)
    jr = rng.uniform(-0.4, 0.4, rows.shape)
    jc = rng.uniform(-0.4, 0.4, cols.shape)
    lon, lat = grid.lonlat(rows + jr, cols + jc)
    return np.round(np.asarray(lon, float), 5), np.round(np.asarray(lat, float), 5)


def _occurrences(grid, layers, massif_id, land, rng):
    temperature = layers["temperature"].astype(float)
    moisture = layers["moisture"].astype(float)
    rows_out = []
    cells = {}
    for k, m in enumerate(MASSIFS):
        if m.taxon is None:
            continue
        suit = np.where(
            massif_id == k, niche_suitability(temperature, moisture, m.taxon), 0.0
        )
        suit = np.nan_to_num(suit, nan=0.0)
        flat = np.flatnonzero(suit > 0.05)
        p = suit.ravel()[flat] ** 2
        chosen = rng.choice(
            flat, size=_N_CLEAN_RECORDS[m.taxon], replace=False, p=p / p.sum()
        )
        r, c = np.unravel_index(np.sort(chosen), grid.shape)
        cells[m.taxon] = (r, c)
        lon, lat = _cell_point(grid, rng, r, c)
        rows_out += [
            (m.taxon, float(x), float(y)) for x, y in zip(lon, lat, strict=True)
        ]

    catalogue = rng.choice(np.arange(1000, 9000), size=len(rows_out) + 2, replace=False)
    catalogue = [f"{_CATALOGUE_PREFIX} {int(n)}" for n in np.sort(catalogue)]
    records = [row + (catalogue[i],) for i, row in enumerate(rows_out)]

    # Flaw 1: a second record of Sorrak's taxon in a cell that already has one.
    r, c = cells[TAXA[2]]
    lon, lat = _cell_point(grid, rng, r[:1], c[:1])
    records.append((TAXA[2], float(lon[0]), float(lat[0]), catalogue[-2]))
    # Flaw 2: a record that falls in the sea, a few km off the Ovenni Hills' coast.
    k_b = next(i for i, m in enumerate(MASSIFS) if m.taxon == TAXA[1])
    d_land = ndimage.distance_transform_edt(~land)
    offshore = (d_land >= 3) & (d_land <= 6)
    rr, cc = np.nonzero(offshore)
    br, bc = np.argwhere(massif_id == k_b).mean(axis=0)
    j = int(np.argmin((rr - br) ** 2 + (cc - bc) ** 2))
    lon, lat = _cell_point(grid, rng, rr[j : j + 1], cc[j : j + 1])
    records.append((TAXA[1], float(lon[0]), float(lat[0]), catalogue[-1]))
    # Shuffle as an export from a collection database would be, then
    # Flaw 3: one row exported twice (an exact duplicate) at the end.
    order = rng.permutation(len(records))
    records = [records[i] for i in order]
    records.append(records[int(rng.integers(len(records) - 2))])
    return records


def _start_points(grid, elevation, land):
    _, _, x_km, y_km = _local_km(grid)
    width_km = float(x_km[0, -1] + x_km[0, 0])
    height_km = float(y_km[-1, 0] + y_km[0, 0])
    coast = land & ~ndimage.binary_erosion(land, structure=np.ones((3, 3)))
    inland = land & ~coast & (np.nan_to_num(elevation, nan=1e9) < 150.0)
    out = []
    for name, u, v, kind in _START_POINTS:
        pool = coast if kind == "coast" else inland
        rr, cc = np.nonzero(pool)
        d2 = (x_km[rr, cc] - u * width_km) ** 2 + (y_km[rr, cc] - v * height_km) ** 2
        j = int(np.argmin(d2))
        lon, lat = grid.lonlat(rr[j], cc[j])
        out.append((name, round(float(lon), 5), round(float(lat), 5)))
    return out


def _surveys(grid, layers, massif_id, rng):
    elevation = np.nan_to_num(layers["elevation"].astype(float), nan=0.0)
    temperature = layers["temperature"].astype(float)
    moisture = layers["moisture"].astype(float)
    start = _dt.date(2011, 1, 1).toordinal()
    stop = _dt.date(2024, 12, 31).toordinal()
    out = []
    for k, m in enumerate(MASSIFS):
        if m.taxon is None:
            continue
        # Surveyors went mostly to forest that looked right: weight by the niche.
        flat = np.flatnonzero((massif_id == k).ravel() & (elevation.ravel() >= 500.0))
        weight = 0.1 + niche_suitability(
            temperature.ravel()[flat], moisture.ravel()[flat], m.taxon
        )
        chosen = rng.choice(
            flat, size=_N_SURVEYS_PER_MASSIF, replace=False, p=weight / weight.sum()
        )
        r, c = np.unravel_index(np.sort(chosen), grid.shape)
        suit = niche_suitability(temperature[r, c], moisture[r, c], m.taxon)
        found = rng.random(len(chosen)) < 0.9 * suit  # imperfect detection
        days = rng.integers(start, stop + 1, size=len(chosen))
        lon, lat = _cell_point(grid, rng, r, c)
        for x, y, d, f in zip(lon, lat, days, found, strict=True):
            out.append(
                (float(x), float(y), _dt.date.fromordinal(int(d)).isoformat(), bool(f))
            )
    out.sort(key=lambda row: row[2])
    return out


# --- truth ---------------------------------------------------------------------------
def demo_truth(size: str = "full") -> DemoTruth:
    """Where the demo's massifs are, for a grid size.

    The layout does not depend on the seed: only the relief, climate noise, records
    and surveys do.  Each bounding box is the massif centre plus or minus 2.0 times
    its long axis; tests check that this holds the whole upland.

    Parameters
    ----------
    size : {"full", "small"}

    Returns
    -------
    DemoTruth

    Examples
    --------
    >>> t = demo_truth("full")
    >>> t.unrecorded.name, t.unrecorded.taxon
    ('Hullavar Massif', None)
    """
    grid = demo_grid(size)
    dx_km, dy_km, x_km, y_km = _local_km(grid)
    width_km = float(x_km[0, -1] + x_km[0, 0])
    massifs = []
    for m in MASSIFS:
        col = m.u * grid.n_cols - 0.5
        row = m.v * grid.n_rows - 0.5
        lon, lat = grid.lonlat(row, col)
        half_km = 2.0 * m.sigma_frac * width_km * math.sqrt(m.aspect)
        dlon = half_km / dx_km * CELL_DEG
        dlat = half_km / dy_km * CELL_DEG
        lon, lat = float(lon), float(lat)
        bbox = (
            round(lon - dlon, 4),
            round(lat - dlat, 4),
            round(lon + dlon, 4),
            round(lat + dlat, 4),
        )
        massifs.append(
            MassifTruth(m.name, m.role, m.taxon, round(lon, 5), round(lat, 5), bbox)
        )
    unrecorded = next(t for t in massifs if t.role == "unrecorded")
    return DemoTruth(ISLAND_NAME, size, TAXA, tuple(massifs), unrecorded, LOWLAND_MAX_M)


#: Ground truth of the demo per size (``DEMO_TRUTH["full"]``, ``DEMO_TRUTH["small"]``).
DEMO_TRUTH = {size: demo_truth(size) for size in SIZES}


# --- the scenario --------------------------------------------------------------------
def make_demo_scenario(seed: int = DEFAULT_SEED, size: str = "full") -> DemoScenario:
    """Generate the whole demo scenario in memory, deterministically from ``seed``.

    Parameters
    ----------
    seed : int, default DEFAULT_SEED
        Seed of every random draw (relief, climate noise, records, surveys).
    size : {"full", "small"}, default "full"
        Grid size: 300 x 400 cells (committed demo) or 100 x 130 (tests).

    Returns
    -------
    DemoScenario
    """
    _check_size(size)
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise InputError(f"The demo seed must be a non-negative integer; got {seed!r}.")
    terrain_ss, climate_ss, records_ss, survey_ss = np.random.SeedSequence(
        int(seed)
    ).spawn(4)
    grid = demo_grid(size)
    elevation, land, massif_id = _terrain(grid, np.random.default_rng(terrain_ss))
    layers = {
        "elevation": np.where(land, np.round(elevation, 1), np.nan).astype(np.float32)
    }
    layers.update(
        _climate(
            grid,
            layers["elevation"].astype(float),
            land,
            np.random.default_rng(climate_ss),
        )
    )
    past = _past_climate(grid, layers["elevation"].astype(float), land, climate_ss)
    grid = grid.with_mask(land)
    occurrences = _occurrences(
        grid, layers, massif_id, land, np.random.default_rng(records_ss)
    )
    starts = _start_points(grid, layers["elevation"], land)
    surveys = _surveys(grid, layers, massif_id, np.random.default_rng(survey_ss))
    logger.debug("demo scenario %s, seed %d: %d land cells", size, seed, grid.n_valid)
    return DemoScenario(
        grid=grid,
        layers={name: layers[name] for name in LAYER_NAMES},
        massif_id=massif_id,
        occurrences=occurrences,
        start_points=starts,
        surveys=surveys,
        truth=DEMO_TRUTH[size],
        seed=int(seed),
        past_layers=past,
    )


def _csv_text(header, rows) -> str:
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(header)
    writer.writerows(rows)
    return buf.getvalue()


def _project_toml(seed: int) -> str:
    return (
        "[project]\n"
        f'name = "{SCENARIO_NAME}"\n'
        f"random_state = {int(seed)}\n"
        "\n"
        "[occurrences]\n"
        'path = "occurrences.csv"\n'
        "\n"
        "[layers]\n"
        'paths = ["layers/*.tif"]\n'
        'elevation = "elevation"\n'
        "# temperature is elevation through the lapse rate (r = -1): model on the\n"
        "# climate, keep elevation for walking times and terrain\n"
        'exclude = ["elevation"]\n'
        "\n"
        "[slices]\n"
        "# an invented cold stage: cooler, with a lower cloud belt and sea level\n"
        'stability = "geometric_mean"\n'
        "\n"
        "[slices.layers]\n"
        f'{PAST_SLICE} = ["past/{PAST_SLICE}/*.tif"]\n'
        "\n"
        "[access]\n"
        'start_points = "start_points.csv"\n'
        "\n"
        "[survey]\n"
        'surveyed = "surveys.csv"\n'
    )


def _write_layer(path: Path, array: np.ndarray, grid: Grid) -> None:
    import rasterio

    data = np.where(np.isfinite(array), array, NODATA).astype(np.float32)
    profile = {
        "driver": "GTiff",
        "dtype": "float32",
        "count": 1,
        "height": grid.n_rows,
        "width": grid.n_cols,
        "crs": "EPSG:4326",
        "transform": grid.transform,
        "nodata": NODATA,
        "tiled": True,
        "blockxsize": 128,
        "blockysize": 128,
        "compress": "deflate",
        "predictor": 3,
    }
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(data, 1)


def write_demo_scenario(
    folder, *, seed: int = DEFAULT_SEED, size: str = "full"
) -> Path:
    """Write the demo scenario into ``folder`` and return the project file's path.

    Writes ``project.toml``, ``occurrences.csv``, ``start_points.csv``,
    ``surveys.csv`` and ``layers/{elevation,temperature,moisture,cloud}.tif``
    (single-band float32 GeoTIFFs, EPSG:4326, tiled, deflate, nodata -9999 over the
    sea).  Existing files of those names are replaced; nothing else is touched.
    The same seed and size always give byte-identical CSV and TOML files and
    identical raster arrays.

    Parameters
    ----------
    folder : str or path-like
        Output folder; created if missing.
    seed : int, default DEFAULT_SEED
        Seed of every random draw; also written as ``random_state``.
    size : {"full", "small"}, default "full"
        300 x 400 cells, or 100 x 130 for tests.

    Returns
    -------
    pathlib.Path
        Path of ``project.toml``.

    Raises
    ------
    screener.errors.InputError
        Unknown size or a bad seed.
    screener.errors.OutputError
        The folder cannot be created or written.
    """
    scenario = make_demo_scenario(seed=seed, size=size)
    folder = Path(folder)
    try:
        (folder / "layers").mkdir(parents=True, exist_ok=True)
        for name in LAYER_NAMES:
            _write_layer(
                folder / "layers" / f"{name}.tif", scenario.layers[name], scenario.grid
            )
        (folder / "past" / PAST_SLICE).mkdir(parents=True, exist_ok=True)
        for name in PAST_LAYER_NAMES:
            _write_layer(folder / "past" / PAST_SLICE / f"{name}.tif",
                         scenario.past_layers[name], scenario.grid)
        occ = [(t, f"{x:.5f}", f"{y:.5f}", c) for t, x, y, c in scenario.occurrences]
        files = {
            "occurrences.csv": _csv_text(
                ("taxon", "longitude", "latitude", "catalogue"), occ
            ),
            "start_points.csv": _csv_text(
                ("name", "longitude", "latitude"),
                [(n, f"{x:.5f}", f"{y:.5f}") for n, x, y in scenario.start_points],
            ),
            "surveys.csv": _csv_text(
                ("longitude", "latitude", "date", "found"),
                [
                    (f"{x:.5f}", f"{y:.5f}", d, "true" if f else "false")
                    for x, y, d, f in scenario.surveys
                ],
            ),
            "project.toml": _project_toml(scenario.seed),
        }
        for name, text in files.items():
            (folder / name).write_text(text, encoding="utf-8", newline="")
    except OSError as exc:
        raise OutputError(
            f"Cannot write the demo scenario into {str(folder)!r}: {exc}. "
            "Choose a folder you can write to."
        ) from exc
    logger.info(
        "wrote the %s demo scenario (seed %d) to %s", size, scenario.seed, folder
    )
    return folder / "project.toml"
