"""Same project and seed, same results: on rerun, across schedulers, and via reproduce.

Tables (CSV) must be byte-identical and raster arrays identical, whichever backend
(serial, local processes, a local Dask cluster) ran the independent tasks, because
every replicate seed is drawn up front in the parent.
"""

from __future__ import annotations

import hashlib
import json
import shutil
from pathlib import Path

import numpy as np
import pytest
import rasterio
from click.testing import CliRunner

from screener.cli import main
from screener.demo import write_demo_scenario

#: every test here runs the demo end to end
pytestmark = pytest.mark.slow

FAST = """
[overlap]
n_replicates = 9

[evaluation]
n_null = 9

[ranking]
n_draws = 50
"""


def invoke(*args):
    result = CliRunner().invoke(main, [str(a) for a in args])
    assert result.exit_code == 0, result.output
    return result


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    """The quick demo run four times (two serial, processes, Dask), without cache."""
    base = tmp_path_factory.mktemp("det")
    project = write_demo_scenario(base / "scen", size="small")
    project.write_text(project.read_text(encoding="utf-8") + FAST, encoding="utf-8")
    out = {}
    for name, sched in [("serial", "serial"), ("serial2", "serial"),
                        ("processes", "processes"), ("dask", "dask")]:
        out[name] = base / name
        invoke("run", project, "--out", out[name], "--scheduler", sched, "--no-cache")
    out["project"] = project
    return out


def _tables(folder: Path) -> dict:
    return {p.relative_to(folder).as_posix(): p.read_bytes()
            for p in sorted(folder.rglob("*.csv"))}


def _rasters(folder: Path) -> dict:
    arrays = {}
    for p in sorted(folder.rglob("*.tif")):
        with rasterio.open(p) as src:
            arrays[p.relative_to(folder).as_posix()] = (src.read(1), src.transform, src.crs)
    return arrays


def _assert_same(a: Path, b: Path):
    ta, tb = _tables(a), _tables(b)
    assert ta.keys() == tb.keys() and "candidates.csv" in ta and "overlap.csv" in ta
    for name in ta:
        assert ta[name] == tb[name], f"{name} differs between {a.name} and {b.name}"
    ra, rb = _rasters(a), _rasters(b)
    assert ra.keys() == rb.keys() and len(ra) >= 5
    for name in ra:
        xa, ga, ca = ra[name]
        xb, gb, cb = rb[name]
        assert ga == gb and ca == cb
        np.testing.assert_array_equal(xa, xb, err_msg=name)  # NaN == NaN here


@pytest.mark.parametrize("other", ["serial2", "processes", "dask"])
def test_same_tables_and_rasters(runs, other):
    _assert_same(runs["serial"], runs[other])


def test_run_json_records_provenance(runs):
    prov = json.loads((runs["serial"] / "run.json").read_text(encoding="utf-8"))
    v = prov["versions"]
    for pkg in ("screener", "python", "numpy", "scipy", "scikit-learn", "rasterio"):
        assert v[pkg], pkg
    import sklearn

    assert v["scikit-learn"] == sklearn.__version__
    s = prov["settings"]
    assert s["overlap"]["n_replicates"] == 9 and s["evaluation"]["n_null"] == 9
    # input hashes: one per input file, equal to hashlib's digest of its bytes
    hashes = prov["input_hashes"]
    scen = runs["project"].parent
    expected = [runs["project"], scen / "occurrences.csv", scen / "start_points.csv",
                scen / "surveys.csv", *sorted((scen / "layers").glob("*.tif"))]
    for p in expected:
        assert hashes[str(p.resolve())] == hashlib.sha256(p.read_bytes()).hexdigest()
    seeds = prov["seeds"]
    assert seeds["random_state"] == s["project"]["random_state"]
    assert len(set(seeds) - {"random_state"}) == 3  # one per taxon
    assert len({seeds[k] for k in seeds if k != "random_state"}) == 3
    t = prov["timings_s"]
    assert len(t) >= 4 and all(x >= 0 for x in t.values())
    # the demo's layers are built with |r| below the collinearity warning's 0.7, so the
    # list is there and holds no collinearity warning
    assert isinstance(prov["warnings"], list)
    assert not any("ollinear" in w for w in prov["warnings"])
    assert prov["scheduler"] == "serial" and prov["cache"]["folder"] is None
    assert "run.json" in prov["outputs"] and "candidates.csv" in prov["outputs"]


def test_reproduce_gives_the_same_candidates(runs, tmp_path):
    again = tmp_path / "again"
    invoke("reproduce", runs["serial"] / "run.json", "--out", again)
    assert (again / "candidates.csv").read_bytes() == (
        runs["serial"] / "candidates.csv").read_bytes()
    assert (again / "overlap.csv").read_bytes() == (runs["serial"] / "overlap.csv").read_bytes()


def test_reproduce_refuses_changed_inputs(runs, tmp_path):
    scen = tmp_path / "scen"
    shutil.copytree(runs["project"].parent, scen)
    prov = json.loads((runs["serial"] / "run.json").read_text(encoding="utf-8"))
    # point the provenance at the copy, then change one record
    text = json.dumps(prov).replace(str(runs["project"].parent), str(scen))
    (tmp_path / "run.json").write_text(text, encoding="utf-8")
    occ = scen / "occurrences.csv"
    occ.write_text(occ.read_text(encoding="utf-8") + "Nebrivex tarvelli,84.8,-14.8,X\n",
                   encoding="utf-8")
    result = CliRunner().invoke(main, ["reproduce", str(tmp_path / "run.json"), "--out",
                                       str(tmp_path / "d2")])
    assert result.exit_code == 2
    assert "occurrences.csv (changed)" in result.output and "--allow-changed-inputs" in (
        result.output)
    assert not (tmp_path / "d2").exists()
