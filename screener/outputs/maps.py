"""Maps for the report and the field sheets (matplotlib, no pyplot state).

Every map is drawn in the grid's own CRS and carries the same furniture: a scale bar
whose length is a geodesic distance (true at the bar's position, also on
longitude/latitude grids), a north arrow that points to true north (it leans on
projected grids away from the central meridian), a graticule of longitude/latitude
lines labelled in degrees (drawn as transformed curves on projected grids), a legend
and a caption that says what the map shows.

Colours are colour-blind safe: ``viridis`` / ``cividis`` for continuous values and the
Okabe-Ito palette for categories.  Categories also differ in line style or marker, so
maps stay readable printed in black and white.

Functions take ``ax=None`` (a new figure is made) and return the Axes; they never call
``plt.show()`` and never touch pyplot's global figure list, so they are safe under the
Agg backend and in long runs.
"""

from __future__ import annotations

import io
import logging
import math
import textwrap

import numpy as np
from matplotlib import colors as mcolors
from matplotlib import patheffects
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Patch, Rectangle

from screener.grid import geodesic_distance_km
from screener.layers import hillshade
from screener.outputs._figure import literal_text

__all__ = [
    "OKABE_ITO",
    "KIND_STYLE",
    "new_map",
    "north_angle_deg",
    "add_scale_bar",
    "add_north_arrow",
    "add_graticule",
    "add_caption",
    "plot_suitability",
    "plot_ranges",
    "plot_sites",
    "plot_paths",
    "plot_site_zoom",
    "plot_locator",
    "figure_to_png_bytes",
]

log = logging.getLogger(__name__)

#: Okabe & Ito (2008) colour-blind-safe categorical palette.
OKABE_ITO = {
    "black": "#000000",
    "orange": "#E69F00",
    "sky_blue": "#56B4E9",
    "bluish_green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "reddish_purple": "#CC79A7",
}

#: Colour and line style per site kind (line styles keep them apart in grey print).
KIND_STYLE = {
    "within-range": {"color": OKABE_ITO["blue"], "linestyle": "-"},
    "near-range": {"color": OKABE_ITO["orange"], "linestyle": "--"},
    "isolated": {"color": OKABE_ITO["vermillion"], "linestyle": ":"},
}

_TAXON_COLORS = [
    OKABE_ITO[k]
    for k in ("black", "sky_blue", "bluish_green", "reddish_purple", "yellow", "blue")
]
_TAXON_MARKERS = ["o", "^", "s", "D", "v", "P"]
_INK = "0.15"
_HALO = [patheffects.withStroke(linewidth=2.5, foreground="white")]


# --- set-up ------------------------------------------------------------------------
def new_map(figsize=(7.0, 6.0), dpi: int = 100):
    """A new Figure and Axes in the screener's restrained style."""
    fig = Figure(figsize=figsize, dpi=dpi, layout="constrained")
    ax = fig.add_subplot()
    return fig, ax


def _prepare(ax, figsize=(7.0, 6.0)):
    if ax is None:
        _, ax = new_map(figsize)
    for side in ("top", "right", "bottom", "left"):
        ax.spines[side].set_color("0.4")
        ax.spines[side].set_linewidth(0.6)
    ax.set_xticks([])
    ax.set_yticks([])
    return ax


def _extent(grid):
    left, bottom, right, top = grid.bounds
    return (left, right, bottom, top)


def _set_frame(ax, grid, window=None):
    left, right, bottom, top = window if window is not None else _extent(grid)
    ax.set_xlim(left, right)
    ax.set_ylim(bottom, top)
    if grid.is_geographic:
        mid = math.radians(0.5 * (bottom + top))
        ax.set_aspect(1.0 / max(math.cos(mid), 0.05))
    else:
        ax.set_aspect("equal")


def _taxon_style(i: int) -> dict:
    return {
        "color": _TAXON_COLORS[i % len(_TAXON_COLORS)],
        "marker": _TAXON_MARKERS[i % len(_TAXON_MARKERS)],
    }


