"""The layout of a run's output folder: every path, and every file name made from a taxon.

One object, :class:`RunFolder`, names the files a run writes and that ``debrief`` and
``reproduce`` read back, so the layout is written down once.  A taxon's files are
named by its *file stem* (:func:`screener.outputs.names.taxon_file_stems`: unique
and length-limited); the stems a run used are recorded
in ``run.json`` under ``taxa``, and a folder read back uses the recorded stems, so a
later change of the naming rule does not break older run folders.

Examples
--------
>>> folder = RunFolder.for_taxa("results", ["Nebrivex tarvelli"])
>>> folder.suitability("Nebrivex tarvelli").as_posix()
'results/suitability/Nebrivex_tarvelli.tif'
>>> folder.range_map("Nebrivex tarvelli", "mtp").as_posix()
'results/ranges/Nebrivex_tarvelli.mtp.tif'
>>> folder.relative(folder.candidates_gpkg)
'candidates.gpkg'
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass, field
from pathlib import Path

from screener.errors import InputError
from screener.outputs.names import slice_file_stem, taxon_file_stem, taxon_file_stems

__all__ = [
    "RunFolder",
    "taxon_file_stem",
    "taxon_file_stems",
    "read_provenance",
    "input_locations",
    "locate_run_inputs",
    "relocate",
    "repoint_run_json",
    "SUBFOLDERS",
    "SLICE_SUBFOLDERS",
]

#: sub-folders of a run folder: consensus and family maps, binary ranges, MESS maps
SUBFOLDERS = ("suitability", "ranges", "novelty")
#: sub-folders of a run with time slices: maps on each slice, climatic stability
SLICE_SUBFOLDERS = ("slices", "stability")


@dataclass(frozen=True)
class RunFolder:
    """Paths of one run's outputs under ``root``.

    Parameters
    ----------
    root : Path
        The run's output folder (or the staging folder standing in for it).
    stems : dict of str to str
        File stem of each taxon (taxon -> stem).
    """

    root: Path
    stems: dict = field(default_factory=dict)

    @classmethod
    def for_taxa(cls, root, taxa) -> RunFolder:
        """The folder a run over ``taxa`` writes (stems from :func:`taxon_file_stems`)."""
        return cls(Path(root), taxon_file_stems(taxa))

    @classmethod
    def read(cls, root) -> tuple:
        """A finished run folder and its provenance (the parsed ``run.json``).

        Returns
        -------
        folder : RunFolder
            With the taxon stems recorded in ``run.json``.
        provenance : dict

        Raises
        ------
        screener.errors.InputError
            ``root`` holds no ``run.json`` or it lists no taxa.
        """
        root = Path(root)
        provenance = read_provenance(root / "run.json", what=f"{root} holds no run.json; "
                                     "give the output folder of a `screener run`.")
        taxa = provenance.get("taxa") or {}
        if not taxa or not isinstance(taxa, dict):
            raise InputError(
                f"{root / 'run.json'} lists no taxa; was the run finished with this "
                "version?"
            )
        for name, stem in taxa.items():
            # a run.json can come from elsewhere: a stem names a file in this folder,
            # never a path out of it
            if not isinstance(stem, str) or not stem.strip(". ") or Path(stem).name != stem \
                    or "\\" in stem:
                raise InputError(
                    f"{root / 'run.json'}: taxa maps {name!r} to {stem!r}, which is not a "
                    "file name of a run folder; the run.json was edited or damaged: run "
                    "again."
                )
        return cls(root, dict(taxa)), provenance

    # ------------------------------------------------------------- one file per run
    @property
    def run_json(self) -> Path:
        """Provenance: settings, input hashes, seeds, versions, timings, outputs."""
        return self.root / "run.json"

    @property
    def evaluation_csv(self) -> Path:
        return self.root / "evaluation.csv"

    @property
    def overlap_csv(self) -> Path:
        return self.root / "overlap.csv"

    @property
    def overlap_pairwise_csv(self) -> Path:
        return self.root / "overlap_pairwise.csv"

    @property
    def dropped_records_csv(self) -> Path:
        return self.root / "dropped_records.csv"

    @property
    def candidates_csv(self) -> Path:
        return self.root / "candidates.csv"

    @property
    def candidates_gpkg(self) -> Path:
        """Candidate sites (layer ``sites``) and least-cost paths."""
        return self.root / "candidates.gpkg"

    @property
    def sites_gpx(self) -> Path:
        return self.root / "sites.gpx"

    @property
    def field_sheets_pdf(self) -> Path:
        return self.root / "field_sheets.pdf"

    @property
    def report_html(self) -> Path:
        return self.root / "report.html"

    @property
    def map_html(self) -> Path:
        """The offline interactive map page."""
        return self.root / "map.html"

    @property
    def barrier_tif(self) -> Path:
        return self.root / "barrier.tif"

    @property
    def access_hours_tif(self) -> Path:
        return self.root / "access_hours.tif"

    # ------------------------------------------------------------- files per taxon
    def stem(self, taxon: str) -> str:
        """File stem of ``taxon``.

        Raises
        ------
        screener.errors.InputError
            The run has no such taxon.
        """
        try:
            return self.stems[taxon]
        except KeyError:
            raise InputError(
                f"The run in {self.root} has no taxon {taxon!r}; it has "
                f"{', '.join(self.stems) or 'none'}."
            ) from None

    def suitability(self, taxon: str, family: str | None = None) -> Path:
        """Consensus suitability of ``taxon``, or one family's map when ``family`` is given."""
        name = self.stem(taxon) + (f".{family}" if family else "")
        return self.root / "suitability" / f"{name}.tif"

    def agreement(self, taxon: str) -> Path:
        """Share of families calling a cell suitable."""
        return self.root / "suitability" / f"{self.stem(taxon)}.agreement.tif"

    def range_map(self, taxon: str, threshold: str) -> Path:
        """Binary range of ``taxon`` at the named threshold (e.g. "mtp")."""
        return self.root / "ranges" / f"{self.stem(taxon)}.{threshold}.tif"

    def mess(self, taxon: str) -> Path:
        return self.root / "novelty" / f"{self.stem(taxon)}.mess.tif"

    def most_dissimilar(self, taxon: str) -> Path:
        return self.root / "novelty" / f"{self.stem(taxon)}.most_dissimilar.tif"

    # ------------------------------------------------------------- time slices
    def slice_suitability(self, slice_name: str, taxon: str) -> Path:
        """Suitability of ``taxon`` on the time slice ``slice_name`` (present models)."""
        return self.root / "slices" / f"{slice_file_stem(slice_name)}.{self.stem(taxon)}.tif"

    def slice_mess(self, slice_name: str, taxon: str) -> Path:
        """MESS of the time slice ``slice_name`` against ``taxon``'s calibration data."""
        return (self.root / "slices"
                / f"{slice_file_stem(slice_name)}.{self.stem(taxon)}.mess.tif")

    def stability(self, taxon: str | None = None) -> Path:
        """Climatic stability of ``taxon``, or of the clade when ``taxon`` is None.

        The clade's file is ``_clade.tif``: no taxon stem starts with ``_``, so a taxon
        named "Clade" cannot overwrite it, even on a file system that ignores case.
        """
        name = self.stem(taxon) if taxon is not None else "_clade"
        return self.root / "stability" / f"{name}.tif"

    # ------------------------------------------------------------- helpers
    def make_subfolders(self, *, slices: bool = False) -> None:
        """Create the sub-folders (the root must exist); ``slices`` adds those of a run
        with time slices."""
        for sub in SUBFOLDERS + (SLICE_SUBFOLDERS if slices else ()):
            (self.root / sub).mkdir(exist_ok=True)

    def relative(self, path) -> str:
        """``path`` relative to the root, with forward slashes (as run.json lists it)."""
        return Path(path).relative_to(self.root).as_posix()


