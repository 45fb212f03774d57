"""Checks of the invented demo scenario itself (screener.demo, demo_data/).

The scenario is invented data, so most checks here test that it has the properties it
was built to have: reproducible from its seed, well-formed GeoTIFFs, records on valid
cells (bar the deliberate flaws), and an unrecorded massif isolated by lowland.  Where
a check rests on an outside fact, the source is named beside it.
"""

from __future__ import annotations

import csv
import datetime as dt
import math
from pathlib import Path

import numpy as np
import pytest
import rasterio
import tomllib
from pyproj import Geod
from scipy import ndimage, stats

from screener import demo
from screener.errors import InputError, OutputError
from screener.grid import Grid

REPO = Path(__file__).resolve().parents[1]
COMMITTED = REPO / "demo_data"
EIGHT = np.ones((3, 3), dtype=bool)  # 8-connectivity for scipy.ndimage.label
GEOD = Geod(ellps="WGS84")


# --- helpers ----------------------------------------------------------------------
def read_layers(folder: Path):
    """Layer arrays (NaN at nodata) and the Grid, read back from the GeoTIFFs."""
    arrays = {}
    grid = None
    for name in demo.LAYER_NAMES:
        with rasterio.open(folder / "layers" / f"{name}.tif") as src:
            arr = src.read(1, masked=True)
            arrays[name] = arr.filled(np.nan).astype(float)
            if grid is None:
                grid = Grid(src.crs, src.transform, src.shape)
    return arrays, grid.with_mask(np.isfinite(arrays["elevation"]))


def read_csv(path: Path):
    with open(path, newline="", encoding="utf-8") as fh:
        return list(csv.reader(fh))


def uplands(elevation):
    """8-connected components of cells at or above the documented lowland ceiling."""
    labels, n = ndimage.label(
        np.nan_to_num(elevation, nan=0.0) >= demo.LOWLAND_MAX_M, EIGHT
    )
    return labels, n


def label_at(labels, grid, lon, lat):
    rows, cols, inside = grid.rowcol(np.atleast_1d(lon), np.atleast_1d(lat))
    assert inside.all()
    return labels[rows, cols]


def min_geodesic_km(grid, mask_a, mask_b):
    """Smallest WGS84 geodesic distance (pyproj.Geod) between cells of two masks."""
    edge_a = mask_a & ~ndimage.binary_erosion(mask_a)
    edge_b = mask_b & ~ndimage.binary_erosion(mask_b)
    lon_a, lat_a = grid.lonlat(*np.nonzero(edge_a))
    lon_b, lat_b = grid.lonlat(*np.nonzero(edge_b))
    lon1, lon2 = np.meshgrid(lon_a, lon_b, indexing="ij")
    lat1, lat2 = np.meshgrid(lat_a, lat_b, indexing="ij")
    _, _, dist_m = GEOD.inv(lon1.ravel(), lat1.ravel(), lon2.ravel(), lat2.ravel())
    return float(np.min(dist_m)) / 1000.0


# --- fixtures ---------------------------------------------------------------------
@pytest.fixture(scope="module")
def small(tmp_path_factory):
    folder = tmp_path_factory.mktemp("demo_small")
    project = demo.write_demo_scenario(folder, size="small")
    return project


@pytest.fixture(scope="module")
def small_read(small):
    layers, grid = read_layers(small.parent)
    rows = read_csv(small.parent / "occurrences.csv")
    return layers, grid, rows


# --- determinism ------------------------------------------------------------------
def test_same_seed_gives_identical_files(small, tmp_path):
    again = demo.write_demo_scenario(tmp_path, size="small")
    assert again == tmp_path / "project.toml"
    for name in ("project.toml", "occurrences.csv", "start_points.csv", "surveys.csv"):
        assert (small.parent / name).read_bytes() == (tmp_path / name).read_bytes(), (
            name
        )
    for name in demo.LAYER_NAMES:
        with (
            rasterio.open(small.parent / "layers" / f"{name}.tif") as a,
            rasterio.open(tmp_path / "layers" / f"{name}.tif") as b,
        ):
            np.testing.assert_array_equal(a.read(1), b.read(1), err_msg=name)
            assert a.transform == b.transform


