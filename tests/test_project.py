"""Project file: the minimal file from the design works; typos get suggestions."""

import pytest

from screener.errors import ProjectError
from screener.project import (
    SCHEMA,
    SECTION_TYPES,
    load_project,
    setting,
    settings_from_dict,
    settings_table_markdown,
)

MINIMAL = """
[occurrences]
path = "occurrences.csv"      # columns: taxon + longitude, latitude (WGS84) or x, y (grid CRS)

[layers]
paths = ["layers/*.tif"]      # single-band rasters on one grid
"""


@pytest.fixture
def project_dir(small_layers):
    folder = small_layers[0].parent.parent
    (folder / "occurrences.csv").write_text("taxon,longitude,latitude\nA,10.1,-5.1\n")
    return folder


def test_minimal_project_file_as_written_in_the_design(project_dir):
    p = project_dir / "project.toml"
    p.write_text(MINIMAL)
    s = load_project(p)
    assert [x.name for x in s.layers.paths] == ["alpha.tif", "beta.tif", "gamma.tif"]
    assert s.occurrences.path == project_dir / "occurrences.csv"
    # every other setting has its documented default
    for section, spec in SCHEMA.items():
        for key in spec:
            if key not in ("path", "paths"):
                assert s.sections[section][key] == setting(section, key).default


@pytest.mark.parametrize(
    "extra, match",
    [
        ("[layer]\nelevation = 'x'\n", "unknown section \\[layer\\]. Did you mean 'layers'"),
        ("[isolation]\nmin_gap = 3\n", "unknown key 'min_gap'.*Did you mean 'min_gap_km'"),
        ("[isolation]\nmin_gap_km = 'far'\n", "must be a number"),
        ("[overlap]\nsimilarity_hypothesis = 'conservd'\n", "Did you mean 'conserved'"),
        ("[overlap]\nalternative = 'greatr'\n", "'greater', 'lower'"),
        ("[models]\nfamilies = ['elipsoid']\n", "Did you mean 'ellipsoid'"),
        ("[thresholds]\nrelax = 1.5\n", r"relax must be at least 0 and below 1; got 1\.5"),
        ("[ranking]\nn_draws = -5\n", r"n_draws must be at least 0 \(0 = no rank robustness\); got -5"),
        ("[overlap]\nalpha = 0\n", r"alpha must be above 0 and below 1; got 0\.0"),
    ],
)
def test_typos_and_bad_values(project_dir, extra, match):
    p = project_dir / "project.toml"
    p.write_text(MINIMAL + extra)
    with pytest.raises(ProjectError, match=match):
        load_project(p)


def test_missing_paths_and_required_keys(project_dir):
    with pytest.raises(ProjectError, match="does not exist"):
        settings_from_dict({"occurrences": {"path": "nope.csv"}, "layers": {"paths": ["*.tif"]}},
                           base_dir=project_dir)
    with pytest.raises(ProjectError, match="matches no file"):
        settings_from_dict(
            {"occurrences": {"path": "occurrences.csv"}, "layers": {"paths": ["x/*.tif"]}},
            base_dir=project_dir)
    with pytest.raises(ProjectError, match="required"):
        settings_from_dict({"occurrences": {"path": "occurrences.csv"}}, base_dir=project_dir)


def test_toml_syntax_error_names_the_file(project_dir):
    p = project_dir / "bad.toml"
    p.write_text("[occurrences\npath = 1\n")
    with pytest.raises(ProjectError, match="bad.toml is not valid TOML"):
        load_project(p)


def test_settings_table_lists_every_key():
    table = settings_table_markdown()
    for section, spec in SCHEMA.items():
        for key in spec:
            assert f"`[{section}] {key}`" in table


def test_renamed_overlap_settings_still_work_for_one_release(project_dir):
    p = project_dir / "project.toml"
    from screener.errors import ScreenerDeprecationWarning, ScreenerWarning

    # one warning class for every renamed setting: a FutureWarning (shown to users by
    # default) that is also a ScreenerWarning (listed with a run's warnings)
    assert issubclass(ScreenerDeprecationWarning, FutureWarning)
    assert issubclass(ScreenerDeprecationWarning, ScreenerWarning)
    p.write_text(MINIMAL + "[overlap]\nalternative = 'lower'\nresolution = 40\n"
                 "[models.ppm]\nfeature_classes = 'lq'\n")
    with pytest.warns(ScreenerDeprecationWarning) as caught:
        s = load_project(p)
    assert [str(w.message) for w in caught] == list(s.deprecations)
    assert len(s.deprecations) == 3
    assert "[overlap] alternative is renamed similarity_hypothesis (now 'diverged')" \
        in s.deprecations[0]
    assert "[models.ppm] feature_classes is retired in favour of terms" in s.deprecations[2]
    assert s.overlap.similarity_hypothesis == "diverged"
    assert s.overlap.grid_cells == 40
    p.write_text(MINIMAL + "[overlap]\nresolution = 40\ngrid_cells = 30\n")
    with pytest.raises(ProjectError, match="keep only 'grid_cells'"):
        load_project(p)


def test_sections_are_frozen_dataclasses_with_their_rules(project_dir):
    import dataclasses

    p = project_dir / "project.toml"
    p.write_text(MINIMAL)
    s = load_project(p)
    with pytest.raises(dataclasses.FrozenInstanceError):
        s.overlap.n_replicates = 5
    for section, cls in SECTION_TYPES.items():
        assert isinstance(s.sections[section], cls)
        for f in dataclasses.fields(cls):
            assert f.metadata["setting"] == setting(section, f.name)
    changed = s.replace("overlap", n_replicates=9)
    assert changed.overlap.n_replicates == 9 and s.overlap.n_replicates == 999
    with pytest.raises(ProjectError, match="alpha must be above 0 and below 1"):
        s.replace("overlap", alpha=1.5)
    with pytest.raises(ProjectError, match="Did you mean 'n_replicates'"):
        s.replace("overlap", n_replicate=9)


def test_every_number_setting_has_a_range_and_every_word_choice_is_checked():
    # the check refuses what a run would refuse: a count or distance with no lower
    # bound could be negative in a project file
    unbounded = [(sec, key) for sec, spec in SCHEMA.items() for key in spec
                 if setting(sec, key).type in (int, float) and not setting(sec, key).allowed()
                 and key != "random_state"]
    assert unbounded == []
