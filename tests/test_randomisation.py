"""Randomisations that keep the records' spatial structure (screener.randomisation)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.cluster.hierarchy import fcluster, linkage

from screener.errors import InputError
from screener.randomisation import (
    KM_PER_DEGREE,
    cluster_permutation,
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