# --- terrain -----------------------------------------------------------------------
# --- map furniture -----------------------------------------------------------------
def _nice_length(km: float) -> float:
    """Largest 1, 2 or 5 x 10^k not above ``km``."""
    if not km > 0:
        return 0.0
    p = 10.0 ** math.floor(math.log10(km))
    for m in (5, 2, 1):
        if m * p <= km:
            return m * p
    return p


def _km_per_unit(grid, x, y, width):
    lon0, lat0 = grid.to_lonlat(x, y)
    lon1, lat1 = grid.to_lonlat(x + width, y)
    d = geodesic_distance_km(
        float(lon0), float(lat0), float(lon1), float(lat1), grid.geod
    )
    return float(d) / width


def add_scale_bar(
    ax, grid, *, fraction: float = 0.25, loc=(0.05, 0.05), window=None
) -> float:
    """Draw a two-segment scale bar whose length is a geodesic distance.

    Parameters
    ----------
    ax : matplotlib.axes.Axes
    grid : screener.grid.Grid
    fraction : float, default 0.25
        The bar is the longest round length (1, 2, 5 x 10^k km) not above this share
        of the map width.
    loc : (float, float), default (0.05, 0.05)
        Lower-left corner of the bar as fractions of the map window.
    window : (left, right, bottom, top), optional
        The map window in CRS units; the grid's extent by default.

    Returns
    -------
    float
        The bar's length in km.  Its width in CRS units is this length divided by the
        local ground distance per CRS unit along the bar (from ``pyproj.Geod``), so
        the bar is true at its own latitude on longitude/latitude grids.
    """
    left, right, bottom, top = window if window is not None else _extent(grid)
    w = right - left
    x0 = left + loc[0] * w
    y0 = bottom + loc[1] * (top - bottom)
    kpu = _km_per_unit(grid, x0, y0, fraction * w)
    length = _nice_length(kpu * fraction * w)
    if length <= 0:
        return 0.0
    bar_w = length / kpu
    h = 0.012 * (top - bottom)
    for i, face in enumerate(("black", "white")):
        rect = Rectangle(
            (x0 + i * bar_w / 2, y0),
            bar_w / 2,
            h,
            facecolor=face,
            edgecolor="black",
            linewidth=0.7,
            zorder=6,
        )
        rect.set_gid(f"scale-bar-{i}")
        ax.add_patch(rect)
    label = f"{length:g} km"
    for xx, txt in ((x0, "0"), (x0 + bar_w, label)):
        ax.text(
            xx,
            y0 + 1.8 * h,
            txt,
            ha="center",
            va="bottom",
            fontsize=7,
            color=_INK,
            zorder=6,
            path_effects=_HALO,
        )
    return float(length)


def north_angle_deg(grid, x, y) -> float:
    """Angle of true north from the grid's +y axis at ``(x, y)``, degrees.

    Positive when true north lies clockwise from grid north (to the east).  Zero on
    longitude/latitude grids.
    """
    lon, lat = grid.to_lonlat(x, y)
    lon, lat = float(lon), float(lat)
    step = 0.01 if lat < 89.9 else -0.01
    x1, y1 = grid.from_lonlat(lon, lat + step)
    dx, dy = (float(x1) - x) * np.sign(step), (float(y1) - y) * np.sign(step)
    return float(math.degrees(math.atan2(dx, dy)))


def add_north_arrow(ax, grid, *, loc=(0.93, 0.86), window=None) -> float:
    """Draw an arrow to true north at the centre of the map window.

    Returns
    -------
    float
        The arrow's angle from the vertical in degrees (see :func:`north_angle_deg`).
    """
    left, right, bottom, top = window if window is not None else _extent(grid)
    angle = north_angle_deg(grid, 0.5 * (left + right), 0.5 * (bottom + top))
    s, c = math.sin(math.radians(angle)), math.cos(math.radians(angle))
    length = 22.0
    ann = ax.annotate(
        "",
        xy=loc,
        xycoords="axes fraction",
        xytext=(-s * length, -c * length),
        textcoords="offset points",
        arrowprops={
            "arrowstyle": "-|>",
            "color": "black",
            "lw": 1.2,
            "shrinkA": 0,
            "shrinkB": 0,
        },
        zorder=7,
    )
    ann.set_gid("north-arrow")
    ax.annotate(
        "N",
        xy=loc,
        xycoords="axes fraction",
        xytext=(s * 8, c * 8),
        textcoords="offset points",
        ha="center",
        va="center",
        fontsize=9,
        fontweight="bold",
        color="black",
        zorder=7,
        path_effects=_HALO,
    )
    return angle


