"""Site ranking, rank robustness and grouping."""

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose
from pyproj import Geod

from screener.errors import InputError
from screener.ranking import DEFAULT_WEIGHTS, group_sites, rank_sites


def table():
    return pd.DataFrame(
        {
            "site_id": [1, 2, 3, 4],
            "longitude": [10.0, 10.05, 11.0, 12.0],
            "latitude": [50.0, 50.0, 50.0, 50.0],
            "mean_suitability": [0.9, 0.5, 0.6, 0.55],
            "gap_km": [40.0, 1.0, 8.0, 6.0],
            "agreement": [1.0, 0.4, 0.6, 0.5],
            "area_km2": [50.0, 2.0, 10.0, 8.0],
            "novel_share": [0.0, 0.5, 0.2, 0.3],
            "nearest_record_km": [60.0, 2.0, 15.0, 12.0],
            "walk_hours": [3.0, 20.0, 5.0, np.inf],
            "relaxed_block": [1, 1, 2, 3],
        }
    )


def test_score_is_weighted_sum_and_order():
    r = rank_sites(table(), top_k=1, n_draws=100)
    parts = r[[c for c in r if c.startswith("score_")]].sum(axis=1)
    assert_allclose(parts, r["score"], rtol=1e-12)
    assert r["rank"].tolist() == [1, 2, 3, 4]
    assert r["site_id"].iloc[0] == 1
    # site 1 is best on every component: top 1 under any weights
    assert r["rank_robustness"].iloc[0] == 1.0
    # site 2 is worst on all but access: never in the top 1
    assert r.set_index("site_id").loc[2, "rank_robustness"] == 0.0
    # rank interval over the draws: the dominant site is first under every weighting
    one = r.set_index("site_id").loc[1]
    assert one["rank_low"] == one["rank_high"] == 1
    assert (r["rank_low"] <= r["rank_high"]).all() and r["rank_high"].max() <= 4
    # no more sites than top_k: the share in the top k is 1 for all and says nothing
    few = rank_sites(table(), top_k=4, n_draws=100)
    assert few["rank_robustness"].isna().all() and few["rank_low"].notna().all()
    # suitability component is the mean suitability itself, times its weight
    # (weights renormalised over the components with data: no time slices here)
    w = np.array([v for k, v in DEFAULT_WEIGHTS.items() if f"score_{k}" in r])
    assert "score_isolation_history" not in r
    assert_allclose(
        r["score_suitability"].iloc[0], 0.9 * DEFAULT_WEIGHTS["suitability"] / w.sum()
    )


def test_isolation_history_component_is_the_share_of_slices_isolated():
    t = table()
    t["n_slices"] = 3
    t["n_slices_isolated"] = [3, 0, 1, 2]
    r = rank_sites(t, {"isolation_history": 0.5}, top_k=1, n_draws=0).set_index("site_id")
    w = {k: v for k, v in DEFAULT_WEIGHTS.items()}
    w["isolation_history"] = 0.5
    total = sum(w.values())
    assert_allclose(r["score_isolation_history"].sort_index(),
                    np.array([3, 0, 1, 2]) / 3 * 0.5 / total, rtol=1e-12)
    off = rank_sites(t, {"isolation_history": 0}, top_k=1, n_draws=0)
    assert "score_isolation_history" not in off


def test_ties_and_reproducibility():
    t = table()
    t.loc[:, "mean_suitability"] = 0.5
    t2 = pd.concat([t.iloc[[2]].assign(site_id=9), t.iloc[[2]].assign(site_id=7)])
    r = rank_sites(t2, n_draws=50)
    assert r["site_id"].tolist() == [7, 9]  # equal scores: lower site_id first
    a = rank_sites(table(), top_k=2, n_draws=300, random_state=5)
    b = rank_sites(table(), top_k=2, n_draws=300, random_state=5)
    pd.testing.assert_frame_equal(a, b)


