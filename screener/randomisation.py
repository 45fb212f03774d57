"""Randomisations that keep the spatial structure of a set of records.

Records collected in clusters (around a road, a field station, one trip) are not
independent draws: ten records in two clusters carry about two observations' worth of
environment.  A test that compares them with independently scattered random records,
or that reassigns them one by one, mistakes the clustering for signal.  The functions
here randomise the records while keeping their spatial structure:

* :func:`pattern_draws` moves the whole record pattern to random places of an area
  (the null model of the evaluation and the similarity tests);
* :func:`spatial_clusters` groups records that lie close together,
  :func:`permutation_units` turns two taxa's records into the units a permutation may
  exchange (each taxon's own collecting sites, and sites both taxa share), and
  :func:`cluster_permutation` reassigns taxon labels by those units (the
  equivalency test).

References
----------
.. [1] Fortin, M.-J. & Dale, M. R. T. (2005). Spatial Analysis: A Guide for
   Ecologists. Cambridge University Press (restricted randomisation that keeps a
   pattern's spatial structure; from memory).
.. [2] Manly, B. F. J. (2007). Randomization, Bootstrap and Monte Carlo Methods in
   Biology, 3rd ed. Chapman & Hall (permuting within and between blocks; from
   memory).
.. [3] Anderson, M. J. & ter Braak, C. J. F. (2003). Permutation tests for
   multi-factorial analysis of variance. Journal of Statistical Computation and
   Simulation 73, 85-113 (a factor is tested by permuting the units it varies among:
   whole units when they are nested in it, records within units when it is crossed
   with them; from memory).
"""

from __future__ import annotations

import logging
import math

import numpy as np
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components
from scipy.spatial import cKDTree

from screener.errors import InputError

__all__ = [
    "pattern_draws",
    "spatial_clusters",
    "cluster_link_km",
    "cluster_permutation",
    "permutation_units",
    "KM_PER_DEGREE",
]

log = logging.getLogger(__name__)

#: Kilometres per degree of latitude on a sphere of the mean Earth radius
#: (6371.0088 km, IUGG; 2 pi R / 360).
KM_PER_DEGREE = 2.0 * math.pi * 6371.0088 / 360.0


def _xy(values, name):
    arr = np.asarray(values, dtype=float)
    if arr.ndim != 2 or arr.shape[1] != 2 or not np.all(np.isfinite(arr)):
        raise InputError(
            f"`{name}` must be finite coordinates of shape (n, 2) as (x, y) or "
            f"(longitude, latitude); got shape {arr.shape}."
        )
    return arr


def _local_xy(xy, lat0_deg: float | None) -> np.ndarray:
    """Longitude/latitude to a local equirectangular plane (degrees of latitude)."""
    xy = np.asarray(xy, float)
    if lat0_deg is None:
        return xy
    return np.column_stack([xy[:, 0] * math.cos(math.radians(lat0_deg)), xy[:, 1]])


def _plane_km(xy, lonlat: bool) -> np.ndarray:
    """Positions in km: lon/lat on one local plane around their mean latitude, or x, y
    in km as given."""
    if not lonlat:
        return xy
    return _local_xy(xy, float(np.mean(xy[:, 1]))) * KM_PER_DEGREE


