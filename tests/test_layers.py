"""Layer intake: one grid, nodata union, reports, terrain with true metre spacing."""

import re

import numpy as np
import pytest
from affine import Affine
from numpy.testing import assert_allclose

from screener.errors import CollinearityWarning, GridMismatchError, LayerError, ScreenerWarning
from screener.grid import Grid
from screener.layers import check_layers, hillshade, read_layers, slope_aspect


def test_union_of_nodata_defines_valid_cells(small_layers, tif_writer, tmp_path):
    stack = read_layers(small_layers)
    assert stack.names == ["alpha", "beta", "gamma"]
    assert not stack.grid.mask[:3, :3].any()
    assert stack.grid.mask.sum() == 30 * 40 - 9
    assert np.isnan(stack.data[:, 0, 0]).all()


@pytest.mark.parametrize(
    "kw, what",
    [
        ({"crs": "EPSG:32633"}, "CRS"),
        ({"transform": Affine(0.02, 0, 10.0, 0, -0.02, -5.0)}, "resolution"),
        ({"transform": Affine(0.01, 0, 10.5, 0, -0.01, -5.0)}, "origin"),
        ({"shape": (31, 40)}, "shape"),
    ],
)
def test_mismatched_grids_name_both_files_and_the_difference(small_layers, tif_writer, kw, what):
    shape = kw.pop("shape", (30, 40))
    bad = tif_writer(small_layers[0].parent / "zeta.tif", np.ones(shape, np.float32), **kw)
    with pytest.raises(GridMismatchError) as err:
        read_layers([small_layers[0], bad])
    msg = str(err.value)
    assert "alpha.tif" in msg and "zeta.tif" in msg and what in msg


def test_all_nodata_layer_is_refused(small_layers, tif_writer):
    bad = tif_writer(small_layers[0].parent / "empty.tif", np.full((30, 40), np.nan, np.float32))
    with pytest.raises(LayerError, match="no data at all"):
        read_layers([small_layers[0], bad])


def test_nan_without_nodata_value_is_nodata(small_layers, tif_writer):
    arr = np.ones((30, 40), np.float32)
    arr[5, 5] = np.nan
    p = tif_writer(small_layers[0].parent / "nanonly.tif", arr, nodata=None)
    stack = read_layers([small_layers[1], p])
    assert not stack.grid.mask[5, 5]


def test_integer_sentinel_nodata(small_layers, tif_writer):
    arr = np.arange(1200, dtype=np.int16).reshape(30, 40)
    arr[7, 7] = -32768
    p = tif_writer(small_layers[0].parent / "ints.tif", arr, nodata=-32768, dtype="int16")
    stack = read_layers([small_layers[1], p])
    assert not stack.grid.mask[7, 7] and stack.grid.mask[7, 8]


def test_categorical_layer_warns_then_expands(small_layers, tif_writer):
    arr = (np.arange(1200).reshape(30, 40) % 3 + 1).astype(np.int16)
    p = tif_writer(small_layers[0].parent / "soil.tif", arr, nodata=0, dtype="int16")
    with pytest.warns(ScreenerWarning, match="categorical"):
        read_layers([small_layers[1], p])
    stack = read_layers([small_layers[1], p], categorical=["soil"])
    assert stack.names == ["beta", "soil=1", "soil=2", "soil=3"]
    assert_allclose(stack.data[1:].sum(axis=0)[stack.grid.mask], 1.0)


def test_cell_budget(small_layers):
    with pytest.raises(LayerError, match="cell budget"):
        read_layers(small_layers, cell_budget=100)


def test_missing_file(tmp_path):
    with pytest.raises(LayerError, match="does not exist"):
        read_layers([tmp_path / "none.tif"])


def test_multiband_file_takes_names_from_band_descriptions(tmp_path, small_layers):
    import rasterio

    p = tmp_path / "climate.tif"
    vals = np.stack([np.arange(16, dtype=np.float32).reshape(4, 4) * k for k in (1, 2, 3)])
    vals[1, 0, 0] = -1
    with rasterio.open(p, "w", driver="GTiff", width=4, height=4, count=3, dtype="float32",
                       crs="EPSG:4326", transform=Affine(1, 0, 0, 0, -1, 4), nodata=-1) as dst:
        dst.write(vals)
        dst.set_band_description(1, "temperature")
        dst.set_band_description(2, "rainfall")  # band 3 has no description
    stack = read_layers([p])
    assert stack.names == ["temperature", "rainfall", "climate_3"]
    assert_allclose(stack.data[2][stack.grid.mask], vals[2][stack.grid.mask])
    assert not stack.grid.mask[0, 0]  # band 2's nodata cell
    streamed = read_layers([p], memory_mb=1e-9)
    assert streamed.streamed
    assert_allclose(streamed.read_rows(slice(0, 4)), stack.data)
    with pytest.raises(LayerError, match="share the name 'climate_3'"):
        read_layers([p, p])


