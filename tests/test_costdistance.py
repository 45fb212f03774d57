"""Cost distance against an independent graph search, a hand-worked case and MCP's NaN trap."""

import numpy as np
import pytest
import scipy.sparse as sp
from affine import Affine
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays
from numpy.testing import assert_allclose
from pyproj import Geod
from scipy.sparse.csgraph import dijkstra
from skimage.graph import MCP_Geometric

from screener.costdistance import (
    CostGraph,
    cost_distance,
    least_cost_path,
    path_length_km,
    step_lengths_km,
)
from screener.errors import InputError
from screener.grid import Grid

WGS84 = Geod(ellps="WGS84")


def projected_grid(shape, dx=1000.0, dy=1000.0):
    return Grid("EPSG:32633", Affine(dx, 0, 500000, 0, -dy, 5000000), shape)


def latlon_grid(shape, res=0.5, top=62.0):
    return Grid("EPSG:4326", Affine(res, 0, 10.0, 0, -res, top), shape)


def reference_cost(grid, r, sources):
    """Independent reference: explicit 8-neighbour graph built cell by cell.

    Step cost L_ab * (r_a + r_b) / 2 (Adriaensen et al. 2003, Landscape and Urban
    Planning 64:233); L_ab from pyproj.Geod.inv between cell centres on geographic
    grids, from the planar spacing on projected ones; solved with
    scipy.sparse.csgraph.dijkstra.
    """
    n_rows, n_cols = r.shape
    t = grid.transform
    tail, head, w = [], [], []
    for i in range(n_rows):
        for j in range(n_cols):
            for di in (-1, 0, 1):
                for dj in (-1, 0, 1):
                    if di == dj == 0:
                        continue
                    k, m = i + di, j + dj
                    if not (0 <= k < n_rows and 0 <= m < n_cols):
                        continue
                    if not (np.isfinite(r[i, j]) and np.isfinite(r[k, m])):
                        continue
                    if grid.is_geographic:
                        lon1, lat1 = t @ (j + 0.5, i + 0.5)
                        lon2, lat2 = t @ (m + 0.5, k + 0.5)
                        length = WGS84.inv(lon1, lat1, lon2, lat2)[2] / 1000.0
                    else:
                        length = np.hypot(dj * t.a, di * t.e) / 1000.0
                    tail.append(i * n_cols + j)
                    head.append(k * n_cols + m)
                    w.append(length * (r[i, j] + r[k, m]) / 2)
    n = n_rows * n_cols
    g = sp.csr_matrix((w, (tail, head)), shape=(n, n))
    idx = [i * n_cols + j for i, j in sources]
    return dijkstra(g, indices=idx, min_only=True).reshape(r.shape)


@pytest.mark.parametrize("backend", ["mcp", "dijkstra"])
def test_projected_matches_reference(backend):
    """Both backends equal the independent reference on a projected grid."""
    rng = np.random.default_rng(1)
    grid = projected_grid((9, 11), dx=1000.0, dy=1500.0)
    r = rng.uniform(0.05, 2.0, grid.shape)
    r[2:7, 5] = np.inf
    sources = [(0, 0), (8, 10)]
    got = cost_distance(grid, r, sources, backend=backend).cost
    assert_allclose(got, reference_cost(grid, r, sources), rtol=1e-12)


def test_latlon_matches_reference_geodesic():
    """On a lat/lon grid the auto backend equals the reference with pyproj step lengths."""
    rng = np.random.default_rng(2)
    grid = latlon_grid((8, 7))
    r = rng.uniform(0.0, 1.0, grid.shape)
    r[3, 1:5] = np.nan
    got = cost_distance(grid, r, [(7, 0)])
    assert got.backend == "dijkstra"
    # Grid steps come from pyproj too; agreement to 1e-9 relative
    assert_allclose(got.cost, reference_cost(grid, r, [(7, 0)]), rtol=1e-9)
    # MCP with the mid-latitude spacing would not be exact here
    with pytest.raises(InputError, match="longitude/latitude"):
        CostGraph(grid, r, backend="mcp")