def pattern_draws(presence_xy, pool_xy, n_draws: int, random_state=0, *,
                  lonlat: bool = True, max_tries: int = 200,
                  clusters=None) -> list[np.ndarray]:
    """Rows of ``pool_xy`` that carry the records' spatial pattern to random places.

    Each draw rotates a group of records by a random angle about its centroid, moves
    the centroid onto a random pool point, and takes for every moved record the
    nearest pool point (cell).  Without ``clusters`` the group is the whole record
    pattern; with them every cluster moves on its own (so a dispersed sample, every
    record its own cluster, becomes independent random points, and two clusters
    become two random clusters of the same shapes).  Distances inside a group are
    kept; only where it lies changes.  A placement is accepted when every moved record
    lands within twice the pool's typical point spacing of a pool point (inside the
    study area); after ``max_tries`` failures the group's records are drawn at random
    (logged).

    Parameters
    ----------
    presence_xy : array_like of shape (n, 2)
        Record coordinates (longitude, latitude when ``lonlat``).
    pool_xy : array_like of shape (m, 2)
        Coordinates of the cells records may be moved to (the study area).
    n_draws : int
    random_state : int or Generator, default 0
    lonlat : bool, default True
        Coordinates are degrees; rotation is done on a local equirectangular plane
        (longitude scaled by the cosine of the mean latitude).
    max_tries : int, default 200
    clusters : array_like of int, shape (n,), optional
        Group of each record (:func:`spatial_clusters`); one group when omitted.

    Returns
    -------
    list of ndarray of int
        ``n_draws`` index arrays into ``pool_xy``, ``n`` each, in record order.

    References
    ----------
    .. [1] Fortin, M.-J. & Dale, M. R. T. (2005). Spatial Analysis: A Guide for
       Ecologists. Cambridge University Press (restricted randomisation that keeps a
       pattern's spatial structure; from memory).
    """
    pxy = _xy(presence_xy, "presence_xy")
    qxy = _xy(pool_xy, "pool_xy")
    lat0 = float(np.mean(qxy[:, 1])) if lonlat else None
    p = _local_xy(pxy, lat0)
    q = _local_xy(qxy, lat0)
    tree = cKDTree(q)
    spacing = np.median(tree.query(q[: min(len(q), 2000)], k=2)[0][:, 1])
    tol = 2.0 * max(float(spacing), 1e-12)
    if clusters is None:
        groups = [np.arange(len(p))]
    else:
        clusters = np.asarray(clusters)
        if clusters.shape != (len(p),):
            raise InputError(
                f"`clusters` must hold one label per record ({len(p)}); got shape "
                f"{clusters.shape}."
            )
        groups = [np.flatnonzero(clusters == k) for k in np.unique(clusters)]
    rels = [p[g] - p[g].mean(axis=0) for g in groups]
    rng = np.random.default_rng(random_state)
    out, fallbacks = [], 0
    for _ in range(int(n_draws)):
        idx = np.empty(len(p), dtype=np.intp)
        for g, rel in zip(groups, rels, strict=True):
            if len(g) == 1:  # a single record: a random cell
                idx[g] = rng.integers(len(q))
                continue
            for _try in range(max_tries):
                theta = rng.uniform(0.0, 2.0 * math.pi)
                c, s_ = math.cos(theta), math.sin(theta)
                moved = rel @ np.array([[c, s_], [-s_, c]]) + q[rng.integers(len(q))]
                dist, at = tree.query(moved)
                if np.all(dist <= tol):
                    idx[g] = at
                    break
            else:
                fallbacks += 1
                idx[g] = rng.choice(len(q), size=len(g), replace=len(q) < len(g))
        out.append(idx)
    if fallbacks:
        log.warning(
            "%d of %d null draws could not place a record group inside the study "
            "area and used random records for it instead", fallbacks,
            int(n_draws) * len(groups))
    return out


def cluster_link_km(grid, cluster_cells: float) -> float:
    """``cluster_cells`` typical cell widths of ``grid`` in km (the square root of the
    median ground area of its valid cells): the link of :func:`spatial_clusters` in a
    run (``[occurrences] cluster_cells``)."""
    areas = np.asarray(grid.cell_area_km2, float)[np.asarray(grid.mask, bool)]
    return float(cluster_cells) * float(np.sqrt(np.median(areas)))


def spatial_clusters(xy, link_km: float, *, lonlat: bool = True) -> np.ndarray:
    """Groups of records chained together by gaps no longer than ``link_km``.

    Single linkage: two records closer than ``link_km`` are in one group, and so are
    records joined by a chain of such steps.

    Parameters
    ----------
    xy : array_like of shape (n, 2)
        Record coordinates: longitude, latitude (degrees) when ``lonlat``, else x, y
        in km.
    link_km : float
        Longest gap (km) inside a group; 0 puts every record in its own group.
    lonlat : bool, default True
        Distances on a local equirectangular plane around the mean latitude (good to
        well under 1 % over a few hundred km).

    Returns
    -------
    ndarray of int, shape (n,)
        Group label of each record, ``0 .. k - 1``.
    """
    xy = _xy(xy, "xy")
    if not link_km > 0:
        return np.arange(len(xy))
    plane = _plane_km(xy, lonlat)
    pairs = cKDTree(plane).query_pairs(float(link_km), output_type="ndarray")
    n = len(xy)
    graph = coo_matrix(
        (np.ones(len(pairs)), (pairs[:, 0], pairs[:, 1])), shape=(n, n)
    )
    return connected_components(graph, directed=False)[1]


