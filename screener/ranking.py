"""Rank candidate sites for survey, and merge neighbouring sites into blocks.

The score is a weighted sum of named components, each scaled to [0, 1] with 1 = more
worth a visit:

============  ====================================  =====================================
component     from column                           direction and scaling
============  ====================================  =====================================
suitability   ``niche_fit`` (else                   higher is better; used as is
              ``mean_suitability``)
isolation     ``gap_km``                            longer gap is better;
                                                    ``log1p`` then min-max over the sites
agreement     ``agreement``                         more model families agree; as is
area          ``area_km2``                          larger is better; ``log`` min-max
novelty       ``novel_share``                       penalty: ``1 - share of cells with
                                                    MESS < 0`` (extrapolated = less sure)
survey_gap    ``nearest_record_km`` and surveys     farther from every record and survey
                                                    is better; ``log1p`` min-max
access        ``walk_hours``                        fewer hours is better; reversed
                                                    min-max
isolation_    ``n_slices_isolated`` / ``n_slices``  isolated in more time slices is
history       (runs with time slices only)          better; the share, as is
============  ====================================  =====================================

Min-max scaling maps the lowest value among the sites to 0 and the highest to 1 (all
equal: 0.5).  A component whose column is absent or all NaN is dropped and the other
weights are renormalised; a NaN in one site counts as 0 for that component.

Default weights and why: suitability 0.25 (the model is the main evidence),
isolation 0.20 (long gaps are where unknown lineages are most likely), survey_gap 0.15
(unsurveyed ground adds the most information), agreement 0.15 (sites all model
families call suitable are less model-dependent), area 0.10 (large patches hold larger,
easier to find populations), novelty 0.10 (penalise extrapolation), access 0.05 (a
tie-breaker: remote sites are not worse biologically, only costlier).  With time
slices, isolation_history 0.15 (a patch cut off through past climates is a stronger
candidate for an old, unrecorded lineage than one joined to a known range in a cold
period); without them the component has no data and drops out, so runs without slices
rank as before.

Ranks are hypotheses for planning.  A top rank is not a prediction that anything will
be found; remote sites need safety planning, permits and consent, and new finds of
threatened taxa need their coordinates generalised before sharing.
"""

from __future__ import annotations

import logging

import numpy as np
import pandas as pd
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components

from screener.errors import InputError
from screener.grid import geodesic_distance_km
from screener.project import default

__all__ = [
    "DEFAULT_WEIGHTS",
    "assign_site_ids",
    "component_scores",
    "group_sites",
    "rank_sites",
    "site_ids",
    "site_keys",
    "survey_distance_km",
]

log = logging.getLogger(__name__)

DEFAULT_WEIGHTS = {
    "suitability": 0.25,
    "isolation": 0.20,
    "survey_gap": 0.15,
    "agreement": 0.15,
    "area": 0.10,
    "novelty": 0.10,
    "access": 0.05,
    "isolation_history": 0.15,
}

#: Default Dirichlet concentration for the robustness draws: weights are drawn from
#: Dirichlet(concentration * w); 20 gives a default weight of 0.25 a spread (sd) of
#: about 0.09.
CONCENTRATION = 20.0


def _minmax(x: np.ndarray) -> np.ndarray:
    x = np.asarray(x, dtype=float)
    ok = np.isfinite(x)
    out = np.full_like(x, np.nan)
    if not ok.any():
        return out
    lo, hi = np.min(x[ok]), np.max(x[ok])
    out[ok] = 0.5 if hi == lo else (x[ok] - lo) / (hi - lo)
    return out


def survey_distance_km(sites: pd.DataFrame, surveys) -> np.ndarray:
    """Geodesic km from each site to the nearest surveyed point.

    Parameters
    ----------
    sites : DataFrame with ``longitude``, ``latitude``
    surveys : DataFrame with ``longitude``, ``latitude`` (any ``found`` column is
        ignored: a visit with or without finds both count as surveyed ground), or a
        tuple ``(lon, lat)`` of arrays.
    """
    if isinstance(surveys, pd.DataFrame):
        for c in ("longitude", "latitude"):
            if c not in surveys:
                raise InputError(
                    f"`surveys` needs a {c!r} column; got {list(surveys)}."
                )
        slon, slat = (
            surveys["longitude"].to_numpy(float),
            surveys["latitude"].to_numpy(float),
        )
    else:
        slon, slat = (np.atleast_1d(np.asarray(v, float)) for v in surveys)
    if slon.size == 0 or len(sites) == 0:
        return np.full(len(sites), np.inf)
    lon = sites["longitude"].to_numpy(float)[:, None]
    lat = sites["latitude"].to_numpy(float)[:, None]
    d = geodesic_distance_km(lon, lat, slon[None, :], slat[None, :])
    return np.min(np.atleast_2d(d), axis=1)