def read_provenance(path, *, what: str | None = None) -> dict:
    """The parsed ``run.json`` at ``path``.

    Raises
    ------
    screener.errors.InputError
        The file is missing or is not JSON.
    """
    path = Path(path)
    if not path.exists():
        raise InputError(what or f"{path} does not exist; give the run.json of a run.")
    try:
        provenance = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise InputError(f"{path} is not a readable run.json ({exc}).") from None
    if not isinstance(provenance, dict):
        raise InputError(f"{path} is not a readable run.json (not a JSON object).")
    return provenance


def input_locations(provenance: dict, results_folder) -> dict:
    """Where a run's inputs lie relative to its project file, and the project file
    relative to the results folder (so a moved pair of folders still reproduces).

    Parameters
    ----------
    provenance : dict
        With ``project_file`` and ``input_hashes`` (absolute paths).
    results_folder : path-like
        The folder run.json is written into (or a sibling staging folder of it).

    Returns
    -------
    dict
        ``project_file_from_results`` (str or None) and ``inputs_from_project``
        (absolute path -> path relative to the project file's folder).
    """
    project = provenance.get("project_file")
    if not project:
        return {"project_file_from_results": None, "inputs_from_project": {}}
    project = Path(project).resolve()
    here = Path(results_folder).resolve()
    return {
        "project_file_from_results": Path(os.path.relpath(project, here)).as_posix(),
        "inputs_from_project": {
            str(p): Path(os.path.relpath(Path(p).resolve(), project.parent)).as_posix()
            for p in provenance.get("input_hashes", {})
        },
    }


