"""Layer alignment: resampling equals GDAL's own warp, coverage, terrain before aggregation."""

import numpy as np
import pytest
import rasterio
from affine import Affine
from matplotlib import cbook
from numpy.testing import assert_allclose
from pyproj import Geod
from rasterio.enums import Resampling
from rasterio.warp import reproject

from screener.alignment import ReferenceGridSpec, align_layers, reference_grid
from screener.errors import LayerError, ScreenerDeprecationWarning
from screener.grid import Grid
from screener.layers import list_bands, read_layers, slope_aspect

from conftest import write_tif


def _direct(src_arr, src_t, src_crs, ref, method, src_nodata=np.nan):
    """A bare rasterio.warp.reproject of a whole array (the outside reference)."""
    out = np.full((ref.height, ref.width), np.nan, np.float32)
    reproject(src_arr, out, src_transform=src_t, src_crs=src_crs, src_nodata=src_nodata,
              dst_transform=ref.transform, dst_crs=ref.crs, dst_nodata=np.nan,
              resampling=getattr(Resampling, method))
    return out


def _read(path):
    with rasterio.open(path) as src:
        return src.read(1)


@pytest.fixture
def mixed(tmp_path):
    """A 0.05-degree reference, a 0.01-degree finer layer, a UTM layer, a class map."""
    rng = np.random.default_rng(3)
    ref_t = Affine(0.05, 0, 10.0, 0, -0.05, 50.0)
    ref = write_tif(tmp_path / "ref.tif", rng.normal(size=(300, 40)).astype(np.float32),
                    transform=ref_t)
    fine_t = Affine(0.01, 0, 9.97, 0, -0.01, 50.03)
    fine_arr = rng.normal(size=(1506, 206)).astype(np.float32)
    fine_arr[100:140, 50:60] = np.nan
    fine = write_tif(tmp_path / "fine.tif", fine_arr, transform=fine_t)
    utm_t = Affine(10000.0, 0, 550000.0, 0, -10000.0, 5560000.0)
    utm_arr = rng.normal(size=(170, 25)).astype(np.float32)
    utm = write_tif(tmp_path / "coarse_utm.tif", utm_arr, crs="EPSG:32632", transform=utm_t)
    cls_arr = rng.integers(1, 4, size=(1506, 206)).astype(np.int16)
    cls = write_tif(tmp_path / "cover.tif", cls_arr, transform=fine_t, nodata=0,
                    dtype="int16")
    return dict(ref=ref, fine=(fine, fine_arr, fine_t), utm=(utm, utm_arr, utm_t),
                cls=(cls, cls_arr, fine_t))


def test_alignment_equals_direct_reproject(mixed, tmp_path):
    """Outside reference: rasterio.warp.reproject of the whole layer, same resampling."""
    fine, fine_arr, fine_t = mixed["fine"]
    utm, utm_arr, utm_t = mixed["utm"]
    cls, cls_arr, cls_t = mixed["cls"]
    # 2000 cells a block: the 300-row grid is warped in bands of 256 rows
    al = align_layers([mixed["ref"], fine, utm, cls], cache_dir=tmp_path / "c",
                      categorical=["cover"], block_cells=2000)
    ref = al.reference
    methods = {o.name: o.method for o in al.origins}
    assert methods == {"ref": "none", "fine": "average", "coarse_utm": "bilinear",
                       "cover": "mode"}
    got = {b.name: _read(b.path) for b in al.bands}
    assert_allclose(got["fine"], _direct(fine_arr, fine_t, "EPSG:4326", ref, "average"),
                    rtol=0, atol=1e-6, equal_nan=True)
    assert_allclose(got["coarse_utm"],
                    _direct(utm_arr, utm_t, "EPSG:32632", ref, "bilinear"),
                    rtol=0, atol=1e-6, equal_nan=True)
    assert_allclose(got["cover"], _direct(cls_arr, cls_t, "EPSG:4326", ref, "mode", 0),
                    equal_nan=True)
    # the aligned files read as one stack; categories become indicators
    stack = read_layers(al.bands, categorical=["cover"])
    assert stack.names[:3] == ["ref", "fine", "coarse_utm"]
    assert {n for n in stack.names if n.startswith("cover=")} == {
        "cover=1", "cover=2", "cover=3"}
    # a second run reuses the cached files
    again = align_layers([mixed["ref"], fine, utm, cls], cache_dir=tmp_path / "c",
                         categorical=["cover"])
    assert [b.path for b in again.bands] == [b.path for b in al.bands]


def test_reference_from_project_settings(mixed, tmp_path):
    bands = list_bands([mixed["ref"]])
    ref = reference_grid(bands, crs="EPSG:4326", resolution=0.1,
                         extent=[10.2, 40.0, 11.0, 45.05])
    assert (ref.width, ref.height) == (8, 51)  # extended outwards to whole cells
    assert ref.transform.almost_equals(Affine(0.1, 0, 10.2, 0, -0.1, 45.05))
    with pytest.raises(LayerError, match="not a CRS"):
        reference_grid(bands, crs="EPSG:99999999")
    with pytest.raises(LayerError, match="names no layer"):
        reference_grid(bands, reference="refx")