def component_scores(sites: pd.DataFrame, surveys=None) -> pd.DataFrame:
    """Every ranking component scaled to [0, 1] (columns named as the components).

    Components whose source column is missing or all NaN come back all NaN.
    """
    n = len(sites)
    nan = np.full(n, np.nan)

    def col(name):
        return sites[name].to_numpy(float) if name in sites else nan.copy()

    out = {}
    # how far into the niche of the taxon it fits best (isolation.py), so that a site
    # suitable only through one taxon's very low threshold does not rank as if its
    # clade suitability meant the same for every taxon; mean suitability otherwise
    fit = col("niche_fit")
    out["suitability"] = np.clip(
        fit if np.isfinite(fit).any() else col("mean_suitability"), 0, 1
    )
    gap = col("gap_km")
    gap = np.where(np.isinf(gap), np.nan, gap)
    out["isolation"] = _minmax(np.log1p(gap))
    out["agreement"] = np.clip(col("agreement"), 0, 1)
    area = col("area_km2")
    with np.errstate(divide="ignore", invalid="ignore"):
        out["area"] = _minmax(np.log(area))
    out["novelty"] = 1.0 - np.clip(col("novel_share"), 0, 1)
    sg = col("nearest_record_km")
    if surveys is not None:
        sg = np.fmin(sg, survey_distance_km(sites, surveys))
    sg = np.where(np.isinf(sg), np.nan, sg)
    out["survey_gap"] = _minmax(np.log1p(sg))
    hours = col("walk_hours")
    out["access"] = 1.0 - _minmax(np.where(np.isfinite(hours), hours, np.nan))
    if np.isfinite(hours).any():  # unreachable sites get the worst access
        out["access"][~np.isfinite(hours) & ~np.isnan(hours)] = 0.0
    with np.errstate(invalid="ignore", divide="ignore"):
        out["isolation_history"] = np.clip(col("n_slices_isolated") / col("n_slices"), 0, 1)
    for k, v in out.items():
        if not np.isfinite(v).any():
            out[k] = nan
    return pd.DataFrame(out, index=sites.index)