def test_hand_worked_3x3():
    """A 3 x 3 grid of 1 km cells with one costly centre, worked by hand.

    Step cost L (r_a + r_b) / 2.  To (2, 2): along the edge then diagonally, 1 + sqrt2
    + 1 = 2 + sqrt2 (through the centre would cost 2 * sqrt2 * 3).  To (1, 1): from
    (0, 1) at 1 km * (1 + 5) / 2 = 3, plus 1 = 4 (directly: sqrt2 * 3 = 4.24).
    """
    grid = projected_grid((3, 3))
    r = np.array([[1.0, 1, 1], [1, 5, 1], [1, 1, 1]])
    s = np.sqrt(2)
    expected = np.array([[0, 1, 2], [1, 4, 1 + s], [2, 1 + s, 2 + s]])
    for backend in ("mcp", "dijkstra"):
        surf = cost_distance(grid, r, [(0, 0)], backend=backend)
        assert_allclose(surf.cost, expected, rtol=1e-12)
        path = least_cost_path(surf, (2, 2))
        assert path[0].tolist() == [0, 0] and path[-1].tolist() == [2, 2]
        assert [1, 1] not in path.tolist()
        assert len(path) == 4


def test_mcp_nan_trap_and_our_fix():
    """Raw MCP_Geometric with a NaN cost gives wrong costs; ours treats NaN as impassable.

    (scikit-image MCP: NaN costs are not handled; measured in library-notes.)
    """
    grid = projected_grid((5, 5))
    r = np.ones(grid.shape)
    r[2, 2] = np.nan
    ref = reference_cost(grid, r, [(0, 0)])
    raw, _ = MCP_Geometric(r, fully_connected=True, sampling=(1.0, 1.0)).find_costs(
        [(0, 0)]
    )
    assert not np.allclose(
        np.where(np.isfinite(ref), ref, -1), np.where(np.isfinite(raw), raw, -1)
    )
    ours = cost_distance(grid, r, [(0, 0)], backend="mcp").cost
    assert_allclose(ours, ref, rtol=1e-12)
    assert np.isinf(ours[2, 2])


def test_graph_reused_for_several_source_sets():
    """One CostGraph run twice equals two fresh runs (no state leaks between runs)."""
    rng = np.random.default_rng(3)
    for grid in (projected_grid((6, 7)), latlon_grid((6, 7))):
        r = rng.uniform(0.1, 1.0, grid.shape)
        g = CostGraph(grid, r)
        a, b = g.run([(0, 0)]), g.run(np.array([[5, 6], [0, 6]]))
        assert_allclose(a.cost, cost_distance(grid, r, [(0, 0)]).cost)
        assert_allclose(b.cost, reference_cost(grid, r, [(5, 6), (0, 6)]), rtol=1e-9)


def test_unreached_and_bad_sources():
    grid = projected_grid((4, 4))
    r = np.ones(grid.shape)
    r[:, 2] = np.inf
    surf = cost_distance(grid, r, [(0, 0)])
    assert np.isinf(surf.cost[:, 3]).all()
    assert least_cost_path(surf, (0, 3)).shape == (0, 2)
    with pytest.raises(InputError, match="outside the grid"):
        cost_distance(grid, r, [(4, 0)])
    with pytest.raises(InputError, match="shape"):
        cost_distance(grid, np.ones((3, 3)), [(0, 0)])


def test_path_length_is_sum_of_geodesic_steps():
    """A path's length equals the sum of pyproj.Geod.inv distances between its centres."""
    rng = np.random.default_rng(4)
    grid = latlon_grid((10, 10), res=0.25, top=70.0)
    r = rng.uniform(0.1, 1.0, grid.shape)
    surf = cost_distance(grid, r, [(0, 0)])
    path = least_cost_path(surf, (9, 6))
    lon, lat = grid.lonlat(path[:, 0], path[:, 1])
    steps = WGS84.inv(lon[:-1], lat[:-1], lon[1:], lat[1:])[2] / 1000.0
    assert_allclose(path_length_km(grid, path), steps.sum(), rtol=1e-9)


