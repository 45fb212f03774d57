"""Fuzzing record intake: whatever bytes a user feeds it, the only exceptions are
:class:`screener.errors.InputError` subclasses (a message, never a crash)."""

from __future__ import annotations

import tempfile
from pathlib import Path

import numpy as np
import pytest
from affine import Affine
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from screener.errors import InputError
from screener.grid import Grid
from screener.records import parse_records_text, read_records, validate_records

FUZZ = settings(max_examples=150, derandomize=True, deadline=None,
                suppress_health_check=[HealthCheck.too_slow])

GRID = Grid("EPSG:4326", Affine(0.1, 0, 10.0, 0, -0.1, 0.0), (20, 30))
PROJECTED = Grid("EPSG:32633", Affine(1000, 0, 500000, 0, -1000, 5000000), (20, 30))

HEADERS = ["taxon", "Taxon ", "longitude", "latitude", "x", "y", "lat", "long", "", "note"]
CELLS = st.one_of(
    st.text(max_size=12),
    st.floats(allow_nan=True, allow_infinity=True).map(repr),
    st.floats(-200, 200).map(lambda v: repr(v).replace(".", ",")),
    st.sampled_from(["8°15'36\"S", "N 12 30", "12:30:00E", "1e400", "-", "nan", "--5",
                     "S 8° 15.5'", "8 15 0 S W", "0x10", "١٢", "12,5,6", '"', "\x00"]),
)


def csv_like():
    """Texts shaped like record files: a header drawn from likely names, odd cells."""
    row = st.lists(CELLS, min_size=0, max_size=5)
    return st.tuples(
        st.lists(st.sampled_from(HEADERS), min_size=0, max_size=5),
        st.lists(row, max_size=8),
        st.sampled_from([",", ";", "\t", "|"]),
        st.sampled_from(["\n", "\r\n", "\r"]),
    ).map(lambda t: t[3].join(t[2].join(r) for r in [t[0], *t[1]]))


def _intake(text: str, grid: Grid) -> None:
    try:
        raw = parse_records_text(text, "fuzz.csv")
        validate_records(raw, grid, min_records=1)
    except InputError:
        pass  # a message for the user: the expected way to refuse


@pytest.mark.slow
@FUZZ
@given(csv_like())
def test_csv_like_text_only_raises_input_errors(text):
    _intake(text, GRID)


@FUZZ
@given(csv_like())
def test_csv_like_text_on_a_projected_grid(text):
    _intake(text, PROJECTED)


@FUZZ
@given(st.text(max_size=300))
def test_any_text_only_raises_input_errors(text):
    _intake(text, GRID)


_TMP = tempfile.TemporaryDirectory(prefix="screener-fuzz-")


@FUZZ
@given(st.binary(max_size=300), st.sampled_from([None, "latin-1", "utf-16", "no-such-codec"]))
def test_any_bytes_only_raise_input_errors(data, encoding):
    path = Path(_TMP.name) / "records.csv"
    path.write_bytes(b"taxon,longitude,latitude\n" + data)
    try:
        raw = read_records(path, encoding=encoding)
        validate_records(raw, GRID, min_records=1)
    except InputError:
        pass


def test_fuzz_reaches_kept_records():
    # guard against a fuzz test that only ever exercises the refusals
    text = "taxon;longitude;latitude\r\nA;10,55;-0,55\r\nA;8°15'36\"S;1\r\n"
    rs = validate_records(parse_records_text(text, "x.csv"), GRID, min_records=1)
    assert rs.taxa["A"].n == 1 and len(rs.dropped) == 1
    assert np.isclose(rs.taxa["A"].lon[0], 10.55)
