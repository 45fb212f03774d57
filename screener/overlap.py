"""Niche overlap of two taxa in geographic and in environmental space, and its tests.

Geographic space compares two suitability maps cell by cell (Schoener's D and the
Hellinger-based I, cells weighted by their ground area).  Environmental space
compares where the two taxa's records sit in a two-axis summary of the environment,
corrected for how common each environment is in each taxon's accessible area.

The tests ask two questions about the pair:

* **equivalency** - are the two niches interchangeable?  The records of both taxa are
  pooled and split at random, keeping both sample sizes; a small p means the observed
  overlap is lower than random splits give (the niches are not equivalent).
* **similarity** - is the overlap higher (``alternative="greater"``: conservatism) or
  lower (``"lower"``: divergence) than expected from the environments each taxon had
  available?  One taxon is compared with random placements of the other within that
  other taxon's accessible area, in both directions.

Results are hypotheses to guide survey, not proof: a high overlap says a relative may
live where the other taxon's niche is suitable, not that it does.

Conventions
-----------
Environmental-space surfaces are ``(R, R)`` arrays whose rows follow the second
principal axis (PC2, increasing) and whose columns follow the first (PC1, increasing),
so ``imshow(z, origin="lower")`` draws PC1 across and PC2 up.

References
----------
.. [1] Schoener, T. W. (1968). The Anolis lizards of Bimini: resource partitioning in
   a complex fauna. Ecology 49, 704-726.
.. [2] Warren, D. L., Glor, R. E. & Turelli, M. (2008). Environmental niche
   equivalency versus conservatism: quantitative approaches to niche evolution.
   Evolution 62, 2868-2883.
.. [3] Broennimann, O. et al. (2012). Measuring ecological niche overlap from
   occurrence and spatial environmental data. Global Ecology and Biogeography 21,
   481-497.
.. [4] Guisan, A. et al. (2014). Unifying niche shift studies: insights from
   biological invasions. Trends in Ecology & Evolution 29, 260-269.
.. [5] Levins, R. (1968). Evolution in Changing Environments. Princeton University
   Press.
"""

from __future__ import annotations

import logging
import math
import time
import uuid
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from functools import partial

import numpy as np
from scipy import stats
from sklearn.decomposition import PCA
from sklearn.preprocessing import StandardScaler

from screener.errors import InputError
from screener.parallel import Executor, make_executor, spawn_seeds

__all__ = [
    "schoener_d",
    "hellinger_i",
    "geographic_overlap",
    "levins_breadth",
    "EnvironmentalSpace",
    "environmental_space",
    "environmental_overlap",
    "niche_breadth",
    "niche_dynamics",
    "OverlapTest",
    "equivalency_test",
    "similarity_test",
    "geographic_equivalency_test",
    "geographic_similarity_test",
    "estimate_seconds",
    "SpaceComparison",
    "PairComparison",
    "compare_pair",
    "pairwise_table",
    "OVERLAP_COLUMNS",
]

log = logging.getLogger(__name__)

#: Columns of ``overlap.csv``, in order.
OVERLAP_COLUMNS = (
    "taxon_a",
    "taxon_b",
    "space",
    "D",
    "I",
    "equivalency_p",
    "similarity_p_ab",
    "similarity_p_ba",
    "breadth_a",
    "breadth_b",
    "stability",
    "expansion",
    "unfilling",
    "n_replicates",
    "alternative",
)

_ALTERNATIVES = ("greater", "lower")
# Above this many kernel values (pool size x grid cells) the per-record kernels are not
# cached and each replicate evaluates its densities directly.
_MAX_CACHED_KERNELS = 4e7


# ======================================================================================
# Overlap of two distributions
# ======================================================================================
def _normalised_pair(p, q, weights=None):
    """Flatten, drop NaN cells, weight, and normalise ``p`` and ``q`` to sum 1."""
    p = np.asarray(p, dtype=float)
    q = np.asarray(q, dtype=float)
    if p.shape != q.shape:
        raise ValueError(
            f"p and q must have the same shape; got {p.shape} and {q.shape}."
        )
    valid = np.isfinite(p) & np.isfinite(q)
    if weights is not None:
        w = np.broadcast_to(np.asarray(weights, dtype=float), p.shape)
        valid &= np.isfinite(w)
        if np.any(w[valid] < 0):
            raise ValueError("weights (cell areas) must be non-negative.")
    pv = p[valid]
    qv = q[valid]
    for name, v in (("p", pv), ("q", qv)):
        if np.any(v < 0):
            raise ValueError(
                f"{name} has negative values (min {v.min():g}); overlap needs "
                "non-negative suitability or density."
            )
    if weights is not None:
        wv = w[valid]
        pv = pv * wv
        qv = qv * wv
    sp = pv.sum()
    sq = qv.sum()
    for name, s in (("p", sp), ("q", sq)):
        if not s > 0:
            raise ValueError(
                f"{name} is zero (or NaN) on every cell valid in both surfaces, so it "
                "has no distribution to compare; check the map or the mask."
            )
    return pv / sp, qv / sq


def _d_from_normalised(pn, qn) -> float:
    return float(min(1.0, max(0.0, 1.0 - 0.5 * np.abs(pn - qn).sum())))


def _i_from_normalised(pn, qn) -> float:
    # Hellinger form, I = 1 - H^2 / 2 (Warren et al. 2008, eq. 3).
    h2 = np.square(np.sqrt(pn) - np.sqrt(qn)).sum()
    return float(min(1.0, max(0.0, 1.0 - 0.5 * h2)))


def schoener_d(p, q, weights=None) -> float:
    """Schoener's D overlap of two non-negative surfaces.

    ``D = 1 - 0.5 * sum_i |p_i - q_i|`` after each surface is (weighted and)
    normalised to sum 1 over the cells valid in both.

    Parameters
    ----------
    p, q : array_like, same shape
        Non-negative values (suitability, density); NaN cells are ignored.
    weights : array_like, optional
        Cell weights broadcastable to ``p``, usually ground cell areas in km², applied
        before normalising (needed on longitude/latitude grids, where cells shrink
        towards the poles).

    Returns
    -------
    float
        D in [0, 1]: 1 for identical distributions, 0 for disjoint ones.

    Raises
    ------
    ValueError
        Different shapes, negative values, or a surface that is zero on every
        commonly valid cell.

    References
    ----------
    .. [1] Schoener, T. W. (1968). Ecology 49, 704-726.
    .. [2] Warren, D. L., Glor, R. E. & Turelli, M. (2008). Evolution 62, 2868-2883.

    Examples
    --------
    >>> schoener_d([1.0, 1.0], [1.0, 0.0])
    0.5
    """
    return _d_from_normalised(*_normalised_pair(p, q, weights))


def hellinger_i(p, q, weights=None) -> float:
    """Hellinger-based overlap I of two non-negative surfaces.

    ``I = 1 - H^2 / 2`` with ``H^2 = sum_i (sqrt(p_i) - sqrt(q_i))^2``, the surfaces
    normalised as in :func:`schoener_d`.

    Parameters
    ----------
    p, q : array_like, same shape
        Non-negative values; NaN cells are ignored.
    weights : array_like, optional
        Cell weights (ground cell areas in km²) applied before normalising.

    Returns
    -------
    float
        I in [0, 1].

    Raises
    ------
    ValueError
        As :func:`schoener_d`.

    References
    ----------
    .. [1] Warren, D. L., Glor, R. E. & Turelli, M. (2008). Evolution 62, 2868-2883.

    Examples
    --------
    >>> round(hellinger_i([1.0, 1.0], [1.0, 0.0]), 6)  # sqrt(0.5)
    0.707107
    """
    return _i_from_normalised(*_normalised_pair(p, q, weights))


