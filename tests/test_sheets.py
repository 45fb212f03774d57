"""Field sheets: UTM against pyproj, sampling points, PDF pages and their text."""

import re
import subprocess
import zlib

import numpy as np
import pytest
from _synthetic_run import ensure_debian_tool, make_run
from pyproj import Geod, Proj
from pyproj.aoi import AreaOfInterest
from pyproj.database import query_utm_crs_info

from screener import __version__
from screener.errors import InputError
from screener.outputs.cautions import CAUTIONS
from screener.outputs.sheets import (
    coordinate_precision,
    site_cell_mask,
    site_model,
    suggest_sampling_points,
    utm_position,
    utm_zone,
    write_field_sheets,
)


@pytest.mark.parametrize(
    "lon, lat, zone, band",
    [  # The 6-degree zone rule from 180 W and 8-degree bands from 80 S (from memory).
        (-177.0, 10.0, 1, "P"),
        (-0.1, 51.5, 30, "U"),
        (0.0, 0.0, 31, "N"),
        (36.8, -1.3, 37, "M"),
        (179.9, -45.0, 60, "G"),
        (-70.0, -79.9, 19, "C"),
        (20.0, 83.0, 33, "X"),  # Svalbard exception (from memory)
        (5.3, 60.4, 32, "V"),  # southern Norway exception (from memory)
    ],
)
def test_utm_zone_rule(lon, lat, zone, band):
    assert utm_zone(lon, lat) == (zone, band)


@pytest.mark.parametrize(
    "lon, lat",
    [(-3.0, 40.0), (-4.4, 49.6), (37.0, -1.3), (146.5, -42.0), (-65.0, -10.0)],
)
def test_utm_position_matches_pyproj(lon, lat):
    p = utm_position(lon, lat)
    # Reference: pyproj's own UTM projection string, and its UTM CRS lookup.
    ref = Proj(proj="utm", zone=p.zone, south=lat < 0, ellps="WGS84")
    e, n = ref(lon, lat)
    np.testing.assert_allclose([p.easting, p.northing], [e, n], atol=1e-3)
    assert p.hemisphere == ("S" if lat < 0 else "N")
    if lat < 0:
        assert p.northing > 5e6  # 10,000 km false northing in the south
    hits = query_utm_crs_info(
        datum_name="WGS 84", area_of_interest=AreaOfInterest(lon, lat, lon, lat)
    )
    assert str(p.epsg) in {h.code for h in hits}


def test_utm_outside_range():
    with pytest.raises(InputError, match="UTM range"):
        utm_zone(0.0, 85.0)


@pytest.fixture(scope="module")
def run():
    return make_run()


def test_sampling_points_are_spread_and_best(run):
    site = run.sites.iloc[0]
    mask = site_cell_mask(run.grid, site.geometry)
    s = np.fmax(*[t.suitability.astype(float) for t in run.taxa.values()])
    pts = suggest_sampling_points(
        run.grid, mask, s, n=5, min_spacing_km=3.0, site_id=site.site_id
    )
    assert len(pts) == 5 and list(pts.point_id) == [1, 2, 3, 4, 5]
    assert pts.suitability.iloc[0] == pytest.approx(np.nanmax(s[mask]))
    assert mask[pts.row, pts.col].all()
    # Spacing checked with pyproj's geodesic on WGS84.
    g = Geod(ellps="WGS84")
    for i in range(5):
        for j in range(i):
            _, _, d = g.inv(
                pts.longitude[i], pts.latitude[i], pts.longitude[j], pts.latitude[j]
            )
            assert d / 1000 >= 3.0 - 1e-9
    # Without spacing the choice is the n best cells (argsort as reference).
    top = suggest_sampling_points(run.grid, mask, s, n=4, min_spacing_km=0.0)
    best = np.sort(s[mask])[::-1][:4]
    np.testing.assert_allclose(np.sort(top.suitability)[::-1], best)


def _pdf_pages_text(path):
    """Per-page text: pdftotext (poppler) if available, else the content streams."""
    exe = ensure_debian_tool("pdftotext", "poppler-utils")
    if exe:
        out = subprocess.run(
            [exe, "-layout", str(path), "-"],
            capture_output=True,
            check=True,
            timeout=60,
        ).stdout.decode("utf-8", "replace")
        return [p for p in out.split("\f") if p.strip()]
    # Fallback: Type 42 fonts write 2-byte codes equal to the character for the
    # glyphs used here; join the strings of each TJ/Tj operator per stream.
    data = path.read_bytes()
    pages = []
    for raw in re.findall(rb"stream\r?\n(.*?)\r?\nendstream", data, re.S):
        try:
            txt = zlib.decompress(raw)
        except zlib.error:
            continue
        if b"BT" not in txt:
            continue
        parts = re.findall(rb"\((.*?)(?<!\\)\)", txt, re.S)
        pages.append(
            "".join(
                p.replace(b"\\", b"").decode("latin-1").replace("\x00", "")
                for p in parts
            )
        )
    if not pages:
        pytest.skip("no way to extract PDF text (pdftotext absent, streams unreadable)")
    return pages


