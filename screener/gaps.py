"""The separating gap: the unsuitable ground a patch is cut off by, over every route.

A route from a known range to a patch alternates between suitable ground (patches,
including ones too small to be sites: stepping stones) and *crossings*: continuous
stretches of unsuitable cells.  The **separating gap** of a patch is the smallest
achievable length of the longest crossing, over every route from any known range
(a minimax, or bottleneck, distance):

    gap(P) = min over routes R from a range to P of  max over crossings C of R  len(C)

A crossing's length is ground length in km, measured as along a least-cost path
(:func:`screener.isolation.path_profile`): each unsuitable cell owns half of the step
before it and half of the step after it, so ``k`` unsuitable cells crossed in a straight
line measure ``k`` cell widths.  That is the cost of the route on the 8-neighbour grid
with resistance 1 on unsuitable cells and 0 on suitable ones, with the grid's geodesic
step lengths (:mod:`screener.costdistance`).

How it is computed, exactly:

1. One multi-source cost-distance run from every suitable cell over that resistance
   gives each unsuitable cell its distance ``d`` (km of unsuitable ground) to the
   nearest patch and which patch that is (its traceback leads there).
2. Every pair of neighbouring cells ``a``, ``b`` whose nearest patches differ gives a
   crossing between those patches of length ``d(a) + step(a, b) + d(b)`` (``step`` as
   in the cost graph); the shortest per pair of patches is kept.
3. The minimum spanning tree of that patch graph (all known ranges merged into one
   root) is a minimum spanning tree of the complete graph of shortest crossings
   between patches [1]_, and the minimax path between two nodes of a graph runs along
   any of its minimum spanning trees [2]_.  So the separating gap of a patch is the
   longest edge on its tree path to the root.

Along that tree path the route is fully determined: ``unsuitable_km`` is the sum of
its crossings (total unsuitable ground on the route that achieves the gap) and
``stepping_stones`` the number of patches it passes through between the range and
the patch.

Cells outside the grid mask and impassable cells are never crossed; a patch that no
route reaches has gap ``inf``.

References
----------
.. [1] Mehlhorn, K. (1988). A faster approximation algorithm for the Steiner problem
   in graphs. Information Processing Letters 27:125-128.
.. [2] Hu, T. C. (1961). The maximum capacity route problem. Operations Research
   9:898-900.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp
from scipy.sparse.csgraph import breadth_first_order, minimum_spanning_tree

from screener.costdistance import CostGraph
from screener.grid import Grid

__all__ = ["SeparatingGaps", "nearest_source_label", "separating_gaps"]

log = logging.getLogger(__name__)


@dataclass(frozen=True, eq=False)
class SeparatingGaps:
    """Separating gap of every patch.

    Attributes
    ----------
    gap_km : ndarray of float64, shape (n_patches + 1,)
        Separating gap per patch label (index 0 unused), km; 0 for known ranges,
        ``inf`` for patches no route reaches.
    unsuitable_km : ndarray of float64, shape (n_patches + 1,)
        Total unsuitable ground on the route that achieves the gap, km.
    stepping_stones : ndarray of int64, shape (n_patches + 1,)
        Patches that route passes through between the range and the patch (-1 where
        unreached).
    nearest_km : ndarray of float32, shape (n_rows, n_cols)
        Unsuitable ground (km) between each cell and the nearest patch (0 on
        suitable cells, ``inf`` where unreached).
    """

    gap_km: np.ndarray
    unsuitable_km: np.ndarray
    stepping_stones: np.ndarray
    nearest_km: np.ndarray


def nearest_source_label(pred: np.ndarray, labels: np.ndarray) -> np.ndarray:
    """Label of the source each cell's traceback ends at (0 where unreached).

    Pointer doubling: every pass replaces a cell's pointer with its pointer's pointer,
    so ``ceil(log2(longest path))`` passes reach the sources.
    """
    n = pred.size
    own = np.arange(n, dtype=pred.dtype)
    p = np.where(pred >= 0, pred, own)
    while True:
        q = p[p]
        if np.array_equal(q, p):
            break
        p = q
    out = labels.ravel()[p]
    out[pred.ravel() == -2] = 0  # UNREACHED
    return out


def separating_gaps(
    grid: Grid,
    labels: np.ndarray,
    n_patches: int,
    range_ids,
    *,
    passable: np.ndarray | None = None,
    backend: str = "auto",
    memory_mb: float | None = None,
) -> SeparatingGaps:
    """Separating gap of every patch from the known ranges (see module docstring).

    Parameters
    ----------
    grid : Grid
    labels : ndarray of int, shape (n_rows, n_cols)
        Patch labels 1..n_patches on suitable cells, 0 elsewhere (8-connected
        components of the suitable cells).
    n_patches : int
    range_ids : array_like of int
        Labels of the patches that are known ranges.
    passable : ndarray of bool, optional
        Cells a route may use (default: ``grid.mask``).
    backend, memory_mb
        Cost-distance solver settings (:class:`~screener.costdistance.CostGraph`).

    Returns
    -------
    SeparatingGaps

    References
    ----------
    .. [1] Mehlhorn, K. (1988). Information Processing Letters 27:125-128.
    .. [2] Hu, T. C. (1961). Operations Research 9:898-900.
    """
    labels = np.asarray(labels)
    ok = grid.mask if passable is None else (np.asarray(passable, bool) & grid.mask)
    suitable = (labels > 0) & ok
    d, lab = _distance_to_patches(grid, labels, n_patches, suitable, ok,
                                  backend=backend, memory_mb=memory_mb)
    # patch -> node: the known ranges are merged into root node 0
    range_ids = np.asarray(range_ids, dtype=np.int64)
    node = np.arange(n_patches + 1, dtype=np.int64)
    node[range_ids] = 0
    key, w = _shortest_crossings(grid, d, lab, suitable, node)
    del lab
    gap, total, stones = _bottleneck_to_root(key, w, n_patches, range_ids)
    return SeparatingGaps(gap, total, stones, d.astype(np.float32, copy=False))


def _distance_to_patches(grid, labels, n_patches, suitable, ok, *, backend, memory_mb):
    """Unsuitable ground (km) from each cell to the nearest patch, and that patch.

    One multi-source cost run from every suitable cell over resistance 1 on
    unsuitable and 0 on suitable cells; the patch is where the traceback ends.
    """
    res = np.where(ok, (~suitable).astype(np.float64), np.inf)
    graph = CostGraph(grid, res, backend=backend, copy=False, memory_mb=memory_mb)
    del res
    if graph.backend == "mcp":
        # Suitable cells cost nothing to cross, so one seed per patch reaches the
        # whole patch at cost 0 before any unsuitable cell (MCP starts each seed in
        # Python: a seed per edge cell of every patch costs seconds on large grids)
        flat = labels.ravel()
        at = np.flatnonzero(suitable.ravel())
        seed = np.full(n_patches + 1, -1, dtype=np.int64)
        seed[flat[at]] = at  # any one cell per patch
        seed = seed[seed >= 0]
        sources = np.column_stack(np.divmod(seed, grid.n_cols))
    else:
        sources = suitable
    surf = graph.run(sources)
    del graph
    lab = nearest_source_label(surf.predecessor.ravel(), labels).reshape(grid.shape)
    return surf.cost, lab


def _shortest_crossings(grid, d, lab, suitable, node):
    """Shortest crossing between every pair of nodes whose cells neighbour.

    Every pair of neighbouring cells ``a``, ``b`` with different nearest patches gives
    a crossing ``d(a) + step(a, b) + d(b)`` (the step counted on unsuitable cells
    only, as in the cost graph); the shortest per pair of nodes is kept.

    Returns
    -------
    key : ndarray of int64
        ``lo * n_nodes + hi`` per pair of nodes ``lo < hi``, ascending.
    w : ndarray of float64
        The shortest crossing of each pair, km.
    """
    n_nodes = node.size
    u = (~suitable).astype(np.float64)
    ew = np.asarray(grid.ew_step_km, float)
    ns = np.asarray(grid.ns_step_km, float)
    dg = np.asarray(grid.diag_step_km, float)
    keys, weights = [], []

    def add(a_sl, b_sl, length):
        la, lb = lab[a_sl], lab[b_sl]
        m = (la != lb) & (la > 0) & (lb > 0)
        if not m.any():
            return
        na, nb = node[la[m]], node[lb[m]]
        w = (
            d[a_sl][m]
            + d[b_sl][m]
            + np.broadcast_to(length, m.shape)[m] * (u[a_sl][m] + u[b_sl][m]) * 0.5
        )
        diff = na != nb
        lo = np.minimum(na, nb)[diff]
        hi = np.maximum(na, nb)[diff]
        keys.append(lo * n_nodes + hi)
        weights.append(w[diff])

    add((slice(None), slice(0, -1)), (slice(None), slice(1, None)), ew[:, None])
    if grid.n_rows > 1:
        add((slice(0, -1), slice(None)), (slice(1, None), slice(None)), ns[:, None])
        add((slice(0, -1), slice(0, -1)), (slice(1, None), slice(1, None)), dg[:, None])
        add((slice(0, -1), slice(1, None)), (slice(1, None), slice(0, -1)), dg[:, None])
    key = np.concatenate(keys) if keys else np.zeros(0, np.int64)
    w = np.concatenate(weights) if keys else np.zeros(0)
    if not key.size:  # e.g. every crossing joins two known ranges (one node)
        return key, w
    order = np.lexsort((w, key))
    key, w = key[order], w[order]
    first = np.r_[True, key[1:] != key[:-1]]
    return key[first], w[first]


def _bottleneck_to_root(key, w, n_patches, range_ids):
    """Gap, route total and stepping stones of every patch from the tree of crossings.

    The minimum spanning tree of the crossings (root node 0: every known range); the
    gap of a patch is the longest edge on its tree path to the root [1]_ [2]_.

    References
    ----------
    .. [1] Mehlhorn, K. (1988). Information Processing Letters 27:125-128.
    .. [2] Hu, T. C. (1961). Operations Research 9:898-900.
    """
    n_nodes = n_patches + 1
    gap = np.full(n_patches + 1, np.inf)
    total = np.full(n_patches + 1, np.inf)
    stones = np.full(n_patches + 1, -1, dtype=np.int64)
    gap[range_ids] = 0.0
    total[range_ids] = 0.0
    stones[range_ids] = 0
    if not key.size or not range_ids.size:
        return gap, total, stones
    i, j = np.divmod(key, n_nodes)
    # only nodes that appear in an edge, renumbered densely (patch graphs are small)
    used, inv = np.unique(np.r_[0, i, j], return_inverse=True)
    ii, jj = inv[1 : 1 + i.size], inv[1 + i.size :]
    m = used.size
    tree = minimum_spanning_tree(sp.coo_matrix((w, (ii, jj)), shape=(m, m)).tocsr())
    tree = tree.tocoo()
    order, parent = breadth_first_order(
        tree + tree.T, 0, directed=False, return_predecessors=True
    )
    # weight of the tree edge above each node
    up = np.zeros(m)
    child = np.where(parent[tree.row] == tree.col, tree.row, tree.col)
    up[child] = tree.data
    g_node = np.zeros(m)
    t_node = np.zeros(m)
    depth = np.zeros(m, dtype=np.int64)
    par = parent.tolist()
    upl = up.tolist()
    for c in order[1:].tolist():
        p = par[c]
        g_node[c] = max(g_node[p], upl[c])
        t_node[c] = t_node[p] + upl[c]
        depth[c] = depth[p] + 1
    reached = np.zeros(m, dtype=bool)
    reached[order] = True
    # back to patch labels (node 0 = every range; other nodes are single patches)
    pid = used[1:]
    r = reached[1:]
    gap[pid[r]] = g_node[1:][r]
    total[pid[r]] = t_node[1:][r]
    stones[pid[r]] = depth[1:][r] - 1
    return gap, total, stones