def test_other_seed_gives_other_data(small, tmp_path):
    demo.write_demo_scenario(tmp_path, size="small", seed=1)
    assert (small.parent / "occurrences.csv").read_bytes() != (
        tmp_path / "occurrences.csv"
    ).read_bytes()
    with (
        rasterio.open(small.parent / "layers" / "elevation.tif") as a,
        rasterio.open(tmp_path / "layers" / "elevation.tif") as b,
    ):
        assert not np.array_equal(a.read(1), b.read(1))
    assert "random_state = 1\n" in (tmp_path / "project.toml").read_text()


def test_committed_demo_matches_the_generator(tmp_path):
    """The files in demo_data/ are what make_demo.py makes (else: rerun it)."""
    demo.write_demo_scenario(tmp_path, size="full", seed=demo.DEFAULT_SEED)
    hint = "demo_data/ is stale: run `python demo_data/make_demo.py`"
    for name in ("project.toml", "occurrences.csv", "start_points.csv", "surveys.csv"):
        assert (COMMITTED / name).read_bytes() == (tmp_path / name).read_bytes(), hint
    for name in demo.LAYER_NAMES:
        with (
            rasterio.open(COMMITTED / "layers" / f"{name}.tif") as a,
            rasterio.open(tmp_path / "layers" / f"{name}.tif") as b,
        ):
            np.testing.assert_array_equal(a.read(1), b.read(1), err_msg=hint)
    assert sorted(p.name for p in (COMMITTED / "layers").glob("*.tif")) == sorted(
        f"{n}.tif" for n in demo.LAYER_NAMES
    )
    past = Path("past") / demo.PAST_SLICE
    for name in demo.PAST_LAYER_NAMES:
        with (
            rasterio.open(COMMITTED / past / f"{name}.tif") as a,
            rasterio.open(tmp_path / past / f"{name}.tif") as b,
        ):
            np.testing.assert_array_equal(a.read(1), b.read(1), err_msg=hint)
    size_mb = sum(p.stat().st_size for p in COMMITTED.rglob("*") if p.is_file()) / 1e6
    assert size_mb < 3.0


def test_bad_size_and_seed_are_input_errors(tmp_path):
    with pytest.raises(InputError, match="Unknown demo size 'tiny'"):
        demo.write_demo_scenario(tmp_path, size="tiny")
    with pytest.raises(InputError, match="non-negative integer"):
        demo.make_demo_scenario(seed=-3, size="small")
    with pytest.raises(InputError, match="non-negative integer"):
        demo.make_demo_scenario(seed=1.5, size="small")
    assert not (tmp_path / "project.toml").exists()


def test_unwritable_folder_is_an_output_error(tmp_path):
    blocker = tmp_path / "a_file"
    blocker.write_text("not a folder")
    with pytest.raises(OutputError, match="Cannot write the demo scenario"):
        demo.write_demo_scenario(blocker, size="small")


# --- layers -----------------------------------------------------------------------
@pytest.mark.parametrize("name", demo.LAYER_NAMES)
def test_layer_file_properties(small, name):
    with rasterio.open(small.parent / "layers" / f"{name}.tif") as src:
        assert src.count == 1
        assert src.dtypes == ("float32",)
        assert src.nodata == -9999.0
        assert src.crs.to_epsg() == 4326
        assert src.shape == demo.SIZES["small"]
        assert src.res == pytest.approx((0.005, 0.005))
        assert src.transform.b == 0 and src.transform.d == 0 and src.transform.e < 0
        assert src.profile["tiled"] is True
        assert src.compression == rasterio.enums.Compression.deflate
        data = src.read(1)
    valid = data != -9999.0
    assert np.all(np.isfinite(data))
    # sea all around: the outer ring of cells is nodata
    ring = np.ones_like(valid)
    ring[2:-2, 2:-2] = False
    assert not valid[ring].any()
    assert 0.4 < valid.mean() < 0.8


