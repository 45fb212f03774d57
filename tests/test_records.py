"""Record intake: every row is checked and every drop has a line number and reason."""

import numpy as np
import pytest
from affine import Affine
from hypothesis import given
from hypothesis import strategies as st

from screener.errors import RecordsError
from screener.grid import Grid
from screener.records import (
    parse_coordinate,
    parse_records_text,
    read_records,
    thin_by_distance,
    validate_records,
)


@pytest.fixture
def grid():
    # 0.01-degree grid over lon 10-10.4, lat -5 to -5.3, with one nodata cell
    mask = np.ones((30, 40), bool)
    mask[0, 0] = False
    return Grid("EPSG:4326", Affine(0.01, 0, 10.0, 0, -0.01, -5.0), (30, 40), mask)


def run(text, grid, **kw):
    return validate_records(parse_records_text(text, "rec.csv"), grid, **kw)


def test_good_rows_are_kept_with_cells(grid):
    text = "taxon,longitude,latitude\nA,10.055,-5.105\nA,10.155,-5.205\nA,10.255,-5.255\n"
    rs = run(text, grid)
    rec = rs.taxa["A"]
    assert rec.n == 3 and not rs.dropped
    assert rec.rows.tolist() == [10, 20, 25] and rec.cols.tolist() == [5, 15, 25]
    assert rec.lines.tolist() == [2, 3, 4]


@pytest.mark.parametrize(
    "row, reason",
    [
        ("A,abc,-5.1", "not a number"),
        ("A,,-5.1", "longitude is empty"),
        ("A,10.1,-95", "beyond +/-90"),
        ("A,-5.1,10.1", "outside the grid"),
        ("A,11.5,-5.1", "outside the grid"),
        ("A,10.005,-5.005", "nodata cell"),
        ("A,10.055,-5.105", "exact duplicate of line 2"),
        ("A,10.056,-5.106", "same grid cell as line 2"),
        (",10.2,-5.2", "taxon cell is empty"),
    ],
)
def test_each_rejection_is_reported_with_line_and_reason(grid, row, reason):
    text = (
        "taxon,longitude,latitude\nA,10.055,-5.105\n"
        + row
        + "\nA,10.155,-5.205\nA,10.255,-5.255\n"
    )
    rs = run(text, grid)
    assert len(rs.dropped) == 1
    d = rs.dropped[0]
    assert d.line == 3
    assert reason in d.reason


def test_swapped_coordinates_are_named(grid):
    text = "taxon,longitude,latitude\nA,-5.105,10.055\nA,10.1,-5.1\nA,10.2,-5.2\nA,10.3,-5.25\n"
    rs = run(text, grid)
    assert "swapped it would fall on the grid" in rs.dropped[0].reason
    # latitude 100 is impossible, but swapped the point is still far from this grid
    text = "taxon,longitude,latitude\nA,-5.1,100\nA,10.1,-5.1\nA,10.2,-5.2\nA,10.3,-5.25\n"
    rs = run(text, grid)
    assert rs.dropped[0].reason == "latitude 100 is beyond +/-90"


def test_swapped_latitude_beyond_90_is_named_when_it_lands_on_the_grid():
    # a grid at 100 E: a record written (latitude, longitude) has latitude 100.055
    g = Grid("EPSG:4326", Affine(0.01, 0, 100.0, 0, -0.01, -5.0), (30, 40),
             np.ones((30, 40), bool))
    text = ("taxon,longitude,latitude\nA,-5.105,100.055\nA,100.1,-5.1\nA,100.2,-5.2\n"
            "A,100.3,-5.25\n")
    rs = run(text, g)
    assert rs.dropped[0].reason == ("latitude 100.055 is beyond +/-90; with longitude and "
                                    "latitude swapped it would fall on the grid: the columns "
                                    "look swapped")


def test_too_few_records_stops_with_reasons(grid):
    text = "taxon,longitude,latitude\nA,10.1,-5.1\nA,10.2,-5.2\nA,99,-5.2\nB,10.1,-5.1\n"
    with pytest.raises(RecordsError, match=r"A: 2 kept.*B: 1 kept.*line 4"):
        run(text, grid)
    rs = run(text, grid, min_records=1)
    assert set(rs.taxa) == {"A", "B"}


