"""Exceptions and warnings raised by the screener.

Every error a user can cause derives from :class:`ScreenerError` and also from a
builtin, so callers may catch either.  The command line turns a ``ScreenerError``
into a short message and exit code 2 (bad input); anything else is a bug and is
shown with a traceback only under ``--debug``.

Messages say what is wrong, where (file, row, layer) and what to do.  A public
function whose parameters changed keeps its old form for one release through
:func:`accepts_old_form`, warned as :class:`ScreenerDeprecationWarning`.
"""

from __future__ import annotations

import difflib
import functools
import warnings

__all__ = [
    "ScreenerError",
    "InputError",
    "ProjectError",
    "RecordsError",
    "LayerError",
    "GridMismatchError",
    "OutputError",
    "ScreenerWarning",
    "CollinearityWarning",
    "NoveltyWarning",
    "ScreenerDeprecationWarning",
    "accepts_old_form",
    "suggest",
]


class ScreenerError(Exception):
    """Root of every error the screener raises on purpose."""


class InputError(ScreenerError, ValueError):
    """Bad input that the user can fix (exit code 2)."""


class ProjectError(InputError):
    """A problem in the project file: unknown key, wrong type, missing path."""


class RecordsError(InputError):
    """A problem with the occurrence records (file, column, row or taxon)."""


class LayerError(InputError):
    """A problem with an environmental layer (unreadable, empty, constant...)."""


class GridMismatchError(LayerError):
    """Two layers are not on the same grid (CRS, transform or shape differ)."""


class OutputError(ScreenerError, OSError):
    """The output folder cannot be written (exists, not writable, disk full)."""


class ScreenerWarning(UserWarning):
    """Suspicious but legal input or results."""


class ScreenerDeprecationWarning(ScreenerWarning, FutureWarning):
    """A renamed or retired setting or argument: still read in this release, refused in
    the next.  A FutureWarning, so Python shows it to users by default; a
    ScreenerWarning, so a run lists it among its warnings (console, run.json, report)."""


def accepts_old_form(translate):
    """Decorator: a function whose parameters changed still takes its old form.

    For one release the old call keeps working: ``translate(*args, **kwargs)``
    returns None for a call in the new form, else ``(args, kwargs, message)``, the
    same call in the new form and what to write instead.  The old call is warned
    with :class:`ScreenerDeprecationWarning` (the message) and then made in the new
    form, so both give the same result.  The decorated function keeps its new
    signature and docstring.
    """

    def decorate(function):
        @functools.wraps(function)
        def wrapper(*args, **kwargs):
            new = translate(*args, **kwargs)
            if new is not None:
                args, kwargs, message = new
                warnings.warn(message, ScreenerDeprecationWarning, stacklevel=2)
            return function(*args, **kwargs)

        return wrapper

    return decorate


class CollinearityWarning(ScreenerWarning):
    """Two predictors are strongly correlated over the background."""


class NoveltyWarning(ScreenerWarning):
    """Predictions extrapolate into environments absent from calibration."""


def suggest(name: str, valid) -> str:
    """Return ``" Did you mean 'x'?"`` for the closest valid name, or ``""``.

    Examples
    --------
    >>> suggest("latitud", ["longitude", "latitude", "taxon"])
    " Did you mean 'latitude'?"
    >>> suggest("zzz", ["taxon"])
    ''
    """
    match = difflib.get_close_matches(str(name), [str(v) for v in valid], n=1, cutoff=0.6)
    return f" Did you mean '{match[0]}'?" if match else ""
