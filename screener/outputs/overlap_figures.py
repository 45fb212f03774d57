"""Figures of niche overlap: null distributions, and occupancy in environmental space.

Colour maps are colour-blind safe (viridis, cividis).  Functions take ``ax=None`` (or a
pair of axes), draw, and return the matplotlib Figure; they never show or save it.
"""

from __future__ import annotations

import numpy as np

__all__ = ["plot_null_distribution", "plot_occupancy"]


def _pyplot():
    from screener.outputs import _figure

    return _figure


def plot_null_distribution(test, *, ax=None, bins: int = 30):
    """Histogram of a test's null overlap values with the observed value marked.

    Parameters
    ----------
    test : screener.overlap.OverlapTest
    ax : matplotlib.axes.Axes, optional
        Drawn into a new figure when omitted.
    bins : int, default 30

    Returns
    -------
    matplotlib.figure.Figure
    """
    plt = _pyplot()
    if ax is None:
        fig, ax = plt.subplots(figsize=(5, 3.2))
    else:
        fig = ax.figure
    null = np.asarray(test.null, float)
    null = null[np.isfinite(null)]
    colour = plt.get_cmap("cividis")(0.25)
    ax.hist(
        null,
        bins=bins,
        range=(0.0, 1.0),
        color=colour,
        alpha=0.8,
        label=f"null ({null.size} replicates)",
    )
    ax.axvline(
        test.observed,
        color="black",
        lw=2,
        ls="--",
        label=f"observed {test.statistic} = {test.observed:.2f}",
    )
    what = test.test if not test.direction else f"{test.test} ({test.direction})"
    ax.set_title(f"{what}, {test.space}: p = {test.p_value:.3f} ({test.alternative})")
    ax.set_xlabel(f"Overlap {test.statistic}")
    ax.set_ylabel("Replicates")
    ax.set_xlim(0.0, 1.0)
    ax.legend(frameon=False, fontsize="small")
    return fig


def plot_occupancy(space, *, names=("A", "B"), ax=None, cmap: str = "viridis"):
    """The two taxa's occupancies in environmental space, side by side.

    Each panel shows a taxon's occupancy (PC1 across, PC2 up), its records as points,
    and its available environment outlined by a contour; the other taxon's available
    environment is dashed.

    Parameters
    ----------
    space : screener.overlap.EnvironmentalSpace
    names : (str, str), default ("A", "B")
        Taxon names for the titles.
    ax : sequence of two matplotlib Axes, optional
        New figure with two panels when omitted.
    cmap : str, default "viridis"

    Returns
    -------
    matplotlib.figure.Figure
    """
    plt = _pyplot()
    if ax is None:
        fig, axes = plt.subplots(
            1, 2, figsize=(9, 4), sharex=True, sharey=True, constrained_layout=True
        )
    else:
        axes = list(ax)
        if len(axes) != 2:
            raise ValueError(
                f"`ax` must hold two Axes (one per taxon); got {len(axes)}."
            )
        fig = axes[0].figure
    extent = (
        space.pc1_edges[0],
        space.pc1_edges[-1],
        space.pc2_edges[0],
        space.pc2_edges[-1],
    )
    c1, c2 = space.pc1_centres, space.pc2_centres
    evr = space.explained_variance_ratio
    image = None
    for k, which in enumerate(("a", "b")):
        axk = axes[k]
        other = "b" if which == "a" else "a"
        occ = getattr(space, f"occupancy_{which}")
        image = axk.imshow(
            occ,
            origin="lower",
            extent=extent,
            cmap=cmap,
            vmin=0,
            vmax=1,
            aspect="auto",
            interpolation="nearest",
        )
        for mask, style in (
            (getattr(space, f"available_{which}"), "solid"),
            (getattr(space, f"available_{other}"), "dashed"),
        ):
            if mask.any() and not mask.all():
                axk.contour(
                    c1,
                    c2,
                    mask.astype(float),
                    levels=[0.5],
                    colors="white",
                    linestyles=style,
                    linewidths=1.2,
                )
        rec = getattr(space, f"scores_records_{which}")
        axk.scatter(
            rec[:, 0],
            rec[:, 1],
            s=10,
            c="black",
            edgecolors="white",
            linewidths=0.4,
            label="records",
        )
        axk.set_title(f"{names[k]}: occupancy")
        axk.set_xlabel(f"PC1 ({100 * evr[0]:.0f} %)")
    axes[0].set_ylabel(f"PC2 ({100 * evr[1]:.0f} %)")
    fig.colorbar(
        image, ax=axes, shrink=0.85, label="Occupancy (records / environment, max 1)"
    )
    fig.text(
        0.01,
        0.005,
        "Solid: own available environment; dashed: the other's.",
        fontsize="small",
    )
    return fig
