"""The isolation stage's small functions, each against an outside reference.

Patches against ``skimage.measure.label``, areas and distances against
``pyproj.Geod``, costs, paths and corridors against Dijkstra in networkx on an explicit
8-neighbour graph whose step lengths come from ``pyproj.Geod.inv`` (not from the
grid); then hostile inputs: empty, one cell, all suitable, all unsuitable.
"""

import itertools

import networkx as nx
import numpy as np
import pytest
from affine import Affine
from numpy.testing import assert_allclose
from pyproj import Geod
from scipy import ndimage as ndi
from skimage.measure import label as sk_label

from screener.columns import CANDIDATES, find_column
from screener.errors import InputError, RecordsError
from screener.gaps import separating_gaps
from screener.grid import Grid
from screener.isolation import (
    Clade,
    IsolationParameters,
    between_ranges,
    classify_sites,
    cost_graph,
    cost_to_ranges,
    find_candidates,
    find_patches,
    known_ranges,
    least_cost_paths,
    nearest_records,
    site_columns,
    site_layout,
    suitable_cells,
    unoccupied_patches,
    within_range_parts,
)

WGS84 = Geod(ellps="WGS84")
RES = 0.02  # degrees
LON0, LAT0 = 20.0, 48.0  # north-west corner


def latlon_grid(shape, mask=None):
    return Grid("EPSG:4326", Affine(RES, 0, LON0, 0, -RES, LAT0), shape, mask=mask)


def centres(shape):
    """Cell-centre longitudes and latitudes from the affine, independent of Grid."""
    rows, cols = np.indices(shape)
    return LON0 + (cols + 0.5) * RES, LAT0 - (rows + 0.5) * RES


def cell_area_km2(r, c):
    """Geodesic area of one lon/lat cell by pyproj, its edges densified so the
    polygon follows the parallels (a geodesic between two corners would not)."""
    w, e = LON0 + c * RES, LON0 + (c + 1) * RES
    n, s = LAT0 - r * RES, LAT0 - (r + 1) * RES
    k = np.linspace(0, 1, 65)
    lon = np.r_[w + k * (e - w), np.full(65, e), e - k * (e - w), np.full(65, w)]
    lat = np.r_[np.full(65, n), n - k * (n - s), np.full(65, s), s + k * (n - s)]
    return abs(WGS84.polygon_area_perimeter(lon, lat)[0]) / 1e6


def reference_graph(mask, resistance):
    """networkx graph of the 8-neighbour steps: weight ``L * (r_a + r_b) / 2`` with
    ``L`` the pyproj geodesic distance (km) between the cell centres."""
    lon, lat = centres(mask.shape)
    G = nx.Graph()
    n_rows, n_cols = mask.shape
    for r, c in itertools.product(range(n_rows), range(n_cols)):
        if not mask[r, c] or not np.isfinite(resistance[r, c]):
            continue
        G.add_node((r, c))
        for dr, dc in ((0, 1), (1, 0), (1, 1), (1, -1)):
            r2, c2 = r + dr, c + dc
            if not (0 <= r2 < n_rows and 0 <= c2 < n_cols) or not mask[r2, c2]:
                continue
            if not np.isfinite(resistance[r2, c2]):
                continue
            _, _, d = WGS84.inv(lon[r, c], lat[r, c], lon[r2, c2], lat[r2, c2])
            w = d / 1000 * (resistance[r, c] + resistance[r2, c2]) / 2
            G.add_edge((r, c), (r2, c2), weight=w, km=d / 1000)
    return G


def scene(seed=0, shape=(16, 22)):
    """Two taxa on a smooth random landscape with a few nodata holes."""
    rng = np.random.default_rng(seed)
    mask = rng.random(shape) > 0.04
    grid = latlon_grid(shape, mask)
    maps = {}
    for t in "AB":
        m = ndi.gaussian_filter(rng.random(shape), 1.5)
        m = (m - m.min()) / (m.max() - m.min())
        maps[t] = np.where(mask, m, np.nan)
    recs = {}
    for t in "AB":
        rr, cc = np.nonzero(maps[t] >= np.nanquantile(maps[t], 0.95))
        recs[t] = (rr[:2], cc[:2])
    th = {t: float(np.nanquantile(maps[t], 0.75)) for t in "AB"}
    return grid, maps, recs, th


SEEDS = (3, 5, 7)  # scenes where A and B have separate ranges and 5 patches


