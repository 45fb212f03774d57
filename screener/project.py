"""Project file (TOML) to validated, typed settings.

The schema below is the single source of every setting, its type, its default and
its meaning; the user guide's settings table is generated from it
(:func:`settings_table_markdown`).  Unknown keys are errors that name the nearest
valid key; paths are resolved relative to the project file.
"""

from __future__ import annotations

import copy
import dataclasses
import functools
import glob
import sys
import warnings
from dataclasses import dataclass, field, fields, make_dataclass
from pathlib import Path

import numpy as np

from screener.errors import ProjectError, ScreenerDeprecationWarning, suggest

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

__all__ = [
    "SCHEMA",
    "SECTION_TYPES",
    "Setting",
    "SectionSettings",
    "Settings",
    "default",
    "load_project",
    "setting",
    "settings_from_dict",
    "settings_table_markdown",
]

#: section -> key -> (type(s), default, description[, rules]).  ``Path`` marks a path
#: relative to the project file; ``[Path]`` a list of paths or glob patterns.  The
#: optional rules are a dict: ``choices`` (allowed values), ``each`` (allowed items of
#: a list), ``min`` / ``max`` (inclusive bounds), ``above`` / ``below`` (exclusive
#: bounds) and ``note`` (what the error message adds after the bounds).  Each section becomes a frozen dataclass (:data:`SECTION_TYPES`) whose
#: fields carry their :class:`Setting` as metadata.
SCHEMA: dict = {
    "project": {
        "name": (str, "screener project", "Name shown in the report and field sheets."),
        "random_state": (int, 0, "Seed for every random draw (background, tests, weights)."),
        "taxa": (list, [], "Only these taxa (default: every taxon in the record file)."),
    },
    "occurrences": {
        "path": (Path, None, "Record CSV: taxon + longitude/latitude (WGS84) or x/y (grid CRS)."),
        "taxon_column": (str, "taxon", "Name of the taxon column (Darwin Core files: scientificName unless another rank column, e.g. genus, is named)."),
        "encoding": (str, "", "Text encoding of the file when it is not UTF-8, e.g. latin-1."),
        "decimal": (str, "", 'Decimal mark: "." or ","; detected when empty.', {"choices": ("", ".", ",")}),
        "min_records": (int, 3, "A taxon with fewer kept records stops the run.", {"min": 1}),
        "thin_km": (float, 0.0, "Thin records so none are closer than this (km); 0 = off.", {"min": 0, "note": " (0 = no thinning)"}),
        "cluster_cells": (int, 5, "Records chained by gaps of at most this many grid cells form one spatial cluster, which the overlap tests, the jackknife and the null model treat as one unit; 0 = every record on its own.", {"min": 0, "note": " (0 = records independent)"}),
        "sensitive": ((bool, list), False, "Generalise these taxa's coordinates (true = all)."),
        "max_uncertainty_m": (float, 0.0, "Darwin Core: drop records whose coordinateUncertaintyInMeters exceeds this (m); 0 = the record's cell size.", {"min": 0}),
        "basis_of_record": (list, [], 'Darwin Core: keep only these basisOfRecord values, e.g. ["PreservedSpecimen"]; empty = all.'),
        "date_from": (str, "", 'Darwin Core: keep records whose eventDate is on or after this, e.g. "1990" or "1990-05-17".'),
        "date_to": (str, "", "Darwin Core: keep records whose eventDate is on or before this."),
        "flagged_records": (str, "drop", 'Darwin Core records with a georeferencing flag (0,0 always dropped): "drop" or "keep" with a note.', {"choices": ("drop", "keep")}),
    },
    "layers": {
        "paths": ([Path], None, "Raster files (glob patterns allowed); each band of a multi-band file is a layer named by its band description."),
        "alignment": (str, "warp", '"warp": resample layers onto the reference grid; "strict": layers must already share one grid.', {"choices": ("warp", "strict")}),
        "reference": (str, "", "Layer whose grid the others are aligned to (default: the first layer)."),
        "crs": (str, "", 'CRS of the reference grid, e.g. "EPSG:4326", when it is not a layer\'s.'),
        "resolution": ((float, list), 0.0, "Cell size of the reference grid in CRS units (or [x, y]); 0 = the first layer's."),
        "extent": (list, [], "Study area [xmin, ymin, xmax, ymax] in CRS units; every layer must cover it."),
        "elevation": (str, "", "Name (file stem) of the elevation layer in metres, if any."),
        "derive": (list, [], 'Terrain layers derived from elevation: "slope", "aspect".', {"each": ("slope", "aspect")}),
        "exclude": (list, [], "Layer names read but not used as predictors."),
        "categorical": (list, [], "Categorical layers, expanded to 0/1 indicator layers."),
        "nodata": (dict, {}, "Nodata value per layer name, for files that lack a nodata tag."),
        "cell_budget": (int, 50_000_000, "Refuse grids with more cells than this.", {"min": 1}),
    },
    "background": {
        "buffer_km": (float, 50.0, "Accessible area: cells within this distance of a record (km).", {"above": 0}),
        "max_points": (int, 10_000, "Background cells drawn from the accessible area.", {"min": 10}),
    },
    "models": {
        "families": (list, ["ellipsoid", "envelope"], "Model families to fit and combine."),
        "clamp": (bool, True, "Map with predictors clamped to each model's calibration range (records and background); false lets models extrapolate. Either way candidates.csv gives each site's clamped_share."),
        "ellipsoid": (dict, {}, "Parameters of the ellipsoid (Mahalanobis) family."),
        "ppm": (dict, {}, "Parameters of the Poisson point-process family (terms, l1_penalty, ...)."),
        "envelope": (dict, {}, "Parameters of the environmental-envelope family."),
        "forest": (dict, {}, "Parameters of the down-sampled random forest."),
    },
    "evaluation": {
        "jackknife_below": (int, 25, "Use the jackknife below this many records.", {"min": 0}),
        "n_null": (int, 99, "Null-model replicates for the AUC test (0 = off).", {"min": 0, "note": " (0 = no null-model test)"}),
    },
    "thresholds": {
        "relax": (float, 0.1, "Relaxed threshold = MTP x (1 - relax).", {"min": 0, "below": 1}),
        "use": (str, "mtp", 'Threshold that defines suitable cells: "mtp" or "relaxed".', {"choices": ("mtp", "relaxed")}),
    },
    "overlap": {
        "n_replicates": (int, 999, "Replicates of each equivalency and similarity test; the smallest possible p is 1 / (n_replicates + 1).", {"min": 1, "note": "; the smallest possible p is 1 / (n_replicates + 1), so 99 or more are usual"}),
        "similarity_hypothesis": (str, "conserved", 'What the similarity tests ask: "conserved" (niches more alike than their environments explain) or "diverged" (less alike).', {"choices": ("conserved", "diverged")}),
        "grid_cells": (int, 64, "Environmental-space grid cells along each principal axis.", {"min": 10}),
        "available_environment": (str, "accessible", 'Shared available environment of a pair: "accessible" (union of both accessible areas) or "study_area" (the whole grid).', {"choices": ("accessible", "study_area")}),
        "alpha": (float, 0.05, "Family-wise error rate of the plain-language reading (Holm over every p-value of the run).", {"above": 0, "below": 1}),
        "geographic_tests": (str, "auto", 'Refit and map the first family per replicate: "on", "off", or "auto" (run them when a fixed per-family cost model, the same on every machine, puts a pair under 2 minutes and the layers are held in memory).', {"choices": ("auto", "on", "off")}),
    },
    "isolation": {
        "min_gap_km": (float, 5.0, "Unsuitable gap (km) from which a patch is isolated.", {"min": 0}),
        "min_patch_km2": (float, 1.0, "Smallest suitable patch considered (km2).", {"min": 0}),
        "within_range_min_km": (float, 10.0, "Within-range sites lie this far from records (km).", {"min": 0}),
        "resistance": (str, "linear", '"linear" (1 - s) or "log" (-ln s).', {"choices": ("linear", "log")}),
    },
    "slices": {
        "layers": (dict, {}, "Time slices: name -> list of rasters (glob patterns allowed) "
                   "with the present layers' names, e.g. a mid-Holocene and a glacial set."),
        "static": (list, [], "Layers that do not change between slices, taken from the "
                   "present where a slice lacks them (e.g. terrain)."),
        "stability": (str, "geometric_mean", '"geometric_mean", "product" or "minimum": '
                      "how suitability combines across the present and the slices.",
                      {"choices": ("geometric_mean", "product", "minimum")}),
    },
    "access": {
        "start_points": (Path, None, "CSV of start points: name, longitude, latitude."),
        "off_track": (bool, True, "Walking off track (Tobler speed x 0.6)."),
        "max_walk_hours": (float, 0.0, "Leave out sites farther than this walk (0 = off).", {"min": 0, "note": " (0 = off)"}),
        "walking_day_hours": (float, 7.0, "Hours of walking in a field day, for the days "
                              "on field sheets (common practice: 6 to 8).", {"min": 1}),
    },
    "survey": {
        "surveyed": (Path, None, "CSV of places already surveyed: longitude, latitude[, found]."),
        "records_as_surveys": (bool, True, "Count record localities as surveyed places."),
    },
    "ranking": {
        "top_k": (int, 10, "Rank robustness: share of weight draws keeping a site in the top k.", {"min": 1}),
        "n_draws": (int, 1000, "Random weight draws for rank robustness.", {"min": 0, "note": " (0 = no rank robustness)"}),
        "n_refits": (int, 20, "Bootstrap refits of the records for record-resampling robustness (0 = off).", {"min": 0}),
        "weights": (dict, {}, "Score component weights (see the methods)."),
    },
    "outputs": {
        "field_sheets": (int, 10, "Field sheets for this many top sites.", {"min": 0}),
        "page_size": (str, "A4", '"A4" or "letter".', {"choices": ("A4", "letter")}),
        "sampling_points": (int, 5, "Suggested sampling points per site.", {"min": 0}),
        "generalise_deg": (float, 0.1, "Grid (degrees) for generalised sensitive coordinates.", {"above": 0, "max": 90, "note": " degrees (0.1 is common practice)"}),
        "generalise_sites": (bool, False, "Also generalise site coordinates."),
        "full_precision": (bool, False, "Write sensitive coordinates at full precision."),
    },
    "compute": {
        "scheduler": (str, "auto", '"auto", "serial", "processes", "dask" or a Dask address.'),
        "n_workers": (int, 0, "Worker processes (0 = all cores).", {"min": 0, "note": " (0 = all cores)"}),
        "memory_mb": (float, 4096.0, "Working memory (MB) for layer values and the cost-distance solver; larger stacks stream from disk, larger grids are solved by tiles.", {"min": 0}),
    },
}