def test_layers_share_one_land_mask_over_southern_tropical_ocean(small_read):
    layers, grid, _ = small_read
    masks = [np.isfinite(layers[n]) for n in demo.LAYER_NAMES]
    for m in masks[1:]:
        np.testing.assert_array_equal(m, masks[0])
    # one island, no inland nodata
    labels, n = ndimage.label(masks[0], EIGHT)
    assert n == 1
    np.testing.assert_array_equal(ndimage.binary_fill_holes(masks[0]), masks[0])
    west, south, east, north = grid.bounds
    # Tropic of Capricorn at about 23.44 deg S (Earth's obliquity; from memory).
    assert -23.44 < south < north < 0.0
    assert 80.0 < west < east < 90.0  # open Indian Ocean: no real land there


def test_elevation_has_five_massifs_of_1500_to_2500_m(small_read):
    layers, grid, _ = small_read
    elev = layers["elevation"]
    assert np.nanmin(elev) > 0.0
    labels, n = uplands(elev)
    assert 4 <= n <= 6
    assert n == len(demo.MASSIFS)
    peaks = ndimage.maximum(elev, labels, index=np.arange(1, n + 1))
    assert np.all((peaks >= 1500.0) & (peaks <= 2500.0)), peaks
    # each massif of the layout stands on its own upland
    truth = demo.DEMO_TRUTH["small"]
    ids = [
        int(label_at(labels, grid, t.longitude, t.latitude)[0]) for t in truth.massifs
    ]
    assert 0 not in ids and len(set(ids)) == len(ids)


def test_temperature_falls_at_the_standard_lapse_rate(small_read):
    layers, _, _ = small_read
    land = np.isfinite(layers["elevation"])
    fit = stats.linregress(
        layers["elevation"][land] / 1000.0, layers["temperature"][land]
    )
    # ICAO standard atmosphere: 6.5 deg C per km in the troposphere (from memory).
    assert fit.slope == pytest.approx(-6.5, abs=0.25)
    assert fit.rvalue < -0.99
    assert (
        10.0
        < np.nanmin(layers["temperature"])
        < np.nanmax(layers["temperature"])
        < 30.0
    )


def test_moisture_is_higher_windward_and_in_the_cloud_belt(small_read):
    layers, grid, _ = small_read
    elev = np.nan_to_num(layers["elevation"], nan=0.0)
    moist = layers["moisture"]
    dz_drow, dz_dcol = np.gradient(ndimage.gaussian_filter(elev, 1.0))
    # downslope direction (east, north) components; rows run north to south
    down_east, down_north = -dz_dcol, dz_drow
    band = (elev >= 700.0) & (elev < 1500.0)
    faces_se = band & (down_east > 0) & (down_north < 0)
    faces_nw = band & (down_east < 0) & (down_north > 0)
    assert faces_se.sum() > 20 and faces_nw.sum() > 20
    assert np.mean(moist[faces_se]) > 1.2 * np.mean(moist[faces_nw])

    land = np.isfinite(moist)
    low = land & (elev < demo.LOWLAND_MAX_M)
    belt = land & (elev >= 1400.0) & (elev < 1900.0)
    top = land & (elev >= 2150.0)
    assert top.sum() > 5
    assert np.mean(moist[belt]) > 2.0 * np.mean(moist[low])
    assert np.mean(moist[belt]) > np.mean(moist[top])
    cloud = layers["cloud"][land]
    assert cloud.min() >= 0.0 and cloud.max() <= 100.0
    # cloud is orographic: cloudier on windward (south-east facing) slopes
    assert np.mean(layers["cloud"][faces_se]) > 1.5 * np.mean(layers["cloud"][faces_nw])


