"""A stack streamed from disk window by window gives the same values as one in memory."""

import numpy as np
import pytest
from numpy.testing import assert_allclose, assert_array_equal

from screener.layers import check_layers, read_layers


@pytest.fixture
def stacks(small_layers):
    eager = read_layers(small_layers)
    # 4 kB "budget" forces streaming; 120-cell blocks force many windows
    streamed = read_layers(small_layers, memory_mb=0.004, block_cells=120)
    return eager, streamed


def test_streamed_stack_matches_in_memory(stacks):
    eager, streamed = stacks
    assert not eager.streamed and streamed.streamed
    assert_array_equal(eager.grid.mask, streamed.grid.mask)
    for name in eager.names:
        assert_array_equal(eager.layer(name), streamed.layer(name))
    rng = np.random.default_rng(0)
    rows = rng.integers(0, 30, 200)
    cols = rng.integers(0, 40, 200)
    assert_array_equal(eager.values_at(rows, cols), streamed.values_at(rows, cols,
                                                                       max_cells=300))
    got = [(sl, X, v) for sl, X, v in streamed.iter_blocks(max_cells=160)]
    assert len(got) > 1  # really windowed
    assert_array_equal(np.concatenate([X for _, X, _ in got]), eager.valid_matrix())
    assert_array_equal(streamed.valid_matrix(), eager.valid_matrix())
    sub = streamed.select(["gamma", "alpha"])
    assert_array_equal(sub.layer("alpha"), eager.layer("alpha"))
    assert eager.nodata_share == streamed.nodata_share


def test_checks_agree_between_streamed_and_in_memory(stacks):
    eager, streamed = stacks
    a, b = check_layers(eager), check_layers(streamed)
    assert a.constant == b.constant and a.nodata_share == b.nodata_share
    assert [(x, y) for x, y, _ in a.collinear] == [(x, y) for x, y, _ in b.collinear]


def test_derived_layers_on_a_streamed_stack(stacks):
    eager, streamed = stacks
    extra = eager.layer("alpha") * 2
    extra[10, 10] = np.nan  # a derived layer with a hole leaves the valid mask
    e2 = eager.with_layers({"double": extra})
    s2 = streamed.with_layers({"double": extra})
    assert not e2.grid.mask[10, 10] and not s2.grid.mask[10, 10]
    assert_array_equal(e2.valid_matrix(), s2.valid_matrix())


@pytest.mark.slow
def test_model_maps_identical_when_streamed(tmp_path):
    from screener.demo import write_demo_scenario
    from screener.intake import load_inputs
    from screener.pipeline import model_taxon
    from screener.project import load_project

    project = write_demo_scenario(tmp_path / "scen", size="small")
    project.write_text(project.read_text() + "\n[evaluation]\nn_null = 0\n")
    s = load_project(project)
    eager = load_inputs(s)
    # far below the stack's size: stream it
    streamed = load_inputs(s.replace("compute", memory_mb=0.05))
    assert streamed.stack.streamed and not eager.stack.streamed
    taxon = next(iter(eager.records.taxa))
    a, b = model_taxon(eager, taxon), model_taxon(streamed, taxon)
    assert_array_equal(a.suitability, b.suitability)
    assert_array_equal(a.mess, b.mess)
    # NaN where a measure is not defined: equal when both are NaN (numpy's rule)
    np.testing.assert_equal(a.evaluation, b.evaluation)


@pytest.mark.slow
def test_parallel_prediction_over_windows_matches_serial(small_layers):
    # Each worker reads its own windows of a streamed stack; the map is identical.
    from screener.models import make_model
    from screener.parallel import make_executor
    from screener.models.mapping import predict_map

    streamed = read_layers(small_layers, memory_mb=0.004)
    rng = np.random.default_rng(0)
    B = streamed.values_at(rng.integers(3, 30, 300), rng.integers(3, 40, 300))
    model = make_model("ellipsoid").fit(B[:12], B)
    serial = predict_map(model, streamed, max_cells=200)
    with make_executor("processes", n_workers=2) as ex:
        parallel = predict_map(model, streamed, max_cells=200, map_fn=ex.map)
    assert_array_equal(serial, parallel)
    eager = predict_map(model, read_layers(small_layers), max_cells=200)
    assert_array_equal(serial, eager)
    # MESS over windows on workers equals MESS of the in-memory stack
    from screener.novelty import mess_map

    with make_executor("processes", n_workers=2) as ex:
        m_par, i_par = mess_map(streamed, B, max_cells=200, map_fn=ex.map)
    m_mem, i_mem = mess_map(read_layers(small_layers), B, max_cells=200)
    assert_array_equal(m_par, m_mem)
    assert_array_equal(i_par, i_mem)


@pytest.mark.parametrize("family", ["ppm", "ellipsoid", "envelope", "forest"])
def test_whole_block_prediction_equals_prediction_of_valid_cells(small_layers, family):
    # Mostly valid blocks are predicted whole and masked; the map must equal the
    # model's own predictions at the valid cells, whichever path a block took.
    from screener.models import make_model
    from screener.models.mapping import predict_map

    stack = read_layers(small_layers)
    valid = stack.grid.mask
    assert 0 < valid.mean() < 1  # some blocks partly invalid, some whole
    rng = np.random.default_rng(1)
    rows, cols = np.nonzero(valid)
    pick = rng.choice(rows.size, 300, replace=False)
    B = stack.values_at(rows[pick], cols[pick])
    params = {"n_estimators": 20} if family == "forest" else {}
    model = make_model(family, **params).fit(B[:15], B)
    got = predict_map(model, stack, max_cells=200)
    want = model.predict(stack.valid_matrix()).astype(np.float32)
    assert np.isnan(got[~valid]).all()
    assert_allclose(got[valid], want, rtol=1e-6, atol=1e-7)
