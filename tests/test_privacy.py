"""Generalising sensitive coordinates (Chapman 2020, GBIF Secretariat)."""

import dataclasses
from decimal import ROUND_FLOOR, Decimal

import numpy as np
import pytest
from _synthetic_run import TAXA, make_run
from hypothesis import given
from hypothesis import strategies as st
from pyproj import Geod

from screener.outputs.privacy import (
    FULL_PRECISION_MARKER,
    generalise_coordinates,
    generalised_result,
    has_full_precision_sensitive,
    shareable_result,
)


def _decimal_centre(value: float, g: str) -> float:
    """Cell centre computed in exact decimal arithmetic (independent of the code)."""
    d, step = Decimal(repr(value)), Decimal(g)
    k = (d / step).to_integral_value(rounding=ROUND_FLOOR)
    return float(k * step + step / 2)


@pytest.mark.parametrize(
    "lon, lat",
    [(12.3456, -3.2111), (-0.01, 45.0), (12.3, 0.0), (-179.99, -89.99), (36.05, -1.25)],
)
def test_worked_examples_match_exact_decimal_cells(lon, lat):
    # Cells of 0.1 degree anchored at (0, 0) as the documented default (Chapman 2020).
    glon, glat = generalise_coordinates(lon, lat)
    assert float(glon) == pytest.approx(_decimal_centre(lon, "0.1"), abs=1e-12)
    assert float(glat) == pytest.approx(_decimal_centre(lat, "0.1"), abs=1e-12)


@given(st.floats(-179.999, 179.999), st.floats(-89.999, 89.999))
def test_displacement_is_at_most_half_a_cell_and_idempotent(lon, lat):
    glon, glat = generalise_coordinates(lon, lat, 0.1)
    assert abs(glon - lon) <= 0.05 + 1e-9 and abs(glat - lat) <= 0.05 + 1e-9
    # Largest displacement: half the cell diagonal, measured on WGS84 with pyproj.
    _, _, d = Geod(ellps="WGS84").inv(lon, lat, float(glon), float(glat))
    _, _, half_diag = Geod(ellps="WGS84").inv(0, 0, 0.05, 0.05)
    # Positions within 1e-9 of a cell width of an edge (0.1e-9 degrees here, at most
    # about 11 micrometres) are put on the edge, so that decimal edges such as 12.3
    # fall in the cell they name; allow that much beyond the half diagonal.
    assert d <= half_diag + 2 * 0.5e-9 * 0.1 * 111_320
    again = generalise_coordinates(glon, glat, 0.1)
    np.testing.assert_allclose(again, (glon, glat), atol=1e-12)


def test_poles_and_bad_input():
    _, lat = generalise_coordinates(0.0, 90.0)
    assert float(lat) == pytest.approx(89.95)
    with pytest.raises(ValueError, match="grid_deg"):
        generalise_coordinates(0, 0, grid_deg=0)
    with pytest.raises(ValueError, match="latitudes"):
        generalise_coordinates(0, 91)


def test_generalised_result_touches_only_sensitive_records():
    run = make_run()
    assert has_full_precision_sensitive(run)
    assert FULL_PRECISION_MARKER == "FULL PRECISION: do not share"
    before = run.taxa[TAXA[1]].records.lon.copy()
    out = generalised_result(run)
    np.testing.assert_array_equal(run.taxa[TAXA[1]].records.lon, before)  # untouched
    rec = out.taxa[TAXA[1]].records
    np.testing.assert_allclose(
        rec.lon, generalise_coordinates(before, run.taxa[TAXA[1]].records.lat)[0]
    )
    assert out.taxa[TAXA[0]].records is run.taxa[TAXA[0]].records  # not sensitive
    assert not has_full_precision_sensitive(out)
    assert out.provenance["generalised"]["grid_deg"] == 0.1
    assert "generalised" not in run.provenance


def test_generalised_result_sites():
    run = make_run()
    out = generalised_result(run, sites=True)
    assert out.paths is None
    glon, glat = generalise_coordinates(run.sites.longitude, run.sites.latitude)
    np.testing.assert_allclose(out.sites.longitude, glon)
    # Each polygon is now the generalisation cell: about 0.1 x 0.1 degree in area.
    lon_lat = out.sites.to_crs("EPSG:4326")
    for geom, lo, la in zip(lon_lat.geometry, glon, glat, strict=True):
        assert geom.contains(type(geom.centroid)(lo, la))
        assert geom.area == pytest.approx(0.01, rel=0.02)
    assert run.paths is not None and run.sites.geometry.iloc[0].area > 1e6


def test_shareable_result():
    run = make_run(sensitive=False)
    assert shareable_result(run) is run
    sens = make_run()
    out = shareable_result(sens)
    assert out is not sens and not has_full_precision_sensitive(out)


def test_generalised_sites_carry_no_exact_grid_cell():
    # The row/col of a site's best cell locate it as precisely as its coordinates, so a
    # shared table must give the cell of the generalised point instead.
    run = make_run()
    rows, cols, inside = run.grid.rowcol(run.sites.x.to_numpy(), run.sites.y.to_numpy())
    assert inside.all()
    sites = run.sites.copy()
    sites["row"], sites["col"] = rows, cols
    run = dataclasses.replace(run, sites=sites)
    out = generalised_result(run, sites=True)
    g_rows, g_cols, g_inside = run.grid.rowcol(out.sites.x.to_numpy(), out.sites.y.to_numpy())
    on = g_inside
    np.testing.assert_array_equal(out.sites["row"].to_numpy()[on], g_rows[on])
    np.testing.assert_array_equal(out.sites["col"].to_numpy()[on], g_cols[on])
    assert ((out.sites["row"] >= 0) & (out.sites["row"] < run.grid.n_rows)).all()
    assert ((out.sites["col"] >= 0) & (out.sites["col"] < run.grid.n_cols)).all()
    assert run.sites["row"].tolist() == rows.tolist()  # the input is left unchanged


