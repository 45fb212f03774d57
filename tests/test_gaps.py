"""The separating gap against an independent computation on the explicit cell graph."""

import itertools

import networkx as nx
import numpy as np
import pytest
from affine import Affine
from numpy.testing import assert_allclose
from scipy import ndimage as ndi

from screener.gaps import separating_gaps
from screener.grid import Grid
from screener.isolation import Clade, IsolationParameters, find_candidates, path_profile

EIGHT = np.ones((3, 3), bool)


def projected_grid(shape, res=1000.0, mask=None):
    return Grid("EPSG:32633", Affine(res, 0, 500000, 0, -res, 5000000), shape, mask=mask)


def reference_gaps(grid, suitable, labels, n, range_ids):
    """Minimax gap by definition, with networkx on the explicit 8-neighbour graph.

    Independent of the module: (1) networkx's Dijkstra from each patch over the cell
    graph with edge weight ``step * (u_a + u_b) / 2`` (u = 1 on unsuitable cells)
    gives the shortest crossing between every pair of patches; (2) the gap of a patch
    is the smallest threshold at which a chain of crossings no longer than it joins
    the patch to a range (connected components by networkx, thresholds tried in
    increasing order).  No spanning tree, no Voronoi labelling.
    """
    G = nx.Graph()
    n_rows, n_cols = grid.shape
    ew, ns, dg = grid.ew_step_km, grid.ns_step_km, grid.diag_step_km
    ok = grid.mask
    for r, c in itertools.product(range(n_rows), range(n_cols)):
        if not ok[r, c]:
            continue
        for dr, dc in ((0, 1), (1, 0), (1, 1), (1, -1)):
            r2, c2 = r + dr, c + dc
            if not (0 <= r2 < n_rows and 0 <= c2 < n_cols) or not ok[r2, c2]:
                continue
            step = ew[r] if dr == 0 else (ns[r] if dc == 0 else dg[r])
            u = (not suitable[r, c]) + (not suitable[r2, c2])
            G.add_edge((r, c), (r2, c2), weight=step * u / 2)
    cells = {k: [tuple(x) for x in np.argwhere(labels == k)] for k in range(1, n + 1)}
    cross = {}
    for a in range(1, n + 1):
        dist = nx.multi_source_dijkstra_path_length(G, set(cells[a]))
        for b in range(a + 1, n + 1):
            vals = [dist[x] for x in cells[b] if x in dist]
            if vals:
                cross[(a, b)] = min(vals)
    out = np.full(n + 1, np.inf)
    out[list(range_ids)] = 0.0
    H = nx.Graph()
    H.add_nodes_from(range(1, n + 1))
    for t in sorted(set(cross.values())):
        H.add_edges_from(e for e, w in cross.items() if w <= t)
        for comp in nx.connected_components(H):
            if comp & set(range_ids):
                for k in comp:
                    out[k] = min(out[k], t)
    return out


def stepping_stone_scene():
    """9 x 22 grid of 1 km cells (suitability; threshold 0.5).

    Range R (cols 0-2) and target patch T (cols 18-21) in the top rows are joined by
    a straight band of shallow unsuitable ground (0.45) 15 km long; the least-cost
    path takes it.  Round the south, a detour crosses deep ground (0.05) in runs of
    2 km through a chain of one-cell-wide... stepping stones S1..S4 (suitable, 0.9).
    """
    s = np.full((9, 22), 0.05)
    s[0:3, 0:3] = 0.9  # R
    s[0:3, 3:18] = 0.45  # shallow band, 15 cells
    s[0:3, 18:22] = 0.9  # T
    # detour: a column of stones every 3 cells along row 6, joined to R and T
    s[3:7, 1] = 0.9  # from R down to row 6 (touches R: part of R's patch)
    for c in (4, 7, 10, 13, 16):
        s[6, c] = 0.9  # stones, 2 unsuitable cells apart
    s[3:7, 19] = 0.9  # from row 6 up to T (part of T's patch)
    return s