def test_layers_are_not_copies_of_elevation(small_read):
    # the demo should not trip its own collinearity warning: apart from temperature
    # (elevation through the lapse rate, left out of the demo's models), no layer is
    # collinear with another (|r| above the screener's warning level, common practice)
    from screener.layers import COLLINEARITY_R

    layers, _, _ = small_read
    land = np.isfinite(layers["elevation"])
    for a, b in (("cloud", "elevation"), ("cloud", "temperature"), ("cloud", "moisture"),
                 ("moisture", "temperature"), ("moisture", "elevation")):
        r = stats.pearsonr(layers[a][land], layers[b][land]).statistic
        assert abs(r) <= COLLINEARITY_R, (a, b, r)


def test_moisture_carries_a_rain_shadow_across_the_island(small_read):
    # at the same height, the windward (south-east) lowland is wetter than the lee
    # (north-west) lowland: the across-island gradient, not elevation, sets most of
    # the lowland's moisture
    layers, grid, _ = small_read
    elev = layers["elevation"]
    low = np.isfinite(elev) & (elev < demo.LOWLAND_MAX_M)
    rows, cols = np.indices(grid.shape)
    across = cols / grid.n_cols + rows / grid.n_rows - 1.0  # > 0 south-east
    lee = low & (across < -0.3)
    windward = low & (across > 0.3)
    assert lee.sum() > 50 and windward.sum() > 50
    assert np.mean(layers["moisture"][windward]) > 2.0 * np.mean(layers["moisture"][lee])


# --- records ----------------------------------------------------------------------
def test_records_have_the_documented_flaws_and_no_others(small_read):
    layers, grid, rows = small_read
    header, body = rows[0], rows[1:]
    assert header == ["taxon", "longitude", "latitude", "catalogue"]
    # flaw 1: exactly one exact duplicate row
    assert len(body) - len({tuple(r) for r in body}) == 1
    unique = list(dict.fromkeys(tuple(r) for r in body))
    taxa = [r[0] for r in unique]
    lon = np.array([float(r[1]) for r in unique])
    lat = np.array([float(r[2]) for r in unique])
    r_, c_, inside = grid.rowcol(lon, lat)
    assert inside.all()
    on_land = grid.mask[r_, c_]
    # flaw 2: exactly one record on the grid but in the sea (nodata)
    assert (~on_land).sum() == 1
    # flaw 3: exactly one pair of land records of a taxon sharing a cell
    cells = zip(taxa, r_, c_, on_land, strict=True)
    keys = [(t, int(a), int(b)) for t, a, b, ok in cells if ok]
    assert len(keys) - len(set(keys)) == 1
    # catalogue numbers unique per unique row
    assert len({r[3] for r in unique}) == len(unique)
    # 6 to 20 records per taxon, all three taxa present
    counts = {t: taxa.count(t) for t in demo.TAXA}
    assert set(taxa) == set(demo.TAXA)
    assert all(6 <= n <= 20 for n in counts.values()), counts


def test_each_taxon_lives_on_its_own_massif(small_read):
    layers, grid, rows = small_read
    labels, _ = uplands(layers["elevation"])
    truth = demo.DEMO_TRUTH["small"]
    by_taxon = {}
    for taxon, x, y, _ in rows[1:]:
        lab = int(label_at(labels, grid, float(x), float(y))[0])
        if lab:  # the record in the sea has label 0
            by_taxon.setdefault(taxon, set()).add(lab)
    assert all(len(v) == 1 for v in by_taxon.values()), by_taxon
    assert len({next(iter(v)) for v in by_taxon.values()}) == len(demo.TAXA)
    for t in truth.massifs:
        if t.taxon is not None:
            assert by_taxon[t.taxon] == {
                int(label_at(labels, grid, t.longitude, t.latitude)[0])
            }
    # records sit where the invented niche is good
    land = [(t, float(x), float(y)) for t, x, y, _ in rows[1:]]
    suit = []
    for taxon, x, y in land:
        r, c, _ = grid.rowcol(x, y)
        if grid.mask[r, c]:
            t_, m_ = layers["temperature"][r, c], layers["moisture"][r, c]
            suit.append(float(demo.niche_suitability(t_, m_, taxon)))
    assert np.median(suit) > 0.5


