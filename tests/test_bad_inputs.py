"""The catalogue of bad inputs (docs/errors.md), each run through the command line.

Every case checks what a user sees: a short message that says what is wrong, where
and what to do; exit code 2 for input the user can fix; no traceback unless
``--debug``; and no output folder, partial or complete, left behind.  Inputs that
are unusual but legal (degrees-minutes-seconds, decimal commas, NaN without a nodata
tag, integer sentinels, categorical layers) must be read correctly instead.

The scenario is the invented small demo (``screener.demo``), copied per test and then
damaged in one way.
"""

from __future__ import annotations

import csv
import errno
import io
import json
import re
import shutil
from pathlib import Path

import numpy as np
import pytest
import rasterio
from affine import Affine
from click.testing import CliRunner

import screener.pipeline
from screener.cli import main
from screener.demo import write_demo_scenario

# A quick project: few replicates and weight draws (the defaults are for real runs).
FAST = """
[overlap]
n_replicates = 9

[evaluation]
n_null = 0

[ranking]
n_draws = 50
"""


@pytest.fixture(scope="module")
def demo_base(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("demo") / "scen"
    project = write_demo_scenario(folder, size="small")
    project.write_text(project.read_text(encoding="utf-8") + FAST, encoding="utf-8")
    return folder


@pytest.fixture
def scen(tmp_path, demo_base) -> Path:
    """A fresh copy of the quick demo scenario (without any cache)."""
    d = tmp_path / "scen"
    shutil.copytree(demo_base, d, ignore=shutil.ignore_patterns(".screener-cache"))
    return d


def invoke(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


def leftovers(out: Path) -> list:
    """Output folder and any staging folders beside it."""
    parent = out.parent
    if not parent.is_dir():
        return []
    return sorted(p.name for p in parent.iterdir()
                  if p.name == out.name or p.name.startswith(f".{out.name}."))


def assert_refused(result, out: Path, pattern: str, code: int = 2):
    """Exit code, message, no traceback, nothing written."""
    text = result.output
    assert result.exit_code == code, text
    assert re.search(pattern, text), text
    assert "Traceback" not in text
    assert "Error:" in text or "Interrupted" in text
    assert leftovers(out) == []


def read_rows(scen: Path) -> list:
    return list(csv.reader(io.StringIO((scen / "occurrences.csv").read_text("utf-8"))))


def write_rows(scen: Path, rows, **fmt) -> None:
    buf = io.StringIO()
    csv.writer(buf, lineterminator="\n", **fmt).writerows(rows)
    (scen / "occurrences.csv").write_text(buf.getvalue(), encoding="utf-8")


def rewrite_layer(path: Path, fn=None, **profile) -> None:
    """Rewrite a GeoTIFF with its values passed through ``fn`` and profile changes."""
    with rasterio.open(path) as src:
        arr = src.read(1)
        prof = src.profile.copy()
    if fn is not None:
        arr = fn(arr)
    prof.update(profile)
    if np.issubdtype(np.dtype(prof["dtype"]), np.integer):
        prof["predictor"] = 1  # floating-point predictor is for float types only
    path.unlink()
    with rasterio.open(path, "w", **prof) as dst:
        dst.write(arr.astype(prof["dtype"]), 1)
    path.with_suffix(".tif.aux.xml").unlink(missing_ok=True)


def add_settings(scen: Path, text: str) -> None:
    p = scen / "project.toml"
    p.write_text(p.read_text(encoding="utf-8") + "\n" + text + "\n", encoding="utf-8")


def set_in_section(scen: Path, section: str, line: str) -> None:
    """Add ``line`` directly under ``[section]`` of the project file."""
    p = scen / "project.toml"
    text = p.read_text(encoding="utf-8")
    assert f"[{section}]\n" in text
    p.write_text(text.replace(f"[{section}]\n", f"[{section}]\n{line}\n", 1), "utf-8")


# ------------------------------------------------------------------ damaged inputs
def _empty(s):
    (s / "occurrences.csv").write_text("", encoding="utf-8")


def _header_only(s):
    (s / "occurrences.csv").write_text("taxon,longitude,latitude\n", encoding="utf-8")


def _misspelt_latitude(s):
    rows = read_rows(s)
    rows[0][2] = "latitud"
    write_rows(s, rows)


def _misspelt_taxon(s):
    rows = read_rows(s)
    rows[0][0] = "Taxa"
    write_rows(s, rows)


def _no_coordinate_columns(s):
    write_rows(s, [[r[0], r[3]] for r in read_rows(s)])


def _latin1_bytes(s):
    # the catalogue number on line 3 (the second record) gets an N with tilde
    lines = (s / "occurrences.csv").read_text("utf-8").split("\n")
    lines[2] = lines[2].replace("MVNC ", "Museo Ñ ")
    (s / "occurrences.csv").write_bytes("\n".join(lines).encode("latin-1"))


def _decimal_comma_xy_file(s):
    # comma-separated x/y with quoted "84,8": could be a thousands separator in metres
    rows = read_rows(s)
    rows[0][1:3] = ["x", "y"]
    write_rows(s, [rows[0]] + [[r[0], r[1].replace(".", ","), r[2].replace(".", ","), r[3]]
                               for r in rows[1:]], quoting=csv.QUOTE_ALL)


def _decimal_comma_unquoted(s):
    # a comma file with unquoted "84,82912": each coordinate splits into two cells
    rows = read_rows(s)
    text = "\n".join([",".join(rows[0])] + [",".join([r[0], r[1].replace(".", ","),
                                                      r[2].replace(".", ","), r[3]])
                                            for r in rows[1:]]) + "\n"
    (s / "occurrences.csv").write_text(text, encoding="utf-8")


def _swapped(s):
    # the header still says longitude, latitude, but the values are swapped
    rows = read_rows(s)
    write_rows(s, [rows[0]] + [[r[0], r[2], r[1], r[3]] for r in rows[1:]])


def _taxon_all_dropped(s):
    rows = read_rows(s)
    write_rows(s, [rows[0]] + [[r[0], "120.0" if "quennomae" in r[0] else r[1], r[2], r[3]]
                               for r in rows[1:]])


def _taxon_lines(s, taxon: str) -> list:
    """Line numbers (header = line 1) of the rows of ``taxon`` in the records file."""
    return [i for i, r in enumerate(read_rows(s), start=1) if r and r[0] == taxon]


def _taxon_all_dropped_message(s) -> str:
    lines = _taxon_lines(s, "Nebrivex quennomae")
    first = ", ".join(map(str, lines[:2]))
    return rf"Nebrivex quennomae: 0 kept\).*{len(lines)} outside the grid \(lines {first},"


def _single_record(s):
    rows = read_rows(s)
    seen = []
    keep = [rows[0]]
    for r in rows[1:]:
        if "quennomae" in r[0]:
            if seen:
                continue
            seen.append(r)
        keep.append(r)
    write_rows(s, keep)


def _unknown_taxon_filter(s):
    set_in_section(s, "project", 'taxa = ["Nebrivex tarvelli", "Nebrivex sorakensis"]')


def _strict(s):
    """Today's strict mode: layers must already share one grid."""
    p = s / "project.toml"
    p.write_text(p.read_text("utf-8").replace('elevation = "elevation"',
                                              'elevation = "elevation"\nalignment = "strict"'),
                 "utf-8")


def _layer_crs(s):
    _strict(s)
    rewrite_layer(s / "layers" / "moisture.tif", crs="EPSG:32745")


def _layer_origin(s):
    _strict(s)
    with rasterio.open(s / "layers" / "moisture.tif") as src:
        t = src.transform
    rewrite_layer(s / "layers" / "moisture.tif", transform=Affine(t.a, 0, t.c + 0.1, 0, t.e, t.f))


def _layer_resolution(s):
    _strict(s)
    with rasterio.open(s / "layers" / "moisture.tif") as src:
        t = src.transform
    rewrite_layer(s / "layers" / "moisture.tif",
                  transform=Affine(2 * t.a, 0, t.c, 0, 2 * t.e, t.f))


def _layer_shape(s):
    _strict(s)
    rewrite_layer(s / "layers" / "moisture.tif", fn=lambda a: a[:-1], height=99)


def _layer_not_covering(s):
    # aligned by default: a layer shifted 0.1 degrees east leaves the west edge uncovered
    with rasterio.open(s / "layers" / "moisture.tif") as src:
        t = src.transform
    rewrite_layer(s / "layers" / "moisture.tif", transform=Affine(t.a, 0, t.c + 0.1, 0, t.e, t.f))


def _layer_all_nodata(s):
    rewrite_layer(s / "layers" / "moisture.tif", fn=lambda a: np.full_like(a, -9999.0))


def _layer_not_a_raster(s):
    (s / "layers" / "moisture.tif").write_text("not a raster", encoding="utf-8")


def _layer_untagged_sentinel(s):
    rewrite_layer(
        s / "layers" / "moisture.tif",
        fn=lambda a: np.where(a == -9999, -32768, np.round(a * 10)),
        dtype="int16", nodata=None,
    )


def _cell_budget(s):
    set_in_section(s, "layers", "cell_budget = 1000")


def _unknown_key(s):
    add_settings(s, "[isolation]\nmin_gap = 3")


def _unknown_section(s):
    add_settings(s, "[isolaton]\nmin_gap_km = 3")


def _wrong_type(s):
    add_settings(s, '[isolation]\nmin_gap_km = "far"')


def _toml_syntax(s):
    add_settings(s, "[isolation\nmin_gap_km = 3")


def _missing_records_file(s):
    (s / "occurrences.csv").unlink()


def _layer_glob_matches_nothing(s):
    p = s / "project.toml"
    p.write_text(p.read_text("utf-8").replace("layers/*.tif", "layer/*.tif"), "utf-8")


def _missing_start_points(s):
    (s / "start_points.csv").unlink()


def _unknown_elevation_layer(s):
    p = s / "project.toml"
    p.write_text(p.read_text("utf-8").replace('elevation = "elevation"',
                                              'elevation = "elevaton"'), "utf-8")


def _replace(s, old, new):
    p = s / "project.toml"
    text = p.read_text("utf-8")
    assert old in text
    p.write_text(text.replace(old, new), "utf-8")


def _zero_replicates(s):
    _replace(s, "n_replicates = 9", "n_replicates = 0")


def _negative_draws(s):
    _replace(s, "n_draws = 50", "n_draws = -5")


def _negative_gap(s):
    add_settings(s, "[isolation]\nmin_gap_km = -1")


def _unknown_weight(s):
    _replace(s, "n_draws = 50", "n_draws = 50\nweights = { suitabilty = 0.5 }")


def _unknown_model_parameter(s):
    add_settings(s, "[models.ellipsoid]\nrigde = 0.1")


def _generalise_deg_zero(s):
    add_settings(s, "[outputs]\ngeneralise_deg = 0.0")


def _infinite_setting(s):
    add_settings(s, "[background]\nbuffer_km = inf")


LATE_CHECKS = [
    (_zero_replicates, r"\[overlap\] n_replicates must be at least 1; the smallest possible p"),
    (_negative_draws, r"\[ranking\] n_draws must be at least 0 \(0 = no rank robustness\); "
                      r"got -5"),
    (_negative_gap, r"\[isolation\] min_gap_km must be at least 0; got -1"),
    (_unknown_weight, r"\[ranking\] weights: unknown component 'suitabilty'\. Did you mean "
                      r"'suitability'\?"),
    (_unknown_model_parameter, r"\[models\.ellipsoid\]: unknown parameter 'rigde'\. Did you "
                               r"mean 'ridge'\?"),
    (_generalise_deg_zero, r"\[outputs\] generalise_deg must be above 0"),
    (_infinite_setting, r"\[background\] buffer_km must be a finite number, got inf"),
]


@pytest.mark.parametrize("damage, pattern", LATE_CHECKS, ids=[c[0].__name__[1:] for c in LATE_CHECKS])
def test_check_refuses_what_run_would_fail_on(scen, damage, pattern):
    damage(scen)
    result = invoke("check", scen / "project.toml")
    assert result.exit_code == 2 and re.search(pattern, result.output), result.output
    assert "Traceback" not in result.output


CASES = [
    (_empty, r"occurrences\.csv is empty: it needs a header row"),
    (_header_only, r"has a header \(line 1\) but no records below it"),
    (_misspelt_latitude, r"Column 'latitud' looks misspelt: did you mean 'latitude'\?"),
    (_misspelt_taxon, r"no 'taxon' column .*Column 'Taxa' looks misspelt: did you mean 'taxon'"),
    (_no_coordinate_columns, r"needs columns longitude and latitude .* or x and y"),
    (_latin1_bytes, r"not valid UTF-8 \(byte 0xd1 on line 3\).*encoding = \"latin-1\""),
    (_decimal_comma_xy_file, r"written with a decimal comma .*set decimal = \",\""),
    (_decimal_comma_unquoted, r"35 with numbers split in two at a decimal comma \(lines 2, 3,"
                              r".*save the file with semicolons between the columns"),
    (_swapped, r"with longitude and latitude swapped.*check which column holds"),
    (_taxon_all_dropped, _taxon_all_dropped_message),
    (_single_record, r"Nebrivex quennomae: 1 kept\); at least 3 per taxon.*min_records"),
    (_unknown_taxon_filter, r"names 'Nebrivex sorakensis'.*Did you mean 'Nebrivex sorrakensis'"),
    (_layer_crs, r"not on the same grid: CRS EPSG:32745 in moisture\.tif but EPSG:4326 in "),
    (_layer_origin, r"not on the same grid: origin \(84\.775, -14\.5\) in moisture\.tif but "
                    r"\(84\.675, -14\.5\) in"),
    (_layer_resolution, r"resolution \(0\.01, 0\.01\) in moisture\.tif but \(0\.005, 0\.005\)"),
    (_layer_shape, r"shape 99 rows x 130 cols in moisture\.tif but 100 rows x 130 cols"),
    (_layer_not_covering, r"Layer 'moisture' .* does not cover the study area: 15\.4% of the "
                          r"reference grid \(layer 'cloud'"),
    (_layer_all_nodata, r"Layer 'moisture' .* has no data at all"),
    (_layer_not_a_raster, r"moisture\.tif cannot be read as a raster"),
    (_layer_untagged_sentinel, r"moisture\.tif has no nodata value, but .* hold -32768.*"
                               r"gdal_edit -a_nodata -32768"),
    (_cell_budget, r"13,000 cells, more than the cell budget of 1,000.*\[layers\] cell_budget"),
    (_unknown_key, r"unknown key 'min_gap' in \[isolation\]\. Did you mean 'min_gap_km'\?"),
    (_unknown_section, r"unknown section \[isolaton\]\. Did you mean 'isolation'\?"),
    (_wrong_type, r"\[isolation\] min_gap_km must be a number, got 'far'"),
    (_toml_syntax, r"project\.toml is not valid TOML"),
    (_missing_records_file, r"\[occurrences\] path = 'occurrences\.csv': .* does not exist"),
    (_layer_glob_matches_nothing, r"'layer/\*\.tif' matches no file"),
    (_missing_start_points, r"\[access\] start_points .* does not exist"),
    (_unknown_elevation_layer, r"elevation = 'elevaton' names no layer.*Did you mean 'elevation'"),
] + LATE_CHECKS


@pytest.mark.parametrize("damage, pattern", CASES, ids=[c[0].__name__[1:] for c in CASES])
def test_bad_input_is_refused_with_a_message_and_no_output(scen, damage, pattern):
    if callable(pattern):  # a message that names rows of the (invented) records file
        pattern = pattern(scen)
    damage(scen)
    out = scen.parent / "out"
    result = invoke("run", scen / "project.toml", "--out", out)
    assert_refused(result, out, pattern)
    assert not (scen / ".screener-cache").exists()  # refused before any stage ran


def test_debug_shows_the_exception(scen):
    from screener.errors import RecordsError

    _empty(scen)
    result = invoke("run", scen / "project.toml", "--out", scen.parent / "out", "--debug")
    assert isinstance(result.exception, RecordsError)


def test_missing_project_file(tmp_path):
    result = invoke("check", tmp_path / "nope.toml")
    assert result.exit_code == 2 and "Project file" in result.output
    assert "does not exist" in result.output and "Traceback" not in result.output


def test_swap_hint_only_where_swapping_puts_the_record_on_the_grid(scen):
    # valid positions far from the grid (lon 180 / lat -90 and the like) and an
    # impossible latitude whose swap is still off the grid get no swap hint; a row
    # whose swapped coordinates fall on the grid does
    rows = read_rows(scen)
    lon, lat = rows[1][1], rows[1][2]
    extra = [["Nebrivex tarvelli", "180", "-90", "X1"], ["Nebrivex tarvelli", "-180", "-90", "X2"],
             ["Nebrivex tarvelli", "-14.8", "95.5", "X3"], ["Nebrivex tarvelli", "0", "0", "X4"],
             ["Nebrivex tarvelli", lat, lon, "X5"]]
    write_rows(scen, rows + extra)
    n = len(rows)
    text = _check_lines(scen)
    for k, reason in enumerate(["(180.00000, -90.00000) is outside the grid",
                                "(-180.00000, -90.00000) is outside the grid",
                                "latitude 95.5 is beyond +/-90", "(0.00000, 0.00000) is outside "
                                "the grid", "is outside the grid; with longitude and latitude "
                                "swapped it would fall on the grid: check the column order"]):
        line = re.search(rf"^  line {n + 1 + k} \(Nebrivex tarvelli\): (.*)$", text, re.M)
        assert line and reason in line.group(1), (k, text)
    assert text.count("swapped") == 1


def test_check_lists_every_dropped_row_before_refusing(scen):
    _taxon_all_dropped(scen)
    result = invoke("check", scen / "project.toml")
    assert result.exit_code == 2
    listed = re.findall(r"line (\d+) \(Nebrivex quennomae\): \(120\.00000", result.output)
    # every row of the taxon, not only the first five
    assert [int(n) for n in listed] == _taxon_lines(scen, "Nebrivex quennomae")
    assert len(listed) > 5


# ------------------------------------------------------------------ legal oddities
def _check_lines(scen) -> str:
    result = invoke("check", scen / "project.toml")
    assert result.exit_code == 0, result.output
    return result.output


@pytest.fixture(scope="module")
def baseline(demo_base, tmp_path_factory) -> str:
    d = tmp_path_factory.mktemp("baseline") / "scen"
    shutil.copytree(demo_base, d)
    return _check_lines(d)


def _kept(text: str) -> dict:
    return {m[0]: int(m[1]) for m in re.findall(r"^(Nebrivex \w+): (\d+) kept", text, re.M)}


def _valid_cells(text: str) -> str:
    return re.search(r"([\d,]+) valid cells", text).group(1)


def _to_dms(v: float, pos: str, neg: str) -> str:
    # degrees + minutes/60 + seconds/3600, hemisphere letter for the sign
    h = pos if v >= 0 else neg
    v = abs(v)
    deg = int(v)
    mins = int((v - deg) * 60)
    sec = (v - deg - mins / 60) * 3600
    return f"{deg}°{mins:02d}'{sec:06.3f}\"{h}"


def test_degrees_minutes_seconds_are_parsed(scen, baseline):
    rows = read_rows(scen)
    write_rows(scen, [rows[0]] + [[r[0], _to_dms(float(r[1]), "E", "W"),
                                   _to_dms(float(r[2]), "N", "S"), r[3]] for r in rows[1:]])
    text = _check_lines(scen)
    assert _kept(text) == _kept(baseline)
    assert "dropped" in text and _kept(text)


def test_decimal_commas_in_a_semicolon_file(scen, baseline):
    rows = read_rows(scen)
    write_rows(scen, [rows[0]] + [[r[0], r[1].replace(".", ","), r[2].replace(".", ","), r[3]]
                                  for r in rows[1:]], delimiter=";")
    assert _kept(_check_lines(scen)) == _kept(baseline)


def test_quoted_decimal_commas_in_a_comma_file(scen, baseline):
    # "84,8" in degrees cannot be a thousands separator, so it reads as 84.8
    rows = read_rows(scen)
    write_rows(scen, [rows[0]] + [[r[0], r[1].replace(".", ","), r[2].replace(".", ","), r[3]]
                                  for r in rows[1:]], quoting=csv.QUOTE_ALL)
    assert _kept(_check_lines(scen)) == _kept(baseline)


def test_latin1_file_with_its_encoding_named(scen, baseline):
    _latin1_bytes(scen)
    set_in_section(scen, "occurrences", 'encoding = "latin-1"')
    assert _kept(_check_lines(scen)) == _kept(baseline)


def test_nan_without_nodata_tag_is_nodata(scen, baseline):
    rewrite_layer(scen / "layers" / "moisture.tif",
                  fn=lambda a: np.where(a == -9999, np.nan, a), nodata=None)
    text = _check_lines(scen)
    assert _valid_cells(text) == _valid_cells(baseline)


def test_integer_layer_with_tagged_sentinel(scen, baseline):
    rewrite_layer(scen / "layers" / "moisture.tif",
                  fn=lambda a: np.where(a == -9999, -32768, np.round(a * 10)),
                  dtype="int16", nodata=-32768)
    text = _check_lines(scen)
    assert _valid_cells(text) == _valid_cells(baseline)
    predictors = re.search(r"Predictors \(\d\): .*", text).group(0)
    assert predictors == re.search(r"Predictors \(\d\): .*", baseline).group(0)


@pytest.mark.parametrize("fill, nodata", [
    (float(np.finfo(np.float32).min), float("nan")),  # tagged NaN, holding -3.4e38
    (3e38, None), (-3e38, None),                      # untagged huge values
    (np.inf, None), (-np.inf, -9999.0),
], ids=["nan-tag-with-min-float32", "untagged+3e38", "untagged-3e38", "inf", "-inf"])
def test_fill_values_beyond_1e30_are_nodata_with_a_warning(scen, baseline, fill, nodata):
    n = {}

    def fill_nodata(a):
        n["cells"] = int((a == -9999).sum())
        return np.where(a == -9999, fill, a)

    rewrite_layer(scen / "layers" / "moisture.tif", fn=fill_nodata, nodata=nodata)
    text = _check_lines(scen)
    assert _valid_cells(text) == _valid_cells(baseline)
    assert n["cells"] > 0 and (f"Warning: Layer 'moisture' ({scen / 'layers' / 'moisture.tif'}"
                               f"): {n['cells']:,} cells hold values beyond +/-1e+30") in text


def test_line_numbers_count_newlines_inside_quoted_fields(scen):
    rows = read_rows(scen)
    rows[1][3] = "collected after rain;\nsee notebook 4"  # the record spans lines 2-3
    rows[5][2] = "123.4"  # the fifth record: file line 7
    write_rows(scen, rows)
    text = invoke("check", scen / "project.toml").output
    assert re.search(r"line 7 \(Nebrivex \w+\): latitude 123\.4 is beyond", text), text


def test_byte_order_mark_with_utf8_named(scen, baseline):
    occ = scen / "occurrences.csv"
    occ.write_bytes(b"\xef\xbb\xbf" + occ.read_bytes())
    set_in_section(scen, "occurrences", 'encoding = "utf-8"')
    assert _kept(_check_lines(scen)) == _kept(baseline)


def test_constant_layer_is_left_out_with_a_warning(scen):
    baseline = re.search(r"Predictors \(\d\): (.*)", _check_lines(scen)).group(1)
    assert "cloud" in baseline.split(", ")
    rewrite_layer(scen / "layers" / "cloud.tif", fn=lambda a: np.where(a == -9999, a, 5.0))
    text = _check_lines(scen)
    assert "Constant layers (left out): cloud" in text
    kept = [name for name in baseline.split(", ") if name != "cloud"]
    assert f"Predictors ({len(kept)}): {', '.join(kept)}" in text
    assert "Warning: Layer 'cloud' is constant" in text


def _three_classes(a):
    v = a[a != -9999]
    cls = 1 + (a > np.median(v)) + (a > np.percentile(v, 80))
    return np.where(a == -9999, 0, cls)


def test_categorical_layer_warns_until_declared(scen):
    rewrite_layer(scen / "layers" / "cloud.tif", fn=_three_classes, dtype="uint8", nodata=0)
    # the demo's past slice carries the layer too: the same classes there
    for past in (scen / "past").glob("*/cloud.tif"):
        rewrite_layer(past, fn=_three_classes, dtype="uint8", nodata=0)
    text = _check_lines(scen)
    assert "only 3 distinct values" in text and "[layers] categorical" in text
    set_in_section(scen, "layers", 'categorical = ["cloud"]')
    text = _check_lines(scen)
    assert "cloud=1, cloud=2, cloud=3" in text
    assert "distinct values" not in text


def test_layers_in_an_earlier_runs_folder_are_skipped(scen, baseline):
    from screener.outputs.staging import write_run_marker

    # paths = ["layers/*/*.tif"] with an earlier run's --out inside layers/
    base = scen / "layers" / "base"
    base.mkdir()
    for tif in (scen / "layers").glob("*.tif"):
        tif.rename(base / tif.name)
    results = scen / "layers" / "results"
    results.mkdir()
    write_run_marker(results, "an-earlier-run")
    shutil.copy(base / "moisture.tif", results / "access_hours.tif")
    shutil.copy(base / "cloud.tif", results / "barrier.tif")
    p = scen / "project.toml"
    p.write_text(p.read_text("utf-8").replace("layers/*.tif", "layers/*/*.tif"), "utf-8")
    text = _check_lines(scen)
    assert re.search(r"Warning: Skipped 2 layer file\(s\) in \S+results \(access_hours\.tif, "
                     r"barrier\.tif\): that folder holds the outputs of an earlier run", text)
    predictors = re.search(r"Predictors \(\d\): .*", text).group(0)
    assert predictors == re.search(r"Predictors \(\d\): .*", baseline).group(0)
    # a project inside a run folder (the demo's scenario) still reads its own layers
    write_run_marker(scen, "the-demo")
    text = _check_lines(scen)
    assert text.count("Skipped 2 layer file(s)") == 1 and predictors in text


def test_renamed_settings_are_listed_with_the_runs_warnings(scen):
    # the console shows them as the run's own warnings, once, without Python's
    # file-and-line warning format
    set_in_section(scen, "overlap", 'alternative = "greater"\nresolution = 64')
    add_settings(scen, "[models.ppm]\nfeature_classes = \"lq\"")
    text = _check_lines(scen)
    for old, new in (("[overlap] alternative", "is renamed similarity_hypothesis "
                      "(now 'conserved')"), ("[overlap] resolution", "is renamed grid_cells"),
                     ("[models.ppm] feature_classes", "is retired in favour of terms")):
        assert text.count(f"Warning: {scen / 'project.toml'}: {old} {new}; the old name "
                          "stops working in the next release.") == 1, text
    assert "FutureWarning" not in text and "warnings.warn" not in text


@pytest.mark.slow
def test_renamed_settings_are_in_run_json(warm, tmp_path):
    scen = tmp_path / "scen"
    shutil.copytree(warm, scen)  # the same values under the old names: from the cache
    set_in_section(scen, "overlap", 'alternative = "greater"\nresolution = 64')
    out = tmp_path / "out"
    result = invoke("run", scen / "project.toml", "--out", out)
    assert result.exit_code == 0, result.output
    warned = json.loads((out / "run.json").read_text(encoding="utf-8"))["warnings"]
    renamed = [w for w in warned if "is renamed" in w]
    assert len(renamed) == 2 and "similarity_hypothesis" in renamed[0]
    assert all(result.output.count(f"Warning: {w}") == 1 for w in renamed)
    assert "is renamed" in (out / "report.html").read_text(encoding="utf-8")


# ------------------------------------------------------------------ output folder
@pytest.fixture(scope="module")
def warm(demo_base, tmp_path_factory):
    """A scenario run once, so its cache makes later runs fast."""
    d = tmp_path_factory.mktemp("warm") / "scen"
    shutil.copytree(demo_base, d)
    first = d.parent / "first"
    result = invoke("run", d / "project.toml", "--out", first)
    assert result.exit_code == 0, result.output
    return d


@pytest.mark.slow
def test_existing_output_folder_is_kept_without_overwrite(warm, tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    (out / "notes.txt").write_text("field notes", encoding="utf-8")
    result = invoke("run", warm / "project.toml", "--out", out)
    assert result.exit_code == 2
    assert "already exists and won't be replaced without --overwrite" in result.output
    assert (out / "notes.txt").read_text(encoding="utf-8") == "field notes"


@pytest.mark.slow
def test_overwrite_interrupted_while_writing_keeps_the_old_folder(warm, tmp_path, monkeypatch):
    from screener.outputs import gpx

    from screener.outputs.staging import write_run_marker

    out = tmp_path / "out"
    out.mkdir()
    write_run_marker(out, "an-earlier-run")  # as if an earlier run wrote it
    (out / "notes.txt").write_text("previous run", encoding="utf-8")

    def interrupted(*a, **k):
        raise KeyboardInterrupt

    monkeypatch.setattr(gpx, "write_gpx", interrupted)
    result = invoke("run", warm / "project.toml", "--out", out, "--overwrite")
    assert result.exit_code == 130 and "Interrupted" in result.output
    assert sorted(p.name for p in out.iterdir()) == [".screener-run", "notes.txt"]
    assert leftovers(out) == ["out"]  # no staging folder left beside it
    monkeypatch.undo()
    result = invoke("run", warm / "project.toml", "--out", out, "--overwrite")
    assert result.exit_code == 0, result.output
    assert not (out / "notes.txt").exists() and (out / "run.json").exists()


# ------------------------------------------------------------------ --overwrite never loses data
def _snapshot(folder: Path) -> dict:
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*"))
            if p.is_file()}


@pytest.mark.parametrize("where", ["project folder", "parent of the project folder"])
def test_overwrite_refuses_a_folder_holding_the_inputs(scen, where):
    (scen / "notes.txt").write_text("field notes", encoding="utf-8")
    out = scen if where == "project folder" else scen.parent
    before = _snapshot(out)
    result = invoke("run", scen / "project.toml", "--out", out, "--overwrite")
    assert result.exit_code == 2, result.output
    assert re.search(r"holds input\(s\) of this run .*replacing it would delete them",
                     result.output.replace("\n", " ")), result.output
    assert "Traceback" not in result.output
    assert _snapshot(out) == before  # records, layers, notes: all still there


def test_overwrite_refuses_a_folder_no_run_wrote(scen, tmp_path):
    out = tmp_path / "elsewhere"
    out.mkdir()
    (out / "thesis.docx").write_bytes(b"three years of work")
    result = invoke("run", scen / "project.toml", "--out", out, "--overwrite")
    assert result.exit_code == 2, result.output
    assert "was not written by the screener" in result.output
    assert (out / "thesis.docx").read_bytes() == b"three years of work"


@pytest.mark.slow
def test_overwrite_refuses_the_run_folder_a_debrief_reads(warm, tmp_path):
    run_dir = warm.parent / "first"
    before = _snapshot(run_dir)
    result = invoke("debrief", tmp_path / "field.csv", "--run", run_dir, "--out", run_dir,
                    "--overwrite")
    assert result.exit_code == 2 and "holds input(s)" in result.output, result.output
    assert _snapshot(run_dir) == before


@pytest.mark.slow
def test_overwrite_replaces_an_earlier_run(warm, tmp_path):
    out = tmp_path / "out"
    assert invoke("run", warm / "project.toml", "--out", out).exit_code == 0
    first = json.loads((out / ".screener-run").read_text("utf-8"))["run_id"]
    assert json.loads((out / "run.json").read_text("utf-8"))["run_id"] == first
    result = invoke("run", warm / "project.toml", "--out", out, "--overwrite")
    assert result.exit_code == 0, result.output
    assert json.loads((out / ".screener-run").read_text("utf-8"))["run_id"] != first
    assert leftovers(out) == ["out"]


def test_demo_does_not_delete_a_folder_that_appears_while_it_runs(tmp_path, monkeypatch):
    out = tmp_path / "demo-out"

    def fake_run(settings, results, **kw):  # the demo's run, much faster
        Path(results).mkdir()
        (Path(results) / "run.json").write_text("{}", encoding="utf-8")
        out.mkdir()
        (out / "notes.txt").write_text("made meanwhile", encoding="utf-8")

    monkeypatch.setattr(screener.pipeline, "run_project", fake_run)
    result = invoke("demo", "--out", out, "--size", "small")
    assert result.exit_code == 2, result.output
    assert re.search(r"already exists and won't be replaced without --overwrite"
                     r"|appeared or changed during the run", result.output), result.output
    assert (out / "notes.txt").read_text(encoding="utf-8") == "made meanwhile"
    result = invoke("demo", "--out", out, "--size", "small", "--overwrite")
    assert result.exit_code == 2 and "was not written by the screener" in result.output
    assert (out / "notes.txt").exists()


def test_staging_folders_are_unique_and_stale_ones_are_removed(tmp_path):
    import subprocess
    import sys

    from screener.errors import OutputError
    from screener.outputs.staging import RUN_MARKER, staged_output, write_run_marker

    out = tmp_path / "out"
    # a staging folder of a killed run: its marker names a process that has ended
    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
                          capture_output=True, text=True, check=True)
    stale = tmp_path / ".out.partial-0123"
    stale.mkdir()
    write_run_marker(stale, "killed-run")
    marker = json.loads((stale / RUN_MARKER).read_text("utf-8"))
    marker["pid"] = int(dead.stdout)
    (stale / RUN_MARKER).write_text(json.dumps(marker), encoding="utf-8")
    unknown = tmp_path / ".out.partial-by-hand"  # no marker: not ours to delete
    unknown.mkdir()
    with pytest.raises(OutputError, match="appeared or changed during the run"):
        with staged_output(out) as a:
            assert not stale.exists() and unknown.exists()
            with staged_output(out) as b:
                assert a != b and a.parent == b.parent
                assert (a / RUN_MARKER).exists() and (b / RUN_MARKER).exists()
    assert (out / RUN_MARKER).exists() and a.exists()  # the second finished first; the
    assert unknown.exists()                            # first is kept, not removed


@pytest.mark.slow
def test_output_parent_is_a_file(warm, tmp_path):
    # simulates an unwritable location without relying on permissions (tests run as root)
    blocker = tmp_path / "blocker"
    blocker.write_text("", encoding="utf-8")
    out = blocker / "out"
    result = invoke("run", warm / "project.toml", "--out", out)
    assert result.exit_code == 2 and "is a file, not a folder" in result.output
    assert "Traceback" not in result.output


@pytest.mark.slow
def test_output_parent_not_writable(warm, tmp_path, monkeypatch):
    # root ignores chmod, so the permission check itself is simulated with os.access
    import screener.outputs.staging as staging

    real_access = staging.os.access
    out = tmp_path / "out"
    monkeypatch.setattr(staging.os, "access", lambda path, mode, **k: (
        False if Path(path) == out.parent else real_access(path, mode, **k)))
    result = invoke("run", warm / "project.toml", "--out", out)
    assert_refused(result, out, r"Cannot write in .* \(permission denied\); choose another --out")


@pytest.mark.slow
def test_full_disk_while_writing(warm, tmp_path, monkeypatch):
    from screener.outputs import gpx

    def full(path, *a, **k):
        raise OSError(errno.ENOSPC, "No space left on device", str(path))

    monkeypatch.setattr(gpx, "write_gpx", full)
    out = tmp_path / "out"
    result = invoke("run", warm / "project.toml", "--out", out)
    assert_refused(result, out, r"The disk is full while writing .*sites\.gpx; free some space")


@pytest.mark.slow
def test_read_only_file_system_while_writing(warm, tmp_path, monkeypatch):
    from screener.outputs import writer

    def refused(path, *a, **k):
        raise OSError(errno.EROFS, "Read-only file system", str(path))

    monkeypatch.setattr(writer, "write_csv", refused)  # the writer's own name for it
    out = tmp_path / "out"
    result = invoke("run", warm / "project.toml", "--out", out)
    assert_refused(result, out, r"Cannot write .*: Read-only file system; choose another --out")


@pytest.mark.slow
def test_a_bug_is_reported_as_one_and_leaves_nothing(warm, tmp_path, monkeypatch):
    def broken(*a, **k):
        raise ZeroDivisionError("division by zero")

    monkeypatch.setattr(screener.pipeline, "plan_sites", broken)
    out = tmp_path / "out"
    result = invoke("run", warm / "project.toml", "--out", out)
    assert_refused(result, out, r"Internal error \(ZeroDivisionError.*rerun with --debug",
                   code=1)


# ------------------------------------------------------------------ sensitive localities
_TOKEN = re.compile(rb"-?\d+\.\d+")


def _png_text_chunks(data: bytes) -> list:
    """The text chunks (tEXt, zTXt, iTXt) of a PNG, as the PNG specification lays
    them out: length, type, data, CRC."""
    import struct
    import zlib

    out, i = [], 8
    while i + 8 <= len(data):
        (n,), kind = struct.unpack(">I", data[i:i + 4]), data[i + 4:i + 8]
        body = data[i + 8:i + 8 + n]
        if kind == b"tEXt":
            out.append(body)
        elif kind == b"zTXt":
            key, _, rest = body.partition(b"\0")
            out.append(key + b" " + zlib.decompress(rest[1:]))
        elif kind == b"iTXt":
            key, _, rest = body.partition(b"\0")
            flag, text = rest[0], rest[2:].split(b"\0", 2)[-1]
            out.append(key + b" " + (zlib.decompress(text) if flag else text))
        i += 12 + n
    return out


def _embedded_texts(data: bytes) -> list:
    """Texts inside an image or a page: PNG text chunks, SVG markup, and the images
    embedded in HTML or SVG as base64 data URIs (each looked into in turn)."""
    import base64

    if data.startswith(b"\x89PNG\r\n\x1a\n"):
        return _png_text_chunks(data)
    out = []
    for m in re.finditer(rb"data:([\w/+.-]+);base64,([A-Za-z0-9+/=\s]+)", data):
        inner = base64.b64decode(m.group(2))
        out.append(inner)
        out += _embedded_texts(inner)
    return out


def _file_texts(path: Path) -> list:
    """The bytes of a file, plus the inflated streams and the text of a PDF (as
    poppler's pdftotext extracts it) and the texts embedded in images and pages."""
    import subprocess
    import zlib

    from _synthetic_run import ensure_debian_tool

    raw = path.read_bytes()
    texts = [raw] + _embedded_texts(raw)
    if path.suffix == ".pdf":
        for m in re.finditer(rb"stream\r?\n(.*?)\r?\nendstream", raw, re.S):
            try:
                texts.append(zlib.decompress(m.group(1)))
            except zlib.error:
                pass
        exe = ensure_debian_tool("pdftotext", "poppler-utils")
        if exe:
            texts.append(subprocess.run([exe, "-layout", str(path), "-"], check=True,
                                        capture_output=True).stdout)
            meta = subprocess.run([exe.replace("pdftotext", "pdfinfo"), str(path)],
                                  capture_output=True)
            texts.append(meta.stdout)
    return texts


def _full_precision_leaks(folder: Path, coords) -> list:
    """(file, lon, lat) where a file holds a record's longitude and latitude both, as
    text to 4 or more decimals (about 10 m) or as packed floats."""
    import struct

    leaks = []
    for path in sorted(p for p in folder.rglob("*") if p.is_file()):
        texts = _file_texts(path)
        tokens = {t.decode() for text in texts for t in _TOKEN.findall(text)
                  if len(t.split(b".")[1]) >= 4}
        values = [(float(t), len(t.split(".")[1])) for t in tokens]

        def seen(v):
            if any(abs(x - v) < 0.5 * 10.0 ** -min(d, 5) for x, d in values):
                return True
            packed = [struct.pack(f, v) for f in ("<d", ">d", "<f", ">f")]
            return any(b in text for b in packed for text in texts)

        leaks.extend((path.name, lon, lat) for lon, lat in coords if seen(lon) and seen(lat))
    return leaks


def _drawn_records(figures, coords) -> list:
    """(figure number, lon, lat) where a figure draws a record at full precision."""
    return [(k, lon, lat) for k, pts in enumerate(figures) for lon, lat in coords
            if np.any(np.all(np.abs(pts - (lon, lat)) < 1e-7, axis=1))]


@pytest.mark.slow
def test_sensitive_localities_never_leave_at_full_precision(warm, tmp_path, monkeypatch):
    import matplotlib.figure
    import matplotlib.text
    from _synthetic_run import figure_points

    from screener.outputs.privacy import generalise_coordinates

    scen = tmp_path / "scen"
    # with the cache of a run without `sensitive`: the cached model stage must not
    # bring back records flagged as not sensitive
    shutil.copytree(warm, scen)
    set_in_section(scen, "occurrences", "sensitive = true")
    rows = read_rows(scen)
    # rows dropped for reasons that quote coordinates
    rows.append(["Nebrivex tarvelli", "120.12345", "-14.65432", "MVNC 9001"])
    rows.append(["Nebrivex quennomae", "84.91234", "123.45678", "MVNC 9002"])
    write_rows(scen, rows)
    coords = [(float(r[1]), float(r[2])) for r in rows[1:]]
    # and a row whose degrees-minutes-seconds could not be read (quoted as written)
    with (scen / "occurrences.csv").open("a", encoding="utf-8") as f:
        f.write("Nebrivex tarvelli,84 49 44 X,14 47 09 Q,MVNC 9003\n")
    # the sites too: their least-cost paths and walking routes end at the exact cells
    add_settings(scen, "[outputs]\ngeneralise_sites = true")
    first = list(csv.DictReader(io.StringIO(
        (warm.parent / "first" / "candidates.csv").read_text(encoding="utf-8"))))
    exact_sites = [(float(r["longitude"]), float(r["latitude"])) for r in first]
    assert exact_sites
    # every figure the run saves (report PNGs, field-sheet PDF pages) is looked into
    # at the moment it is saved
    figures, drawn_text = [], tmp_path / "figure-texts"
    drawn_text.mkdir()
    real_savefig = matplotlib.figure.Figure.savefig

    def spy(fig, *a, **k):
        figures.append(figure_points(fig))
        texts = [t.get_text() for t in fig.findobj(matplotlib.text.Text)]
        (drawn_text / f"{len(figures)}.txt").write_text("\n".join(texts), "utf-8")
        return real_savefig(fig, *a, **k)

    monkeypatch.setattr(matplotlib.figure.Figure, "savefig", spy)
    out = tmp_path / "out"
    result = invoke("run", scen / "project.toml", "--out", out)
    assert result.exit_code == 0, result.output
    written = {p.suffix for p in out.rglob("*") if p.is_file()}
    assert {".csv", ".html", ".json", ".gpkg", ".gpx", ".pdf", ".tif"} <= written
    assert _full_precision_leaks(out, coords) == []
    assert len(figures) > 10
    assert _drawn_records(figures, coords) == []
    assert _full_precision_leaks(drawn_text, coords) == []  # nor written on them
    assert _drawn_records(figures, exact_sites) == []
    assert _full_precision_leaks(out, exact_sites) == []
    # the figures draw the records at their generalised coordinates instead
    glon, glat = generalise_coordinates(*np.transpose(coords[:5]))
    assert len(_drawn_records(figures, zip(glon, glat))) > 0
    dropped = (out / "dropped_records.csv").read_text(encoding="utf-8")
    assert "(about 120.150, -14.650, generalised to 0.1 degrees) is outside the grid" in dropped
    assert "latitude [withheld] is beyond" in dropped
    assert "longitude [withheld] is not a number" in dropped and "49 44" not in dropped
    # the scan finds what it looks for: asked for full precision, the outputs hold it
    set_in_section(scen, "outputs", "full_precision = true")
    full = tmp_path / "full"
    figures.clear()
    assert invoke("run", scen / "project.toml", "--out", full).exit_code == 0
    leaked = {name for name, *_ in _full_precision_leaks(full, coords)}
    assert {"dropped_records.csv", "report.html"} <= leaked
    assert len(_drawn_records(figures, coords)) > 0


def test_unknown_sensitive_taxon_is_an_error(scen):
    set_in_section(scen, "occurrences", 'sensitive = ["Nebrivex sorakensis"]')
    out = scen.parent / "out"
    result = invoke("run", scen / "project.toml", "--out", out)
    assert_refused(result, out, r"\[occurrences\] sensitive names 'Nebrivex sorakensis', "
                   r"which is no taxon .*Did you mean 'Nebrivex sorrakensis'")


# ------------------------------------------------------------------ spreadsheet formulas
_FORMULA = "=HYPERLINK(\"http://example.invalid\",\"open\")"


@pytest.mark.slow
def test_no_csv_cell_is_a_spreadsheet_formula(scen):
    from screener.outputs.tables import FORMULA_STARTS, neutralise_cell

    rows = read_rows(scen)
    names = {"Nebrivex quennomae": _FORMULA, "Nebrivex sorrakensis": "@SUM(1+1)"}
    write_rows(scen, [rows[0]] + [[names.get(r[0], r[0])] + r[1:] for r in rows[1:]])
    out = scen.parent / "out"
    result = invoke("run", scen / "project.toml", "--out", out)
    assert result.exit_code == 0, result.output
    tables = sorted(out.rglob("*.csv"))
    assert len(tables) >= 4
    cells = [c for t in tables for row in csv.reader(io.StringIO(t.read_text("utf-8")))
             for c in row]
    # OWASP's guidance on CSV injection: no cell may start with = + - @ tab or CR,
    # unless it is a plain number
    bad = [c for c in cells if c.startswith(FORMULA_STARTS) and neutralise_cell(c) != c]
    assert bad == []
    assert "'" + _FORMULA in cells and "'@SUM(1+1)" in cells


# ------------------------------------------------------------------ reproduce trusts no run.json
def _edited_run_json(warm, tmp_path, edit) -> Path:
    prov = json.loads((warm.parent / "first" / "run.json").read_text(encoding="utf-8"))
    edit(prov)
    p = tmp_path / "run.json"
    p.write_text(json.dumps(prov), encoding="utf-8")
    return p


def _other_records(prov):
    src = Path(prov["settings"]["occurrences"]["path"])
    other = src.with_name("other_records.csv")
    other.write_text(src.read_text("utf-8") + "Nebrivex tarvelli,84.8,-14.8,X\n", "utf-8")
    prov["settings"]["occurrences"]["path"] = str(other)


REPRODUCE_CASES = [
    (_other_records, r"names input\(s\) it holds no hash for: \S*other_records\.csv"),
    (lambda prov: prov.pop("input_hashes"), r"records no input hashes.* will not be reproduced"),
    (lambda prov: prov.update(input_hashes={}), r"records no input hashes"),
]


@pytest.mark.slow  # its fixture runs the whole small demo once
@pytest.mark.parametrize("edit, pattern", REPRODUCE_CASES,
                         ids=["other record file", "hashes deleted", "hashes emptied"])
def test_reproduce_refuses_an_edited_run_json(warm, tmp_path, edit, pattern):
    out = tmp_path / "again"
    result = invoke("reproduce", _edited_run_json(warm, tmp_path, edit), "--out", out)
    assert_refused(result, out, pattern)


@pytest.mark.slow  # its fixture runs the whole small demo once
def test_reproduce_refuses_a_truncated_run_json(warm, tmp_path):
    text = (warm.parent / "first" / "run.json").read_text(encoding="utf-8")
    (tmp_path / "run.json").write_text(text[: len(text) // 2], encoding="utf-8")
    out = tmp_path / "again"
    result = invoke("reproduce", tmp_path / "run.json", "--out", out)
    assert_refused(result, out, r"run\.json is not a readable run\.json")


# ------------------------------------------------------------------ results that are not errors
@pytest.mark.slow
def test_zero_candidate_sites_is_a_result(warm, tmp_path):
    scen = tmp_path / "scen"
    shutil.copytree(warm, scen)
    add_settings(scen, "[isolation]\nmin_patch_km2 = 1e9")  # no patch is that large
    out = tmp_path / "out"
    result = invoke("run", scen / "project.toml", "--out", out)
    assert result.exit_code == 0, result.output
    assert "No candidate sites were found" in result.output
    assert "Warning: No candidate sites: no suitable patch" in result.output
    import pandas as pd

    assert len(pd.read_csv(out / "candidates.csv")) == 0
    assert len(pd.read_csv(out / "overlap.csv")) > 0  # the overlap results are kept
    for name in ("report.html", "sites.gpx", "field_sheets.pdf", "candidates.gpkg",
                 "run.json"):
        assert (out / name).exists(), name
    assert "No candidate sites were found" in (out / "report.html").read_text("utf-8")


# ------------------------------------------------------------------ debrief
def _field_file(path: Path, taxon: str, outcome: str = "found") -> Path:
    path.write_text("site_id,date,taxon,outcome,effort_hours\n"
                    f"S01,2026-10-02,{taxon},{outcome},3\n"
                    "S02,2026-10-03,Nebrivex tarvelli,not-found,2\n", encoding="utf-8")
    return path


def _run_copy(warm, tmp_path) -> Path:
    run_dir = tmp_path / "run"
    shutil.copytree(warm.parent / "first", run_dir)
    return run_dir


def _truncated_run_json(run_dir):
    text = (run_dir / "run.json").read_text(encoding="utf-8")
    (run_dir / "run.json").write_text(text[: len(text) // 3], encoding="utf-8")


def _no_candidates(run_dir):
    (run_dir / "candidates.gpkg").unlink()


def _garbled_evaluation(run_dir):
    (run_dir / "evaluation.csv").write_bytes(b"\x00\xff not a table\n")


def _stem_out_of_the_folder(run_dir):
    prov = json.loads((run_dir / "run.json").read_text(encoding="utf-8"))
    name = next(iter(prov["taxa"]))
    prov["taxa"][name] = "../../elsewhere/" + prov["taxa"][name]
    (run_dir / "run.json").write_text(json.dumps(prov), encoding="utf-8")


_FIELD_HEADER = b"site_id,date,taxon,outcome,effort_hours,longitude,latitude\n"

DEBRIEF_CASES = [
    (_truncated_run_json, None, r"run\.json is not a readable run\.json"),
    (_no_candidates, None, r"candidates\.gpkg is missing from the run folder"),
    (None, b"\x89PNG\r\n\x1a\n\xff\xfe\x00garbage", r"not a readable CSV file of field results"),
    (None, "Nebrivex tarveli", r"line 2: taxon 'Nebrivex tarveli' is not a taxon of the run "
                               r".*Did you mean 'Nebrivex tarvelli'\?.*set its outcome to "
                               r"new-lineage"),
    # decimal commas in a comma-separated field file: unquoted they split the cells
    (None, _FIELD_HEADER + b"S01,2026-10-02,Nebrivex tarvelli,found,3,85,0725,-14,6075\n",
     r"(?s)field\.csv: 1 problem.*line 2: 9 cells but the header has 7 columns: in a "
     r"comma-separated file a decimal comma.*Save the file with semicolons"),
    # quoted, a comma that could group thousands is not guessed at
    (None, _FIELD_HEADER + b'S01,2026-10-02,Nebrivex tarvelli,found,"1,500",85.07,-14.61\n',
     r"line 2: effort_hours '1,500' could be 1\.500 or 1500: write it with a decimal point"),
    # a site typed wrong would drop the visit from the hit rate without a word
    (None, b"site_id,date,taxon,outcome,effort_hours\nS1,2026-10-02,Nebrivex tarvelli,found,3\n",
     r"field\.csv line 2: site_id 'S1' is not a site of the run \(S01, .*\)\. Did you mean "
     r"'S01'\? Correct it, or give the longitude and latitude of the visit"),
    (_garbled_evaluation, None, r"evaluation\.csv cannot be read \(UnicodeDecodeError.*the "
                                r"run folder is damaged: run again"),
    (_stem_out_of_the_folder, None, r"run\.json: taxa maps 'Nebrivex \w+' to '\.\./\.\./"
                                    r"elsewhere/.*not a file name of a run folder"),
]


@pytest.mark.slow  # its fixture runs the whole small demo once
@pytest.mark.parametrize("damage, field, pattern", DEBRIEF_CASES,
                         ids=["truncated run.json", "no candidates.gpkg", "binary field file",
                              "unknown field taxon", "unquoted decimal commas",
                              "ambiguous thousands", "unknown site", "garbled evaluation.csv",
                              "taxon file outside the run folder"])
def test_debrief_refuses_damaged_input(warm, tmp_path, damage, field, pattern):
    run_dir = _run_copy(warm, tmp_path)
    if damage is not None:
        damage(run_dir)
    fpath = tmp_path / "field.csv"
    if isinstance(field, bytes):
        fpath.write_bytes(field)
    else:
        _field_file(fpath, field or "Nebrivex tarvelli")
    out = tmp_path / "debrief"
    result = invoke("debrief", fpath, "--run", run_dir, "--out", out)
    assert_refused(result, out, pattern)


@pytest.mark.slow  # its fixture runs the whole small demo once
def test_debrief_with_taxa_named_1_and_na_and_a_new_lineage(warm, tmp_path):
    run_dir = _run_copy(warm, tmp_path)
    renames = {"Nebrivex tarvelli": "NA", "Nebrivex quennomae": "1"}
    prov = json.loads((run_dir / "run.json").read_text(encoding="utf-8"))
    prov["taxa"] = {renames.get(k, k): v for k, v in prov["taxa"].items()}
    (run_dir / "run.json").write_text(json.dumps(prov), encoding="utf-8")
    ev = (run_dir / "evaluation.csv").read_text(encoding="utf-8")
    for old, new in renames.items():
        ev = ev.replace(old, new)
    (run_dir / "evaluation.csv").write_text(ev, encoding="utf-8")
    fpath = _field_file(tmp_path / "field.csv", "1")
    fpath.write_text(fpath.read_text("utf-8").replace("Nebrivex tarvelli", "NA"), "utf-8")
    with fpath.open("a", encoding="utf-8") as f:
        f.write("S01,2026-10-04,Nebrivex sp. Quenmor,new-lineage,4\n")
    out = tmp_path / "debrief"
    result = invoke("debrief", fpath, "--run", run_dir, "--out", out)
    assert result.exit_code == 0, result.output
    outcomes = (out / "site_outcomes.csv").read_text(encoding="utf-8")
    assert "S01" in outcomes and (out / "records_updated.csv").exists()


@pytest.mark.slow
def test_debrief_keeps_a_decimal_comma_record_file_in_its_own_dialect(warm, tmp_path):
    # a record file from a spreadsheet where the comma is the decimal mark: semicolons
    # between the columns, "84,82912" coordinates, and headers in other letter case
    scen = tmp_path / "scen"
    shutil.copytree(warm, scen)  # its cache: the records are the same places
    rows = read_rows(scen)
    rows[0] = ["Taxon", "Longitude", "Latitude", rows[0][3]]
    write_rows(scen, [rows[0]] + [[r[0], r[1].replace(".", ","), r[2].replace(".", ","),
                                   "=" + r[3]] for r in rows[1:]], delimiter=";")
    original = (scen / "occurrences.csv").read_text(encoding="utf-8").splitlines()
    run_dir = tmp_path / "run"
    assert invoke("run", scen / "project.toml", "--out", run_dir).exit_code == 0
    field = tmp_path / "field.csv"  # the field team's file, written the same way
    field.write_text("site_id;date;taxon;outcome;effort_hours;longitude;latitude\n"
                     "S01;2026-10-02;Nebrivex tarvelli;found;3,5;85,0725;-14,6075\n"
                     'S02;2026-10-03;Nebrivex tarvelli;not-found;"2,25";;\n', encoding="utf-8")
    out = tmp_path / "debrief"
    result = invoke("debrief", field, "--run", run_dir, "--out", out)
    assert result.exit_code == 0, result.output
    updated = (out / "records_updated.csv").read_text(encoding="utf-8").splitlines()
    assert updated[0] == original[0] + ";source;note"
    # every original row as it was (the catalogue cells neutralised with a leading ')
    assert [ln.rsplit(";", 2)[0].replace(";'=", ";=") for ln in updated[1:len(original)]] \
        == original[1:]
    assert updated[len(original)] == ("Nebrivex tarvelli;85,0725;-14,6075;;"
                                      "field survey 2026-10-02 (found);")
    assert len(updated) == len(original) + 1
    # the next run reads it as the first run read the original
    from screener.records import read_records

    back = read_records(out / "records_updated.csv")
    assert back.delimiter == ";" and back.decimal_comma
    assert back.a[-1] == "85,0725" and back.extra["catalogue"][0].startswith("=MVNC")
    sites = (out / "site_outcomes.csv").read_text(encoding="utf-8")
    assert re.search(r"^S02,2,.*,True,False,2\.25$", sites, re.M), sites


# ------------------------------------------------------------------ names that break files
_LONG = "$\\x$ " + "n" * 300  # parsed as maths by a figure renderer; too long for a file


@pytest.mark.slow
def test_awkward_taxon_names_finish_the_run_with_a_file_each(scen):
    rows = read_rows(scen)
    names = {"Nebrivex quennomae": "Nebrivex a/b", "Nebrivex sorrakensis": "Nebrivex a b"}
    out_rows, k = [rows[0]], 0
    for r in rows[1:]:
        name = names.get(r[0], r[0])
        if r[0] == "Nebrivex tarvelli":  # split in two: a case-only twin of "a b"
            name, k = ("NEBRIVEX A B" if k % 2 else _LONG), k + 1
        out_rows.append([name] + r[1:])
    write_rows(scen, out_rows)
    out = scen.parent / "out"
    result = invoke("run", scen / "project.toml", "--out", out)
    assert result.exit_code == 0, result.output
    taxa = json.loads((out / "run.json").read_text(encoding="utf-8"))["taxa"]
    assert set(taxa) == {"Nebrivex a/b", "Nebrivex a b", "NEBRIVEX A B", _LONG}
    stems = list(taxa.values())
    assert len({s.casefold() for s in stems}) == 4  # distinct even ignoring case
    for stem in stems:
        assert (out / "suitability" / f"{stem}.tif").exists()
        assert len(f"{stem}.most_dissimilar.tif") < 100
    import geopandas as gpd

    sites = gpd.read_file(out / "candidates.gpkg", layer="sites")
    cols = [c for c in sites.columns if c.startswith("margin_")]
    assert len(cols) == 4 and len({c.casefold() for c in cols}) == 4


def _control_character(s):
    rows = read_rows(s)
    rows[3][0] = "Nebrivex\x1b[2Jquennomae"
    write_rows(s, rows)


def test_control_characters_in_a_taxon_name_are_refused(scen):
    _control_character(scen)
    out = scen.parent / "out"
    result = invoke("run", scen / "project.toml", "--out", out)
    assert_refused(result, out, r"line 4: the taxon name 'Nebrivex\\x1b\[2Jquennomae' holds the "
                   r"control character '\\x1b'")
    assert "\x1b" not in result.output  # printed escaped, never sent to the terminal



@pytest.mark.parametrize("mark", ["\u202e", "\u2067", "\u200b"])
def test_invisible_reordering_or_zero_width_marks_in_a_taxon_name_are_refused(scen, mark):
    # A right-to-left override displays "quennomae" backwards in a terminal, a file
    # manager and the report, and a zero-width space makes two different names look
    # alike (Unicode Technical Report #36, bidi and invisible-character spoofing)
    rows = read_rows(scen)
    rows[3][0] = f"Nebrivex {mark}quennomae"
    write_rows(scen, rows)
    out = scen.parent / "out"
    result = invoke("run", scen / "project.toml", "--out", out)
    assert_refused(result, out, rf"line 4: the taxon name .* invisible character "
                   rf"U\+{ord(mark):04X}")
    assert mark not in result.output  # named by its code point, never sent raw

# ------------------------------------------------------------------ the cache runs no code
class _Payload:
    """Unpickling this runs code: it writes ``path``."""

    def __init__(self, path):
        self.path = str(path)

    def __reduce__(self):
        return (exec, (f"open({self.path!r}, 'w').write('code ran')",))


@pytest.mark.slow
def test_a_poisoned_cache_entry_never_runs(warm, tmp_path):
    import pickle

    scen = tmp_path / "scen"
    shutil.copytree(warm, scen)
    cache = scen / ".screener-cache"
    sentinel = tmp_path / "code-ran.txt"
    payload = pickle.dumps(_Payload(sentinel))
    pickle.loads(payload)  # the payload is live: loading it would run its code
    assert sentinel.exists()
    sentinel.unlink()
    entries = sorted(cache.glob("taxon/*.npz"))
    assert len(entries) == 3
    # a pickle planted under one entry's own name and beside it under the old name
    entries[0].write_bytes(payload)
    entries[0].with_suffix(".pickle").write_bytes(payload)
    # a well-formed entry whose manifest names a class outside the screener
    (overlap,) = cache.glob("overlap/*.npz")
    manifest = {"format": 1, "stage": "overlap", "key": overlap.stem,
                "value": {"__dataclass__": "subprocess:Popen", "fields": {"args": "true"}}}
    np.savez(overlap, __manifest__=np.frombuffer(json.dumps(manifest).encode(), np.uint8))
    out = tmp_path / "out"
    result = invoke("run", scen / "project.toml", "--out", out)
    assert result.exit_code == 0, result.output
    assert not sentinel.exists()
    assert result.output.count("Warning: Ignored the cache") == 3, result.output
    prov = json.loads((out / "run.json").read_text(encoding="utf-8"))
    assert sorted(prov["cache"]["misses"]) == ["overlap", "taxon"]
    assert sum("pickled entries are never loaded" in w for w in prov["warnings"]) == 1
    assert sum("unreadable or was changed" in w for w in prov["warnings"]) == 2
    # the recomputed stages replaced the bad entries with readable ones
    result = invoke("run", scen / "project.toml", "--out", tmp_path / "again")
    prov = json.loads((tmp_path / "again" / "run.json").read_text(encoding="utf-8"))
    assert prov["cache"]["hits"] == ["taxon"] * 3 + ["overlap"]


def test_cache_round_trip_keeps_types_and_refuses_other_objects():
    from screener.cache import CacheFormatError, decode, encode
    from screener.results import Threshold

    value = {"t": Threshold("mtp", np.float64(0.25), 3.5, 0.0), ("a", 1): [np.arange(3)],
             "nan": float("nan"), "frame": __import__("pandas").DataFrame(
                 {"taxon": ["=cmd", None], "D": [0.5, np.nan]})}
    arrays = {}
    back = decode(json.loads(json.dumps(encode(value, arrays))), arrays)
    assert back["t"] == value["t"] and isinstance(back["t"].value, np.float64)
    assert back[("a", 1)][0].dtype == np.arange(3).dtype and np.isnan(back["nan"])
    assert back["frame"].equals(value["frame"])
    with pytest.raises(CacheFormatError):
        encode({"f": open}, {})
    with pytest.raises(CacheFormatError, match="not an allowed estimator"):
        decode({"__estimator__": "os:system", "state": {"__dict__": []}}, {})


# ------------------------------------------------------------------ Ctrl-C and resume
@pytest.mark.slow
def test_interrupt_then_resume_from_the_cache(scen, monkeypatch):
    calls = []
    real_model, real_compare = screener.pipeline.model_taxon, screener.pipeline.compare_taxa

    def model_interrupted_at_second(intake, taxon, **kw):
        calls.append(taxon)
        if len(calls) == 2:
            raise KeyboardInterrupt
        return real_model(intake, taxon, **kw)

    def compare_interrupted(*a, **k):
        raise KeyboardInterrupt

    out = scen.parent / "out"
    project = scen / "project.toml"
    # 1. Ctrl-C while fitting the second taxon
    monkeypatch.setattr(screener.pipeline, "model_taxon", model_interrupted_at_second)
    result = invoke("run", project, "--out", out)
    assert_refused(result, out, r"Interrupted\. Nothing was written .* resumes", code=130)
    assert len(calls) == 2
    # 2. Ctrl-C during the overlap tests: the first taxon comes from the cache
    calls.clear()
    monkeypatch.setattr(screener.pipeline, "model_taxon",
                        lambda intake, taxon, **kw: calls.append(taxon) or real_model(
                            intake, taxon, **kw))
    monkeypatch.setattr(screener.pipeline, "compare_taxa", compare_interrupted)
    result = invoke("run", project, "--out", out)
    assert_refused(result, out, r"Interrupted", code=130)
    assert calls == ["Nebrivex sorrakensis", "Nebrivex quennomae"]
    # 3. rerun: no model is refitted; overlap computed once
    calls.clear()
    monkeypatch.setattr(screener.pipeline, "compare_taxa", real_compare)
    result = invoke("run", project, "--out", out)
    assert result.exit_code == 0, result.output
    assert calls == []
    prov = json.loads((out / "run.json").read_text(encoding="utf-8"))
    assert prov["cache"]["hits"] == ["taxon"] * 3
    assert prov["cache"]["misses"] == ["overlap"]
    assert leftovers(out) == ["out"]


@pytest.mark.slow
def test_interrupt_without_cache_says_a_rerun_starts_over(scen, monkeypatch):
    def interrupted(*a, **k):
        raise KeyboardInterrupt

    monkeypatch.setattr(screener.pipeline, "model_taxon", interrupted)
    out = scen.parent / "out"
    result = invoke("run", scen / "project.toml", "--out", out, "--no-cache")
    assert_refused(result, out, r"--no-cache: a rerun starts from the beginning", code=130)
    assert not (scen / ".screener-cache").exists()