def geographic_overlap(map_a, map_b, cell_area_km2) -> tuple[float, float]:
    """D and I between two suitability maps, each cell weighted by its area.

    Parameters
    ----------
    map_a, map_b : ndarray of shape (n_rows, n_cols)
        Suitability in [0, 1], NaN outside the grid mask.
    cell_area_km2 : ndarray of shape (n_rows, n_cols) or float
        Ground area of each cell in km² (``Grid.cell_area_km2``).

    Returns
    -------
    (float, float)
        Schoener's D and Hellinger-based I.
    """
    pn, qn = _normalised_pair(map_a, map_b, cell_area_km2)
    return _d_from_normalised(pn, qn), _i_from_normalised(pn, qn)


def levins_breadth(p, weights=None) -> float:
    """Standardised Levins niche breadth of a non-negative surface.

    ``B = 1 / sum_i p_i^2`` over the ``N`` valid (finite) cells, with ``p`` normalised
    to sum 1 (after weighting), reported as ``(B - 1) / (N - 1)`` in [0, 1]: 0 when all
    weight sits in one cell, 1 when it is spread evenly.

    Parameters
    ----------
    p : array_like
        Non-negative values; NaN cells are not counted.
    weights : array_like, optional
        Cell weights (km²) applied before normalising.

    Returns
    -------
    float
        Standardised breadth; NaN when there is a single valid cell.

    References
    ----------
    .. [1] Levins, R. (1968). Evolution in Changing Environments. Princeton UP.

    Examples
    --------
    >>> levins_breadth([1.0, 1.0, 1.0, 1.0])
    1.0
    >>> levins_breadth([1.0, 0.0, 0.0, 0.0])
    0.0
    """
    p = np.asarray(p, dtype=float)
    pn, _ = _normalised_pair(p, p, weights)
    n = pn.size
    if n < 2:
        return float("nan")
    b = 1.0 / np.square(pn).sum()
    return float(min(1.0, max(0.0, (b - 1.0) / (n - 1.0))))


# ======================================================================================
# Environmental space
# ======================================================================================
def _check_env(a, name: str, n_vars: int | None = None) -> np.ndarray:
    a = np.asarray(a, dtype=float)
    if a.ndim != 2:
        raise InputError(
            f"`{name}` must be a 2-D array (rows = records or cells, columns = "
            f"predictors); got shape {a.shape}."
        )
    if n_vars is not None and a.shape[1] != n_vars:
        raise InputError(
            f"`{name}` has {a.shape[1]} predictors but the others have {n_vars}; pass "
            "the same predictors, in the same order, for both taxa."
        )
    bad = ~np.all(np.isfinite(a), axis=1)
    if bad.any():
        raise InputError(
            f"`{name}` has {int(bad.sum())} row(s) with NaN or infinite predictor "
            "values "
            f"(first at row {int(np.flatnonzero(bad)[0])}); drop records or cells "
            "outside the layers' valid area first."
        )
    return a