def test_dms_and_decimal_comma(grid):
    text = (
        "taxon;longitude;latitude\nA;10,055;-5,105\nA;10°09'18\"E;5°12'18\"S\n"
        "A;10,255;-5,255\n"
    )
    rs = run(text, grid)
    assert rs.taxa["A"].n == 3
    assert rs.taxa["A"].lon[1] == pytest.approx(10 + 9 / 60 + 18 / 3600)


def test_xy_columns_in_grid_crs(grid):
    rs = run("taxon,x,y\nA,10.055,-5.105\nA,10.155,-5.205\nA,10.255,-5.255\n", grid)
    assert rs.taxa["A"].cols.tolist() == [5, 15, 25]


@pytest.mark.parametrize(
    "text, match",
    [
        ("", "empty"),
        ("taxon,longitude,latitude\n", "no records"),
        ("taxa,longitude,latitude\nA,1,2\n", "did you mean 'taxon'"),
        ("taxon,longitud,latitude\nA,1,2\n", "did you mean 'longitude'"),
    ],
)
def test_file_level_problems(text, match):
    with pytest.raises(RecordsError, match=match):
        parse_records_text(text, "rec.csv")


def test_non_utf8_bytes_name_the_line(tmp_path):
    p = tmp_path / "r.csv"
    p.write_bytes(b"taxon,longitude,latitude\nA,10.1,-5.1\nB\xe9,10.2,-5.2\n")
    with pytest.raises(RecordsError, match=r"not valid UTF-8 .*line 3.*encoding"):
        read_records(p)
    raw = read_records(p, encoding="latin-1")
    assert raw.taxon[1] == "Bé"


def test_missing_file(tmp_path):
    with pytest.raises(RecordsError, match="does not exist"):
        read_records(tmp_path / "nope.csv")


@pytest.mark.parametrize(
    "text, value",
    [
        ("-8.25", -8.25),
        ("8°15'S", -8.25),
        ("8 15 36 S", -8.26),
        ("W 70° 30'", -70.5),
        ("115:30:00 E", 115.5),
    ],
)
def test_parse_coordinate(text, value):
    v, _ = parse_coordinate(text)
    assert v == pytest.approx(value)


def test_thinning_keeps_no_close_pair():
    # Greedy thinning (Aiello-Lammens et al. 2015): result has no pair closer than d.
    from screener.grid import geodesic_distance_km

    rng = np.random.default_rng(3)
    lon = 10 + rng.uniform(0, 0.3, 60)
    lat = -5 - rng.uniform(0, 0.3, 60)
    kept = thin_by_distance(lon, lat, 5.0, random_state=0)
    d = geodesic_distance_km(lon[kept, None], lat[kept, None], lon[None, kept], lat[None, kept])
    d[np.eye(kept.size, dtype=bool)] = np.inf
    assert d.min() >= 5.0
    assert kept.size >= 3


def _brute_force_close(lon, lat, min_km):
    # pyproj's Geod on every pair: the reference for the spatial-index search
    from pyproj import Geod

    n = lon.size
    a, b = np.triu_indices(n, 1)
    _, _, d = Geod(ellps="WGS84").inv(lon[a], lat[a], lon[b], lat[b])
    close = d / 1000.0 < min_km
    return set(zip(a[close].tolist(), b[close].tolist()))


@pytest.mark.parametrize("seed, min_km", [(0, 5.0), (1, 20.0), (2, 1.0)])
def test_close_pairs_equal_every_pair_measured_by_pyproj(seed, min_km):
    from screener.records import close_pairs

    rng = np.random.default_rng(seed)
    # high latitudes and the antimeridian, where a planar search would go wrong
    lon = np.r_[rng.uniform(179.5, 180, 80), rng.uniform(-180, -179.5, 80),
                rng.uniform(10, 11, 80)]
    lat = np.r_[rng.uniform(69, 70, 160), rng.uniform(-1, 0, 80)]
    i, j = close_pairs(lon, lat, min_km)
    assert set(zip(i.tolist(), j.tolist())) == _brute_force_close(lon, lat, min_km)


