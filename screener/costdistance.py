"""Accumulated cost distance and least-cost paths on an 8-neighbour grid.

A step from cell ``a`` to its neighbour ``b`` costs ``L_ab * (r_a + r_b) / 2``, where
``r`` is the resistance raster (cost per km) and ``L_ab`` the true ground distance in km
between the two cell centres, taken from the :class:`~screener.grid.Grid`
(``ew_step_km``, ``ns_step_km``, ``diag_step_km``).  The accumulated cost of a cell is
the cheapest sum of step costs from any source cell; sources cost 0.

Three backends compute the same quantity:

``"mcp"``
    :class:`skimage.graph.MCP_Geometric` with ``sampling=(dy_km, dx_km)``.  It uses
    the same edge formula, but one step length per axis, so it is exact only where
    steps are constant (projected grids).
``"dijkstra"``
    :func:`scipy.sparse.csgraph.dijkstra` (multi-source, ``min_only=True``) over the
    explicit 8-neighbour graph, whose edge lengths vary by row.  Used on longitude /
    latitude grids, where east-west steps shrink with latitude.
``"tiled"``
    The ``"dijkstra"`` graph solved one tile at a time, so that the solver's working
    memory is bounded by a setting rather than by the grid (see :class:`CostGraph`).

``backend="auto"`` picks ``"mcp"`` on grids with constant steps and ``"dijkstra"``
otherwise, or ``"tiled"`` on grids of 8e6 cells or more and wherever that solver
would need more than ``memory_mb``;
``docs/benchmarks/isolation.md`` and ``docs/performance.md`` have the timings behind
the choice.

Impassable cells (outside ``grid.mask``, NaN, ``inf`` or negative resistance) are set
to ``np.inf`` before any backend sees them: a NaN cost silently corrupts MCP's result
(see ``tests/test_costdistance.py``).

A :class:`CostGraph` is built once per (grid, resistance) and then run from several
source sets (one per known range or taxon) without rebuilding.
"""

from __future__ import annotations