#: Old setting names kept working for one release: (section, old key) ->
#: (new key, {old value: new value} or None, when the value carries over as is).
RENAMED = {
    ("overlap", "alternative"): (
        "similarity_hypothesis", {"greater": "conserved", "lower": "diverged"}
    ),
    ("overlap", "resolution"): ("grid_cells", None),
}

#: keys that must be present (section, key)
REQUIRED = [("occurrences", "path"), ("layers", "paths")]


@dataclass(frozen=True)
class Setting:
    """One setting: its type, default, one-line doc and allowed values.

    Attributes
    ----------
    section, key : str
    type : type, tuple of types or list
        As in :data:`SCHEMA` (``Path`` a path, ``[Path]`` a list of paths).
    default : object
        None for a path that is required or optional.
    doc : str
        One line for the user guide's table.
    choices : tuple or None
        Allowed values.
    each : tuple or None
        Allowed items of a list.
    min, max : float or None
        Inclusive bounds.
    above, below : float or None
        Exclusive bounds.
    note : str
        Added to the error message after the bounds, e.g. " (0 = off)".
    """

    section: str
    key: str
    type: object
    default: object
    doc: str
    choices: tuple | None = None
    each: tuple | None = None
    min: float | None = None
    max: float | None = None
    above: float | None = None
    below: float | None = None
    note: str = ""

    @property
    def required(self) -> bool:
        return (self.section, self.key) in REQUIRED

    def allowed(self, name: str = "x") -> str:
        """The allowed values in words ("" when any value of the type is allowed).

        >>> setting("thresholds", "relax").allowed()
        '0 <= x < 1'
        >>> setting("thresholds", "use").allowed()
        "'mtp', 'relaxed'"
        """
        if self.choices is not None:
            return ", ".join(map(repr, self.choices))
        if self.each is not None:
            return "each of " + ", ".join(map(repr, self.each))
        lo = f"{self.min:g} <= " if self.min is not None else (
            f"{self.above:g} < " if self.above is not None else "")
        hi = f" <= {self.max:g}" if self.max is not None else (
            f" < {self.below:g}" if self.below is not None else "")
        return f"{lo}{name}{hi}" if lo or hi else ""

    def bounds(self) -> str:
        """The bounds in words, e.g. "at least 0" or "above 0 and below 1".

        >>> setting("overlap", "alpha").bounds()
        'above 0 and below 1'
        """
        parts = [f"{word} {v:g}" for word, v in (
            ("at least", self.min), ("above", self.above), ("at most", self.max),
            ("below", self.below)) if v is not None]
        return " and ".join(parts)

    def check(self, value, where: str):
        """Refuse a value outside the choices or bounds.

        Raises
        ------
        ProjectError
            Naming the setting, the value and what is allowed.
        """
        loc = f"{where}: [{self.section}] {self.key}"
        if self.choices is not None and value not in self.choices:
            raise ProjectError(
                f"{loc} = {value!r} is not one of {self.allowed()}."
                + suggest(str(value), [str(c) for c in self.choices])
            )
        if self.each is not None:
            for item in value:
                if item not in self.each:
                    raise ProjectError(
                        f"{loc}: {item!r} is not one of "
                        f"{', '.join(map(repr, self.each))}."
                        + suggest(str(item), [str(c) for c in self.each])
                    )
        if isinstance(value, float) and not np.isfinite(value):
            raise ProjectError(f"{loc} must be a finite number, got {value!r}.")
        bad = ((self.min is not None and value < self.min)
               or (self.max is not None and value > self.max)
               or (self.above is not None and value <= self.above)
               or (self.below is not None and value >= self.below))
        if bad:
            raise ProjectError(f"{loc} must be {self.bounds()}{self.note}; got {value!r}.")
        return value


