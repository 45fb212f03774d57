"""Property-based checks of record intake, overlap indices and cost distance.

Each property follows from a definition outside the project: the sexagesimal
degree (1 degree = 60 minutes = 3600 seconds), CSV round trips through Python's
``csv`` module, Schoener's D and the Hellinger-based I (Warren, Glor & Turelli 2008,
Evolution 62:2868) and Dijkstra's shortest-path optimality (Dijkstra 1959).
"""

from __future__ import annotations

import csv
import io
import math
import re

import numpy as np
import pytest
from affine import Affine
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from screener.costdistance import cost_distance, least_cost_path
from screener.errors import RecordsError
from screener.grid import Grid
from screener.overlap import hellinger_i, schoener_d
from screener.records import parse_coordinate, parse_records_text, validate_records

# derandomize: the same examples on every machine, so CI is stable
FAST = settings(max_examples=60, derandomize=True, deadline=None,
                suppress_health_check=[HealthCheck.too_slow])

# ------------------------------------------------------------------ coordinates
degrees = st.floats(-180, 180, allow_nan=False, allow_infinity=False)


@FAST
@given(degrees)
def test_decimal_degrees_round_trip(v):
    value, how = parse_coordinate(repr(v))
    assert how == "decimal" and value == v


@FAST
@given(degrees)
def test_decimal_comma_reads_like_a_point(v):
    text = repr(v).replace(".", ",")
    value, _ = parse_coordinate(text, decimal_comma=True)
    assert value == v


@FAST
@given(st.integers(0, 179), st.integers(0, 59), st.floats(0, 59.999, allow_nan=False),
       st.sampled_from("NSEW"), st.sampled_from(["{d}°{m}'{s}\"{h}", "{d} {m} {s} {h}",
                                                 "{h} {d}° {m}' {s}\"", "{d}:{m}:{s}{h}"]))
def test_degrees_minutes_seconds(d, m, s, hemi, fmt):
    # sexagesimal degrees: value = d + m / 60 + s / 3600, negative south and west
    text = fmt.format(d=d, m=m, s=f"{s:.3f}", h=hemi)
    value, how = parse_coordinate(text)
    expected = (d + m / 60 + float(f"{s:.3f}") / 3600) * (-1 if hemi in "SW" else 1)
    assert how == "dms"
    assert value == pytest.approx(expected, abs=1e-9)


@FAST
@given(st.text(max_size=30))
def test_parse_coordinate_never_raises(text):
    value, how = parse_coordinate(text)
    assert isinstance(how, str) and how
    assert value is None or math.isfinite(value)


# ------------------------------------------------------------------ record files
taxon_names = st.text(alphabet="ABCdefg xyz-", min_size=1, max_size=12).map(str.strip).filter(
    bool)
rows_st = st.lists(st.tuples(taxon_names, degrees, st.floats(-90, 90)), min_size=1,
                   max_size=25)


@FAST
@given(rows_st, st.sampled_from([",", ";", "\t"]))
def test_records_text_round_trip(rows, delim):
    buf = io.StringIO()
    w = csv.writer(buf, delimiter=delim, lineterminator="\n")
    w.writerow(["taxon", "longitude", "latitude"])
    w.writerows([(t, repr(a), repr(b)) for t, a, b in rows])
    raw = parse_records_text(buf.getvalue(), "r.csv")
    assert raw.coords == "lonlat"
    assert raw.taxon == [t for t, _, _ in rows]
    assert [float(x) for x in raw.a] == [a for _, a, _ in rows]
    assert [float(x) for x in raw.b] == [b for _, _, b in rows]
    assert raw.lines == list(range(2, len(rows) + 2))


GRID = Grid("EPSG:4326", Affine(0.1, 0, 10.0, 0, -0.1, 0.0), (20, 30),
            np.fromfunction(lambda r, c: (r + c) % 7 != 0, (20, 30)))
on_or_near = st.tuples(st.sampled_from(["A", "B", ""]), st.floats(9.5, 13.5),
                       st.floats(-2.5, 0.5))


@FAST
@given(st.lists(on_or_near, min_size=1, max_size=40))
def test_every_row_is_kept_or_dropped_with_a_reason(rows):
    text = "taxon,longitude,latitude\n" + "".join(f"{t},{a!r},{b!r}\n" for t, a, b in rows)
    raw = parse_records_text(text, "r.csv")
    try:
        rs = validate_records(raw, GRID, min_records=1)
    except RecordsError as exc:
        rs = exc.args[1] if len(exc.args) > 1 else None
        if rs is None:  # no taxon named at all
            assert all(not t for t, _, _ in rows)
            return
    kept = sum(t.n for t in rs.taxa.values())
    assert kept + len(rs.dropped) == len(rows)
    assert all(d.reason for d in rs.dropped)
    lines = sorted([int(x) for t in rs.taxa.values() for x in t.lines]
                   + [d.line for d in rs.dropped])
    assert lines == list(range(2, len(rows) + 2))
    for t in rs.taxa.values():
        assert GRID.mask[t.rows, t.cols].all()
        cells = list(zip(t.rows.tolist(), t.cols.tolist(), strict=True))
        assert len(cells) == len(set(cells))  # one record per cell