def locate_run_inputs(run_json) -> tuple:
    """Find the inputs of a recorded run, also after its folders were moved.

    Each input is looked for at its recorded absolute path and, failing that, at its
    path relative to the project file, whose own place is taken relative to the
    folder that holds ``run_json``.

    Returns
    -------
    provenance : dict
        run.json as read.
    moved : dict of str to str
        Recorded absolute path -> path where the file is now (the recorded one when
        it cannot be found; callers report it as missing).
    """
    run_json = Path(run_json)
    prov = read_provenance(run_json)
    here = run_json.resolve().parent
    recorded = prov.get("project_file")
    rel_project = prov.get("project_file_from_results")
    project_now = None
    if recorded and Path(recorded).exists():
        project_now = Path(recorded)
    elif rel_project and (here / rel_project).exists():
        project_now = (here / rel_project).resolve()
    moved = {}
    if recorded:
        moved[str(recorded)] = str(project_now or recorded)
    rel_inputs = prov.get("inputs_from_project") or {}
    for old in prov.get("input_hashes", {}):
        now = old
        rel = rel_inputs.get(old)
        if not Path(old).exists() and project_now is not None and rel:
            cand = (project_now.parent / rel).resolve()
            if cand.exists():
                now = str(cand)
        moved[str(old)] = str(now)
    return prov, moved


def relocate(value, moved: dict):
    """``value`` (settings: nested dicts, lists, strings) with moved paths replaced."""
    if isinstance(value, dict):
        return {k: relocate(v, moved) for k, v in value.items()}
    if isinstance(value, list):
        return [relocate(v, moved) for v in value]
    if isinstance(value, str):
        return moved.get(value, value)
    return value


def repoint_run_json(run_json, old_root, new_root) -> None:
    """Rewrite the paths in a run.json that lie under ``old_root`` to lie under
    ``new_root`` (for outputs built in a staging folder that is then renamed)."""
    old_root, new_root = str(Path(old_root)), str(Path(new_root))

    def move(v):
        if isinstance(v, dict):
            return {move(k) if isinstance(k, str) else k: move(x) for k, x in v.items()}
        if isinstance(v, list):
            return [move(x) for x in v]
        if isinstance(v, str) and (v == old_root or v.startswith(old_root + "/")):
            return new_root + v[len(old_root):]
        return v

    path = Path(run_json)
    prov = json.loads(path.read_text(encoding="utf-8"))
    path.write_text(json.dumps(move(prov), indent=2, sort_keys=True) + "\n", encoding="utf-8")
