"""Intake: read and check a run's inputs (layers, records, start points, surveyed places).

:func:`load_inputs` turns settings into an :class:`Intake` (the validated layers and
records, with the SHA-256 of every input file); no model is fitted.  Layers off the
reference grid are aligned first (:mod:`screener.alignment`).
:func:`reproduction_settings` reads a finished run's settings back from its run.json
after checking that its inputs are unchanged; :func:`check_project` is
``screener check``.
"""

from __future__ import annotations

import hashlib
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from screener.alignment import ReferenceGridSpec, align_layers, aligned_layer_folder
from screener.darwincore import DarwinCoreOptions
from screener.errors import InputError, LayerError, ScreenerWarning, suggest
from screener.layers import LayerStack, check_layers, read_layers, slope_aspect
from screener.outputs.run_folder import locate_run_inputs, relocate
from screener.outputs.staging import enclosing_run_folder
from screener.progress import Progress
from screener.project import Settings, settings_from_dict
from screener.records import RecordSet, read_points_csv, read_records, validate_records
from screener.slices import TimeSlice, slice_stack

__all__ = ["Intake", "load_inputs", "check_project", "reproduction_settings",
           "file_sha256", "input_paths", "layer_paths"]


def file_sha256(path) -> str:
    """SHA-256 of a file's bytes (hex)."""
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


@dataclass(eq=False)
class Intake:
    """Validated inputs of a run.

    Attributes
    ----------
    settings : Settings
    stack : LayerStack
        Every layer read or derived.
    predictors : list of str
        Layers used as model predictors (constant and excluded layers left out).
    layer_report : screener.layers.LayerReport
    records : RecordSet
    elevation : ndarray or None
    input_hashes : dict of str to str
        SHA-256 of every input file.
    warnings : list of str
    """

    settings: Settings
    stack: LayerStack
    predictors: list
    layer_report: object
    records: RecordSet
    elevation: np.ndarray | None
    input_hashes: dict
    warnings: list = field(default_factory=list)
    start_points: object = None
    surveyed: object = None
    layer_origins: list = field(default_factory=list)
    slices: list = field(default_factory=list)

    @property
    def grid(self):
        return self.stack.grid

    def predictor_stack(self) -> LayerStack:
        return self.stack.select(self.predictors)

    def summary_lines(self) -> list:
        g = self.grid
        kind = "geographic (lon/lat)" if g.is_geographic else "projected"
        area = float(np.asarray(g.cell_area_km2, float)[g.mask].sum())
        out = [
            f"Grid: {g.pyproj_crs.to_string()} ({kind}), {g.n_rows} rows x {g.n_cols} cols, "
            f"cell {g.res[0]:g} x {g.res[1]:g} CRS units; {g.n_valid:,} valid cells, "
            f"{area:,.1f} km2",
            f"Layers ({len(self.stack.names)}): {', '.join(self.stack.names)}",
            f"Predictors ({len(self.predictors)}): {', '.join(self.predictors)}",
        ]
        if any(o.method != "none" for o in self.layer_origins):
            out.append("Layer origins (original grid; method onto the reference grid):")
            out.extend(f"  {o.line()}" for o in self.layer_origins)
        rep = self.layer_report
        if rep.constant:
            out.append(f"Constant layers (left out): {', '.join(rep.constant)}")
        out.append(
            f"Records: {self.records.n_rows} rows in {self.records.path}; "
            f"{sum(t.n for t in self.records.taxa.values())} kept, "
            f"{len(self.records.dropped)} dropped"
        )
        out.extend(self.records.summary_lines())
        for sl in self.slices:
            gone = int((self.grid.mask & ~sl.grid.mask).sum())
            new = int((sl.grid.mask & ~self.grid.mask).sum())
            out.append(f"Time slice {sl.name}: {sl.grid.n_valid:,} valid cells "
                       f"({new:,} not valid today, {gone:,} valid today but not then)")
        return out


def layer_paths(settings: Settings) -> tuple:
    """The layer files a run reads, and the run folders skipped.

    Layers inside a folder an earlier run wrote (it holds the run marker) are never
    read as inputs: with ``paths = ["layers/*/*.tif"]`` and ``--out layers/results``,
    a later run would otherwise take that run's outputs as predictors.

    Returns
    -------
    paths : list of Path
    skipped : dict of Path to list of Path
        Run folder -> the files skipped in it.
    """

    paths, skipped = [], {}
    for p in settings.layers.paths:
        folder = enclosing_run_folder(p, settings.base_dir)
        if folder is None:
            paths.append(Path(p))
        else:
            skipped.setdefault(folder, []).append(Path(p))
    return paths, skipped


