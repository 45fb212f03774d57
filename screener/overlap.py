"""Niche overlap of two taxa in geographic and in environmental space, and its tests.

Geographic space compares two suitability maps cell by cell (Schoener's D and the
Hellinger-based I, cells weighted by their ground area).  Environmental space
compares where the two taxa's records sit in a two-axis summary of the environment,
corrected for how common each environment is in each taxon's accessible area.

The tests ask two questions about the pair:

* **equivalency** - are the two niches interchangeable?  The records of both taxa are
  pooled and split at random, keeping both sample sizes; a small p means the observed
  overlap is lower than random splits give (the niches are not equivalent).
* **similarity** - is the overlap higher (``hypothesis="conserved"``) or lower
  (``"diverged"``) than expected from the environments each taxon had available?  One
  taxon's niche is compared with niches built from random records of the other drawn
  from that other taxon's accessible area, in both directions.

Both taxa of a pair share one environmental space and one density of available
environment, so identical records give D = 1; each taxon's record density has its own
kernel bandwidth, re-estimated on every replicate.  The p-values of a run are
Holm-corrected together before the plain-language reading claims anything.

Results are hypotheses to guide survey, not proof: a high overlap says a relative may
live where the other taxon's niche is suitable, not that it does.

Conventions
-----------
Environmental-space surfaces are ``(G, G)`` arrays whose rows follow the second
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
.. [6] Holm, S. (1979). A simple sequentially rejective multiple test procedure.
   Scandinavian Journal of Statistics 6, 65-70.
"""

from __future__ import annotations

import logging
import math
import time
import warnings
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from functools import partial, wraps

import numpy as np
from sklearn.decomposition import PCA
from sklearn.preprocessing import StandardScaler

from screener.background import draw_background
from screener.errors import InputError, ScreenerDeprecationWarning, accepts_old_form
from screener.parallel import Executor, make_executor, spawn_seeds
from screener.project import default

__all__ = [
    "schoener_d",
    "hellinger_i",
    "geographic_overlap",
    "levins_breadth",
    "EnvironmentalSpace",
    "TaxonOccupancy",
    "environmental_space",
    "shared_available_cells",
    "record_bandwidth",
    "environmental_overlap",
    "niche_breadth",
    "niche_dynamics",
    "OverlapTest",
    "format_p",
    "holm_adjust",
    "correct_for_multiplicity",
    "equivalency_test",
    "similarity_test",
    "geographic_equivalency_test",
    "geographic_similarity_test",
    "estimate_seconds",
    "SpaceComparison",
    "PairComparison",
    "OverlapTaxon",
    "SharedSpace",
    "EnvironmentalSpaceParameters",
    "OverlapTestParameters",
    "compare_pair",
    "pairwise_table",
    "OVERLAP_COLUMNS",
]

log = logging.getLogger(__name__)

#: Replicates per test by default: the smallest attainable p, 1/1000, lies below the
#: Holm threshold of a three-taxon run with tests in both spaces (0.05 / 18 = 0.0028).
DEFAULT_REPLICATES = default("overlap", "n_replicates")
#: Environmental grid cells along each principal axis by default.
DEFAULT_GRID_CELLS = default("overlap", "grid_cells")
#: Records chained by gaps of at most this many grid cells form one spatial cluster
#: (``[occurrences] cluster_cells``; the tests take it as ``cluster_km``).
CLUSTER_CELLS = default("occurrences", "cluster_cells")


def _p_columns(key: str) -> tuple:
    return (key, f"{key}_se", f"{key}_replicates", f"{key}_holm")


#: Columns of ``overlap.csv``, in order.  ``*_p`` are p-values of D, ``*_se`` their
#: Monte Carlo standard errors, ``*_replicates`` the valid replicates behind them and
#: ``*_holm`` the Holm-adjusted values over every p-value of the run.
OVERLAP_COLUMNS = (
    "taxon_a",
    "taxon_b",
    "space",
    "D",
    "I",
    "D_tested",
    *_p_columns("equivalency_p"),
    *_p_columns("similarity_p_ab"),
    *_p_columns("similarity_p_ba"),
    "breadth_a",
    "breadth_b",
    "stability",
    "expansion",
    "unfilling",
    "analogue_share_a",
    "analogue_share_b",
    "n_replicates",
    "similarity_hypothesis",
)


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


