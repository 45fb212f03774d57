"""The intake stage: inputs read and checked, every input file hashed."""

import hashlib

import numpy as np
import pytest

from screener.errors import InputError, LayerError
from screener.intake import file_sha256, input_paths, layer_paths, load_inputs
from screener.outputs.staging import new_run_id, write_run_marker
from screener.project import settings_from_dict


def test_file_sha256_matches_the_published_test_vector(tmp_path):
    # SHA-256("abc"), the example of FIPS 180-2 (Appendix B.1)
    p = tmp_path / "abc.txt"
    p.write_bytes(b"abc")
    assert file_sha256(p) == (
        "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad")
    # and a file larger than one read chunk (1 MiB) agrees with hashlib in one go
    big = tmp_path / "big.bin"
    data = np.random.default_rng(0).bytes(3 * (1 << 20) + 17)
    big.write_bytes(data)
    assert file_sha256(big) == hashlib.sha256(data).hexdigest()


def _settings(folder, **extra):
    (folder / "occurrences.csv").write_text(
        "taxon,longitude,latitude\n" + "".join(
            f"A,{10.05 + 0.1 * i:.2f},{-5.05 - 0.1 * i:.2f}\n" for i in range(6)))
    data = {"occurrences": {"path": "occurrences.csv", "min_records": 3},
            "layers": {"paths": ["layers/*.tif"]}}
    for section, body in extra.items():
        data.setdefault(section, {}).update(body)
    return settings_from_dict(data, base_dir=folder)


def test_every_input_file_is_hashed(small_layers):
    folder = small_layers[0].parent.parent
    s = _settings(folder)
    intake = load_inputs(s)
    files = {str(p) for p in input_paths(s)}
    # the three layers and the record file (no project file: settings from a dict)
    assert files == {str(p) for p in small_layers} | {str(folder / "occurrences.csv")}
    assert intake.input_hashes == {p: file_sha256(p) for p in files}
    assert intake.predictors == ["alpha", "beta", "gamma"]


def test_layers_inside_an_earlier_run_folder_are_never_inputs(small_layers):
    folder = small_layers[0].parent.parent
    run = folder / "layers" / "results"
    run.mkdir()
    write_run_marker(run, new_run_id())
    (run / "suitability.tif").write_bytes(small_layers[0].read_bytes())
    s = _settings(folder, layers={"paths": ["layers/*.tif", "layers/results/*.tif"]})
    paths, skipped = layer_paths(s)
    assert sorted(paths) == sorted(small_layers)
    assert skipped == {run: [run / "suitability.tif"]}
    # the run's warnings say so, naming the folder
    intake = load_inputs(s)
    said = [w for w in intake.warnings if "outputs of an earlier run" in w]
    assert len(said) == 1 and str(run) in said[0]
    assert str(run / "suitability.tif") not in intake.input_hashes


def test_an_excluded_layer_that_does_not_exist_is_refused_with_a_suggestion(small_layers):
    s = _settings(small_layers[0].parent.parent, layers={"exclude": ["betta"]})
    with pytest.raises(LayerError, match="'betta'.*beta"):
        load_inputs(s)


def test_no_taxon_with_usable_records_is_an_input_error(small_layers):
    folder = small_layers[0].parent.parent
    s = _settings(folder)
    (folder / "occurrences.csv").write_text("taxon,longitude,latitude\nA,50.0,50.0\n")
    with pytest.raises(InputError):
        load_inputs(s)
