"""The stage cache: content-keyed digests, atomic pickles, damaged entries are misses."""

from __future__ import annotations

import logging
from pathlib import Path

import numpy as np
import pytest

from screener import __version__
from screener.cache import StageCache, digest


def test_digest_hashes_arrays_by_content_not_identity():
    a = np.arange(12, dtype=np.float64).reshape(3, 4)
    assert digest("stage", a) == digest("stage", a.copy())
    b = a.copy()
    b[2, 3] += 1e-12
    assert digest("stage", a) != digest("stage", b)


def test_digest_tells_dtype_and_shape_apart():
    a = np.zeros(6, dtype=np.float32)
    assert digest(a) != digest(a.astype(np.float64))
    assert digest(a) != digest(a.reshape(2, 3))


def test_digest_ignores_dict_order_but_not_list_order():
    assert digest({"a": 1, "b": 2}) == digest({"b": 2, "a": 1})
    assert digest([1, 2]) != digest([2, 1])


def test_digest_treats_numpy_scalars_and_paths_as_their_values():
    assert digest(np.int64(3), np.float32(0.5)) == digest(3, 0.5)
    assert digest(Path("a") / "b") == digest(str(Path("a") / "b"))


def test_digest_is_a_sha256_hex_string_that_depends_on_the_version(monkeypatch):
    d = digest("x")
    assert len(d) == 64 and int(d, 16) >= 0
    monkeypatch.setattr("screener.cache.__version__", __version__ + ".post1")
    assert digest("x") != d


def test_disabled_cache_stores_nothing(tmp_path):
    cache = StageCache(None)
    assert not cache.enabled
    cache.put("taxon", "k", {"v": 1})
    assert cache.get("taxon", "k") is None
    assert cache.hits == [] and cache.misses == []


def test_round_trip_counts_hits_and_misses(tmp_path):
    cache = StageCache(tmp_path / "c")
    key = digest("taxon", np.arange(3))
    assert cache.get("taxon", key) is None
    value = {"map": np.linspace(0, 1, 5, dtype=np.float32), "n": 3}
    cache.put("taxon", key, value)
    got = StageCache(tmp_path / "c").get("taxon", key)
    np.testing.assert_array_equal(got["map"], value["map"])
    assert got["n"] == 3
    assert cache.get("taxon", key)["n"] == 3
    assert cache.misses == ["taxon"] and cache.hits == ["taxon"]
    # the write went through a temporary file that was renamed into place
    files = [p.name for p in (tmp_path / "c" / "taxon").iterdir()]
    assert files == [f"{key}.npz"]


def test_damaged_entry_is_a_miss_not_a_crash(tmp_path):
    cache = StageCache(tmp_path)
    cache.put("overlap", "k", [1, 2, 3])
    assert StageCache(tmp_path).get("overlap", "k") == [1, 2, 3]
    (tmp_path / "overlap" / "k.npz").write_bytes(b"not an archive")
    assert cache.get("overlap", "k") is None
    assert cache.misses == ["overlap"] and "unreadable" in cache.problems[0]


def test_pickled_entries_are_never_loaded(tmp_path):
    import pickle

    (tmp_path / "taxon").mkdir()
    (tmp_path / "taxon" / "k.pickle").write_bytes(pickle.dumps({"v": 1}))
    cache = StageCache(tmp_path)
    assert cache.get("taxon", "k") is None
    assert "never loaded" in cache.problems[0]


def test_unwritable_cache_only_logs(tmp_path, caplog):
    blocker = tmp_path / "file"
    blocker.write_text("a file where the cache folder should go")
    cache = StageCache(blocker)
    with caplog.at_level(logging.WARNING, logger="screener.cache"):
        cache.put("taxon", "k", 1)
    assert "could not write the cache" in caplog.text
    assert cache.get("taxon", "k") is None


@pytest.mark.parametrize("stage", ["taxon", "overlap"])
def test_stages_do_not_share_keys(tmp_path, stage):
    cache = StageCache(tmp_path)
    cache.put(stage, "same", stage)
    other = "overlap" if stage == "taxon" else "taxon"
    assert cache.get(other, "same") is None
    assert cache.get(stage, "same") == stage


def test_digest_depends_on_the_code_that_computed_the_stage(monkeypatch):
    # A changed source file with an unchanged version number must not be served
    # results cached by the old code.
    import screener.cache as cache_mod

    before = digest("x")
    assert len(cache_mod.code_fingerprint()) == 64
    monkeypatch.setattr(cache_mod, "_CODE_FINGERPRINT", "0" * 64)
    assert digest("x") != before