def _kernel_sum(points, lattice, cov, block_cells: int = 1_000_000) -> np.ndarray:
    """Sum over points of their Gaussian kernels ``N(node; point, cov)`` at each node.

    Computed in whitened coordinates (``cov = L L^T``), one matrix product per block
    of points; equal to ``scipy.stats.multivariate_normal(point, cov).pdf`` summed
    over the points.  Memory is about ``block_cells * 8`` bytes.
    """
    points = np.asarray(points, float)
    lattice = np.asarray(lattice, float)
    chol = np.linalg.cholesky(np.asarray(cov, float))
    inv = np.linalg.inv(chol)
    zn = lattice @ inv.T
    nn = np.einsum("ij,ij->i", zn, zn)
    total = np.zeros(len(lattice))
    step = max(1, block_cells // max(1, len(lattice)))
    for s in range(0, len(points), step):
        zp = points[s : s + step] @ inv.T
        sq = np.einsum("ij,ij->i", zp, zp)[:, None] + nn[None, :] - 2.0 * (zp @ zn.T)
        np.maximum(sq, 0.0, out=sq)
        total += np.exp(-0.5 * sq).sum(axis=0)
    return total / (2.0 * math.pi * float(np.prod(np.diag(chol))))


#: Share of the available environment's covariance added to a taxon's own record
#: covariance before Scott's rule, so two records, or records on a line, still give a
#: proper kernel (ours; it changes well-spread samples' bandwidth by about 1 %).
BANDWIDTH_RIDGE = 0.01


def record_bandwidth(scores, available_cov) -> np.ndarray:
    """Kernel covariance of one taxon's record density, from its own records.

    Scott's rule in two dimensions, ``(S + r A) * n ** (-1/3)``, where ``S`` is the
    covariance of the taxon's own record scores, ``A`` that of the available
    environment and ``r`` = :data:`BANDWIDTH_RIDGE`.  The tests re-estimate it from the
    records of every replicate, so observed and null densities are built alike.

    Parameters
    ----------
    scores : ndarray of shape (n, 2)
        Principal-axis scores of the records (n >= 1).
    available_cov : ndarray of shape (2, 2)
        Covariance of the available environment's scores.

    Returns
    -------
    ndarray of shape (2, 2)

    References
    ----------
    .. [1] Scott, D. W. (1992). Multivariate Density Estimation. Wiley (the rule
       ``n ** (-1 / (d + 4))`` for the kernel scale, as ``scipy.stats.gaussian_kde``
       uses it).
    """
    scores = np.asarray(scores, float)
    n = len(scores)
    own = np.cov(scores.T, ddof=1) if n > 1 else np.zeros((2, 2))
    return (own + BANDWIDTH_RIDGE * np.asarray(available_cov, float)) * float(n) ** (
        -1.0 / 3.0
    )


def _scott_density(points, nodes) -> np.ndarray:
    """Gaussian kernel density with Scott's bandwidth, as ``scipy.stats.gaussian_kde``
    computes it (kernel covariance ``cov(points) * n ** (-1/3)`` in two dimensions)."""
    cov = np.cov(points.T, ddof=1) * float(len(points)) ** (-1.0 / 3.0)
    return _kernel_sum(points, nodes, cov) / len(points)


def _record_density(scores, nodes, available_cov) -> np.ndarray:
    """Record density at the nodes with the records' own bandwidth (integrates to 1)."""
    bw = record_bandwidth(scores, available_cov)
    return _kernel_sum(scores, nodes, bw) / len(scores)


@dataclass(frozen=True, eq=False)
class TaxonOccupancy:
    """One taxon in an :class:`EnvironmentalSpace`.

    Attributes
    ----------
    scores_records : ndarray of shape (n, 2)
        Principal-axis scores of the records.
    scores_background : ndarray of shape (m, 2)
        Scores of the taxon's own accessible environment (the similarity test draws
        from it).
    bandwidth : ndarray of shape (2, 2)
        Kernel covariance of the record density (:func:`record_bandwidth`).
    available : ndarray of bool (G, G)
        The taxon's own available environment for niche dynamics: cells holding its
        accessible environment whose density is at least the ``available_quantile``
        of the density over those cells.
    z_occ : ndarray (G, G)
        Kernel density of the records (per unit score area).
    occupancy : ndarray (G, G)
        ``z_occ / z_env`` on the support, 0 elsewhere, scaled to max 1.
    xy_records, xy_background : ndarray of shape (n, 2) and (m, 2), or None
        Coordinates of the records and accessible cells, in the rows' order; with
        them the tests can keep the records' spatial structure.
    """

    scores_records: np.ndarray
    scores_background: np.ndarray
    bandwidth: np.ndarray
    available: np.ndarray
    z_occ: np.ndarray
    occupancy: np.ndarray
    xy_records: np.ndarray | None = None
    xy_background: np.ndarray | None = None


#: Fields of :class:`TaxonOccupancy`, still readable from the space under their old
#: pair names (``occupancy_a`` is ``space.a.occupancy``).
_PER_TAXON = tuple(TaxonOccupancy.__dataclass_fields__)


@dataclass(frozen=True, eq=False)
class EnvironmentalSpace:
    """Two taxa's records on a grid over a two-axis summary of the shared environment.

    Build it with :func:`environmental_space`.  Surfaces are ``(G, G)`` arrays, rows
    along the second principal axis and columns along the first (see the module
    docstring).  The available environment and its density are **shared by the
    pair**, so two taxa with the same records have the same occupancy (D = 1).  What
    belongs to one taxon is in ``a`` and ``b``; the old pair names
    (``occupancy_a``, ``scores_records_b``, ...) still read.

    Attributes
    ----------
    scaler : sklearn.preprocessing.StandardScaler
    pca : sklearn.decomposition.PCA
        Both fitted on the shared available environment.
    grid_cells : int
        ``G``, grid cells along each principal axis.
    pc1_edges, pc2_edges : ndarray of shape (G + 1,)
        Cell edges along each axis, in score units.
    scores_available : ndarray of shape (k, 2)
        The shared available environment.
    available_cov : ndarray of shape (2, 2)
        Covariance of ``scores_available`` (enters every record bandwidth).
    z_env : ndarray (G, G)
        Density of the shared available environment, scaled to max 1.
    support : ndarray of bool (G, G)
        Cells where occupancy is defined: ``z_env`` at least its value at the
        ``support_quantile`` of the available points.
    a, b : TaxonOccupancy
        Each taxon's records, accessible environment, densities and occupancy.
    lonlat : bool
        The taxa's coordinates are longitude, latitude (degrees); else x, y in km.
    """

    scaler: StandardScaler
    pca: PCA
    grid_cells: int
    pc1_edges: np.ndarray
    pc2_edges: np.ndarray
    scores_available: np.ndarray
    available_cov: np.ndarray
    z_env: np.ndarray
    support: np.ndarray
    a: TaxonOccupancy
    b: TaxonOccupancy
    support_quantile: float = 0.0
    available_quantile: float = 0.05
    predictor_names: tuple = ()
    lonlat: bool = True

    def __getattr__(self, name: str):
        # old pair names: ``occupancy_a`` -> ``a.occupancy``
        field_name, _, which = name.rpartition("_")
        if which in ("a", "b") and field_name in _PER_TAXON:
            return getattr(self.taxon(which), field_name)
        raise AttributeError(
            f"{type(self).__name__!r} object has no attribute {name!r}"
        )

    def taxon(self, which: str) -> TaxonOccupancy:
        """``a`` or ``b`` by letter."""
        if which not in ("a", "b"):
            raise InputError(f"taxon must be 'a' or 'b'; got {which!r}.")
        return self.a if which == "a" else self.b

    @property
    def has_places(self) -> bool:
        """Records and accessible cells carry coordinates (tests keep spatial structure)."""
        return all(
            t.xy_records is not None and t.xy_background is not None
            for t in (self.a, self.b)
        )

    @property
    def resolution(self) -> int:
        """Old name of :attr:`grid_cells` (kept for one release)."""
        return self.grid_cells

    @property
    def pc1_centres(self) -> np.ndarray:
        return 0.5 * (self.pc1_edges[:-1] + self.pc1_edges[1:])

    @property
    def pc2_centres(self) -> np.ndarray:
        return 0.5 * (self.pc2_edges[:-1] + self.pc2_edges[1:])

    @property
    def nodes(self) -> np.ndarray:
        """Cell centres as ``(G * G, 2)`` (PC1, PC2) scores, in row-major order."""
        return _nodes(self.pc1_edges, self.pc2_edges)

    @property
    def explained_variance_ratio(self) -> np.ndarray:
        """Share of the standardised available environment's variance on PC1, PC2."""
        return self.pca.explained_variance_ratio_[:2]

    @property
    def inverse_env(self) -> np.ndarray:
        """``1 / z_env`` on the support, 0 elsewhere (G, G)."""
        out = np.zeros_like(self.z_env)
        out[self.support] = 1.0 / self.z_env[self.support]
        return out

    @property
    def analogue(self) -> np.ndarray:
        """Cells available to both taxa (analogue environment), bool (G, G)."""
        return self.a.available & self.b.available

    def cell_of(self, scores) -> tuple[np.ndarray, np.ndarray]:
        """Grid ``(rows, cols)`` (PC2 bin, PC1 bin) of score points, clipped inside."""
        return _cell_of(self.pc1_edges, self.pc2_edges, scores)

    def transform(self, env) -> np.ndarray:
        """Principal-axis scores (n, 2) of predictor rows (n, n_vars)."""
        return self.pca.transform(self.scaler.transform(np.asarray(env, float)))[:, :2]

    def occupancy_of(self, scores) -> np.ndarray:
        """Occupancy (G, G) of a set of record scores, built exactly as the taxa's."""
        z = _record_density(scores, self.nodes, self.available_cov).reshape(
            self.z_env.shape
        ) * self.inverse_env
        m = z.max()
        return z / m if m > 0 else z

    def analogue_share(self, which: str) -> float:
        """Share of taxon ``which``'s records lying in analogue environment."""
        rows, cols = self.cell_of(self.taxon(which).scores_records)
        return float(np.mean(self.analogue[rows, cols]))


def _cell_of(pc1_edges, pc2_edges, scores) -> tuple[np.ndarray, np.ndarray]:
    scores = np.asarray(scores, float)
    g = len(pc1_edges) - 1
    col = np.clip(np.searchsorted(pc1_edges, scores[:, 0], "right") - 1, 0, g - 1)
    row = np.clip(np.searchsorted(pc2_edges, scores[:, 1], "right") - 1, 0, g - 1)
    return row, col


def _nodes(pc1_edges, pc2_edges) -> np.ndarray:
    c1 = 0.5 * (pc1_edges[:-1] + pc1_edges[1:])
    c2 = 0.5 * (pc2_edges[:-1] + pc2_edges[1:])
    g1, g2 = np.meshgrid(c1, c2, indexing="xy")
    return np.column_stack([g1.ravel(), g2.ravel()])


def _occupancy(z_occ, inv_env) -> np.ndarray:
    z = z_occ * inv_env
    m = z.max()
    return z / m if m > 0 else z


def _own_available(scores_bg, z_own, edges, quantile) -> np.ndarray:
    """Cells holding a taxon's accessible environment, marginal cells dropped.

    The marginal quantile is taken over the cells (each cell counts once), not over
    background points, which would weight it by how common each environment is.
    """
    rows, cols = _cell_of(*edges, scores_bg)
    holds = np.zeros(z_own.shape, bool)
    holds[rows, cols] = True
    cut = np.quantile(z_own[holds], quantile) if quantile > 0 else 0.0
    return holds & (z_own >= cut)


# --- the values a pair function takes ------------------------------------------------
@dataclass(frozen=True, eq=False)
class OverlapTaxon:
    """One taxon as the pair functions take it (:func:`compare_pair`,
    :func:`environmental_space`, :func:`geographic_similarity_test`).

    Attributes
    ----------
    name : str
        Taxon name.
    map : ndarray (n_rows, n_cols), optional
        Suitability map in [0, 1], NaN outside the mask; :func:`compare_pair` needs it.
    env_records, env_background : array_like of shape (n, n_vars) and (m, n_vars)
        Predictor rows at the records and at cells of the taxon's accessible area
        (see :func:`environmental_space`); no environmental comparison without them.
    xy_records, xy_background : array_like of shape (n, 2) and (m, 2), optional
        Coordinates of those rows (longitude, latitude in degrees unless the pair's
        :attr:`SharedSpace.lonlat` is False, then x, y in km); with them the
        environmental tests can keep spatial clusters of records.  Used when both
        taxa have both.
    cells : array_like of int, optional
        Flat grid indices of the records (geographic tests).
    accessible : ndarray of bool (n_rows, n_cols), optional
        The accessible area on the grid (geographic similarity test).
    """

    name: str
    map: np.ndarray | None = None
    env_records: np.ndarray | None = None
    env_background: np.ndarray | None = None
    xy_records: np.ndarray | None = None
    xy_background: np.ndarray | None = None
    cells: np.ndarray | None = None
    accessible: np.ndarray | None = None

    @property
    def has_environment(self) -> bool:
        return self.env_records is not None and self.env_background is not None


@dataclass(frozen=True, eq=False)
class SharedSpace:
    """What the two taxa of a pair share: the grid of their maps (geographic space)
    and the environment available to both (environmental space).

    Attributes
    ----------
    cell_area_km2 : ndarray (n_rows, n_cols) or float, optional
        Ground area of each grid cell, km² (the weights of D, I and breadth in
        geographic space); :func:`compare_pair` needs it.
    env_available : array_like of shape (k, n_vars), optional
        Predictor rows of the pair's shared available environment, e.g. at the cells
        of :func:`shared_available_cells`.  The PCA and the environment density of
        :func:`environmental_space` are built on it; when None, on the two taxa's
        background rows pooled.
    predictor_names : sequence of str, default ()
        Names of the predictor columns (axis labels of the figures).
    lonlat : bool, default True
        The taxa's coordinates (``xy_records``, ``xy_background``) are longitude,
        latitude in degrees; False: x, y in km.

    Examples
    --------
    >>> shared = SharedSpace(cell_area_km2=2.5, predictor_names=["heat", "rain"])
    >>> shared.predictor_names, shared.lonlat
    (('heat', 'rain'), True)
    """

    cell_area_km2: np.ndarray | float | None = None
    env_available: np.ndarray | None = None
    predictor_names: tuple = ()
    lonlat: bool = True

    def __post_init__(self):
        object.__setattr__(self, "predictor_names", tuple(self.predictor_names or ()))
        object.__setattr__(self, "lonlat", bool(self.lonlat))


def _check_fraction(name: str, q) -> float:
    if not 0.0 <= q < 1.0:
        raise InputError(f"{name} must be in [0, 1); got {q}.")
    return float(q)


@dataclass(frozen=True)
class EnvironmentalSpaceParameters:
    """How a pair's environmental space is built (:func:`environmental_space`).

    Defaults are those of the project file's ``[overlap]`` section
    (:func:`screener.project.default`); :meth:`from_settings` reads a loaded project.

    Attributes
    ----------
    grid_cells : int, default 64
        ``G``, grid cells along each principal axis (at least 10;
        ``[overlap] grid_cells``).
    support_quantile : float, default 0.0
        Occupancy is defined where the environment density is at least this quantile
        of its values at the available points; 0 = at least as dense as the sparsest
        available point, which keeps ``z_occ / z_env`` from exploding in the empty
        margins.
    available_quantile : float, default 0.05
        Niche dynamics drops, from each taxon's cells, those whose density is below
        this quantile over the cells (marginal environments; common practice).

    Raises
    ------
    screener.errors.InputError
        Fewer than 10 grid cells, or a quantile outside [0, 1).

    Examples
    --------
    >>> EnvironmentalSpaceParameters(grid_cells=30)
    EnvironmentalSpaceParameters(grid_cells=30, support_quantile=0.0, available_quantile=0.05)
    """

    grid_cells: int = DEFAULT_GRID_CELLS
    support_quantile: float = 0.0
    available_quantile: float = 0.05

    def __post_init__(self):
        g = int(self.grid_cells)
        if g < 10:
            raise InputError(
                f"grid_cells must be at least 10 cells per axis; got {self.grid_cells}."
            )
        object.__setattr__(self, "grid_cells", g)
        for name in ("support_quantile", "available_quantile"):
            object.__setattr__(self, name, _check_fraction(name, getattr(self, name)))

    @classmethod
    def from_settings(cls, settings, **changes) -> EnvironmentalSpaceParameters:
        """The parameters of a loaded project (``[overlap] grid_cells``), with
        ``changes`` on top."""
        return cls(**{"grid_cells": settings.overlap.grid_cells, **changes})


@dataclass(frozen=True)
class OverlapTestParameters:
    """How the equivalency and similarity tests of a pair run, and how their result
    is read (:func:`compare_pair`, :func:`geographic_similarity_test`).

    Defaults are those of the project file's ``[overlap]`` section
    (:func:`screener.project.default`); :meth:`from_settings` reads a loaded project.

    Attributes
    ----------
    n_replicates : int, default 999
        Replicates per test ``R``; no p-value is below ``1 / (R + 1)``
        (``[overlap] n_replicates``).
    hypothesis : {"conserved", "diverged"}, default "conserved"
        What the similarity tests ask: is the overlap higher (upper tail) or lower
        (lower tail) than the environments each taxon had available explain
        (``[overlap] similarity_hypothesis``)?
    alpha : float, default 0.05
        Family-wise error rate of the plain-language reading (``[overlap] alpha``);
        the p-values are Holm-corrected before it claims anything.
    random_state : None, int or numpy.random.Generator, default 0
        Root of the replicate seeds, all drawn up front (:func:`spawn_seeds`).
    cluster_km : float, default 0
        Records chained by gaps of at most this (km) form one spatial cluster
        (collecting site), which the tests keep together: in environmental space
        with record coordinates (:func:`equivalency_test`, :func:`similarity_test`),
        in geographic space from the records' cells
        (:func:`geographic_equivalency_test`, :func:`geographic_similarity_test`);
        0 = every record on its own (the published tests).
    geographic_budget_s : float, default 600
        Skip the geographic tests (p = NaN, logged) when :func:`estimate_seconds`
        puts them above this many seconds; ``inf`` runs them whatever they cost.

    Raises
    ------
    screener.errors.InputError
        Fewer than 1 replicate, an unknown hypothesis, ``alpha`` outside (0, 1), or a
        negative ``cluster_km`` or budget.

    Examples
    --------
    >>> t = OverlapTestParameters(n_replicates=99, hypothesis="diverged")
    >>> t.n_replicates, t.hypothesis, t.alpha
    (99, 'diverged', 0.05)
    """

    n_replicates: int = DEFAULT_REPLICATES
    hypothesis: str = default("overlap", "similarity_hypothesis")
    alpha: float = default("overlap", "alpha")
    random_state: object = 0
    cluster_km: float = 0.0
    geographic_budget_s: float = 600.0

    def __post_init__(self):
        object.__setattr__(self, "n_replicates", _check_replicates(self.n_replicates))
        object.__setattr__(self, "hypothesis", _check_hypothesis(self.hypothesis))
        if not 0.0 < self.alpha < 1.0:
            raise InputError(f"alpha must be between 0 and 1; got {self.alpha}.")
        for name in ("cluster_km", "geographic_budget_s"):
            v = getattr(self, name)
            if not (v >= 0):  # also refuses NaN
                raise InputError(f"{name} must be at least 0; got {v}.")
            object.__setattr__(self, name, float(v))

    @classmethod
    def from_settings(cls, settings, **changes) -> OverlapTestParameters:
        """The parameters of a loaded project (``[overlap] n_replicates``,
        ``similarity_hypothesis``, ``alpha`` and ``[project] random_state``), with
        ``changes`` on top (e.g. the pair's own ``random_state`` and the
        ``cluster_km`` of :func:`screener.randomisation.cluster_link_km`)."""
        ov = settings.overlap
        values = dict(
            n_replicates=ov.n_replicates,
            hypothesis=ov.similarity_hypothesis,
            alpha=ov.alpha,
            random_state=settings.project.random_state,
        )
        values.update(changes)
        return cls(**values)


#: Old keyword arguments of the pair functions -> (the argument that replaces them,
#: its field).  ``resolution`` and ``alternative`` are older names of ``grid_cells``
#: and ``hypothesis``.
_OLD_KEYWORD_HOMES = {
    "cell_area_km2": ("shared", "cell_area_km2"),
    "env_available": ("shared", "env_available"),
    "predictor_names": ("shared", "predictor_names"),
    "lonlat": ("shared", "lonlat"),
    "grid_cells": ("space_parameters", "grid_cells"),
    "resolution": ("space_parameters", "grid_cells"),
    "support_quantile": ("space_parameters", "support_quantile"),
    "available_quantile": ("space_parameters", "available_quantile"),
    "n_replicates": ("test_parameters", "n_replicates"),
    "hypothesis": ("test_parameters", "hypothesis"),
    "alternative": ("test_parameters", "hypothesis"),
    "alpha": ("test_parameters", "alpha"),
    "random_state": ("test_parameters", "random_state"),
    "cluster_km": ("test_parameters", "cluster_km"),
    "geographic_budget_s": ("test_parameters", "geographic_budget_s"),
}
_VALUE_TYPES = {
    "shared": SharedSpace,
    "space_parameters": EnvironmentalSpaceParameters,
    "test_parameters": OverlapTestParameters,
}


def _fold_old_keywords(function: str, kwargs: dict) -> str:
    """Fold the old keywords in ``kwargs`` (in place) into the values that replace
    them (``shared=``, ``space_parameters=``, ``test_parameters=``); returns what to
    write instead ("" when there were none)."""
    moved = {k: kwargs.pop(k) for k in list(kwargs) if k in _OLD_KEYWORD_HOMES}
    for old_default_none in ("resolution", "alternative"):
        if moved.get(old_default_none, 0) is None:
            del moved[old_default_none]
    if not moved:
        return ""
    used = sorted(moved)
    renamed = []
    if "resolution" in moved:
        moved["grid_cells"] = moved.pop("resolution")
        renamed.append("`resolution` is `grid_cells`")
    if "alternative" in moved:
        alternative = moved.pop("alternative")
        if alternative not in _OLD_ALTERNATIVES:
            raise InputError(
                f"alternative must be 'greater' or 'lower'; got {alternative!r}. It "
                "is renamed `hypothesis`: 'conserved' or 'diverged'."
            )
        moved["hypothesis"] = _OLD_ALTERNATIVES[alternative]
        renamed.append("`alternative` 'greater' / 'lower' is `hypothesis` 'conserved' / "
                       "'diverged'")
    fields_of = {}
    for key, value in moved.items():
        argument, name = _OLD_KEYWORD_HOMES[key]
        fields_of.setdefault(argument, {})[name] = value
    hints = []
    for argument, values in fields_of.items():
        if kwargs.get(argument) is not None:
            raise TypeError(
                f"{function}() got {argument}= and the old keywords {sorted(values)}; "
                f"give them inside {argument}."
            )
        cls = _VALUE_TYPES[argument]
        kwargs[argument] = cls(**values)
        inner = ", ".join(f"{k}=..." for k in values)
        hints.append(f"{argument}={cls.__name__}({inner})")
    text = f"write {', '.join(hints)} instead of the keywords {', '.join(used)}"
    return text + (f" ({'; '.join(renamed)})" if renamed else "")


def _old_form_message(function: str, parts) -> str:
    return (f"{function}(): {'; '.join(p for p in parts if p)} (screener.overlap). "
            "The old form stops working in the next release.")


def _old_call(function: str, args, kwargs: dict, allowed: set, parts: list):
    """The end of a translator for :func:`screener.errors.accepts_old_form`: the old
    option keywords folded into values, unknown keywords refused, what to write."""
    parts = [*parts, _fold_old_keywords(function, kwargs)]
    unknown = set(kwargs) - allowed
    if unknown:
        raise TypeError(f"{function}() got unexpected arguments {sorted(unknown)}")
    return args, kwargs, _old_form_message(function, parts)


def _checked_places(a: OverlapTaxon, b: OverlapTaxon, rows) -> tuple:
    """The four coordinate arrays of the pair (records of A, of B, background of A,
    of B), checked against their predictor rows; all None unless both taxa have
    both."""
    from screener.randomisation import _xy

    xy = (a.xy_records, b.xy_records, a.xy_background, b.xy_background)
    if any(v is None for v in xy):
        return (None,) * 4
    names = (f"xy_records of {a.name}", f"xy_records of {b.name}",
             f"xy_background of {a.name}", f"xy_background of {b.name}")
    out = []
    for name, coords, env in zip(names, xy, rows, strict=True):
        coords = _xy(coords, name)
        if len(coords) != len(env):
            raise InputError(
                f"{name} has {len(coords)} coordinates for {len(env)} predictor rows; "
                "give one per row."
            )
        out.append(coords)
    return tuple(out)


def shared_available_cells(
    grid,
    accessible_a,
    accessible_b,
    *,
    study_area: bool = False,
    max_points: int = default("background", "max_points"),
    random_state=0,
) -> tuple[np.ndarray, np.ndarray]:
    """Cells of a pair's shared available environment (``env_available``).

    Drawn from the union of the two accessible areas, or from the whole study area
    with ``study_area=True``, by :func:`screener.background.draw_background` (up to
    ``max_points`` cells, with probability proportional to their ground area).  The
    predictor values at these cells are the ``env_available`` of
    :func:`environmental_space` and :func:`compare_pair`: both taxa's occupancies
    are corrected by this one density.

    Parameters
    ----------
    grid : screener.grid.Grid
    accessible_a, accessible_b : ndarray of bool (n_rows, n_cols)
        Each taxon's accessible area.
    study_area : bool, default False
        Draw from the whole study area (``grid.mask``) instead.
    max_points : int, default 10000
    random_state : int, default 0
        Seed; the same seed draws the same cells.

    Returns
    -------
    rows, cols : ndarray of int64
    """
    if study_area:
        area = grid.mask
    else:
        area = np.asarray(accessible_a, bool) | np.asarray(accessible_b, bool)
    bg = draw_background(grid, area, max_points=max_points, random_state=random_state)
    return bg.rows, bg.cols


#: Positional arguments of the old form of :func:`environmental_space`.
_OLD_SPACE_ARRAYS = ("env_records_a", "env_records_b", "env_background_a",
                     "env_background_b")
_SPACE_KEYWORDS = {"a", "b", "shared", "space_parameters"}


def _environmental_space_old_form(*args, **kwargs):
    """Translator for :func:`screener.errors.accepts_old_form`: the old call
    ``environmental_space(env_records_a, env_records_b, env_background_a,
    env_background_b, places=..., grid_cells=..., ...)`` in the new form."""
    a = args[0] if args else kwargs.get("a")
    if isinstance(a, OverlapTaxon) and set(kwargs) <= _SPACE_KEYWORDS:
        return None
    kwargs = dict(kwargs)
    parts = []
    if not isinstance(a, OverlapTaxon):
        if len(args) > 4:
            raise TypeError("environmental_space() takes at most 4 predictor arrays "
                            f"in its old form; got {len(args)}")
        arrays = dict(zip(_OLD_SPACE_ARRAYS, args))
        for key in _OLD_SPACE_ARRAYS:
            if key in kwargs:
                if key in arrays:
                    raise TypeError(f"environmental_space() got {key} twice")
                arrays[key] = kwargs.pop(key)
        missing = [k for k in _OLD_SPACE_ARRAYS if arrays.get(k) is None]
        if missing:
            raise TypeError(
                "environmental_space() takes two OverlapTaxon values (a, b); its old "
                f"form four predictor arrays, and {missing} are missing"
            )
        places = kwargs.pop("places", None)
        if places is not None and len(places) != 4:
            raise InputError(
                "places must hold 4 coordinate arrays: records of A, records of B, "
                "background of A, background of B."
            )
        xy = tuple(places) if places is not None else (None,) * 4
        args = tuple(
            OverlapTaxon(name, env_records=arrays[f"env_records_{w}"],
                         env_background=arrays[f"env_background_{w}"],
                         xy_records=xy[k], xy_background=xy[2 + k])
            for k, (name, w) in enumerate((("A", "a"), ("B", "b")))
        )
        parts.append(
            "write environmental_space(a, b) with one OverlapTaxon(name, "
            "env_records=..., env_background=..., xy_records=..., xy_background=...) "
            "per taxon instead of the four predictor arrays and places="
        )
    return _old_call("environmental_space", args, kwargs, _SPACE_KEYWORDS, parts)


@accepts_old_form(_environmental_space_old_form)
def environmental_space(
    a: OverlapTaxon,
    b: OverlapTaxon,
    *,
    shared: SharedSpace | None = None,
    space_parameters: EnvironmentalSpaceParameters | None = None,
) -> EnvironmentalSpace:
    """Project two taxa into one two-axis environmental space shared by the pair.

    Predictors are standardised and summarised by a PCA calibrated on the **shared
    available environment**: ``shared.env_available`` when given (the pipeline draws
    it from the union of the two accessible areas, or from the whole study area),
    otherwise the two taxa's accessible-area samples pooled.  Its density
    (``gaussian_kde``, Scott's bandwidth) corrects both taxa's record densities, so
    identical records give identical occupancies (D = 1) whatever background each
    taxon drew.  Each taxon's record density uses a bandwidth from its own records
    (:func:`record_bandwidth`).

    The old form ``environmental_space(env_records_a, env_records_b,
    env_background_a, env_background_b, env_available=..., grid_cells=...,
    places=..., ...)`` still works for one release, with a
    :class:`~screener.errors.ScreenerDeprecationWarning` that says what to write.

    Parameters
    ----------
    a, b : OverlapTaxon
        The two taxa, each with ``env_records`` (predictor values at its records, at
        least 2, shape (n, n_vars)) and ``env_background`` (predictor values of cells
        drawn from its own accessible area, shape (m, n_vars)): the similarity test
        draws random records from the background, and niche dynamics uses it to tell
        analogue environments.  With ``xy_records`` and ``xy_background`` on both
        (row for row) the similarity tests move each record pattern as a whole and
        the equivalency test can permute spatial clusters (see
        :func:`similarity_test`, :func:`equivalency_test`).  Maps are not used.
    shared : SharedSpace, optional
        The shared available environment (``env_available``), the predictor names
        (figure axis labels) and whether coordinates are longitude, latitude
        (``lonlat``).
    space_parameters : EnvironmentalSpaceParameters, optional
        Grid cells along each axis and the support and available-environment
        quantiles (defaults of ``[overlap]``).

    Returns
    -------
    EnvironmentalSpace

    Raises
    ------
    screener.errors.InputError
        Fewer than 2 predictors or 2 records per taxon, NaN values, or environments
        that do not vary along both axes.

    References
    ----------
    .. [1] Broennimann, O. et al. (2012). Global Ecology and Biogeography 21, 481-497.
    .. [2] Warren, D. L., Glor, R. E. & Turelli, M. (2008). Evolution 62, 2868-2883.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> a = OverlapTaxon("A", env_records=rng.normal(0, 1, (10, 3)),
    ...                  env_background=rng.normal(0, 2, (300, 3)))
    >>> b = OverlapTaxon("B", env_records=rng.normal(1, 1, (10, 3)),
    ...                  env_background=rng.normal(0, 2, (300, 3)))
    >>> space = environmental_space(
    ...     a, b, space_parameters=EnvironmentalSpaceParameters(grid_cells=20))
    >>> space.z_env.shape
    (20, 20)
    """
    for taxon in (a, b):
        if not isinstance(taxon, OverlapTaxon) or not taxon.has_environment:
            raise InputError(
                "environmental_space() needs two OverlapTaxon values with "
                "env_records and env_background."
            )
    shared = shared or SharedSpace()
    parameters = space_parameters or EnvironmentalSpaceParameters()
    grid_cells = parameters.grid_cells
    support_quantile = parameters.support_quantile
    available_quantile = parameters.available_quantile
    ra = _check_env(a.env_records, "env_records_a")
    n_vars = ra.shape[1]
    rb = _check_env(b.env_records, "env_records_b", n_vars)
    ba = _check_env(a.env_background, "env_background_a", n_vars)
    bb = _check_env(b.env_background, "env_background_b", n_vars)
    av = (
        np.vstack([ba, bb])
        if shared.env_available is None
        else _check_env(shared.env_available, "env_available", n_vars)
    )
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
        ("env_available", av, 5),
    ):
        if len(arr) < least:
            raise InputError(
                f"`{name}` has {len(arr)} rows; at least {least} are needed."
            )

    scaler = StandardScaler().fit(av)
    pca = PCA(n_components=2).fit(scaler.transform(av))

    everything = pca.transform(scaler.transform(np.vstack([ra, rb, ba, bb, av])))
    cuts = np.cumsum([len(ra), len(rb), len(ba), len(bb)])
    sra, srb, sba, sbb, sav = np.split(everything, cuts)
    lo = everything.min(axis=0)
    hi = everything.max(axis=0)
    span = np.where(hi > lo, hi - lo, 1.0)
    pad = 1e-9 * span
    e1 = np.linspace(lo[0] - pad[0], hi[0] + pad[0], grid_cells + 1)
    e2 = np.linspace(lo[1] - pad[1], hi[1] + pad[1], grid_cells + 1)
    av_cov = np.cov(sav.T, ddof=1)
    if not np.linalg.det(av_cov) > 1e-12 * max(1.0, float(np.trace(av_cov))) ** 2:
        raise InputError(
            "the available environment does not vary along both principal axes; draw "
            "it over a wider area or use predictors that vary there."
        )
    shape = (grid_cells, grid_cells)
    xy_ra, xy_rb, xy_ba, xy_bb = _checked_places(a, b, (ra, rb, ba, bb))
    nodes = _nodes(e1, e2)
    z_env = _scott_density(sav, nodes).reshape(shape)
    z_env = z_env / z_env.max()
    rows, cols = _cell_of(e1, e2, sav)
    support = z_env >= max(np.quantile(z_env[rows, cols], support_quantile), 1e-300)
    inverse_env = np.zeros_like(z_env)
    inverse_env[support] = 1.0 / z_env[support]
    taxa = {}
    for which, sb, sr, xy_r, xy_b in (
        ("a", sba, sra, xy_ra, xy_ba),
        ("b", sbb, srb, xy_rb, xy_bb),
    ):
        try:
            z_own = _scott_density(sb, nodes).reshape(shape)
        except np.linalg.LinAlgError as err:
            raise InputError(
                f"the accessible environment of taxon {which.upper()} does not vary "
                "along both principal axes; draw it over a wider accessible area."
            ) from err
        bw = record_bandwidth(sr, av_cov)
        z_occ = (_kernel_sum(sr, nodes, bw) / len(sr)).reshape(shape)
        occupancy = _occupancy(z_occ, inverse_env)
        if not occupancy.max() > 0:
            raise InputError(
                f"taxon {which.upper()}'s records lie outside the available "
                "environment; draw the available environment over the area around "
                "its records."
            )
        taxa[which] = TaxonOccupancy(
            scores_records=sr,
            scores_background=sb,
            bandwidth=bw,
            available=_own_available(sb, z_own, (e1, e2), available_quantile),
            z_occ=z_occ,
            occupancy=occupancy,
            xy_records=xy_r,
            xy_background=xy_b,
        )
    space = EnvironmentalSpace(
        scaler=scaler,
        pca=pca,
        grid_cells=grid_cells,
        pc1_edges=e1,
        pc2_edges=e2,
        scores_available=sav,
        available_cov=av_cov,
        z_env=z_env,
        support=support,
        a=taxa["a"],
        b=taxa["b"],
        support_quantile=float(support_quantile),
        available_quantile=float(available_quantile),
        predictor_names=shared.predictor_names,
        lonlat=shared.lonlat,
    )
    log.debug(
        "environmental space: G=%d, PC1+PC2 explain %.0f%% of the available variance",
        grid_cells,
        100 * float(space.explained_variance_ratio.sum()),
    )
    return space