def setting(section: str, key: str) -> Setting:
    """The :class:`Setting` of ``[section] key``.

    >>> setting("isolation", "min_gap_km").default
    5.0
    """
    t, default, doc, *rules = SCHEMA[section][key]
    return Setting(section, key, t, default, doc, **(rules[0] if rules else {}))


def default(section: str, key: str):
    """The default value of ``[section] key`` (a fresh copy): what modules use instead
    of restating it.

    >>> default("background", "buffer_km")
    50.0
    """
    return copy.deepcopy(setting(section, key).default)


class SectionSettings:
    """Base of the frozen dataclass of each section (:data:`SECTION_TYPES`).

    Settings are attributes (``s.overlap.n_replicates``); a section also reads like a
    mapping (``dict(s.overlap)``, ``s.models.get("ppm")``) for code that walks it.
    Change a value with :meth:`Settings.replace`, never in place.
    """

    def keys(self):
        return [f.name for f in fields(self)]

    def __getitem__(self, key):
        if key not in self.keys():
            raise KeyError(key)
        return getattr(self, key)

    def __iter__(self):
        return iter(self.keys())

    def __len__(self):
        return len(self.keys())

    def __contains__(self, key):
        return key in self.keys()

    def get(self, key, fallback=None):
        return getattr(self, key) if key in self.keys() else fallback

    def items(self):
        return [(k, getattr(self, k)) for k in self.keys()]

    def values(self):
        return [getattr(self, k) for k in self.keys()]


