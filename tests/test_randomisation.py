"""Randomisations that keep the records' spatial structure (screener.randomisation)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.cluster.hierarchy import fcluster, linkage

from screener.errors import InputError
from screener.randomisation import (
    KM_PER_DEGREE,
    cluster_permutation,
    permutation_units,
    spatial_clusters,
)


def _same_partition(a, b) -> bool:
    # two labelings describe the same groups when the pairs (a, b) are one-to-one
    pairs = set(zip(a.tolist(), b.tolist(), strict=True))
    return len(pairs) == len(set(a.tolist())) == len(set(b.tolist()))


def test_spatial_clusters_match_single_linkage_of_scipy():
    # Reference: scipy.cluster.hierarchy single linkage cut at the link distance
    # (fcluster, criterion "distance") gives the same groups.
    rng = np.random.default_rng(4)
    xy = np.vstack([rng.normal(c, 1.0, (8, 2)) for c in ((0, 0), (20, 5), (9, 30))])
    for link in (0.5, 1.5, 3.0, 12.0):
        ours = spatial_clusters(xy, link, lonlat=False)
        ref = fcluster(linkage(xy, "single"), t=link, criterion="distance")
        assert _same_partition(ours, ref), link


def test_spatial_clusters_measure_kilometres_on_longitude_latitude():
    # At 60 degrees latitude a degree of longitude is half a degree of latitude
    # (cos 60 = 0.5; spherical Earth): 0.01 degrees of longitude ~ 0.556 km.
    step = 0.556 / (0.5 * KM_PER_DEGREE)
    xy = np.array([[10.0, 60.0], [10.0 + step, 60.0], [10.0, 60.0 + step]])
    labels = spatial_clusters(xy, 0.6, lonlat=True)
    assert labels[0] == labels[1] != labels[2]
    assert np.unique(spatial_clusters(xy, 0.0)).size == 3
    with pytest.raises(InputError):
        spatial_clusters(np.array([[0.0, np.nan]]), 1.0)


def test_cluster_permutation_of_single_records_is_a_plain_permutation():
    rng = np.random.default_rng(0)
    is_a = np.arange(10) < 4
    seen = set()
    for _ in range(200):
        out = cluster_permutation(is_a, np.arange(10), rng)
        assert out.sum() == 4
        seen.add(tuple(out))
    assert len(seen) > 100  # C(10, 4) = 210 splits, most of them reached


def test_cluster_permutation_keeps_clusters():
    # clusters 0 and 1 hold A only, 2 holds B only, 3 holds both taxa
    clusters = np.array([0, 0, 0, 1, 1, 2, 2, 2, 2, 3, 3, 3, 3])
    is_a = np.array([1, 1, 1, 1, 1, 0, 0, 0, 0, 1, 0, 1, 0], bool)
    rng = np.random.default_rng(1)
    stays_b = 0
    for _ in range(100):
        out = cluster_permutation(is_a, clusters, rng)
        for k in (0, 1, 2):  # pure clusters change hands whole
            assert np.unique(out[clusters == k]).size == 1
        # two of the three pure clusters stay A
        assert sum(out[clusters == k][0] for k in (0, 1, 2)) == 2
        # the mixed cluster keeps its composition
        assert out[clusters == 3].sum() == 2
        stays_b += not out[clusters == 2][0]
    assert 0 < stays_b < 100  # cluster 2 sometimes stays B, sometimes moves to A


# --- exact enumeration of the allowed reassignments ---------------------------------
def _allowed_reassignments(is_a, clusters) -> set:
    """Every labelling cluster_permutation may return, enumerated with itertools.

    Mixed clusters: any arrangement of the cluster's own labels among its records.
    Pure clusters: any choice of which pure clusters are A, as many as now.
    """
    from itertools import combinations, product

    is_a = np.asarray(is_a, bool)
    labels = sorted(set(clusters.tolist()))
    members = {k: np.flatnonzero(clusters == k) for k in labels}
    mixed = [k for k in labels if 0 < is_a[members[k]].sum() < len(members[k])]
    pure = [k for k in labels if k not in mixed]
    n_pure_a = sum(bool(is_a[members[k]][0]) for k in pure)
    per_mixed = []
    for k in mixed:
        m, n_a = len(members[k]), int(is_a[members[k]].sum())
        per_mixed.append([(k, set(c)) for c in combinations(range(m), n_a)])
    out = set()
    for a_pure in combinations(pure, n_pure_a):
        for choice in product(*per_mixed):
            lab = np.zeros(len(is_a), bool)
            for k in a_pure:
                lab[members[k]] = True
            for k, pos in choice:
                lab[members[k][sorted(pos)]] = True
            out.add(tuple(lab.tolist()))
    return out


@pytest.mark.parametrize("is_a, clusters", [
    # two sites per taxon, nested (every unit pure): C(4, 2) = 6 reassignments
    ([1, 1, 1, 1, 1, 0, 0, 0, 0, 0], [0, 0, 1, 1, 1, 2, 2, 3, 3, 3]),
    # one shared site (3 A + 2 B records) beside one site of each taxon
    ([1, 1, 1, 0, 0, 1, 1, 0, 0, 0], [0, 0, 0, 0, 0, 1, 1, 2, 2, 2]),
    # single records: the plain permutation, C(6, 2) = 15
    ([1, 1, 0, 0, 0, 0], [0, 1, 2, 3, 4, 5]),
])
def test_cluster_permutation_draws_every_allowed_reassignment_equally_often(
        is_a, clusters):
    # Reference: the allowed reassignments enumerated exactly (itertools); a
    # restricted permutation test draws uniformly among them (Manly 2007, from
    # memory).  Uniformity checked with scipy.stats.chisquare.
    from scipy.stats import chisquare

    is_a = np.array(is_a, bool)
    clusters = np.array(clusters)
    allowed = sorted(_allowed_reassignments(is_a, clusters))
    rng = np.random.default_rng(7)
    n_draws = 300 * len(allowed)
    counts = dict.fromkeys(allowed, 0)
    for _ in range(n_draws):
        out = tuple(cluster_permutation(is_a, clusters, rng).tolist())
        assert out in counts, out  # never a reassignment outside the allowed set
        counts[out] += 1
    assert min(counts.values()) > 0  # every allowed one is reached
    assert chisquare(list(counts.values())).pvalue > 1e-3


def test_permutation_units_split_neighbouring_sites_of_two_taxa():
    # A's site and B's site 3 km apart (centres 6 km apart), link 4 km: pooled
    # single linkage (scipy's, as spatial_clusters) joins them into one group;
    # as permutation units they stay one site per taxon.
    a = np.array([[0.0, 0.0], [1.0, 0.0], [2.0, 0.0], [3.0, 0.0]])
    b = a + [6.0, 0.0]
    pooled = spatial_clusters(np.vstack([a, b]), 4.0, lonlat=False)
    assert np.unique(pooled).size == 1
    units = permutation_units(a, b, 4.0, lonlat=False)
    assert np.unique(units[:4]).size == 1 and np.unique(units[4:]).size == 1
    assert units[0] != units[4]


def test_permutation_units_join_a_site_both_taxa_share():
    # both taxa collected at one place (records interleaved, centres 0.5 km apart)
    # and B alone at a second place far away
    a = np.array([[0.0, 0.0], [2.0, 0.0], [0.0, 2.0], [2.0, 2.0]])
    b = np.array([[1.0, 1.0], [1.0, 3.0], [50.0, 50.0], [51.0, 50.0]])
    units = permutation_units(a, b, 2.5, lonlat=False)
    assert np.unique(units[[0, 1, 2, 3, 4, 5]]).size == 1  # the shared site
    assert units[6] == units[7] != units[0]
    # no link: every record is its own unit (the published permutation)
    assert np.unique(permutation_units(a, b, 0.0, lonlat=False)).size == 8


def test_permutation_units_on_longitude_latitude_match_the_plane():
    # the same layout in degrees at 60 N: 1 km steps of longitude are
    # 1 / (0.5 * KM_PER_DEGREE) degrees (spherical Earth, cos 60 = 0.5)
    a = np.array([[0.0, 0.0], [1.0, 0.0], [2.0, 0.0], [3.0, 0.0]])
    b = a + [6.0, 0.0]
    deg = lambda xy: np.column_stack([10 + xy[:, 0] / (0.5 * KM_PER_DEGREE),  # noqa: E731
                                      60 + xy[:, 1] / KM_PER_DEGREE])
    on_plane = permutation_units(a, b, 4.0, lonlat=False)
    on_sphere = permutation_units(deg(a), deg(b), 4.0, lonlat=True)
    assert _same_partition(on_plane, on_sphere)
