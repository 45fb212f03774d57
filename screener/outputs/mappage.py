"""An offline interactive map page beside the report (``map.html``).

One self-contained HTML file: the rasters (hillshade, each taxon's suitability) are
inline PNG images, the vectors (sites, least-cost paths, walking routes, start points)
inline SVG, and a small script of our own does the rest: layer toggles, pan (drag),
zoom (wheel or buttons), and a card for a site when it is clicked.  There is no tile
server and no external request, so the page works in the field without a network.

The map is drawn in the grid's own coordinates, as the report's maps are; on
longitude/latitude grids the horizontal axis is scaled by the ratio of the mean
east-west to north-south cell width, so shapes are not stretched.
"""

from __future__ import annotations

import datetime as dt
import html
import io
import json
import logging
import math

import numpy as np

from screener import __version__
from screener.outputs._figure import png_data_uri
from screener.project import default

__all__ = ["render_map_page"]

log = logging.getLogger(__name__)

#: Rasters wider or taller than this many pixels are thinned (every k-th cell).
_MAX_PIXELS = 1600

_KIND_COLOURS = {
    "within-range": "#0072B2",
    "near-range": "#E69F00",
    "isolated": "#D55E00",
}
_KIND_DASH = {"within-range": "", "near-range": "6 3", "isolated": "2 2"}


def _png(rgba: np.ndarray) -> str:
    from matplotlib import image as mimage

    buf = io.BytesIO()
    mimage.imsave(buf, rgba, format="png")
    return png_data_uri(buf.getvalue())


def _thin(arr: np.ndarray) -> np.ndarray:
    k = max(1, math.ceil(max(arr.shape) / _MAX_PIXELS))
    return arr[::k, ::k]


def _raster(values, cmap: str, vmin: float, vmax: float, alpha: float = 1.0) -> str:
    import matplotlib

    v = _thin(np.asarray(values, float))
    ok = np.isfinite(v)
    norm = np.clip((np.where(ok, v, vmin) - vmin) / ((vmax - vmin) or 1.0), 0, 1)
    rgba = matplotlib.colormaps[cmap](norm)
    rgba[..., 3] = np.where(ok, alpha, 0.0)
    return _png((rgba * 255).astype(np.uint8))


def _e(v) -> str:
    return html.escape(str(v), quote=True)


def _num(v, spec=".2f", missing="n/a") -> str:
    try:
        f = float(v)
    except (TypeError, ValueError):
        return missing
    return format(f, spec) if math.isfinite(f) else missing


def _pct(share) -> str:
    """A share of a site's cells (0-1) as a percentage."""
    try:
        v = 100 * float(share)
    except (TypeError, ValueError):
        return "n/a"
    return f"{v:.0f}% of the site" if math.isfinite(v) else "n/a"


class _Pixels:
    """Grid CRS coordinates -> (col, row) pixel coordinates of the page's map."""

    def __init__(self, grid):
        inv = ~grid.transform
        self.coef = (inv.a, inv.b, inv.c, inv.d, inv.e, inv.f)

    def __call__(self, x, y):
        a, b, c, d, e, f = self.coef
        x = np.asarray(x, float)
        y = np.asarray(y, float)
        return a * x + b * y + c, d * x + e * y + f


def _path_d(px, xs, ys) -> str:
    c, r = px(xs, ys)
    pts = [f"{a:.2f},{b:.2f}" for a, b in zip(np.atleast_1d(c), np.atleast_1d(r),
                                               strict=True)]
    return "M" + " L".join(pts) if pts else ""


def _polygon_d(px, geom) -> str:
    polys = getattr(geom, "geoms", [geom])
    parts = []
    for poly in polys:
        for ring in [poly.exterior, *poly.interiors]:
            xs, ys = ring.xy
            parts.append(_path_d(px, xs, ys) + " Z")
    return " ".join(parts)


