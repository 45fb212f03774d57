"""The huge-page setting is changed only where the kernel would stall (policy text as
the Linux kernel prints it in /sys/kernel/mm/transparent_hugepage/defrag)."""

import pytest

from screener import system

np_ma = pytest.importorskip("numpy._core.multiarray")


@pytest.fixture
def restore_numpy_setting():
    yield
    np_ma._set_madvise_hugepage(True)


@pytest.mark.parametrize(
    "policy, changed",
    [
        ("always defer defer+madvise [madvise] never\n", True),
        ("[always] defer defer+madvise madvise never\n", True),
        ("always defer defer+madvise madvise [never]\n", False),
        ("always [defer] defer+madvise madvise never\n", False),
    ],
)
def test_only_policies_that_compact_on_request(
    tmp_path, monkeypatch, restore_numpy_setting, policy, changed
):
    f = tmp_path / "defrag"
    f.write_text(policy)
    monkeypatch.setattr(system, "_DEFRAG", f)
    monkeypatch.delenv("NUMPY_MADVISE_HUGEPAGE", raising=False)
    np_ma._set_madvise_hugepage(True)
    assert system.avoid_hugepage_stalls() is changed
    # the setter returns the previous value: False when we turned it off
    assert np_ma._set_madvise_hugepage(True) is (not changed)


def test_the_users_choice_stands(tmp_path, monkeypatch, restore_numpy_setting):
    f = tmp_path / "defrag"
    f.write_text("always defer defer+madvise [madvise] never\n")
    monkeypatch.setattr(system, "_DEFRAG", f)
    monkeypatch.setenv("NUMPY_MADVISE_HUGEPAGE", "1")
    assert system.avoid_hugepage_stalls() is False


def test_unreadable_policy_changes_nothing(tmp_path, monkeypatch):
    monkeypatch.setattr(system, "_DEFRAG", tmp_path / "missing")
    monkeypatch.delenv("NUMPY_MADVISE_HUGEPAGE", raising=False)
    assert system.avoid_hugepage_stalls() is False
