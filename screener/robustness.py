"""Robustness of the plan to the records: refits on bootstrap resamples.

A site found with one set of records might not be found with another equally likely
set.  Each replicate draws, for every taxon, as many records as it has with
replacement (a bootstrap resample [1]_), refits the model, maps it, sets the threshold
from the resampled records (minimum training presence, relaxed by ``relax`` when the
run uses the relaxed threshold), finds the candidate sites again and ranks them.  For
each site of the plan, three shares over the replicates:

``refit_suitable``
    at least half of the site's area is suitable in the refit;
``refit_isolated``
    the refit's site that covers most of the plan site's area is ``isolated``;
``refit_top_k``
    that refit site ranks within the top ``top_k`` of the refit's own ranking.

The refits use one model family (the run's first) rather than the whole ensemble, and
the refit ranking has no access or survey component (those do not depend on the
records): the shares say how much a site rests on particular records, not what the
full run would give.  Replicates are independent tasks for the run's executor.

References
----------
.. [1] Efron, B. & Tibshirani, R. J. (1993). An Introduction to the Bootstrap.
   Chapman & Hall, New York.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass
from functools import partial

import numpy as np

from screener.grid import Grid
from screener.isolation import IsolationParameters

__all__ = ["RefitPlan", "record_resampling", "refit_replicate"]

log = logging.getLogger(__name__)

#: Default number of bootstrap refits.
N_REFITS = 20


@dataclass(frozen=True, eq=False)
class RefitPlan:
    """Everything one replicate needs (picklable, sent to executor workers).

    Attributes
    ----------
    grid : Grid
    values : ndarray, shape (n_valid, n_layers)
        Predictor values of the valid cells, in raster order.
    family : str
        Model family refitted.
    params : dict
        Its parameters (without a seed; each replicate adds its own where taken).
    records : dict of str to tuple (rows, cols)
    background : dict of str to ndarray (n_background, n_layers)
    relax : float
        Relaxed threshold = MTP x (1 - relax).
    use : {"mtp", "relaxed"}
        Threshold that defines suitable cells.
    isolation : screener.isolation.IsolationParameters
        Parameters of the isolation stage.
    site_labels : ndarray of int, shape (n_rows, n_cols)
        The plan's sites by rank (1..n_sites) on their cells, <= 0 elsewhere.
    n_sites : int
    top_k : int
    weights : dict or None
        Ranking weights.
    seeded : bool
        Whether the family takes a ``random_state``.
    """

    grid: Grid
    values: np.ndarray
    family: str
    params: dict
    records: dict
    background: dict
    relax: float
    use: str
    isolation: IsolationParameters
    site_labels: np.ndarray
    n_sites: int
    top_k: int
    weights: dict | None = None
    seeded: bool = False

    @classmethod
    def for_plan(cls, settings, stack, taxa, site_labels, n_sites: int) -> RefitPlan:
        """The refits a run's settings ask for, of the plan's ``n_sites`` sites.

        Parameters
        ----------
        settings : screener.project.Settings
            The first family of ``[models] families`` is refitted with its
            ``[models.<family>]`` parameters; ``[thresholds]``, ``[ranking]`` and
            the isolation settings are those of the run.
        stack : screener.layers.LayerStack
            The predictor layers.
        taxa : mapping of str to screener.results.TaxonResult
            Each taxon's records (``.records.rows``, ``.records.cols``) and background
            in environmental space (``.background_env``).
        site_labels : ndarray of int, shape (n_rows, n_cols)
            The plan's sites by rank (1..n_sites) on their cells, <= 0 elsewhere.
        n_sites : int
        """
        from screener.models import accepts_random_state, family_params

        family = settings.models.families[0]
        use = settings.thresholds.use
        other = "relaxed" if use == "mtp" else "mtp"
        return cls(
            grid=stack.grid,
            values=stack.valid_matrix(),
            family=family,
            params=family_params(settings, family),
            records={k: (t.records.rows, t.records.cols) for k, t in taxa.items()},
            background={k: t.background_env for k, t in taxa.items()},
            relax=settings.thresholds.relax,
            use=use,
            isolation=IsolationParameters.from_settings(
                settings, threshold_names=(use, other)),
            site_labels=site_labels,
            n_sites=int(n_sites),
            top_k=settings.ranking.top_k,
            weights=settings.ranking.weights or None,
            seeded=accepts_random_state(family),
        )


def refit_replicate(plan: RefitPlan, seed: int) -> np.ndarray:
    """One bootstrap replicate.

    Returns
    -------
    ndarray of bool, shape (3, n_sites)
        Per plan site (by rank): stays suitable, stays isolated, stays in the top k.
    """
    from screener.isolation import Clade, find_candidates, suitable_cells
    from screener.models import make_model
    from screener.ranking import rank_sites

    grid = plan.grid
    rng = np.random.default_rng(seed)
    valid = grid.mask
    pos = np.full(grid.n_cells, -1, dtype=np.int64)
    pos[np.flatnonzero(valid.ravel())] = np.arange(int(valid.sum()))
    maps, thresholds, recs = {}, {}, {}
    for taxon, (rows, cols) in plan.records.items():
        rows, cols = np.asarray(rows), np.asarray(cols)
        pick = rng.integers(0, rows.size, rows.size)
        r, c = rows[pick], cols[pick]
        at = pos[r * grid.n_cols + c]
        ok = at >= 0
        params = dict(plan.params)
        if plan.seeded:
            params["random_state"] = int(rng.integers(2**31 - 1))
        model = make_model(plan.family, **params).fit(
            plan.values[at[ok]].astype(np.float64), plan.background[taxon]
        )
        m = np.full(grid.shape, np.nan, dtype=np.float32)
        m[valid] = model.predict(plan.values).astype(np.float32)
        mtp = float(np.nanmin(m[r[ok], c[ok]]))
        maps[taxon] = m
        thresholds[taxon] = mtp * (1.0 - plan.relax) if plan.use == "relaxed" else mtp
        recs[taxon] = (r[ok], c[ok])
    cs = find_candidates(Clade(grid, maps, recs), thresholds, parameters=plan.isolation)
    out = np.zeros((3, plan.n_sites), dtype=bool)
    lab = np.asarray(plan.site_labels)
    here = lab > 0
    area = np.broadcast_to(np.asarray(grid.cell_area_km2, float), grid.shape)[here]
    k = lab[here].astype(np.int64) - 1
    site_area = np.bincount(k, weights=area, minlength=plan.n_sites)
    suit = suitable_cells(grid, maps, thresholds)[here]
    s_area = np.bincount(k, weights=area * suit, minlength=plan.n_sites)
    with np.errstate(invalid="ignore", divide="ignore"):
        out[0] = s_area >= 0.5 * site_area
    if not len(cs.sites):
        return out
    ranked = rank_sites(cs.sites, plan.weights, top_k=plan.top_k, n_draws=0)
    n_new = int(cs.sites["site_id"].max())
    kind = np.zeros(n_new + 1, dtype=bool)
    top = np.zeros(n_new + 1, dtype=bool)
    ids = ranked["site_id"].to_numpy(int)
    kind[ids] = (ranked["kind"] == "isolated").to_numpy()
    top[ids] = ranked["rank"].to_numpy() <= plan.top_k
    new = np.asarray(cs.patch_labels)[here]
    j = np.where(new > 0, new, 0).astype(np.int64)
    # the refit site covering most of each plan site's area (0: none)
    overlap = np.zeros((plan.n_sites, n_new + 1))
    np.add.at(overlap, (k, j), area)
    overlap[:, 0] = 0.0
    best = np.argmax(overlap, axis=1)
    has = overlap[np.arange(plan.n_sites), best] > 0
    out[1] = has & kind[best]
    out[2] = has & top[best]
    return out


def record_resampling(plan: RefitPlan, n_refits: int = N_REFITS, *, random_state=0,
                      map_fn=map) -> np.ndarray:
    """Shares of bootstrap refits in which each plan site stays suitable, isolated and
    in the top k.

    Parameters
    ----------
    plan : RefitPlan
    n_refits : int, default 20
    random_state : int
        Seeds of the replicates are drawn up front from this generator.
    map_fn : callable, default builtin map
        ``map``-like callable of an executor; each replicate is one task.

    Returns
    -------
    ndarray of float, shape (3, n_sites)
        Rows: ``refit_suitable``, ``refit_isolated``, ``refit_top_k``.
    """
    if n_refits <= 0 or plan.n_sites == 0:
        return np.full((3, plan.n_sites), np.nan)
    seeds = np.random.default_rng(random_state).integers(0, 2**31 - 1, n_refits).tolist()
    results = list(map_fn(partial(refit_replicate, plan), seeds))
    log.info("record resampling: %d refits", len(results))
    return np.mean(np.stack(results), axis=0)