def test_netcdf_variables_are_layers(tmp_path):
    """Any format GDAL opens: a NetCDF file with two variables gives two layers."""
    import rasterio

    if "netCDF" not in rasterio.drivers.raster_driver_extensions().values():
        pytest.skip("this GDAL build has no NetCDF driver")
    from rasterio.shutil import copy

    tif = tmp_path / "clim.tif"
    arr = np.arange(40, dtype=np.float32).reshape(2, 4, 5)
    with rasterio.open(tif, "w", driver="GTiff", width=5, height=4, count=2,
                       dtype="float32", crs="EPSG:4326",
                       transform=Affine(1, 0, 10, 0, -1, 50)) as dst:
        dst.write(arr)
    nc = tmp_path / "clim.nc"
    copy(tif, nc, driver="netCDF")  # one NetCDF variable per band: Band1, Band2
    stack = read_layers([nc])
    assert stack.names == ["Band1", "Band2"]
    assert_allclose(stack.data, arr)
    assert stack.grid.transform.almost_equals(Affine(1, 0, 10, 0, -1, 50))


def test_constant_and_collinear_are_reported(small_layers, tif_writer):
    const = tif_writer(small_layers[0].parent / "flat.tif", np.full((30, 40), 3.0, np.float32))
    twin = tif_writer(small_layers[0].parent / "twin.tif",
                      read_layers([small_layers[0]]).data[0] * 2 + 1)
    stack = read_layers([small_layers[0], const, twin, small_layers[2]])
    with pytest.warns(ScreenerWarning):
        rep = check_layers(stack)
    assert rep.constant == ["flat"]
    assert [(a, b) for a, b, _ in rep.collinear] == [("alpha", "twin")]
    # scipy reference for the correlation itself
    from scipy.stats import pearsonr

    m = stack.grid.mask
    assert rep.collinear[0][2] == pytest.approx(pearsonr(stack.data[0][m], stack.data[2][m])[0])
    assert issubclass(CollinearityWarning, ScreenerWarning)
    # a layer left out of the models is not checked, so its twin raises no warning
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("error", CollinearityWarning)
        rep = check_layers(stack, names=["twin", "gamma"])
    assert rep.collinear == [] and rep.constant == []


def test_slope_uses_true_metre_spacing_on_lat_lon_grid():
    # A plane rising 1 m per metre eastward has slope 45 degrees wherever it is; on a
    # lat/lon grid the east-west spacing comes from pyproj's geodesic cell width.
    from pyproj import Geod

    g = Grid("EPSG:4326", Affine(0.001, 0, 30.0, 0, -0.001, 60.0), (20, 20))
    geod = Geod(ellps="WGS84")
    lat = 60.0 - 0.0005 - 0.001 * np.arange(20)
    _, _, w = geod.inv(np.zeros(20), lat, np.full(20, 0.001), lat)
    east_m = np.cumsum(np.ones((20, 20)) * w[:, None], axis=1)
    slope, aspect = slope_aspect(g, east_m)
    assert_allclose(slope[:, 1:-1], 45.0, atol=1e-6)
    # downslope faces west (col * width(row) also varies slightly with row, hence atol)
    assert_allclose(aspect[:, 1:-1], 270.0, atol=0.05)
    # north-facing: elevation rising southward
    _, _, h = geod.inv(np.zeros(19), lat[:-1], np.zeros(19), lat[1:])
    south_m = np.r_[0, np.cumsum(h)][:, None] * np.ones((1, 20))
    slope2, aspect2 = slope_aspect(g, south_m)
    assert_allclose(slope2[1:-1], 45.0, atol=1e-6)
    assert_allclose(aspect2[1:-1], 0.0, atol=1e-6)