def test_described_grid_aligns_like_gdal_and_the_old_keywords_still_work(mixed,
                                                                          tmp_path):
    """A grid described by CRS, cell size and extent: the fine layer averaged onto it
    equals rasterio.warp.reproject; the old keywords warn and give the same layers."""
    fine, fine_arr, fine_t = mixed["fine"]
    spec = ReferenceGridSpec(crs="EPSG:4326", resolution=0.1,
                             extent=[10.2, 40.0, 10.9, 45.0])
    al = align_layers([mixed["ref"], fine], cache_dir=tmp_path / "c", grid_spec=spec)
    assert (al.reference.width, al.reference.height) == (7, 50)
    assert al.reference.source == "project file"
    assert_allclose(_read(al.bands[1].path),
                    _direct(fine_arr, fine_t, "EPSG:4326", al.reference, "average"),
                    rtol=0, atol=1e-6, equal_nan=True)
    with pytest.warns(ScreenerDeprecationWarning, match=r"grid_spec=ReferenceGridSpec\("):
        old = align_layers([mixed["ref"], fine], cache_dir=tmp_path / "c", crs="EPSG:4326",
                           resolution=0.1, extent=[10.2, 40.0, 10.9, 45.0])
    assert old.reference == al.reference
    assert [b.path for b in old.bands] == [b.path for b in al.bands]
    assert old.origins == al.origins
    with pytest.raises(TypeError, match="not both"):
        align_layers([mixed["ref"]], cache_dir=tmp_path / "c", grid_spec=spec,
                     crs="EPSG:4326")


def test_reference_grid_spec_from_layer_settings(mixed):
    from types import SimpleNamespace

    from screener.project import SECTION_TYPES

    def project(**layers):  # a loaded project's [layers] section, defaults filled in
        return SimpleNamespace(layers=SECTION_TYPES["layers"](**layers))

    assert ReferenceGridSpec.from_settings(project()) == ReferenceGridSpec()
    spec = ReferenceGridSpec.from_settings(project(
        crs="EPSG:3035", resolution=[1000.0, 500.0], extent=[0, 0, 5000, 4000]))
    assert spec == ReferenceGridSpec("", "EPSG:3035", (1000.0, 500.0), (0, 0, 5000, 4000))
    # errors quote the value as the project file writes it (a TOML array)
    with pytest.raises(LayerError, match=r"resolution = \[1000.0, -1.0\]"):
        ReferenceGridSpec(crs="EPSG:3035", resolution=[1000.0, -1.0]).resolve(
            list_bands([mixed["ref"]]))


def test_layer_not_covering_the_study_area_names_layer_and_share(mixed, tmp_path):
    fine, _, _ = mixed["fine"]
    # the reference runs from 35 to 50 N; a layer covering only 42.5-50 N leaves half out
    half = write_tif(tmp_path / "north_half.tif", np.ones((150, 40), np.float32),
                     transform=Affine(0.05, 0, 10.0, 0, -0.05, 50.0))
    with pytest.raises(LayerError) as err:
        align_layers([mixed["ref"], fine, half], cache_dir=tmp_path / "c")
    msg = str(err.value)
    assert "'north_half'" in msg and "does not cover" in msg
    share = float(msg.split("does not cover the study area: ")[1].split("%")[0])
    assert share == pytest.approx(50.0, abs=0.5)


def _jacksboro():
    d = cbook.get_sample_data("jacksboro_fault_dem.npz")
    z = d["elevation"].astype(np.float64)
    top = max(float(d["ymin"]), float(d["ymax"]))  # the file's ymin/ymax are swapped
    t = Affine(float(d["dx"]), 0, float(d["xmin"]), 0, -float(d["dy"]), top)
    return z, t


def test_slope_on_a_real_dem_equals_numpy_gradient_on_metres():
    """matplotlib's sample DEM (jacksboro_fault_dem.npz, 3 arc-seconds, lon/lat):
    slope equals numpy.gradient with true metre spacing from pyproj's geodesic."""
    z, t = _jacksboro()
    grid = Grid("EPSG:4326", t, z.shape)
    slope, _ = slope_aspect(grid, z)
    geod = Geod(ellps="WGS84")
    lat = t.f + t.e * (np.arange(z.shape[0]) + 0.5)
    lon0 = t.c + 0.5 * t.a
    dx = geod.inv(np.full(lat.size, lon0), lat, np.full(lat.size, lon0 + t.a), lat)[2]
    north = np.cumsum(np.r_[0.0, geod.inv(np.full(lat.size - 1, lon0), lat[:-1],
                                          np.full(lat.size - 1, lon0), lat[1:])[2]])
    dz_dnorth = np.gradient(z, north, axis=0)  # rows run southwards: north increases
    dz_deast = np.gradient(z, axis=1) / dx[:, None]
    expected = np.degrees(np.arctan(np.hypot(dz_deast, dz_dnorth)))
    assert_allclose(slope, expected, rtol=1e-4, atol=1e-4)
    assert 5 < float(np.mean(expected)) < 30  # real relief: tens of percent slopes