def chain(seed=3, **kw):
    grid, maps, recs, th = scene(seed)
    clade = Clade(grid, maps, recs)
    p = IsolationParameters(min_patch_km2=0.0, within_range_min_km=3.0, **kw)
    suitable = suitable_cells(grid, maps, th)
    patches = find_patches(grid, suitable)
    ranges = known_ranges(grid, patches, clade.records)
    parts = within_range_parts(grid, patches, ranges, clade.records,
                               min_km=p.within_range_min_km, min_patch_km2=p.min_patch_km2)
    layout = site_layout(patches, unoccupied_patches(patches, ranges, p.min_patch_km2),
                         parts)
    graph = cost_graph(clade, p)
    costs = cost_to_ranges(graph, ranges, layout)
    return grid, clade, p, suitable, patches, ranges, layout, graph, costs


@pytest.mark.parametrize("seed", SEEDS)
def test_patches_match_skimage_label_and_pyproj_areas(seed):
    grid, maps, recs, th = scene(seed)
    suitable = suitable_cells(grid, maps, th)
    patches = find_patches(grid, suitable)
    # skimage.measure.label, 8-connectivity (connectivity=2): same components, and
    # both number them in raster order of their first cell
    ref, n = sk_label(suitable, connectivity=2, return_num=True)
    assert patches.n == n > 1
    assert np.array_equal(patches.labels, ref)
    # areas: sums of pyproj geodesic cell areas (WGS84)
    for k in range(1, n + 1):
        want = sum(cell_area_km2(r, c) for r, c in np.argwhere(ref == k))
        assert_allclose(patches.area_km2[k - 1], want, rtol=1e-6)


def test_known_ranges_unoccupied_and_within_range_parts_by_definition():
    grid, clade, p, suitable, patches, ranges, layout, _, _ = chain(3)
    ref = sk_label(suitable, connectivity=2)  # skimage.measure.label
    want = sorted({int(ref[r, c]) for rr, cc in clade.records.values()
                   for r, c in zip(rr, cc, strict=True) if ref[r, c] > 0})
    assert ranges.ids.tolist() == want and len(want) >= 1
    for t, (rr, cc) in clade.records.items():
        src = np.isin(ref, [ref[r, c] for r, c in zip(rr, cc, strict=True) if ref[r, c]])
        src[rr, cc] = True
        assert np.array_equal(ranges.sources[t], src & grid.mask)
    others = sorted(set(range(1, ref.max() + 1)) - set(want))
    assert unoccupied_patches(patches, ranges, 0.0).tolist() == others
    # within-range parts: range cells farther than 3 km from every record, by
    # brute-force pyproj.Geod.inv distances, grouped by skimage.measure.label
    lon, lat = centres(grid.shape)
    rec = [(r, c) for rr, cc in clade.records.values() for r, c in zip(rr, cc, strict=True)]
    far = np.zeros(grid.shape, bool)
    for r, c in np.argwhere(np.isin(ref, want)):
        d = [WGS84.inv(lon[r, c], lat[r, c], lon[a, b], lat[a, b])[2] / 1000 for a, b in rec]
        far[r, c] = min(d) > 3.0
    parts_ref, n_parts = sk_label(far, connectivity=2, return_num=True)
    parts = within_range_parts(grid, patches, ranges, clade.records, min_km=3.0,
                               min_patch_km2=0.0)
    assert parts.n == n_parts > 0 and np.array_equal(parts.labels, parts_ref)
    # with a minimum area: parts smaller than it (pyproj areas) are dropped, the rest
    # renumbered in order
    areas = [sum(cell_area_km2(r, c) for r, c in np.argwhere(parts_ref == k))
             for k in range(1, n_parts + 1)]
    limit = float(np.median(areas))
    kept = [k + 1 for k, a in enumerate(areas) if a >= limit * (1 + 1e-9)]
    big = within_range_parts(grid, patches, ranges, clade.records, min_km=3.0,
                             min_patch_km2=limit * (1 + 1e-9))
    assert big.n == len(kept) < n_parts
    assert np.array_equal(big.labels > 0, np.isin(parts_ref, kept))
    # the layout numbers unoccupied patches first, then the parts
    assert layout.n_sites == len(others) + n_parts
    assert np.array_equal(layout.cells > layout.n_unoccupied, parts_ref > 0)
    # nearest record per site: the brute-force minimum over the site's cells
    km, taxon = nearest_records(grid, layout, clade.records)
    for k in range(1, layout.n_sites + 1):
        d = [WGS84.inv(lon[r, c], lat[r, c], lon[a, b], lat[a, b])[2] / 1000
             for r, c in np.argwhere(layout.cells == k) for a, b in rec]
        assert_allclose(km[k - 1], min(d), rtol=1e-9)