def _whole_set_greedy(close, n, rng):
    # the greedy removal over the whole set at once, as published: independent of
    # the module's grouping and heap
    alive = np.ones(n, bool)
    order = rng.permutation(n)
    while True:
        deg = (close & alive[:, None] & alive[None, :]).sum(axis=1) * alive
        if deg.max() == 0:
            return alive
        top = np.flatnonzero(deg == deg.max())
        alive[order[np.isin(order, top)][0]] = False


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
def test_thinning_is_valid_maximal_and_no_smaller_than_whole_set_greedy(seed):
    rng = np.random.default_rng(seed)
    lon = np.r_[10 + rng.uniform(0, 0.2, 40), 12 + rng.uniform(0, 0.5, 40)]
    lat = np.r_[-5 - rng.uniform(0, 0.2, 40), -5 - rng.uniform(0, 0.5, 40)]
    pairs = _brute_force_close(lon, lat, 4.0)
    n = lon.size
    close = np.zeros((n, n), bool)
    for a, b in pairs:
        close[a, b] = close[b, a] = True
    kept = thin_by_distance(lon, lat, 4.0, random_state=seed)
    k = np.zeros(n, bool)
    k[kept] = True
    assert not (close & k[:, None] & k[None, :]).any()  # no close pair kept
    assert close[~k][:, k].any(axis=1).all()  # every removed record had a kept neighbour
    best = max(_whole_set_greedy(close, n, np.random.default_rng(s)).sum() for s in range(5))
    assert kept.size >= best


@pytest.mark.parametrize("west, given", [(200.0, -160.0), (200.0, 200.0), (-160.0, 200.0)])
def test_longitudes_are_read_on_either_side_of_the_antimeridian(west, given):
    # A grid east of the antimeridian may be written with longitudes 0..360 or -180..180;
    # records in the other convention name the same places (200 E = 160 W).
    mask = np.ones((30, 40), bool)
    g = Grid("EPSG:4326", Affine(0.01, 0, west, 0, -0.01, -5.0), (30, 40), mask)
    text = "taxon,longitude,latitude\n" + "".join(
        f"A,{given + dx:.3f},{-5.105 - dy:.3f}\n" for dx, dy in [(0.055, 0), (0.155, 0.1),
                                                                 (0.255, 0.15)]
    )
    rs = run(text, g)
    assert not rs.dropped
    assert rs.taxa["A"].cols.tolist() == [5, 15, 25]


@pytest.mark.parametrize("row, reason", [("A,200.1,-5.1", "outside the grid"),
                                         ("A,360.5,-5.1", "beyond the range -180 to 360"),
                                         ("A,180,-90", "outside the grid"),
                                         ("A,-180,-90", "outside the grid")])
def test_far_longitudes_get_no_swap_hint(grid, row, reason):
    # valid WGS84 positions far from the grid are not a column mix-up
    text = ("taxon,longitude,latitude\nA,10.055,-5.105\n" + row
            + "\nA,10.155,-5.205\nA,10.255,-5.255\n")
    rs = run(text, grid)
    assert len(rs.dropped) == 1 and reason in rs.dropped[0].reason
    assert "swapped" not in rs.dropped[0].reason


def test_unquoted_decimal_commas_in_a_comma_file_are_dropped_not_misread(grid):
    # "10,055" unquoted: the row gains cells and the columns would read 10 and 055
    text = ("taxon,longitude,latitude,note\nA,10.055,-5.105,x\nA,10,155,-5,205,y\n"
            "A,10.255,-5.255,z\nA,10.155,-5.155,extra,cells\nA,10.3,-5.25,\n")
    rs = run(text, grid)
    assert [d.line for d in rs.dropped] == [3]
    assert "more cells than the header (6 cells, the header 4)" in rs.dropped[0].reason
    assert "split in two" in rs.dropped[0].reason
    assert rs.taxa["A"].n == 4  # a stray extra cell beside intact coordinates is kept


@given(st.text())
def test_a_neutralised_cell_reads_back_as_written(text):
    # what the CSV writers protect against formulas, the record reader reads back
    from screener.outputs.tables import neutralise_cell
    from screener.records import unneutralise_cell

    if text.startswith("'"):
        return  # a cell that began with a quote is not told apart from a protected one
    assert unneutralise_cell(neutralise_cell(text)) == text


def test_a_debriefs_protected_cells_read_back():
    raw = parse_records_text("taxon,longitude,latitude,note\n'=A,'-5°06'18\"E,-5.1,'@x\n",
                             "rec.csv")
    assert raw.taxon == ["=A"] and raw.a == ["-5°06'18\"E"] and raw.extra["note"] == ["@x"]