def _kernel_rows(points, lattice, cov, block_cells: int = 2_000_000) -> np.ndarray:
    """Gaussian kernel of each point at each lattice node, shape (n_points, n_nodes).

    Each row is the bivariate normal density ``N(lattice; point, cov)``.
    """
    mvn = stats.multivariate_normal(mean=np.zeros(2), cov=cov)
    out = np.empty((len(points), len(lattice)))
    step = max(1, block_cells // max(1, len(lattice)))
    for s in range(0, len(points), step):
        diff = lattice[None, :, :] - points[s : s + step, None, :]
        out[s : s + step] = mvn.pdf(diff).reshape(-1, len(lattice))
    return out


def _kernel_sum(points, lattice, cov, block_cells: int = 2_000_000) -> np.ndarray:
    """Sum over points of their Gaussian kernels at each lattice node (n_nodes,)."""
    mvn = stats.multivariate_normal(mean=np.zeros(2), cov=cov)
    total = np.zeros(len(lattice))
    step = max(1, block_cells // max(1, len(lattice)))
    for s in range(0, len(points), step):
        diff = lattice[None, :, :] - points[s : s + step, None, :]
        total += mvn.pdf(diff).reshape(-1, len(lattice)).sum(axis=0)
    return total


def scott_bandwidth(points_pooled, n: int) -> np.ndarray:
    """Kernel covariance by Scott's rule: ``cov(points) * n ** (-2 / (d + 4))``, d = 2.

    The covariance is taken over the pooled records of the pair (so it does not depend
    on which records belong to which taxon), scaled for the taxon's own sample size.
    ``scipy.stats.gaussian_kde`` uses the same rule on its own sample.
    """
    c = np.cov(np.asarray(points_pooled, float).T, ddof=1)
    return c * float(n) ** (-1.0 / 3.0)


@dataclass(eq=False)
class EnvironmentalSpace:
    """Two taxa's records and accessible environments on a shared PCA grid.

    Build it with :func:`environmental_space`.  Surfaces are ``(R, R)``, rows along
    PC2 and columns along PC1 (see the module docstring).

    Attributes
    ----------
    scaler : sklearn.preprocessing.StandardScaler
    pca : sklearn.decomposition.PCA
        Both fitted on the pooled background of the two taxa.
    resolution : int
        ``R``.
    pc1_edges, pc2_edges : ndarray of shape (R + 1,)
        Cell edges along each axis, in PCA score units.
    scores_records_a, scores_records_b, scores_background_a, scores_background_b :
        ndarray of shape (n, 2)
    bandwidth_a, bandwidth_b : ndarray of shape (2, 2)
        Kernel covariance of each taxon's record density.
    z_env_a, z_env_b : ndarray (R, R)
        Density of each taxon's available environment, scaled to max 1.
    support_a, support_b : ndarray of bool (R, R)
        Cells where the occupancy is defined: the environment density is at least its
        value at the ``support_quantile`` of the taxon's own background points.
    available_a, available_b : ndarray of bool (R, R)
        Cells counted as available environment for niche dynamics (density at least its
        ``available_quantile`` over the background points).
    z_occ_a, z_occ_b : ndarray (R, R)
        Kernel density of the records (per unit score area).
    occupancy_a, occupancy_b : ndarray (R, R)
        ``z_occ / z_env`` on the support, 0 elsewhere, scaled to max 1.
    """

    scaler: StandardScaler
    pca: PCA
    resolution: int
    pc1_edges: np.ndarray
    pc2_edges: np.ndarray
    scores_records_a: np.ndarray
    scores_records_b: np.ndarray
    scores_background_a: np.ndarray
    scores_background_b: np.ndarray
    bandwidth_a: np.ndarray
    bandwidth_b: np.ndarray
    z_env_a: np.ndarray
    z_env_b: np.ndarray
    support_a: np.ndarray
    support_b: np.ndarray
    available_a: np.ndarray
    available_b: np.ndarray
    z_occ_a: np.ndarray
    z_occ_b: np.ndarray
    occupancy_a: np.ndarray
    occupancy_b: np.ndarray
    support_quantile: float = 0.0
    available_quantile: float = 0.05
    token: str = field(default_factory=lambda: uuid.uuid4().hex)

    @property
    def pc1_centres(self) -> np.ndarray:
        return 0.5 * (self.pc1_edges[:-1] + self.pc1_edges[1:])

    @property
    def pc2_centres(self) -> np.ndarray:
        return 0.5 * (self.pc2_edges[:-1] + self.pc2_edges[1:])

    @property
    def nodes(self) -> np.ndarray:
        """Cell centres as ``(R * R, 2)`` (PC1, PC2) scores, in row-major order."""
        c1, c2 = np.meshgrid(self.pc1_centres, self.pc2_centres, indexing="xy")
        return np.column_stack([c1.ravel(), c2.ravel()])

    @property
    def explained_variance_ratio(self) -> np.ndarray:
        """Share of the standardised background variance on PC1 and PC2."""
        return self.pca.explained_variance_ratio_[:2]

    def cell_of(self, scores) -> tuple[np.ndarray, np.ndarray]:
        """Grid ``(rows, cols)`` (PC2 bin, PC1 bin) of score points, clipped inside."""
        scores = np.asarray(scores, float)
        r = self.resolution
        col = np.clip(
            np.searchsorted(self.pc1_edges, scores[:, 0], "right") - 1, 0, r - 1
        )
        row = np.clip(
            np.searchsorted(self.pc2_edges, scores[:, 1], "right") - 1, 0, r - 1
        )
        return row, col

    def transform(self, env) -> np.ndarray:
        """PCA scores (n, 2) of predictor rows (n, n_vars)."""
        return self.pca.transform(self.scaler.transform(np.asarray(env, float)))[:, :2]

    def inverse_env(self, which: str) -> np.ndarray:
        """``1 / z_env`` on the support of taxon ``which`` ("a" or "b"), 0 elsewhere."""
        z = self.z_env_a if which == "a" else self.z_env_b
        s = self.support_a if which == "a" else self.support_b
        out = np.zeros_like(z)
        out[s] = 1.0 / z[s]
        return out


def _occupancy(z_occ, inv_env) -> np.ndarray:
    z = z_occ * inv_env
    m = z.max()
    return z / m if m > 0 else z


def environmental_space(
    env_records_a,
    env_records_b,
    env_background_a,
    env_background_b,
    *,
    resolution: int = 100,
    support_quantile: float = 0.0,
    available_quantile: float = 0.05,
) -> EnvironmentalSpace:
    """Project two taxa into a shared two-axis environmental space.

    Predictors are standardised and summarised by a PCA calibrated on the pooled
    accessible-area environments (background cells) of both taxa; the first two axes
    span an ``R x R`` grid over the range of all scores.  On that grid this computes,
    for each taxon, the Gaussian kernel density of its available environment
    (``scipy.stats.gaussian_kde`` of its background scores, Scott's bandwidth), the
    kernel density of its records, and the occupancy ``z_occ / z_env``.

    Parameters
    ----------
    env_records_a, env_records_b : array_like of shape (n_records, n_vars)
        Predictor values at each taxon's records (at least 2 per taxon).
    env_background_a, env_background_b : array_like of shape (n_cells, n_vars)
        Predictor values of background cells drawn from each taxon's accessible area.
    resolution : int, default 100
        ``R``, cells per axis.
    support_quantile : float, default 0.0
        Occupancy is defined where a taxon's environment density is at least this
        quantile of its density at its own background points; 0 = at least as dense as
        the sparsest background point, which keeps ``z_occ / z_env`` from exploding in
        the empty margins of the kernel.
    available_quantile : float, default 0.05
        Same rule for the "available environment" used in niche dynamics: cells where
        the density is at least its 5th percentile over the background points (the
        densest region holding about 95 % of the background), dropping marginal
        environments (common practice).

    Returns
    -------
    EnvironmentalSpace

    Raises
    ------
    screener.errors.InputError
        Fewer than 2 predictors or 2 records per taxon, NaN values, or records whose
        environments do not vary (no kernel bandwidth can be set).

    Notes
    -----
    The record kernels use one covariance for the pair, Scott's rule on the pooled
    records scaled to each taxon's sample size (:func:`scott_bandwidth`).  It stays
    fixed across test replicates, so the overlap statistic depends only on which
    records are given to which taxon, as a permutation test requires.

    References
    ----------
    .. [1] Broennimann, O. et al. (2012). Global Ecology and Biogeography 21, 481-497.
    """
    ra = _check_env(env_records_a, "env_records_a")
    n_vars = ra.shape[1]
    rb = _check_env(env_records_b, "env_records_b", n_vars)
    ba = _check_env(env_background_a, "env_background_a", n_vars)
    bb = _check_env(env_background_b, "env_background_b", n_vars)
    if n_vars < 2:
        raise InputError(
            "environmental overlap needs at least 2 predictors (it uses two principal "
            f"axes); got {n_vars}."
        )
    for name, arr, least in (
        ("env_records_a", ra, 2),
        ("env_records_b", rb, 2),
        ("env_background_a", ba, 5),
        ("env_background_b", bb, 5),
    ):
        if len(arr) < least:
            raise InputError(
                f"`{name}` has {len(arr)} rows; at least {least} are needed."
            )
    resolution = int(resolution)
    if resolution < 10:
        raise InputError(
            f"resolution must be at least 10 cells per axis; got {resolution}."
        )
    for qname, q in (
        ("support_quantile", support_quantile),
        ("available_quantile", available_quantile),
    ):
        if not 0.0 <= q < 1.0:
            raise InputError(f"{qname} must be in [0, 1); got {q}.")

    pooled_bg = np.vstack([ba, bb])
    scaler = StandardScaler().fit(pooled_bg)
    pca = PCA(n_components=2).fit(scaler.transform(pooled_bg))

    def scores(x):
        return pca.transform(scaler.transform(x))

    sra, srb, sba, sbb = scores(ra), scores(rb), scores(ba), scores(bb)
    everything = np.vstack([sra, srb, sba, sbb])
    lo = everything.min(axis=0)
    hi = everything.max(axis=0)
    span = np.where(hi > lo, hi - lo, 1.0)
    pad = 1e-9 * span
    e1 = np.linspace(lo[0] - pad[0], hi[0] + pad[0], resolution + 1)
    e2 = np.linspace(lo[1] - pad[1], hi[1] + pad[1], resolution + 1)

    pooled_rec = np.vstack([sra, srb])
    bw_a = scott_bandwidth(pooled_rec, len(sra))
    bw_b = scott_bandwidth(pooled_rec, len(srb))
    if not np.linalg.det(bw_a) > 1e-14 * max(1.0, float(np.trace(bw_a))) ** 2:
        raise InputError(
            "the records of the two taxa do not vary along both principal axes (all in "
            "the same place or on a line), so no kernel density can be set; more "
            "distinct records are needed for environmental overlap."
        )

    space = EnvironmentalSpace(
        scaler=scaler,
        pca=pca,
        resolution=resolution,
        pc1_edges=e1,
        pc2_edges=e2,
        scores_records_a=sra,
        scores_records_b=srb,
        scores_background_a=sba,
        scores_background_b=sbb,
        bandwidth_a=bw_a,
        bandwidth_b=bw_b,
        z_env_a=None,
        z_env_b=None,
        support_a=None,
        support_b=None,
        available_a=None,
        available_b=None,
        z_occ_a=None,
        z_occ_b=None,
        occupancy_a=None,
        occupancy_b=None,
        support_quantile=float(support_quantile),
        available_quantile=float(available_quantile),
    )
    nodes = space.nodes
    shape = (resolution, resolution)
    for which, sb, sr, bw in (("a", sba, sra, bw_a), ("b", sbb, srb, bw_b)):
        try:
            kde = stats.gaussian_kde(sb.T)
        except np.linalg.LinAlgError as err:
            raise InputError(
                f"the background of taxon {which.upper()} does not vary along both "
                "principal axes; draw background cells over a wider accessible area."
            ) from err
        z_env = kde(nodes.T).reshape(shape)
        z_env = z_env / z_env.max()
        rows, cols = space.cell_of(sb)
        at_bg = z_env[rows, cols]
        support = z_env >= max(np.quantile(at_bg, support_quantile), 1e-300)
        available = z_env >= max(np.quantile(at_bg, available_quantile), 1e-300)
        z_occ = (_kernel_sum(sr, nodes, bw) / len(sr)).reshape(shape)
        setattr(space, f"z_env_{which}", z_env)
        setattr(space, f"support_{which}", support)
        setattr(space, f"available_{which}", available)
        setattr(space, f"z_occ_{which}", z_occ)
    space.occupancy_a = _occupancy(space.z_occ_a, space.inverse_env("a"))
    space.occupancy_b = _occupancy(space.z_occ_b, space.inverse_env("b"))
    for which in ("a", "b"):
        if not getattr(space, f"occupancy_{which}").max() > 0:
            raise InputError(
                f"taxon {which.upper()}'s records lie outside the environments of its "
                "own background; draw the background over the area around its records."
            )
    log.debug(
        "environmental space: R=%d, PC1+PC2 explain %.0f%% of background variance",
        resolution,
        100 * float(space.explained_variance_ratio.sum()),
    )
    return space


def environmental_overlap(space: EnvironmentalSpace) -> tuple[float, float]:
    """D and I between the two occupancies of an :class:`EnvironmentalSpace`.

    References
    ----------
    .. [1] Broennimann, O. et al. (2012). Global Ecology and Biogeography 21, 481-497.
    """
    pn, qn = _normalised_pair(space.occupancy_a, space.occupancy_b)
    return _d_from_normalised(pn, qn), _i_from_normalised(pn, qn)


def niche_breadth(space: EnvironmentalSpace) -> tuple[float, float]:
    """Standardised Levins breadth of each taxon's occupancy over its support cells.

    Returns
    -------
    (float, float)
        Breadth of A and of B, each in [0, 1] with ``N`` = the taxon's support cells.
    """
    out = []
    for occ, sup in (
        (space.occupancy_a, space.support_a),
        (space.occupancy_b, space.support_b),
    ):
        out.append(levins_breadth(occ[sup]))
    return out[0], out[1]


def niche_dynamics(space: EnvironmentalSpace) -> dict[str, float]:
    """Stability, expansion and unfilling of B's niche relative to A's.

    Restricted to analogue environments (available to both taxa: ``available_a &
    available_b``).  A taxon "occupies" the cells where its record density is at least
    its lowest value at its own records (the smallest density contour holding all of
    them).  Shares are weighted by record density:

    * **stability** - share of B's occupied density that falls where A also occurs;
    * **expansion** - ``1 - stability``: share of B's niche outside A's;
    * **unfilling** - share of A's occupied density where B does not occur.

    A is the reference taxon and B the focal one; swap them for the other direction.

    Returns
    -------
    dict
        ``{"stability", "expansion", "unfilling"}``, NaN when a taxon has no density in
        analogue environments.

    References
    ----------
    .. [1] Guisan, A. et al. (2014). Trends in Ecology & Evolution 29, 260-269.
    """
    analog = space.available_a & space.available_b
    occupied = {}
    for which in ("a", "b"):
        z = getattr(space, f"z_occ_{which}")
        rows, cols = space.cell_of(getattr(space, f"scores_records_{which}"))
        occupied[which] = z >= z[rows, cols].min()
    za = np.where(analog & occupied["a"], space.z_occ_a, 0.0)
    zb = np.where(analog & occupied["b"], space.z_occ_b, 0.0)
    nan = float("nan")
    stability = float(zb[occupied["a"]].sum() / zb.sum()) if zb.sum() > 0 else nan
    unfilling = float(za[~occupied["b"]].sum() / za.sum()) if za.sum() > 0 else nan
    expansion = 1.0 - stability if math.isfinite(stability) else nan
    return {"stability": stability, "expansion": expansion, "unfilling": unfilling}


# ======================================================================================
# Tests
# ======================================================================================
@dataclass(frozen=True, eq=False)
class OverlapTest:
    """Outcome of one randomisation test of one overlap statistic.

    Attributes
    ----------
    statistic : str
        "D" or "I".
    test : str
        "equivalency" or "similarity".
    space : str
        "environmental" or "geographic".
    direction : str
        For similarity tests: "ab" = A against random placements of B within B's
        accessible area, "ba" = the reverse; "" for equivalency.
    observed : float
    null : ndarray of shape (n_replicates,)
        Overlap under the null, one per replicate (NaN where undefined).
    p_value : float
        ``(1 + #{null <= observed}) / (1 + R)`` for ``alternative="lower"``,
        ``(1 + #{null >= observed}) / (1 + R)`` for ``"greater"``; R counts the
        finite replicates.
    alternative : str
    n_replicates : int
    """

    statistic: str
    test: str
    space: str
    direction: str
    observed: float
    null: np.ndarray
    p_value: float
    alternative: str
    n_replicates: int


def _p_value(observed: float, null, alternative: str) -> float:
    null = np.asarray(null, float)
    null = null[np.isfinite(null)]
    if null.size == 0:
        return float("nan")
    if alternative == "greater":
        k = int(np.sum(null >= observed))
    else:
        k = int(np.sum(null <= observed))
    return (1.0 + k) / (1.0 + null.size)


def _check_alternative(alternative: str) -> str:
    if alternative not in _ALTERNATIVES:
        raise InputError(
            f"alternative must be 'greater' (conservatism) or 'lower' (divergence); "
            f"got {alternative!r}."
        )
    return alternative


def _check_replicates(n_replicates) -> int:
    n = int(n_replicates)
    if n < 1:
        raise InputError(f"n_replicates must be at least 1; got {n_replicates}.")
    return n


def _package(values, observed, *, test, space, direction, alternative):
    values = np.asarray(values, float).reshape(-1, 2)
    n_bad = int(np.sum(~np.all(np.isfinite(values), axis=1)))
    if n_bad:
        log.warning(
            "%d of %d %s replicates gave no overlap value (empty surface)",
            n_bad,
            len(values),
            test,
        )
    out = {}
    for k, stat in enumerate(("D", "I")):
        out[stat] = OverlapTest(
            statistic=stat,
            test=test,
            space=space,
            direction=direction,
            observed=float(observed[k]),
            null=values[:, k].copy(),
            p_value=_p_value(observed[k], values[:, k], alternative),
            alternative=alternative,
            n_replicates=len(values),
        )
    return out


def _d_i_or_nan(p, q) -> tuple[float, float]:
    sp = p.sum()
    sq = q.sum()
    if not (sp > 0 and sq > 0):
        return float("nan"), float("nan")
    pn = p / sp
    qn = q / sq
    return _d_from_normalised(pn, qn), _i_from_normalised(pn, qn)


# Per-process cache of per-record kernels, keyed by the space's token.
_KERNEL_CACHE: dict = {}


@dataclass(eq=False)
class _EquivalencyTask:
    """What each equivalency replicate needs; kernels are rebuilt once per process."""

    token: str
    pool: np.ndarray  # (n_a + n_b, 2) pooled record scores
    n_a: int
    nodes: np.ndarray
    bandwidth_a: np.ndarray
    bandwidth_b: np.ndarray
    inv_env_a: np.ndarray  # flat
    inv_env_b: np.ndarray
    cache_kernels: bool

    def kernels(self):
        hit = _KERNEL_CACHE.get(self.token)
        if hit is None:
            hit = (
                _kernel_rows(self.pool, self.nodes, self.bandwidth_a),
                _kernel_rows(self.pool, self.nodes, self.bandwidth_b),
            )
            while len(_KERNEL_CACHE) >= 2:
                _KERNEL_CACHE.pop(next(iter(_KERNEL_CACHE)))
            _KERNEL_CACHE[self.token] = hit
        return hit

    def densities(self, idx_a, idx_b):
        if self.cache_kernels:
            ka, kb = self.kernels()
            # indicator @ kernels: one matrix-vector product per taxon
            wa = np.zeros(len(self.pool))
            wa[idx_a] = 1.0
            wb = np.zeros(len(self.pool))
            wb[idx_b] = 1.0
            return wa @ ka, wb @ kb
        return (
            _kernel_sum(self.pool[idx_a], self.nodes, self.bandwidth_a),
            _kernel_sum(self.pool[idx_b], self.nodes, self.bandwidth_b),
        )


def _equivalency_replicate(task: _EquivalencyTask, seed: int) -> tuple[float, float]:
    perm = np.random.default_rng(seed).permutation(len(task.pool))
    za, zb = task.densities(perm[: task.n_a], perm[task.n_a :])
    return _d_i_or_nan(za * task.inv_env_a, zb * task.inv_env_b)


#: replicates per task of the equivalency test.  Fixed (not derived from the
#: executor), so every backend makes the same matrix products and the same numbers.
_EQUIVALENCY_BATCH = 64


def _equivalency_batch(task: _EquivalencyTask, seeds: list) -> list:
    """A batch of replicates: one matrix product per taxon for the whole batch.

    One replicate alone is a vector-matrix product that reads the whole kernel matrix
    (memory-bound); a batch reads it once for all its replicates.
    """
    if not task.cache_kernels:
        return [_equivalency_replicate(task, s) for s in seeds]
    ka, kb = task.kernels()
    n_pool = len(task.pool)
    wa = np.zeros((len(seeds), n_pool))
    for i, seed in enumerate(seeds):
        perm = np.random.default_rng(seed).permutation(n_pool)
        wa[i, perm[: task.n_a]] = 1.0
    wb = 1.0 - wa
    za = (wa @ ka) * task.inv_env_a
    zb = (wb @ kb) * task.inv_env_b
    return [_d_i_or_nan(za[i], zb[i]) for i in range(len(seeds))]


def _resolve_executor(executor):
    if executor is None:
        return make_executor("serial")
    if not isinstance(executor, Executor) and not hasattr(executor, "map"):
        raise InputError("executor must come from screener.parallel.make_executor().")
    return executor


def equivalency_test(
    space: EnvironmentalSpace,
    *,
    n_replicates: int = 100,
    random_state=0,
    executor: Executor | None = None,
) -> dict[str, OverlapTest]:
    """Niche equivalency test in environmental space.

    Pools both taxa's records, reassigns them at random keeping both sample sizes,
    and recomputes the occupancies (each taxon's own available environment held fixed)
    and their D and I, ``n_replicates`` times.

    Parameters
    ----------
    space : EnvironmentalSpace
    n_replicates : int, default 100
        Random splits ``R``.
    random_state : None, int or numpy.random.Generator, default 0
        Root of the replicate seeds, all drawn up front (:func:`spawn_seeds`).
    executor : Executor, optional
        Where the replicates run (serial when omitted); the result does not depend on
        it.

    Returns
    -------
    dict
        ``{"D": OverlapTest, "I": OverlapTest}``, one-sided
        ``p = (1 + #{null <= observed}) / (1 + R)``: a small p means the niches are
        less alike than random splits of the pooled records (not equivalent).

    References
    ----------
    .. [1] Warren, D. L., Glor, R. E. & Turelli, M. (2008). Evolution 62, 2868-2883.
    .. [2] Broennimann, O. et al. (2012). Global Ecology and Biogeography 21, 481-497.
    """
    n = _check_replicates(n_replicates)
    pool = np.vstack([space.scores_records_a, space.scores_records_b])
    nodes = space.nodes
    task = _EquivalencyTask(
        token=space.token,
        pool=pool,
        n_a=len(space.scores_records_a),
        nodes=nodes,
        bandwidth_a=space.bandwidth_a,
        bandwidth_b=space.bandwidth_b,
        inv_env_a=space.inverse_env("a").ravel(),
        inv_env_b=space.inverse_env("b").ravel(),
        cache_kernels=len(pool) * len(nodes) <= _MAX_CACHED_KERNELS,
    )
    seeds = spawn_seeds(random_state, n)
    ex = _resolve_executor(executor)
    batches = [
        seeds[i : i + _EQUIVALENCY_BATCH] for i in range(0, n, _EQUIVALENCY_BATCH)
    ]
    values = [v for part in ex.map(partial(_equivalency_batch, task), batches)
              for v in part]
    observed = environmental_overlap(space)
    return _package(
        values,
        observed,
        test="equivalency",
        space="environmental",
        direction="",
        alternative="lower",
    )


def _extended_density(space: EnvironmentalSpace, which: str) -> np.ndarray:
    """Record density of one taxon on a (3R-2)^2 lattice around the PCA grid.

    Lattice index ``k`` along an axis sits at the centre of grid cell ``k - (R - 1)``
    (continuing the grid's spacing outside it), so a shift by ``s`` whole cells is the
    window ``[R - 1 - s : 2R - 1 - s]``.  Kernels are translation invariant, so this
    window equals the density of the records moved by ``s`` cells.
    """
    r = space.resolution
    d1 = space.pc1_edges[1] - space.pc1_edges[0]
    d2 = space.pc2_edges[1] - space.pc2_edges[0]
    k = np.arange(-(r - 1), 2 * r - 1)
    c1 = space.pc1_centres[0] + k * d1
    c2 = space.pc2_centres[0] + k * d2
    g1, g2 = np.meshgrid(c1, c2, indexing="xy")
    lattice = np.column_stack([g1.ravel(), g2.ravel()])
    pts = getattr(space, f"scores_records_{which}")
    bw = getattr(space, f"bandwidth_{which}")
    return (_kernel_sum(pts, lattice, bw) / len(pts)).reshape(g1.shape)


@dataclass(eq=False)
class _SimilarityTask:
    resolution: int
    fixed_occupancy: np.ndarray  # (R, R) occupancy of the taxon kept in place
    moved_density: np.ndarray  # (3R-2, 3R-2) extended record density of the moved one
    moved_inv_env: np.ndarray  # (R, R)
    centroid_cell: tuple  # (row, col) of the moved taxon's record centroid
    target_rows: np.ndarray  # background cells of the moved taxon
    target_cols: np.ndarray


def _similarity_replicate(task: _SimilarityTask, seed: int) -> tuple[float, float]:
    rng = np.random.default_rng(seed)
    j = int(rng.integers(len(task.target_rows)))
    r = task.resolution
    s_row = int(task.target_rows[j]) - task.centroid_cell[0]
    s_col = int(task.target_cols[j]) - task.centroid_cell[1]
    window = task.moved_density[
        r - 1 - s_row : 2 * r - 1 - s_row, r - 1 - s_col : 2 * r - 1 - s_col
    ]
    return _d_i_or_nan(task.fixed_occupancy, window * task.moved_inv_env)


def similarity_test(
    space: EnvironmentalSpace,
    *,
    direction: str = "ab",
    alternative: str = "greater",
    n_replicates: int = 100,
    random_state=0,
    executor: Executor | None = None,
) -> dict[str, OverlapTest]:
    """Niche similarity (background) test in environmental space.

    ``direction="ab"`` keeps A's occupancy in place and moves B's record density at
    random within B's available environment: in each replicate the density is
    translated, by whole grid cells, so that the centroid of B's records lands on the
    cell of a background point of B drawn at random; the moved density is then divided
    by B's environment density on B's support.  ``"ba"`` does the reverse.

    Parameters
    ----------
    space : EnvironmentalSpace
    direction : {"ab", "ba"}, default "ab"
    alternative : {"greater", "lower"}, default "greater"
        "greater" tests conservatism, ``p = (1 + #{null >= observed}) / (1 + R)``;
        "lower" tests divergence, with ``<=``.
    n_replicates : int, default 100
    random_state : None, int or numpy.random.Generator, default 0
    executor : Executor, optional

    Returns
    -------
    dict
        ``{"D": OverlapTest, "I": OverlapTest}``.

    References
    ----------
    .. [1] Warren, D. L., Glor, R. E. & Turelli, M. (2008). Evolution 62, 2868-2883.
    .. [2] Broennimann, O. et al. (2012). Global Ecology and Biogeography 21, 481-497.
    """
    _check_alternative(alternative)
    n = _check_replicates(n_replicates)
    if direction not in ("ab", "ba"):
        raise InputError(f"direction must be 'ab' or 'ba'; got {direction!r}.")
    fixed, moved = ("a", "b") if direction == "ab" else ("b", "a")
    rec = getattr(space, f"scores_records_{moved}")
    crow, ccol = space.cell_of(rec.mean(axis=0, keepdims=True))
    trow, tcol = space.cell_of(getattr(space, f"scores_background_{moved}"))
    task = _SimilarityTask(
        resolution=space.resolution,
        fixed_occupancy=getattr(space, f"occupancy_{fixed}"),
        moved_density=_extended_density(space, moved),
        moved_inv_env=space.inverse_env(moved),
        centroid_cell=(int(crow[0]), int(ccol[0])),
        target_rows=trow.astype(np.int32),
        target_cols=tcol.astype(np.int32),
    )
    seeds = spawn_seeds(random_state, n)
    values = _resolve_executor(executor).map(
        partial(_similarity_replicate, task), seeds
    )
    return _package(
        values,
        environmental_overlap(space),
        test="similarity",
        space="environmental",
        direction=direction,
        alternative=alternative,
    )


# --- geographic space: tests by refitting a model per replicate -------------------
def _check_cells(cells, name: str) -> np.ndarray:
    c = np.asarray(cells)
    if c.ndim != 1 or not np.issubdtype(c.dtype, np.integer) or c.size == 0:
        raise InputError(
            f"`{name}` must be a non-empty 1-D array of flat cell indices "
            "(np.ravel_multi_index((rows, cols), grid.shape))."
        )
    return c.astype(np.intp)


def _geo_equivalency_replicate(fit_predict, pool, n_a, weights, seed):
    perm = np.random.default_rng(seed).permutation(len(pool))
    map_a = fit_predict(pool[perm[:n_a]])
    map_b = fit_predict(pool[perm[n_a:]])
    try:
        return geographic_overlap(map_a, map_b, weights)
    except ValueError:
        return float("nan"), float("nan")


def _geo_similarity_replicate(
    fit_predict, map_fixed, candidates, n_moved, weights, seed
):
    rng = np.random.default_rng(seed)
    cells = rng.choice(candidates, size=n_moved, replace=len(candidates) < n_moved)
    try:
        return geographic_overlap(map_fixed, fit_predict(cells), weights)
    except ValueError:
        return float("nan"), float("nan")


def geographic_equivalency_test(
    fit_predict: Callable[[np.ndarray], np.ndarray],
    cells_a,
    cells_b,
    cell_area_km2,
    *,
    n_replicates: int = 100,
    random_state=0,
    executor: Executor | None = None,
) -> dict[str, OverlapTest]:
    """Niche equivalency test in geographic space, refitting a model per replicate.

    Parameters
    ----------
    fit_predict : callable
        ``fit_predict(cells) -> map``: fits the niche model to presences at the given
        flat cell indices and returns a suitability map (n_rows, n_cols), NaN outside
        the mask.  Must be picklable to run on "processes" or "dask".
    cells_a, cells_b : array_like of int
        Flat cell indices of each taxon's records.
    cell_area_km2 : ndarray or float
        Cell areas in km² (weights for D and I).
    n_replicates, random_state, executor
        As :func:`equivalency_test`.

    Returns
    -------
    dict
        ``{"D": OverlapTest, "I": OverlapTest}``; the observed values are from
        ``fit_predict`` on the real records, so observed and null come from one model.
        Each replicate costs two fits: see :func:`estimate_seconds`.

    References
    ----------
    .. [1] Warren, D. L., Glor, R. E. & Turelli, M. (2008). Evolution 62, 2868-2883.
    """
    ca = _check_cells(cells_a, "cells_a")
    cb = _check_cells(cells_b, "cells_b")
    n = _check_replicates(n_replicates)
    pool = np.concatenate([ca, cb])
    observed = geographic_overlap(fit_predict(ca), fit_predict(cb), cell_area_km2)
    seeds = spawn_seeds(random_state, n)
    fn = partial(_geo_equivalency_replicate, fit_predict, pool, len(ca), cell_area_km2)
    values = _resolve_executor(executor).map(fn, seeds)
    return _package(
        values,
        observed,
        test="equivalency",
        space="geographic",
        direction="",
        alternative="lower",
    )


def geographic_similarity_test(
    fit_predict: Callable[[np.ndarray], np.ndarray],
    map_fixed,
    accessible_moved,
    n_moved: int,
    cell_area_km2,
    *,
    observed_map_moved=None,
    direction: str = "ab",
    alternative: str = "greater",
    n_replicates: int = 100,
    random_state=0,
    executor: Executor | None = None,
) -> dict[str, OverlapTest]:
    """Niche similarity (background) test in geographic space.

    The fixed taxon's map is compared with maps fitted to ``n_moved`` cells drawn at
    random (without replacement when possible) from the other taxon's accessible area.

    Parameters
    ----------
    fit_predict : callable
        As :func:`geographic_equivalency_test`.
    map_fixed : ndarray (n_rows, n_cols)
        Suitability map of the taxon kept in place.
    accessible_moved : ndarray of bool (n_rows, n_cols)
        Accessible area of the taxon whose records are moved.
    n_moved : int
        Its number of records.
    cell_area_km2 : ndarray or float
    observed_map_moved : ndarray, optional
        Its map fitted to the real records (the observed overlap); required.
    direction : {"ab", "ba"}
        Label stored on the result.
    alternative, n_replicates, random_state, executor
        As :func:`similarity_test`.

    Returns
    -------
    dict
        ``{"D": OverlapTest, "I": OverlapTest}``.

    References
    ----------
    .. [1] Warren, D. L., Glor, R. E. & Turelli, M. (2008). Evolution 62, 2868-2883.
    """
    _check_alternative(alternative)
    n = _check_replicates(n_replicates)
    if observed_map_moved is None:
        raise InputError(
            "observed_map_moved (the map fitted to the real records) is needed."
        )
    candidates = np.flatnonzero(np.asarray(accessible_moved, bool).ravel())
    if candidates.size == 0:
        raise InputError("the accessible area of the moved taxon has no cells.")
    observed = geographic_overlap(map_fixed, observed_map_moved, cell_area_km2)
    seeds = spawn_seeds(random_state, n)
    fn = partial(
        _geo_similarity_replicate,
        fit_predict,
        np.asarray(map_fixed, float),
        candidates,
        int(n_moved),
        cell_area_km2,
    )
    values = _resolve_executor(executor).map(fn, seeds)
    return _package(
        values,
        observed,
        test="similarity",
        space="geographic",
        direction=direction,
        alternative=alternative,
    )


def estimate_seconds(
    fit_predict: Callable[[np.ndarray], np.ndarray],
    cells,
    n_replicates: int,
    *,
    fits_per_replicate: int = 2,
    n_workers: int = 1,
) -> float:
    """Rough wall time (s) of a geographic test, from one timed call of ``fit_predict``.

    ``seconds(one fit) * fits_per_replicate * n_replicates / n_workers``; use it to
    switch the geographic tests off when they would be too slow.
    """
    cells = _check_cells(cells, "cells")
    t0 = time.perf_counter()
    fit_predict(cells)
    one = time.perf_counter() - t0
    return float(one * fits_per_replicate * int(n_replicates) / max(1, int(n_workers)))


# ======================================================================================
# One pair, end to end
# ======================================================================================
@dataclass(eq=False)
class SpaceComparison:
    """Overlap of a pair in one space, with the tests that were run (None if not)."""

    space: str
    D: float
    I: float  # noqa: E741 - the published name of the statistic
    breadth_a: float
    breadth_b: float
    equivalency: dict | None = None
    similarity_ab: dict | None = None
    similarity_ba: dict | None = None
    stability: float = float("nan")
    expansion: float = float("nan")
    unfilling: float = float("nan")

    def p(self, test: str, statistic: str = "D") -> float:
        """p-value of ``test`` ("equivalency", "similarity_ab", "similarity_ba")."""
        result = getattr(self, test)
        return float("nan") if result is None else float(result[statistic].p_value)


@dataclass(eq=False)
class PairComparison:
    """Everything measured for one pair of taxa.

    Attributes
    ----------
    taxon_a, taxon_b : str
    geographic : SpaceComparison
    environmental : SpaceComparison or None
        None when no environments were given.
    space : EnvironmentalSpace or None
        The shared PCA grid, occupancies and densities (for figures).
    n_replicates : int
    alternative : str
        Direction of the similarity tests.
    """

    taxon_a: str
    taxon_b: str
    geographic: SpaceComparison
    environmental: SpaceComparison | None
    space: EnvironmentalSpace | None
    n_replicates: int
    alternative: str

    def rows(self) -> list[dict]:
        """Rows of ``overlap.csv`` (:data:`OVERLAP_COLUMNS`), one per space.

        p-values are for D; NaN where a test was not run.
        """
        out = []
        for sc in (self.geographic, self.environmental):
            if sc is None:
                continue
            out.append(
                {
                    "taxon_a": self.taxon_a,
                    "taxon_b": self.taxon_b,
                    "space": sc.space,
                    "D": sc.D,
                    "I": sc.I,
                    "equivalency_p": sc.p("equivalency"),
                    "similarity_p_ab": sc.p("similarity_ab"),
                    "similarity_p_ba": sc.p("similarity_ba"),
                    "breadth_a": sc.breadth_a,
                    "breadth_b": sc.breadth_b,
                    "stability": sc.stability,
                    "expansion": sc.expansion,
                    "unfilling": sc.unfilling,
                    "n_replicates": self.n_replicates,
                    "alternative": self.alternative,
                }
            )
        return out

    def plain_reading(self, alpha: float = 0.05) -> str:
        """A short reading of the result in plain words, naming the test behind it."""
        a, b = self.taxon_a, self.taxon_b
        sc = self.environmental if self.environmental is not None else self.geographic
        where = "environmental space" if sc.space == "environmental" else "on the map"
        head = f"{a} and {b} ({where}): D = {sc.D:.2f}, I = {sc.I:.2f}."
        p_eq = sc.p("equivalency")
        p_ab, p_ba = sc.p("similarity_ab"), sc.p("similarity_ba")
        sim = [p for p in (p_ab, p_ba) if math.isfinite(p)]
        sim_txt = ", ".join(
            f"{lab} p = {p:.3f}"
            for lab, p in ((f"{a} vs random {b}", p_ab), (f"{b} vs random {a}", p_ba))
            if math.isfinite(p)
        )
        if not math.isfinite(p_eq) and not sim:
            verdict = "No test was run, so the overlap value stands alone."
        elif self.alternative == "greater" and sim and min(sim) < alpha:
            verdict = (
                "Their niches are more similar than their environments alone explain "
                f"(similarity test, {sim_txt})."
            )
            if math.isfinite(p_eq) and p_eq < alpha:
                verdict += (
                    f" They are still not identical (equivalency p = {p_eq:.3f})."
                )
        elif math.isfinite(p_eq) and p_eq < alpha:
            verdict = f"Their niches are different (equivalency test p = {p_eq:.3f})."
        elif self.alternative == "lower" and sim and min(sim) < alpha:
            verdict = (
                "Their niches are different: less similar than their environments "
                f"alone explain (similarity test, {sim_txt})."
            )
        else:
            tests = []
            if math.isfinite(p_eq):
                tests.append(f"equivalency p = {p_eq:.3f}")
            if sim_txt:
                tests.append(f"similarity {sim_txt}")
            verdict = (
                "Their niches are not distinguishable with these records ("
                + "; ".join(tests)
                + "); few records give tests little power."
            )
        use = (
            "Using one taxon's niche to look for relatives of the other is a "
            "hypothesis to check in the field, not proof that they occur there."
        )
        return f"{head} {verdict} {use}"


def _validate_map_pair(map_a, map_b, cell_area_km2):
    a = np.asarray(map_a, float)
    b = np.asarray(map_b, float)
    if a.ndim != 2 or a.shape != b.shape:
        raise InputError(
            f"map_a and map_b must be 2-D maps on the same grid; got {a.shape} and "
            f"{b.shape}."
        )
    w = np.broadcast_to(np.asarray(cell_area_km2, float), a.shape)
    return a, b, w


def compare_pair(
    name_a: str,
    name_b: str,
    *,
    map_a,
    map_b,
    cell_area_km2,
    env_records_a=None,
    env_records_b=None,
    env_background_a=None,
    env_background_b=None,
    n_replicates: int = 100,
    alternative: str = "greater",
    resolution: int = 100,
    random_state=0,
    executor: Executor | None = None,
    geographic_fit_predict: Callable[[np.ndarray], np.ndarray] | None = None,
    cells_a=None,
    cells_b=None,
    accessible_a=None,
    accessible_b=None,
    geographic_budget_s: float = 600.0,
) -> PairComparison:
    """Overlap, breadth, dynamics and tests for one pair of taxa.

    Parameters
    ----------
    name_a, name_b : str
        Taxon names.
    map_a, map_b : ndarray (n_rows, n_cols)
        Suitability maps in [0, 1], NaN outside the mask.
    cell_area_km2 : ndarray (n_rows, n_cols) or float
        Cell areas in km².
    env_records_a, env_records_b, env_background_a, env_background_b : array_like
        Predictor rows at records and background cells (see
        :func:`environmental_space`); the environmental row is skipped when any is None.
    n_replicates : int, default 100
    alternative : {"greater", "lower"}, default "greater"
        Direction of the similarity tests.
    resolution : int, default 100
        Environmental grid cells per axis.
    random_state : None, int or Generator, default 0
    executor : Executor, optional
    geographic_fit_predict : callable, optional
        ``fit_predict(cells) -> map`` for the geographic tests; they run only when it
        and ``cells_a``, ``cells_b`` are given (similarity also needs ``accessible_a``,
        ``accessible_b``) and :func:`estimate_seconds` stays within
        ``geographic_budget_s``.
    cells_a, cells_b : array_like of int, optional
        Flat cell indices of the records.
    accessible_a, accessible_b : ndarray of bool, optional
        Accessible areas on the grid.
    geographic_budget_s : float, default 600
        Skip the geographic tests (p = NaN, logged) when estimated slower than this.

    Returns
    -------
    PairComparison
    """
    _check_alternative(alternative)
    n = _check_replicates(n_replicates)
    ma, mb, w = _validate_map_pair(map_a, map_b, cell_area_km2)
    seeds = spawn_seeds(random_state, 6)
    d, i = geographic_overlap(ma, mb, w)
    geo = SpaceComparison(
        "geographic", d, i, levins_breadth(ma, w), levins_breadth(mb, w)
    )
    ex = _resolve_executor(executor)
    if (
        geographic_fit_predict is not None
        and cells_a is not None
        and cells_b is not None
    ):
        n_workers = getattr(ex, "n_workers", 1)
        n_fits = 2 * n
        if accessible_a is not None and accessible_b is not None:
            n_fits += 2 * n
        est = estimate_seconds(
            geographic_fit_predict,
            cells_a,
            n_fits,
            fits_per_replicate=1,
            n_workers=n_workers,
        )
        if est > geographic_budget_s:
            log.info(
                "geographic tests for %s / %s skipped: about %.0f s expected, budget "
                "%.0f s",
                name_a,
                name_b,
                est,
                geographic_budget_s,
            )
        else:
            geo.equivalency = geographic_equivalency_test(
                geographic_fit_predict,
                cells_a,
                cells_b,
                w,
                n_replicates=n,
                random_state=seeds[0],
                executor=ex,
            )
            if accessible_a is not None and accessible_b is not None:
                fit_a = geographic_fit_predict(_check_cells(cells_a, "cells_a"))
                fit_b = geographic_fit_predict(_check_cells(cells_b, "cells_b"))
                common = dict(alternative=alternative, n_replicates=n, executor=ex)
                geo.similarity_ab = geographic_similarity_test(
                    geographic_fit_predict,
                    fit_a,
                    accessible_b,
                    len(cells_b),
                    w,
                    observed_map_moved=fit_b,
                    direction="ab",
                    random_state=seeds[1],
                    **common,
                )
                geo.similarity_ba = geographic_similarity_test(
                    geographic_fit_predict,
                    fit_b,
                    accessible_a,
                    len(cells_a),
                    w,
                    observed_map_moved=fit_a,
                    direction="ba",
                    random_state=seeds[2],
                    **common,
                )
    env = None
    space = None
    envs = (env_records_a, env_records_b, env_background_a, env_background_b)
    if all(v is not None for v in envs):
        space = environmental_space(*envs, resolution=resolution)
        d, i = environmental_overlap(space)
        ba, bb = niche_breadth(space)
        env = SpaceComparison("environmental", d, i, ba, bb, **niche_dynamics(space))
        env.equivalency = equivalency_test(
            space, n_replicates=n, random_state=seeds[3], executor=ex
        )
        for direction, seed in (("ab", seeds[4]), ("ba", seeds[5])):
            setattr(
                env,
                f"similarity_{direction}",
                similarity_test(
                    space,
                    direction=direction,
                    alternative=alternative,
                    n_replicates=n,
                    random_state=seed,
                    executor=ex,
                ),
            )
    return PairComparison(name_a, name_b, geo, env, space, n, alternative)


def pairwise_table(
    results: Iterable[PairComparison],
    *,
    space: str = "environmental",
    statistic: str = "D",
):
    """Symmetric matrix of overlap for a clade of more than two taxa.

    Parameters
    ----------
    results : iterable of PairComparison
    space : {"environmental", "geographic"}, default "environmental"
    statistic : {"D", "I"}, default "D"

    Returns
    -------
    pandas.DataFrame
        Taxa as index and columns (sorted), 1.0 on the diagonal, NaN for pairs not
        compared.
    """
    import pandas as pd

    if space not in ("environmental", "geographic"):
        raise InputError(
            f"space must be 'environmental' or 'geographic'; got {space!r}."
        )
    if statistic not in ("D", "I"):
        raise InputError(f"statistic must be 'D' or 'I'; got {statistic!r}.")
    results = list(results)
    names = sorted({r.taxon_a for r in results} | {r.taxon_b for r in results})
    table = pd.DataFrame(np.nan, index=names, columns=names)
    for name in names:
        table.loc[name, name] = 1.0
    for r in results:
        sc = r.environmental if space == "environmental" else r.geographic
        if sc is None:
            continue
        value = getattr(sc, statistic)
        table.loc[r.taxon_a, r.taxon_b] = value
        table.loc[r.taxon_b, r.taxon_a] = value
    return table
