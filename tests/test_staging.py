"""Staged output folders: all or nothing, an existing folder survives a failed run."""

from __future__ import annotations

import errno

import pytest

from screener.errors import OutputError, ScreenerError
from screener.outputs.staging import (
    RUN_MARKER,
    check_output_folder,
    read_run_marker,
    staged_output,
    write_run_marker,
)


def _leftovers(parent):
    return sorted(p.name for p in parent.iterdir() if ".partial-" in p.name or ".old-" in p.name)


def test_output_errors_are_screener_errors_for_the_cli():
    # the CLI turns ScreenerError into exit code 2 without a traceback
    assert issubclass(OutputError, ScreenerError) and issubclass(OutputError, OSError)


def test_check_creates_missing_parents_and_resolves(tmp_path):
    out = check_output_folder(tmp_path / "a" / "b" / "run")
    assert out == (tmp_path / "a" / "b" / "run").resolve()
    assert out.parent.is_dir() and not out.exists()


def test_check_refuses_an_existing_folder_without_overwrite(tmp_path):
    (tmp_path / "run").mkdir()
    with pytest.raises(OutputError, match="--overwrite"):
        check_output_folder(tmp_path / "run")
    # with --overwrite only a folder the screener wrote (it has the run marker)
    with pytest.raises(OutputError, match="not written by the screener"):
        check_output_folder(tmp_path / "run", overwrite=True)
    write_run_marker(tmp_path / "run", "earlier")
    assert check_output_folder(tmp_path / "run", overwrite=True) == (tmp_path / "run")


def test_check_refuses_a_folder_holding_an_input(tmp_path):
    data = tmp_path / "project" / "records.csv"
    data.parent.mkdir()
    data.write_text("taxon\n")
    write_run_marker(tmp_path / "project", "earlier")
    with pytest.raises(OutputError, match="holds input"):
        check_output_folder(tmp_path / "project", overwrite=True, inputs=[data])


def test_check_refuses_a_file_and_a_file_as_parent(tmp_path):
    f = tmp_path / "f.txt"
    f.write_text("x")
    with pytest.raises(OutputError, match="is a file"):
        check_output_folder(f, overwrite=True)
    with pytest.raises(OutputError, match="is a file, not a folder"):
        check_output_folder(f / "sub" / "run")


def test_success_moves_the_staging_folder_into_place(tmp_path):
    with staged_output(tmp_path / "run", run_id="r1") as stage:
        assert stage.parent == tmp_path and stage.name.startswith(".run.partial-")
        (stage / "a.csv").write_text("x\n")
        assert not (tmp_path / "run").exists()
    assert (tmp_path / "run" / "a.csv").read_text() == "x\n"
    assert read_run_marker(tmp_path / "run")["run_id"] == "r1"
    assert _leftovers(tmp_path) == []


def test_failure_leaves_nothing_and_keeps_the_old_folder(tmp_path):
    old = tmp_path / "run"
    old.mkdir()
    write_run_marker(old, "previous")
    (old / "keep.txt").write_text("previous run")
    for exc in (RuntimeError("boom"), KeyboardInterrupt()):
        with pytest.raises(type(exc)):
            with staged_output(old, overwrite=True) as stage:
                (stage / "half.csv").write_text("half")
                raise exc
        assert (old / "keep.txt").read_text() == "previous run"
        assert not (old / "half.csv").exists()
        assert _leftovers(tmp_path) == []


def test_overwrite_replaces_the_old_folder_whole(tmp_path):
    old = tmp_path / "run"
    old.mkdir()
    write_run_marker(old, "previous")
    (old / "stale.txt").write_text("old")
    with staged_output(old, overwrite=True) as stage:
        (stage / "new.txt").write_text("new")
    assert sorted(p.name for p in old.iterdir()) == [RUN_MARKER, "new.txt"]
    assert _leftovers(tmp_path) == []


def test_folder_that_appears_during_the_run_is_not_replaced(tmp_path):
    out = tmp_path / "run"
    with pytest.raises(OutputError, match="appeared or changed during the run"):
        with staged_output(out) as stage:
            (stage / "done.txt").write_text("finished")
            out.mkdir()
    # the finished outputs are kept beside it, as the message says
    kept = [p for p in tmp_path.iterdir() if ".partial-" in p.name]
    assert len(kept) == 1 and (kept[0] / "done.txt").exists()


@pytest.mark.parametrize("code,words", [(errno.ENOSPC, "disk is full"),
                                        (errno.EDQUOT, "quota"),
                                        (errno.EROFS, "Cannot write")])
def test_write_failures_a_user_can_fix_become_output_errors(tmp_path, code, words):
    with pytest.raises(OutputError, match=words):
        with staged_output(tmp_path / "run"):
            raise OSError(code, "simulated", str(tmp_path / "run" / "x.tif"))
    assert not (tmp_path / "run").exists() and _leftovers(tmp_path) == []


def test_other_os_errors_pass_through(tmp_path):
    with pytest.raises(OSError) as info:
        with staged_output(tmp_path / "run"):
            raise OSError(errno.EIO, "simulated I/O error")
    assert not isinstance(info.value, OutputError)
    assert _leftovers(tmp_path) == []
