"""Time slices: projection without refitting, climatic stability, isolation through time."""

import copy

import numpy as np
import pytest
from affine import Affine
from matplotlib import cbook
from scipy import ndimage as ndi
from scipy.stats import gmean

from screener.errors import InputError, LayerError
from screener.grid import Grid
from screener.isolation import Clade, IsolationParameters, find_candidates
from screener.layers import LayerStack
from screener.models import make_model
from screener.models.base import NicheModel
from screener.results import TaxonRecords, TaxonResult
from screener.slices import (
    PRESENT,
    TimeSlice,
    analyse_slices,
    climatic_stability,
    history_readings,
    map_models,
    outside_range_share,
    project_taxon,
    shifted_records,
    slice_stack,
)


def _grid(shape, mask=None, *, cell=0.01, west=10.0, north=1.0):
    return Grid("EPSG:4326", Affine(cell, 0, west, 0, -cell, north), shape, mask)


def _stack(grid, layers: dict):
    data = np.stack([np.asarray(v, np.float32) for v in layers.values()])
    data[:, ~grid.mask] = np.nan
    return LayerStack(grid, list(layers), data)


# --------------------------------------------------------------------------- stability
@pytest.mark.parametrize("method", ["product", "minimum", "geometric_mean"])
def test_stability_equals_an_independent_numpy_computation(method):
    rng = np.random.default_rng(3)
    maps = [rng.uniform(0.01, 1.0, (20, 30)) for _ in range(4)]
    got = climatic_stability(maps, method)
    stack = np.stack(maps)
    # independent references: numpy's reductions over the stacked slices, and
    # scipy.stats.gmean for the geometric mean
    want = {"product": np.prod(stack, axis=0), "minimum": np.min(stack, axis=0),
            "geometric_mean": gmean(stack, axis=0)}[method]
    np.testing.assert_allclose(got, want, rtol=1e-6)


def test_stability_counts_a_drowned_cell_as_no_habitat_and_keeps_the_mask():
    a = np.array([[0.8, 0.5, np.nan]])
    b = np.array([[np.nan, 0.5, np.nan]])  # first cell drowned in slice b
    mask = np.array([[True, True, False]])
    for method in ("product", "minimum", "geometric_mean"):
        s = climatic_stability([a, b], method, mask)
        assert s[0, 0] == 0.0 and np.isnan(s[0, 2])
    assert climatic_stability([a, b], "geometric_mean", mask)[0, 1] == pytest.approx(0.5)


def test_stability_method_is_checked():
    with pytest.raises(InputError, match="geometric_mean"):
        climatic_stability([np.ones((2, 2))], "geometric_man")


# --------------------------------------------------------------------------- slices
def test_slice_stack_takes_static_layers_from_the_present_and_keeps_its_own_mask():
    present_mask = np.ones((6, 8), bool)
    present_mask[:, 0] = False  # sea today
    g = _grid((6, 8), present_mask)
    present = _stack(g, {"temp": np.full((6, 8), 20.0), "terrain": np.arange(48.0).reshape(6, 8)})
    slice_mask = np.ones((6, 8), bool)
    slice_mask[0, :] = False  # drowned in the slice; column 0 exposed in the slice
    raw = _stack(_grid((6, 8), slice_mask), {"temp": np.full((6, 8), 15.0)})
    with pytest.raises(LayerError, match="terrain"):
        slice_stack("cold", raw, present)
    st = slice_stack("cold", raw, present, static=["terrain"])
    assert st.names == ["temp", "terrain"]
    # exposed cells have no present terrain: they leave the slice's mask; drowned rows too
    assert not st.grid.mask[:, 0].any() and not st.grid.mask[0].any()
    assert st.grid.mask[1:, 1:].all()
    np.testing.assert_array_equal(st.layer("terrain")[1:, 1:], present.layer("terrain")[1:, 1:])
    assert (st.layer("temp")[1:, 1:] == 15.0).all()
    other = _stack(_grid((6, 8), slice_mask, cell=0.02), {"temp": np.full((6, 8), 15.0)})
    with pytest.raises(LayerError, match="another grid"):
        slice_stack("cold", other, present, static=["terrain"])