def _nice_step_deg(span: float, target: int = 4) -> float:
    for step in (0.005, 0.01, 0.02, 0.05, 0.1, 0.2, 0.25, 0.5, 1, 2, 5, 10, 15, 30):
        if span / step <= target:
            return float(step)
    return 45.0


def _deg_label(value: float, axis: str, step: float) -> str:
    decimals = max(0, -math.floor(math.log10(step) + 1e-9)) if step < 1 else 0
    if step in (0.25,):
        decimals = 2
    v = round(value, decimals)
    hemi = (
        ("E" if v > 0 else "W" if v < 0 else "")
        if axis == "lon"
        else ("N" if v > 0 else "S" if v < 0 else "")
    )
    return f"{abs(v):.{decimals}f}°{hemi}"


#: Graticule labels keep this share of the map side clear of each corner.
_CORNER = 0.08


def add_graticule(
    ax, grid, *, step_deg: float | None = None, window=None, color: str = "0.55"
) -> dict:
    """Draw longitude/latitude lines, labelled in degrees at the map edges.

    On projected grids the lines are sampled densely in longitude/latitude and
    transformed into the grid CRS, so they bend as they should.

    Returns
    -------
    dict
        ``{"step_deg": float, "meridians": list, "parallels": list}`` (degrees).
    """
    left, right, bottom, top = window if window is not None else _extent(grid)
    t = np.linspace(0.0, 1.0, 41)
    xs = np.r_[
        left + t * (right - left),
        np.full(41, right),
        right - t * (right - left),
        np.full(41, left),
    ]
    ys = np.r_[
        np.full(41, bottom),
        bottom + t * (top - bottom),
        np.full(41, top),
        top - t * (top - bottom),
    ]
    lon, lat = grid.to_lonlat(xs, ys)
    lon_min, lon_max = float(np.min(lon)), float(np.max(lon))
    lat_min, lat_max = float(np.min(lat)), float(np.max(lat))
    step = step_deg or _nice_step_deg(max(lon_max - lon_min, lat_max - lat_min))
    kw = {"color": color, "linewidth": 0.5, "linestyle": (0, (4, 3)), "zorder": 4}
    meridians = np.arange(math.ceil(lon_min / step) * step, lon_max + 1e-12, step)
    parallels = np.arange(math.ceil(lat_min / step) * step, lat_max + 1e-12, step)
    lab = {"fontsize": 7, "color": "0.3"}
    pad_lat = 0.02 * (lat_max - lat_min)
    pad_lon = 0.02 * (lon_max - lon_min)
    for m in meridians:
        la = np.linspace(lat_min - pad_lat, lat_max + pad_lat, 60)
        x, y = grid.from_lonlat(np.full_like(la, m), la)
        (line,) = ax.plot(x, y, **kw)
        line.set_gid("graticule")
        order = np.argsort(y)
        xb = float(np.interp(bottom, np.asarray(y)[order], np.asarray(x)[order]))
        # labels too near a corner would overprint the other axis's labels
        if left + _CORNER * (right - left) <= xb <= right - _CORNER * (right - left):
            ax.annotate(
                _deg_label(m, "lon", step),
                xy=(xb, 0),
                xycoords=("data", "axes fraction"),
                xytext=(0, -3),
                textcoords="offset points",
                ha="center",
                va="top",
                **lab,
            )
    for p in parallels:
        lo = np.linspace(lon_min - pad_lon, lon_max + pad_lon, 60)
        x, y = grid.from_lonlat(lo, np.full_like(lo, p))
        (line,) = ax.plot(x, y, **kw)
        line.set_gid("graticule")
        order = np.argsort(x)
        yl = float(np.interp(left, np.asarray(x)[order], np.asarray(y)[order]))
        if bottom + _CORNER * (top - bottom) <= yl <= top - _CORNER * (top - bottom):
            ax.annotate(
                _deg_label(p, "lat", step),
                xy=(0, yl),
                xycoords=("axes fraction", "data"),
                xytext=(-3, 0),
                textcoords="offset points",
                ha="right",
                va="center",
                rotation=90,
                **lab,
            )
    return {
        "step_deg": step,
        "meridians": [float(v) for v in meridians],
        "parallels": [float(v) for v in parallels],
    }


