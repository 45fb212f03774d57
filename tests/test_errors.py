"""The exception tree and the one idiom for old call forms (accepts_old_form)."""

import inspect
import warnings

import pytest

from screener.errors import (
    InputError,
    LayerError,
    ScreenerDeprecationWarning,
    ScreenerWarning,
    accepts_old_form,
)


def _old_scale(*args, **kwargs):
    """Old form: scale(values, factor=...) -> new form: scale(values, by=...)."""
    if "factor" not in kwargs:
        return None
    kwargs["by"] = kwargs.pop("factor")
    return args, kwargs, "scale(values, factor=f) is replaced by scale(values, by=f)"


@accepts_old_form(_old_scale)
def scale(values, *, by=1.0):
    """Multiply each value."""
    return [v * by for v in values]


def test_old_form_warns_at_the_caller_and_gives_the_new_result():
    with pytest.warns(ScreenerDeprecationWarning, match="by=f") as caught:
        old = scale([1.0, 2.0], factor=3.0)
    assert old == scale([1.0, 2.0], by=3.0) == [3.0, 6.0]
    assert caught[0].filename == __file__  # points at the old call, not the wrapper


def test_new_form_passes_without_a_warning_and_keeps_its_signature():
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert scale([2.0], by=0.5) == [1.0]
    assert list(inspect.signature(scale).parameters) == ["values", "by"]
    assert scale.__doc__ == "Multiply each value."


def test_warning_and_error_kinds():
    # a deprecation shows by default (FutureWarning) and is listed with a run's
    # warnings (ScreenerWarning); input errors are also ValueErrors
    assert issubclass(ScreenerDeprecationWarning, FutureWarning)
    assert issubclass(ScreenerDeprecationWarning, ScreenerWarning)
    assert issubclass(LayerError, InputError) and issubclass(InputError, ValueError)
