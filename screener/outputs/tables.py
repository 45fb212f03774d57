"""CSV tables written the same way every time (byte-identical on rerun)."""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np

from screener.columns import CANDIDATES, EVALUATION, OVERLAP, contract

__all__ = ["write_csv", "neutralise_cell", "neutralise_frame", "EVALUATION_COLUMNS",
           "OVERLAP_COLUMNS", "CANDIDATE_COLUMNS"]

#: first characters that make a spreadsheet read a cell as a formula
FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")
# a number with a decimal point or a decimal comma (as written where the comma is the
# decimal mark): no formula can hide in it
_PLAIN_NUMBER = re.compile(r"[-+]?(\d+[.,]?\d*|[.,]\d+)([eE][-+]?\d+)?")


def neutralise_cell(value):
    """A text cell that a spreadsheet would run as a formula, prefixed with ``'``.

    Text starting with ``=``, ``+``, ``-``, ``@``, a tab or a carriage return gets a
    leading single quote (the usual guidance against CSV formula injection); plain
    numbers such as ``-14.5`` or ``-14,5`` and every non-text value are returned
    unchanged.
    """
    if isinstance(value, str) and value.startswith(FORMULA_STARTS) and not \
            _PLAIN_NUMBER.fullmatch(value):
        return "'" + value
    return value


def neutralise_frame(df):
    """A copy of a DataFrame with every text cell, column name and index label
    passed through :func:`neutralise_cell`."""
    import pandas as pd

    out = pd.DataFrame(df).copy()
    for c in out.columns:
        col = out[c]
        if col.dtype == object or pd.api.types.is_string_dtype(col.dtype):
            out[c] = col.map(neutralise_cell)
    out.columns = [neutralise_cell(c) for c in out.columns]
    out.index = out.index.map(neutralise_cell)
    return out

#: Leading columns of evaluation.csv (output contract, from the column registry
#: :data:`screener.columns.EVALUATION`); more follow.
EVALUATION_COLUMNS = contract(EVALUATION)
#: Columns of overlap.csv (output contract, :data:`screener.columns.OVERLAP`): the same
#: header whether or not the run has pairs.
OVERLAP_COLUMNS = contract(OVERLAP)
#: Leading columns of candidates.csv (output contract, :data:`screener.columns.CANDIDATES`).
CANDIDATE_COLUMNS = contract(CANDIDATES)


def write_csv(path, frame, leading=()) -> Path:
    """Write a DataFrame as CSV with the ``leading`` columns first.

    Floats are written with 10 significant digits; missing values as empty cells
    (never a made-up number); infinite values as ``inf``.  Text that a spreadsheet
    would run as a formula is prefixed with ``'`` (:func:`neutralise_cell`).
    """
    import pandas as pd

    df = pd.DataFrame(frame).copy()
    if "geometry" in df.columns:
        df = df.drop(columns="geometry")
    for c in leading:
        if c not in df.columns:
            df[c] = np.nan
    cols = list(leading) + [c for c in df.columns if c not in leading]
    df = neutralise_frame(df[cols])
    path = Path(path)
    df.to_csv(path, index=False, float_format="%.10g", lineterminator="\n")
    return path