def environmental_overlap(space: EnvironmentalSpace) -> tuple[float, float]:
    """D and I between the two occupancies of an :class:`EnvironmentalSpace`.

    References
    ----------
    .. [1] Broennimann, O. et al. (2012). Global Ecology and Biogeography 21, 481-497.
    """
    pn, qn = _normalised_pair(space.a.occupancy, space.b.occupancy)
    return _d_from_normalised(pn, qn), _i_from_normalised(pn, qn)


def niche_breadth(space: EnvironmentalSpace) -> tuple[float, float]:
    """Standardised Levins breadth of each taxon's occupancy over the support cells.

    Returns
    -------
    (float, float)
        Breadth of A and of B, each in [0, 1] with ``N`` = the support cells.
    """
    return (
        levins_breadth(space.a.occupancy[space.support]),
        levins_breadth(space.b.occupancy[space.support]),
    )


#: Below this share of a taxon's records in analogue environment, niche dynamics
#: describes a minority of the records and the reading warns (ours).
ANALOGUE_SHARE_WARNING = 0.5


def niche_dynamics(space: EnvironmentalSpace) -> dict[str, float]:
    """Stability, expansion and unfilling of B's niche relative to A's.

    Restricted to analogue environment: grid cells available to both taxa
    (:attr:`EnvironmentalSpace.analogue`; the marginal-environment cut is a quantile
    over cells, not over background points).  A taxon "occupies" the cells where its
    record density is at least its lowest value at its own records.  Shares are
    weighted by record density:

    * **stability** - share of B's occupied density that falls where A also occurs;
    * **expansion** - ``1 - stability``;
    * **unfilling** - share of A's occupied density where B does not occur.

    Returns
    -------
    dict
        ``stability``, ``expansion``, ``unfilling`` (NaN when a taxon has no density
        in analogue environment) and ``analogue_share_a``, ``analogue_share_b``: the
        share of each taxon's records in analogue environment.  When it is low the
        three indices describe few of the records.

    References
    ----------
    .. [1] Guisan, A. et al. (2014). Trends in Ecology & Evolution 29, 260-269.
    """
    analog = space.analogue
    occupied = {}
    for which in ("a", "b"):
        taxon = space.taxon(which)
        rows, cols = space.cell_of(taxon.scores_records)
        occupied[which] = taxon.z_occ >= taxon.z_occ[rows, cols].min()
    za = np.where(analog & occupied["a"], space.a.z_occ, 0.0)
    zb = np.where(analog & occupied["b"], space.b.z_occ, 0.0)
    nan = float("nan")
    stability = float(zb[occupied["a"]].sum() / zb.sum()) if zb.sum() > 0 else nan
    unfilling = float(za[~occupied["b"]].sum() / za.sum()) if za.sum() > 0 else nan
    expansion = 1.0 - stability if math.isfinite(stability) else nan
    return {
        "stability": stability,
        "expansion": expansion,
        "unfilling": unfilling,
        "analogue_share_a": space.analogue_share("a"),
        "analogue_share_b": space.analogue_share("b"),
    }


