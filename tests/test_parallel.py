"""Tests of the executor seam (screener.parallel): one answer whichever backend runs it.

The reference for "same results" is the serial loop; for seeds, numpy's SeedSequence
(spawned children are independent streams, numpy documentation).
"""

from __future__ import annotations

import math
import os
import sys

import numpy as np
import pytest

from screener import overlap as ov
from screener.errors import InputError
from screener.parallel import make_executor, spawn_seeds


@pytest.fixture(scope="module")
def process_executor():
    with make_executor("processes", n_workers=2) as ex:
        yield ex


@pytest.fixture(scope="module")
def dask_executor():
    pytest.importorskip("distributed")
    with make_executor("dask", n_workers=2) as ex:
        yield ex


@pytest.fixture(scope="module")
def small_space():
    rng = np.random.default_rng(0)
    bg_a = rng.normal(size=(300, 3))
    bg_b = rng.normal(size=(300, 3)) + 0.3
    ra = rng.normal(0, 0.5, size=(12, 3))
    rb = rng.normal(0.5, 0.5, size=(14, 3))
    return ov.environmental_space(
        ov.OverlapTaxon("A", env_records=ra, env_background=bg_a),
        ov.OverlapTaxon("B", env_records=rb, env_background=bg_b),
        space_parameters=ov.EnvironmentalSpaceParameters(grid_cells=25),
    )


def test_spawn_seeds_reproducible_and_distinct():
    a = spawn_seeds(42, 200)
    assert a == spawn_seeds(42, 200)
    assert len(set(a)) == 200
    assert all(isinstance(s, int) and 0 <= s < 2**63 for s in a)
    assert spawn_seeds(43, 5) != a[:5]
    # a prefix of a longer draw: the first replicates do not depend on R
    assert spawn_seeds(42, 10) == a[:10]
    g1 = spawn_seeds(np.random.default_rng(1), 4)
    assert g1 == spawn_seeds(np.random.default_rng(1), 4)
    with pytest.raises(InputError, match="random_state"):
        spawn_seeds("seven", 3)


def test_serial_map_preserves_order():
    with make_executor() as ex:
        assert ex.kind == "serial" and ex.n_workers == 1
        assert ex.map(math.sqrt, [9, 4, 1]) == [3.0, 2.0, 1.0]
        assert ex.map(math.sqrt, []) == []
    with pytest.raises(RuntimeError, match="closed"):
        ex.map(math.sqrt, [1])


def test_bad_arguments():
    with pytest.raises(InputError, match="unknown"):
        make_executor("threads")
    with pytest.raises(InputError, match="at least 1"):
        make_executor("processes", n_workers=0)
    with pytest.raises(InputError, match="only used"):
        make_executor("processes", address="tcp://127.0.0.1:8786")


def test_missing_dask_gives_install_hint(monkeypatch):
    monkeypatch.setitem(sys.modules, "distributed", None)  # import now fails
    with pytest.raises(InputError, match=r"pip install 'screener\[dask\]'"):
        make_executor("dask")


def test_process_pool_order_and_one_thread(process_executor):
    ex = process_executor
    assert ex.kind == "processes" and ex.n_workers == 2
    items = list(range(101))
    assert ex.map(math.factorial, items) == [math.factorial(i) for i in items]
    # each worker runs with one BLAS/OpenMP thread
    assert set(ex.map(os.getenv, ["OMP_NUM_THREADS"] * 8)) == {"1"}


@pytest.mark.slow
def test_same_results_on_every_backend(process_executor, dask_executor, small_space):
    serial = ov.equivalency_test(small_space, n_replicates=40, random_state=5)
    sim = ov.similarity_test(small_space, n_replicates=40, random_state=6)
    for ex in (process_executor, dask_executor):
        got = ov.equivalency_test(
            small_space, n_replicates=40, random_state=5, executor=ex
        )
        for stat in ("D", "I"):
            assert np.array_equal(got[stat].null, serial[stat].null), ex.kind
            assert got[stat].p_value == serial[stat].p_value
        got_sim = ov.similarity_test(
            small_space, n_replicates=40, random_state=6, executor=ex
        )
        assert np.array_equal(got_sim["D"].null, sim["D"].null), ex.kind
    assert dask_executor.map(math.factorial, range(30)) == [
        math.factorial(i) for i in range(30)
    ]


class _Bump:
    """Invented stand-in for a niche model (picklable): a Gaussian bump at the
    presences' mean cell of a 12 x 14 grid."""

    shape = (12, 14)

    def __call__(self, cells):
        rows, cols = np.unravel_index(np.asarray(cells), self.shape)
        rr, cc = np.indices(self.shape)
        return np.exp(-0.5 * ((rr - rows.mean()) ** 2 + (cc - cols.mean()) ** 2) / 4.0)


def test_geographic_tests_keeping_sites_same_on_processes(process_executor):
    # The site-keeping randomisations are drawn up front (units, moved patterns), so
    # the worker processes refit the same record sets as the serial loop.
    model = _Bump()
    cells_a = np.ravel_multi_index(([1, 1, 2, 8, 9, 9], [1, 2, 1, 2, 2, 3]), model.shape)
    cells_b = np.ravel_multi_index(([3, 3, 4, 9, 10, 10], [10, 11, 10, 11, 12, 11]),
                                   model.shape)
    eq = dict(n_replicates=30, random_state=2, cluster_km=1.5)
    serial = ov.geographic_equivalency_test(model, cells_a, cells_b, 1.0, **eq)
    got = ov.geographic_equivalency_test(model, cells_a, cells_b, 1.0,
                                         executor=process_executor, **eq)
    assert np.array_equal(got["D"].null, serial["D"].null, equal_nan=True)
    a = ov.OverlapTaxon("A", cells=cells_a, accessible=np.ones(model.shape, bool))
    b = ov.OverlapTaxon("B", cells=cells_b, accessible=np.ones(model.shape, bool))
    tests = ov.OverlapTestParameters(n_replicates=30, random_state=3, cluster_km=1.5)
    serial = ov.geographic_similarity_test(model, a, b, 1.0, test_parameters=tests)
    got = ov.geographic_similarity_test(model, a, b, 1.0, test_parameters=tests,
                                        executor=process_executor)
    assert np.array_equal(got["D"].null, serial["D"].null)