# --- the unrecorded massif --------------------------------------------------------
@pytest.mark.parametrize("seed", [demo.DEFAULT_SEED, 1, 2])
def test_unrecorded_massif_is_isolated_by_lowland(seed):
    scen = demo.make_demo_scenario(seed=seed, size="small")
    elev, grid = scen.layers["elevation"], scen.grid
    labels, _ = uplands(elev)
    truth = scen.truth
    target = int(
        label_at(labels, grid, truth.unrecorded.longitude, truth.unrecorded.latitude)[0]
    )
    assert target > 0
    lon = np.array([r[1] for r in scen.occurrences])
    lat = np.array([r[2] for r in scen.occurrences])
    rec_labels = set(int(v) for v in label_at(labels, grid, lon, lat)) - {0}
    assert target not in rec_labels
    assert len(rec_labels) == 3
    recorded = np.isin(labels, list(rec_labels))
    # Every path from the unrecorded upland to a recorded one drops below
    # LOWLAND_MAX_M (they are different components), and the lowland gap between
    # them is far wider than 5 km (geodesic distance, pyproj.Geod on WGS84).
    gap_km = min_geodesic_km(grid, labels == target, recorded)
    assert gap_km > 10.0, gap_km
    # the truth box holds the whole upland of the massif
    rr, cc = np.nonzero(labels == target)
    lo, la = grid.lonlat(rr, cc)
    west, south, east, north = truth.unrecorded.bbox
    assert west < lo.min() and lo.max() < east and south < la.min() and la.max() < north


@pytest.mark.parametrize("seed", [demo.DEFAULT_SEED, 1])
def test_unrecorded_massif_is_as_suitable_as_the_recorded_ones(seed):
    scen = demo.make_demo_scenario(seed=seed, size="small")
    t, m = scen.layers["temperature"], scen.layers["moisture"]
    best = np.max([demo.niche_suitability(t, m, taxon) for taxon in demo.TAXA], axis=0)
    area = scen.grid.cell_area_km2
    good = {}
    for k, massif in enumerate(demo.MASSIFS):
        sel = (scen.massif_id == k) & (best >= 0.5)
        good[massif.role, massif.name] = float(area[sel].sum())
    recorded = [v for (role, _), v in good.items() if role == "recorded"]
    unrecorded = [v for (role, _), v in good.items() if role == "unrecorded"]
    dry = [v for (role, _), v in good.items() if role == "dry"]
    assert unrecorded[0] >= 0.6 * min(recorded), good
    assert dry[0] < 0.5 * min(recorded), good


def test_truth_is_consistent(small_read):
    layers, grid, rows = small_read
    for size in demo.SIZES:
        truth = demo.DEMO_TRUTH[size]
        assert truth == demo.demo_truth(size)
        assert truth.taxa == demo.TAXA
        assert truth.unrecorded.taxon is None and truth.unrecorded.role == "unrecorded"
        assert sum(t.role == "unrecorded" for t in truth.massifs) == 1
        g = demo.demo_grid(size)
        west, south, east, north = g.bounds
        for t in truth.massifs:
            assert west < t.longitude < east and south < t.latitude < north
    assert {r[0] for r in rows[1:]} == set(demo.DEMO_TRUTH["small"].taxa)
    # every massif's upland lies in its truth box
    labels, _ = uplands(layers["elevation"])
    for t in demo.DEMO_TRUTH["small"].massifs:
        lab = label_at(labels, grid, t.longitude, t.latitude)[0]
        lo, la = grid.lonlat(*np.nonzero(labels == lab))
        assert t.bbox[0] < lo.min() and lo.max() < t.bbox[2]
        assert t.bbox[1] < la.min() and la.max() < t.bbox[3]


