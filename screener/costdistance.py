"""Accumulated cost distance and least-cost paths on an 8-neighbour grid.

A step from cell ``a`` to its neighbour ``b`` costs ``L_ab * (r_a + r_b) / 2``, where
``r`` is the resistance raster (cost per km) and ``L_ab`` the true ground distance in km
between the two cell centres, taken from the :class:`~screener.grid.Grid`
(``ew_step_km``, ``ns_step_km``, ``diag_step_km``).  The accumulated cost of a cell is
the cheapest sum of step costs from any source cell; sources cost 0.

Two backends compute the same quantity:

``"mcp"``
    :class:`skimage.graph.MCP_Geometric` with ``sampling=(dy_km, dx_km)``.  It uses
    the same edge formula, but one step length per axis, so it is exact only where
    steps are constant (projected grids).
``"dijkstra"``
    :func:`scipy.sparse.csgraph.dijkstra` (multi-source, ``min_only=True``) over the
    explicit 8-neighbour graph, whose edge lengths vary by row.  Used on longitude /
    latitude grids, where east-west steps shrink with latitude.

``backend="auto"`` picks ``"mcp"`` on grids with constant steps and ``"dijkstra"``
otherwise; ``docs/benchmarks/isolation.md`` has the timings behind the choice.

Impassable cells (outside ``grid.mask``, NaN, ``inf`` or negative resistance) are set
to ``np.inf`` before any backend sees them: a NaN cost silently corrupts MCP's result
(see ``tests/test_costdistance.py``).

A :class:`CostGraph` is built once per (grid, resistance) and then run from several
source sets (one per known range or taxon) without rebuilding.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp
from scipy import ndimage as ndi
from scipy.sparse.csgraph import dijkstra
from skimage.graph import MCP_Geometric

from screener.errors import InputError
from screener.grid import Grid

__all__ = [
    "CostGraph",
    "CostSurface",
    "cost_distance",
    "least_cost_path",
    "path_length_km",
    "prepare_resistance",
    "step_lengths_km",
]

log = logging.getLogger(__name__)

#: predecessor value of a source cell
SOURCE = -1
#: predecessor value of a cell no source reaches
UNREACHED = -2


@dataclass(frozen=True, eq=False)
class CostSurface:
    """Accumulated cost from a set of source cells.

    Attributes
    ----------
    cost : ndarray of float64 or float32, shape (n_rows, n_cols)
        Accumulated cost (resistance units x km); 0 on sources, ``inf`` where no
        source is reachable or the cell is impassable.  float64 unless the run asked
        for float32 (:meth:`CostGraph.run`).
    sources : ndarray of int64, shape (n_sources, 2)
        The (row, col) source cells that were passable.
    backend : str
        ``"mcp"`` or ``"dijkstra"``.
    traceback : ndarray, shape (n_rows, n_cols)
        How to step back towards the sources, kept in each backend's compact form:
        with ``"mcp"``, the int16 index of the neighbour offset a cell was reached by
        (``-1`` on sources, ``-2`` unreached); with ``"dijkstra"``, the int32 flat
        index of the previous cell.  Use :attr:`predecessor` or
        :func:`least_cost_path` rather than reading it directly.
    """

    cost: np.ndarray
    sources: np.ndarray
    backend: str
    traceback: np.ndarray = field(repr=False)
    #: flat index step of each MCP offset (``None`` for dijkstra)
    flat_offsets: np.ndarray | None = field(default=None, repr=False)

    @property
    def shape(self) -> tuple:
        return self.cost.shape

    @property
    def predecessor(self) -> np.ndarray:
        """ndarray of int32, shape (n_rows, n_cols): flat index (``row * n_cols +
        col``) of the previous cell on the cheapest path from the sources; ``-1`` on
        sources, ``-2`` where unreached.  Built on request (4 bytes per cell)."""
        if self.flat_offsets is None:
            return self.traceback
        tb = self.traceback
        pred = np.arange(tb.size, dtype=np.int32).reshape(tb.shape)
        reached = tb >= 0
        pred[reached] -= self.flat_offsets[tb[reached]].astype(np.int32)
        pred[tb == -1] = SOURCE
        pred[tb < -1] = UNREACHED
        return pred

    def previous_cell(self, flat: int) -> int:
        """Flat index of the cell before ``flat`` on its cheapest path (``SOURCE`` on
        a source, ``UNREACHED`` where no source reaches)."""
        t = int(self.traceback.flat[flat])
        if self.flat_offsets is None:
            return t
        if t >= 0:
            return flat - int(self.flat_offsets[t])
        return SOURCE if t == -1 else UNREACHED


def prepare_resistance(grid: Grid, resistance, *, copy: bool = True) -> np.ndarray:
    """Resistance as float64 with every impassable cell set to ``np.inf``.

    Parameters
    ----------
    grid : Grid
    resistance : array_like of shape (n_rows, n_cols)
        Cost per km of ground crossed.  NaN, ``inf``, negative values and cells
        outside ``grid.mask`` are impassable.
    copy : bool, default True
        ``False`` marks impassable cells in place when ``resistance`` already is a
        float64 array (saves 8 bytes per cell on large grids; the caller's array
        changes).

    Returns
    -------
    ndarray of float64, shape (n_rows, n_cols)

    Raises
    ------
    InputError
        If the shape does not match the grid.
    """
    r = np.asarray(resistance, dtype=np.float64)
    if r.shape != grid.shape:
        raise InputError(
            f"`resistance` has shape {r.shape}, but the grid is {grid.shape}; "
            "compute it on the same grid as the suitability maps."
        )
    with np.errstate(invalid="ignore"):
        bad = ~np.isfinite(r) | (r < 0) | ~grid.mask
    if copy or r is not resistance:
        return np.where(bad, np.inf, r)
    r[bad] = np.inf
    return r


def _as_rc(sources, shape, name="sources") -> np.ndarray:
    """(row, col) pairs as an int64 array of shape (n, 2), checked against ``shape``."""
    if isinstance(sources, np.ndarray) and sources.dtype == bool:
        if sources.shape != shape:
            raise InputError(
                f"`{name}` mask has shape {sources.shape}, expected {shape}."
            )
        return np.argwhere(sources).astype(np.int64)
    if isinstance(sources, tuple) and len(sources) == 2:
        rows = np.atleast_1d(np.asarray(sources[0]))
        cols = np.atleast_1d(np.asarray(sources[1]))
        if rows.shape == cols.shape and rows.ndim == 1:
            rc = np.stack([rows, cols], axis=1)
        else:
            rc = np.asarray(sources)
    else:
        rc = np.asarray(sources)
    rc = np.atleast_2d(rc)
    if rc.size == 0:
        return np.empty((0, 2), dtype=np.int64)
    if rc.ndim != 2 or rc.shape[1] != 2:
        raise InputError(
            f"`{name}` must be (row, col) pairs of shape (n, 2), a (rows, cols) tuple "
            f"or a boolean mask; got shape {rc.shape}."
        )
    rc = rc.astype(np.int64)
    out = (
        (rc[:, 0] < 0)
        | (rc[:, 0] >= shape[0])
        | (rc[:, 1] < 0)
        | (rc[:, 1] >= shape[1])
    )
    if out.any():
        raise InputError(
            f"{int(out.sum())} of the `{name}` cells lie outside the grid of shape "
            f"{shape} (first: {tuple(rc[out][0])}); check the (row, col) order."
        )
    return rc


def _edge_arrays(grid: Grid, r: np.ndarray):
    """Forward edges (E, S, SE, SW) of the 8-neighbour graph between passable cells.

    Returns flat ``(tail, head, weight)`` arrays; each undirected edge appears once.
    """
    n_rows, n_cols = grid.shape
    idx = np.arange(n_rows * n_cols, dtype=np.int64).reshape(grid.shape)
    ew = np.asarray(grid.ew_step_km, float)
    ns = np.asarray(grid.ns_step_km, float)
    dg = np.asarray(grid.diag_step_km, float)
    tails, heads, weights = [], [], []

    def add(a_sl, b_sl, length):
        ra, rb = r[a_sl], r[b_sl]
        w = length * (ra + rb) * 0.5
        ok = np.isfinite(w)
        tails.append(idx[a_sl][ok])
        heads.append(idx[b_sl][ok])
        weights.append(w[ok])

    # east: (i, j) -> (i, j+1), length per row
    add((slice(None), slice(0, -1)), (slice(None), slice(1, None)), ew[:, None])
    if n_rows > 1:
        # south: (i, j) -> (i+1, j)
        add((slice(0, -1), slice(None)), (slice(1, None), slice(None)), ns[:, None])
        # south-east: (i, j) -> (i+1, j+1)
        add((slice(0, -1), slice(0, -1)), (slice(1, None), slice(1, None)), dg[:, None])
        # south-west: (i, j+1) -> (i+1, j)
        add((slice(0, -1), slice(1, None)), (slice(1, None), slice(0, -1)), dg[:, None])
    return np.concatenate(tails), np.concatenate(heads), np.concatenate(weights)


#: source sets larger than this are seeded from their edge cells only
_EDGE_SEEDING_MIN = 256


def _edge_of_sources(rc: np.ndarray, shape: tuple):
    """Seed cells for MCP: the sources that touch a non-source cell.

    Every path out of a set of sources leaves it through a source cell with a
    non-source neighbour, and all sources cost 0, so seeding only those edge cells
    gives the same cost everywhere outside the set; the interior cells are then set
    to cost 0 and marked as sources.  MCP handles each start cell in Python, so a
    known range of 10^5 cells seeded whole costs seconds; its edge is far smaller.

    Returns
    -------
    seeds : ndarray of int64, shape (k, 2)
    interior : ndarray of bool, shape ``shape``, or None when every source is a seed
    """
    if len(rc) <= _EDGE_SEEDING_MIN:
        return rc, None
    mask = np.zeros(shape, dtype=bool)
    mask[rc[:, 0], rc[:, 1]] = True
    interior = ndi.binary_erosion(mask, structure=np.ones((3, 3), bool), border_value=1)
    if not interior.any():
        return rc, None
    return np.argwhere(mask & ~interior), interior


class CostGraph:
    """A grid prepared for repeated cost-distance runs from different sources.

    Parameters
    ----------
    grid : Grid
    resistance : array_like of shape (n_rows, n_cols)
        Cost per km; impassable cells as in :func:`prepare_resistance`.
    backend : {"auto", "mcp", "dijkstra"}, default "auto"
        ``"auto"``: MCP on grids with constant steps, Dijkstra otherwise.  Forcing
        ``"mcp"`` on a longitude/latitude grid raises, because MCP cannot express
        east-west steps that change with latitude.
    copy : bool, default True
        ``False`` lets the graph mark impassable cells in ``resistance`` itself when
        it is a float64 array the caller no longer needs (see
        :func:`prepare_resistance`).

    Examples
    --------
    >>> from affine import Affine
    >>> g = Grid("EPSG:32633", Affine(1000, 0, 500000, 0, -1000, 5000000), (1, 3))
    >>> cg = CostGraph(g, np.ones((1, 3)))
    >>> cg.run([(0, 0)]).cost.tolist()
    [[0.0, 1.0, 2.0]]
    """

    def __init__(self, grid: Grid, resistance, backend: str = "auto", *, copy: bool = True):
        if backend not in ("auto", "mcp", "dijkstra"):
            raise InputError(
                f"backend must be 'auto', 'mcp' or 'dijkstra'; got {backend!r}."
            )
        if backend == "auto":
            backend = "mcp" if grid.constant_steps else "dijkstra"
        if backend == "mcp" and not grid.constant_steps:
            raise InputError(
                "backend='mcp' needs constant step lengths, but this grid is "
                "longitude/latitude (east-west steps shrink with latitude); use "
                "backend='dijkstra' or 'auto'."
            )
        self.grid = grid
        self.backend = backend
        resistance = prepare_resistance(grid, resistance, copy=copy)
        # only passability is needed after the backend is built (1 byte per cell,
        # not 8: MCP keeps its own padded copy of the costs)
        self.passable = np.isfinite(resistance)
        self._mcp = None
        self._graph = None
        if backend == "mcp":
            dy = (
                float(grid.ns_step_km[0])
                if grid.n_rows > 1
                else float(grid.ew_step_km[0])
            )
            dx = float(grid.ew_step_km[0])
            self._mcp = MCP_Geometric(
                resistance, fully_connected=True, sampling=(dy, dx)
            )
            offsets = np.asarray(self._mcp.offsets, dtype=np.int64)
            self._flat_offsets = offsets[:, 0] * grid.n_cols + offsets[:, 1]
        else:
            tail, head, w = _edge_arrays(grid, resistance)
            n = grid.n_cells
            # Explicit zero weights are kept as edges by csgraph (zero-resistance cells).
            self._graph = sp.csr_matrix((w, (tail, head)), shape=(n, n))
        log.debug("cost graph ready: backend=%s, shape=%s", backend, grid.shape)

    def run(self, sources, *, dtype=np.float64) -> CostSurface:
        """Accumulated cost from ``sources``.

        Parameters
        ----------
        sources : array_like of shape (n, 2), tuple (rows, cols) or bool mask
            Source cells; impassable ones are dropped (with a log message).
        dtype : {numpy.float64, numpy.float32}, default float64
            Precision of the returned ``cost``.  float32 halves the memory a kept
            surface needs (4 bytes per cell, relative precision about 6e-8), which is
            ample for ranking and corridors on large grids.

        Returns
        -------
        CostSurface
        """
        dtype = np.dtype(dtype)
        if dtype not in (np.float64, np.float32):
            raise InputError(f"dtype must be float64 or float32; got {dtype}.")
        shape = self.grid.shape
        if isinstance(sources, np.ndarray) and sources.dtype == bool and sources.shape == shape:
            # a mask is unique already: no sort of its cells
            n_bad = int(np.count_nonzero(sources & ~self.passable))
            if n_bad:
                log.info("%d source cells are impassable and were dropped", n_bad)
            rc = np.argwhere(sources & self.passable)
        else:
            rc = _as_rc(sources, shape)
            if len(rc):
                ok = self.passable[rc[:, 0], rc[:, 1]]
                if not ok.all():
                    log.info("%d source cells are impassable and were dropped", (~ok).sum())
                rc = np.unique(rc[ok], axis=0)
        if len(rc) == 0:
            cost = np.full(shape, np.inf, dtype=dtype)
            pred = np.full(shape, UNREACHED, dtype=np.int32)
            return CostSurface(cost, rc, self.backend, pred)
        if self.backend == "mcp":
            # find_costs returns views of buffers the next run overwrites: copy out,
            # keeping MCP's own int16 traceback (2 bytes per cell) rather than
            # expanding it into flat predecessor indices.
            seeds, interior = _edge_of_sources(rc, shape)
            cost, tb = self._mcp.find_costs([tuple(p) for p in seeds])
            cost = np.array(cost, dtype=dtype, order="C")
            tb = np.array(tb, order="C")
            if interior is not None:
                cost[interior] = 0.0
                tb[interior] = -1
            return CostSurface(cost, rc, self.backend, tb, self._flat_offsets)
        flat = rc[:, 0] * shape[1] + rc[:, 1]
        dist, p, _ = dijkstra(
            self._graph,
            directed=False,
            indices=flat,
            min_only=True,
            return_predecessors=True,
        )
        cost = dist.reshape(shape).astype(dtype, copy=False)
        pred = p.astype(np.int32).reshape(shape)
        pred[pred < 0] = UNREACHED
        pred.flat[flat] = SOURCE
        return CostSurface(cost, rc, self.backend, pred)


def cost_distance(
    grid: Grid, resistance, sources, *, backend: str = "auto"
) -> CostSurface:
    """Accumulated cost distance from source cells over a resistance raster.

    Parameters
    ----------
    grid : Grid
    resistance : array_like of shape (n_rows, n_cols)
        Cost per km of ground.  NaN, inf, negative and masked cells are impassable.
    sources : array_like of shape (n, 2), tuple (rows, cols) or bool mask
        Source cells (e.g. every cell of a known range).
    backend : {"auto", "mcp", "dijkstra"}, default "auto"

    Returns
    -------
    CostSurface
        ``cost`` in resistance units x km.

    Notes
    -----
    Step cost ``L_ab (r_a + r_b) / 2`` with ``L_ab`` the ground distance in km between
    the centres of neighbouring cells (8 neighbours).  To run many source sets on one
    raster, build a :class:`CostGraph` once and call :meth:`CostGraph.run`.

    References
    ----------
    .. [1] Adriaensen, F. et al. (2003). The application of 'least-cost' modelling as
       a functional landscape model. Landscape and Urban Planning 64:233-247.
    .. [2] Dijkstra, E. W. (1959). A note on two problems in connexion with graphs.
       Numerische Mathematik 1:269-271.
    """
    return CostGraph(grid, resistance, backend=backend).run(sources)


def least_cost_path(surface: CostSurface, end_rc) -> np.ndarray:
    """Cheapest path from the sources to ``end_rc``, by traceback.

    Parameters
    ----------
    surface : CostSurface
    end_rc : tuple of int
        ``(row, col)`` of the end cell.

    Returns
    -------
    ndarray of int64, shape (n_steps + 1, 2)
        (row, col) cells from a source cell to ``end_rc`` (inclusive).  Empty (shape
        (0, 2)) when the end cell is not reached.
    """
    n_rows, n_cols = surface.shape
    r, c = int(end_rc[0]), int(end_rc[1])
    if not (0 <= r < n_rows and 0 <= c < n_cols):
        raise InputError(f"end cell {(r, c)} lies outside the grid {surface.shape}.")
    cur = r * n_cols + c
    step = surface.previous_cell
    prev = step(cur)
    if prev == UNREACHED:
        return np.empty((0, 2), dtype=np.int64)
    out = [cur]
    limit = n_rows * n_cols
    while prev >= 0:
        cur = prev
        out.append(cur)
        prev = step(cur)
        if len(out) > limit:  # pragma: no cover - corrupt traceback
            raise RuntimeError("traceback has a cycle")
    flat = np.array(out[::-1], dtype=np.int64)
    return np.stack([flat // n_cols, flat % n_cols], axis=1)


def step_lengths_km(grid: Grid, path: np.ndarray) -> np.ndarray:
    """Ground length in km of each step of a path of 8-neighbour cells.

    Parameters
    ----------
    grid : Grid
    path : ndarray of shape (n, 2)
        Consecutive (row, col) cells, each an 8-neighbour of the previous one.

    Returns
    -------
    ndarray of shape (n - 1,)
    """
    path = np.asarray(path, dtype=np.int64)
    if len(path) < 2:
        return np.zeros(0)
    d = np.diff(path, axis=0)
    if np.any(np.abs(d) > 1) or np.any((d == 0).all(axis=1)):
        raise InputError("path cells must be distinct 8-neighbours, one after another.")
    top = np.minimum(path[:-1, 0], path[1:, 0])
    out = np.empty(len(d))
    horiz = d[:, 0] == 0
    vert = d[:, 1] == 0
    diag = ~horiz & ~vert
    out[horiz] = np.asarray(grid.ew_step_km)[path[:-1, 0][horiz]]
    out[vert] = np.asarray(grid.ns_step_km)[top[vert]]
    out[diag] = np.asarray(grid.diag_step_km)[top[diag]]
    return out


def path_length_km(grid: Grid, path: np.ndarray) -> float:
    """Ground length of a path in km (sum of its step lengths)."""
    return float(step_lengths_km(grid, path).sum())
