"""Mapping helpers: the refit cost model behind ``geographic_tests = "auto"``."""

import itertools
import time
from types import SimpleNamespace

import numpy as np
import pytest

from screener import pipeline
from screener.models import FAMILIES
from screener.models.mapping import REFIT_COST, refit_seconds
from screener.project import settings_from_dict


@pytest.fixture
def settings(small_layers):
    folder = small_layers[0].parent.parent
    (folder / "occurrences.csv").write_text("taxon,longitude,latitude\nA,10.1,-5.1\n")
    return settings_from_dict(
        {"occurrences": {"path": "occurrences.csv"}, "layers": {"paths": ["layers/*.tif"]}},
        base_dir=folder,
    )


def _pair(settings, n_rows, n_cols):
    mask = np.ones((n_rows, n_cols), bool)
    stack = SimpleNamespace(streamed=False, valid_matrix=lambda: np.zeros((mask.sum(), 2)))
    intake = SimpleNamespace(settings=settings, grid=SimpleNamespace(mask=mask),
                             predictor_stack=lambda: stack)
    taxon = SimpleNamespace(seed=1, background_env=np.zeros((4, 2)))
    return intake, taxon, taxon


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
    messages = []
    progress = SimpleNamespace(step=messages.append)

    small = settings.replace("overlap", geographic_tests="auto", n_replicates=99)
    assert pipeline._geographic_refit(*_pair(small, 60, 80), progress) is not None
    assert messages == []

    # 9 million cells x 4 x 999 maps of the cheapest family: hours, so "auto" skips
    big = settings.replace("overlap", geographic_tests="auto", n_replicates=999)
    assert pipeline._geographic_refit(*_pair(big, 3000, 3000), progress) is None
    assert len(messages) == 1 and "skipped" in messages[0]
    assert "geographic_tests = \"on\"" in messages[0]

    # "on" runs them whatever they cost; "off" never does
    on = big.replace("overlap", geographic_tests="on")
    assert pipeline._geographic_refit(*_pair(on, 3000, 3000), progress) is not None
    off = small.replace("overlap", geographic_tests="off")
    assert pipeline._geographic_refit(*_pair(off, 60, 80), progress) is None