def rank_sites(
    sites: pd.DataFrame,
    weights: dict | None = None,
    *,
    top_k: int = default("ranking", "top_k"),
    n_draws: int = default("ranking", "n_draws"),
    concentration: float = CONCENTRATION,
    random_state=0,
    surveys=None,
    max_walk_hours: float | None = None,
) -> pd.DataFrame:
    """Composite score, rank and rank robustness of candidate sites.

    Parameters
    ----------
    sites : DataFrame
        As from :func:`screener.isolation.find_candidates`, optionally with a
        ``walk_hours`` column.
    weights : dict of str to float, optional
        Overrides of :data:`DEFAULT_WEIGHTS` (merged; set a component to 0 to drop it).
    top_k : int, default 10
    n_draws : int, default 1000
        Dirichlet weight draws for ``rank_robustness``.
    concentration : float, default 20.0
        Draws are ``Dirichlet(concentration * w)``; larger = closer to ``w``.
    random_state : int or numpy Generator, default 0
    surveys : DataFrame or tuple (lon, lat), optional
        Points already surveyed; sites far from them score higher on ``survey_gap``.
    max_walk_hours : float, optional
        Drop sites whose ``walk_hours`` exceed this (or are unreachable).

    Returns
    -------
    DataFrame
        Sorted best first, adding ``score``, ``rank`` (1 = best; ties broken by
        ``site_id``), ``score_<component>`` (weighted contributions that sum to
        ``score``), ``rank_low`` and ``rank_high`` (the 5th and 95th percentiles of
        the site's rank over the weight draws: 90 % of random weightings rank it
        within them) and ``rank_robustness`` (share of draws in which the site is in
        the top ``top_k``; NaN when there are no more sites than ``top_k``, where
        every site is in the top k whatever the weights and the share says nothing).

    """
    w = dict(DEFAULT_WEIGHTS)
    if weights:
        unknown = sorted(set(weights) - set(DEFAULT_WEIGHTS))
        if unknown:
            raise InputError(
                f"Unknown ranking components {unknown}; choose from {sorted(DEFAULT_WEIGHTS)}."
            )
        w.update({k: float(v) for k, v in weights.items()})
    if any(v < 0 or not np.isfinite(v) for v in w.values()):
        raise InputError(f"Ranking weights must be finite and >= 0; got {w}.")
    if top_k < 1 or n_draws < 0 or concentration <= 0:
        raise InputError(
            "`top_k` must be >= 1, `n_draws` >= 0 and `concentration` > 0."
        )
    df = sites.copy()
    if max_walk_hours is not None:
        if "walk_hours" not in df:
            raise InputError("`max_walk_hours` needs a 'walk_hours' column in `sites`.")
        keep = df["walk_hours"].to_numpy(float) <= max_walk_hours
        log.info(
            "%d sites dropped beyond %.1f walking hours",
            int((~keep).sum()),
            max_walk_hours,
        )
        df = df[keep]
    if "site_id" not in df:
        df["site_id"] = np.arange(1, len(df) + 1)
    if len(df) == 0:
        # no sites: an empty plan with every column a plan has
        for c in ["score", *[f"score_{k}" for k, v in w.items() if v > 0]]:
            df[c] = pd.Series(dtype=float)
        df["rank"] = pd.Series(dtype=np.int64)
        for c in ("rank_low", "rank_high", "rank_robustness"):
            df[c] = pd.Series(dtype=float)
        return df.reset_index(drop=True)
    df = df.sort_values("site_id", kind="stable").reset_index(drop=True)
    comp = component_scores(df, surveys=surveys)
    names = [k for k, v in w.items() if v > 0 and comp[k].notna().any()]
    dropped = [k for k, v in w.items() if v > 0 and k not in names]
    if dropped:
        log.info("ranking components without data, dropped: %s", dropped)
    if not len(df):  # no candidate sites is a result: an empty, fully formed plan
        names = [k for k, v in w.items() if v > 0]
    if not names:
        raise InputError("No ranking component has both a weight > 0 and data.")
    wv = np.array([w[k] for k in names])
    wv = wv / wv.sum()
    C = np.nan_to_num(comp[names].to_numpy(float), nan=0.0)
    contrib = C * wv
    df["score"] = contrib.sum(axis=1)
    for j, k in enumerate(names):
        df[f"score_{k}"] = contrib[:, j]
    order = np.lexsort((df["site_id"].to_numpy(), -df["score"].to_numpy()))
    rank = np.empty(len(df), dtype=np.int64)
    rank[order] = np.arange(1, len(df) + 1)
    df["rank"] = rank
    # robustness: all draws made up front from one generator
    rng = np.random.default_rng(random_state)
    if n_draws and len(df):
        W = rng.dirichlet(concentration * wv, size=n_draws)
        S = W @ C.T  # (n_draws, n_sites); sites are in site_id order
        # stable argsort on -score keeps site_id order among ties
        ranks = np.argsort(np.argsort(-S, axis=1, kind="stable"), axis=1, kind="stable")
        lo, hi = np.percentile(ranks + 1, [5, 95], axis=0, method="inverted_cdf")
        df["rank_low"], df["rank_high"] = lo.astype(np.int64), hi.astype(np.int64)
        if len(df) > top_k:
            df["rank_robustness"] = (ranks < top_k).mean(axis=0)
        else:
            log.info(
                "%d sites, top_k = %d: every site is in the top k, so rank_robustness "
                "is left empty; see rank_low / rank_high", len(df), top_k,
            )
            df["rank_robustness"] = np.nan
    else:
        df["rank_low"] = df["rank_high"] = np.nan
        df["rank_robustness"] = np.nan
    return df.sort_values("rank").reset_index(drop=True)


def site_ids(ranks) -> list:
    """The one identifier of each site: ``S`` and its rank, zero-padded (``S01``).

    Used in ``candidates.csv``, on the console, on maps, sheets, GPX names, the report
    and in debrief, so that a field team never meets two names for one place.

    Examples
    --------
    >>> site_ids([1, 2, 10])
    ['S01', 'S02', 'S10']
    """
    r = [int(v) for v in ranks]
    width = max(2, len(str(max(r)))) if r else 2
    return [f"S{v:0{width}d}" for v in r]


def site_keys(lon, lat) -> list:
    """A key derived from a site's location, to match the same place across runs.

    The 0.01-degree cell (about 1 km) of the site's representative (most suitable)
    cell, written as latitude then longitude with hemisphere letters.  Two runs on the
    same layers that find the same best cell give the same key whatever the ranks;
    ``site_id`` follows the rank and changes with the weights.

    Examples
    --------
    >>> site_keys([85.104], [-14.7])
    ['14.70S085.10E']
    """
    out = []
    for x, y in zip(np.atleast_1d(lon), np.atleast_1d(lat), strict=True):
        x = float(np.round(float(x), 2)) + 0.0  # no "-0.00"
        y = float(np.round(float(y), 2)) + 0.0
        out.append(
            f"{abs(y):05.2f}{'N' if y >= 0 else 'S'}{abs(x):06.2f}{'E' if x >= 0 else 'W'}"
        )
    return out


