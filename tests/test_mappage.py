"""The offline map page: self-contained, one toggle per layer, and in headless
Chromium: fits 1400 px, no errors, every raster loads, a click shows the site's card,
toggles hide layers and the zoom buttons zoom."""

import dataclasses
import html
import re
from html.parser import HTMLParser

import numpy as np
import pandas as pd
import pytest
from _synthetic_run import TAXA, make_run

from screener.access import walking_surface
from screener.outputs.mappage import render_map_page
from screener.routes import walking_routes


@pytest.fixture(scope="module")
def run():
    r = make_run()
    lon, lat = r.grid.lonlat(38, 48)
    starts = pd.DataFrame({"name": ["Road <end>"], "longitude": [float(lon)],
                           "latitude": [float(lat)], "row": [38], "col": [48]})
    surf = walking_surface(r.grid, r.elevation, np.array([[38, 48]]))
    sites = r.sites.copy()
    sites["row"], sites["col"], _ = r.grid.rowcol(sites["x"].to_numpy(),
                                                  sites["y"].to_numpy())
    return dataclasses.replace(
        r, routes=walking_routes(r.grid, r.elevation, surf, starts, sites),
        start_points=starts)


@pytest.fixture(scope="module")
def page(run):
    return render_map_page(run)


class _Tags(HTMLParser):
    def __init__(self):
        super().__init__()
        self.attrs = []

    def handle_starttag(self, tag, attrs):
        self.attrs.append((tag, dict(attrs)))


def test_page_is_self_contained_with_a_toggle_per_layer(page, run):
    p = _Tags()
    p.feed(page)
    for tag, attrs in p.attrs:
        for key in ("src", "href"):
            if key in attrs:
                assert attrs[key].startswith(("data:image/png;base64,", "#")), (tag, attrs)
    assert not re.search(r"https?://(?!www\.w3\.org/2000/svg)", page)
    toggles = [a["data-layer"] for t, a in p.attrs if t == "input" and "data-layer" in a]
    assert toggles == ["lyr-hillshade", "lyr-suit-0", "lyr-suit-1", "lyr-paths",
                       "lyr-routes", "lyr-sites", "lyr-starts"]
    groups = [a["data-site"] for t, a in p.attrs if t == "g" and "data-site" in a]
    assert groups == list(run.sites["site_id"])
    # user text is escaped
    assert "Road &lt;end&gt;" in page and "<b>beta</b>" not in page
    assert f"suitability: {html.escape(TAXA[1])}" in page


def test_routes_left_out_when_empty(run):
    r = dataclasses.replace(run, routes={})
    assert 'data-layer="lyr-routes"' not in render_map_page(r)


@pytest.fixture(scope="session")
def chromium():
    from _browser import find_chromium

    exe = find_chromium()
    if exe is None:
        pytest.skip("chromium is not installed and could not be installed")
    return exe


_CHECKS = """
var __imgs = {loaded: 0, failed: 0, total: 0};
document.addEventListener('DOMContentLoaded', function(){
  document.querySelectorAll('svg image').forEach(function(el){
    __imgs.total += 1;
    var im = new Image();
    im.onload = function(){ __imgs.loaded += 1; };
    im.onerror = function(){ __imgs.failed += 1; };
    im.src = el.getAttribute('href');
  });
});
window.__probeExtra = function(){
  var out = {images: __imgs};
  var site = document.querySelector('g[data-site]');
  site.dispatchEvent(new MouseEvent('click', {bubbles: true}));
  out.card = document.getElementById('card').textContent;
  out.cardSite = document.getElementById('card').getAttribute('data-site');
  var box = document.querySelector('input[data-layer="lyr-sites"]');
  box.click();
  out.sitesHidden = document.getElementById('lyr-sites').style.display === 'none';
  var before = document.getElementById('map').getAttribute('viewBox');
  document.getElementById('zin').click();
  out.zoomed = document.getElementById('map').getAttribute('viewBox') !== before;
  out.firstSite = site.getAttribute('data-site');
  var box = document.getElementById('map').getBoundingClientRect();
  out.mapBox = [box.width, box.height];
  return out;
};
"""


@pytest.mark.parametrize("width", [1400, 800, 600])
def test_map_page_in_headless_chromium(tmp_path, page, run, chromium, width):
    from _browser import probe

    path = tmp_path / "map.html"
    path.write_text(page, encoding="utf-8")
    got = probe(chromium, path, tmp_path, width=width, extra_js=_CHECKS)
    # no horizontal page scroll and nothing to scroll sideways, wide or narrow
    assert got["scrollWidth"] <= got["innerWidth"], got
    assert got["overflowing"] == [], got["overflowing"]
    assert got["errors"] == []
    # the map keeps a usable size: more than half the window's width (the layer panel
    # goes above the map in a narrow window), at least 300 px tall
    assert got["extra"]["mapBox"][0] > width / 2 and got["extra"]["mapBox"][1] >= 300
    extra = got["extra"]
    n_rasters = 1 + len(run.taxa)  # hillshade and one suitability layer per taxon
    assert extra["images"] == {"loaded": n_rasters, "failed": 0, "total": n_rasters}
    first = run.sites.iloc[0]
    assert extra["cardSite"] == extra["firstSite"] == first["site_id"]
    assert f"Site {first['site_id']}" in extra["card"] and "Road <end>" in extra["card"]
    # the card gives the site's MESS share and clamped share under their column names
    assert f"novel_share (MESS < 0){100 * first['novel_share']:.0f}%" in extra["card"]
    assert f"clamped_share{100 * first['clamped_share']:.0f}%" in extra["card"]
    assert extra["sitesHidden"] and extra["zoomed"]