def _site_cards(result) -> dict:
    from screener.evidence import site_taxa
    from screener.outputs.sheets import coordinate_precision

    decimals, _ = coordinate_precision(result.grid)
    day = float((result.settings.get("access") or {}).get("walking_day_hours", default("access", "walking_day_hours")))
    routes = getattr(result, "routes", None) or {}
    models = site_taxa(result)
    cards = {}
    for r in result.sites.drop(columns="geometry", errors="ignore").to_dict("records"):
        sid = str(r["site_id"])
        lines = [
            ["rank", f"{int(r['rank'])} of {len(result.sites)}"],
            ["kind", str(r.get("kind", ""))],
            ["point (lat, lon)", f"{float(r['latitude']):.{decimals}f}, "
                                 f"{float(r['longitude']):.{decimals}f}"],
            ["area", f"{_num(r.get('area_km2'), ',.1f')} km²"],
            ["elevation", f"{_num(r.get('elevation_min'), '.0f')}-"
                          f"{_num(r.get('elevation_max'), '.0f')} m"],
            ["suitability", f"mean {_num(r.get('mean_suitability'))}, max "
                            f"{_num(r.get('max_suitability'))}"],
            ["model", models.get(sid, "")],
            ["novel_share (MESS < 0)", _pct(r.get("novel_share"))],
            ["clamped_share", _pct(r.get("clamped_share"))],
            ["nearest taxon", f"{r.get('nearest_taxon', '')} (gap "
                              f"{_num(r.get('gap_km'), '.1f')} km)"],
            ["score", f"{_num(r.get('score'), '.3f')} (robustness "
                      f"{_num(r.get('rank_robustness'))})"],
        ]
        route = routes.get(sid)
        if route is not None:
            lines.append(["walk in", f"from {route.start_name}: "
                          f"{route.distance_km:.1f} km, +{route.ascent_m:,.0f} m / "
                          f"-{route.descent_m:,.0f} m, {route.hours:.1f} h, "
                          f"{route.days(day)} day(s) at {day:g} h"])
        else:
            lines.append(["walk in", f"{_num(r.get('walk_hours'), '.1f')} h "
                          "(slope-only estimate)"])
        cards[sid] = {"title": f"Site {sid}", "lines": lines}
    return cards


_CSS = """
html,body{margin:0;height:100%;font-family:system-ui,-apple-system,"Segoe UI",sans-serif;
color:#222;background:#fff}
#wrap{display:flex;height:100vh}
#side{width:300px;flex:0 0 300px;overflow-y:auto;padding:.8em 1em;border-right:1px solid #ccc;
box-sizing:border-box;font-size:.9em}
#side h1{font-size:1.1em;margin:.2em 0 .6em}
#side label{display:block;margin:.2em 0}
#mapbox{flex:1 1 auto;position:relative;min-width:0;background:#dfe8ee}
#map{width:100%;height:100%;cursor:grab;display:block}
#tools{position:absolute;top:.6em;right:.6em;display:flex;gap:.3em}
#tools button{font-size:1.1em;width:2em;height:2em}
#card{margin-top:1em;border:1px solid #bbb;padding:.4em .7em;background:#fafafa}
#card table{border-collapse:collapse;font-size:.9em}
#card td{padding:.1em .4em;vertical-align:top}
.note{color:#555;font-size:.85em}
@media (max-width:700px){#wrap{flex-direction:column;height:auto}
#side{width:auto;flex:none;border-right:0;border-bottom:1px solid #ccc}
#mapbox{height:80vh;flex:none}}
"""

