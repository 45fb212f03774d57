"""Time slices: past (or future) climates, climatic stability and isolation through time.

A *time slice* is a set of layers with the same names as the present layers, for a
past climate such as a mid-Holocene or a glacial-maximum reconstruction.  Each slice
may carry its own valid-cell mask: land exposed at a lowered sea level is valid in the
slice and not today; land drowned in the slice is valid today and not in the slice.

The stages here work on what the present run produced and never refit a model:

1. :func:`map_models` maps each fitted model of a taxon over a slice's layers (the
   model stage does this while the models are at hand) and :func:`project_taxon`
   combines the maps with the present ensemble weights, with the MESS map and the share of
   cells whose predictors lie outside the calibration range (where models clamp or
   extrapolate) for that slice.
2. :func:`climatic_stability` combines suitability across the present and the past
   slices, per taxon and for the clade (cell-wise maximum over taxa), into one surface.
3. :func:`site_history` follows every present candidate site through the slices: its
   kind and separating gap in each, the number of slices in which it was isolated,
   whether and in which slices it was connected to a known range, and whether it is a
   refugium (a cell of it suitable in every slice).  Each slice's isolation comes from
   one run of :func:`screener.isolation.find_candidates` on the slice's suitability,
   at the present thresholds and with the present records; a record on ground that
   was unsuitable in the slice (a summit in a cold period) stands for the nearest
   suitable ground within ``min_gap_km``, where its population could have lived
   (:func:`shifted_records`).

A hindcast is a hypothesis on top of a hypothesis: past climate layers are model
reconstructions, and a niche fitted today may not describe a taxon's niche in the
past.  Cells with novel past climate (MESS < 0) are extrapolations.  Treat a site's
history as an argument to weigh when planning a survey, not as evidence of a lineage's
age.

References
----------
.. [1] Carnaval, A. C. & Moritz, C. (2008). Historical climate modelling predicts
   patterns of current biodiversity in the Brazilian Atlantic forest. Journal of
   Biogeography 35:1187-1201.
.. [2] Carnaval, A. C., Hickerson, M. J., Haddad, C. F. B., Rodrigues, M. T. &
   Moritz, C. (2009). Stability predicts genetic diversity in the Brazilian Atlantic
   forest hotspot. Science 323:785-789.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from screener.errors import InputError, LayerError, suggest
from screener.grid import Grid
from screener.layers import LayerStack
from screener.models.mapping import predict_map
from screener.novelty import mess_map

if TYPE_CHECKING:
    from screener.isolation import IsolationParameters

__all__ = [
    "PRESENT",
    "STABILITY_METHODS",
    "SITE_KINDS",
    "SliceProjection",
    "SliceSet",
    "TimeSlice",
    "climatic_stability",
    "analyse_slices",
    "gap_column",
    "history_readings",
    "map_models",
    "outside_range_share",
    "site_mean",
    "project_taxon",
    "shifted_records",
    "site_history",
    "slice_stack",
]

log = logging.getLogger(__name__)

#: Name of the present-day slice in columns and outputs; no past slice may take it.
PRESENT = "present"
#: How suitability combines across slices (see :func:`climatic_stability`).
STABILITY_METHODS = ("geometric_mean", "product", "minimum")
#: Kinds a present site can have in a slice (see :func:`site_history`).
SITE_KINDS = ("joined", "near-range", "isolated", "unsuitable", "drowned")
#: Kinds that count as connected to a known range.
CONNECTED_KINDS = ("joined", "near-range")


@dataclass(frozen=True, eq=False)
class TimeSlice:
    """The predictor layers of one time slice, on the slice's own valid mask.

    Attributes
    ----------
    name : str
        Slice name as in the project file (e.g. ``"glacial_max"``).
    stack : LayerStack
        Predictors in the order the models were fitted with; ``stack.grid.mask`` is
        the slice's valid mask (exposed land included, drowned land excluded).
    """

    name: str
    stack: LayerStack

    @property
    def grid(self) -> Grid:
        return self.stack.grid


@dataclass(frozen=True, eq=False)
class SliceProjection:
    """One taxon's fitted models projected onto one slice.

    Attributes
    ----------
    suitability : ndarray of float32
        Weighted mean of the family maps (the present ensemble weights), NaN off the
        slice's mask.
    family_maps : dict of str to ndarray
    mess : ndarray of float32
        MESS against the taxon's calibration background; < 0 = novel environment.
    outside_range_share : float
        Share of the slice's valid cells with at least one predictor outside the range
        of the calibration data (where models clamp or extrapolate).
    """

    suitability: np.ndarray
    family_maps: dict
    mess: np.ndarray
    outside_range_share: float


@dataclass(frozen=True, eq=False)
class SliceSet:
    """What the time-slice stage produced for a run.

    Attributes
    ----------
    names : tuple of str
        Past slices in project order (the present is not among them).
    grids : dict of str to Grid
        Each slice's grid (its own valid mask).
    projections : dict of str to dict of str to SliceProjection
        ``projections[slice][taxon]``.
    clade_mess : dict of str to ndarray
        MESS of each slice against the pooled calibration background of the clade.
    method : str
        How suitability was combined (one of :data:`STABILITY_METHODS`).
    stability : dict of str to ndarray
        Climatic stability per taxon on the present grid (NaN off its mask).
    clade_stability : ndarray
        Climatic stability of the clade's suitability (maximum over taxa per slice).
    candidates : dict of str to screener.isolation.CandidateSet
        Each slice's isolation analysis (patches, ranges, gaps).
    suitable : dict of str to ndarray of bool
        Cells suitable for the clade in each slice (present thresholds).
    history : pandas.DataFrame
        :func:`site_history` of the present sites.
    """

    names: tuple
    grids: dict
    projections: dict
    clade_mess: dict
    method: str
    stability: dict
    clade_stability: np.ndarray
    candidates: dict = field(default_factory=dict)
    suitable: dict = field(default_factory=dict)
    history: pd.DataFrame | None = None

    def suitability(self, name: str) -> dict:
        """Per-taxon suitability maps of one slice."""
        return {t: p.suitability for t, p in self.projections[name].items()}


# --------------------------------------------------------------------------------------
# slices and projection


def slice_stack(name: str, raw: LayerStack, present: LayerStack, *, static=()) -> LayerStack:
    """A slice's predictors in the present predictors' order.

    Parameters
    ----------
    name : str
        Slice name (for messages).
    raw : LayerStack
        The layers read for the slice; their grid's mask is the slice's mask.
    present : LayerStack
        The present predictors, in model order.
    static : sequence of str, default ()
        Layers that do not change between slices (terrain, say): taken from the
        present where the slice does not give them.  Cells without a present value
        (land exposed only in the slice) leave the slice's mask.

    Raises
    ------
    LayerError
        The slice's grid differs from the present grid, or a predictor is neither in
        the slice nor listed as static.
    """
    if not raw.grid.same_geometry(present.grid):
        raise LayerError(
            f"Time slice {name!r}: its layers are on another grid ({raw.grid!r}) than "
            f"the present layers ({present.grid!r}); resample them onto the present "
            "grid (same CRS, transform and shape)."
        )
    missing = [n for n in present.names if n not in raw.names and n not in static]
    if missing:
        raise LayerError(
            f"Time slice {name!r} has no layer named {', '.join(map(repr, missing))}; "
            f"its layers are {', '.join(raw.names)}. Give every predictor under the "
            "same name as the present layer (file stem), or list layers that do not "
            "change under [slices] static." + suggest(missing[0], raw.names)
        )
    own = [n for n in present.names if n in raw.names]
    stack = raw.select(own)
    borrowed = {n: present.layer(n) for n in present.names if n not in raw.names}
    if borrowed:
        stack = stack.with_layers(borrowed)
    return stack.select(present.names)


def outside_range_share(stack: LayerStack, reference: np.ndarray) -> float:
    """Share of valid cells with a predictor outside the reference's [min, max].

    Parameters
    ----------
    stack : LayerStack
    reference : ndarray of shape (m, n_layers)
        Calibration rows (records and background).
    """
    ref = np.asarray(reference, dtype=np.float64)
    lo, hi = np.nanmin(ref, axis=0), np.nanmax(ref, axis=0)
    n_out = n = 0
    for _, X, _ in stack.iter_blocks():
        if X.shape[0]:
            n_out += int(np.count_nonzero(((X < lo) | (X > hi)).any(axis=1)))
            n += X.shape[0]
    return n_out / n if n else float("nan")


def map_models(models: dict, stack: LayerStack, *, map_fn=None) -> dict:
    """Each fitted model mapped over a slice's layers (no refitting).

    Parameters
    ----------
    models : dict of str to NicheModel
        Fitted model per family, as mapped in the present.
    stack : LayerStack
        The slice's predictors (:func:`slice_stack`).
    map_fn : callable, optional
        An executor's ``map`` (used for stacks streamed from disk).

    Returns
    -------
    dict of str to ndarray of float32 (NaN off the slice's mask)
    """
    return {f: predict_map(m, stack, map_fn=map_fn) for f, m in models.items()}


def project_taxon(family_maps: dict, weights: dict, stack: LayerStack,
                  reference: np.ndarray, *, map_fn=None) -> SliceProjection:
    """A taxon's projection onto a slice from its family maps there.

    Parameters
    ----------
    family_maps : dict of str to ndarray
        Each family's fitted model mapped over the slice (:func:`map_models`; the
        pipeline maps them while the models are at hand).
    weights : dict of str to float
        The present ensemble weights per family.
    stack : LayerStack
        The slice's predictors.
    reference : ndarray of shape (m, n_layers)
        Calibration rows for MESS and the outside-range share.
    map_fn : callable, optional
        An executor's ``map`` (used for stacks streamed from disk).
    """
    from screener.models.ensemble import weighted_mean_map

    if not family_maps:
        raise InputError("No family maps to combine on the time slice.")
    consensus = weighted_mean_map(family_maps, {f: weights[f] for f in family_maps})
    mess, _ = mess_map(stack, reference, map_fn=map_fn)
    return SliceProjection(consensus.astype(np.float32), dict(family_maps), mess,
                           outside_range_share(stack, reference))


# --------------------------------------------------------------------------------------
# stability


def climatic_stability(maps, method: str = "geometric_mean", mask=None) -> np.ndarray:
    """Combine suitability maps of several time slices into one stability surface.

    Parameters
    ----------
    maps : sequence of ndarray (n_rows, n_cols)
        Suitability in [0, 1] per slice (the present among them).  NaN inside ``mask``
        (a cell drowned in that slice) counts as 0: no habitat then.
    method : {"geometric_mean", "product", "minimum"}, default "geometric_mean"
        ``"product"`` multiplies the slices' suitability, as in the stability surfaces
        of [1]_ and [2]_ (from memory); ``"geometric_mean"`` is its n-th root (the same
        order of cells, on the suitability scale whatever the number of slices);
        ``"minimum"`` keeps the worst slice (a cell is only as stable as its worst
        period).
    mask : ndarray of bool, optional
        Cells to compute (default: cells finite in at least one map); NaN elsewhere.

    Returns
    -------
    ndarray of float32

    References
    ----------
    .. [1] Carnaval, A. C. & Moritz, C. (2008). Journal of Biogeography 35:1187-1201.
    .. [2] Carnaval, A. C. et al. (2009). Science 323:785-789.

    Examples
    --------
    >>> a, b = np.array([[0.5, 1.0]]), np.array([[0.5, 0.25]])
    >>> climatic_stability([a, b], "product").tolist()
    [[0.25, 0.25]]
    >>> climatic_stability([a, b], "minimum").tolist()
    [[0.5, 0.25]]
    """
    if method not in STABILITY_METHODS:
        raise InputError(
            f"Unknown stability method {method!r}; use one of "
            f"{', '.join(map(repr, STABILITY_METHODS))}." + suggest(method, STABILITY_METHODS)
        )
    maps = [np.asarray(m) for m in maps]
    if not maps:
        raise InputError("Climatic stability needs at least one suitability map.")
    if any(m.shape != maps[0].shape for m in maps):
        raise InputError("Every slice's suitability map must have the same shape.")
    if mask is None:
        mask = np.zeros(maps[0].shape, bool)
        for m in maps:
            mask |= np.isfinite(m)
    out = np.ones(maps[0].shape) if method != "minimum" else np.full(maps[0].shape, np.inf)
    for m in maps:  # folded in place: no stack of every slice
        v = np.clip(np.nan_to_num(m.astype(np.float64), nan=0.0), 0.0, 1.0)
        if method == "minimum":
            np.minimum(out, v, out=out)
        else:
            out *= v
    if method == "geometric_mean":
        out **= 1.0 / len(maps)
    out[~mask] = np.nan
    return out.astype(np.float32)


# --------------------------------------------------------------------------------------
# isolation through time


def gap_column(sites: pd.DataFrame) -> str:
    """The column holding a site's separating gap (km): ``gap_km``, the minimax over
    every route from the known ranges of the longest unsuitable crossing."""
    if "gap_km" in sites.columns:
        return "gap_km"
    raise InputError("The candidate sites have no separating gap column (gap_km).")


def _edt_km(grid: Grid, empty: np.ndarray):
    """Distance (km) from every cell to the nearest cell where ``empty`` is False, and
    that cell's (row, col) indices; on a local plane with the grid's mean cell steps
    (the distances it is used for are short)."""
    from scipy import ndimage as ndi

    sampling = (float(np.mean(grid.ns_step_km)), float(np.mean(grid.ew_step_km)))
    dist, (ir, ic) = ndi.distance_transform_edt(empty, sampling=sampling,
                                                return_indices=True)
    return dist, ir, ic


def shifted_records(grid: Grid, records: dict, suitable: np.ndarray,
                    reach_km: float) -> dict:
    """Record cells of a time slice: a record on ground unsuitable in the slice moves
    to the nearest suitable cell within ``reach_km`` (km), where its population could
    have lived as the climate shifted (downslope in a cold period, say); records with
    no suitable cell in reach stay where they are (and hold no range in the slice).

    Parameters
    ----------
    grid : Grid
        The slice's grid.
    records : dict of str to tuple (rows, cols)
    suitable : ndarray of bool
        Cells suitable for the clade in the slice.
    reach_km : float
    """
    if not suitable.any() or reach_km <= 0:
        return dict(records)
    dist, ir, ic = _edt_km(grid, ~suitable)
    out = {}
    for taxon, (rows, cols) in records.items():
        rows, cols = np.asarray(rows, np.int64), np.asarray(cols, np.int64)
        move = ~suitable[rows, cols] & (dist[rows, cols] <= reach_km)
        out[taxon] = (np.where(move, ir[rows, cols], rows),
                      np.where(move, ic[rows, cols], cols))
    return out


def _shifted(grid: Grid, site_lab, ids, cand, pairs, reach_km) -> pd.DataFrame:
    """(site, label) of the nearest patch of the slice for sites that overlap none,
    where that patch lies within ``reach_km``: the ground a population could have
    moved to as its climate shifted (downslope in a cold period, say)."""
    lone = np.setdiff1d(ids, pairs["site"].to_numpy())
    labels = np.asarray(cand.patch_labels)
    if not lone.size or not (labels != 0).any() or reach_km <= 0:
        return pd.DataFrame({"site": [], "label": []}, dtype=np.int64)
    dist, ir, ic = _edt_km(grid, labels == 0)
    pick = np.isin(site_lab, lone)
    df = pd.DataFrame({"site": site_lab[pick].astype(np.int64), "d": dist[pick],
                       "label": labels[ir[pick], ic[pick]].astype(np.int64)})
    df = df.sort_values(["site", "d"], kind="stable").drop_duplicates("site")
    return df.loc[df["d"] <= reach_km, ["site", "label"]]


def _slice_state(grid: Grid, site_lab, site_ids, cand, suitable, min_gap_km) -> pd.DataFrame:
    """Kind and gap in one slice of every present site (labelled ``site_lab`` > 0)."""
    ids = np.asarray(site_ids, dtype=np.int64)
    n = int(ids.max()) + 1 if ids.size else 1
    on = site_lab > 0
    lab = site_lab[on].astype(np.int64)
    on_mask = np.bincount(lab, weights=grid.mask[on], minlength=n) > 0
    sl = np.asarray(cand.patch_labels)[on].astype(np.int64)
    pairs = pd.DataFrame({"site": lab, "label": sl}).drop_duplicates()
    pairs = pairs[pairs["label"] != 0]
    pairs = pd.concat([pairs, _shifted(grid, site_lab, ids, cand, pairs, min_gap_km)])
    csites = cand.sites.set_index("site_id")
    gcol = gap_column(cand.sites)
    joined_by = {}
    kinds = np.where(on_mask, "unsuitable", "drowned").astype(object)
    gaps = np.full(n, np.nan)
    with_range = pairs[pairs["label"] < 0]
    for s, g in with_range.groupby("site"):
        kinds[s], gaps[s] = "joined", 0.0
        taxa = cand.ranges.set_index("range_id").loc[(-g["label"]).tolist(), "taxa"]
        joined_by[s] = ",".join(sorted({t for v in taxa for t in str(v).split(",") if t}))
    others = pairs[(pairs["label"] > 0) & ~pairs["site"].isin(with_range["site"])]
    if len(others):
        k = csites.loc[others["label"], "kind"].to_numpy()
        gp = csites.loc[others["label"], gcol].to_numpy(float)
        nt = csites.loc[others["label"], "nearest_taxon"].to_numpy(object)
        df = pd.DataFrame({"site": others["site"].to_numpy(), "kind": k, "gap": gp,
                           "taxon": nt})
        for s, g in df.groupby("site"):
            if (g["kind"] == "within-range").any():
                kinds[s], gaps[s] = "joined", 0.0
                joined_by[s] = ",".join(sorted(set(
                    g.loc[g["kind"] == "within-range", "taxon"].dropna().astype(str))))
                continue
            best = g.sort_values("gap", kind="stable").iloc[0]
            gaps[s] = best["gap"]
            kinds[s] = ("near-range" if np.isfinite(best["gap"]) and best["gap"] < min_gap_km
                        else "isolated")
            if kinds[s] == "near-range":
                joined_by[s] = str(best["taxon"])
    # suitable cells but no patch of the slice (fragments below the minimum area)
    # stay "unsuitable": no population could persist there as a patch
    return pd.DataFrame({
        "site_id": ids,
        "kind": kinds[ids],
        "gap": gaps[ids],
        "connected_to": [joined_by.get(int(i), "") for i in ids],
    })


def site_history(grid: Grid, present, slices: dict, present_suitable: np.ndarray,
                 *, min_gap_km: float) -> pd.DataFrame:
    """Follow every present candidate site through the time slices.

    Parameters
    ----------
    grid : Grid
        The present grid.
    present : screener.isolation.CandidateSet
        The present sites (``patch_labels`` > 0 on their cells).
    slices : dict of str to tuple (Grid, CandidateSet, ndarray of bool)
        Per past slice, in order: its grid, its isolation analysis
        (:func:`screener.isolation.find_candidates` on the slice's suitability at the
        present thresholds) and its clade-suitable cells.
    present_suitable : ndarray of bool
        Cells suitable for the clade today.
    min_gap_km : float
        The gap (km) from which a patch counts as isolated.

    Returns
    -------
    pandas.DataFrame
        One row per present site, in ``site_id`` order, with:

        ``kind_<slice>``
            In that slice the site's cells lie in a patch that is ``joined`` (it holds
            records or is part of a known range), ``near-range`` (its separating gap
            is below ``min_gap_km``) or ``isolated``.  Where a site overlaps several
            patches of a slice, the most connected one counts.  Where it overlaps
            none (its own ground unsuitable then, as a summit in a cold period), the
            nearest patch of the slice within ``min_gap_km`` counts: the ground its
            population could have shifted to.  ``unsuitable`` when there is no such
            patch; ``drowned`` when every cell is off the slice's mask (under the
            sea, say).
        ``gap_km_<slice>``
            Separating gap in that slice (0 for joined, NaN for unsuitable/drowned).
        ``n_slices``, ``n_slices_isolated``
            Number of slices (the present included) and in how many of them the site
            was isolated.
        ``ever_connected``, ``connected_in``, ``connected_to``
            Connected (joined or near-range) in any slice; the slices in which it was
            (the present included, in project order); the taxa it was connected to.
        ``refugium``, ``stable_share``
            Whether some cell of the site is suitable in every slice, and the share of
            the site's area that is.
    """
    sites = present.sites
    ids = sites["site_id"].to_numpy(np.int64)
    site_lab = np.asarray(present.patch_labels)
    out = pd.DataFrame({"site_id": ids})
    gcol = gap_column(sites)
    kinds = [("present", sites["kind"].map(
        lambda k: "joined" if k == "within-range" else k).to_numpy(object))]
    pg = np.where(sites["kind"] == "within-range", 0.0, sites[gcol].to_numpy(float))
    gaps = [("present", pg)]
    present_taxa = np.where(sites["kind"] == "isolated", "",
                            sites["nearest_taxon"].fillna("").astype(str))
    connected_to = [set(filter(None, [t])) for t in present_taxa]
    stable = present_suitable.copy()
    for name, (sgrid, cand, suitable) in slices.items():
        st = _slice_state(sgrid, site_lab, ids, cand, suitable, min_gap_km)
        kinds.append((name, st["kind"].to_numpy(object)))
        gaps.append((name, st["gap"].to_numpy(float)))
        for i, t in enumerate(st["connected_to"]):
            if t:
                connected_to[i].update(t.split(","))
        stable &= suitable
    for name, k in kinds[1:]:
        out[f"kind_{name}"] = k
    for name, g in gaps[1:]:
        out[f"gap_km_{name}"] = g
    K = np.column_stack([k for _, k in kinds]) if len(ids) else np.empty((0, len(kinds)))
    out["n_slices"] = len(kinds)
    out["n_slices_isolated"] = (K == "isolated").sum(axis=1).astype(np.int64)
    conn = np.isin(K, CONNECTED_KINDS)
    names = [n for n, _ in kinds]
    out["ever_connected"] = conn.any(axis=1)
    out["connected_in"] = [",".join(n for n, c in zip(names, row) if c) for row in conn]
    out["connected_to"] = [",".join(sorted(s)) if c else ""
                           for s, c in zip(connected_to, conn.any(axis=1))]
    area = np.asarray(grid.cell_area_km2, float)
    n = int(ids.max()) + 1 if ids.size else 1
    on = site_lab > 0
    lab = site_lab[on].astype(np.int64)
    a = np.broadcast_to(area, grid.shape)[on]
    total = np.bincount(lab, weights=a, minlength=n)
    kept = np.bincount(lab, weights=a * stable[on], minlength=n)
    with np.errstate(invalid="ignore", divide="ignore"):
        share = np.where(total > 0, kept / total, 0.0)
    out["stable_share"] = share[ids]
    out["refugium"] = out["stable_share"] > 0
    return out


#: Columns :func:`site_history` adds whatever the slices (slice columns come first).
HISTORY_COLUMNS = ["n_slices", "n_slices_isolated", "ever_connected", "connected_in",
                   "connected_to", "refugium", "stable_share"]


def analyse_slices(present_grid: Grid, slices, taxa: dict, present, thresholds: dict,
                   *, method: str = "geometric_mean", isolation: IsolationParameters | None = None,
                   map_fn=None) -> SliceSet:
    """Project every taxon onto every slice, combine stability and follow the sites.

    Parameters
    ----------
    present_grid : Grid
    slices : sequence of TimeSlice
        Past slices in order (their stacks hold the predictors in model order).
    taxa : dict of str to screener.results.TaxonResult
        The present results; each needs ``slice_maps`` (its fitted models mapped over
        each slice, :func:`map_models`), ``ensemble_weights``,
        ``presence_env``/``background_env`` and ``records``.
    present : screener.isolation.CandidateSet
        The present candidate sites.
    thresholds : dict of str to float
        The per-taxon thresholds that define suitable cells (as in the present).
    method : str, default "geometric_mean"
        See :func:`climatic_stability`.
    isolation : screener.isolation.IsolationParameters, optional
        Parameters of :func:`screener.isolation.find_candidates` (default: the
        project file's defaults).  Each slice costs one run at one threshold set.
    map_fn : callable, optional
        An executor's ``map``.

    Returns
    -------
    SliceSet
    """
    from screener.isolation import (
        Clade,
        IsolationParameters,
        clade_suitability,
        find_candidates,
        suitable_cells,
    )

    isolation = IsolationParameters() if isolation is None else isolation
    names = [s.name for s in slices]
    bad = [n for n in names if n == PRESENT or not n]
    if bad or len(set(names)) != len(names):
        raise InputError(
            f"Time slice names must be unique, non-empty and not {PRESENT!r}; got {names}."
        )
    for t in taxa.values():
        missing = [n for n in names if n not in (t.slice_maps or {})]
        if missing:
            raise InputError(
                f"The results of {t.taxon!r} hold no maps of its models on the time "
                f"slices {missing}; rerun the model stage with these slices."
            )
    records = {n: (t.records.rows, t.records.cols) for n, t in taxa.items()}
    pooled = np.vstack([t.background_env for t in taxa.values()])
    projections, clade_mess, cands, suitable, grids = {}, {}, {}, {}, {}
    per_taxon = {n: [t.suitability] for n, t in taxa.items()}
    clade_maps = [clade_suitability({n: t.suitability for n, t in taxa.items()})]
    hist_in = {}
    for sl in slices:
        grids[sl.name] = sl.grid
        proj = {}
        for n, t in taxa.items():
            ref = np.vstack([t.presence_env, t.background_env])
            proj[n] = project_taxon(t.slice_maps[sl.name], t.ensemble_weights, sl.stack,
                                    ref, map_fn=map_fn)
            per_taxon[n].append(proj[n].suitability)
            if proj[n].outside_range_share > 0:
                log.info("%s in %s: %.1f%% of cells outside the calibration range",
                         n, sl.name, 100 * proj[n].outside_range_share)
        projections[sl.name] = proj
        clade_mess[sl.name], _ = mess_map(sl.stack, pooled, map_fn=map_fn)
        suit = {n: p.suitability for n, p in proj.items()}
        clade_maps.append(clade_suitability(suit))
        suitable[sl.name] = suitable_cells(sl.grid, suit, thresholds)
        moved = shifted_records(sl.grid, records, suitable[sl.name], isolation.min_gap_km)
        cands[sl.name] = find_candidates(Clade(sl.grid, suit, moved), thresholds,
                                         parameters=isolation)
        hist_in[sl.name] = (sl.grid, cands[sl.name], suitable[sl.name])
    mask = present_grid.mask
    stability = {n: climatic_stability(m, method, mask) for n, m in per_taxon.items()}
    clade_stab = climatic_stability(clade_maps, method, mask)
    present_suitable = suitable_cells(
        present_grid, {n: t.suitability for n, t in taxa.items()}, thresholds)
    history = site_history(present_grid, present, hist_in, present_suitable,
                           min_gap_km=isolation.min_gap_km)
    return SliceSet(tuple(names), grids, projections, clade_mess, method, stability,
                    clade_stab, cands, suitable, history)


def history_readings(sites: pd.DataFrame, names, *, top_n: int = 10) -> list:
    """Plain-words history of the best-ranked unoccupied sites, one line each.

    Parameters
    ----------
    sites : DataFrame
        Ranked sites with the :func:`site_history` columns (and ``rank``, ``kind``).
    names : sequence of str
        The past slices, in order.
    top_n : int, default 10
    """
    out = []
    if sites is None or not len(sites) or "n_slices" not in sites.columns:
        return out
    order = sites.sort_values("rank") if "rank" in sites.columns else sites
    for r in order.head(top_n).to_dict("records"):
        if r["kind"] == "within-range":
            continue
        label = str(r.get("site_id"))
        head = f"Site {label}" + (f" (rank {int(r['rank'])})" if "rank" in r else "")
        kinds = {n: r.get(f"kind_{n}") for n in names}
        joined = [n for n, k in kinds.items() if k in CONNECTED_KINDS]
        gone = [n for n, k in kinds.items() if k in ("unsuitable", "drowned")]
        if r["kind"] == "isolated" and int(r["n_slices_isolated"]) == int(r["n_slices"]):
            text = (f"{head} is cut off from every known range today and in every past "
                    f"slice ({', '.join(names)}): no period joined it to a recorded "
                    "range, which makes it the stronger candidate for an old, unrecorded "
                    "lineage.")
        elif joined:
            who = r.get("connected_to") or "a recorded taxon"
            how = ", ".join(f"{n} ({kinds[n]})" for n in joined)
            text = (f"{head} is {r['kind']} today, but in {how} its patch was joined "
                    f"to or within reach of the range of {who}. Populations could have "
                    "mixed then, so a population found here may belong to that taxon "
                    "rather than to a separate lineage.")
        else:
            text = (f"{head} is {r['kind']} today and isolated in "
                    f"{int(r['n_slices_isolated'])} of {int(r['n_slices'])} slices.")
        if gone:
            text += (f" It held no suitable patch in {', '.join(gone)}: a population "
                     "there now arrived later or survived in ground too small to map.")
        if bool(r.get("refugium")):
            text += (f" {100 * float(r['stable_share']):.0f}% of its area stayed suitable "
                     "in every slice (a refugium).")
        out.append(text)
    return out


def site_mean(grid, labels, values, ids) -> np.ndarray:
    """Area-weighted mean of ``values`` over each site's cells (NaN cells left out).

    Parameters
    ----------
    grid : screener.grid.Grid
        Gives the geodesic area of each cell (km²), the weights.
    labels : ndarray of int, shape grid.shape
        Site label of each cell (0 = no site).
    values : ndarray of float, shape grid.shape
    ids : ndarray of int
        Site labels to report, in the order wanted.

    Returns
    -------
    ndarray of float, shape (len(ids),)
        NaN for a site with no finite value.
    """
    n = int(ids.max()) + 1 if len(ids) else 1
    on = (labels > 0) & np.isfinite(values)
    lab = labels[on].astype(np.int64)
    a = np.broadcast_to(np.asarray(grid.cell_area_km2, float), grid.shape)[on]
    tot = np.bincount(lab, weights=a, minlength=n)
    s = np.bincount(lab, weights=a * values[on], minlength=n)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(tot > 0, s / tot, np.nan)[ids]