def input_paths(settings: Settings) -> list:
    """Every file a run reads: layers, records, start points, surveyed places and the
    project file itself."""
    s = settings
    slices = [p for paths in s.slices.layers.values() for p in paths]
    named = layer_paths(s)[0] + slices + [s.occurrences.path, s.access.start_points,
                                          s.survey.surveyed, s.path]
    return list(dict.fromkeys(Path(p) for p in named if p is not None))


def reproduction_settings(run_json, *, allow_changed_inputs: bool = False):
    """Settings of a finished run from its run.json, after checking its inputs.

    Every input the recorded settings name (layers, records, start points, surveyed
    places) must be listed in ``input_hashes`` with the same SHA-256 as the file has
    now, and so must every other recorded input.  A run.json from elsewhere is not
    trusted: an edited path or a deleted hash table is refused.

    Returns
    -------
    settings : Settings
    provenance : dict
        The parsed run.json.

    Raises
    ------
    InputError
        run.json is unreadable or has no hashes; an input is missing, changed or was
        not recorded (the last two pass with ``allow_changed_inputs``).
    """

    where = str(run_json)
    prov, moved = locate_run_inputs(run_json)
    if not isinstance(prov, dict) or not isinstance(prov.get("settings"), dict):
        raise InputError(f"{where} has no settings; give the run.json of a finished run.")
    hashes = prov.get("input_hashes")
    if not isinstance(hashes, dict) or not hashes:
        raise InputError(
            f"{where} records no input hashes, so the inputs cannot be checked; it will "
            "not be reproduced. Use the run.json a run wrote, unedited."
        )
    data = {
        sec: {k: v for k, v in body.items() if v is not None}
        for sec, body in relocate(prov["settings"], moved).items() if isinstance(body, dict)
    }
    project_file = prov.get("project_file")
    project_now = moved.get(project_file) if project_file else None
    base = Path(project_now).parent if project_now else Path.cwd()
    settings = settings_from_dict(data, base_dir=base, where=where)
    recorded_as = {str(now): old for old, now in moved.items()}
    problems, unrecorded = [], []
    for p in input_paths(settings):
        old = recorded_as.get(str(p), str(p))
        if old not in hashes:
            unrecorded.append(str(p))
    for old, h in hashes.items():
        now = Path(moved.get(old, old))
        if not now.exists():
            problems.append(f"{old} (missing)")
        elif file_sha256(now) != h:
            problems.append(f"{now} (changed)")
    if unrecorded and not allow_changed_inputs:
        raise InputError(
            f"{where} names input(s) it holds no hash for: {'; '.join(unrecorded)}. The "
            "settings were edited after the run; pass --allow-changed-inputs to run on "
            "them anyway."
        )
    if problems and not allow_changed_inputs:
        raise InputError(
            "Inputs differ from the recorded run: " + "; ".join(problems)
            + ". Restore them, or pass --allow-changed-inputs to run anyway."
        )
    return settings, prov


