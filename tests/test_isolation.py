"""Candidate sites: hand-drawn grids with known answers, and a scenario on a real DEM."""

import numpy as np
import pytest
from affine import Affine
from matplotlib import cbook
from numpy.testing import assert_allclose
from pyproj import Geod
from rasterio.warp import Resampling, reproject, transform_bounds
from scipy import ndimage as ndi

from screener.errors import InputError, RecordsError
from screener.grid import Grid
from screener.isolation import (
    Clade,
    IsolationParameters,
    SiteLayers,
    find_candidates,
    path_profile,
    paths_geodataframe,
    sites_geodataframe,
)
from screener.ranking import rank_sites

WGS84 = Geod(ellps="WGS84")


def projected_grid(shape, res=1000.0):
    return Grid("EPSG:32633", Affine(res, 0, 500000, 0, -res, 5000000), shape)


def strip_scene():
    """5 x 14 strip of 1 km cells: range | 2-cell gap (s=0.2) | P1 | 4-cell gap (0.35) | P2."""
    s = np.full((5, 14), 0.2)
    s[:, 0:3] = 0.9  # known range, record at (2, 0)
    s[:, 3:5] = 0.2
    s[:, 5:7] = 0.8  # P1
    s[:, 7:11] = 0.35
    s[:, 11:14] = 0.9  # P2
    return projected_grid(s.shape), s


def test_gap_depth_and_cost_on_hand_drawn_strip():
    """Known answers: P1 gap 2 km, depth 0.8, cost 1.75; P2 longest gap 4 km.

    Cost to P1's first column (hand-worked, r = 1 - s, 1 km steps):
    (0.1 + 0.8)/2 + 0.8 + (0.8 + 0.2)/2 = 1.75.
    """
    grid, s = strip_scene()
    cs = find_candidates(
        Clade(grid, {"A": s}, {"A": ([2], [0])}),
        {"A": 0.5},
        parameters=IsolationParameters(min_gap_km=3.0, min_patch_km2=1.0,
                                       within_range_min_km=50.0),
    )
    sites = cs.sites
    p1 = sites[sites["col"].between(5, 6)].iloc[0]
    p2 = sites[sites["col"] >= 11].iloc[0]
    assert len(sites) == 2
    assert p1["kind"] == "near-range" and p2["kind"] == "isolated"
    assert_allclose(p1["cost_distance"], 1.75, rtol=1e-9)
    # ground lengths on UTM are grid lengths here (projected, constant steps)
    assert_allclose(p1["gap_km"], 2.0, rtol=1e-9)
    assert_allclose(p1["barrier_depth"], 0.8)  # 1 - s on the 0.2 cells
    assert_allclose(p2["gap_km"], 4.0, rtol=1e-9)
    assert_allclose(p2["barrier_depth"], 0.8)
    # the barrier raster holds the same quantity on the corridor's unsuitable cells
    # (every gap column is shaded on some row of a corridor)
    assert_allclose(cs.barrier[:, 3:5].max(axis=0), 0.8, rtol=1e-6)
    assert_allclose(cs.barrier[:, 7:11].max(axis=0), 0.65, rtol=1e-6)
    assert (cs.barrier[:, 0:3] == 0).all() and (cs.barrier[:, 5:7] == 0).all()
    assert p1["nearest_taxon"] == "A" and p1["n_cells"] == 10
    path = cs.paths[int(p2["site_id"])]
    assert (
        path[0, 1] == 11 and path[-1, 1] == 2
    )  # from the site's cheapest cell to the range
    assert cs.ranges["n_records"].tolist() == [1]
    assert (cs.patch_labels[:, 0:3] < 0).all()


def test_path_profile_half_step_convention():
    """One unsuitable cell between suitable ones measures one cell width."""
    grid = projected_grid((1, 5))
    s = np.array([[0.9, 0.9, 0.1, 0.9, 0.9]])
    prof = path_profile(
        grid, np.array([[0, 0], [0, 1], [0, 2], [0, 3], [0, 4]]), s >= 0.5, s
    )
    assert_allclose([prof.gap_km, prof.barrier_depth, prof.length_km], [1.0, 0.9, 4.0])


