"""Write a run's outputs into a staging folder and move it into place at the end.

A failed or interrupted run leaves no half-written output folder; an existing folder
is only replaced with ``overwrite=True``.
"""

from __future__ import annotations

import errno
import os
import shutil
import uuid
from contextlib import contextmanager
from pathlib import Path

from screener.errors import OutputError

__all__ = ["staged_output", "check_output_folder"]


def check_output_folder(out_dir, *, overwrite: bool = False) -> Path:
    """Check that ``out_dir`` can be created or replaced; return it resolved.

    Raises
    ------
    OutputError
        The folder exists (without ``overwrite``), is a file, or its parent is not
        writable.
    """
    out = Path(out_dir).expanduser().resolve()
    if out.exists() and not out.is_dir():
        raise OutputError(f"Output path {out} is a file; give a folder path.")
    if out.exists() and not overwrite:
        raise OutputError(
            f"Output folder {out} already exists and won't be replaced without "
            "--overwrite (or choose another --out)."
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


@contextmanager
def staged_output(out_dir, *, overwrite: bool = False):
    """Yield a staging folder beside ``out_dir``; rename it to ``out_dir`` on success.

    On any exception (including KeyboardInterrupt) the staging folder is removed and
    ``out_dir`` is left as it was (an existing folder survives a failed
    ``overwrite``).  A full disk or a refused write becomes an :class:`OutputError`.

    Raises
    ------
    OutputError
        As :func:`check_output_folder`, or the disk is full / the folder read-only.
    """
    out = check_output_folder(out_dir, overwrite=overwrite)
    stage = out.parent / f".{out.name}.partial-{uuid.uuid4().hex[:8]}"
    try:
        stage.mkdir()
    except OSError as exc:
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
    if out.exists() and not overwrite:  # appeared while we were running
        raise OutputError(
            f"Output folder {out} appeared during the run and won't be replaced "
            f"without --overwrite; the finished outputs are kept in {stage}."
        )
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
