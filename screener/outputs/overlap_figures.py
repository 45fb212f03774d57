"""Figures of niche overlap: null distributions, and the two niches in environmental space.

The environmental-space figure is meant to be read without a caption: the available
environment is a grey ground, each taxon's niche a colour, the cells both niches
share a third colour, records are drawn on top with one marker per taxon, and the
title carries the overlap.  Colours are from a palette readable with the common
colour-vision deficiencies (Okabe & Ito 2008, from memory).  Functions take ``ax=None``,
draw, and return the matplotlib Figure; they never show or save it.
"""

from __future__ import annotations

import numpy as np

__all__ = ["plot_null_distribution", "plot_niches", "niche_core", "NICHE_MASS"]

#: A taxon's niche in the figure: the smallest set of cells holding this share of its
#: occupancy (ours).
NICHE_MASS = 0.9
_A_ONLY = "#E69F00"  # orange
_B_ONLY = "#56B4E9"  # sky blue
_BOTH = "#009E73"  # bluish green
_GROUND = "#000000"


def _pyplot():
    from screener.outputs import _figure

    return _figure


def _hex_rgb(colour: str) -> np.ndarray:
    from matplotlib.colors import to_rgb

    return np.array(to_rgb(colour))


def plot_null_distribution(test, *, ax=None, bins: int = 30, reported_d=None):
    """Histogram of a test's null overlap values with the tested value marked.

    Parameters
    ----------
    test : screener.overlap.OverlapTest
    ax : matplotlib.axes.Axes, optional
        Drawn into a new figure when omitted.
    bins : int, default 30
    reported_d : float, optional
        The D reported for the pair's maps; drawn (dotted, labelled) when the test's
        own statistic differs from it, as in geographic space where the tests refit a
        model per replicate.

    Returns
    -------
    matplotlib.figure.Figure
    """
    plt = _pyplot()
    if ax is None:
        fig, ax = plt.subplots(figsize=(5.5, 3.4), layout="constrained")
    else:
        fig = ax.figure
    null = np.asarray(test.null, float)
    null = null[np.isfinite(null)]
    ax.hist(
        null,
        bins=bins,
        range=(0.0, 1.0),
        color=_B_ONLY,
        alpha=0.85,
        label=f"{test.statistic} of {null.size} random replicates",
    )
    tested = "tested" if test.space == "geographic" else "observed"
    ax.axvline(
        test.observed,
        color="black",
        lw=2,
        label=f"{tested} {test.statistic} = {test.observed:.2f}",
    )
    if reported_d is not None and abs(float(reported_d) - test.observed) > 5e-3:
        ax.axvline(
            float(reported_d),
            color=_A_ONLY,
            lw=2,
            ls=":",
            label=f"reported D of the maps = {float(reported_d):.2f}",
        )
    side = {"upper": "right", "lower": "left"}[test.tail]
    what = test.test if not test.direction else f"{test.test} ({test.direction})"
    ax.set_title(
        f"{what} test, {test.space} space: {test.p_text()} "
        f"(share of replicates at or to the {side} of the black line)",
        fontsize="medium",
        wrap=True,
    )
    ax.set_xlabel(f"Overlap {test.statistic} (0 = none, 1 = identical)")
    ax.set_ylabel("Replicates")
    ax.set_xlim(0.0, 1.0)
    ax.legend(frameon=False, fontsize="small")
    return fig


def niche_core(occupancy, mass: float = NICHE_MASS) -> np.ndarray:
    """Smallest set of cells holding ``mass`` of an occupancy surface (bool array).

    Cells are taken from the highest occupancy down until their sum reaches ``mass``
    of the total.
    """
    occ = np.asarray(occupancy, float)
    flat = np.where(np.isfinite(occ), occ, 0.0).ravel()
    total = flat.sum()
    out = np.zeros(flat.shape, bool)
    if total <= 0:
        return out.reshape(occ.shape)
    order = np.argsort(flat, kind="stable")[::-1]
    cum = np.cumsum(flat[order]) / total
    k = int(np.searchsorted(cum, mass)) + 1
    out[order[:k]] = True
    return out.reshape(occ.shape)


