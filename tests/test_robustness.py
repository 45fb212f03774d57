"""Record resampling: bootstrap refits of the records and the plan's sites."""

import numpy as np
import pytest
from affine import Affine

from screener.grid import Grid
from screener.isolation import IsolationParameters
from screener.robustness import RefitPlan, record_resampling


def scene():
    """One predictor on a 12 x 40 grid of 1 km cells.

    A recorded block (values about 0.3) with nine records, one outlying record on a
    single cell at 0.6, a patch at 0.31 far to the east (suitable with any records)
    and a patch at 0.58 that only the outlier's low threshold makes suitable.
    Everything else is 5.0 (far outside the niche).
    """
    env = np.full((12, 40), 5.0)
    env[2:10, 2:8] = 0.30 + 0.01 * (np.arange(6) - 2.5)  # recorded block
    env[0, 14] = 0.60  # the outlier's cell
    env[4:8, 20:24] = 0.58  # marginal patch
    env[4:8, 32:36] = 0.31  # strong patch
    grid = Grid("EPSG:32633", Affine(1000, 0, 500000, 0, -1000, 5000000), env.shape)
    rows = np.array([3, 4, 5, 6, 7, 8, 3, 5, 7, 0])
    cols = np.array([2, 3, 4, 5, 6, 7, 7, 2, 4, 14])
    labels = np.zeros(env.shape, np.int32)
    labels[4:8, 32:36] = 1  # plan site S01: the strong patch
    labels[4:8, 20:24] = 2  # plan site S02: the marginal patch
    values = env.reshape(-1, 1).astype(np.float32)
    return grid, values, rows, cols, labels


@pytest.mark.slow
def test_sites_resting_on_one_record_are_found_less_often():
    grid, values, rows, cols, labels = scene()
    plan = RefitPlan(
        grid=grid, values=values, family="ellipsoid", params={},
        records={"A": (rows, cols)}, background={"A": values.astype(np.float64)},
        relax=0.1, use="mtp",
        isolation=IsolationParameters(min_gap_km=5.0, min_patch_km2=1.0,
                                      within_range_min_km=100.0),
        site_labels=labels, n_sites=2, top_k=1,
    )
    shares = record_resampling(plan, 40, random_state=3)
    again = record_resampling(plan, 40, random_state=3)
    np.testing.assert_array_equal(shares, again)  # seeds drawn up front
    suitable, isolated, top = shares
    # the strong patch is suitable and isolated (gap 24 km) under every resample
    assert suitable[0] == 1.0 and isolated[0] == 1.0
    # the marginal patch needs the outlying record, which a bootstrap resample of
    # n = 10 holds with probability 1 - (1 - 1/10)^10 = 0.65 (Efron & Tibshirani
    # 1993): found in some refits, not all (the bounds allow for 40 draws)
    assert 0.35 <= suitable[1] <= 0.9
    assert isolated[1] <= suitable[1]
    assert ((0 <= shares) & (shares <= 1)).all()


def test_refit_plan_for_plan_takes_the_runs_settings(small_layers):
    from types import SimpleNamespace

    from screener.project import settings_from_dict

    folder = small_layers[0].parent.parent
    (folder / "occurrences.csv").write_text("taxon,longitude,latitude\nA,10.1,-5.1\n")
    settings = settings_from_dict(
        {"occurrences": {"path": "occurrences.csv"}, "layers": {"paths": ["layers/*.tif"]},
         "models": {"families": ["ppm", "ellipsoid"]},
         "thresholds": {"use": "relaxed", "relax": 0.2},
         "ranking": {"top_k": 3}},
        base_dir=folder,
    )
    grid, values, rows, cols, labels = scene()
    stack = SimpleNamespace(grid=grid, valid_matrix=lambda: values)
    taxon = SimpleNamespace(records=SimpleNamespace(rows=rows, cols=cols),
                            background_env=values[:50])
    plan = RefitPlan.for_plan(settings, stack, {"A": taxon}, labels, 2)
    # the run's first family, with a seed because it takes one
    assert plan.family == "ppm" and plan.seeded
    assert plan.use == "relaxed" and plan.relax == 0.2 and plan.top_k == 3
    # the relaxed set is primary, so the check set is the minimum training presence
    assert tuple(plan.isolation.threshold_names) == ("relaxed", "mtp")
    assert plan.records["A"][0] is rows and plan.background["A"] is taxon.background_env
    assert plan.n_sites == 2 and plan.values is values