@pytest.mark.slow
@pytest.mark.parametrize("page_size", ["A4", "letter"])
def test_field_sheets_pages_hold_coordinates(tmp_path, run, page_size):
    path = write_field_sheets(
        tmp_path / "sheets.pdf", run, top_n=2, page_size=page_size
    )
    assert path.read_bytes()[:5] == b"%PDF-"
    pages = _pdf_pages_text(path)
    assert len(pages) == 2
    # 1 km cells: 3 decimals (about 0.1 km) and UTM to 100 m, not 6 decimals
    assert coordinate_precision(run.grid) == (3, 100)
    for page, site in zip(pages, run.sites.itertuples(), strict=False):
        flat = " ".join(page.split())
        assert f"lat {site.latitude:.3f}, lon {site.longitude:.3f}" in flat
        assert f"{site.latitude:.6f}" not in flat
        u = utm_position(site.longitude, site.latitude)
        assert f"{u.zone}{u.band} {round(u.easting, -2):.0f} E" in flat
        assert "FULL PRECISION: do not share" in flat
        assert "Biosecurity" in flat and "Field safety" in flat


def test_field_sheets_in_poppler_text(tmp_path, run):
    """pdftotext (poppler) finds each sheet's site id, header and every caution."""
    exe = ensure_debian_tool("pdftotext", "poppler-utils")
    if exe is None:
        pytest.skip("pdftotext (poppler-utils) is absent and could not be installed")
    import dataclasses

    run = dataclasses.replace(
        run, settings={**run.settings, "project": {"name": "Test <ridge> survey"}})
    path = write_field_sheets(tmp_path / "sheets.pdf", run, top_n=3)
    out = subprocess.run([exe, str(path), "-"], capture_output=True, check=True,
                         timeout=60).stdout.decode("utf-8", "replace")
    pages = [" ".join(p.split()) for p in out.split("\f") if p.strip()]
    assert len(pages) == 3
    for page, site in zip(pages, run.sites.head(3).to_dict("records"), strict=True):
        assert f"Field sheet: site {site['site_id']} (rank {site['rank']})" in page
        assert "Project: Test <ridge> survey" in page and f"screener {__version__}" in page
        taxon, th, _ = site_model(run, site)
        assert f"Suitability from the {taxon} model" in page
        assert f"minimum training presence threshold, {th.value:.3f}" in page
        for heading, text in CAUTIONS:
            assert f"{heading}: {text}" in page, heading
        assert "elevation (m)" in page
        # the site's MESS share and clamped share, under their candidates.csv names
        assert f"novel_share (MESS < 0) {100 * site['novel_share']:.0f}%" in page
        assert f"clamped_share {100 * site['clamped_share']:.0f}%" in page


def test_sheet_walk_and_point_elevations(run):
    from screener.outputs.sheets import _facts, site_sampling_points

    site = run.sites.iloc[0].to_dict()
    lines = " ".join(_facts(run, site, len(run.sites)))
    assert f"Walk in: {site['walk_hours']:.1f} h from the nearest start point" in lines
    pts = site_sampling_points(run, top_n=1, n=3)
    rows, cols, _ = run.grid.rowcol(pts["x"].to_numpy(), pts["y"].to_numpy())
    np.testing.assert_allclose(pts["elevation_m"], run.elevation[rows, cols])


def test_coordinate_precision_follows_the_cell():
    from affine import Affine

    from screener.grid import Grid

    fine = Grid("EPSG:32736", Affine(30, 0, 400_000, 0, -30, 9_800_000), (10, 10))
    coarse = Grid("EPSG:4326", Affine(0.1, 0, 36, 0, -0.1, -2), (10, 10))
    # half a 30 m cell is 15 m: 4 decimals (about 11 m) and 10 m; half a 0.1 degree
    # cell (about 5.5 km): 2 decimals (about 1.1 km) and 1000 m
    assert coordinate_precision(fine) == (4, 10)
    assert coordinate_precision(coarse) == (2, 1000)


def test_field_sheets_bad_page_size(tmp_path, run):
    with pytest.raises(InputError, match="page_size"):
        write_field_sheets(tmp_path / "x.pdf", run, page_size="A3")


def test_sheet_text_stays_on_the_page_with_long_names(run):
    """Long taxon names and missing robustness figures wrap, not run off the page."""
    import dataclasses

    from matplotlib.backends.backend_agg import FigureCanvasAgg

    from screener.outputs.sheets import _page, site_sampling_points

    long_name = "Alpha " + "verylongepithet " * 12
    long_run = dataclasses.replace(run, taxa={long_name if i == 0 else k: v
                                              for i, (k, v) in enumerate(run.taxa.items())})
    site = run.sites.iloc[0].to_dict()
    site["nearest_taxon"] = long_name
    pts = site_sampling_points(run, top_n=1)
    fig = _page(long_run, site, pts, page_size="A4", n_sites=len(run.sites), marker=None,
                score_cols=[c for c in run.sites.columns if c.startswith("score_")],
                header="Project: test")
    canvas = FigureCanvasAgg(fig)
    canvas.draw()
    renderer = canvas.get_renderer()
    width = fig.bbox.width
    for t in fig.texts:
        box = t.get_window_extent(renderer)
        assert 0 <= box.x0 and box.x1 <= width, t.get_text()[:60]
    text = " ".join(" ".join(t.get_text() for t in fig.texts).split())
    assert "Rank under random weightings of the score: not estimated" in text
    assert "not estimated-not estimated" not in text