def load_inputs(settings: Settings, *, progress: Progress | None = None,
                cache_dir=None) -> Intake:
    """Read and check layers and records (no model is fitted).

    Layers off the reference grid are aligned to it (``[layers] alignment =
    "warp"``); the aligned files go into ``cache_dir/aligned`` (reused by later
    runs) or, without a cache, into a temporary folder for this process.

    Raises
    ------
    screener.errors.InputError
        Any problem with the inputs, with file, row or layer named.
    """
    progress = progress or Progress(None)
    s = settings
    caught: list = list(s.deprecations)  # renamed settings the project file used
    with warnings.catch_warnings(record=True) as wlist:
        warnings.simplefilter("always", ScreenerWarning)
        paths, skipped = layer_paths(s)
        for folder, files in skipped.items():
            warnings.warn(ScreenerWarning(
                f"Skipped {len(files)} layer file(s) in {folder} ("
                + ", ".join(f.name for f in files[:4]) + (" ..." if len(files) > 4 else "")
                + "): that folder holds the outputs of an earlier run, which are never "
                "read as inputs. Narrow [layers] paths to silence this."))
        if not paths:
            raise LayerError(
                "Every file [layers] paths matches lies in the output folder of an "
                "earlier run; point [layers] paths at the input layers."
            )
        origins, derived = [], []
        if s.layers.alignment == "warp":
            aligned = align_layers(
                paths,
                cache_dir=aligned_layer_folder(cache_dir),
                grid_spec=ReferenceGridSpec.from_settings(s),
                categorical=s.layers.categorical,
                nodata_values=s.layers.nodata,
                elevation=s.layers.elevation,
                derive=s.layers.derive,
            )
            paths, origins, derived = aligned.bands, aligned.origins, aligned.derived
            for o in origins:
                if o.method != "none":
                    progress.step(f"aligned {o.name} by {o.method} ({o.note})")
        stack = read_layers(
            paths,
            categorical=s.layers.categorical,
            cell_budget=s.layers.cell_budget,
            nodata_values={k: v for k, v in s.layers.nodata.items()
                           if not any(o.name == k and o.method != "none" for o in origins)},
            memory_mb=s.compute.memory_mb or None,
        )
        elevation = None
        if s.layers.elevation:
            if s.layers.elevation not in stack.names:
                raise LayerError(
                    f"[layers] elevation = {s.layers.elevation!r} names no layer; layers "
                    f"are {', '.join(stack.names)}." + suggest(s.layers.elevation, stack.names)
                )
            elevation = stack.layer(s.layers.elevation).astype(np.float64)
            if s.layers.derive and not derived:
                slope, aspect = slope_aspect(stack.grid, elevation)
                extra = {"slope": slope, "aspect": aspect}
                add = {d: extra[d] for d in s.layers.derive if d not in stack.names}
                if add:
                    stack = stack.with_layers(add, units=["degrees"] * len(add))
        for name in s.layers.exclude:
            if name not in stack.names:
                raise LayerError(
                    f"[layers] exclude names {name!r}, which is not a layer."
                    + suggest(name, stack.names)
                )
        # layers left out of the models cannot make them collinear: checked are the
        # candidate predictors only
        report = check_layers(stack, random_state=s.project.random_state,
                              names=[n for n in stack.names if n not in s.layers.exclude])
        predictors = [
            n for n in stack.names if n not in report.constant and n not in s.layers.exclude
        ]
        if not predictors:
            raise LayerError("No usable predictor layers are left (all constant or excluded).")
        raw = read_records(
            s.occurrences.path,
            encoding=s.occurrences.encoding or None,
            taxon_column=s.occurrences.taxon_column,
            decimal=s.occurrences.decimal or None,
        )
        records = validate_records(
            raw,
            stack.grid,
            min_records=s.occurrences.min_records,
            thin_km=s.occurrences.thin_km,
            sensitive=s.occurrences.sensitive,
            taxa=s.project.taxa or None,
            random_state=s.project.random_state,
            darwin_core=DarwinCoreOptions(
                max_uncertainty_m=s.occurrences.max_uncertainty_m,
                basis_of_record=tuple(s.occurrences.basis_of_record),
                date_from=s.occurrences.date_from,
                date_to=s.occurrences.date_to,
                flagged=s.occurrences.flagged_records,
            ),
        )
        slices = _read_slices(s, stack.select(predictors))
        caught.extend(str(w.message) for w in wlist if issubclass(w.category, ScreenerWarning))
    caught.extend(records.notes)
    if len(records.taxa) < 1:
        raise InputError("No taxon has usable records.")
    start_points = surveyed = None
    if s.access.start_points is not None:
        start_points = read_points_csv(s.access.start_points, "start points")
    if s.survey.surveyed is not None:
        surveyed = read_points_csv(s.survey.surveyed, "surveyed places")
    hashes = {str(p): file_sha256(p) for p in input_paths(s)}
    return Intake(
        settings=s,
        layer_origins=origins,
        stack=stack,
        predictors=predictors,
        layer_report=report,
        records=records,
        elevation=elevation,
        input_hashes=hashes,
        warnings=caught,
        start_points=start_points,
        surveyed=surveyed,
        slices=slices,
    )


def _read_slices(s: Settings, present: LayerStack) -> list:
    """Each time slice's predictors (:class:`screener.slices.TimeSlice`), in project
    order, each on its own valid mask."""

    out = []
    for name, paths in s.slices.layers.items():
        for st in s.slices.static:
            if st not in present.names:
                raise LayerError(
                    f"[slices] static names {st!r}, which is not a predictor layer; "
                    f"predictors are {', '.join(present.names)}." + suggest(st, present.names)
                )
        raw = read_layers(
            paths,
            categorical=s.layers.categorical,
            cell_budget=s.layers.cell_budget,
            nodata_values=s.layers.nodata,
            memory_mb=s.compute.memory_mb or None,
        )
        out.append(TimeSlice(name, slice_stack(name, raw, present, static=s.slices.static)))
    return out


def check_project(settings: Settings) -> list:
    """Validate a project without fitting anything; return the summary lines."""
    cache_dir = (settings.base_dir / ".screener-cache") if settings.path else None
    intake = load_inputs(settings, cache_dir=cache_dir)
    lines = intake.summary_lines()
    lines.extend(f"Warning: {w}" for w in intake.warnings)
    return lines