def test_stepping_stones_minimax_differs_from_least_cost_path():
    s = stepping_stone_scene()
    grid = projected_grid(s.shape)
    suitable = s >= 0.5
    labels, n = ndi.label(suitable, EIGHT)
    R = labels[0, 0]
    T = labels[0, 20]
    sep = separating_gaps(grid, labels, n, [R])
    ref = reference_gaps(grid, suitable, labels, n, [R])
    assert_allclose(sep.gap_km[1:], ref[1:], rtol=1e-12)
    # stones 2 cells apart, the R arm at col 1 and the T arm at col 19: runs of
    # 2 km (cols 2-3, 5-6, ..., 17-18 on row 6)
    assert_allclose(sep.gap_km[T], 2.0, rtol=1e-12)
    assert sep.stepping_stones[T] == 5
    assert_allclose(sep.unsuitable_km[T], 12.0, rtol=1e-12)  # six 2-km crossings

    # the least-cost path over 1 - s crosses the shallow band: one 15 km run
    cs = find_candidates(
        Clade(grid, {"A": s}, {"A": ([0], [0])}), {"A": 0.5},
        parameters=IsolationParameters(min_gap_km=5.0, min_patch_km2=0.5,
                                       within_range_min_km=100.0),
    )
    t_site = cs.sites[cs.sites["col"] >= 18].iloc[0]
    path = cs.paths[int(t_site["site_id"])]
    lcp = path_profile(grid, path, suitable, s)
    assert_allclose(lcp.gap_km, 15.0, rtol=1e-12)
    # classification uses the separating gap: T is near-range, not isolated
    assert t_site["kind"] == "near-range"
    assert_allclose(t_site["gap_km"], 2.0, rtol=1e-12)
    assert_allclose(t_site["unsuitable_km"], 12.0, rtol=1e-12)


@pytest.mark.parametrize("seed", range(6))
def test_random_grids_match_networkx(seed):
    """Random suitability (with nodata holes) on a lon/lat grid: exact agreement."""
    rng = np.random.default_rng(seed)
    shape = (14, 17)
    mask = rng.random(shape) > 0.1
    suitable = (rng.random(shape) > 0.78) & mask
    # geographic grid at 60 degrees north: east-west steps shrink row by row
    grid = Grid("EPSG:4326", Affine(0.05, 0, 10.0, 0, -0.05, 61.0), shape, mask=mask)
    labels, n = ndi.label(suitable, EIGHT)
    if n < 3:
        pytest.skip("too few patches drawn")
    ranges = [1, 2]
    sep = separating_gaps(grid, labels, n, ranges, backend="dijkstra")
    ref = reference_gaps(grid, suitable, labels, n, ranges)
    assert_allclose(sep.gap_km[1:], ref[1:], rtol=1e-9)
    assert np.isfinite(ref[1:]).sum() > 2


def test_projected_backends_agree():
    rng = np.random.default_rng(11)
    shape = (30, 40)
    suitable = rng.random(shape) > 0.8
    grid = projected_grid(shape, res=500.0)
    labels, n = ndi.label(suitable, EIGHT)
    ranges = [1]
    out = [separating_gaps(grid, labels, n, ranges, backend=b) for b in ("mcp", "dijkstra")]
    assert_allclose(out[0].gap_km, out[1].gap_km, rtol=1e-9)
    assert_allclose(out[0].unsuitable_km, out[1].unsuitable_km, rtol=1e-9)
    ref = reference_gaps(grid, suitable, labels, n, ranges)
    assert_allclose(out[0].gap_km[1:], ref[1:], rtol=1e-9)


def test_unreachable_patch_has_infinite_gap():
    s = np.zeros((3, 9), bool)
    s[:, 0:2] = True
    s[:, 6:9] = True
    mask = np.ones(s.shape, bool)
    mask[:, 4] = False  # a river no route crosses
    grid = projected_grid(s.shape, mask=mask)
    labels, n = ndi.label(s, EIGHT)
    sep = separating_gaps(grid, labels, n, [1])
    assert sep.gap_km[1] == 0 and np.isinf(sep.gap_km[2]) and sep.stepping_stones[2] == -1


# --- real terrain: matplotlib's sample DEM (jacksboro_fault_dem.npz, 3-arcsecond
# lon/lat grid of a ridge-and-valley landscape) ------------------------------------
# Ground at or above 800 m is suitable.  By construction only three high blocks are
# kept suitable (every other cell above 800 m is lowered just below the threshold): the
# largest block is the recorded ridge, the second largest an unrecorded plateau, and a
# small block between them a stepping stone.  The minimal land gap is then known from
# the geometry alone: the shortest straight crossings between blocks (nearest cell
# centres in UTM 16N metres by pyproj, less one cell along the line), combined by hand
# as min(ridge-plateau, max(ridge-stone, stone-plateau)).