def add_caption(ax, text: str, *, width: int = 95):
    """Write a caption under the map (wrapped to ``width`` characters)."""
    wrapped = "\n".join(textwrap.wrap(text, width=width))
    ann = ax.annotate(
        wrapped,
        xy=(0, 0),
        xycoords="axes fraction",
        xytext=(0, -16),
        textcoords="offset points",
        ha="left",
        va="top",
        fontsize=7.5,
        color="0.2",
        annotation_clip=False,
    )
    ann.set_gid("caption")
    return ann


def _furnish(
    ax,
    grid,
    caption: str | None,
    legend_handles=None,
    window=None,
    legend_loc="upper left",
):
    _set_frame(ax, grid, window)
    add_graticule(ax, grid, window=window)
    add_scale_bar(ax, grid, window=window)
    add_north_arrow(ax, grid, window=window)
    if legend_handles:
        leg = ax.legend(
            handles=legend_handles,
            loc=legend_loc,
            fontsize=7,
            frameon=True,
            framealpha=0.85,
            edgecolor="0.7",
        )
        leg.set_zorder(8)
    if caption:
        add_caption(ax, caption)
    ax.set_xlabel("")  # geopandas labels axes with CRS names; degrees are on the grid
    ax.set_ylabel("")
    _set_frame(ax, grid, window)
    return ax


def _plot_records(ax, result, taxa=None, *, size=18):
    handles = []
    for i, (name, tr) in enumerate(result.taxa.items()):
        if taxa is not None and name not in taxa:
            continue
        st = _taxon_style(i)
        rec = tr.records
        ax.scatter(
            rec.x,
            rec.y,
            s=size,
            marker=st["marker"],
            facecolor=st["color"],
            edgecolor="white",
            linewidth=0.6,
            zorder=5,
        )
        handles.append(
            Line2D(
                [],
                [],
                linestyle="none",
                marker=st["marker"],
                markerfacecolor=st["color"],
                markeredgecolor="white",
                color=st["color"],
                label=f"{name} records (n={rec.n})",
            )
        )
    return handles


def _colorbar(ax, image, label):
    cb = ax.figure.colorbar(image, ax=ax, shrink=0.6, pad=0.02)
    cb.set_label(label, fontsize=8)
    cb.ax.tick_params(labelsize=7)
    cb.outline.set_linewidth(0.5)
    return cb


# --- maps --------------------------------------------------------------------------
def plot_suitability(
    result,
    taxon: str,
    *,
    ax=None,
    cmap: str = "viridis",
    records: bool = True,
    caption: bool = True,
):
    """Map one taxon's consensus suitability with its records.

    Parameters
    ----------
    result : screener.results.RunResult
    taxon : str
        Key of ``result.taxa``.
    ax : matplotlib.axes.Axes, optional
    cmap : str, default "viridis"
    records : bool, default True
        Draw the taxon's records.
    caption : bool, default True

    Returns
    -------
    matplotlib.axes.Axes
    """
    tr = _taxon(result, taxon)
    ax = _prepare(ax)
    grid = result.grid
    im = ax.imshow(
        tr.suitability,
        extent=_extent(grid),
        origin="upper",
        cmap=cmap,
        vmin=0.0,
        vmax=1.0,
        interpolation="nearest",
        zorder=1,
    )
    _colorbar(ax, im, "suitability (0-1)")
    handles = _plot_records(ax, result, [taxon]) if records else []
    text = (
        (
            f"Consensus suitability for {taxon} (0 = unsuitable, 1 = most suitable) "
            f"with its {tr.records.n} records. A hypothesis for survey, not a map of "
            "presence. Scale bar true at its position."
        )
        if caption
        else None
    )
    return _furnish(ax, grid, text, handles)


