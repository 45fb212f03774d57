"""CSV tables written the same way every time (byte-identical on rerun)."""

from __future__ import annotations

from pathlib import Path

import numpy as np

__all__ = ["write_csv", "EVALUATION_COLUMNS", "OVERLAP_COLUMNS", "CANDIDATE_COLUMNS"]

#: Leading columns of evaluation.csv (output contract); more follow.
EVALUATION_COLUMNS = ["taxon", "algorithm", "n_records", "auc", "threshold_mtp", "omission_mtp"]
#: Leading columns of overlap.csv (output contract).
OVERLAP_COLUMNS = [
    "taxon_a", "taxon_b", "space", "D", "I", "equivalency_p", "similarity_p_ab",
    "similarity_p_ba",
]
#: Leading columns of candidates.csv (output contract).
CANDIDATE_COLUMNS = [
    "rank", "site_id", "kind", "longitude", "latitude", "x", "y", "area_km2",
    "mean_suitability", "nearest_taxon", "cost_distance", "gap_km", "score",
]


def write_csv(path, frame, leading=()) -> Path:
    """Write a DataFrame as CSV with the ``leading`` columns first.

    Floats are written with 10 significant digits; missing values as empty cells
    (never a made-up number); infinite values as ``inf``.
    """
    import pandas as pd

    df = pd.DataFrame(frame).copy()
    if "geometry" in df.columns:
        df = df.drop(columns="geometry")
    for c in leading:
        if c not in df.columns:
            df[c] = np.nan
    cols = list(leading) + [c for c in df.columns if c not in leading]
    df = df[cols]
    path = Path(path)
    df.to_csv(path, index=False, float_format="%.10g", lineterminator="\n")
    return path