def test_every_figure_draws_sensitive_records_only_generalised(tmp_path, monkeypatch):
    # A taxon named sensitive in the settings but whose records are not flagged (as
    # when they come from a stage cached by a run without the setting).
    import matplotlib.figure
    from _synthetic_run import figure_points

    from screener.outputs import maps, report, sheets

    run = dataclasses.replace(make_run(sensitive=False),
                              settings={"occurrences": {"sensitive": [TAXA[1]]}})
    shared = shareable_result(run)
    figures = []
    real_savefig = matplotlib.figure.Figure.savefig

    def spy(fig, *a, **k):  # every figure at the moment it is saved
        figures.append(figure_points(fig))
        return real_savefig(fig, *a, **k)

    monkeypatch.setattr(matplotlib.figure.Figure, "savefig", spy)
    report.render_report(shared)
    sheets.write_field_sheets(tmp_path / "sheets.pdf", shared, top_n=2)
    for name in TAXA:
        for make in (maps.plot_suitability, maps.plot_ranges):
            maps.figure_to_png_bytes(make(shared, name).figure)
    assert len(figures) > 5
    points = np.concatenate(figures)

    def drawn(rec):
        return [np.any(np.all(np.abs(points - xy) < 1e-6, axis=1)) for xy in zip(rec.x, rec.y)]

    full, general = run.taxa[TAXA[1]].records, shared.taxa[TAXA[1]].records
    assert not np.allclose(full.x, general.x)
    # a record in the cell that is also a site's best cell is drawn as that site
    site_xy = set(zip(run.sites.x, run.sites.y))
    is_site = [xy in site_xy for xy in zip(full.x, full.y)]
    assert sum(is_site) < full.n
    # the sensitive taxon: never at full precision
    assert not any(d and not s for d, s in zip(drawn(full), is_site, strict=True))
    assert all(drawn(general))  # but at its generalised points
    assert all(drawn(run.taxa[TAXA[0]].records))  # the other taxon as recorded


@pytest.mark.parametrize("cell", ["84 49 44 X", "84°49'44\"Q", "-14 47 09 S W", "84,82912"])
def test_a_coordinate_quoted_as_written_is_withheld(cell):
    # a value that could not be read is quoted in the reason: degrees-minutes-seconds
    # to the second locate a record to about 30 m
    from screener.outputs.privacy import withhold_coordinates
    from screener.records import parse_coordinate

    value, why = parse_coordinate(cell)
    assert value is None
    reason = f"longitude {why}; latitude {why}"
    assert cell in reason or repr(cell) in reason
    shared = withhold_coordinates(reason)
    assert shared.count("[withheld]") == 2 and not any(ch.isdigit() for ch in shared)


def test_niche_figure_withholds_a_sensitive_taxons_record_scores():
    # A record's principal-axis scores are its environment at full precision: with the
    # layers they point back to its cell, so a shareable report must not draw them.
    from _synthetic_run import figure_points

    from screener.outputs.overlap_figures import plot_niches
    from screener.overlap import OverlapTaxon, PairComparison, environmental_space

    rng = np.random.default_rng(4)
    bg_a, bg_b = rng.normal(0, 1, (300, 3)), rng.normal(0.5, 1, (300, 3))
    rec_a, rec_b = bg_a[:12], bg_b[:12]
    space = environmental_space(
        OverlapTaxon(TAXA[0], env_records=rec_a, env_background=bg_a),
        OverlapTaxon(TAXA[1], env_records=rec_b, env_background=bg_b),
    )
    cmp = PairComparison(taxon_a=TAXA[0], taxon_b=TAXA[1], geographic=None,
                         environmental=None, space=space, n_replicates=0,
                         hypothesis="conserved")
    run = dataclasses.replace(make_run(), comparisons=[cmp])  # TAXA[1] is sensitive
    shared = shareable_result(run)
    kept, hidden = shared.comparisons[0].space.a, shared.comparisons[0].space.b
    assert kept is space.a  # the taxon that is not sensitive, as it was
    assert hidden.scores_records.shape == (0, 2) and hidden.xy_records is None
    np.testing.assert_array_equal(hidden.occupancy, space.b.occupancy)  # niche kept
    assert len(space.b.scores_records) == 12  # the full result is left unchanged

    import matplotlib.pyplot as plt

    fig = plot_niches(shared.comparisons[0].space, names=TAXA[:2])
    plt.close(fig)
    points = figure_points(fig)

    def drawn(scores):
        return [bool(np.any(np.all(np.abs(points - s) < 1e-9, axis=1))) for s in scores]

    assert all(drawn(space.a.scores_records))
    assert not any(drawn(space.b.scores_records))
    legend = [t.get_text() for t in fig.legends[0].get_texts()] if fig.legends else [
        t.get_text() for t in fig.axes[0].get_legend().get_texts()]
    assert any("not drawn" in t and TAXA[1] in t for t in legend)
    assert any(t == f"{TAXA[0]} records (12)" for t in legend)