# ======================================================================================
# Tests
# ======================================================================================
#: What each test asks, and the tail of its null distribution that counts against it.
HYPOTHESES = ("conserved", "diverged")
_TAIL = {"conserved": "upper", "diverged": "lower", "different": "lower"}
_OLD_ALTERNATIVES = {"greater": "conserved", "lower": "diverged"}


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
        For similarity tests: "ab" = A's niche against random records of B drawn
        from B's accessible area, "ba" = the reverse; "" for equivalency.
    observed : float
        The statistic the null is compared with.
    null : ndarray of shape (n_replicates,)
        Overlap under the null, one per replicate (NaN where undefined).
    p_value : float
        ``(1 + k) / (1 + R)``, ``R`` the valid (finite) replicates and ``k`` those at
        least as extreme as ``observed`` in the tail named by ``tail``.
    hypothesis : str
        "different" (equivalency: niches less alike than random splits),
        "conserved" (similarity: more alike than the environments explain) or
        "diverged" (similarity: less alike).
    tail : str
        "upper" (``null >= observed`` counts) or "lower" (``null <= observed``).
    n_replicates : int
        Replicates run.
    n_valid : int
        Replicates that gave a value (the ``R`` of the p-value).
    p_se : float
        Monte Carlo standard error of ``p_value``, ``sqrt(p (1 - p) / R)``.
    """

    statistic: str
    test: str
    space: str
    direction: str
    observed: float
    null: np.ndarray
    p_value: float
    hypothesis: str
    tail: str
    n_replicates: int
    n_valid: int
    p_se: float

    @property
    def p_floor(self) -> float:
        """Smallest p-value these replicates can give, ``1 / (1 + R)``."""
        return 1.0 / (1.0 + self.n_valid) if self.n_valid else float("nan")

    @property
    def tie_share(self) -> float:
        """Share of valid replicates that give the observed value again (within
        :data:`TIE_TOLERANCE`).  A permutation of few units (collecting sites) redraws
        the observed split often; since ties count as extreme, ``p >= tie_share``
        whatever the data, and a test with ``tie_share >= alpha`` cannot reject."""
        null = np.asarray(self.null, float)
        null = null[np.isfinite(null)]
        if not null.size:
            return float("nan")
        return float(np.mean(np.abs(null - self.observed) <= TIE_TOLERANCE))

    def p_text(self) -> str:
        """The p-value to the precision its replicates support, e.g. ``p = 0.012``.

        Decimals: enough to show ``1 / (1 + R)``; when no replicate was as extreme
        as the observed value the text is ``p <= 1 / (1 + R)``.
        """
        return format_p(self.p_value, self.n_valid)


def format_p(p: float, n_valid: int) -> str:
    """``p = ...`` to the precision ``n_valid`` replicates support (see OverlapTest)."""
    if not math.isfinite(p) or n_valid <= 0:
        return "p not computed"
    decimals = max(2, math.ceil(math.log10(n_valid + 1)))
    floor = 1.0 / (1.0 + n_valid)
    if p <= floor * (1 + 1e-9):
        return f"p <= {floor:.{decimals}f}" if round(floor, decimals) > 0 else (
            f"p <= {floor:.1e}"
        )
    return f"p = {p:.{decimals}f}"


#: Replicate values this close to the observed one (relative to 1, D and I lie in
#: [0, 1]) count as ties, i.e. as extreme as the observed.  A replicate that rebuilds
#: the observed split from its records in another order gives the observed value up
#: to rounding (1e-16), and must count: a restricted permutation has few distinct
#: splits, and missing the ties made p too small (docs/calibration.md).
TIE_TOLERANCE = 1e-9


def _p_value(observed: float, null, tail: str) -> tuple[float, int]:
    """Monte Carlo p ``(1 + k) / (1 + R)``, ``k`` replicates at least as extreme as
    the observed value (ties within :data:`TIE_TOLERANCE` included), ``R`` the valid
    replicates (Davison & Hinkley 1997, Bootstrap Methods and their Application,
    ch. 4; from memory)."""
    null = np.asarray(null, float)
    null = null[np.isfinite(null)]
    if null.size == 0:
        return float("nan"), 0
    if tail == "upper":
        k = int(np.sum(null >= observed - TIE_TOLERANCE))
    else:
        k = int(np.sum(null <= observed + TIE_TOLERANCE))
    return (1.0 + k) / (1.0 + null.size), int(null.size)


def _check_hypothesis(hypothesis: str | None, alternative: str | None = None) -> str:
    if alternative is not None:
        if alternative not in _OLD_ALTERNATIVES:
            raise InputError(
                f"alternative must be 'greater' or 'lower'; got {alternative!r}. It "
                "is renamed `hypothesis`: 'conserved' or 'diverged'."
            )
        warnings.warn(
            "`alternative` is renamed `hypothesis` ('greater' -> 'conserved', 'lower' "
            "-> 'diverged'); the old name stops working in the next release.",
            ScreenerDeprecationWarning,
            stacklevel=3,
        )
        return _OLD_ALTERNATIVES[alternative]
    if hypothesis not in HYPOTHESES:
        raise InputError(
            "hypothesis must be 'conserved' (niches more alike than their "
            "environments explain) or 'diverged' (less alike); got "
            f"{hypothesis!r}."
        )
    return hypothesis


def _check_replicates(n_replicates) -> int:
    n = int(n_replicates)
    if n < 1:
        raise InputError(f"n_replicates must be at least 1; got {n_replicates}.")
    return n


def _package(values, observed, *, test, space, direction, hypothesis):
    values = np.asarray(values, float).reshape(-1, 2)
    n_bad = int(np.sum(~np.all(np.isfinite(values), axis=1)))
    if n_bad:
        log.warning(
            "%d of %d %s replicates gave no overlap value (empty surface); the p-value "
            "counts the other %d",
            n_bad,
            len(values),
            test,
            len(values) - n_bad,
        )
    tail = _TAIL[hypothesis]
    out = {}
    for k, stat in enumerate(("D", "I")):
        p, n_valid = _p_value(observed[k], values[:, k], tail)
        se = math.sqrt(p * (1.0 - p) / n_valid) if n_valid else float("nan")
        out[stat] = OverlapTest(
            statistic=stat,
            test=test,
            space=space,
            direction=direction,
            observed=float(observed[k]),
            null=values[:, k].copy(),
            p_value=p,
            hypothesis=hypothesis,
            tail=tail,
            n_replicates=len(values),
            n_valid=n_valid,
            p_se=se,
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


def _resolve_executor(executor):
    if executor is None:
        return make_executor("serial")
    if not isinstance(executor, Executor) and not hasattr(executor, "map"):
        raise InputError("executor must come from screener.parallel.make_executor().")
    return executor


#: replicates per task.  Fixed (not derived from the executor), so every backend runs
#: the same replicates in the same order and gives the same numbers.
_BATCH = 32


def _batched(executor, fn, seeds) -> list:
    batches = [seeds[i : i + _BATCH] for i in range(0, len(seeds), _BATCH)]
    return [v for part in executor.map(fn, batches) for v in part]


@dataclass(eq=False)
class _EnvTask:
    """What the environmental-space replicates need (picklable)."""

    nodes: np.ndarray
    shape: tuple
    inv_env: np.ndarray  # (G*G,) 1 / z_env on the support
    available_cov: np.ndarray
    pool: np.ndarray  # equivalency: pooled records; similarity: moved taxon's bg
    n_a: int  # equivalency: size of A; similarity: number of moved records
    fixed_occupancy: np.ndarray | None = None  # similarity only (flat)
    clusters: np.ndarray | None = None  # equivalency by spatial clusters

    def density(self, pts):
        return _record_density(pts, self.nodes, self.available_cov) * self.inv_env


def _equivalency_batch(task: _EnvTask, seeds: list) -> list:
    from screener.randomisation import cluster_permutation

    out = []
    n = len(task.pool)
    observed = np.arange(n) < task.n_a
    for seed in seeds:
        rng = np.random.default_rng(seed)
        if task.clusters is None:
            is_a = observed[rng.permutation(n)]
        else:
            is_a = cluster_permutation(observed, task.clusters, rng)
        if is_a.sum() < 2 or (~is_a).sum() < 2:
            out.append((float("nan"), float("nan")))
            continue
        za = task.density(task.pool[is_a])
        zb = task.density(task.pool[~is_a])
        out.append(_d_i_or_nan(za, zb))
    return out


def _similarity_batch(task: _EnvTask, seeds: list) -> list:
    out = []
    m = len(task.pool)
    for seed in seeds:
        rng = np.random.default_rng(seed)
        idx = rng.choice(m, size=task.n_a, replace=m < task.n_a)
        out.append(_d_i_or_nan(task.fixed_occupancy, task.density(task.pool[idx])))
    return out


def _pattern_similarity_batch(task: _EnvTask, draws: list) -> list:
    return [
        _d_i_or_nan(task.fixed_occupancy, task.density(task.pool[idx])) for idx in draws
    ]


def equivalency_test(
    space: EnvironmentalSpace,
    *,
    n_replicates: int = DEFAULT_REPLICATES,
    random_state=0,
    executor: Executor | None = None,
    cluster_km: float = 0.0,
) -> dict[str, OverlapTest]:
    """Niche equivalency test in environmental space.

    Pools both taxa's records, reassigns them at random keeping both sample sizes,
    and rebuilds both occupancies exactly as the observed ones (each group's own
    kernel bandwidth re-estimated, the shared available environment held fixed),
    ``n_replicates`` times.

    With ``cluster_km > 0`` and record coordinates in ``space``, each taxon's records
    are grouped into its own collecting sites (records chained by gaps of at most
    ``cluster_km``); a site of A and one of B whose centres lie within ``cluster_km``
    are one shared site (:func:`screener.randomisation.permutation_units`).  The
    reassignment keeps these units
    (:func:`screener.randomisation.cluster_permutation`): labels are shuffled among
    the records of a shared site (taxon crossed with site), and sites of one taxon
    change hands whole (site nested in taxon; Anderson & ter Braak 2003).  Records
    sampled together are then not counted as independent evidence; a taxon known
    from two sites is two observations, and the test says so by not rejecting.
    Replicates leaving a taxon fewer than 2 records count as invalid.

    Parameters
    ----------
    space : EnvironmentalSpace
    n_replicates : int, default 999
        Random splits ``R``.
    random_state : None, int or numpy.random.Generator, default 0
        Root of the replicate seeds, all drawn up front (:func:`spawn_seeds`).
    executor : Executor, optional
        Where the replicates run (serial when omitted); the result does not depend on
        it.
    cluster_km : float, default 0
        Longest gap (km) between records of one spatial cluster; 0 = every record is
        its own unit (the published test).

    Returns
    -------
    dict
        ``{"D": OverlapTest, "I": OverlapTest}``, lower tail: a small p means the
        niches are less alike than random splits of the pooled records give (not
        equivalent).

    References
    ----------
    .. [1] Warren, D. L., Glor, R. E. & Turelli, M. (2008). Evolution 62, 2868-2883.
    .. [2] Broennimann, O. et al. (2012). Global Ecology and Biogeography 21, 481-497.
    .. [3] Manly, B. F. J. (2007). Randomization, Bootstrap and Monte Carlo Methods in
       Biology, 3rd ed. Chapman & Hall (restricted permutations of blocks; from
       memory).
    .. [4] Anderson, M. J. & ter Braak, C. J. F. (2003). Journal of Statistical
       Computation and Simulation 73, 85-113 (permute the units a factor varies
       among; from memory).
    """
    n = _check_replicates(n_replicates)
    clusters = None
    if cluster_km > 0 and space.a.xy_records is not None and (
            space.b.xy_records is not None):
        from screener.randomisation import permutation_units

        clusters = permutation_units(
            space.a.xy_records, space.b.xy_records, cluster_km, lonlat=space.lonlat,
        )
    task = _EnvTask(
        nodes=space.nodes,
        shape=space.z_env.shape,
        inv_env=space.inverse_env.ravel(),
        available_cov=space.available_cov,
        pool=np.vstack([space.a.scores_records, space.b.scores_records]),
        n_a=len(space.a.scores_records),
        clusters=clusters,
    )
    values = _batched(
        _resolve_executor(executor),
        partial(_equivalency_batch, task),
        spawn_seeds(random_state, n),
    )
    return _package(
        values,
        environmental_overlap(space),
        test="equivalency",
        space="environmental",
        direction="",
        hypothesis="different",
    )


def similarity_test(
    space: EnvironmentalSpace,
    *,
    direction: str = "ab",
    hypothesis: str = "conserved",
    n_replicates: int = DEFAULT_REPLICATES,
    random_state=0,
    executor: Executor | None = None,
    alternative: str | None = None,
    cluster_km: float = 0.0,
) -> dict[str, OverlapTest]:
    """Niche similarity (background) test in environmental space.

    ``direction="ab"`` keeps A's observed occupancy and compares it with occupancies
    of B's sample size of random points drawn from B's accessible environment
    (``scores_background_b``), each built like B's real one (own bandwidth, shared
    available environment).  ``"ba"`` does the reverse.  When B's records are no
    more than a random draw from its accessible area, its observed D is one more draw
    from this null, so the test is exact.

    With ``cluster_km > 0`` and coordinates in ``space`` (``places``), the random
    records keep the moved taxon's spatial clusters (records chained by gaps of at
    most ``cluster_km``, :func:`screener.randomisation.spatial_clusters`): each
    replicate rotates every cluster about its centre by a random angle, moves it to a
    random place of the accessible area, and takes the accessible cells nearest to
    the moved records (:func:`screener.randomisation.pattern_draws`).  Records
    collected in two clusters are then compared with two random clusters of the same
    shapes, not with scattered points, whose wider spread of environments would make
    any clustered sample look "conserved".  Records without a neighbour within
    ``cluster_km`` are drawn as independent random cells, as in the published test.

    Parameters
    ----------
    space : EnvironmentalSpace
    direction : {"ab", "ba"}, default "ab"
    hypothesis : {"conserved", "diverged"}, default "conserved"
        "conserved": is the overlap higher than the environments explain (upper
        tail)?  "diverged": lower (lower tail)?
    n_replicates : int, default 999
    random_state : None, int or numpy.random.Generator, default 0
    executor : Executor, optional
    alternative : {"greater", "lower"}, optional
        Old name of ``hypothesis``, accepted for one release with a warning.
    cluster_km : float, default 0
        Longest gap (km) inside a spatial cluster of records; 0 = independent random
        records (the published test).

    Returns
    -------
    dict
        ``{"D": OverlapTest, "I": OverlapTest}``.

    References
    ----------
    .. [1] Warren, D. L., Glor, R. E. & Turelli, M. (2008). Evolution 62, 2868-2883.
    .. [2] Broennimann, O. et al. (2012). Global Ecology and Biogeography 21, 481-497.
    .. [3] Fortin, M.-J. & Dale, M. R. T. (2005). Spatial Analysis: A Guide for
       Ecologists. Cambridge University Press (restricted randomisation keeping a
       pattern's spatial structure; from memory).
    """
    hypothesis = _check_hypothesis(hypothesis, alternative)
    n = _check_replicates(n_replicates)
    if direction not in ("ab", "ba"):
        raise InputError(f"direction must be 'ab' or 'ba'; got {direction!r}.")
    fixed, moved = (
        (space.a, space.b) if direction == "ab" else (space.b, space.a)
    )
    task = _EnvTask(
        nodes=space.nodes,
        shape=space.z_env.shape,
        inv_env=space.inverse_env.ravel(),
        available_cov=space.available_cov,
        pool=moved.scores_background,
        n_a=len(moved.scores_records),
        fixed_occupancy=fixed.occupancy.ravel(),
    )
    seeds = spawn_seeds(random_state, n)
    if cluster_km > 0 and space.has_places:
        from screener.randomisation import pattern_draws, spatial_clusters

        draws = pattern_draws(
            moved.xy_records,
            moved.xy_background,
            n,
            random_state=int(seeds[0]),
            lonlat=space.lonlat,
            clusters=spatial_clusters(moved.xy_records, cluster_km, lonlat=space.lonlat),
        )
        values = _batched(
            _resolve_executor(executor), partial(_pattern_similarity_batch, task), draws
        )
    else:
        values = _batched(
            _resolve_executor(executor), partial(_similarity_batch, task), seeds
        )
    return _package(
        values,
        environmental_overlap(space),
        test="similarity",
        space="environmental",
        direction=direction,
        hypothesis=hypothesis,
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


def _geo_equivalency_replicate(fit_predict, pool, n_a, weights, seed, units=None):
    rng = np.random.default_rng(seed)
    if units is None:
        perm = rng.permutation(len(pool))
        cells_a, cells_b = pool[perm[:n_a]], pool[perm[n_a:]]
    else:
        from screener.randomisation import cluster_permutation

        is_a = cluster_permutation(np.arange(len(pool)) < n_a, units, rng)
        if is_a.sum() < 2 or (~is_a).sum() < 2:
            return float("nan"), float("nan")
        cells_a, cells_b = pool[is_a], pool[~is_a]
    try:
        return geographic_overlap(fit_predict(cells_a), fit_predict(cells_b), weights)
    except ValueError:
        return float("nan"), float("nan")


def _geo_similarity_draw(fit_predict, map_fixed, weights, cells):
    try:
        return geographic_overlap(map_fixed, fit_predict(cells), weights)
    except ValueError:
        return float("nan"), float("nan")


def _grid_xy(cells, shape) -> np.ndarray:
    """(column, row) of flat cell indices: positions in cell widths."""
    rows, cols = np.unravel_index(np.asarray(cells, np.intp), shape)
    return np.column_stack([cols, rows]).astype(float)


def _link_cells(cluster_km: float, cell_area_km2, valid) -> float:
    """``cluster_km`` in typical cell widths (square root of the median cell area of
    the ``valid`` cells), the inverse of :func:`screener.randomisation.cluster_link_km`.
    """
    areas = np.asarray(cell_area_km2, float)
    if areas.ndim:
        areas = areas[np.asarray(valid, bool) & np.isfinite(areas)]
    width = math.sqrt(float(np.median(areas))) if areas.size else float("nan")
    if not width > 0:
        raise InputError("cell_area_km2 must be positive where the maps are valid.")
    return float(cluster_km) / width


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
    n_replicates: int = DEFAULT_REPLICATES,
    random_state=0,
    executor: Executor | None = None,
    cluster_km: float = 0.0,
) -> dict[str, OverlapTest]:
    """Niche equivalency test in geographic space, refitting a model per replicate.

    With ``cluster_km > 0`` the split keeps the records' collecting sites, as
    :func:`equivalency_test` does (:func:`screener.randomisation.permutation_units`
    and :func:`~screener.randomisation.cluster_permutation`), with distances measured
    between cell centres on the grid in typical cell widths (the square root of the
    median cell area): sites of one taxon change hands whole, records of a site both
    taxa share are shuffled among themselves.

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
    cluster_km : float, default 0
        Longest gap (km) inside a collecting site; 0 = every record on its own (the
        published test).

    Returns
    -------
    dict
        ``{"D": OverlapTest, "I": OverlapTest}``; the observed values are from
        ``fit_predict`` on the real records, so observed and null come from one model.
        Each replicate costs two fits: see :func:`estimate_seconds`.

    References
    ----------
    .. [1] Warren, D. L., Glor, R. E. & Turelli, M. (2008). Evolution 62, 2868-2883.
    .. [2] Anderson, M. J. & ter Braak, C. J. F. (2003). Journal of Statistical
       Computation and Simulation 73, 85-113 (permute the units a factor varies
       among; from memory).
    """
    ca = _check_cells(cells_a, "cells_a")
    cb = _check_cells(cells_b, "cells_b")
    n = _check_replicates(n_replicates)
    pool = np.concatenate([ca, cb])
    map_a = fit_predict(ca)
    observed = geographic_overlap(map_a, fit_predict(cb), cell_area_km2)
    seeds = spawn_seeds(random_state, n)
    units = None
    if cluster_km > 0:
        from screener.randomisation import permutation_units

        shape = np.shape(map_a)
        link = _link_cells(cluster_km, cell_area_km2, np.isfinite(map_a))
        units = permutation_units(_grid_xy(ca, shape), _grid_xy(cb, shape), link,
                                  lonlat=False)
    fn = partial(_geo_equivalency_replicate, fit_predict, pool, len(ca), cell_area_km2,
                 units=units)
    values = _resolve_executor(executor).map(fn, seeds)
    return _package(
        values,
        observed,
        test="equivalency",
        space="geographic",
        direction="",
        hypothesis="different",
    )


def _geographic_similarity(map_fixed, map_moved, accessible_moved, n_moved, *,
                           fit_predict, weights, direction, tests, random_state,
                           executor, cells_moved=None) -> dict[str, OverlapTest]:
    """The geographic similarity test on maps fitted to the real records; with
    ``tests.cluster_km > 0`` and ``cells_moved`` the random records keep the moved
    records' sites (see :func:`geographic_similarity_test`)."""
    accessible_moved = np.asarray(accessible_moved, bool)
    candidates = np.flatnonzero(accessible_moved.ravel())
    if candidates.size == 0:
        raise InputError("the accessible area of the moved taxon has no cells.")
    observed = geographic_overlap(map_fixed, map_moved, weights)
    seeds = spawn_seeds(random_state, tests.n_replicates)
    if tests.cluster_km > 0 and cells_moved is not None:
        from screener.randomisation import pattern_draws, spatial_clusters

        shape = accessible_moved.shape
        xy = _grid_xy(cells_moved, shape)
        link = _link_cells(tests.cluster_km, weights, np.isfinite(map_fixed))
        draws = pattern_draws(
            xy, _grid_xy(candidates, shape), tests.n_replicates,
            random_state=int(seeds[0]), lonlat=False,
            clusters=spatial_clusters(xy, link, lonlat=False),
        )
        fn = partial(_geo_similarity_draw, fit_predict, np.asarray(map_fixed, float),
                     weights)
        values = _resolve_executor(executor).map(fn, [candidates[d] for d in draws])
    else:
        fn = partial(
            _geo_similarity_replicate,
            fit_predict,
            np.asarray(map_fixed, float),
            candidates,
            int(n_moved),
            weights,
        )
        values = _resolve_executor(executor).map(fn, seeds)
    return _package(
        values,
        observed,
        test="similarity",
        space="geographic",
        direction=direction,
        hypothesis=tests.hypothesis,
    )


def _old_geographic_similarity_test(
    fit_predict, map_fixed, accessible_moved, n_moved, cell_area_km2, *,
    observed_map_moved=None, direction="ab", executor=None, **options,
):
    """The old form of :func:`geographic_similarity_test`, on maps already fitted
    (``options``: ``hypothesis``, ``n_replicates``, ``random_state``,
    ``alternative``)."""
    kwargs = dict(options)
    said = _fold_old_keywords("geographic_similarity_test", kwargs)
    tests = kwargs.pop("test_parameters", None) or OverlapTestParameters()
    if kwargs:
        raise TypeError(
            f"geographic_similarity_test() got unexpected arguments {sorted(kwargs)}")
    warnings.warn(
        _old_form_message("geographic_similarity_test", [
            "write geographic_similarity_test(fit_predict, a, b, cell_area_km2, "
            "direction=...) with one OverlapTaxon(name, cells=..., accessible=...) per "
            "taxon (the observed maps are fit_predict on the records' cells) instead "
            "of map_fixed, accessible_moved, n_moved and observed_map_moved=", said]),
        ScreenerDeprecationWarning,
        stacklevel=3,
    )
    if observed_map_moved is None:
        raise InputError(
            "observed_map_moved (the map fitted to the real records) is needed."
        )
    return _geographic_similarity(
        map_fixed, observed_map_moved, accessible_moved, n_moved,
        fit_predict=fit_predict, weights=cell_area_km2, direction=direction,
        tests=tests, random_state=tests.random_state, executor=executor,
    )


def _runs_old_form(old):
    """Decorator: calls whose second argument is not an :class:`OverlapTaxon` are the
    old form, which cannot be written in the new one (it takes maps already fitted);
    ``old`` runs them, with a warning."""

    def decorate(function):
        @wraps(function)
        def wrapper(*args, **kwargs):
            a = args[1] if len(args) > 1 else kwargs.get("a")
            if isinstance(a, OverlapTaxon):
                return function(*args, **kwargs)
            return old(*args, **kwargs)

        return wrapper

    return decorate


@_runs_old_form(_old_geographic_similarity_test)
def geographic_similarity_test(
    fit_predict: Callable[[np.ndarray], np.ndarray],
    a: OverlapTaxon,
    b: OverlapTaxon,
    cell_area_km2,
    *,
    direction: str = "ab",
    test_parameters: OverlapTestParameters | None = None,
    executor: Executor | None = None,
) -> dict[str, OverlapTest]:
    """Niche similarity (background) test in geographic space.

    ``direction="ab"`` keeps A's map and compares it with maps fitted to as many
    cells as B has records, drawn at random (without replacement when possible)
    from B's accessible area; ``"ba"`` does the reverse.  The observed overlap is
    that of ``fit_predict`` on each taxon's real records, so observed and null come
    from one model (as in :func:`geographic_equivalency_test`).

    The old form ``geographic_similarity_test(fit_predict, map_fixed,
    accessible_moved, n_moved, cell_area_km2, observed_map_moved=...,
    hypothesis=..., n_replicates=..., random_state=...)`` still works for one
    release, with a :class:`~screener.errors.ScreenerDeprecationWarning` that says
    what to write.

    Parameters
    ----------
    fit_predict : callable
        As :func:`geographic_equivalency_test`.
    a, b : OverlapTaxon
        The two taxa, each with ``cells`` (flat grid indices of its records); the
        moved taxon also with ``accessible`` (bool map of its accessible area).
        Their ``map`` is not used.
    cell_area_km2 : ndarray (n_rows, n_cols) or float
        Cell areas in km² (weights for D and I).
    direction : {"ab", "ba"}, default "ab"
        Which taxon's map is kept: "ab" keeps A and moves B's records.
    test_parameters : OverlapTestParameters, optional
        ``n_replicates``, ``hypothesis``, ``random_state`` and ``cluster_km`` are
        used.  With ``cluster_km > 0`` the random records keep the moved taxon's
        collecting sites, as in :func:`similarity_test`: each replicate rotates every
        site (records chained by gaps of at most ``cluster_km``) about its centre,
        moves it to a random cell of the accessible area and takes the accessible
        cells nearest to the moved records
        (:func:`screener.randomisation.pattern_draws`); positions are cell centres in
        typical cell widths (the square root of the median cell area), so on a
        longitude/latitude grid far from the equator the shapes are kept in cells,
        not in km.
    executor : Executor, optional
        As :func:`similarity_test`.

    Returns
    -------
    dict
        ``{"D": OverlapTest, "I": OverlapTest}``.

    References
    ----------
    .. [1] Warren, D. L., Glor, R. E. & Turelli, M. (2008). Evolution 62, 2868-2883.
    .. [2] Fortin, M.-J. & Dale, M. R. T. (2005). Spatial Analysis: A Guide for
       Ecologists. Cambridge University Press (restricted randomisation keeping a
       pattern's spatial structure; from memory).
    """
    tests = test_parameters or OverlapTestParameters()
    if direction not in ("ab", "ba"):
        raise InputError(f"direction must be 'ab' or 'ba'; got {direction!r}.")
    fixed, moved = (a, b) if direction == "ab" else (b, a)
    for taxon in (a, b):
        if taxon.cells is None:
            raise InputError(f"taxon {taxon.name} needs `cells` (its records' cells).")
    if moved.accessible is None:
        raise InputError(
            f"taxon {moved.name} needs `accessible` (its accessible area): its "
            "random records are drawn from it."
        )
    cells_fixed = _check_cells(fixed.cells, f"cells of {fixed.name}")
    cells_moved = _check_cells(moved.cells, f"cells of {moved.name}")
    return _geographic_similarity(
        fit_predict(cells_fixed), fit_predict(cells_moved), moved.accessible,
        len(cells_moved), fit_predict=fit_predict, weights=cell_area_km2,
        direction=direction, tests=tests, random_state=tests.random_state,
        executor=executor, cells_moved=cells_moved,
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
# Multiplicity
# ======================================================================================
def holm_adjust(p_values) -> np.ndarray:
    """Holm's step-down adjusted p-values (family-wise error control).

    With the ``m`` finite p-values sorted ascending, ``p_(1) <= ... <= p_(m)``, the
    adjusted values are ``max_{j <= i} min(1, (m - j + 1) p_(j))``, returned in the
    input order; NaN entries stay NaN and do not count in ``m``.  Rejecting every
    hypothesis whose adjusted p is below ``alpha`` keeps the chance of any false
    rejection at most ``alpha``, whatever the dependence between the tests.

    Parameters
    ----------
    p_values : array_like of float

    Returns
    -------
    ndarray of float, same shape

    References
    ----------
    .. [1] Holm, S. (1979). A simple sequentially rejective multiple test procedure.
       Scandinavian Journal of Statistics 6, 65-70.

    Examples
    --------
    >>> holm_adjust([0.01, 0.04, 0.03]).round(3).tolist()
    [0.03, 0.06, 0.06]
    """
    p = np.asarray(p_values, float)
    out = np.full(p.shape, np.nan)
    flat = p.ravel()
    ok = np.flatnonzero(np.isfinite(flat))
    m = ok.size
    if m == 0:
        return out
    order = ok[np.argsort(flat[ok], kind="stable")]
    scaled = np.minimum(1.0, (m - np.arange(m)) * flat[order])
    adjusted = np.maximum.accumulate(scaled)
    res = out.ravel()
    res[order] = adjusted
    return res.reshape(p.shape)


#: The tests of a space, as (attribute, label) pairs.
_TESTS = (("equivalency", "equivalency"), ("similarity_ab", "similarity"),
          ("similarity_ba", "similarity"))


def correct_for_multiplicity(comparisons, alpha: float = 0.05) -> int:
    """Holm-adjust the D p-values of every pair, test and space of a run, in place.

    Each :class:`PairComparison` gets ``holm`` (``{(space, test): adjusted p}``),
    ``n_tests_in_run`` and ``alpha``; its rows and plain reading then use them.

    Parameters
    ----------
    comparisons : list of PairComparison
    alpha : float, default 0.05
        Family-wise error rate of the reading.

    Returns
    -------
    int
        ``m``, the number of p-values corrected for.

    References
    ----------
    .. [1] Holm, S. (1979). Scandinavian Journal of Statistics 6, 65-70.
    """
    keys, values = [], []
    for k, cmp in enumerate(comparisons):
        for sc in (cmp.geographic, cmp.environmental):
            if sc is None:
                continue
            for attr, _ in _TESTS:
                p = sc.p(attr)
                if math.isfinite(p):
                    keys.append((k, sc.space, attr))
                    values.append(p)
    adjusted = holm_adjust(values)
    for cmp in comparisons:
        cmp.holm = {}
        cmp.n_tests_in_run = len(values)
        cmp.alpha = float(alpha)
    for (k, space, attr), q in zip(keys, adjusted):
        comparisons[k].holm[(space, attr)] = float(q)
    return len(values)


# ======================================================================================
# One pair, end to end
# ======================================================================================
@dataclass(eq=False)
class SpaceComparison:
    """Overlap of a pair in one space, with the tests that were run (None if not).

    ``D`` and ``I`` are the overlap of the maps (or occupancies) that are reported.
    In geographic space the tests refit a model per replicate, so their observed
    statistic can differ from the reported maps' D; it is kept as ``D_tested``.
    """

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
    analogue_share_a: float = float("nan")
    analogue_share_b: float = float("nan")

    def test(self, name: str, statistic: str = "D") -> OverlapTest | None:
        result = getattr(self, name)
        return None if result is None else result[statistic]

    def p(self, test: str, statistic: str = "D") -> float:
        """p-value of ``test`` ("equivalency", "similarity_ab", "similarity_ba")."""
        t = self.test(test, statistic)
        return float("nan") if t is None else float(t.p_value)

    @property
    def D_tested(self) -> float:
        """The D the tests compared with their null (NaN when no test ran).

        Every test of a space shares it: in geographic space it is the D of the two
        maps refitted by the tests' model to the real records.
        """
        for name, _ in _TESTS:
            t = self.test(name)
            if t is not None:
                return float(t.observed)
        return float("nan")


def _pct(x: float) -> str:
    return f"{100 * x:.0f} %"


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
        The shared environmental grid, occupancies and densities (for figures).
    n_replicates : int
        Replicates requested per test.
    hypothesis : str
        What the similarity tests ask: "conserved" or "diverged".
    holm : dict
        ``{(space, test): Holm-adjusted p}`` over every p-value of the run (see
        :func:`correct_for_multiplicity`; :func:`compare_pair` fills it for the pair
        alone).
    n_tests_in_run : int
        Number of p-values the correction covered.
    alpha : float
        Family-wise error rate of the reading.
    """

    taxon_a: str
    taxon_b: str
    geographic: SpaceComparison
    environmental: SpaceComparison | None
    space: EnvironmentalSpace | None
    n_replicates: int
    hypothesis: str
    holm: dict = field(default_factory=dict)
    n_tests_in_run: int = 0
    alpha: float = 0.05

    @property
    def alternative(self) -> str:
        """Old name of :attr:`hypothesis` ('greater' / 'lower')."""
        return {"conserved": "greater", "diverged": "lower"}[self.hypothesis]

    def spaces(self) -> list[SpaceComparison]:
        return [sc for sc in (self.geographic, self.environmental) if sc is not None]

    def rows(self) -> list[dict]:
        """Rows of ``overlap.csv`` (:data:`OVERLAP_COLUMNS`), one per space.

        p-values are for D; NaN where a test was not run.
        """
        out = []
        nan = float("nan")
        for sc in self.spaces():
            row = {
                "taxon_a": self.taxon_a,
                "taxon_b": self.taxon_b,
                "space": sc.space,
                "D": sc.D,
                "I": sc.I,
                "D_tested": sc.D_tested,
            }
            for attr, _ in _TESTS:
                t = sc.test(attr)
                key = attr.replace("similarity_", "similarity_p_") if attr != (
                    "equivalency") else "equivalency_p"
                row[key] = nan if t is None else t.p_value
                row[f"{key}_se"] = nan if t is None else t.p_se
                row[f"{key}_replicates"] = 0 if t is None else t.n_valid
                row[f"{key}_holm"] = self.holm.get((sc.space, attr), nan)
            row.update(
                breadth_a=sc.breadth_a,
                breadth_b=sc.breadth_b,
                stability=sc.stability,
                expansion=sc.expansion,
                unfilling=sc.unfilling,
                analogue_share_a=sc.analogue_share_a,
                analogue_share_b=sc.analogue_share_b,
                n_replicates=self.n_replicates,
                similarity_hypothesis=self.hypothesis,
            )
            out.append({k: row[k] for k in OVERLAP_COLUMNS})
        return out

    def _p_words(self, sc, attr) -> str:
        t = sc.test(attr)
        q = self.holm.get((sc.space, attr), float("nan"))
        txt = f"{t.p_text()} from {t.n_valid} replicates"
        if math.isfinite(q):
            txt += f", {format_p(q, t.n_valid).replace('p', 'corrected p', 1)}"
        return txt

    def plain_reading(self, alpha: float | None = None) -> str:
        """A short reading of the result in plain words, naming the test behind it.

        A claim is made only when its Holm-corrected p-value (over every p-value of
        the run) is below ``alpha``; the reading says how many p-values the
        correction covered and what it changed.
        """
        alpha = self.alpha if alpha is None else float(alpha)
        a, b = self.taxon_a, self.taxon_b
        main = self.environmental if self.environmental is not None else self.geographic
        where = "environmental space" if main.space == "environmental" else "on the map"
        parts = [f"{a} and {b} ({where}): D = {main.D:.2f}, I = {main.I:.2f}."]
        claims, raw_small, tested = [], 0, 0
        for sc in self.spaces():
            label = "environmental space" if sc.space == "environmental" else (
                "geographic space")
            for attr, kind in _TESTS:
                t = sc.test(attr)
                if t is None:
                    continue
                tested += 1
                raw_small += t.p_value < alpha
                q = self.holm.get((sc.space, attr), t.p_value)
                if not q < alpha:
                    continue
                words = self._p_words(sc, attr)
                if kind == "equivalency":
                    claims.append(
                        f"their niches are not equivalent in {label} (equivalency "
                        f"test, {words})"
                    )
                else:
                    moved = b if attr.endswith("ab") else a
                    fixed = a if attr.endswith("ab") else b
                    how = "more" if self.hypothesis == "conserved" else "less"
                    claims.append(
                        f"{fixed}'s niche is {how} like {moved}'s than random records "
                        f"from {moved}'s accessible area are, in {label} (similarity "
                        f"test, {words})"
                    )
        if not tested:
            parts.append("No test was run, so the overlap value stands alone.")
        elif claims:
            text = "; ".join(claims)
            parts.append(text[0].upper() + text[1:] + ".")
        else:
            shown = []
            for sc in self.spaces():
                for attr, _ in _TESTS:
                    t = sc.test(attr)
                    if t is not None and sc is main:
                        name = attr.replace("_ab", f" {a} vs {b}").replace(
                            "_ba", f" {b} vs {a}")
                        shown.append(f"{name} {t.p_text()}")
            parts.append(
                "The tests do not tell their niches apart from chance with these "
                "records (" + "; ".join(shown) + "); few records give the tests "
                "little power, so this is not evidence that the niches are the same."
            )
            for sc in self.spaces():
                t = sc.test("equivalency")
                if t is not None and t.tie_share >= alpha:
                    label = ("environmental space" if sc.space == "environmental"
                             else "geographic space")
                    parts.append(
                        f"In {label} {_pct(t.tie_share)} of the equivalency test's "
                        "random splits gave back the observed split of the records' "
                        "collecting sites (too few sites per taxon), so that test "
                        f"could not reach p < {alpha:g} however different the niches."
                    )
        m = self.n_tests_in_run
        if m and tested:
            kept = len(claims)
            parts.append(
                f"Holm's correction covered the {m} p-values of this run: {raw_small} "
                f"of this pair's {tested} raw p-values were below {alpha:g}, {kept} "
                "stayed below it after correction."
            )
            floors = [
                t.p_floor for sc in self.spaces() for attr, _ in _TESTS
                if (t := sc.test(attr)) is not None
            ]
            if floors and min(floors) > alpha / m:
                parts.append(
                    f"With {self.n_replicates} replicates the smallest possible p "
                    f"({min(floors):.2g}) is above the strictest corrected threshold "
                    f"({alpha / m:.2g}); raise [overlap] n_replicates for tests that "
                    "can reach it."
                )
        env = self.environmental
        if env is not None:
            for name, share in ((a, env.analogue_share_a), (b, env.analogue_share_b)):
                if math.isfinite(share) and share < ANALOGUE_SHARE_WARNING:
                    parts.append(
                        f"None of {name}'s records lie in environment available to "
                        "both taxa, so stability, expansion and unfilling say nothing "
                        "about its records." if _pct(share) == "0 %" else
                        f"Only {_pct(share)} of {name}'s records lie in environment "
                        "available to both taxa, so stability, expansion and "
                        "unfilling describe few of its records."
                    )
        parts.append(
            "Using one taxon's niche to look for relatives of the other is a "
            "hypothesis to check in the field, not proof that they occur there."
        )
        return " ".join(parts)


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


#: Old keyword arguments of :func:`compare_pair`, one per taxon (``map_a``, ...).
_OLD_PAIR_KEYWORDS = ("map", "env_records", "env_background", "cells", "accessible")


def _taxa_from_old_keywords(name_a, name_b, kwargs: dict):
    """The two taxa of ``compare_pair(name_a, name_b, map_a=..., places=...)`` (the
    old form; its keywords are removed from ``kwargs``)."""
    per_taxon = {k: kwargs.pop(k) for k in list(kwargs)
                 if k in {f"{n}_{w}" for n in _OLD_PAIR_KEYWORDS for w in "ab"}}
    places = kwargs.pop("places", None) or (None,) * 4
    return tuple(
        OverlapTaxon(
            name=name,
            map=per_taxon.get(f"map_{w}"),
            env_records=per_taxon.get(f"env_records_{w}"),
            env_background=per_taxon.get(f"env_background_{w}"),
            xy_records=places[k],
            xy_background=places[2 + k],
            cells=per_taxon.get(f"cells_{w}"),
            accessible=per_taxon.get(f"accessible_{w}"),
        )
        for k, (name, w) in enumerate(((name_a, "a"), (name_b, "b")))
    )


_PAIR_KEYWORDS = {"a", "b", "shared", "test_parameters", "space_parameters",
                  "executor", "geographic_fit_predict"}


def _compare_pair_old_form(*args, **kwargs):
    """Translator for :func:`screener.errors.accepts_old_form`: ``compare_pair``
    with one keyword per option (``cell_area_km2=``, ``n_replicates=``, ...) or per
    taxon and value (``compare_pair(name_a, name_b, map_a=...)``) in the new form."""
    a = args[0] if args else kwargs.get("a")
    if isinstance(a, OverlapTaxon) and set(kwargs) <= _PAIR_KEYWORDS:
        return None
    kwargs = dict(kwargs)
    parts = []
    if not isinstance(a, OverlapTaxon):
        names = list(args[:2]) + [kwargs.pop(k) for k in ("a", "b") if k in kwargs]
        if len(names) != 2 or len(args) > 2:
            raise TypeError("compare_pair() takes two taxa")
        args = _taxa_from_old_keywords(*names, kwargs)
        parts.append(
            "write compare_pair(a, b) with one OverlapTaxon(name, map=..., "
            "env_records=..., env_background=..., xy_records=..., xy_background=..., "
            "cells=..., accessible=...) per taxon instead of name_a, name_b, map_a=, "
            "..., places="
        )
    return _old_call("compare_pair", args, kwargs, _PAIR_KEYWORDS, parts)


@accepts_old_form(_compare_pair_old_form)
def compare_pair(
    a: OverlapTaxon,
    b: OverlapTaxon,
    *,
    shared: SharedSpace | None = None,
    test_parameters: OverlapTestParameters | None = None,
    space_parameters: EnvironmentalSpaceParameters | None = None,
    executor: Executor | None = None,
    geographic_fit_predict: Callable[[np.ndarray], np.ndarray] | None = None,
) -> PairComparison:
    """Overlap, breadth, dynamics and tests for one pair of taxa.

    The old forms, one keyword per option (``cell_area_km2=``, ``n_replicates=``,
    ``grid_cells=``, ...) and ``compare_pair(name_a, name_b, map_a=..., ...)``,
    still work for one release, with a
    :class:`~screener.errors.ScreenerDeprecationWarning` that says what to write.

    Parameters
    ----------
    a, b : OverlapTaxon
        The two taxa (maps on one grid; records, backgrounds and coordinates as far
        as known).  The environmental row is skipped unless both taxa have records
        and background rows.
    shared : SharedSpace
        What the pair shares: cell areas in km² (required), the shared available
        environment (see :func:`environmental_space`), predictor names and whether
        coordinates are longitude, latitude.
    test_parameters : OverlapTestParameters, optional
        Replicates, hypothesis, alpha, seed, spatial clusters and the geographic
        budget of the tests (defaults of ``[overlap]``).  The pair's p-values are
        Holm-corrected among themselves (:func:`correct_for_multiplicity` corrects a
        whole run).
    space_parameters : EnvironmentalSpaceParameters, optional
        How the environmental space is built (grid cells along each axis, ...).
    executor : Executor, optional
        Where the replicates run (serial when omitted); the result does not depend
        on it.
    geographic_fit_predict : callable, optional
        ``fit_predict(cells) -> map`` for the geographic tests; they run only when it
        and both taxa's ``cells`` are given (similarity also needs both
        ``accessible``) and :func:`estimate_seconds` stays within
        ``test_parameters.geographic_budget_s``.

    Returns
    -------
    PairComparison

    Examples
    --------
    >>> y, x = np.mgrid[0:20, 0:20]
    >>> a = OverlapTaxon("A", map=np.exp(-((x - 6) ** 2 + (y - 6) ** 2) / 20.0))
    >>> b = OverlapTaxon("B", map=np.exp(-((x - 9) ** 2 + (y - 8) ** 2) / 20.0))
    >>> pair = compare_pair(a, b, shared=SharedSpace(cell_area_km2=1.0))
    >>> round(pair.geographic.D, 2)
    0.58
    """
    shared = shared or SharedSpace()
    tests = test_parameters or OverlapTestParameters()
    if shared.cell_area_km2 is None:
        raise InputError(
            "compare_pair() needs the cell areas: shared=SharedSpace(cell_area_km2=...) "
            "(km², one per cell or one for all)."
        )
    n = tests.n_replicates
    ma, mb, w = _validate_map_pair(a.map, b.map, shared.cell_area_km2)
    seeds = spawn_seeds(tests.random_state, 6)
    d, i = geographic_overlap(ma, mb, w)
    geo = SpaceComparison(
        "geographic", d, i, levins_breadth(ma, w), levins_breadth(mb, w)
    )
    ex = _resolve_executor(executor)
    if geographic_fit_predict is not None and a.cells is not None and (
            b.cells is not None):
        _geographic_tests(geo, a, b, w, geographic_fit_predict, tests, seeds, ex)
    env = None
    space = None
    if a.has_environment and b.has_environment:
        space = environmental_space(
            a, b, shared=shared, space_parameters=space_parameters)
        d, i = environmental_overlap(space)
        ba, bb = niche_breadth(space)
        env = SpaceComparison("environmental", d, i, ba, bb, **niche_dynamics(space))
        env.equivalency = equivalency_test(
            space, n_replicates=n, random_state=seeds[3], executor=ex,
            cluster_km=tests.cluster_km,
        )
        for direction, seed in (("ab", seeds[4]), ("ba", seeds[5])):
            setattr(
                env,
                f"similarity_{direction}",
                similarity_test(
                    space,
                    direction=direction,
                    hypothesis=tests.hypothesis,
                    n_replicates=n,
                    random_state=seed,
                    executor=ex,
                    cluster_km=tests.cluster_km,
                ),
            )
    out = PairComparison(a.name, b.name, geo, env, space, n, tests.hypothesis)
    correct_for_multiplicity([out], tests.alpha)
    return out


def _geographic_tests(geo, a, b, w, fit_predict, tests, seeds, ex):
    """Run the geographic tests of a pair into ``geo`` unless slower than budget."""
    n = tests.n_replicates
    n_fits = 2 * n
    if a.accessible is not None and b.accessible is not None:
        n_fits += 2 * n
    est = estimate_seconds(
        fit_predict, a.cells, n_fits, fits_per_replicate=1,
        n_workers=getattr(ex, "n_workers", 1),
    )
    if est > tests.geographic_budget_s:
        log.info(
            "geographic tests for %s / %s skipped: about %.0f s expected, budget "
            "%.0f s", a.name, b.name, est, tests.geographic_budget_s,
        )
        return
    geo.equivalency = geographic_equivalency_test(
        fit_predict, a.cells, b.cells, w, n_replicates=n, random_state=seeds[0],
        executor=ex, cluster_km=tests.cluster_km,
    )
    if a.accessible is None or b.accessible is None:
        return
    fit_a = fit_predict(_check_cells(a.cells, "cells_a"))
    fit_b = fit_predict(_check_cells(b.cells, "cells_b"))
    common = dict(tests=tests, executor=ex, fit_predict=fit_predict, weights=w)
    geo.similarity_ab = _geographic_similarity(
        fit_a, fit_b, b.accessible, len(b.cells), direction="ab",
        random_state=seeds[1], cells_moved=_check_cells(b.cells, "cells_b"), **common,
    )
    geo.similarity_ba = _geographic_similarity(
        fit_b, fit_a, a.accessible, len(a.cells), direction="ba",
        random_state=seeds[2], cells_moved=_check_cells(a.cells, "cells_a"), **common,
    )


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