@pytest.mark.parametrize("seed", SEEDS)
def test_costs_and_paths_match_networkx(seed):
    grid, clade, p, suitable, patches, ranges, layout, _, costs = chain(seed)
    s = clade.masked_suitability()
    G = reference_graph(grid.mask, 1.0 - s)
    for t, src in ranges.sources.items():
        # networkx multi-source Dijkstra over pyproj step lengths
        dist = nx.multi_source_dijkstra_path_length(G, {tuple(x) for x in np.argwhere(src)})
        ref = np.full(grid.shape, np.inf)
        for cell, d in dist.items():
            ref[cell] = d
        assert_allclose(costs.surfaces[t].cost, ref, rtol=1e-6)  # float32 surfaces
        for k in range(1, layout.n_sites + 1):
            want = min(ref[r, c] for r, c in np.argwhere(layout.cells == k))
            assert_allclose(costs.to_site[t][k - 1], want, rtol=1e-9)
    paths = least_cost_paths(grid, patches, layout, costs, s)
    assert paths.paths
    for k, path in paths.paths.items():
        cells = [tuple(x) for x in path]
        taxon = paths.nearest_taxon[k - 1]
        assert ranges.sources[taxon][cells[-1]]  # ends on the taxon's sources
        # the path is a shortest one: its summed edge weights equal networkx's
        assert_allclose(nx.path_weight(G, cells, "weight"), paths.cost_distance[k - 1],
                        rtol=1e-9)
        # its length: the sum of pyproj geodesic steps
        assert_allclose(nx.path_weight(G, cells, "km"), paths.length_km[k - 1], rtol=1e-9)
        bad = [1.0 - s[x] for x in cells if not suitable[x]]
        assert_allclose(paths.barrier_depth[k - 1], max(bad) if bad else 0.0)


def test_corridors_between_ranges_by_definition():
    grid, clade, p, suitable, patches, ranges, layout, _, costs = chain(7)
    G = reference_graph(grid.mask, 1.0 - clade.masked_suitability())
    ref = {}
    for t, src in ranges.sources.items():
        dist = nx.multi_source_dijkstra_path_length(G, {tuple(x) for x in np.argwhere(src)})
        ref[t] = np.full(grid.shape, np.inf)
        for cell, d in dist.items():
            ref[t][cell] = d
    # the corridor between A and B: cells with d_A + d_B within 5 % of the least
    # (the definition in the docstring, evaluated on networkx's distances)
    tot = ref["A"] + ref["B"]
    lcd = tot.min()
    assert 0 < lcd < np.inf
    on = tot <= lcd * 1.05
    want = [bool(on[layout.cells == k].any()) for k in range(1, layout.n_sites + 1)]
    got = between_ranges(costs, layout, 0.05).tolist()
    assert got == want and any(want) and not all(want)


def test_classification_uses_the_separating_gap():
    grid, clade, p, suitable, patches, ranges, layout, graph, costs = chain(3)
    gaps = separating_gaps(grid, patches.labels, patches.n, ranges.ids,
                           passable=graph.passable)
    paths = least_cost_paths(grid, patches, layout, costs, clade.masked_suitability())
    pid = layout.patch_ids
    n_u = layout.n_unoccupied
    limit = float(np.median(gaps.gap_km[pid]))  # splits the patches into both kinds
    kinds = classify_sites(grid, ranges, layout, gaps, paths, limit)
    want = np.where(gaps.gap_km[pid] < limit, "near-range", "isolated")
    assert kinds["kind"][:n_u].tolist() == want.tolist()
    assert set(kinds["kind"][n_u:]) <= {"within-range"}
    assert {"near-range", "isolated"} <= set(kinds["kind"])


# --- hostile inputs ----------------------------------------------------------------


def test_parameters_refuse_nonsense():
    for bad in (dict(min_gap_km=-1), dict(min_patch_km2=np.nan), dict(corridor_slack=np.inf),
                dict(within_range_min_km="ten")):
        with pytest.raises(InputError, match="finite number >= 0"):
            IsolationParameters(**bad)
    with pytest.raises(InputError, match="'linear' or 'log'"):
        IsolationParameters(resistance="quadratic")
    with pytest.raises(InputError, match="two different names"):
        IsolationParameters(threshold_names=("mtp", "mtp"))
    with pytest.raises(InputError, match="backend"):
        find_candidates(Clade(latlon_grid((2, 2)), {"A": np.ones((2, 2))}, {"A": ([0], [0])}),
                        {"A": 0.5}, parameters=IsolationParameters(backend="fastest"))