@settings(max_examples=40, deadline=None)
@given(
    r=arrays(np.float64, (5, 6), elements=st.floats(0.0, 10.0)),
    src=st.tuples(st.integers(0, 4), st.integers(0, 5)),
    end=st.tuples(st.integers(0, 4), st.integers(0, 5)),
    geographic=st.booleans(),
)
def test_properties(r, src, end, geographic):
    """Zero on sources, never negative, non-decreasing along a least-cost path."""
    grid = latlon_grid((5, 6)) if geographic else projected_grid((5, 6))
    surf = cost_distance(grid, r, [src])
    assert surf.cost[src] == 0.0
    assert np.all(surf.cost >= 0)
    path = least_cost_path(surf, end)
    c = surf.cost[path[:, 0], path[:, 1]]
    assert np.all(np.diff(c) >= -1e-12)
    assert tuple(path[0]) == src


def test_large_source_sets_match_the_reference_graph():
    """A range of many cells (seeded from its edge internally) gives the same cost as
    the independent reference graph seeded with every cell (scipy.sparse.csgraph)."""
    rng = np.random.default_rng(5)
    grid = projected_grid((30, 32))
    r = rng.uniform(0.1, 1.0, grid.shape)
    r[12:14, :20] = np.inf  # an impassable bar beside the source block
    src = np.zeros(grid.shape, bool)
    src[2:22, 3:25] = True  # 440 cells, partly on the impassable bar
    surf = cost_distance(grid, r, src, backend="mcp")
    rows, cols = np.nonzero(src & np.isfinite(r))
    want = reference_cost(grid, r, list(zip(rows, cols)))
    assert_allclose(surf.cost, want, rtol=1e-9)
    assert (surf.cost[rows, cols] == 0).all()
    pred = surf.predecessor
    assert (pred[rows, cols] == -1).all()  # every passable source is a source
    assert sorted(map(tuple, surf.sources.tolist())) == sorted(zip(rows.tolist(), cols.tolist()))
    # the expanded predecessor agrees with the compact traceback, cell by cell
    for flat in rng.choice(grid.n_cells, 50, replace=False):
        assert pred.flat[flat] == surf.previous_cell(int(flat))
    # a path from a far corner ends on an edge cell of the block
    path = least_cost_path(surf, (29, 31))
    assert src[tuple(path[0])] and not src[tuple(path[1])]


def test_float32_surfaces_agree_with_float64():
    rng = np.random.default_rng(6)
    grid = projected_grid((20, 20))
    g = CostGraph(grid, rng.uniform(0.1, 1.0, grid.shape))
    a = g.run([(3, 4)])
    b = g.run([(3, 4)], dtype=np.float32)
    assert b.cost.dtype == np.float32
    assert_allclose(b.cost, a.cost, rtol=1e-6)
    with pytest.raises(InputError, match="float64 or float32"):
        g.run([(3, 4)], dtype=np.int32)


@pytest.fixture
def small_tiles(monkeypatch):
    """Tiles of about 6 x 6 cells with a 2-cell margin, so small grids span many."""
    import screener.costdistance as cd

    monkeypatch.setattr(cd, "_MIN_TILE_CELLS", 36)
    monkeypatch.setattr(cd, "_TILE_MARGIN", 2)
    return cd


def path_cost(grid, r, path):
    """Sum of step costs L (r_a + r_b) / 2 along a path (same formula as the reference)."""
    a, b = path[:-1], path[1:]
    return float(np.sum(step_lengths_km(grid, path) * (r[a[:, 0], a[:, 1]] + r[b[:, 0], b[:, 1]]) / 2))