def _axis_label(space, k: int) -> str:
    share = 100 * float(space.explained_variance_ratio[k])
    label = f"Environment axis {k + 1} ({share:.0f} % of variation)"
    names = list(getattr(space, "predictor_names", ()) or ())
    comp = space.pca.components_[k]
    if len(names) == len(comp):
        top = np.argsort(-np.abs(comp))[:2]
        words = [f"{'more' if comp[i] > 0 else 'less'} {names[i]}" for i in top]
        label += "\nto the " + ("right" if k == 0 else "top") + ": " + ", ".join(words)
    return label


def plot_niches(space, *, names=("A", "B"), D=None, ax=None):
    """Where two taxa sit in their shared environmental space, in one panel.

    * grey ground: the environment available to the pair (darker = more common);
    * orange / blue: cells in only one taxon's niche (the cells holding
      :data:`NICHE_MASS` of its occupancy); green: cells in both niches;
    * circles / triangles: each taxon's records (not drawn for a sensitive taxon in a
      shareable report: its record scores are withheld, see
      :func:`screener.outputs.privacy.generalised_result`).

    Parameters
    ----------
    space : screener.overlap.EnvironmentalSpace
    names : (str, str), default ("A", "B")
    D : float, optional
        Overlap shown in the title (computed from the space when omitted).
    ax : matplotlib.axes.Axes, optional

    Returns
    -------
    matplotlib.figure.Figure
    """
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    from screener.overlap import environmental_overlap

    plt = _pyplot()
    if ax is None:
        fig, ax = plt.subplots(figsize=(7.5, 5.2), layout="constrained")
    else:
        fig = ax.figure
    if D is None:
        D = environmental_overlap(space)[0]
    extent = (space.pc1_edges[0], space.pc1_edges[-1],
              space.pc2_edges[0], space.pc2_edges[-1])
    core_a = niche_core(space.a.occupancy)
    core_b = niche_core(space.b.occupancy)
    rgba = np.ones(core_a.shape + (4,))
    # ground: grey, darker where the available environment is more common
    env = np.where(space.support, np.sqrt(np.clip(space.z_env, 0, 1)), 0.0)
    grey = 0.93 - 0.30 * env
    rgba[..., :3] = np.where(space.support[..., None], grey[..., None], 1.0)
    for mask, colour in ((core_a & ~core_b, _A_ONLY), (core_b & ~core_a, _B_ONLY),
                         (core_a & core_b, _BOTH)):
        rgba[mask, :3] = _hex_rgb(colour)
    ax.imshow(rgba, origin="lower", extent=extent, aspect="auto",
              interpolation="nearest")
    markers = (("o", _A_ONLY), ("^", _B_ONLY))
    for which, (marker, colour), name in zip(("a", "b"), markers, names):
        rec = space.taxon(which).scores_records
        ax.scatter(rec[:, 0], rec[:, 1], s=28, marker=marker, c=colour,
                   edgecolors="black", linewidths=0.8, zorder=3)
    shown = []
    for t, name in zip((space.a, space.b), names):
        n = len(t.scores_records)
        shown.append(f"{name} records ({n})" if n else
                     f"{name} records: not drawn\n(sensitive taxon)")
    handles = [
        Patch(facecolor=_A_ONLY, label=f"only {names[0]}'s niche"),
        Patch(facecolor=_B_ONLY, label=f"only {names[1]}'s niche"),
        Patch(facecolor=_BOTH, label="both niches (overlap)"),
        Patch(facecolor="0.75", label="available environment\n(darker = more common)"),
        Patch(facecolor="white", edgecolor="0.6", label="not available"),
        Line2D([], [], ls="", marker="o", mfc=_A_ONLY, mec="black",
               label=shown[0]),
        Line2D([], [], ls="", marker="^", mfc=_B_ONLY, mec="black",
               label=shown[1]),
    ]
    ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.01, 1.0),
              frameon=False, fontsize="small")
    ax.set_title(
        f"{names[0]} and {names[1]}: niche overlap D = {D:.2f}\n"
        "(0 = none, 1 = identical; a niche = the cells holding "
        f"{100 * NICHE_MASS:.0f} % of a taxon's\nrecords, weighed against how "
        "common each environment is)",
        fontsize="medium",
    )
    ax.set_xlabel(_axis_label(space, 0))
    ax.set_ylabel(_axis_label(space, 1))
    return fig
