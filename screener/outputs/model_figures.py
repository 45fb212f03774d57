"""Figures of fitted models: response curves and permutation importance.

Functions draw on a given Axes (or make one), return it, and never call ``plt.show()``.
"""

from __future__ import annotations

import numpy as np

from screener.models.inspect import Importance, ResponseCurves

__all__ = ["plot_response_curves", "plot_importance"]


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
