"""Process-level settings that make large-array work predictable on Linux.

NumPy asks the kernel for transparent huge pages for every large array
(``madvise(MADV_HUGEPAGE)``).  Where the kernel's huge-page *defrag* policy is
``always`` or ``madvise``, each such request may compact memory synchronously before
the array can be used; on the reference machine this made the isolation stage at 4e6
cells take 11.6 s instead of 7.2 s, and a streamed read 1.5x longer (see
``docs/performance.md``).  :func:`avoid_hugepage_stalls` turns NumPy's request off
for this process in that case only.  The command line calls it; notebook users may
call it themselves, or set ``NUMPY_MADVISE_HUGEPAGE=0`` before importing NumPy.
"""

from __future__ import annotations

import os
from pathlib import Path

__all__ = ["avoid_hugepage_stalls"]

_DEFRAG = Path("/sys/kernel/mm/transparent_hugepage/defrag")


def _defrag_policy() -> str | None:
    """The bracketed value of the kernel's huge-page defrag setting, if readable."""
    try:
        text = _DEFRAG.read_text()
    except OSError:
        return None
    start, end = text.find("["), text.find("]")
    return text[start + 1 : end] if 0 <= start < end else None


def avoid_hugepage_stalls() -> bool:
    """Stop NumPy requesting huge pages where the kernel would stall to provide them.

    Does nothing when the user set ``NUMPY_MADVISE_HUGEPAGE`` (their choice stands),
    off Linux, or when the defrag policy does not compact on request.

    Returns
    -------
    bool
        True when NumPy's huge-page requests were turned off.
    """
    if "NUMPY_MADVISE_HUGEPAGE" in os.environ:
        return False
    if _defrag_policy() not in ("always", "madvise"):
        return False
    try:  # NumPy 2
        from numpy._core.multiarray import _set_madvise_hugepage
    except ImportError:  # pragma: no cover - NumPy 1
        try:
            from numpy.core.multiarray import _set_madvise_hugepage
        except ImportError:
            return False
    _set_madvise_hugepage(False)
    return True
