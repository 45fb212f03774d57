"""The evidence behind each taxon's model, in the terms a survey plan needs.

For each taxon the report shows one card with three parts:

* **support**: how well held-out records are predicted (AUC, omission at the
  minimum training presence) and whether that beats chance (the null-model and
  jackknife tests of :mod:`screener.evaluation`);
* **limits**: few records, records clustered in space (Clark & Evans 1954), and how
  much of the predicted range lies in novel environment (MESS < 0), where the model
  extrapolates;
* **implications**: the sites whose suitability comes from this taxon's model.

The numbers are computed here; :mod:`screener.outputs.report` only lays them out.

References
----------
.. [1] Clark, P. J. & Evans, F. C. (1954). Distance to nearest neighbor as a measure
   of spatial relationships in populations. Ecology 35: 445-453.
.. [2] Pearson, R. G., Raxworthy, C. J., Nakamura, M. & Peterson, A. T. (2007).
   Predicting species distributions from small numbers of occurrence records.
   Journal of Biogeography 34: 102-117.
.. [3] Holm, S. (1979). A simple sequentially rejective multiple test procedure.
   Scandinavian Journal of Statistics 6: 65-70.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy import stats

from screener.grid import geodesic_distance_km

__all__ = [
    "FEW_RECORDS",
    "USEFUL_AUC",
    "ClarkEvans",
    "TaxonEvidence",
    "clark_evans",
    "site_taxa",
    "site_taxon",
    "taxon_evidence",
]

#: Below this many records a model is a sketch (common practice puts the floor for
#: reliable models between 10 and 20 records; Pearson et al. 2007 worked from 5).
FEW_RECORDS = 15
#: Held-out AUC below this is of little use for ranking places (common practice).
USEFUL_AUC = 0.7
#: Family-wise error rate of "better than chance" on an evidence card, over all the
#: null-model and jackknife p-values of a taxon (common practice).
SUPPORT_ALPHA = 0.05
#: Standard error constant of the Clark-Evans mean nearest-neighbour distance under
#: complete spatial randomness: 0.26136 / sqrt(n * density) (Clark & Evans 1954).
_CE_SE = 0.26136


@dataclass(frozen=True)
class ClarkEvans:
    """Clark-Evans aggregation index of a set of points.

    Attributes
    ----------
    ratio : float
        R = observed mean nearest-neighbour distance / expected under randomness;
        1 random, below 1 clustered, above 1 regular (at most 2.1491).
    z : float
        Standard normal deviate of the difference.
    p_clustered : float
        One-sided p-value for clustering (R < 1).
    mean_nn_km, expected_km : float
    """

    ratio: float
    z: float
    p_clustered: float
    mean_nn_km: float
    expected_km: float


def clark_evans(lon, lat, area_km2: float) -> ClarkEvans | None:
    """Clark-Evans index of points (WGS84 degrees) in an area of ``area_km2``.

    Nearest-neighbour distances are geodesic.  No edge correction is applied, so
    points near the edge of the area look slightly more regular than they are.

    Returns None for fewer than 3 points or a non-positive area.

    References
    ----------
    .. [1] Clark, P. J. & Evans, F. C. (1954). Ecology 35: 445-453.
    """
    lon = np.asarray(lon, float)
    lat = np.asarray(lat, float)
    n = lon.size
    if n < 3 or not area_km2 > 0:
        return None
    nn = np.empty(n)
    for i in range(n):
        d = np.asarray(geodesic_distance_km(lon[i], lat[i], lon, lat), float)
        d[i] = np.inf
        nn[i] = d.min()
    density = n / float(area_km2)
    expected = 0.5 / math.sqrt(density)
    observed = float(nn.mean())
    se = _CE_SE / math.sqrt(n * density)
    z = (observed - expected) / se
    return ClarkEvans(
        ratio=observed / expected,
        z=float(z),
        p_clustered=float(stats.norm.cdf(z)),
        mean_nn_km=observed,
        expected_km=expected,
    )


@dataclass(frozen=True)
class TaxonEvidence:
    """What supports and what limits one taxon's model, and what it means for sites.

    Attributes
    ----------
    taxon : str
    n_records : int
    held_out : list of dict
        Per family: ``family``, ``method`` (jackknife, block, ...), ``auc``,
        ``omission`` (held-out omission at the minimum training presence),
        ``null_p`` and ``jackknife_p`` (NaN where not run).
    best_auc : float
        Highest held-out AUC of any family (NaN when none).
    beats_chance : bool or None
        True when the smallest of the families' null-model and jackknife p-values stays
        at or below :data:`SUPPORT_ALPHA` after Holm's correction over all of them
        (k x the smallest p, for k p-values); None when no test was run.
    supported : str
        "supported", "weakly supported" or "not shown to be better than chance".
    clustering : ClarkEvans or None
    threshold_name : str
    threshold : float
    range_km2 : float
        Ground area at or above the threshold.
    novel_share : float
        Share of that area (by cells) in novel environment (MESS < 0); NaN without
        a MESS map.
    limits : list of str
        Plain-words limits.
    site_ids : list of str
        Sites (best first) whose suitability comes from this taxon's model.
    """

    taxon: str
    n_records: int
    held_out: list
    best_auc: float
    beats_chance: bool | None
    supported: str
    clustering: ClarkEvans | None
    threshold_name: str
    threshold: float
    range_km2: float
    novel_share: float
    limits: list = field(default_factory=list)
    site_ids: list = field(default_factory=list)


def _f(v) -> float:
    try:
        out = float(v)
    except (TypeError, ValueError):
        return math.nan
    return out


def _site_cells(result, sites) -> tuple:
    if {"row", "col"} <= set(sites.columns):
        return sites["row"].to_numpy(int), sites["col"].to_numpy(int)
    rows, cols, _ = result.grid.rowcol(sites["x"].to_numpy(float),
                                       sites["y"].to_numpy(float))
    return rows, cols


def site_taxa(result, sites=None) -> dict:
    """Site id -> the taxon whose model is highest at the site's representative cell
    (the taxon the site's suitability comes from)."""
    sites = result.sites if sites is None else sites
    if sites is None or not len(sites) or not result.taxa:
        return {}
    rows, cols = _site_cells(result, sites)
    names = list(result.taxa)
    vals = np.stack([np.nan_to_num(np.asarray(result.taxa[n].suitability)[rows, cols],
                                   nan=-1.0) for n in names])
    best = np.argmax(vals, axis=0)
    return {sid: names[int(k)]
            for sid, k in zip(sites["site_id"].astype(str), best, strict=True)}


def site_taxon(result, site) -> str:
    """The taxon one site's suitability comes from (a row of the site table)."""
    import pandas as pd

    one = pd.DataFrame([dict(site)])
    return site_taxa(result, one)[str(site["site_id"])]


def taxon_evidence(result, taxon: str, *, threshold_name: str = "mtp") -> TaxonEvidence:
    """Gather the evidence card of one taxon from a run.

    Parameters
    ----------
    result : screener.results.RunResult
    taxon : str
    threshold_name : str, default "mtp"
        The threshold the run used for ranges and sites.

    Returns
    -------
    TaxonEvidence
    """
    tr = result.taxa[taxon]
    rec = tr.records
    held = []
    for row in tr.evaluation or []:
        if row.get("algorithm") in ("ensemble", "consensus") or not math.isfinite(
            _f(row.get("auc"))
        ):
            continue
        held.append(
            {
                "family": str(row.get("algorithm")),
                "method": str(row.get("method", "")),
                "auc": _f(row.get("auc")),
                "omission": _f(row.get("omission_mtp")),
                "null_p": _f(row.get("auc_null_p")),
                "jackknife_p": _f(row.get("jackknife_p")),
            }
        )
    best = max((h["auc"] for h in held), default=math.nan)
    ps = [p for h in held for p in (h["null_p"], h["jackknife_p"]) if math.isfinite(p)]
    # several families and two tests each: a taxon beats chance when the smallest p
    # survives Holm's correction over all of them (its first step, k x the smallest
    # p; Holm 1979), not when any one p is small
    beats = (min(ps) * len(ps) <= SUPPORT_ALPHA) if ps else None
    if not math.isfinite(best) or best < USEFUL_AUC or beats is False:
        supported = (
            "not shown to be better than chance"
            if beats is False
            else "weakly supported"
        )
    else:
        supported = "supported" if beats else "weakly supported"
    area = np.asarray(result.grid.cell_area_km2, float)
    acc = tr.accessible if tr.accessible is not None else result.grid.mask
    ce = clark_evans(rec.lon, rec.lat, float(area[np.asarray(acc, bool)].sum()))
    th = (tr.thresholds or {}).get(threshold_name)
    s = np.asarray(tr.suitability, float)
    th_value = th.value if th is not None else math.nan
    suitable = np.isfinite(s) & (s >= th_value) if th is not None else np.zeros(s.shape, bool)
    novel = math.nan
    if tr.mess is not None and suitable.any():
        m = np.asarray(tr.mess, float)[suitable]
        novel = float(np.mean(m < 0))
    limits = []
    if rec.n < FEW_RECORDS:
        limits.append(
            f"Few records ({rec.n}; fewer than {FEW_RECORDS}, common practice): the "
            "niche is sketched, its edges are guesses."
        )
    if ce is not None and ce.p_clustered <= 0.05:
        limits.append(
            f"Records are clustered in space (Clark-Evans R = {ce.ratio:.2f}, p = "
            f"{ce.p_clustered:.3g}): they may show where collectors went more than "
            "where the taxon lives."
        )
    if math.isfinite(novel) and novel > 0:
        limits.append(
            f"{100 * novel:.0f}% of the predicted range lies in environments outside "
            "those the model was calibrated on (MESS < 0): there it extrapolates."
        )
    if not held:
        limits.append("No held-out evaluation is available for this taxon.")
    ids = [sid for sid, t in site_taxa(result).items() if t == taxon]
    return TaxonEvidence(
        taxon=taxon,
        n_records=rec.n,
        held_out=held,
        best_auc=best,
        beats_chance=beats,
        supported=supported,
        clustering=ce,
        threshold_name=threshold_name,
        threshold=th_value,
        range_km2=float(th.area_km2) if th is not None else math.nan,
        novel_share=novel,
        limits=limits,
        site_ids=ids,
    )
