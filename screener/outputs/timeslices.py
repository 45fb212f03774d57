"""Outputs of the time slices: rasters, the stability map, small multiples, report section.

Rasters go to ``slices/`` (suitability and MESS of each taxon in each slice) and
``stability/`` (climatic stability per taxon and of the clade), at the paths
:class:`screener.outputs.run_folder.RunFolder` names.
"""

from __future__ import annotations

import logging
import textwrap

import numpy as np
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Patch

from screener.outputs import maps
from screener.project import default
from screener.slices import PRESENT, history_readings

__all__ = ["plot_slices", "plot_stability", "report_section", "write_slice_rasters"]

log = logging.getLogger(__name__)

_METHOD_WORDS = {
    "geometric_mean": "geometric mean (the n-th root of the product)",
    "product": "product",
    "minimum": "minimum (the worst slice)",
}


def write_slice_rasters(result, run) -> list:
    """Write the slice and stability GeoTIFFs of ``result`` where the run folder ``run``
    (:class:`screener.outputs.run_folder.RunFolder`) names them.

    Returns the paths written.
    """
    from screener.outputs.rasters import write_raster

    ss = result.slices
    if ss is None:
        return []
    out = []
    run.make_subfolders(slices=True)
    for name in ss.names:
        grid = ss.grids[name]
        for taxon, p in ss.projections[name].items():
            out.append(write_raster(run.slice_suitability(name, taxon), p.suitability, grid,
                                    description=f"suitability of {taxon} in {name} "
                                    "(present models, not refitted)"))
            out.append(write_raster(run.slice_mess(name, taxon), p.mess, grid,
                                    description=f"MESS of {name} against the calibration "
                                    "data; < 0 = novel environment"))
    for taxon, arr in ss.stability.items():
        out.append(write_raster(run.stability(taxon), arr,
                                result.grid, description=f"climatic stability of {taxon} "
                                f"({ss.method} over present, {', '.join(ss.names)})"))
    out.append(write_raster(run.stability(), ss.clade_stability,
                            result.grid, description=f"climatic stability of the clade "
                            f"({ss.method} over present, {', '.join(ss.names)})"))
    return out


def plot_stability(result, *, ax=None, caption: bool = True):
    """Map the clade's climatic stability with the records and the ranked sites."""
    ss = result.slices
    ax = maps._prepare(ax)
    grid = result.grid
    im = ax.imshow(ss.clade_stability, extent=maps._extent(grid), cmap="viridis",
                   vmin=0.0, vmax=1.0, interpolation="nearest", zorder=1)
    maps._colorbar(ax, im, f"climatic stability ({ss.method.replace('_', ' ')})")
    handles = maps._draw_sites(ax, result.sites, fontsize=7)
    handles += maps._plot_records(ax, result, size=10)
    text = (
        f"Climatic stability of the clade: the {_METHOD_WORDS[ss.method]} of the "
        f"highest suitability of any taxon today and in {', '.join(ss.names)}. High "
        "values stayed suitable through every slice (candidate refugia). A hindcast from "
        "present-day models: a hypothesis, weakest where past climates are novel."
    ) if caption else None
    return maps._furnish(ax, grid, text, handles, legend_loc="lower right")


def _panel(ax, result, title, grid, cand, suitable, paths, kinds):
    extent = maps._extent(grid)
    maps._background(ax, result)
    show = np.where(suitable, 1.0, np.nan)
    ax.imshow(show, extent=extent, cmap="Greens", vmin=0, vmax=1.6, alpha=0.75,
              interpolation="nearest", zorder=2)
    rng = np.where(np.asarray(cand.patch_labels) < 0, 1.0, np.nan)
    ax.imshow(rng, extent=extent, cmap="Blues", vmin=0, vmax=1.2, alpha=0.85,
              interpolation="nearest", zorder=3)
    for path in paths.values():
        x, y = grid.xy(path[:, 0], path[:, 1])
        x, y = np.atleast_1d(x), np.atleast_1d(y)
        bad = ~suitable[path[:, 0], path[:, 1]]
        ax.plot(x, y, color="black", linewidth=0.8, zorder=6)
        ax.scatter(x[bad], y[bad], s=2, color=maps.OKABE_ITO["vermillion"], zorder=7)
    sites = result.sites
    if sites is not None and len(sites):
        sites.boundary.plot(ax=ax, color="black", linewidth=0.8, zorder=8)
        for sid, rank, x, y in zip(sites["site_id"], sites["rank"], sites["x"], sites["y"]):
            k = kinds.get(sid, "")
            if isinstance(k, str) and k:
                ax.text(x, y, f"{int(rank)}{'' if k == 'isolated' else '*'}", ha="center",
                        va="center", fontsize=6, fontweight="bold", zorder=9,
                        path_effects=maps._HALO)
    maps._set_frame(ax, grid)
    ax.set_title(title, fontsize=9)
    ax.set_xlabel("")
    ax.set_ylabel("")