def _field_type(t):
    if t is Path:
        return Path | None
    if isinstance(t, list):
        return list
    return t if not isinstance(t, tuple) else object


def _section_type(section: str) -> type:
    """The frozen dataclass of one section, made from :data:`SCHEMA`."""
    specs = [setting(section, key) for key in SCHEMA[section]]
    cls = make_dataclass(
        "".join(w.capitalize() for w in section.split("_")) + "Settings",
        [(sp.key, _field_type(sp.type),
          field(default_factory=functools.partial(copy.deepcopy, sp.default),
                metadata={"setting": sp}))
         for sp in specs],
        bases=(SectionSettings,),
        frozen=True,
    )
    cls.__module__ = __name__
    cls.__doc__ = f"Settings of the [{section}] section of a project file.\n\n" + "\n".join(
        f"{sp.key} : {_type_name(sp.type)}, default {sp.default!r}\n    {sp.doc}"
        for sp in specs)
    return cls


@dataclass(frozen=True)
class Settings:
    """Validated settings of a project.

    Attributes
    ----------
    sections : dict of str to SectionSettings
        Every section of :data:`SCHEMA` (a frozen dataclass each), defaults filled in;
        also reachable as attributes (``settings.overlap``).
    path : Path or None
        The project file.
    base_dir : Path
        Folder that relative paths are resolved against.
    deprecations : tuple of str
        One message per renamed or retired setting the project file used (each also
        warned as :class:`~screener.errors.ScreenerDeprecationWarning` when read); a
        run lists them among its warnings.
    """

    sections: dict
    path: Path | None
    base_dir: Path
    deprecations: tuple = ()

    def __getattr__(self, name):
        sections = self.__dict__.get("sections", {})
        if name in sections:
            return sections[name]
        raise AttributeError(name)

    def replace(self, section: str, **values) -> Settings:
        """A copy with some values of one section changed (checked like the file's).

        Raises
        ------
        ProjectError
            Unknown key or a value outside its range or choices.
        """
        for key, value in values.items():
            if key not in SCHEMA[section]:
                raise ProjectError(f"unknown key {key!r} in [{section}]."
                                   + suggest(key, SCHEMA[section]))
            setting(section, key).check(value, "settings")
        new = dataclasses.replace(self.sections[section], **values)
        return dataclasses.replace(self, sections={**self.sections, section: new})

    def as_dict(self) -> dict:
        """Plain, JSON-friendly copy (paths as strings)."""

        def conv(v):
            if isinstance(v, Path):
                return str(v)
            if isinstance(v, list):
                return [conv(x) for x in v]
            if isinstance(v, dict):
                return {k: conv(x) for k, x in v.items()}
            return v

        return {s: conv(dict(v)) for s, v in self.sections.items()}