def assign_site_ids(sites, paths, candidates):
    """Give every ranked site its one identifier (:func:`site_ids`) and key.

    Sites are numbered as found (``site_id`` an int) until ranked; this renames
    them by rank (``S01`` = rank 1) everywhere they appear, and adds ``site_key``
    (:func:`site_keys`, from ``longitude`` and ``latitude`` in degrees) right after
    ``site_id``.

    Parameters
    ----------
    sites : pandas.DataFrame or geopandas.GeoDataFrame
        The ranked sites, with ``site_id`` (number as found), ``rank``,
        ``longitude`` and ``latitude`` (degrees).
    paths : pandas.DataFrame or geopandas.GeoDataFrame
        Least-cost paths with ``site_id`` (number as found); paths of sites not in
        ``sites`` are dropped.
    candidates : screener.isolation.CandidateSet
        The candidate set the numbers come from.

    Returns
    -------
    sites, paths : same types as given
        Copies with ``site_id`` the identifier (``S01``) and, in ``sites``,
        ``site_key``.
    candidates : screener.isolation.CandidateSet
        Under the plan's identifiers (:meth:`~screener.isolation.CandidateSet.with_site_ids`;
        ``patch_labels`` hold each site's rank).
    ids : dict of int to str
        Site number as found -> identifier, to rename other tables the same way.
    """
    found = sites["site_id"].astype(int).tolist()
    ids = dict(zip(found, site_ids(sites["rank"]), strict=True))
    candidates = candidates.with_site_ids(
        dict(zip(found, sites["rank"].astype(int), strict=True)), ids
    )
    sites = sites.copy()
    sites["site_id"] = [ids[k] for k in found]
    sites.insert(sites.columns.get_loc("site_id") + 1, "site_key",
                 site_keys(sites["longitude"], sites["latitude"]))
    paths = paths[paths["site_id"].isin(found)].copy()
    paths["site_id"] = paths["site_id"].map(ids).astype(object)
    return sites, paths, candidates, ids


def group_sites(
    sites: pd.DataFrame,
    *,
    by: str | None = "relaxed_block",
    max_distance_km: float | None = None,
) -> pd.DataFrame:
    """Merge neighbouring sites on one highland block into groups (``group_id``).

    Two sites share a group when they lie in the same patch at the relaxed thresholds
    (``by="relaxed_block"``, as written by :func:`~screener.isolation.find_candidates`;
    negative values mean "no block") or when their representative cells are at most
    ``max_distance_km`` apart (geodesic); groups are the connected components of these
    links, so chains of neighbours merge.

    Returns
    -------
    DataFrame
        A copy with ``group_id`` (1 = the group holding the best-ranked site when a
        ``rank`` column exists, else the lowest ``site_id``) and ``group_size``.
    """
    df = sites.copy()
    n = len(df)
    if n == 0:
        df["group_id"] = pd.Series(dtype=np.int64)
        df["group_size"] = pd.Series(dtype=np.int64)
        return df
    rows, cols = [], []
    if by is not None:
        if by not in df:
            raise InputError(f"`sites` has no column {by!r} to group by.")
        b = df[by].to_numpy()
        ok = pd.notna(b) & (
            np.asarray(b, float) > 0
            if np.issubdtype(np.asarray(b).dtype, np.number)
            else True
        )
        i, j = np.nonzero((b[:, None] == b[None, :]) & ok[:, None] & ok[None, :])
        rows.append(i)
        cols.append(j)
    if max_distance_km is not None:
        lon = df["longitude"].to_numpy(float)
        lat = df["latitude"].to_numpy(float)
        d = geodesic_distance_km(lon[:, None], lat[:, None], lon[None, :], lat[None, :])
        i, j = np.nonzero(np.atleast_2d(d) <= max_distance_km)
        rows.append(i)
        cols.append(j)
    rows.append(np.arange(n))
    cols.append(np.arange(n))
    r, c = np.concatenate(rows), np.concatenate(cols)
    adj = coo_matrix((np.ones(r.size), (r, c)), shape=(n, n)).tocsr()
    _, comp = connected_components(adj, directed=False)
    key = df["rank"].to_numpy() if "rank" in df else df["site_id"].to_numpy()
    best = pd.Series(key).groupby(comp).min()
    new_id = {g: k + 1 for k, g in enumerate(best.sort_values(kind="stable").index)}
    df["group_id"] = [new_id[g] for g in comp]
    df["group_size"] = df.groupby("group_id")["group_id"].transform("size").to_numpy()
    return df