def test_filters_surveys_and_weights():
    r = rank_sites(table(), max_walk_hours=10.0, n_draws=0)
    assert sorted(r["site_id"]) == [1, 3]
    # a survey right at site 1 removes its survey-gap advantage
    base = rank_sites(table(), n_draws=0).set_index("site_id")
    surv = rank_sites(table(), n_draws=0, surveys=(np.array([10.0]), np.array([50.0])))
    surv = surv.set_index("site_id")
    assert surv.loc[1, "score_survey_gap"] < base.loc[1, "score_survey_gap"]
    only = rank_sites(
        table(), {k: 0 for k in DEFAULT_WEIGHTS} | {"area": 1.0}, n_draws=0
    )
    assert only["site_id"].tolist() == [1, 3, 4, 2]  # by area
    with pytest.raises(InputError, match="Unknown ranking components"):
        rank_sites(table(), {"beauty": 1.0})


def test_group_sites_by_block_and_distance():
    g = group_sites(table())
    assert g.loc[0, "group_id"] == g.loc[1, "group_id"] != g.loc[2, "group_id"]
    # 0.05 degree of longitude at 50 N is about 3.6 km (pyproj geodesic)
    km = Geod(ellps="WGS84").inv(10.0, 50.0, 10.05, 50.0)[2] / 1000.0
    t = table().assign(relaxed_block=[1, 2, 3, 4])
    g2 = group_sites(t, by=None, max_distance_km=km + 0.01)
    assert g2["group_id"].tolist()[:2] == [1, 1] and g2["group_id"].nunique() == 3
    g3 = group_sites(t, by=None, max_distance_km=km - 0.01)
    assert g3["group_id"].nunique() == 4


def test_no_sites_gives_an_empty_plan():
    empty = table().iloc[0:0]
    r = group_sites(rank_sites(empty, n_draws=100))
    assert len(r) == 0
    assert {"score", "rank", "rank_low", "rank_high", "rank_robustness", "group_id"} <= set(r)


def test_assign_site_ids_names_every_site_by_rank_everywhere():
    # a strip: known range | gap | patch | gap | patch (1 km cells, projected grid)
    from affine import Affine

    from screener.grid import Grid
    from screener.isolation import (
        Clade,
        IsolationParameters,
        find_candidates,
        paths_geodataframe,
        sites_geodataframe,
    )
    from screener.ranking import assign_site_ids, site_ids

    s = np.full((5, 14), 0.2)
    s[:, 0:3], s[:, 5:7], s[:, 11:14] = 0.9, 0.8, 0.9
    grid = Grid("EPSG:32633", Affine(1000.0, 0, 500000, 0, -1000.0, 5000000), s.shape)
    cand = find_candidates(
        Clade(grid, {"A": s}, {"A": ([2], [0])}), {"A": 0.5},
        parameters=IsolationParameters(min_gap_km=3.0, min_patch_km2=1.0,
                                       within_range_min_km=50.0),
    )
    ranked = rank_sites(cand.sites, n_draws=0)
    gdf = sites_geodataframe(grid, cand)[["site_id", "geometry"]].merge(
        ranked, on="site_id", how="right").sort_values("rank", kind="stable")
    found = gdf["site_id"].astype(int).tolist()
    out, paths, cand2, ids = assign_site_ids(gdf, paths_geodataframe(grid, cand), cand)
    assert len(found) == 2
    assert ids == dict(zip(found, site_ids(gdf["rank"]), strict=True))
    assert list(out["site_id"]) == ["S01", "S02"]
    assert list(out.columns[:2]) == ["site_id", "site_key"]
    assert gdf["site_id"].tolist() == found  # the input is left as it was
    assert set(paths["site_id"]) <= {"S01", "S02"} and len(paths) > 0
    # the labelled raster holds each site's rank on the cells of its patch
    for number, rank in zip(found, gdf["rank"], strict=True):
        assert np.array_equal(cand2.patch_labels == rank, cand.patch_labels == number)