def test_terrain_is_derived_at_native_resolution_then_aggregated(tmp_path):
    z, t = _jacksboro()
    dem = write_tif(tmp_path / "dem.tif", z.astype(np.float32), transform=t)
    ref_t = Affine(t.a * 8, 0, t.c, 0, t.e * 8, t.f)
    base = write_tif(tmp_path / "base.tif", np.ones((z.shape[0] // 8, z.shape[1] // 8),
                                                     np.float32), transform=ref_t)
    al = align_layers([base, dem], cache_dir=tmp_path / "c", elevation="dem",
                      derive=["slope", "aspect"])
    assert al.derived == ["slope", "aspect"]
    got = {b.name: _read(b.path) for b in al.bands}
    native = Grid("EPSG:4326", t, z.shape)
    slope, aspect = slope_aspect(native, z.astype(np.float32).astype(np.float64))
    assert_allclose(got["slope"], _direct(slope, t, "EPSG:4326", al.reference, "average"),
                    atol=1e-4, equal_nan=True)
    # slope of the averaged DEM is flatter than the average of native slopes
    coarse = Grid("EPSG:4326", ref_t, got["dem"].shape)
    assert np.nanmean(slope_aspect(coarse, got["dem"].astype(float))[0]) < np.nanmean(
        got["slope"])
    # aspect is a circular mean of the native aspects
    rad = np.radians(aspect.astype(np.float64))
    s = _direct(np.sin(rad).astype(np.float32), t, "EPSG:4326", al.reference, "average")
    c = _direct(np.cos(rad).astype(np.float32), t, "EPSG:4326", al.reference, "average")
    circ = (np.degrees(np.arctan2(s, c)) + 360) % 360
    diff = np.abs((got["aspect"] - circ + 180) % 360 - 180)
    assert np.nanmax(diff) < 1e-3
    origins = {o.name: o for o in al.origins}
    assert origins["slope"].method == "derived" and "then average" in origins["slope"].note


def test_circular_mean_of_aspect_near_north(tmp_path):
    # a slope falling north, its two halves turned to face about 350 and 10 degrees:
    # their circular mean is north, a plain mean of the angles would be south
    n = 64
    rr, cc = np.mgrid[0:n, 0:n].astype(float)
    tilt = np.where(cc < n / 2, 1.0, -1.0) * np.tan(np.radians(10)) * (cc - n / 2)
    z = 1000.0 + 0.5 * (rr * 30.0) + tilt * 30.0 * 0.5  # falls to the north overall
    t = Affine(30.0, 0, 500000.0, 0, -30.0, 5000000.0)
    dem = write_tif(tmp_path / "dem.tif", z.astype(np.float32), crs="EPSG:32633",
                    transform=t)
    ref_t = Affine(30.0 * n, 0, 500000.0, 0, -30.0 * n, 5000000.0)
    base = write_tif(tmp_path / "base.tif", np.ones((1, 1), np.float32), crs="EPSG:32633",
                     transform=ref_t)
    al = align_layers([base, dem], cache_dir=tmp_path / "c", elevation="dem",
                      derive=["aspect"])
    aspect = _read(al.bands[-1].path)[0, 0]
    assert min(aspect, 360 - aspect) < 5  # a plain average of 350 and 10 would give 180


def test_terrain_of_a_large_dem_is_derived_band_by_band(tmp_path):
    """Bands of 20 rows (overlapping by one) give the same terrain as the whole DEM."""
    z, t = _jacksboro()
    dem = write_tif(tmp_path / "dem.tif", z.astype(np.float32), transform=t)
    ref_t = Affine(t.a * 8, 0, t.c, 0, t.e * 8, t.f)
    base = write_tif(tmp_path / "base.tif", np.ones((z.shape[0] // 8, z.shape[1] // 8),
                                                     np.float32), transform=ref_t)
    kw = dict(elevation="dem", derive=["slope", "aspect"])
    whole = align_layers([base, dem], cache_dir=tmp_path / "a", **kw)
    banded = align_layers([base, dem], cache_dir=tmp_path / "b",
                          block_cells=20 * z.shape[1], **kw)
    for a, b in zip(whole.bands, banded.bands):
        assert_allclose(_read(b.path), _read(a.path), rtol=0, atol=1e-5, equal_nan=True)
    assert not list((tmp_path / "b").glob(".native-*"))  # temporary files removed
