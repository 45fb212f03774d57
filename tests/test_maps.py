"""Maps: hillshade vs matplotlib's LightSource, scale bar vs pyproj, furniture."""

import numpy as np
import pytest
from _synthetic_run import make_grid, make_run
from affine import Affine
from matplotlib import cbook
from matplotlib.colors import LightSource
from pyproj import Geod, Proj, Transformer

from screener.grid import Grid
from screener.layers import hillshade
from screener.outputs import maps


@pytest.fixture(scope="module")
def jacksboro():
    """A real 3 arc-second DEM shipped with matplotlib (its ymin/ymax are swapped)."""
    d = cbook.get_sample_data("jacksboro_fault_dem.npz")  # already an NpzFile
    with d:
        z = d["elevation"].astype(float)
        xmin, dx, dy = float(d["xmin"]), float(d["dx"]), float(d["dy"])
        top = max(float(d["ymin"]), float(d["ymax"]))
    # dx, dy are in degrees (3 arc-seconds).
    grid = Grid("EPSG:4326", Affine(dx, 0, xmin, 0, -dy, top), z.shape)
    return grid, z


def test_hillshade_equals_lightsource_on_projected_grid():
    grid = make_grid()
    rr, cc = np.mgrid[0:40, 0:50].astype(float)
    z = 500 + 300 * np.sin(rr / 6) * np.cos(cc / 7)
    # Reference: matplotlib.colors.LightSource.hillshade with dx, dy in metres.
    ref = LightSource(azdeg=315, altdeg=45).hillshade(z, dx=1000.0, dy=1000.0)
    np.testing.assert_allclose(hillshade(grid, z), ref, atol=1e-12)


def test_hillshade_uses_true_width_per_row(jacksboro):
    grid, _ = jacksboro
    ls = LightSource(azdeg=315, altdeg=45)
    # A surface rising 5 m per cell eastwards in every row: on the ground the slope is
    # 5 m over each row's own cell width, which shrinks northwards.
    z = 5.0 * np.tile(np.arange(float(grid.n_cols)), (grid.n_rows, 1))
    shade = hillshade(grid, z, azimuth=315, altitude=45)
    # Reference per row: LightSource.hillshade of a strip with that row's width in
    # metres (a constant slope, so matplotlib applies no contrast stretch) ...
    dx_m = grid.ew_step_km * 1000
    raw = np.array([ls.hillshade(z[:3, :5], dx=d, dy=90.0)[1, 2] for d in dx_m])
    # ... then matplotlib's documented stretch of the whole image to [0, 1].
    expected = (raw - raw.min()) / (raw.max() - raw.min())
    np.testing.assert_allclose(
        shade, np.repeat(expected[:, None], grid.n_cols, 1), atol=1e-6
    )
    # One mean width for all rows (degrees treated as planar) gives a flat image.
    flat = ls.hillshade(z, dx=float(dx_m.mean()), dy=90.0)
    assert np.ptp(flat) < 1e-9 and np.ptp(shade) == pytest.approx(1.0)


def test_hillshade_of_real_dem(jacksboro):
    grid, z = jacksboro
    z = z.copy()
    z[:5, :5] = np.nan
    shade = hillshade(grid, z)
    assert np.isnan(shade[:5, :5]).all()
    ok = shade[np.isfinite(shade)]
    assert ok.min() >= 0 and ok.max() <= 1 and ok.std() > 0.05


def test_scale_bar_is_geodesic_on_lonlat_grid(jacksboro):
    grid, _ = jacksboro
    fig, ax = maps.new_map()
    length = maps.add_scale_bar(ax, grid)
    bars = [p for p in ax.patches if (p.get_gid() or "").startswith("scale-bar")]
    assert len(bars) == 2 and length in (1, 2, 5, 10, 20)
    x0 = bars[0].get_x()
    width = sum(b.get_width() for b in bars)
    y0 = bars[0].get_y()
    # Reference: pyproj.Geod on WGS84 along the bar's own latitude.
    _, _, d = Geod(ellps="WGS84").inv(x0, y0, x0 + width, y0)
    assert d / 1000 == pytest.approx(length, rel=1e-6)


def test_north_arrow_follows_meridian_convergence():
    # UTM zone 36S grid west of its central meridian (33 E): true north leans.
    grid = make_grid()
    x, y = 420_000.0, 9_780_000.0
    lon, lat = grid.to_lonlat(x, y)
    conv = Proj("EPSG:32736").get_factors(float(lon), float(lat)).meridian_convergence
    # pyproj gives the angle from true north to grid north; the arrow's angle from
    # grid north to true north has the opposite sign.
    assert maps.north_angle_deg(grid, x, y) == pytest.approx(-conv, abs=1e-3)
    assert abs(conv) > 0.01
    geo = make_grid(geographic=True)
    assert maps.north_angle_deg(geo, 36.2, -2.2) == pytest.approx(0.0, abs=1e-9)