_SCRIPT = r"""
(function(){
  var svg = document.getElementById('map');
  var full = svg.getAttribute('viewBox').split(' ').map(Number);
  var vb = full.slice();
  function apply(){ svg.setAttribute('viewBox', vb.join(' ')); }
  function zoom(f, cx, cy){
    if (cx === undefined){ cx = vb[0] + vb[2]/2; cy = vb[1] + vb[3]/2; }
    var w = vb[2]*f, h = vb[3]*f;
    if (w > full[2]*4 || w < full[2]/200) return;
    vb = [cx - (cx - vb[0])*f, cy - (cy - vb[1])*f, w, h]; apply();
  }
  function toMap(evt){
    var r = svg.getBoundingClientRect();
    var s = Math.max(vb[2]/r.width, vb[3]/r.height);
    var ox = vb[0] + vb[2]/2 - r.width*s/2, oy = vb[1] + vb[3]/2 - r.height*s/2;
    return [ox + (evt.clientX - r.left)*s, oy + (evt.clientY - r.top)*s, s];
  }
  svg.addEventListener('wheel', function(e){
    e.preventDefault(); var p = toMap(e); zoom(e.deltaY > 0 ? 1.25 : 0.8, p[0], p[1]);
  }, {passive:false});
  var drag = null;
  svg.addEventListener('mousedown', function(e){
    drag = {x: e.clientX, y: e.clientY, s: toMap(e)[2], v0: vb[0], v1: vb[1]};
    svg.style.cursor = 'grabbing';
  });
  window.addEventListener('mouseup', function(){ drag = null; svg.style.cursor = 'grab'; });
  window.addEventListener('mousemove', function(e){
    if (!drag) return;
    vb[0] = drag.v0 - (e.clientX - drag.x)*drag.s;
    vb[1] = drag.v1 - (e.clientY - drag.y)*drag.s;
    apply();
  });
  document.getElementById('zin').onclick = function(){ zoom(0.8); };
  document.getElementById('zout').onclick = function(){ zoom(1.25); };
  document.getElementById('zreset').onclick = function(){ vb = full.slice(); apply(); };
  document.querySelectorAll('input[data-layer]').forEach(function(box){
    box.addEventListener('change', function(){
      var g = document.getElementById(box.getAttribute('data-layer'));
      g.style.display = box.checked ? '' : 'none';
    });
  });
  var cards = JSON.parse(document.getElementById('cards').textContent);
  function show(id){
    var c = cards[id]; if (!c) return;
    var card = document.getElementById('card');
    card.innerHTML = '';
    var h = document.createElement('h2'); h.textContent = c.title;
    h.style.fontSize = '1em'; card.appendChild(h);
    var t = document.createElement('table');
    c.lines.forEach(function(l){
      var tr = document.createElement('tr');
      l.forEach(function(v, i){ var td = document.createElement('td'); td.textContent = v;
        if (i === 0) td.style.fontWeight = 'bold'; tr.appendChild(td); });
      t.appendChild(tr);
    });
    card.appendChild(t);
    card.setAttribute('data-site', id);
  }
  document.querySelectorAll('[data-site]').forEach(function(el){
    if (el.id === 'card') return;
    el.addEventListener('click', function(e){ e.stopPropagation();
      show(el.getAttribute('data-site')); });
  });
  window.__showSite = show;
})();
"""