def test_projection_maps_the_fitted_models_without_refitting():
    rng = np.random.default_rng(0)
    shape = (30, 40)
    g = _grid(shape, np.ones(shape, bool))
    t = np.linspace(10, 30, shape[1])[None, :] + rng.normal(0, 0.5, shape)
    m = np.linspace(500, 3000, shape[0])[:, None] + rng.normal(0, 50, shape)
    present = _stack(g, {"t": t, "m": m})
    P = present.values_at(rng.integers(0, 30, 15), rng.integers(0, 10, 15))
    B = present.values_at(rng.integers(0, 30, 300), rng.integers(0, 40, 300))
    models = {f: make_model(f).fit(P, B) for f in ("ellipsoid", "envelope")}
    before = copy.deepcopy(models)
    mask = np.ones(shape, bool)
    mask[:3] = False  # drowned in the slice
    sg = _grid(shape, mask)
    cold = _stack(sg, {"t": t - 6.0, "m": m})
    weights = {"ellipsoid": 0.7, "envelope": 0.3}
    proj = project_taxon(map_models(models, cold), weights, cold, np.vstack([P, B]))
    X = cold.valid_matrix()
    want = sum(w * models[f].predict(X) for f, w in weights.items()) / sum(weights.values())
    np.testing.assert_allclose(proj.suitability[mask], want, rtol=1e-5, atol=1e-6)
    assert np.isnan(proj.suitability[~mask]).all()
    for f in models:  # the fitted parameters are untouched: nothing was refitted
        for k, v in vars(before[f]).items():
            np.testing.assert_array_equal(np.asarray(vars(models[f])[k]), np.asarray(v))
    # outside-range share against a direct count over the slice's cells
    ref = np.vstack([P, B])
    out = ((X < ref.min(0)) | (X > ref.max(0))).any(axis=1).mean()
    assert proj.outside_range_share == pytest.approx(out)
    assert outside_range_share(present, ref) < proj.outside_range_share
    assert np.nanmin(proj.mess) < 0  # 6 deg C colder reaches below the calibration range


def test_records_shift_to_the_nearest_suitable_ground_within_reach():
    g = _grid((5, 12), np.ones((5, 12), bool))
    suitable = np.zeros((5, 12), bool)
    suitable[2, 4] = True
    moved = shifted_records(g, {"a": (np.array([2, 2]), np.array([3, 11]))}, suitable,
                            reach_km=2.0)
    rows, cols = moved["a"]
    # one cell (about 1.1 km) away moves; seven cells away stays
    assert (rows.tolist(), cols.tolist()) == ([2, 2], [4, 11])


# --------------------------------------------------------------------------- real terrain
class KnownNiche(NicheModel):
    """A virtual species (Hirzel et al. 2001, Ecography 24:374): suitability is a known
    logistic function of temperature, 0.5 at ``t_half_c``; nothing is learned."""

    accepts_invalid_rows = True

    def __init__(self, t_half_c=15.0, width_c=0.1):
        self.t_half_c = t_half_c
        self.width_c = width_c

    def fit(self, presence, background=None):
        self.n_features_in_ = 1
        return self

    def _predict_chunk(self, X):
        return 1.0 / (1.0 + np.exp((np.asarray(X, float)[:, 0] - self.t_half_c) / self.width_c))


LAPSE_C_PER_M = 6.5e-3  # ICAO standard atmosphere lapse rate (from memory)


def _terrain_scenario():
    """Blocks of matplotlib's sample DEM (jacksboro_fault_dem.npz) chosen by construction.

    Present: suitable ground is z >= h1.  Cooled slice: the belt lowered to h2 < h1.
    A (recorded) and B are separate uplands at h1 joined at h2; C is an upland at h1
    whose h2 upland is at least ``clear_km`` from any other h2-suitable cell, so every
    route out of it crosses that much unsuitable ground in both periods.  Blocks are
    found with scipy.ndimage.label and distance_transform_edt, independently of the tool.
    """
    d = cbook.get_sample_data("jacksboro_fault_dem.npz")
    z = d["elevation"].astype(float)
    north = float(max(d["ymin"], d["ymax"]))  # the file's ymin/ymax are swapped
    cell = float(d["dx"])
    g = Grid("EPSG:4326", Affine(cell, 0, float(d["xmin"]), 0, -cell, north), z.shape,
             np.ones(z.shape, bool))
    ns = float(np.mean(g.ns_step_km))
    ew = float(np.mean(g.ew_step_km))
    eight = np.ones((3, 3), bool)
    for h1 in np.arange(300.0, 700.0, 10.0):
        lab1, n1 = ndi.label(z >= h1, structure=eight)
        sizes = np.bincount(lab1.ravel())
        big = [i for i in range(1, n1 + 1) if sizes[i] >= 30]
        for dh in (20.0, 30.0, 40.0, 60.0):
            h2 = h1 - dh
            lab2, _ = ndi.label(z >= h2, structure=eight)
            groups = {}
            for c in big:
                r, col = np.argwhere(lab1 == c)[0]
                groups.setdefault(lab2[r, col], []).append(c)
            pairs = [v for v in groups.values() if len(v) >= 2]
            if not pairs:
                continue
            for k2, members in groups.items():
                if len(members) != 1:
                    continue
                other = (z >= h2) & (lab2 != k2)
                clear = ndi.distance_transform_edt(~other, sampling=(ns, ew))[lab2 == k2].min()
                if clear >= 1.5:
                    a, b = pairs[0][:2]
                    return g, z, h1, h2, lab1 == a, lab1 == b, lab1 == members[0], clear
    raise AssertionError("no scenario found on the sample DEM")