def _type_name(t) -> str:
    if t is Path:
        return "path"
    if isinstance(t, list):
        return "list of paths"
    if isinstance(t, tuple):
        return " or ".join(_type_name(x) for x in t)
    return {str: "string", int: "integer", float: "number", bool: "true/false",
            list: "list", dict: "table"}.get(t, t.__name__)


def _check_value(section, key, value, spec, base_dir, where):
    t = spec.type
    loc = f"[{section}] {key}"
    if t is Path:
        if not isinstance(value, str):
            raise ProjectError(f"{where}: {loc} must be a path string, got {value!r}.")
        p = Path(value)
        p = p if p.is_absolute() else base_dir / p
        if not p.exists():
            raise ProjectError(
                f"{where}: {loc} = {value!r}: {p} does not exist. Paths are relative to "
                "the project file."
            )
        return p
    if isinstance(t, list):
        if isinstance(value, str):
            value = [value]
        if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
            raise ProjectError(f"{where}: {loc} must be a list of path strings.")
        out = []
        for pattern in value:
            full = pattern if Path(pattern).is_absolute() else str(base_dir / pattern)
            matches = sorted(glob.glob(full))
            if not matches:
                raise ProjectError(
                    f"{where}: {loc}: {pattern!r} matches no file (looked for {full}). "
                    "Paths are relative to the project file."
                )
            out.extend(Path(m) for m in matches)
        return list(dict.fromkeys(out))
    types = t if isinstance(t, tuple) else (t,)
    if float in types and isinstance(value, int) and not isinstance(value, bool):
        value = float(value)
    if bool not in types and isinstance(value, bool):
        raise ProjectError(f"{where}: {loc} must be a {_type_name(t)}, got {value!r}.")
    if not isinstance(value, types):
        raise ProjectError(f"{where}: {loc} must be a {_type_name(t)}, got {value!r}.")
    return spec.check(value, where)