def render_map_page(result, *, title: str | None = None) -> str:
    """Render the offline interactive map page of a run.

    Parameters
    ----------
    result : screener.results.RunResult
        Pass the shareable result (sensitive coordinates generalised), as for the
        report.
    title : str, optional
        Page title; by default the project name followed by "survey map".

    Returns
    -------
    str
        The HTML document: layer toggles (hillshade, suitability per taxon, sites,
        least-cost paths, walking routes, start points), pan and zoom, and a card
        per site shown on click.  No external request is made.
    """
    from screener.layers import hillshade as shade_fn

    grid = result.grid
    project = str((result.settings.get("project") or {}).get("name") or "").strip()
    if title is None:
        title = f"{project}: survey map" if project else "Survey map"
    n_rows, n_cols = grid.shape
    kx = float(np.mean(grid.ew_step_km) / np.mean(grid.ns_step_km))
    width = n_cols * kx
    px = _Pixels(grid)
    layers = []  # (id, label, checked, svg)

    def image(href):
        return (f'<image href="{href}" x="0" y="0" width="{n_cols}" height="{n_rows}" '
                'preserveAspectRatio="none" style="image-rendering:pixelated"/>')

    shade = result.hillshade
    if shade is None and result.elevation is not None:
        shade = shade_fn(grid, result.elevation)
    if shade is not None:
        layers.append(("lyr-hillshade", "hillshade", True,
                       image(_raster(shade, "gray", 0.0, 1.0))))
    for i, (name, tr) in enumerate(result.taxa.items()):
        layers.append((f"lyr-suit-{i}", f"suitability: {name}", i == 0 and shade is None,
                       image(_raster(tr.suitability, "viridis", 0.0, 1.0, alpha=0.75))))
    stroke = max(n_cols, n_rows) / 400.0
    if result.paths is not None and len(result.paths):
        d = []
        for geom in result.paths.geometry:
            for line in getattr(geom, "geoms", [geom]):
                xs, ys = line.xy
                d.append(f'<path d="{_path_d(px, xs, ys)}"/>')
        layers.append(("lyr-paths", "least-cost paths", True,
                       f'<g fill="none" stroke="#000" stroke-width="{stroke:.3f}">'
                       + "".join(d) + "</g>"))
    routes = getattr(result, "routes", None) or {}
    if routes:
        d = [f'<path d="{_path_d(px, r.x, r.y)}"><title>{_e(sid)} walking route from '
             f'{_e(r.start_name)}</title></path>' for sid, r in routes.items()]
        layers.append(("lyr-routes", "walking routes", True,
                       f'<g fill="none" stroke="#fff" stroke-width="{1.6 * stroke:.3f}" '
                       f'stroke-dasharray="{4 * stroke:.3f} {2 * stroke:.3f}">'
                       + "".join(d) + "</g>"))
    sites = result.sites
    if sites is not None and len(sites):
        parts = []
        for r in sites.to_dict("records"):
            sid = str(r["site_id"])
            kind = str(r.get("kind", ""))
            colour = _KIND_COLOURS.get(kind, "#D55E00")
            dash = _KIND_DASH.get(kind, "")
            c, rr = px(float(r["x"]), float(r["y"]))
            parts.append(
                f'<g data-site="{_e(sid)}" style="cursor:pointer">'
                f'<path d="{_polygon_d(px, r["geometry"])}" fill="{colour}" '
                f'fill-opacity="0.25" stroke="{colour}" stroke-width="{stroke:.3f}" '
                f'stroke-dasharray="{dash}"/>'
                f'<circle cx="{float(c):.2f}" cy="{float(rr):.2f}" r="{3 * stroke:.3f}" '
                f'fill="#fff" stroke="#000" stroke-width="{0.5 * stroke:.3f}"/>'
                f'<text x="{float(c):.2f}" y="{float(rr) - 4 * stroke:.2f}" '
                f'font-size="{12 * stroke:.2f}" text-anchor="middle" '
                f'style="paint-order:stroke" stroke="#fff" '
                f'stroke-width="{stroke:.3f}">{_e(sid)}</text>'
                f"<title>site {_e(sid)} (rank {int(r['rank'])}, {_e(kind)})</title></g>"
            )
        layers.append(("lyr-sites", "sites", True, "<g>" + "".join(parts) + "</g>"))
    starts = getattr(result, "start_points", None)
    if starts is not None and len(starts):
        xs, ys = grid.from_lonlat(starts["longitude"].to_numpy(float),
                                  starts["latitude"].to_numpy(float))
        c, rr = px(xs, ys)
        names = (starts["name"].astype(str).tolist() if "name" in starts.columns
                 else [f"start {i + 1}" for i in range(len(starts))])
        marks = "".join(
            f'<g><rect x="{a - 3 * stroke:.2f}" y="{b - 3 * stroke:.2f}" '
            f'width="{6 * stroke:.2f}" height="{6 * stroke:.2f}" fill="#000"/>'
            f"<title>start point: {_e(n)}</title></g>"
            for a, b, n in zip(c, rr, names, strict=True)
        )
        layers.append(("lyr-starts", "start points", True, f"<g>{marks}</g>"))
    boxes = "".join(
        f'<label><input type="checkbox" data-layer="{lid}"'
        f'{" checked" if on else ""}> {_e(label)}</label>'
        for lid, label, on, _ in layers
    )
    hidden = ' style="display:none"'
    groups = "".join(
        f'<g id="{lid}"{"" if on else hidden}>{svg}</g>' for lid, _, on, svg in layers
    )
    cards = json.dumps(_site_cards(result) if sites is not None and len(sites) else {})
    cards = cards.replace("</", "<\\/")  # no early end of the script element
    body = f"""<div id="wrap"><div id="side">
<h1>{_e(title)}</h1>
<p class="note">Written {_e(dt.date.today().isoformat())} by screener {_e(__version__)}.
Sites are hypotheses for survey, not known localities. Walking routes are slope-only
estimates. Drag to pan, wheel or buttons to zoom; click a site for its card.</p>
<fieldset><legend>Layers</legend>{boxes}</fieldset>
<div id="card"><p class="note">Click a site on the map.</p></div>
</div><div id="mapbox">
<svg id="map" xmlns="http://www.w3.org/2000/svg" viewBox="0 0 {width:.3f} {n_rows:.3f}"
 preserveAspectRatio="xMidYMid meet" role="img" aria-label="survey map">
<g transform="scale({kx:.6f},1)">{groups}</g></svg>
<div id="tools"><button id="zin" title="zoom in">+</button>
<button id="zout" title="zoom out">&minus;</button>
<button id="zreset" title="whole map">&#8962;</button></div>
</div></div>
<script type="application/json" id="cards">{cards}</script>
<script>{_SCRIPT}</script>"""
    return (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>{_e(title)}</title><style>{_CSS}</style></head><body>\n"
        + body
        + "\n</body></html>\n"
    )
