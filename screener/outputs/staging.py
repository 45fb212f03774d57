"""Write a run's outputs into a staging folder and move it into place at the end.

A failed or interrupted run leaves no half-written output folder.  Every folder the
screener writes holds a run marker (:data:`RUN_MARKER`, a small JSON file with the
run id), and ``overwrite=True`` replaces only such a folder: never a folder the
screener did not write, and never one that holds (or is) an input of the run.
Staging folders left behind by a killed run are removed by the next run that writes
beside them.
"""

from __future__ import annotations

import errno
import json
import logging
import os
import shutil
import socket
import time
import uuid
from contextlib import contextmanager
from pathlib import Path

from screener.errors import OutputError

__all__ = ["staged_output", "check_output_folder", "RUN_MARKER", "new_run_id",
           "read_run_marker", "write_run_marker", "enclosing_run_folder"]

log = logging.getLogger(__name__)

#: file in every folder the screener writes; --overwrite replaces only such folders
RUN_MARKER = ".screener-run"


def new_run_id() -> str:
    """A fresh run id (UTC time plus 8 random hex digits)."""
    return time.strftime("%Y%m%dT%H%M%SZ", time.gmtime()) + "-" + uuid.uuid4().hex[:8]


def write_run_marker(folder, run_id: str) -> Path:
    """Write the run marker into ``folder``: run id, host and process id."""
    from screener import __version__

    p = Path(folder) / RUN_MARKER
    p.write_text(json.dumps({"run_id": run_id, "screener_version": __version__,
                             "host": socket.gethostname(), "pid": os.getpid()}) + "\n",
                 encoding="utf-8")
    return p