def _deprecated(message: str, notes: list) -> None:
    """Warn of a renamed or retired setting and keep the message for the run."""
    notes.append(message)
    warnings.warn(message, ScreenerDeprecationWarning, stacklevel=4)


def _apply_renames(data: dict, where: str, notes: list) -> dict:
    """Translate renamed settings (:data:`RENAMED`), warning once for each."""
    out = dict(data)
    for (section, old), (new, values) in RENAMED.items():
        body = out.get(section)
        if not isinstance(body, dict) or old not in body:
            continue
        body = dict(body)
        value = body.pop(old)
        if new in body:
            raise ProjectError(
                f"{where}: [{section}] sets both {old!r} and its new name {new!r}; "
                f"keep only {new!r}."
            )
        if values is not None:
            if value not in values:
                raise ProjectError(
                    f"{where}: [{section}] {old} = {value!r} is not one of "
                    f"{', '.join(map(repr, values))} (the setting is now {new!r}: "
                    f"{', '.join(map(repr, values.values()))})."
                )
            value = values[value]
        body[new] = value
        out[section] = body
        _deprecated(
            f"{where}: [{section}] {old} is renamed {new}"
            + (f" (now {value!r})" if values else "")
            + "; the old name stops working in the next release.", notes)
    return out


def settings_from_dict(data: dict, *, base_dir=".", where="project file") -> Settings:
    """Validate a project dictionary (as read from TOML) into :class:`Settings`.

    Raises
    ------
    ProjectError
        Unknown section or key (the nearest valid name is suggested), wrong type,
        missing required key, or a path that does not exist.
    """
    base_dir = Path(base_dir)
    if not isinstance(data, dict):
        raise ProjectError(f"{where}: expected a TOML table at the top level.")
    notes: list = []
    data = _apply_renames(data, where, notes)
    for section, body in data.items():
        if section not in SCHEMA:
            raise ProjectError(
                f"{where}: unknown section [{section}]." + suggest(section, SCHEMA)
                + f" Valid sections: {', '.join(SCHEMA)}."
            )
        if not isinstance(body, dict):
            raise ProjectError(f"{where}: [{section}] must be a table of settings.")
        for key in body:
            if key not in SCHEMA[section]:
                raise ProjectError(
                    f"{where}: unknown key {key!r} in [{section}]."
                    + suggest(key, SCHEMA[section])
                    + f" Valid keys: {', '.join(SCHEMA[section])}."
                )
    for section, key in REQUIRED:
        if key not in data.get(section, {}):
            raise ProjectError(f"{where}: [{section}] {key} is required.")
    sections = {}
    for section, spec in SCHEMA.items():
        body = data.get(section, {})
        values = {key: _check_value(section, key, body[key], setting(section, key),
                                    base_dir, where)
                  for key in spec if key in body}
        if section == "slices" and "layers" in values:
            values["layers"] = _slice_paths(values["layers"], base_dir, where)
        sections[section] = SECTION_TYPES[section](**values)
    _check_across(sections, where, notes)
    return Settings(sections, None, base_dir, tuple(notes))


def _slice_paths(body: dict, base_dir, where) -> dict:
    """[slices] layers: each slice's globs resolved to files (project order kept)."""
    out = {}
    for name, patterns in body.items():
        if name == "present":
            raise ProjectError(
                f"{where}: [slices] layers: 'present' names the present layers; give "
                "the slice another name (e.g. mid_holocene, glacial_max)."
            )
        if isinstance(patterns, dict):
            raise ProjectError(
                f"{where}: [slices] layers.{name} must be a list of raster paths or glob "
                "patterns, e.g. [\"past/glacial/*.tif\"]."
            )
        out[name] = _check_value("slices", f"layers.{name}", patterns,
                                 Setting("slices", f"layers.{name}", [Path], None, ""),
                                 base_dir, where)
    return out