def plot_ranges(result, taxon: str, *, ax=None, caption: bool = True):
    """Map the taxon's range at the minimum-training-presence and relaxed thresholds.

    Cells at or above MTP are drawn dark (bluish green), cells only at or above the
    relaxed threshold light (sky blue, hatched), so the two read apart in grey print.
    """
    tr = _taxon(result, taxon)
    ax = _prepare(ax)
    grid = result.grid
    s = np.asarray(tr.suitability, float)
    th = tr.thresholds or {}
    mtp = th.get("mtp")
    relaxed = th.get("relaxed")
    valid = np.isfinite(s)
    ax.imshow(
        np.where(valid, 1.0, np.nan),
        extent=_extent(grid),
        cmap=mcolors.ListedColormap(["#f2f2f2"]),
        vmin=0,
        vmax=1,
        interpolation="nearest",
        zorder=1,
    )
    handles = []
    if relaxed is not None:
        m = valid & (s >= relaxed.value)
        ax.contourf(
            *_centres(grid),
            m.astype(float),
            levels=[0.5, 1.5],
            colors=[OKABE_ITO["sky_blue"]],
            hatches=["...."],
            zorder=2,
        )
        handles.append(
            Patch(
                facecolor=OKABE_ITO["sky_blue"],
                hatch="....",
                edgecolor="0.3",
                label=f"relaxed (>= {relaxed.value:.2f}, {relaxed.area_km2:,.0f} km²)",
            )
        )
    if mtp is not None:
        m = valid & (s >= mtp.value)
        ax.contourf(
            *_centres(grid),
            m.astype(float),
            levels=[0.5, 1.5],
            colors=[OKABE_ITO["bluish_green"]],
            zorder=3,
        )
        handles.append(
            Patch(
                facecolor=OKABE_ITO["bluish_green"],
                edgecolor="0.3",
                label=f"MTP (>= {mtp.value:.2f}, {mtp.area_km2:,.0f} km²)",
            )
        )
    handles += _plot_records(ax, result, [taxon])
    text = None
    if caption:
        text = (
            f"Range of {taxon} at the minimum training presence (MTP: the lowest "
            "suitability at a record) and at the relaxed, deliberately broader "
            "threshold. Areas are ground areas."
        )
        if mtp is None and relaxed is None:
            text += " No thresholds were available for this taxon."
    return _furnish(ax, grid, text, handles)


def _centres(grid):
    rows = np.arange(grid.n_rows)
    cols = np.arange(grid.n_cols)
    x, _ = grid.xy(np.zeros_like(cols), cols)
    _, y = grid.xy(rows, np.zeros_like(rows))
    return np.asarray(x), np.asarray(y)


def _background(ax, result, window=None):
    """Grey hillshade where elevation exists, else the clade's max suitability."""
    grid = result.grid
    shade = result.hillshade
    if shade is None and result.elevation is not None:
        shade = hillshade(grid, result.elevation)
    if shade is not None:
        ax.imshow(
            shade,
            extent=_extent(grid),
            cmap="gray",
            vmin=0,
            vmax=1,
            interpolation="nearest",
            zorder=1,
            alpha=0.9,
        )
        return "hillshade of the elevation layer"
    if result.taxa:
        from screener.isolation import clade_suitability

        best = clade_suitability({n: t.suitability for n, t in result.taxa.items()})
        ax.imshow(
            best,
            extent=_extent(grid),
            cmap="Greys",
            vmin=0,
            vmax=1.4,
            interpolation="nearest",
            zorder=1,
        )
        return "highest suitability of any taxon (grey)"
    return "no background layer"


def _draw_sites(ax, sites, *, label=True, fontsize=8):
    handles = []
    if sites is None or len(sites) == 0:
        return handles
    for kind, style in KIND_STYLE.items():
        sub = sites[sites["kind"] == kind]
        if len(sub) == 0:
            continue
        sub.boundary.plot(
            ax=ax,
            color=style["color"],
            linestyle=style["linestyle"],
            linewidth=1.6,
            zorder=5,
        )
        handles.append(
            Line2D(
                [],
                [],
                color=style["color"],
                linestyle=style["linestyle"],
                linewidth=1.6,
                label=f"{kind} site",
            )
        )
    if label:
        for sid, x, y in zip(sites["site_id"], sites["x"], sites["y"], strict=True):
            ax.text(
                x,
                y,
                str(sid),
                ha="center",
                va="center",
                fontsize=fontsize,
                fontweight="bold",
                color="black",
                zorder=9,
                path_effects=_HALO,
            )
    return handles