def test_within_range_and_relaxed_only_sites():
    """Cells > 1.5 km from the record form a within-range site; a 0.45 patch is relaxed-only."""
    grid, s = strip_scene()
    s[:, 11:14] = 0.45
    cs = find_candidates(
        Clade(grid, {"A": s}, {"A": ([2], [0])}),
        {"A": 0.5},
        relaxed_thresholds={"A": 0.4},
        parameters=IsolationParameters(min_patch_km2=1.0, within_range_min_km=1.5),
    )
    by_kind = cs.sites.set_index("kind")
    w = by_kind.loc["within-range"]
    # cells of the 5 x 3 range farther than 1.5 km from (2, 0): col 2 rows 0-4, and
    # rows 0 and 4 of cols 0-1 (distances >= 2 km) -> 9 cells
    assert w["n_cells"] == 9 and w["nearest_record_km"] > 1.5
    rel = cs.sites[cs.sites["stability"] == "relaxed-only"]
    assert len(rel) == 1 and rel["col"].iloc[0] >= 11
    p1 = cs.sites[(cs.sites["col"] >= 5) & (cs.sites["col"] <= 6)]
    assert p1["stability"].tolist() == ["both"]


def test_threshold_sets_named_whichever_is_primary():
    """Relaxed thresholds primary, MTP as the check: labels name the sets used."""
    grid, s = strip_scene()
    s[:, 11:14] = 0.45
    cs = find_candidates(
        Clade(grid, {"A": s}, {"A": ([2], [0])}), {"A": 0.4},
        relaxed_thresholds={"A": 0.5},
        parameters=IsolationParameters(threshold_names=("relaxed", "mtp"),
                                       min_patch_km2=1.0, within_range_min_km=50.0),
    )
    by_col = cs.sites.set_index("col")
    assert set(cs.sites["threshold_set"]) == {"relaxed"}
    assert by_col.loc[5, "stability"] == "both"  # P1 passes both sets
    assert by_col.loc[11, "stability"] == "relaxed-only"  # 0.45 < the MTP of 0.5
    # grouping blocks come from the broader (here the primary) set
    assert (cs.sites["relaxed_block"] > 0).all()


def test_whose_niche_a_site_fits():
    """A patch passes only through A's very low threshold: margins say so."""
    a = np.zeros((5, 20))
    b = np.zeros((5, 20))
    a[:, 0:3] = 0.9  # A's range
    b[:, 17:20] = 0.9  # B's range
    a[:, 9:12] = 0.10  # the patch: 0.10 for both taxa
    b[:, 9:12] = 0.10
    b[:, 5:7] = 0.5  # a patch only B's niche fits
    grid = projected_grid(a.shape)
    cs = find_candidates(
        Clade(grid, {"A": a, "B": b}, {"A": ([2], [0]), "B": ([2], [19])}),
        {"A": 0.06, "B": 0.30},
        parameters=IsolationParameters(min_patch_km2=1.0, within_range_min_km=50.0),
    )
    by_col = cs.sites.set_index("col")
    mid, west = by_col.loc[9], by_col.loc[5]
    assert mid["suitable_for"] == "A"
    assert_allclose([mid["margin_A"], mid["margin_B"]], [0.04, -0.20], atol=1e-12)
    assert west["suitable_for"] == "B"
    assert_allclose([west["margin_A"], west["margin_B"]], [-0.06, 0.20], atol=1e-12)
    # niche_fit: the way from the threshold to full suitability, best taxon
    assert_allclose([mid["niche_fit"], west["niche_fit"]], [0.04 / 0.94, 0.2 / 0.7],
                    rtol=1e-9)


def test_between_ranges_and_barrier():
    """A patch between two taxa's ranges is flagged; one far off the corridor is not."""
    s = np.full((9, 15), 0.2)
    s[0:3, 0:3] = 0.9  # taxon A
    s[0:3, 12:15] = 0.9  # taxon B
    s[0:3, 6:9] = 0.9  # between
    s[7:9, 6:9] = 0.9  # off the corridor
    grid = projected_grid(s.shape)
    cs = find_candidates(
        Clade(grid, {"A": s, "B": s}, {"A": ([1], [1]), "B": ([1], [13])}),
        {"A": 0.5, "B": 0.5},
        parameters=IsolationParameters(min_patch_km2=1.0),
    )
    sites = cs.sites.set_index("row")
    assert bool(sites.loc[0, "between_ranges"]) or bool(sites.loc[1, "between_ranges"])
    off = cs.sites[cs.sites["row"] >= 7]
    assert off["between_ranges"].tolist() == [False]
    assert (cs.barrier[0:3, 3:6] > 0).all() and (cs.barrier[0:3, 9:12] > 0).all()
    # barriers are shaded on corridors from the ranges to sites (also the one off the
    # range-to-range corridor), not on ground no corridor crosses
    assert (cs.barrier[6:9, 0:2] == 0).all() and (cs.barrier[6:9, 13:15] == 0).all()
    assert (cs.barrier[4:7, 3:12] > 0).any()
    assert_allclose(cs.barrier[1, 4], 0.8, rtol=1e-6)  # 1 - s on an unsuitable cell