# ------------------------------------------------------------------ overlap
surfaces = arrays(np.float64, (5, 6), elements=st.floats(0, 1, allow_nan=False))


def _nonzero(a):
    return a.sum() > 1e-6


@FAST
@given(surfaces.filter(_nonzero), surfaces.filter(_nonzero))
def test_overlap_bounds_symmetry_and_formula(p, q):
    d, i = schoener_d(p, q), hellinger_i(p, q)
    assert 0.0 <= d <= 1.0 and 0.0 <= i <= 1.0
    assert d == pytest.approx(schoener_d(q, p), abs=1e-12)
    assert i == pytest.approx(hellinger_i(q, p), abs=1e-12)
    # Warren et al. 2008: D = 1 - 0.5 sum|p - q|, I = 1 - 0.5 sum (sqrt p - sqrt q)^2
    pn, qn = p / p.sum(), q / q.sum()
    assert d == pytest.approx(1 - 0.5 * np.abs(pn - qn).sum(), abs=1e-9)
    assert i == pytest.approx(1 - 0.5 * ((np.sqrt(pn) - np.sqrt(qn)) ** 2).sum(), abs=1e-9)
    # I = sum sqrt(p q) >= sum min(p, q) = D, since sqrt(ab) >= min(a, b)
    assert i >= d - 1e-12
    assert schoener_d(p, p) == pytest.approx(1.0) and hellinger_i(p, p) == pytest.approx(1.0)
    assert schoener_d(3.0 * p, q) == pytest.approx(d, abs=1e-12)  # scale-free


# ------------------------------------------------------------------ cost distance
resistances = arrays(np.float64, (6, 7), elements=st.floats(0.01, 10, allow_nan=False))
cells = st.tuples(st.integers(0, 5), st.integers(0, 6))


@pytest.mark.parametrize("crs, transform", [
    ("EPSG:32633", Affine(1000, 0, 500000, 0, -1000, 5000000)),  # 1 km cells
    ("EPSG:4326", Affine(0.01, 0, 10.0, 0, -0.01, 60.0)),  # steps shrink with latitude
])
@settings(max_examples=25, derandomize=True, deadline=None)
@given(r=resistances, sources=st.lists(cells, min_size=1, max_size=3, unique=True),
       end=cells)
def test_cost_distance_properties(crs, transform, r, sources, end):
    grid = Grid(crs, transform, r.shape)
    surface = cost_distance(grid, r, np.array(sources))
    cost = surface.cost
    assert (cost >= 0).all() and np.isfinite(cost).all()
    assert all(cost[s] == 0 for s in sources)
    path = least_cost_path(surface, end)
    assert tuple(path[0]) in set(sources) and tuple(path[-1]) == end
    along = cost[path[:, 0], path[:, 1]]
    assert (np.diff(along) >= 0).all()  # never decreasing along the path
    assert along[-1] == pytest.approx(cost[end])
    # Bellman optimality: no neighbour offers a cheaper way in than the result
    ew, ns, dg = grid.ew_step_km, grid.ns_step_km, grid.diag_step_km
    for (i, j) in np.ndindex(r.shape):
        for di, dj in [(0, 1), (1, 0), (1, 1), (1, -1)]:
            a, b = (i, j), (i + di, j + dj)
            if not (0 <= b[0] < r.shape[0] and 0 <= b[1] < r.shape[1]):
                continue
            length = ew[i] if di == 0 else (ns[i] if dj == 0 else dg[i])
            step = length * (r[a] + r[b]) / 2
            assert cost[b] <= cost[a] + step + 1e-9 * (1 + cost[a])
            assert cost[a] <= cost[b] + step + 1e-9 * (1 + cost[b])


# ------------------------------------------------------------------ taxon file names
@FAST
@given(st.lists(st.text(min_size=1, max_size=400), min_size=2, max_size=8, unique=True))
def test_distinct_taxon_names_give_distinct_file_names(names):
    # distinct names -> distinct stems, even where a file system ignores case (the
    # case-folded stems differ too); stems are short and made of portable characters
    from screener.outputs.names import taxon_file_stem

    stems = [taxon_file_stem(n) for n in names]
    assert len({s.casefold() for s in stems}) == len(names)
    for s in stems:
        assert re.fullmatch(r"[A-Za-z0-9_-]{1,70}", s), s
    assert stems == [taxon_file_stem(n) for n in names]  # stable


def test_file_names_that_used_to_collide():
    from screener.outputs.names import taxon_file_stem

    group = ["Nebrivex a/b", "Nebrivex a b", "Nebrivex A b", "Небривекс", "Небривекс б",
             "Небривекс в"]
    assert len({taxon_file_stem(n).casefold() for n in group}) == len(group)