# --- other files ------------------------------------------------------------------
def test_project_file_has_exactly_the_agreed_shape(small):
    with open(small, "rb") as fh:
        cfg = tomllib.load(fh)
    assert cfg == {
        "project": {"name": demo.SCENARIO_NAME, "random_state": demo.DEFAULT_SEED},
        "occurrences": {"path": "occurrences.csv"},
        "layers": {"paths": ["layers/*.tif"], "elevation": "elevation",
                   "exclude": ["elevation"]},
        "slices": {"layers": {demo.PAST_SLICE: [f"past/{demo.PAST_SLICE}/*.tif"]},
                   "stability": "geometric_mean"},
        "access": {"start_points": "start_points.csv"},
        "survey": {"surveyed": "surveys.csv"},
    }
    base = small.parent
    for rel in ("occurrences.csv", "start_points.csv", "surveys.csv"):
        assert (base / rel).is_file()
    assert len(list(base.glob(cfg["layers"]["paths"][0]))) == 4
    assert (base / "layers" / f"{cfg['layers']['elevation']}.tif").is_file()


def test_start_points_are_on_land_and_surveys_on_recorded_massifs(small, small_read):
    layers, grid, rows = small_read
    starts = read_csv(small.parent / "start_points.csv")
    assert starts[0] == ["name", "longitude", "latitude"]
    assert 3 <= len(starts) - 1 <= 8
    assert len({r[0] for r in starts[1:]}) == len(starts) - 1
    land = grid.mask
    sea_dist = ndimage.distance_transform_edt(land)  # cells to the nearest sea cell
    for name, x, y in starts[1:]:
        r, c, inside = grid.rowcol(float(x), float(y))
        assert inside and land[r, c], name
        if "road end" not in name:
            assert sea_dist[r, c] <= 1.5, name  # a coastal village touches the sea

    surveys = read_csv(small.parent / "surveys.csv")
    assert surveys[0] == ["longitude", "latitude", "date", "found"]
    labels, _ = uplands(layers["elevation"])
    lon = np.array([float(r[1]) for r in rows[1:]])
    lat = np.array([float(r[2]) for r in rows[1:]])
    recorded = set(int(v) for v in label_at(labels, grid, lon, lat)) - {0}
    found = []
    for x, y, date, f in surveys[1:]:
        assert int(label_at(labels, grid, float(x), float(y))[0]) in recorded
        day = dt.date.fromisoformat(date)
        assert dt.date(2000, 1, 1) <= day <= dt.date(2025, 12, 31)
        assert f in ("true", "false")
        found.append(f == "true")
    assert 0 < sum(found) < len(found)
    dates = [r[2] for r in surveys[1:]]
    assert dates == sorted(dates)


def test_grid_steps_match_pyproj_geodesics():
    """The demo cells are about 0.54 km x 0.55 km (pyproj.Geod on WGS84)."""
    g = demo.demo_grid("full")
    lat = g.row_centre_y[150]
    _, _, ew_m = GEOD.inv(85.0, lat, 85.005, lat)
    assert g.ew_step_km[150] == pytest.approx(ew_m / 1000.0, rel=1e-9)
    assert 0.53 < ew_m / 1000.0 < 0.545
    assert 0.55 < float(np.mean(g.ns_step_km)) < 0.556
    assert math.isclose(g.bounds[0] + g.bounds[2], 2 * 85.0)


def test_check_reports_collinearity_once_and_not_for_left_out_layers(small):
    from click.testing import CliRunner

    from screener.cli import main

    result = CliRunner().invoke(main, ["check", str(small)])
    assert result.exit_code == 0, result.output
    # the demo's predictors are not collinear, and elevation is left out of them
    assert "Collinear" not in result.output
    # with elevation put back among the predictors the pair elevation/temperature
    # (r = -1 through the lapse rate) is reported, once
    text = small.read_text(encoding="utf-8")
    other = small.parent / "with_elevation.toml"
    text = text.replace('exclude = ["elevation"]', "exclude = []")
    text = text.replace("[slices]\n", '[slices]\nstatic = ["elevation"]\n')
    other.write_text(text, encoding="utf-8")
    result = CliRunner().invoke(main, ["check", str(other)])
    assert result.exit_code == 0, result.output
    assert result.output.count("Collinear") == 1, result.output
    assert "elevation/temperature" in result.output