def test_graticule_on_projected_grid_is_lines_of_constant_degree():
    grid = make_grid(south=False)
    fig, ax = maps.new_map()
    info = maps.add_graticule(ax, grid)
    lines = [ln for ln in ax.lines if ln.get_gid() == "graticule"]
    assert len(lines) == len(info["meridians"]) + len(info["parallels"]) >= 2
    to_ll = Transformer.from_crs(grid.pyproj_crs, "EPSG:4326", always_xy=True)
    for ln, m in zip(lines, info["meridians"], strict=False):
        lon, _ = to_ll.transform(ln.get_xdata(), ln.get_ydata())
        np.testing.assert_allclose(lon, m, atol=1e-8)
    labels = [t.get_text() for t in ax.texts]
    assert any(lab.endswith("°E") for lab in labels)
    assert any(lab.endswith("°N") for lab in labels)


@pytest.mark.parametrize("geographic", [False, True])
def test_every_map_has_its_furniture(geographic):
    import matplotlib.pyplot as plt

    run = make_run(geographic=geographic)
    taxon = next(iter(run.taxa))
    axes = [
        maps.plot_suitability(run, taxon),
        maps.plot_ranges(run, taxon),
        maps.plot_sites(run),
        maps.plot_paths(run),
        maps.plot_site_zoom(run, run.sites.iloc[0]),
    ]
    for ax in axes:
        gids = {a.get_gid() for a in ax.get_children()} | {
            p.get_gid() for p in ax.patches
        }
        assert {"scale-bar-0", "north-arrow", "caption"} <= gids
        assert ax.get_legend() is not None
        assert any(ln.get_gid() == "graticule" for ln in ax.lines)
        png = maps.figure_to_png_bytes(ax.figure, dpi=40)
        assert png[:8] == b"\x89PNG\r\n\x1a\n"
    # Ranked sites carry their one identifier on the site map.
    texts = {t.get_text() for t in axes[2].texts}
    assert {str(s) for s in run.sites["site_id"]} <= texts
    assert plt.get_fignums() == []  # no pyplot state is created


def test_unknown_taxon():
    with pytest.raises(KeyError, match="no taxon"):
        maps.plot_suitability(make_run(), "Nobody")


@pytest.mark.parametrize("geographic", [False, True])
def test_no_label_overprints_another_or_leaves_the_image(geographic):
    # every text on the report's maps lies inside the saved (tight) image, and no two
    # graticule or caption labels overlap: corners stay clear
    import io

    from matplotlib import image as mimage

    run = make_run(geographic=geographic)
    for make in (lambda: maps.plot_sites(run), lambda: maps.plot_paths(run),
                 lambda: maps.plot_suitability(run, next(iter(run.taxa)))):
        ax = make()
        fig = ax.figure
        png = maps.figure_to_png_bytes(fig)
        h, w = mimage.imread(io.BytesIO(png)).shape[:2]
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.text import Text

        canvas = FigureCanvasAgg(fig)
        canvas.draw()
        renderer = canvas.get_renderer()
        texts = [t for t in fig.findobj(Text) if t.get_visible() and t.get_text()]
        boxes = [t.get_window_extent(renderer) for t in texts]
        # the tight box grows the image to hold everything drawn
        tight = fig.get_tightbbox(renderer).transformed(fig.dpi_scale_trans)
        for t, b in zip(texts, boxes, strict=True):
            assert tight.x0 - 1 <= b.x0 and b.x1 <= tight.x1 + 1, t.get_text()
            assert tight.y0 - 1 <= b.y0 and b.y1 <= tight.y1 + 1, t.get_text()
        assert w > 0 and h > 0
        degree = [b for t, b in zip(texts, boxes, strict=True) if "°" in t.get_text()]
        for i, a in enumerate(degree):
            for b in degree[:i]:
                assert not a.overlaps(b), "graticule labels overprint"


def test_site_zoom_contour_labels_lie_on_the_map():
    """Contours are drawn for the zoomed window only: every contour label lies inside
    the axes (labels outside are clipped from view but stay in a PDF's text)."""
    from matplotlib.text import Text

    run = make_run()
    for site in run.sites.head(3).to_dict("records"):
        ax = maps.plot_site_zoom(run, site, caption=False)
        (x0, x1), (y0, y1) = sorted(ax.get_xlim()), sorted(ax.get_ylim())
        labels = [t for t in ax.findobj(Text) if t.get_text().endswith(" m")
                  and t in ax.texts]
        assert labels, site["site_id"]  # the synthetic terrain has relief to label
        for t in labels:
            x, y = t.get_position()
            assert x0 <= x <= x1 and y0 <= y <= y1, (site["site_id"], t.get_text())