def _ramp_with_coast_and_hole():
    """A plane on a 1 km projected grid (rising 0.06 m/m east, 0.08 m/m north) with a
    sea of nodata west of column 2 and a one-cell hole; also the full plane."""
    grid = Grid("EPSG:32633", Affine(1000.0, 0, 500000.0, 0, -1000.0, 5000000.0), (6, 9))
    east_m = (np.arange(9) + 0.5) * 1000.0
    north_m = -(np.arange(6) + 0.5) * 1000.0  # rows run southwards
    full = 0.06 * east_m[None, :] + 0.08 * north_m[:, None]
    z = full.copy()
    z[:, :2] = np.nan  # the sea
    z[3, 5] = np.nan  # a hole
    return grid, z, full


def test_slope_and_aspect_beside_nodata_are_the_planes():
    """Cells on the coast and around the hole keep the plane's slope and aspect (the
    one-sided difference to the valid neighbour); cells without elevation stay NaN.
    Reference: numpy.gradient of the full plane (no nodata) over the 1000 m spacing,
    which is the plane's own gradient: slope atan(hypot(0.06, 0.08)) = atan(0.1),
    aspect (downslope, clockwise from north) atan2(-0.06, -0.08) = 216.87 degrees."""
    grid, z, full = _ramp_with_coast_and_hole()
    d_south, d_east = np.gradient(full, 1000.0)
    ref_slope = np.degrees(np.arctan(np.hypot(d_east, -d_south)))
    ref_aspect = (np.degrees(np.arctan2(-d_east, d_south)) + 360.0) % 360.0
    land = np.isfinite(z)
    slope, aspect = slope_aspect(grid, z)
    beside = land & ~np.isfinite(np.gradient(z, axis=0) + np.gradient(z, axis=1))
    assert beside.sum() == 6 + 4  # the coast column and the hole's four neighbours
    assert_allclose(slope[land], ref_slope[land], rtol=1e-6)  # float32 output
    assert_allclose(aspect[land], ref_aspect[land], rtol=1e-6)
    assert_allclose(ref_slope, np.degrees(np.arctan(0.1)), rtol=1e-12)
    assert np.isnan(slope[~land]).all() and np.isnan(aspect[~land]).all()


def test_hillshade_beside_nodata_is_the_planes():
    """Hillshade of the ramp with a coast and a hole: every land cell, the coast and
    the hole's neighbours included, is lit as the full plane is by
    matplotlib.colors.LightSource.hillshade (dx = dy = 1000 m); nodata stays NaN."""
    from matplotlib.colors import LightSource

    grid, z, full = _ramp_with_coast_and_hole()
    ref = LightSource(azdeg=315, altdeg=45).hillshade(full, dx=1000.0, dy=1000.0)
    land = np.isfinite(z)
    shade = hillshade(grid, z)
    assert_allclose(shade[land], ref[land], rtol=1e-12)
    assert np.isnan(shade[~land]).all()


@pytest.mark.parametrize(
    "dtype, sentinel",
    [("int16", -32768), ("uint8", 255), ("uint16", 65535), ("float32", -9999.0)],
)
def test_untagged_sentinel_is_refused(small_layers, tif_writer, dtype, sentinel):
    arr = (np.arange(1200).reshape(30, 40) % 97).astype(dtype)
    arr[0, :5] = sentinel
    p = tif_writer(small_layers[0].parent / "untagged.tif", arr, nodata=None, dtype=dtype)
    expected = re.escape(f"no nodata value, but 5 cells hold {sentinel:.9g}")
    with pytest.raises(LayerError, match=expected):
        read_layers([small_layers[1], p])
    # once tagged, the same cells are nodata
    p = tif_writer(small_layers[0].parent / "tagged.tif", arr, nodata=sentinel, dtype=dtype)
    stack = read_layers([small_layers[1], p])
    assert not stack.grid.mask[0, :5].any() and stack.grid.mask[0, 5:].all()


def test_untagged_layer_without_sentinel_is_read(small_layers, tif_writer):
    arr = np.linspace(-500.0, 800.0, 1200, dtype=np.float32).reshape(30, 40)
    p = tif_writer(small_layers[0].parent / "plain.tif", arr, nodata=None)
    stack = read_layers([small_layers[1], p])
    np.testing.assert_array_equal(stack.layer("plain"), arr)