@pytest.mark.slow
def test_real_terrain_block_joined_in_the_cold_slice_and_block_isolated_throughout():
    g, z, h1, h2, A, B, C, clear = _terrain_scenario()
    t_half = 15.0
    temp_present = t_half + (h1 - z) * LAPSE_C_PER_M  # t_half exactly at z = h1
    temp_cold = temp_present - (h1 - h2) * LAPSE_C_PER_M  # t_half at z = h2
    present = _stack(g, {"temperature": temp_present})
    cold = _stack(g, {"temperature": temp_cold})
    model = KnownNiche(t_half).fit(None)
    top = np.unravel_index(np.argmax(np.where(A, z, -np.inf)), z.shape)
    rows, cols = np.array([top[0]]), np.array([top[1]])
    suit = model.predict(present.valid_matrix()).reshape(z.shape).astype(np.float32)
    th = {"taxon": 0.5}
    iso = IsolationParameters(min_gap_km=1.0, min_patch_km2=0.05, within_range_min_km=50.0)
    cand = find_candidates(Clade(g, {"taxon": suit}, {"taxon": (rows, cols)}), th,
                           parameters=iso)
    rec = TaxonRecords("taxon", *g.lonlat(rows, cols), *g.xy(rows, cols), rows, cols,
                       np.array([2]))
    X = present.valid_matrix().astype(np.float64)
    tr = TaxonResult("taxon", rec, suit, presence_env=X[:1], background_env=X[::50],
                     ensemble_weights={"known": 1.0},
                     slice_maps={"cooled": map_models({"known": model}, cold)})
    ss = analyse_slices(g, [TimeSlice("cooled", cold)], {"taxon": tr}, cand, th,
                        isolation=iso)
    lab = cand.patch_labels
    site_b = np.bincount(lab[B & (lab > 0)]).argmax()
    site_c = np.bincount(lab[C & (lab > 0)]).argmax()
    h = ss.history.set_index("site_id")
    assert h.loc[site_b, "kind_cooled"] == "joined"
    assert h.loc[site_b, "ever_connected"] and "cooled" in h.loc[site_b, "connected_in"]
    assert h.loc[site_c, "kind_cooled"] == "isolated"
    assert h.loc[site_c, "n_slices_isolated"] == h.loc[site_c, "n_slices"] == 2
    assert not h.loc[site_c, "ever_connected"]
    # every route out of C crosses at least the clearance, less one cell step
    assert h.loc[site_c, "gap_km_cooled"] >= clear - 0.1
    # C is suitable in both periods (z >= h1 implies z >= h2): a refugium
    assert h.loc[site_c, "refugium"] and h.loc[site_c, "stable_share"] == pytest.approx(1.0)
    # the projection is the known niche on the cooled layer
    np.testing.assert_allclose(ss.projections["cooled"]["taxon"].suitability,
                               model.predict(cold.valid_matrix()).reshape(z.shape), atol=1e-6)
    sites = cand.sites.merge(ss.history, on="site_id")
    sites["rank"] = np.arange(1, len(sites) + 1)
    text = " ".join(history_readings(sites, ss.names, top_n=len(sites)))
    assert f"Site {site_c}" in text and "every past slice" in text
    assert PRESENT not in ss.names


def test_slice_names_are_checked():
    g = _grid((4, 4), np.ones((4, 4), bool))
    with pytest.raises(InputError, match="present"):
        analyse_slices(g, [TimeSlice(PRESENT, _stack(g, {"t": np.zeros((4, 4))}))], {}, None, {})