def test_input_errors():
    grid, s = strip_scene()
    with pytest.raises(InputError, match="no threshold"):
        find_candidates(Clade(grid, {"A": s}, {"A": ([2], [0])}), {"B": 0.5})
    with pytest.raises(RecordsError, match="outside the grid"):
        Clade(grid, {"A": s}, {"A": ([9], [0])})
    with pytest.raises(InputError, match="shape"):
        Clade(grid, {"A": s[:, :5]}, {"A": ([2], [0])})


# --- a virtual scenario on real topography ----------------------------------------------
# matplotlib's sample topobathy.npz (Salish Sea region; latitude ascending, so flipped).
# Highland blocks >= 1000 m: the mainland Coast Mountains (two blocks) and Vancouver
# Island across the sea.  Taxa A and B are put on the two mainland blocks; the island
# block is unrecorded.  Sea (elevation <= 0) is nodata: the island is not reachable.

THR = (1000 - 200) / 1300  # suitability of 1000 m


@pytest.fixture(scope="module")
def salish():
    t = cbook.get_sample_data("topobathy.npz")
    z = t["topo"].astype(float)[::-1]
    lat = t["latitude"][::-1].astype(float)
    lon = t["longitude"].astype(float) - 360.0
    dy = float(np.mean(np.diff(t["latitude"])))
    dx = float(np.mean(np.diff(t["longitude"])))
    grid = Grid(
        "EPSG:4326",
        Affine(dx, 0, lon[0] - dx / 2, 0, -dy, lat[0] + dy / 2),
        z.shape,
        mask=z > 0,
    )
    lab, _ = ndi.label(z >= 1000, np.ones((3, 3)))
    sizes = np.bincount(lab.ravel())
    sizes[0] = 0
    big = np.argsort(sizes)[::-1][:3]
    cols = [ndi.center_of_mass(lab == k)[1] for k in big]
    island = big[int(np.argmin(cols))]  # westernmost block: Vancouver Island
    mainland = [k for k in big if k != island]

    def records(k):
        rr, cc = np.nonzero(lab == k)
        top = np.argsort(z[rr, cc])[::-1][:3]
        return rr[top], cc[top]

    recs = {"A": records(mainland[0]), "B": records(mainland[1])}
    return grid, z, lab, island, recs


def suit(z):
    return np.where(z > 0, np.clip((z - 200) / 1300, 0, 1), np.nan)


