"""The typed values handed between stages."""

from __future__ import annotations

import dataclasses
import pickle

import numpy as np
import pytest

from screener.results import RecordDrop, RunResult, TaxonRecords, TaxonResult, Threshold


def _records(n=3):
    i = np.arange(n)
    return TaxonRecords("Alpha one", lon=i * 0.1, lat=-i * 0.1, x=i * 0.1, y=-i * 0.1,
                        rows=i, cols=i + 1, lines=i + 2)


def test_record_count_is_the_number_of_cells():
    assert _records(5).n == 5 and isinstance(_records(5).n, int)
    assert _records(0).n == 0


@pytest.mark.parametrize("value", [RecordDrop(3, "A", "no latitude"),
                                   Threshold("mtp", 0.2, 12.5, 0.0)])
def test_drops_and_thresholds_cannot_be_changed(value):
    with pytest.raises(dataclasses.FrozenInstanceError):
        setattr(value, dataclasses.fields(value)[0].name, "other")


def test_defaults_are_not_shared_between_results():
    a = TaxonResult("A", _records(), np.zeros((2, 2), np.float32))
    b = TaxonResult("B", _records(), np.zeros((2, 2), np.float32))
    a.family_maps["x"] = 1
    a.evaluation.append({"auc": 0.9})
    assert b.family_maps == {} and b.evaluation == []
    r1 = RunResult(grid=None, layer_names=[], taxa={}, sites=None)
    r2 = RunResult(grid=None, layer_names=[], taxa={}, sites=None)
    r1.warnings.append("w")
    assert r2.warnings == []


def test_results_survive_the_stage_cache_round_trip():
    # the stage cache pickles TaxonResult values (screener.cache)
    t = TaxonResult("A", _records(), np.linspace(0, 1, 4, dtype=np.float32).reshape(2, 2),
                    thresholds={"mtp": Threshold("mtp", 0.25, 1.0, 0.0)})
    back = pickle.loads(pickle.dumps(t))
    np.testing.assert_array_equal(back.suitability, t.suitability)
    np.testing.assert_array_equal(back.records.cols, t.records.cols)
    assert back.thresholds == t.thresholds


def test_a_run_result_is_changed_only_by_copying():
    r = RunResult(grid=None, layer_names=["a"], taxa={}, sites=None)
    with pytest.raises(dataclasses.FrozenInstanceError):
        r.sampling_points = "points"
    r2 = dataclasses.replace(r, sampling_points="points")
    assert r.sampling_points is None and r2.sampling_points == "points"
    assert r2.layer_names is r.layer_names  # a shallow copy: maps are not duplicated


def test_stage_results_survive_the_stage_cache_round_trip():
    import pandas as pd

    from screener.cache import decode, encode
    from screener.results import OverlapResult

    o = OverlapResult(pd.DataFrame({"D": [0.25]}), ["alike"], [])
    arrays = {}
    back = decode(encode(o, arrays), arrays)
    assert isinstance(back, OverlapResult)
    assert back.readings == ["alike"] and back.table["D"].tolist() == [0.25]