def plot_slices(result, *, top_n: int = 10):
    """Small multiples: one panel per slice (the present first) with suitable cells,
    known ranges, the present sites and the least-cost paths with their gaps.

    Returns the Figure.
    """
    ss = result.slices
    names = [PRESENT, *ss.names]
    n = len(names)
    ncol = min(n, 3)
    nrow = int(np.ceil(n / ncol))
    fig = Figure(figsize=(3.6 * ncol, 3.4 * nrow + 0.9), dpi=100, layout="constrained")
    axes = [fig.add_subplot(nrow, ncol, i + 1) for i in range(n)]
    sites = result.sites if result.sites is None else result.sites.head(top_n)
    short = result
    if sites is not None:
        from dataclasses import replace

        short = replace(result, sites=sites)
    from screener.isolation import suitable_cells

    use = (result.settings.get("thresholds", {}) or {}).get("use", default("thresholds", "use"))
    th = {t: r.thresholds[use].value for t, r in result.taxa.items()}
    present_suitable = suitable_cells(result.grid, {t: r.suitability
                                                    for t, r in result.taxa.items()}, th)
    for ax, name in zip(axes, names):
        maps._prepare(ax)
        col = "kind" if name == PRESENT else f"kind_{name}"
        kinds = dict(zip(result.sites["site_id"], result.sites[col]))
        if name == PRESENT:
            cand, grid, suit = result.candidates, result.grid, present_suitable
        else:
            cand, grid, suit = ss.candidates[name], ss.grids[name], ss.suitable[name]
        paths = cand.paths if cand is not None else {}
        _panel(ax, short, name, grid, cand, suit, paths, kinds)
    handles = [
        Patch(facecolor="#8fce8f", label="suitable for the clade"),
        Patch(facecolor="#6a9fd4", label="known range (holds records)"),
        Line2D([], [], color="black", linewidth=0.8, label="least-cost path"),
        Line2D([], [], linestyle="none", marker=".", color=maps.OKABE_ITO["vermillion"],
               label="unsuitable ground on a path (the gap)"),
    ]
    # the note heads the legend: a free text at the figure's foot overprinted it
    note = textwrap.fill("Numbers are present ranks; * = joined, near-range, unsuitable "
                         "or drowned in that slice rather than isolated.", 45 * ncol)
    fig.legend(handles=handles, loc="outside lower center", ncol=2, fontsize=7,
               frameon=False, title=note, title_fontsize=7)
    _trim_height(fig, axes, nrow)
    return fig


def _trim_height(fig, axes, nrow: int) -> None:
    """Shorten the figure by the blank band its equal-aspect maps leave: lay it out,
    measure how much shorter (or narrower) each map is than the box it was given, and
    change the height by that; twice, since the layout moves with the height."""
    for _ in range(3):
        fig.draw_without_rendering()
        boxes = [(ax.get_position(original=True), ax.get_window_extent()) for ax in axes]
        W, H = fig.bbox.width, fig.bbox.height
        # positive: the maps are shorter than their boxes; negative: narrower
        slack = max(pos.height * H - box.height for pos, box in boxes)
        narrow = max(pos.width * W - box.width for pos, box in boxes)
        if slack <= 1.0 and narrow > 1.0:
            ratio = max(box.height / box.width for _, box in boxes)
            slack = -narrow * ratio
        if abs(slack) <= 1.0:
            return
        w, h = fig.get_size_inches()
        fig.set_size_inches(w, h - slack * nrow / fig.dpi)


def report_section(result, figure, table) -> str:
    """HTML of the report's time-slice section (``figure`` and ``table`` are the
    report's own figure and table helpers)."""
    from screener.outputs.report import _e

    ss = result.slices
    if ss is None:
        return '<p class="note">No time slices were given ([slices] layers).</p>'
    parts = [
        f'<p>Every taxon\'s present models were projected, without refitting, onto '
        f'{_e(", ".join(ss.names))}. Climatic stability combines the suitability of the '
        f"present and every slice by their {_e(_METHOD_WORDS[ss.method])}. Each "
        "present site was then followed through the slices: whether its ground was "
        "joined to a recorded range, within a short gap of one, isolated, or not "
        "suitable at all.</p>"
    ]
    read = history_readings(result.sites, ss.names)
    if read:
        parts.append("<ul>" + "".join(f"<li>{_e(t)}</li>" for t in read) + "</ul>")
    parts.append(figure(lambda: plot_stability(result), "Climatic stability of the clade.",
                        "climatic stability map"))
    parts.append(figure(lambda: plot_slices(result),
                        "The present and each time slice: suitable ground, known ranges, "
                        "the present sites and the gaps on their least-cost paths.",
                        "time slice small multiples"))
    rows = []
    for name in ss.names:
        for taxon, p in ss.projections[name].items():
            rows.append({"slice": name, "taxon": taxon,
                         "outside_range_share": p.outside_range_share,
                         "novel_share": float(np.mean(p.mess[np.isfinite(p.mess)] < 0))})
    parts.append(table(rows, ["slice", "taxon", "outside_range_share", "novel_share"],
                       caption="Share of each slice's cells outside the calibration range "
                       "(predictions there clamp or extrapolate) and with MESS < 0"))
    sites = result.sites
    cols = ["rank", "site_id", "kind"] + [f"kind_{n}" for n in ss.names] + [
        "n_slices_isolated", "connected_in", "refugium", "stable_share",
        "climatic_stability"]
    if sites is not None and len(sites):
        parts.append(table(sites.drop(columns="geometry", errors="ignore").head(10),
                           [c for c in cols if c in sites.columns],
                           caption="The best-ranked sites through time"))
    parts.append('<p class="note">A past slice is a model reconstruction, and a niche '
                 "fitted today may not hold in the past: read a site's history as an "
                 "argument for planning, not as evidence of a lineage's age.</p>")
    return "\n".join(parts)