import heapq
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
    backend : str
        ``"mcp"`` or ``"dijkstra"``.
    traceback : ndarray, shape (n_rows, n_cols)
        How to step back towards the sources, kept in each backend's compact form:
        with ``"mcp"``, the int16 index of the neighbour offset a cell was reached by
        (``-1`` on sources, ``-2`` unreached); with ``"tiled"``, the same as int8
        codes into the solver's own offset table; with ``"dijkstra"``, the int32 flat
        index of the previous cell.  Use :attr:`predecessor` or
        :func:`least_cost_path` rather than reading it directly.
    """

    cost: np.ndarray
    backend: str
    traceback: np.ndarray = field(repr=False)
    #: flat index step of each traceback code (``None`` for dijkstra)
    flat_offsets: np.ndarray | None = field(default=None, repr=False)

    @property
    def shape(self) -> tuple:
        return self.cost.shape

    @property
    def sources(self) -> np.ndarray:
        """ndarray of int64, shape (n_sources, 2): the (row, col) source cells that
        were passable (found from the traceback on request)."""
        return np.argwhere(self.traceback == SOURCE).astype(np.int64)

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


def _edge_arrays(r: np.ndarray, ew, ns, dg, dtype=np.int64):
    """Forward edges (E, S, SE, SW) of the 8-neighbour graph between passable cells.

    Parameters
    ----------
    r : ndarray of float64, shape (n_rows, n_cols)
        Resistance with impassable cells ``inf``.
    ew : ndarray, shape (n_rows,)
        East-west step in km per row.
    ns, dg : ndarray, shape (n_rows - 1,)
        North-south and diagonal steps in km between row ``i`` and ``i + 1``.
    dtype : numpy integer type
        Of the returned cell indices (int32 halves the graph's index memory).

    Returns flat ``(tail, head, weight)`` arrays; each undirected edge appears once.
    """
    n_rows, n_cols = r.shape
    idx = np.arange(n_rows * n_cols, dtype=dtype).reshape(r.shape)
    ew = np.asarray(ew, float)
    ns = np.asarray(ns, float)
    dg = np.asarray(dg, float)
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


#: neighbour offsets ``(d_row, d_col)`` of a cell from the cell before it on its path;
#: a tiled traceback stores the index into this table (int8)
_OFFSETS = np.array(
    [(-1, -1), (-1, 0), (-1, 1), (0, -1), (0, 1), (1, -1), (1, 0), (1, 1)], dtype=np.int64
)
_CODE = np.full((3, 3), -3, dtype=np.int8)
_CODE[_OFFSETS[:, 0] + 1, _OFFSETS[:, 1] + 1] = np.arange(8, dtype=np.int8)

#: working memory of each whole-grid solver while it runs, bytes per cell above its
#: input (measured: docs/performance.md); the tiled solver needs this per tile cell
_SOLVER_BYTES_PER_CELL = {"mcp": 80, "dijkstra": 120, "tiled": 120}
#: cells each tile's search reaches into its neighbours, so that paths running along a
#: tile edge are found by one search instead of searches of both tiles in turn
_TILE_MARGIN = 16
#: grids from this many cells use the tiled solver even when memory allows the whole
#: grid: its tiles stay in cache, and at 1.6e7 cells it takes half of MCP's time
#: (docs/performance.md; 1.15x MCP at 1e6 cells, 0.91x at 4e6)
_TILED_FROM_CELLS = 8_000_000
#: largest tile, in MB of solver memory (tiles this size ran fastest)
_TILE_MB = 64.0
#: smallest tile the tiled solver uses, in cells (smaller tiles re-run too often)
_MIN_TILE_CELLS = 1 << 16


def _tile_edges(n: int, n_tiles: int) -> np.ndarray:
    return np.linspace(0, n, n_tiles + 1).round().astype(np.int64)


class CostGraph:
    """A grid prepared for repeated cost-distance runs from different sources.

    Parameters
    ----------
    grid : Grid
    resistance : array_like of shape (n_rows, n_cols)
        Cost per km; impassable cells as in :func:`prepare_resistance`.
    backend : {"auto", "mcp", "dijkstra", "tiled"}, default "auto"
        ``"auto"``: MCP on grids with constant steps, Dijkstra otherwise; or
        ``"tiled"`` on grids of 8e6 cells or more (faster there) and wherever the
        whole-grid solver would need more than ``memory_mb``.  Forcing
        ``"mcp"`` on a longitude/latitude grid raises, because MCP cannot express
        east-west steps that change with latitude.  ``"tiled"`` solves the same
        graph as ``"dijkstra"`` one tile at a time (see Notes).
    copy : bool, default True
        ``False`` lets the graph mark impassable cells in ``resistance`` itself when
        it is a float64 array the caller no longer needs (see
        :func:`prepare_resistance`).
    memory_mb : float, optional
        Working memory the solver may use, in MB.  With ``backend="auto"`` a grid
        whose whole-grid solver would need more (about 80 bytes per cell for MCP,
        120 for Dijkstra) is solved by tiles sized to fit; tiles never exceed 64 MB
        of solver memory (about 5e5 cells).  The resistance (8 bytes per cell) and
        each returned surface come on top.

    Attributes
    ----------
    backend : str
        The solver chosen: ``"mcp"``, ``"dijkstra"`` or ``"tiled"``.
    passable : ndarray of bool, shape (n_rows, n_cols)
    last_tile_searches : int
        With ``"tiled"``: how many tile searches the last :meth:`run` made (each tile
        is searched once, plus again whenever a cheaper path enters it later).

    Notes
    -----
    The tiled solver keeps one accumulated-cost raster for the whole grid and runs
    an exact Dijkstra search per tile (:func:`scipy.sparse.csgraph.dijkstra` from a
    super-source joined to the tile's sources at cost 0 and to each edge cell at
    the cheapest cost of stepping in from a neighbouring tile).  A tile whose edge
    costs improved queues its neighbours again, cheapest first, until no cost
    improves; at that point every step satisfies ``cost[b] <= cost[a] + step(a,
    b)``, so the costs equal the whole-grid search (the same additions in the same
    order: identical to ``"dijkstra"`` to the last bit, and to MCP within rounding).

    Examples
    --------
    >>> from affine import Affine
    >>> g = Grid("EPSG:32633", Affine(1000, 0, 500000, 0, -1000, 5000000), (1, 3))
    >>> cg = CostGraph(g, np.ones((1, 3)))
    >>> cg.run([(0, 0)]).cost.tolist()
    [[0.0, 1.0, 2.0]]
    """

    def __init__(
        self,
        grid: Grid,
        resistance,
        backend: str = "auto",
        *,
        copy: bool = True,
        memory_mb: float | None = None,
    ):
        if backend not in ("auto", "mcp", "dijkstra", "tiled"):
            raise InputError(
                f"backend must be 'auto', 'mcp', 'dijkstra' or 'tiled'; got {backend!r}."
            )
        if memory_mb is not None and not (np.isfinite(memory_mb) and memory_mb > 0):
            raise InputError(f"`memory_mb` must be a number > 0; got {memory_mb!r}.")
        if backend == "auto":
            backend = "mcp" if grid.constant_steps else "dijkstra"
            need_mb = _SOLVER_BYTES_PER_CELL[backend] * grid.n_cells / 1e6
            if grid.n_cells >= _TILED_FROM_CELLS or (
                memory_mb is not None and need_mb > memory_mb
            ):
                backend = "tiled"
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
        self._resistance = None
        self.last_tile_searches = 0
        if backend == "tiled":
            self._resistance = resistance
            tile_mb = min(memory_mb or _TILE_MB, _TILE_MB)
            budget = tile_mb * 1e6 / _SOLVER_BYTES_PER_CELL["tiled"]
            tile_cells = max(int(budget), _MIN_TILE_CELLS)
            side = max(int(np.sqrt(tile_cells)), 1)
            n_rows, n_cols = grid.shape
            tile_rows = min(n_rows, side)
            tile_cols = min(n_cols, max(side, tile_cells // tile_rows))
            self._row_edges = _tile_edges(n_rows, -(-n_rows // tile_rows))
            self._col_edges = _tile_edges(n_cols, -(-n_cols // tile_cols))
            self._flat_offsets = _OFFSETS[:, 0] * n_cols + _OFFSETS[:, 1]
            # a cell just outside a window must lie in a neighbouring tile, so the
            # margin stays below the smallest tile's extent
            extent = min(np.diff(self._row_edges).min(), np.diff(self._col_edges).min())
            self._margin = int(min(_TILE_MARGIN, max(extent - 1, 0)))
        elif backend == "mcp":
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
            n = grid.n_cells
            tail, head, w = _edge_arrays(
                resistance, grid.ew_step_km, grid.ns_step_km, grid.diag_step_km,
                dtype=np.int32 if n < 2**31 - 1 else np.int64,
            )
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
        is_mask = (
            isinstance(sources, np.ndarray) and sources.dtype == bool and sources.shape == shape
        )
        if is_mask:
            # a mask is unique already: no sort of its cells
            n_bad = int(np.count_nonzero(sources & ~self.passable))
            if n_bad:
                log.info("%d source cells are impassable and were dropped", n_bad)
            is_source = sources & self.passable
            rc = None if self.backend == "tiled" else np.argwhere(is_source)
            n_sources = int(np.count_nonzero(is_source)) if rc is None else len(rc)
        else:
            rc = _as_rc(sources, shape)
            if len(rc):
                ok = self.passable[rc[:, 0], rc[:, 1]]
                if not ok.all():
                    log.info("%d source cells are impassable and were dropped", (~ok).sum())
                rc = np.unique(rc[ok], axis=0)
            n_sources = len(rc)
        if n_sources == 0:
            cost = np.full(shape, np.inf, dtype=dtype)
            pred = np.full(shape, UNREACHED, dtype=np.int32)
            return CostSurface(cost, self.backend, pred)
        if self.backend == "tiled":
            if rc is not None:
                is_source = np.zeros(shape, dtype=bool)
                is_source[rc[:, 0], rc[:, 1]] = True
            cost, tb = self._run_tiled(is_source)
            return CostSurface(
                cost.astype(dtype, copy=False), self.backend, tb, self._flat_offsets
            )
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
            return CostSurface(cost, self.backend, tb, self._flat_offsets)
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
        return CostSurface(cost, self.backend, pred)


    # -- tiled solver -------------------------------------------------------------
    def _window(self, t: int):
        """Search window of tile ``t``: its cells and a margin of its neighbours'."""
        n_tc = len(self._col_edges) - 1
        i, j = divmod(t, n_tc)
        m = self._margin
        n_rows, n_cols = self.grid.shape
        return (
            max(int(self._row_edges[i]) - m, 0),
            min(int(self._row_edges[i + 1]) + m, n_rows),
            max(int(self._col_edges[j]) - m, 0),
            min(int(self._col_edges[j + 1]) + m, n_cols),
        )

    def _neighbour_tiles(self, t: int) -> list:
        n_tr, n_tc = len(self._row_edges) - 1, len(self._col_edges) - 1
        i, j = divmod(t, n_tc)
        return [
            a * n_tc + b
            for a in range(max(i - 1, 0), min(i + 2, n_tr))
            for b in range(max(j - 1, 0), min(j + 2, n_tc))
            if (a, b) != (i, j)
        ]

    def _cheapest_step(self, rr, cc, cost, window, *, from_inside: bool):
        """Cheapest ``cost[a] + step(a, b)`` into each cell ``b = (rr, cc)``.

        Over the neighbours ``a`` inside (``from_inside=True``) or outside the
        window ``(r0, r1, c0, c1)``.  Returns the costs (``inf`` where none) and the
        traceback code of the step taken.
        """
        r0, r1, c0, c1 = window
        n_rows, n_cols = self.grid.shape
        res = self._resistance
        ew, ns, dg = self.grid.ew_step_km, self.grid.ns_step_km, self.grid.diag_step_km
        best = np.full(rr.size, np.inf)
        code = np.full(rr.size, UNREACHED, dtype=np.int8)
        r_here = res[rr, cc]
        for k, (dr, dc) in enumerate(_OFFSETS):
            pr, pc = rr - dr, cc - dc  # the neighbour a step of (dr, dc) comes from
            ok = (pr >= 0) & (pr < n_rows) & (pc >= 0) & (pc < n_cols)
            outside = (pr < r0) | (pr >= r1) | (pc < c0) | (pc >= c1)
            ok &= ~outside if from_inside else outside
            if not ok.any():
                continue
            i = np.flatnonzero(ok)
            a_r, a_c, b_r = pr[i], pc[i], rr[i]
            if dr == 0:
                length = ew[b_r]
            elif dc == 0:
                length = ns[np.minimum(a_r, b_r)]
            else:
                length = dg[np.minimum(a_r, b_r)]
            cand = cost[a_r, a_c] + length * (res[a_r, a_c] + r_here[i]) * 0.5
            better = cand < best[i]
            best[i[better]] = cand[better]
            code[i[better]] = k
        return best, code

    def _outer_ring(self, window):
        """(rows, cols) of the cells just outside a window, inside the grid."""
        r0, r1, c0, c1 = window
        n_rows, n_cols = self.grid.shape
        a0, a1 = max(r0 - 1, 0), min(r1 + 1, n_rows)
        b0, b1 = max(c0 - 1, 0), min(c1 + 1, n_cols)
        box = np.ones((a1 - a0, b1 - b0), dtype=bool)
        box[r0 - a0 : r1 - a0, c0 - b0 : c1 - b0] = False
        rr, cc = np.nonzero(box)
        return rr + a0, cc + b0

    def _solve_tile(self, t, cost, tb, is_source):
        """One exact search over the window of tile ``t``, from every cell's current
        cost, the sources (cost 0) and the cheapest steps in from outside.  Updates
        ``cost`` and ``tb`` in place where a cell got cheaper.

        Returns True when any cell got cheaper.
        """
        r0, r1, c0, c1 = window = self._window(t)
        h, w = r1 - r0, c1 - c0
        n = h * w
        view = cost[r0:r1, c0:c1]
        start = view.ravel().copy()  # current costs
        start_code = np.full(n, UNREACHED, dtype=np.int8)
        src = np.flatnonzero(is_source[r0:r1, c0:c1])
        new_src = src[start[src] > 0]
        start[new_src] = 0.0
        start_code[new_src] = SOURCE
        ring = np.zeros((h, w), dtype=bool)
        ring[[0, -1], :] = True
        ring[:, [0, -1]] = True
        lr, lc = np.nonzero(ring)
        step, code = self._cheapest_step(lr + r0, lc + c0, cost, window, from_inside=False)
        at = lr * w + lc
        gain = step < start[at]
        start[at[gain]] = step[gain]
        start_code[at[gain]] = code[gain]
        seeds = np.flatnonzero(np.isfinite(start))
        if seeds.size == 0:
            return False
        grid = self.grid
        tail, head, wt = _edge_arrays(
            self._resistance[r0:r1, c0:c1],
            grid.ew_step_km[r0:r1],
            grid.ns_step_km[r0 : r1 - 1],
            grid.diag_step_km[r0 : r1 - 1],
            dtype=np.int32,
        )
        # super-source n: one edge per seeded cell (explicit zeros are kept as edges)
        tail = np.concatenate([tail, np.full(seeds.size, n, np.int32)])
        head = np.concatenate([head, seeds.astype(np.int32)])
        wt = np.concatenate([wt, start[seeds]])
        g = sp.csr_matrix((wt, (tail, head)), shape=(n + 1, n + 1))
        del tail, head, wt
        dist, pred = dijkstra(g, directed=False, indices=n, return_predecessors=True)
        del g
        better = dist[:n].reshape(h, w) < view
        if not better.any():
            return False
        at = np.flatnonzero(better)
        p = pred[at]
        codes = np.empty(at.size, dtype=np.int8)
        seeded = p == n
        codes[seeded] = start_code[at[seeded]]
        inner = ~seeded
        pr, pc = np.divmod(p[inner], w)
        ar, ac = np.divmod(at[inner], w)
        codes[inner] = _CODE[ar - pr + 1, ac - pc + 1]
        view[better] = dist[at]
        tb[r0:r1, c0:c1][better] = codes
        return True

    def _run_tiled(self, is_source: np.ndarray):
        """Accumulated cost from the (passable) cells of ``is_source`` by tiles; see
        the Notes of :class:`CostGraph`."""
        shape = self.grid.shape
        cost = np.full(shape, np.inf)
        tb = np.full(shape, UNREACHED, dtype=np.int8)
        # tiles holding a source, found band by band without listing the sources
        n_tc = len(self._col_edges) - 1
        first = []
        for i in range(len(self._row_edges) - 1):
            band = is_source[self._row_edges[i] : self._row_edges[i + 1]].any(axis=0)
            hit = np.logical_or.reduceat(band, self._col_edges[:-1])
            first += [i * n_tc + int(j) for j in np.flatnonzero(hit)]
        pending = {t: 0.0 for t in first}
        heap = [(0.0, t) for t in first]
        heapq.heapify(heap)
        n_solves = 0
        while heap:
            key, t = heapq.heappop(heap)
            if pending.get(t) != key:
                continue  # superseded by a cheaper entry
            del pending[t]
            n_solves += 1
            if not self._solve_tile(t, cost, tb, is_source):
                continue
            # steps out of the window that would lower a neighbour: queue the
            # neighbouring windows holding those cells, cheapest first
            window = self._window(t)
            rr, cc = self._outer_ring(window)
            step, _ = self._cheapest_step(rr, cc, cost, window, from_inside=True)
            low = step < cost[rr, cc]
            if not low.any():
                continue
            rr, cc, step = rr[low], cc[low], step[low]
            for nt in self._neighbour_tiles(t):
                r0, r1, c0, c1 = self._window(nt)
                inside = (rr >= r0) & (rr < r1) & (cc >= c0) & (cc < c1)
                if inside.any():
                    k = float(step[inside].min())
                    if k < pending.get(nt, np.inf):
                        pending[nt] = k
                        heapq.heappush(heap, (k, nt))
        n_tiles = (len(self._row_edges) - 1) * n_tc
        log.debug("tiled cost distance: %d tile searches over %d tiles", n_solves, n_tiles)
        self.last_tile_searches = n_solves
        return cost, tb

def cost_distance(
    grid: Grid,
    resistance,
    sources,
    *,
    backend: str = "auto",
    memory_mb: float | None = None,
) -> CostSurface:
    """Accumulated cost distance from source cells over a resistance raster.

    Parameters
    ----------
    grid : Grid
    resistance : array_like of shape (n_rows, n_cols)
        Cost per km of ground.  NaN, inf, negative and masked cells are impassable.
    sources : array_like of shape (n, 2), tuple (rows, cols) or bool mask
        Source cells (e.g. every cell of a known range).
    backend : {"auto", "mcp", "dijkstra", "tiled"}, default "auto"
    memory_mb : float, optional
        Working memory for the solver (MB); larger grids are solved tile by tile
        (see :class:`CostGraph`).

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
    return CostGraph(grid, resistance, backend=backend, memory_mb=memory_mb).run(sources)


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