def read_run_marker(folder) -> dict | None:
    """The run marker of ``folder`` (a dict with ``run_id``), or None if it has none."""
    p = Path(folder) / RUN_MARKER
    try:
        data = json.loads(p.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    if not isinstance(data, dict) or not isinstance(data.get("run_id"), str):
        return None
    return data


def enclosing_run_folder(path, project_folder=None) -> Path | None:
    """The folder holding a run marker that contains ``path``, if any.

    Folders that also contain ``project_folder`` do not count: a project inside a run
    folder (the demo's ``scenario``) reads its own inputs.
    """
    q = Path(path).expanduser().resolve()
    home = Path(project_folder).expanduser().resolve() if project_folder else None
    for folder in q.parents:
        if home is not None and (folder == home or folder in home.parents):
            return None
        if (folder / RUN_MARKER).is_file():
            return folder
    return None


def _inputs_inside(out: Path, inputs) -> list:
    """Inputs that are ``out`` itself or lie inside it (paths resolved)."""
    found = []
    for p in inputs:
        if p is None:
            continue
        q = Path(p).expanduser().resolve()
        if q == out or out in q.parents:
            found.append(q)
    return found


def _process_gone(marker: dict) -> bool:
    """True when the marker's process ran on this host and no longer exists."""
    if marker.get("host") != socket.gethostname() or not isinstance(marker.get("pid"), int):
        return False
    try:
        os.kill(marker["pid"], 0)
    except ProcessLookupError:
        return True
    except OSError:  # exists but belongs to someone else
        return False
    return False


def remove_stale_staging(out: Path) -> list:
    """Remove staging folders beside ``out`` left by a run that was killed.

    Only folders named ``.<out>.partial-*`` that hold a run marker of a process that
    no longer runs on this host are removed; anything else is left alone.
    """
    removed = []
    parent = out.parent
    if not parent.is_dir():
        return removed
    for p in parent.glob(f".{out.name}.partial-*"):
        marker = read_run_marker(p) if p.is_dir() else None
        if marker is None:
            log.warning("left alone: %s looks like a staging folder but holds no run "
                        "marker; delete it yourself if it is not needed", p)
            continue
        if _process_gone(marker):
            shutil.rmtree(p, ignore_errors=True)
            log.warning("removed %s, left by an interrupted run %s", p, marker["run_id"])
            removed.append(p)
    return removed


def check_output_folder(out_dir, *, overwrite: bool = False, inputs=()) -> Path:
    """Check that ``out_dir`` can be created or replaced; return it resolved.

    Parameters
    ----------
    out_dir : path-like
    overwrite : bool, default False
        Allow replacing an existing folder, but only one an earlier run wrote (it
        holds :data:`RUN_MARKER`).
    inputs : iterable of path-like
        Files and folders the run reads; a folder that is or holds one of them is
        never replaced.

    Raises
    ------
    OutputError
        The folder exists (without ``overwrite``), was not written by the screener,
        holds an input, is a file, or its parent is not writable.
    """
    out = Path(out_dir).expanduser().resolve()
    if out.exists() and not out.is_dir():
        raise OutputError(f"Output path {out} is a file; give a folder path.")
    if out.exists() and not overwrite:
        raise OutputError(
            f"Output folder {out} already exists and won't be replaced without "
            "--overwrite (or choose another --out)."
        )
    inside = _inputs_inside(out, inputs)
    if inside:
        shown = ", ".join(str(p) for p in inside[:3]) + (" ..." if len(inside) > 3 else "")
        raise OutputError(
            f"Output folder {out} holds input(s) of this run ({shown}); replacing it "
            "would delete them. Choose an output folder outside your inputs, e.g. "
            f"{out / 'results'} for a new one."
        )
    if out.exists() and read_run_marker(out) is None:
        raise OutputError(
            f"Output folder {out} was not written by the screener (it has no "
            f"{RUN_MARKER} marker), so --overwrite will not replace it: it may hold "
            "other files. Choose another --out, or move or delete the folder yourself."
        )
    parent = out.parent
    blocker = next((a for a in [parent, *parent.parents] if a.exists()), None)
    if blocker is not None and not blocker.is_dir():
        raise OutputError(
            f"Cannot create the output folder {out}: {blocker} is a file, not a folder; "
            "choose another --out."
        )
    if not parent.exists():
        try:
            parent.mkdir(parents=True)
        except OSError as exc:
            raise OutputError(
                f"Cannot create the folder {parent}: {exc.strerror}; choose another --out."
            ) from None
    if not os.access(parent, os.W_OK | os.X_OK):
        raise OutputError(
            f"Cannot write in {parent} (permission denied); choose another --out."
        )
    return out


def _as_output_error(exc: OSError, out: Path) -> OutputError | None:
    """An :class:`OutputError` for the write failures a user can fix, else None."""
    where = exc.filename or out
    if exc.errno == errno.ENOSPC:
        return OutputError(
            f"The disk is full while writing {where}; free some space and run again "
            "(nothing was written to the output folder)."
        )
    if exc.errno == errno.EDQUOT:
        return OutputError(
            f"Disk quota exceeded while writing {where}; free some space or choose "
            "another --out (nothing was written to the output folder)."
        )
    if exc.errno in (errno.EACCES, errno.EROFS, errno.EPERM):
        return OutputError(
            f"Cannot write {where}: {exc.strerror}; choose another --out (nothing was "
            "written to the output folder)."
        )
    return None


def _keep(stage: Path) -> None:
    """Mark a staging folder as kept for the user (never removed as stale)."""
    marker = read_run_marker(stage) or {"run_id": new_run_id()}
    marker["pid"] = None
    (stage / RUN_MARKER).write_text(json.dumps(marker) + "\n", encoding="utf-8")


@contextmanager
def staged_output(out_dir, *, overwrite: bool = False, inputs=(), run_id: str | None = None):
    """Yield a staging folder beside ``out_dir``; rename it to ``out_dir`` on success.

    The staging folder gets a unique name and the run marker (``run_id``, a new one
    when None) before anything else is written into it; stale staging folders of
    killed runs beside ``out_dir`` are removed first.

    On any exception (including KeyboardInterrupt) the staging folder is removed and
    ``out_dir`` is left as it was (an existing folder survives a failed
    ``overwrite``).  A full disk or a refused write becomes an :class:`OutputError`.

    Raises
    ------
    OutputError
        As :func:`check_output_folder`, or the disk is full / the folder read-only.
    """
    out = check_output_folder(out_dir, overwrite=overwrite, inputs=inputs)
    remove_stale_staging(out)
    stage = out.parent / f".{out.name}.partial-{uuid.uuid4().hex}"
    try:
        stage.mkdir()
        write_run_marker(stage, run_id or new_run_id())
    except OSError as exc:
        shutil.rmtree(stage, ignore_errors=True)
        err = _as_output_error(exc, out)
        if err is None:
            raise
        raise err from None
    try:
        yield stage
    except OSError as exc:
        shutil.rmtree(stage, ignore_errors=True)
        err = _as_output_error(exc, out)
        if err is None:
            raise
        raise err from None
    except BaseException:
        shutil.rmtree(stage, ignore_errors=True)
        raise
    if out.exists():
        try:
            check_output_folder(out, overwrite=overwrite, inputs=inputs)
        except OutputError as exc:
            _keep(stage)
            raise OutputError(
                f"{exc.args[0]} (It appeared or changed during the run; the finished "
                f"outputs are kept in {stage}.)"
            ) from None
    old = None
    try:
        if out.exists():
            old = out.parent / f".{out.name}.old-{uuid.uuid4().hex[:8]}"
            os.replace(out, old)
        os.replace(stage, out)
    except OSError as exc:
        if old is not None and not out.exists():
            os.replace(old, out)  # put the previous outputs back
        shutil.rmtree(stage, ignore_errors=True)
        err = _as_output_error(exc, out)
        if err is None:
            raise
        raise err from None
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)