def plot_sites(result, *, ax=None, top_n: int | None = None, caption: bool = True):
    """Map the ranked sites, labelled by site id (S01 = rank 1), on a hillshade."""
    ax = _prepare(ax)
    grid = result.grid
    what = _background(ax, result)
    sites = result.sites
    if sites is not None and top_n is not None:
        sites = sites.iloc[: int(top_n)]
    handles = _draw_sites(ax, sites)
    handles += _plot_records(ax, result, size=12)
    n = 0 if sites is None else len(sites)
    text = (
        (
            f"The {n} best-ranked candidate sites, labelled by site id (S01 = rank 1), "
            f"over the {what}. "
            "Outline style gives the kind of site. Sites are survey hypotheses; check "
            "permits and access first."
        )
        if caption
        else None
    )
    return _furnish(ax, grid, text, handles, legend_loc="lower right")


def plot_paths(result, *, ax=None, caption: bool = True):
    """Map least-cost paths from known ranges to sites, over the barrier map."""
    ax = _prepare(ax)
    grid = result.grid
    handles = []
    _background(ax, result)
    if result.barrier is not None:
        barrier = np.where(result.barrier > 0, result.barrier, np.nan)
        im = ax.imshow(
            barrier,
            extent=_extent(grid),
            cmap="cividis_r",
            vmin=0.0,
            vmax=1.0,
            interpolation="nearest",
            zorder=2,
        )
        _colorbar(ax, im, "barrier depth (1 - suitability on corridors)")
    if result.paths is not None and len(result.paths):
        result.paths.plot(ax=ax, color="black", linewidth=1.4, zorder=6)
        result.paths.plot(ax=ax, color="white", linewidth=0.5, zorder=6)
        handles.append(
            Line2D([], [], color="black", linewidth=1.4, label="least-cost path")
        )
    handles += _draw_sites(ax, result.sites, fontsize=7)
    handles += _plot_records(ax, result, size=10)
    text = (
        (
            "Least-cost paths over inverted suitability from the known ranges to "
            "near-range and isolated sites. Shaded cells are barriers: unsuitable cells "
            "on the least-cost corridors between different taxa's ranges, darker where "
            "less suitable (the gaps that may have split the lineages)."
        )
        if caption
        else None
    )
    return _furnish(ax, grid, text, handles, legend_loc="lower right")


def _site_window(grid, geom, pad_frac=0.6, min_cells=8):
    minx, miny, maxx, maxy = geom.bounds
    w = max(maxx - minx, min_cells * grid.res[0])
    h = max(maxy - miny, min_cells * grid.res[1])
    side = max(w, h) * (1 + 2 * pad_frac)
    cx, cy = 0.5 * (minx + maxx), 0.5 * (miny + maxy)
    return (cx - side / 2, cx + side / 2, cy - side / 2, cy + side / 2)


