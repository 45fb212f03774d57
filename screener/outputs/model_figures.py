"""Figures of fitted models: response curves and permutation importance.

Functions draw on a given Axes (or make one), return it, and never call ``plt.show()``.
"""

from __future__ import annotations

import numpy as np

from screener.models.inspect import Importance, ResponseCurves

__all__ = ["plot_response_curves", "plot_importance", "plot_niche_profile"]


def _pyplot():
    from screener.outputs import _figure

    return _figure


def plot_response_curves(curves: ResponseCurves, *, axes=None, ncols: int = 3):
    """One small panel per predictor: suitability along it, others at their median.

    Parameters
    ----------
    curves : ResponseCurves
    axes : sequence of matplotlib Axes, optional
        At least one per predictor; a new figure is made when omitted.
    ncols : int, default 3
        Panels per row of a new figure.

    Returns
    -------
    matplotlib.figure.Figure
    """
    p = curves.values.shape[1]
    if axes is None:
        plt = _pyplot()
        nrows = int(np.ceil(p / ncols))
        fig, grid = plt.subplots(
            nrows,
            min(ncols, p),
            squeeze=False,
            figsize=(3.0 * min(ncols, p), 2.4 * nrows),
            sharey=True,
            layout="constrained",
        )
        axes = list(grid.ravel())
        for ax in axes[p:]:
            ax.set_visible(False)
    else:
        axes = list(np.ravel(axes))
        if len(axes) < p:
            raise ValueError(f"Need {p} axes for {p} predictors; got {len(axes)}.")
        fig = axes[0].figure
    for j in range(p):
        ax = axes[j]
        ax.plot(curves.values[:, j], curves.suitability[:, j], color="#1b6f8a", lw=1.5)
        ax.axvline(curves.medians[j], color="0.6", lw=0.8, ls=":")
        ax.set_xlabel(curves.names[j])
        ax.set_ylim(-0.02, 1.02)
    axes[0].set_ylabel("suitability")
    fig.suptitle(
        "Response curves (other predictors at their median)", fontsize="medium"
    )
    return fig


def plot_importance(importance: Importance, *, ax=None):
    """Horizontal bars of the AUC drop per permuted predictor, with +/- 1 sd.

    Parameters
    ----------
    importance : Importance
    ax : matplotlib Axes, optional

    Returns
    -------
    matplotlib.axes.Axes
    """
    if ax is None:
        ax = _pyplot().subplots(figsize=(4.5, 0.4 * len(importance.names) + 1.2))[1]
    order = np.argsort(importance.mean)
    y = np.arange(order.size)
    ax.barh(
        y,
        importance.mean[order],
        xerr=importance.std[order],
        color="#c7793a",
        ecolor="0.3",
    )
    ax.set_yticks(y, [importance.names[i] for i in order])
    ax.set_xlabel(f"drop in AUC when permuted (baseline {importance.baseline_auc:.3f})")
    ax.axvline(0, color="0.3", lw=0.8)
    return ax


def plot_niche_profile(
    records_env, background_env, names, curves=None, *, taxon: str = ""
):
    """Where a taxon's records sit in the environment available to it, layer by layer.

    One row per layer: the available environment (the calibration background) as a
    grey band of its 5-95 % and 25-75 % ranges with its median, each record as a
    black tick, and, when given, the model's suitability along the layer (the other
    layers at the records' medians) as a line on a 0-1 scale above the band.  A
    reader sees at a glance which layers confine the records to a corner of what
    is available and where the model puts its optimum.

    Parameters
    ----------
    records_env : ndarray of shape (n, p)
        Layer values at the records.
    background_env : ndarray of shape (m, p)
        Layer values at the background cells.
    names : sequence of str
        Layer names (p).
    curves : sequence of ResponseCurves, optional
        Their suitability is averaged per layer (they must share ``values``).
    taxon : str, default ""
        For the title.

    Returns
    -------
    matplotlib.figure.Figure
    """
    P = np.asarray(records_env, float)
    B = np.asarray(background_env, float)
    p = B.shape[1]
    fig, axes = _pyplot().subplots(
        p, 1, squeeze=False, figsize=(7.0, 0.95 * p + 0.8), layout="constrained"
    )
    curve_vals = curve_suit = None
    if curves:
        curve_vals = curves[0].values
        curve_suit = np.mean([c.suitability for c in curves], axis=0)
    for j, ax in enumerate(axes[:, 0]):
        b = B[:, j][np.isfinite(B[:, j])]
        lo, hi = (float(b.min()), float(b.max())) if b.size else (0.0, 1.0)
        q5, q25, q50, q75, q95 = np.percentile(b, [5, 25, 50, 75, 95]) if b.size else [0] * 5
        ax.barh(0.18, q95 - q5, left=q5, height=0.16, color="0.85", edgecolor="none")
        ax.barh(0.18, q75 - q25, left=q25, height=0.16, color="0.6", edgecolor="none")
        ax.plot([q50, q50], [0.10, 0.26], color="0.3", lw=1.2)
        x = P[:, j][np.isfinite(P[:, j])]
        ax.plot(x, np.full(x.size, 0.18), linestyle="none", marker="|", markersize=11,
                color="black", markeredgewidth=1.3)
        if curve_vals is not None:
            ax.plot(curve_vals[:, j], 0.35 + 0.6 * curve_suit[:, j], color="#0072B2",
                    lw=1.6)
            ax.axhline(0.35, color="0.8", lw=0.5)
        pad = 0.02 * (hi - lo or 1.0)
        ax.set_xlim(lo - pad, hi + pad)
        ax.set_ylim(0.0, 1.0)
        ax.set_yticks([])
        for side in ("top", "right", "left"):
            ax.spines[side].set_visible(False)
        ax.tick_params(axis="x", labelsize=7)
        ax.text(0.0, 1.0, str(names[j]), transform=ax.transAxes, fontsize=8,
                fontweight="bold", va="top", ha="left")
    title = "Records (ticks) in the available environment (grey: 5-95 % and 25-75 %)"
    if curve_vals is not None:
        title += "; blue: model suitability along the layer (0-1)"
    fig.suptitle((f"{taxon}: " if taxon else "") + title, fontsize=8)
    return fig