@pytest.mark.parametrize("geographic", [False, True])
@pytest.mark.parametrize("margin", [0, 2])
def test_tiled_matches_reference(small_tiles, monkeypatch, geographic, margin):
    """Tile by tile equals the independent whole-grid reference (scipy.sparse.csgraph
    on a graph built cell by cell; pyproj step lengths on the lat/lon grid), paths
    included: a maze of impassable walls makes cheapest paths wind through many tiles."""
    monkeypatch.setattr(small_tiles, "_TILE_MARGIN", margin)
    rng = np.random.default_rng(7)
    shape = (23, 29)
    grid = latlon_grid(shape, res=0.25) if geographic else projected_grid(shape)
    r = rng.uniform(0.05, 3.0, shape)
    r[5, :24] = np.inf  # walls with gaps at alternate ends: a serpentine corridor
    r[11, 4:] = np.inf
    r[17, :25] = np.inf
    r[rng.random(shape) < 0.05] = np.nan
    sources = [(0, 0), (22, 28), (8, 14)]
    sources = [s for s in sources if np.isfinite(r[s])]
    g = CostGraph(grid, r, backend="tiled", memory_mb=1e-6)
    assert (len(g._row_edges) - 1) * (len(g._col_edges) - 1) >= 12
    surf = g.run(sources)
    want = reference_cost(grid, np.where(np.isfinite(r), r, np.inf), sources)
    assert_allclose(surf.cost, want, rtol=1e-12)
    assert g.last_tile_searches >= 12
    rr = np.where(np.isfinite(r), r, np.inf)
    for end in [(22, 0), (12, 27), (4, 20), (16, 3)]:
        path = least_cost_path(surf, end)
        if not np.isfinite(want[end]):
            assert path.shape == (0, 2)
            continue
        assert tuple(path[0]) in set(sources) and tuple(path[-1]) == end
        assert path_cost(grid, rr, path) == pytest.approx(want[end], rel=1e-12)
    pred = surf.predecessor
    for flat in rng.choice(grid.n_cells, 60, replace=False):
        assert pred.flat[flat] == surf.previous_cell(int(flat))


def test_tiled_equals_whole_grid_dijkstra_bit_for_bit(small_tiles):
    """The tiled search adds the same step costs in the same order as the whole-grid
    search, so the costs agree exactly, not just within rounding."""
    rng = np.random.default_rng(8)
    grid = latlon_grid((31, 17), res=0.1)
    r = rng.uniform(0.0, 2.0, grid.shape)  # zero-resistance cells included
    r[r < 0.1] = 0.0
    src = np.zeros(grid.shape, bool)
    src[10:14, 2:9] = True
    whole = CostGraph(grid, r, backend="dijkstra").run(src)
    tiled = CostGraph(grid, r, backend="tiled", memory_mb=1e-6).run(src)
    assert np.array_equal(whole.cost, tiled.cost)
    assert (tiled.cost[src] == 0).all() and (tiled.predecessor[src] == -1).all()
    assert np.array_equal(tiled.sources, whole.sources)


def test_auto_tiles_only_when_the_solver_would_exceed_memory():
    grid = projected_grid((200, 300))  # 6e4 cells: MCP needs about 4.8 MB
    r = np.ones(grid.shape)
    assert CostGraph(grid, r, memory_mb=100).backend == "mcp"
    assert CostGraph(grid, r, memory_mb=1).backend == "tiled"
    assert CostGraph(latlon_grid((200, 300)), r, memory_mb=1).backend == "tiled"
    a = CostGraph(grid, r, memory_mb=1).run([(0, 0)])
    b = CostGraph(grid, r).run([(0, 0)])
    assert_allclose(a.cost, b.cost, rtol=1e-12)
    with pytest.raises(InputError, match="memory_mb"):
        CostGraph(grid, r, memory_mb=0)


def test_auto_tiles_large_grids_whatever_the_memory(monkeypatch):
    import screener.costdistance as cd

    monkeypatch.setattr(cd, "_TILED_FROM_CELLS", 1000)
    grid = projected_grid((40, 30))
    r = np.random.default_rng(9).uniform(0.1, 1.0, grid.shape)
    g = CostGraph(grid, r, memory_mb=1e6)
    assert g.backend == "tiled"
    want = reference_cost(grid, r, [(3, 4)])
    assert_allclose(g.run([(3, 4)]).cost, want, rtol=1e-12)
    monkeypatch.setattr(cd, "_TILED_FROM_CELLS", 10_000)
    assert CostGraph(grid, r, memory_mb=1e6).backend == "mcp"