def permutation_units(xy_a, xy_b, link_km: float, *, lonlat: bool = True) -> np.ndarray:
    """Units of the equivalency permutation: each taxon's sites, and shared sites.

    Each taxon's records are grouped on their own (:func:`spatial_clusters` with
    ``link_km``): these groups are the taxon's collecting sites.  A site of A and a
    site of B whose centres (mean positions) lie within ``link_km`` of each other are
    one site where both taxa were collected (joined transitively); every other site
    is a unit of one taxon.  This follows the design of the sample (Anderson & ter
    Braak 2003): at a shared site taxon is crossed with site, so the labels are
    exchangeable among the site's records; a site of one taxon is nested in that
    taxon, so only whole sites are exchangeable.  Grouping the pooled records instead
    would join two neighbouring sites of different taxa into one "shared" site whose
    records are not exchangeable (they sample two places); that made the test reject
    too often when each taxon had its own sites (docs/calibration.md).

    Parameters
    ----------
    xy_a, xy_b : array_like of shape (n_a, 2) and (n_b, 2)
        Record coordinates of the two taxa: longitude, latitude (degrees) when
        ``lonlat``, else x, y in km.
    link_km : float
        Longest gap (km) inside a site, and the largest distance between the centres
        of a shared site's two parts; 0 makes every record its own unit.
    lonlat : bool, default True
        Distances on one local equirectangular plane around the mean latitude of all
        records.

    Returns
    -------
    ndarray of int, shape (n_a + n_b,)
        Unit of each record (A's records first), ``0 .. k - 1``; pass it to
        :func:`cluster_permutation` as ``clusters``.  A unit holds records of both
        taxa only when it is a shared site.

    References
    ----------
    .. [1] Anderson, M. J. & ter Braak, C. J. F. (2003). Journal of Statistical
       Computation and Simulation 73, 85-113 (from memory).
    .. [2] Manly, B. F. J. (2007). Randomization, Bootstrap and Monte Carlo Methods in
       Biology, 3rd ed. Chapman & Hall (restricted permutations; from memory).
    """
    xa = _xy(xy_a, "xy_a")
    xb = _xy(xy_b, "xy_b")
    xy = np.vstack([xa, xb])
    if not link_km > 0:
        return np.arange(len(xy))
    plane = _plane_km(xy, lonlat)
    n_a = len(xa)
    site_a = spatial_clusters(plane[:n_a], link_km, lonlat=False)
    site_b = spatial_clusters(plane[n_a:], link_km, lonlat=False)
    k_a = int(site_a.max()) + 1 if n_a else 0
    site = np.concatenate([site_a, site_b + k_a])
    n_sites = k_a + (int(site_b.max()) + 1 if len(xb) else 0)
    centres = np.vstack([plane[site == k].mean(axis=0) for k in range(n_sites)])
    pairs = cKDTree(centres).query_pairs(float(link_km), output_type="ndarray")
    pairs = pairs[(pairs[:, 0] < k_a) != (pairs[:, 1] < k_a)]  # across taxa only
    graph = coo_matrix(
        (np.ones(len(pairs)), (pairs[:, 0], pairs[:, 1])), shape=(n_sites, n_sites)
    )
    return connected_components(graph, directed=False)[1][site]


def cluster_permutation(is_a, clusters, rng) -> np.ndarray:
    """One random reassignment of taxon labels that keeps the records' clusters.

    Inside a cluster holding records of both taxa, the labels are shuffled among its
    records (they were sampled at the same places).  Clusters holding one taxon only
    are whole units: their labels are shuffled among those clusters, so a taxon's
    cluster moves to the other taxon as a whole.  With every record in its own
    cluster this is the ordinary permutation of single records.  Every allowed
    reassignment is equally likely.  Build ``clusters`` with
    :func:`permutation_units`, so that a cluster holds both taxa only where both
    were collected at one site.

    Parameters
    ----------
    is_a : array_like of bool, shape (n,)
        True for taxon A's records.
    clusters : array_like of int, shape (n,)
        Cluster label of each record (:func:`spatial_clusters`).
    rng : numpy.random.Generator

    Returns
    -------
    ndarray of bool, shape (n,)
        The permuted labels; the number of records of A changes only when pure
        clusters of different sizes change hands.
    """
    is_a = np.asarray(is_a, bool)
    clusters = np.asarray(clusters)
    out = is_a.copy()
    labels, inverse = np.unique(clusters, return_inverse=True)
    n_a = np.bincount(inverse, weights=is_a, minlength=len(labels))
    size = np.bincount(inverse, minlength=len(labels))
    mixed = (n_a > 0) & (n_a < size)
    for k in np.flatnonzero(mixed):
        members = np.flatnonzero(inverse == k)
        out[members] = rng.permutation(is_a[members])
    pure = np.flatnonzero(~mixed)
    if pure.size > 1:
        new_label = rng.permutation(n_a[pure] > 0)
        for k, lab in zip(pure, new_label, strict=True):
            out[inverse == k] = lab
    return out