def test_empty_and_mismatched_inputs():
    grid = latlon_grid((3, 3))
    with pytest.raises(InputError, match="empty"):
        Clade(grid, {}, {})
    with pytest.raises(RecordsError, match="non-empty"):
        Clade(grid, {"A": np.ones((3, 3))}, {"A": ([], [])})
    with pytest.raises(RecordsError, match="No records"):
        Clade(grid, {"A": np.ones((3, 3))}, {"B": ([0], [0])})
    with pytest.raises(RecordsError, match="whole row and column numbers"):
        Clade(grid, {"A": np.ones((3, 3))}, {"A": ([1.5], [0])})  # not truncated
    with pytest.raises(RecordsError, match="pair of arrays"):
        Clade(grid, {"A": np.ones((3, 3))}, {"A": ([1], [0], [2])})
    clade = Clade(grid, {"A": np.ones((3, 3))}, {"A": ([1.0], [0])})  # whole floats
    assert clade.records["A"][0].dtype == np.int64
    for bad in (np.nan, np.inf, None, "high"):
        with pytest.raises(InputError, match="finite number"):
            find_candidates(clade, {"A": bad})


def test_one_cell_grid():
    grid = latlon_grid((1, 1))
    for value, n_ranges in ((0.9, 1), (0.1, 0)):
        cs = find_candidates(Clade(grid, {"A": np.full((1, 1), value)}, {"A": ([0], [0])}),
                             {"A": 0.5}, {"A": 0.4})
        assert len(cs.sites) == 0 and len(cs.ranges) == n_ranges
        assert list(cs.sites.columns) == site_columns(["A"])
        assert cs.cost_all.shape == (1, 1) and cs.cost_all[0, 0] == 0


def test_all_suitable_and_all_unsuitable_grids():
    grid = latlon_grid((6, 8))
    recs = {"A": ([0], [0]), "B": ([5], [7])}
    # all suitable: one patch, the range of both taxa; the far corner is within-range
    ones = {t: np.ones(grid.shape) for t in "AB"}
    cs = find_candidates(Clade(grid, ones, recs), {"A": 0.5, "B": 0.5},
                         parameters=IsolationParameters(within_range_min_km=5.0,
                                                        min_patch_km2=0.0))
    assert cs.ranges["taxa"].tolist() == ["A,B"]
    assert set(cs.sites["kind"]) == {"within-range"}
    assert (cs.cost_all == 0).all() and (cs.barrier == 0).all()
    assert not cs.sites["between_ranges"].any()  # ranges touch: no corridor
    # all unsuitable: no patch, no range, no site; costs still run from the records
    zeros = {t: np.zeros(grid.shape) for t in "AB"}
    cs = find_candidates(Clade(grid, zeros, recs), {"A": 0.5, "B": 0.5}, {"A": 0.4, "B": 0.4})
    assert len(cs.sites) == 0 and len(cs.ranges) == 0 and not cs.paths
    assert cs.cost["A"][0, 0] == 0 and np.isfinite(cs.cost_all).all()
    assert (cs.patch_labels == 0).all()


def test_records_only_on_unsuitable_cells():
    """No known range at all: every patch is unoccupied and cut off (gap inf)."""
    grid = latlon_grid((5, 9))
    s = np.full(grid.shape, 0.1)
    s[:, 6:9] = 0.9
    cs = find_candidates(Clade(grid, {"A": s}, {"A": ([2], [0])}), {"A": 0.5},
                         parameters=IsolationParameters(min_patch_km2=0.0))
    assert len(cs.ranges) == 0
    assert cs.sites["kind"].tolist() == ["isolated"]
    assert np.isinf(cs.sites["gap_km"].iloc[0])
    assert np.isfinite(cs.sites["cost_distance"].iloc[0])  # reached from the record


def test_site_columns_follow_the_registry():
    """Every column the stage makes is in screener.columns.CANDIDATES with its type;
    an empty table has the same columns and types."""
    kinds = {"int": "iu", "float": "f", "str": "OT", "bool": "b"}
    grid, clade, *_ = chain(3)
    _, maps, recs, th = scene(3)
    full = find_candidates(clade, th, {t: 0.9 * v for t, v in th.items()},
                           IsolationParameters(min_patch_km2=0.0, within_range_min_km=3.0))
    empty = find_candidates(clade, {t: 1.01 for t in th})  # no cell reaches it
    assert len(full.sites) > 3 and len(empty.sites) == 0
    for table in (full.sites, empty.sites):
        assert list(table.columns) == site_columns(["A", "B"])
        # site numbers until the plan names them (S01, ...: CandidateSet.with_site_ids)
        assert table["site_id"].dtype == np.int64
        for name in table.columns.drop("site_id"):
            col = find_column(CANDIDATES, name)
            assert col is not None, f"{name} is not registered"
            kind = table[name].dtype.kind
            if kind == "O" and len(table) and col.dtype != "str":
                pytest.fail(f"{name} holds objects, registered as {col.dtype}")
            assert kind in kinds[col.dtype], (name, table[name].dtype, col.dtype)
