"""Mapping helpers: the refit cost model behind ``geographic_tests = "auto"``."""

import itertools
import time
from types import SimpleNamespace

import numpy as np
import pytest

from screener.models import FAMILIES
from screener.models.mapping import REFIT_COST, geographic_refit, refit_seconds
from screener.project import settings_from_dict


@pytest.fixture
def settings(small_layers):
    folder = small_layers[0].parent.parent
    (folder / "occurrences.csv").write_text("taxon,longitude,latitude\nA,10.1,-5.1\n")
    return settings_from_dict(
        {"occurrences": {"path": "occurrences.csv"}, "layers": {"paths": ["layers/*.tif"]}},
        base_dir=folder,
    )


def _refit(settings, n_rows, n_cols, streamed=False):
    mask = np.ones((n_rows, n_cols), bool)
    stack = SimpleNamespace(streamed=streamed, grid=SimpleNamespace(mask=mask),
                            valid_matrix=lambda: np.zeros((mask.sum(), 2)))
    background = np.zeros((4, 2))
    return geographic_refit(settings, stack, background, background, seed=1)


def test_every_family_has_a_refit_cost():
    # a family added without a cost would be costed as the dearest one; say it here
    assert set(FAMILIES) <= set(REFIT_COST)
    for family in FAMILIES:
        assert refit_seconds(family, 4_000_000) > refit_seconds(family, 1_000) > 0


def test_auto_geographic_tests_choose_from_problem_size_not_from_a_clock(
        settings, monkeypatch):
    # a clock that jumps an hour at every reading: a choice made by timing a trial
    # refit (as before) skipped every pair on a busy machine and ran them on an idle one
    clock = itertools.count(step=3600.0)
    monkeypatch.setattr(time, "perf_counter", lambda: float(next(clock)))
    small = settings.replace("overlap", geographic_tests="auto", n_replicates=99)
    refit, skipped = _refit(small, 60, 80)
    assert refit is not None and skipped == ""

    # 9 million cells x 4 x 999 maps of the cheapest family: hours, so "auto" skips
    big = settings.replace("overlap", geographic_tests="auto", n_replicates=999)
    refit, skipped = _refit(big, 3000, 3000)
    assert refit is None
    assert "skipped" in skipped and "geographic_tests = \"on\"" in skipped

    # "on" runs them whatever they cost; "off" never does
    on = big.replace("overlap", geographic_tests="on")
    assert _refit(on, 3000, 3000)[0] is not None
    off = small.replace("overlap", geographic_tests="off")
    assert _refit(off, 60, 80) == (None, "")
    # layers streamed from disk: "auto" skips and says why, "on" runs
    refit, skipped = _refit(small, 60, 80, streamed=True)
    assert refit is None and "streamed" in skipped
    assert _refit(small.replace("overlap", geographic_tests="on"), 60, 80,
                  streamed=True)[0] is not None