def plot_site_zoom(
    result, site, *, ax=None, points=None, route=None, caption: bool = True
):
    """Zoomed map of one site: hillshade with elevation contours, or suitability.

    Parameters
    ----------
    result : RunResult
    site : mapping
        One row of ``result.sites`` (a pandas Series or dict with ``geometry``).
    points : pandas.DataFrame, optional
        Sampling points of the site (``x``, ``y``, ``point_id``), drawn numbered.
    route : screener.routes.WalkingRoute, optional
        The walking route to the site, drawn as a dashed line.
    """
    ax = _prepare(ax, figsize=(5, 5))
    grid = result.grid
    window = _site_window(grid, site["geometry"])
    if result.elevation is not None:
        _background(ax, result)
        xc, yc = _centres(grid)
        # contours of the window only: their interval suits the site's relief, and no
        # label lands outside the map (clipped labels still fill the PDF's text)
        cols = np.flatnonzero((xc >= window[0]) & (xc <= window[1]))
        rows = np.flatnonzero((yc >= window[2]) & (yc <= window[3]))
        z = np.asarray(result.elevation, float)
        if cols.size >= 2 and rows.size >= 2:
            z = z[rows[0]:rows[-1] + 1, cols[0]:cols[-1] + 1]
            xc, yc = xc[cols[0]:cols[-1] + 1], yc[rows[0]:rows[-1] + 1]
        else:
            z = np.full((1, 1), np.nan)
        if np.isfinite(z).sum() > 4 and np.nanmax(z) > np.nanmin(z):
            cs = ax.contour(
                xc, yc, z, levels=12, colors="0.1", linewidths=0.5, zorder=3
            )
            ax.clabel(cs, fontsize=6, fmt="%.0f m", inline=True)
        what = "hillshade with elevation contours (m)"
    else:
        what = _background(ax, result)
    from geopandas import GeoSeries

    style = KIND_STYLE.get(str(site["kind"]), KIND_STYLE["isolated"])
    GeoSeries([site["geometry"]]).boundary.plot(
        ax=ax,
        color=style["color"],
        linestyle=style["linestyle"],
        linewidth=2.0,
        zorder=5,
    )
    handles = [
        Line2D(
            [],
            [],
            color=style["color"],
            linestyle=style["linestyle"],
            linewidth=2,
            label=f"site ({site['kind']})",
        )
    ]
    if points is not None and len(points):
        ax.scatter(
            points["x"],
            points["y"],
            s=30,
            marker="X",
            facecolor="white",
            edgecolor="black",
            linewidth=0.8,
            zorder=7,
        )
        for pid, x, y in zip(points["point_id"], points["x"], points["y"], strict=True):
            ax.annotate(
                str(int(pid)),
                xy=(x, y),
                xytext=(4, 4),
                textcoords="offset points",
                fontsize=7,
                zorder=8,
                path_effects=_HALO,
            )
        handles.append(
            Line2D(
                [],
                [],
                linestyle="none",
                marker="X",
                markerfacecolor="white",
                markeredgecolor="black",
                label="sampling point",
            )
        )
    if route is not None and len(route.x) > 1:
        ax.plot(route.x, route.y, color="white", linewidth=3.0, zorder=6)
        ax.plot(route.x, route.y, color="black", linewidth=1.3, linestyle=(0, (4, 2)),
                zorder=6)
        handles.append(
            Line2D([], [], color="black", linewidth=1.3, linestyle=(0, (4, 2)),
                   label=f"walking route from {route.start_name}")
        )
    handles += _plot_records(ax, result, size=14)
    text = (
        f"Site {site['site_id']} (rank {int(site['rank'])}) over the {what}."
        if caption
        else None
    )
    return _furnish(ax, grid, text, handles, window=window, legend_loc="lower right")


def plot_locator(result, site, *, ax=None):
    """Small locator map: the whole grid with the site marked by a star."""
    ax = _prepare(ax, figsize=(3.5, 3.5))
    grid = result.grid
    _background(ax, result)
    ax.plot(
        [site["x"]],
        [site["y"]],
        marker="*",
        markersize=14,
        markerfacecolor="white",
        markeredgecolor="black",
        zorder=7,
    )
    _set_frame(ax, grid)
    add_graticule(ax, grid)
    add_scale_bar(ax, grid, fraction=0.3)
    add_north_arrow(ax, grid)
    ax.set_xlabel("")
    ax.set_ylabel("")
    _set_frame(ax, grid)
    return ax


def _taxon(result, taxon):
    try:
        return result.taxa[taxon]
    except KeyError:
        raise KeyError(
            f"no taxon {taxon!r} in this result; taxa are {sorted(result.taxa)}"
        ) from None


def figure_to_png_bytes(fig, dpi: int = 110) -> bytes:
    """Render a Figure to PNG bytes (for embedding in the report).

    Examples
    --------
    >>> fig, ax = new_map((2, 2))
    >>> figure_to_png_bytes(fig)[:8] == b"\\x89PNG\\r\\n\\x1a\\n"
    True
    """
    buf = io.BytesIO()
    # a tight box keeps labels and captions drawn outside the axes on the image
    literal_text(fig).savefig(buf, format="png", dpi=dpi, facecolor="white",
                              bbox_inches="tight", pad_inches=0.08)
    return buf.getvalue()