def _nearest_crossing_km(xy_a, xy_b, cell_w, cell_h):
    from scipy.spatial import cKDTree

    d, j = cKDTree(xy_a).query(xy_b)
    i = int(np.argmin(d))
    vx, vy = xy_b[i] - xy_a[j[i]]
    dist = float(np.hypot(vx, vy))
    # one cell along the line: centre-to-centre distance counts a cell too many
    one = min(cell_w / max(abs(vx) / dist, 1e-12), cell_h / max(abs(vy) / dist, 1e-12))
    return (dist - one) / 1000.0


def test_real_terrain_gap_with_a_stepping_stone():
    from matplotlib import cbook
    from pyproj import Transformer

    dem = cbook.get_sample_data("jacksboro_fault_dem.npz")
    z = dem["elevation"].astype(float)
    dx, dy = float(dem["dx"]), float(dem["dy"])
    top = max(float(dem["ymin"]), float(dem["ymax"]))  # the file's ymin is the north edge
    grid = Grid("EPSG:4326", Affine(dx, 0, float(dem["xmin"]), 0, -dy, top), z.shape)
    high = z >= 800
    lab, _ = ndi.label(high, EIGHT)
    sizes = np.bincount(lab.ravel())
    sizes[0] = 0
    ridge, plateau = np.argsort(sizes)[::-1][:2]
    # the stepping stone: the block whose worse crossing to ridge and plateau is least
    others = [k for k in np.flatnonzero(sizes >= 100) if k not in (ridge, plateau)]
    to_utm = Transformer.from_crs("EPSG:4326", "EPSG:32616", always_xy=True)

    def xy(k):
        rr, cc = np.nonzero(lab == k)
        return np.column_stack(to_utm.transform(*grid.lonlat(rr, cc)))

    cell_w = float(grid.ew_step_km.mean()) * 1000
    cell_h = float(grid.ns_step_km.mean()) * 1000
    cross = {}
    for a, b in itertools.combinations([ridge, plateau, *others], 2):
        cross[a, b] = cross[b, a] = _nearest_crossing_km(xy(a), xy(b), cell_w, cell_h)
    stone = min(others, key=lambda k: max(cross[ridge, k], cross[k, plateau]))
    expected = min(cross[ridge, plateau], max(cross[ridge, stone], cross[stone, plateau]))
    assert cross[ridge, plateau] > 1.25 * expected  # the stone matters

    s = np.clip((z - 300.0) / 800.0, 0, 1)
    thr = (800.0 - 300.0) / 800.0
    keep = np.isin(lab, [ridge, plateau, stone])
    s[high & ~keep] = thr - 0.01
    rr, cc = np.nonzero(lab == ridge)
    best = np.argsort(z[rr, cc])[::-1][:3]
    cs = find_candidates(
        Clade(grid, {"A": s}, {"A": (rr[best], cc[best])}), {"A": thr},
        parameters=IsolationParameters(min_patch_km2=1.0, within_range_min_km=1e3,
                                       min_gap_km=1.0),
    )
    sites = cs.sites
    site = sites[[lab[r, c] == plateau for r, c in zip(sites["row"], sites["col"], strict=True)]]
    assert len(site) == 1
    got = float(site["gap_km"].iloc[0])
    assert abs(got - expected) <= 0.25 * expected, (got, expected)
    assert site["stepping_stones"].iloc[0] == 1


def test_min_gap_below_two_cells_warns():
    s = stepping_stone_scene()
    grid = projected_grid(s.shape)  # 1 km cells: two cells = 2 km
    args = (Clade(grid, {"A": s}, {"A": ([0], [0])}), {"A": 0.5})
    short = find_candidates(*args, parameters=IsolationParameters(min_gap_km=1.5))
    assert len(short.warnings) == 1 and "two cells" in short.warnings[0]
    assert find_candidates(*args, parameters=IsolationParameters(min_gap_km=2.0)).warnings == ()