def _check_across(s, where, notes):
    """Rules that tie settings together or depend on the model registry."""
    fams = s["models"]["families"]
    if not fams:
        raise ProjectError(f"{where}: [models] families must name at least one family.")
    # the family names are the [models] keys that hold a family's parameter table
    known = [k for k, spec in SCHEMA["models"].items() if spec[0] is dict]
    for f in fams:
        if f not in known:
            raise ProjectError(
                f"{where}: [models] families: unknown family {f!r}." + suggest(f, known)
                + f" Known families: {', '.join(known)}."
            )
    if s["layers"]["derive"] and not s["layers"]["elevation"]:
        raise ProjectError(
            f"{where}: [layers] derive needs [layers] elevation to name the elevation layer."
        )
    _check_weights(s, where)
    _check_model_parameters(s, where, notes)


def _check_weights(s, where):
    from screener.ranking import DEFAULT_WEIGHTS

    for k, v in s["ranking"]["weights"].items():
        if k not in DEFAULT_WEIGHTS:
            raise ProjectError(
                f"{where}: [ranking] weights: unknown component {k!r}."
                + suggest(k, DEFAULT_WEIGHTS)
                + f" Components: {', '.join(DEFAULT_WEIGHTS)}."
            )
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not np.isfinite(v) \
                or v < 0:
            raise ProjectError(
                f"{where}: [ranking] weights: {k} = {v!r} must be a finite number >= 0."
            )


def _check_model_parameters(s, where, notes):
    """Parameter names of each family's table must be the estimator's own; retired
    ones (the family's ``deprecated_params``) are noted."""
    import inspect

    from screener.models import FAMILIES

    for family, cls in FAMILIES.items():
        table = s["models"].get(family) or {}
        params = [n for n in inspect.signature(cls.__init__).parameters if n != "self"]
        for k in table:
            if k not in params:
                raise ProjectError(
                    f"{where}: [models.{family}]: unknown parameter {k!r}."
                    + suggest(k, params) + f" Parameters: {', '.join(params) or 'none'}."
                )
            new = getattr(cls, "deprecated_params", {}).get(k)
            if new is not None:
                _deprecated(f"{where}: [models.{family}] {k} is retired in favour of "
                            f"{new}; the old name stops working in the next release.",
                            notes)


def load_project(path) -> Settings:
    """Read and validate a project file.

    Parameters
    ----------
    path : path-like
        TOML project file.

    Returns
    -------
    Settings

    Raises
    ------
    ProjectError
        Missing file, TOML syntax error (with line), or any schema problem.
    """
    p = Path(path)
    if not p.exists():
        raise ProjectError(f"Project file {p} does not exist.")
    try:
        data = tomllib.loads(p.read_text(encoding="utf-8"))
    except UnicodeDecodeError:
        raise ProjectError(f"Project file {p} is not UTF-8 text.") from None
    except tomllib.TOMLDecodeError as exc:
        raise ProjectError(f"Project file {p} is not valid TOML: {exc}.") from None
    settings = settings_from_dict(data, base_dir=p.resolve().parent, where=str(p))
    return dataclasses.replace(settings, path=p.resolve())


def settings_table_markdown() -> str:
    """Every setting with its type, default, allowed values and meaning (Markdown)."""
    lines = ["| setting | type | default | allowed | meaning |",
             "| --- | --- | --- | --- | --- |"]
    for section, spec in SCHEMA.items():
        for key in spec:
            sp = setting(section, key)
            if sp.required:
                d = "required"
            elif sp.default is None:
                d = "none"
            else:
                d = f"`{sp.default!r}`".replace("|", "\\|")
            allowed = sp.allowed().replace("|", "\\|")
            lines.append(f"| `[{section}] {key}` | {_type_name(sp.type)} | {d} | {allowed} "
                         f"| {sp.doc} |")
    return "\n".join(lines)


#: section name -> frozen dataclass of that section
SECTION_TYPES = {section: _section_type(section) for section in SCHEMA}
# module attributes too, so a section pickles by name (worker processes get settings)
globals().update((cls.__name__, cls) for cls in SECTION_TYPES.values())