def test_salish_scenario_island_is_top_isolated(salish):
    grid, z, lab, island, recs = salish
    s = suit(z)
    cs = find_candidates(
        Clade(grid, {"A": s, "B": s}, recs, layers=SiteLayers(elevation=z)),
        {"A": THR, "B": THR},
        relaxed_thresholds={"A": 0.8 * THR, "B": 0.8 * THR},
        parameters=IsolationParameters(min_patch_km2=20.0),
    )
    ranked = rank_sites(cs.sites, top_k=3, n_draws=200)
    iso = ranked[ranked["kind"] == "isolated"]
    top = iso.iloc[0]
    assert lab[int(top["row"]), int(top["col"])] == island
    assert np.isinf(top["cost_distance"]) and top["gap_km"] > 20.0
    assert top["elevation_min"] >= 1000
    # no recorded block is reported as isolated
    rec_blocks = {int(lab[r, c]) for rr, cc in recs.values() for r, c in zip(rr, cc, strict=True)}
    assert not rec_blocks & {int(lab[r, c]) for r, c in zip(iso["row"], iso["col"], strict=True)}
    assert sorted(cs.ranges["taxa"]) == ["A", "B"]

    # area of the island site against pyproj's geodesic polygon area (WGS84)
    gdf = sites_geodataframe(grid, cs)
    geom = gdf.set_index("site_id").loc[int(top["site_id"]), "geometry"]
    dense = geom.segmentize(grid.res[0] / 8)  # follow parallels, not long geodesics
    area_geod = abs(WGS84.geometry_area_perimeter(dense)[0]) / 1e6
    assert_allclose(top["area_km2"], area_geod, rtol=1e-4)
    assert gdf.crs.is_geographic and len(gdf) == len(cs.sites)
    lines = paths_geodataframe(grid, cs)
    assert len(lines) == len(cs.paths)

    # reprojected to UTM 10N: same top isolated site, area within 10 % (nearest
    # resampling of 2.4 km cells changes the outline; tolerance is common practice)
    dst_crs = "EPSG:32610"
    left, bottom, right, top_ = grid.bounds
    # transform_bounds, then a 2.5 km grid (calculate_default_transform(resolution=)
    # triggers a PendingDeprecationWarning inside rasterio/affine)
    xl, yb, xr, yt = transform_bounds("EPSG:4326", dst_crs, left, bottom, right, top_)
    w, h = int(np.ceil((xr - xl) / 2500)), int(np.ceil((yt - yb) / 2500))
    tr = Affine(2500.0, 0, xl, 0, -2500.0, yt)
    zu = np.full((h, w), np.nan)
    reproject(
        np.where(grid.mask, z, np.nan),
        zu,
        src_transform=grid.transform,
        src_crs="EPSG:4326",
        dst_transform=tr,
        dst_crs=dst_crs,
        resampling=Resampling.nearest,
        src_nodata=np.nan,
        dst_nodata=np.nan,
    )
    ugrid = Grid(dst_crs, tr, zu.shape, mask=np.isfinite(zu) & (zu > 0))
    su = suit(np.where(ugrid.mask, zu, 0.0))
    urecs = {}
    for t, (rr, cc) in recs.items():
        x, y = ugrid.from_lonlat(*grid.lonlat(rr, cc))
        r2, c2, inside = ugrid.rowcol(x, y)
        assert inside.all()
        urecs[t] = (r2, c2)
    ucs = find_candidates(
        Clade(ugrid, {"A": su, "B": su}, urecs), {"A": THR, "B": THR},
        parameters=IsolationParameters(min_patch_km2=20.0),
    )
    uiso = rank_sites(ucs.sites, n_draws=0)
    utop = uiso[uiso["kind"] == "isolated"].iloc[0]
    x, y = grid.from_lonlat(utop["longitude"], utop["latitude"])
    r0, c0, inside = grid.rowcol(x, y)
    assert inside and lab[r0, c0] == island
    assert_allclose(utop["area_km2"], top["area_km2"], rtol=0.10)


def test_banded_site_reductions_change_nothing(salish, monkeypatch):
    # per-site reductions and nearest-record queries run a band of rows at a time;
    # one-row bands (many band boundaries inside sites and ranges) must give the same
    # sites: identical except for sums of cell areas, whose additions come in another
    # grouping (equal to rounding)
    import screener.isolation as iso

    grid, z, lab, island, recs = salish
    s = suit(z)
    args = (Clade(grid, {"A": s, "B": s}, recs), {"A": THR, "B": THR},
            {"A": 0.8 * THR, "B": 0.8 * THR},
            IsolationParameters(min_patch_km2=20.0, within_range_min_km=5.0))
    whole = find_candidates(*args).sites
    monkeypatch.setattr(iso, "_BAND_CELLS", 97)
    chunked = find_candidates(*args).sites
    assert len(whole) == len(chunked) > 0
    summed = ["area_km2", "mean_suitability", "margin_A", "margin_B", "niche_fit"]
    assert whole.drop(columns=summed).equals(chunked.drop(columns=summed))
    assert_allclose(whole[summed].to_numpy(float), chunked[summed].to_numpy(float), rtol=1e-12)


def test_tiled_cost_distance_gives_the_same_sites(salish, monkeypatch):
    # the same scene on matplotlib's Salish Sea grid with the cost-distance solver
    # held to a tiny memory budget (tiles of about 20 x 20 cells): identical sites,
    # costs and paths to the whole-grid solver
    import screener.costdistance as cd

    grid, z, lab, island, recs = salish
    s = suit(z)
    args = (Clade(grid, {"A": s, "B": s}, recs), {"A": THR, "B": THR},
            {"A": 0.8 * THR, "B": 0.8 * THR})
    whole = find_candidates(*args, IsolationParameters(min_patch_km2=20.0))
    monkeypatch.setattr(cd, "_MIN_TILE_CELLS", 400)
    monkeypatch.setattr(cd, "_TILE_MARGIN", 4)
    tiled = find_candidates(*args, IsolationParameters(min_patch_km2=20.0, memory_mb=1e-3))
    assert grid.n_cells > 20 * 400
    assert len(whole.sites) and whole.sites.equals(tiled.sites)
    assert whole.paths.keys() == tiled.paths.keys()
    for k in whole.paths:
        assert np.array_equal(whole.paths[k], tiled.paths[k])
