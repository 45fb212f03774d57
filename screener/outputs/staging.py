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
    if not parent.exists():
        try:
            parent.mkdir(parents=True)
        except OSError as exc:
            raise OutputError(f"Cannot create the folder {parent}: {exc.strerror}.") from None
    if not os.access(parent, os.W_OK | os.X_OK):
        raise OutputError(
            f"Cannot write in {parent} (permission denied); choose another --out."
        )
    return out


@contextmanager
def staged_output(out_dir, *, overwrite: bool = False):
    """Yield a staging folder beside ``out_dir``; rename it to ``out_dir`` on success.

    On any exception (including KeyboardInterrupt) the staging folder is removed and
    ``out_dir`` is left as it was.  A full disk becomes an :class:`OutputError`.
    """
    out = check_output_folder(out_dir, overwrite=overwrite)
    stage = out.parent / f".{out.name}.partial-{uuid.uuid4().hex[:8]}"
    stage.mkdir()
    try:
        yield stage
    except OSError as exc:
        shutil.rmtree(stage, ignore_errors=True)
        if exc.errno == errno.ENOSPC:
            raise OutputError(
                f"The disk is full while writing {exc.filename or out}; free some space "
                "and run again (nothing was written to the output folder)."
            ) from None
        if exc.errno in (errno.EACCES, errno.EROFS, errno.EPERM):
            raise OutputError(
                f"Cannot write {exc.filename or out}: {exc.strerror}; choose another --out."
            ) from None
        raise
    except BaseException:
        shutil.rmtree(stage, ignore_errors=True)
        raise
    old = None
    if out.exists():
        old = out.parent / f".{out.name}.old-{uuid.uuid4().hex[:8]}"
        os.replace(out, old)
    os.replace(stage, out)
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)
