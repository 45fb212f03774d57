"""Niche-model families, the registry that names them, and fitting helpers.

A new family is one module with a :class:`~screener.models.base.NicheModel` subclass and
one line in :data:`FAMILIES`.
"""

from __future__ import annotations

from sklearn.base import clone

from screener.errors import InputError, suggest
from screener.models.base import NicheModel, check_predictors, training_presence_scores
from screener.models.ellipsoid import EllipsoidNiche
from screener.models.envelope import EnvelopeNiche
from screener.models.forest import DownsampledForest
from screener.models.point_process import DEFAULT_TERMS, TERM_SETS, PointProcessNiche

__all__ = [
    "FAMILIES",
    "DEFAULT_FAMILY",
    "make_model",
    "fit_taxon_models",
    "training_presence_scores",
    "accepts_random_state",
    "accepts_groups",
    "family_params",
    "NicheModel",
    "EllipsoidNiche",
    "EnvelopeNiche",
    "DownsampledForest",
    "PointProcessNiche",
    "TERM_SETS",
    "DEFAULT_TERMS",
    "check_predictors",
]

#: Family key -> estimator class.
FAMILIES: dict[str, type] = {
    "ellipsoid": EllipsoidNiche,
    "envelope": EnvelopeNiche,
    "forest": DownsampledForest,
    "ppm": PointProcessNiche,
}

#: The family used when a project names none.
DEFAULT_FAMILY = "ellipsoid"


def family_params(settings, family: str) -> dict:
    """The ``[models.<family>]`` parameter table of the settings (a fresh dict)."""
    return dict(settings.models.get(family, {}) or {})


def accepts_random_state(family: str) -> bool:
    """True when the family's constructor takes ``random_state``."""
    return "random_state" in _family_class(family)._get_param_names()


def accepts_groups(family: str) -> bool:
    """True when the family's ``fit`` takes ``groups`` (block labels of the records)."""
    import inspect

    return "groups" in inspect.signature(_family_class(family).fit).parameters


def _family_class(family: str) -> type:
    try:
        return FAMILIES[family]
    except (KeyError, TypeError):
        raise InputError(
            f"Unknown model family {family!r}; known families are "
            f"{', '.join(sorted(FAMILIES))}.{suggest(family, FAMILIES)}"
        ) from None


def make_model(family: str, **params) -> NicheModel:
    """An unfitted model of a named family.

    Parameters
    ----------
    family : str
        A key of :data:`FAMILIES` ("ppm", "ellipsoid", "envelope", "forest").
    **params
        Constructor parameters of that family.

    Returns
    -------
    NicheModel

    Raises
    ------
    screener.errors.InputError
        Unknown family (with the nearest valid name) or unknown parameter.

    Examples
    --------
    >>> make_model("ellipsoid")
    EllipsoidNiche()
    >>> make_model("elipsoid")
    Traceback (most recent call last):
    ...
    screener.errors.InputError: Unknown model family 'elipsoid'; known families are \
ellipsoid, envelope, forest, ppm. Did you mean 'ellipsoid'?
    """
    cls = _family_class(family)
    deprecated = getattr(cls, "deprecated_params", {})
    valid = [v for v in cls._get_param_names() if v not in deprecated]
    for name in params:
        if name not in valid and name not in deprecated:
            raise InputError(
                f"Model family {family!r} has no parameter {name!r}; its parameters "
                f"are {', '.join(valid) or '(none)'}.{suggest(name, valid)}"
            )
    return cls(**params)


def fit_taxon_models(
    presence, background, families: dict[str, dict], *, random_state: int = 0
) -> dict[str, NicheModel]:
    """Fit several families to one taxon's presences and background.

    Parameters
    ----------
    presence : array_like of shape (n, p)
    background : array_like of shape (m, p)
    families : dict of str to dict
        Family key -> constructor parameters, e.g. ``{"ellipsoid": {}, "ppm": {}}``.
    random_state : int, default 0
        Seed given to every random family that does not set its own.

    Returns
    -------
    dict of str to fitted NicheModel, in the order of ``families``.
    """
    fitted = {}
    for family, params in families.items():
        params = dict(params or {})
        if accepts_random_state(family):
            params.setdefault("random_state", int(random_state))
        model = make_model(family, **params)
        fitted[family] = clone(model).fit(presence, background)
    return fitted
