"""Column registries of the output tables: name, dtype, unit and meaning of each column.

One list per table (:data:`EVALUATION`, :data:`OVERLAP`, :data:`CANDIDATES`) gives the
order of the CSV header, the field types of the GeoPackage layer, the column tables of the
user guide (:func:`columns_markdown`) and the README's contract table
(:func:`contract_markdown`).  A name with ``<taxon>`` stands for one column per taxon
(``cost_to_<taxon>``), one with ``<slice>`` for one per time slice.  Stages make the
tables; this module only says what their columns are, so both stages and writers may
import it.

Examples
--------
>>> [c.name for c in OVERLAP[:5]]
['taxon_a', 'taxon_b', 'space', 'D', 'I']
>>> header(OVERLAP, ["taxon_a", "extra"])[-2:]
['similarity_hypothesis', 'extra']
>>> find_column(CANDIDATES, "cost_to_Nebrivex tarvelli").unit
''
>>> find_column(CANDIDATES, "gap_km").unit
'km'
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import pandas as pd

__all__ = ["Column", "EVALUATION", "OVERLAP", "CANDIDATES", "contract", "header",
           "columns_markdown", "contract_markdown", "empty_frame", "find_column"]



@dataclass(frozen=True)
class Column:
    """One column of an output table.

    Attributes
    ----------
    name : str
        As in the header; ``<taxon>`` stands for one column per taxon, ``<slice>`` for
        one per time slice.
    dtype : str
        "int", "float", "str" or "bool" (an empty cell is a missing value).
    unit : str
        "km", "km2", "degrees", "m", "hours", "share" (0-1), "" for none.
    meaning : str
        One line for the docs.
    contract : bool
        Part of the output contract: always written, first, in registry order (the
        other columns follow in the order the stage made them).
    """

    name: str
    dtype: str
    unit: str
    meaning: str
    contract: bool = False

    def matches(self, name: str) -> bool:
        """True when ``name`` is this column (or one of the columns it stands for)."""
        if "<" not in self.name:
            return name == self.name
        pattern = re.sub(r"\\<\w+\\>|<\w+>", ".+", re.escape(self.name))
        return re.fullmatch(pattern, name) is not None


def _p(key: str, what: str) -> tuple:
    return (
        Column(key, "float", "", f"Monte Carlo p-value of the {what}.", True),
        Column(f"{key}_se", "float", "", f"Monte Carlo standard error of {key}.", True),
        Column(f"{key}_replicates", "int", "", f"Valid replicates behind {key}.", True),
        Column(f"{key}_holm", "float", "",
               f"{key} Holm-adjusted over every p-value of the run.", True),
    )


def _threshold(t: str, name: str) -> tuple:
    return (
        Column(f"threshold_{t}", "float", "", f"Suitability cut-off of the {name}."),
        Column(f"area_km2_{t}", "float", "km2", f"Geodesic area at or above the {name}."),
        Column(f"training_omission_{t}", "float", "share",
               f"Share of training records below the {name}."),
    )


def _contract(*columns) -> tuple:
    return tuple(Column(c.name, c.dtype, c.unit, c.meaning, True) for c in columns)


#: Columns of evaluation.csv: one row per taxon and family, plus the ensemble.
EVALUATION = (
    *_contract(
        Column("taxon", "str", "", "Taxon."),
        Column("algorithm", "str", "", "Model family, or `ensemble` for the weighted mean."),
        Column("n_records", "int", "", "Kept records of the taxon."),
        Column("auc", "float", "", "Test AUC (mean over folds or jackknife models)."),
        Column("threshold_mtp", "float", "", "Minimum training presence (MTP) cut-off."),
        Column("omission_mtp", "float", "share",
               "Omission of test records at the training MTP."),
    ),
    Column("method", "str", "",
           "How records were held out: `jackknife`, `quadrants`, `squares` or `random`."),
    Column("auc_train", "float", "", "AUC of the full model on its training records."),
    Column("auc_null_p", "float", "", "Null-model p-value of auc_train."),
    Column("omission_p10", "float", "share",
           "Omission of test records at the training 10th-percentile threshold."),
    Column("boyce", "float", "", "Continuous Boyce index on test records."),
    Column("tss", "float", "", "Maximum true skill statistic on test records."),
    Column("jackknife_successes", "int", "", "Left-out records predicted (jackknife)."),
    Column("jackknife_p", "float", "", "p-value of the jackknife test."),
    Column("n_folds", "int", "", "Folds that had test records."),
    Column("auc_squares", "float", "", "Test AUC with the checkerboard baseline partition."),
    Column("omission_mtp_squares", "float", "share",
           "Omission at the MTP with the checkerboard baseline partition."),
    Column("auc_random", "float", "", "Test AUC with random (non-spatial) folds."),
    Column("omission_mtp_random", "float", "share", "Omission at the MTP with random folds."),
    Column("area_km2_mtp", "float", "km2", "Geodesic area at or above the MTP."),
    Column("training_omission_mtp", "float", "share",
           "Share of training records below the MTP."),
    *_threshold("p10", "10th-percentile training presence"),
    *_threshold("relaxed", "relaxed threshold (MTP x (1 - relax))"),
    *_threshold("maxsss", "threshold of maximum sensitivity plus specificity"),
    Column("omission_mtp_train", "float", "share", "Training omission at the MTP."),
    Column("ensemble_weight", "float", "share", "Weight of the family in the ensemble."),
    Column("note", "str", "", "Why a metric is empty (e.g. Boyce and TSS under the jackknife)."),
)

#: Columns of overlap.csv: one row per pair of taxa and space.
OVERLAP = _contract(
    Column("taxon_a", "str", "", "First taxon of the pair (A)."),
    Column("taxon_b", "str", "", "Second taxon of the pair (B)."),
    Column("space", "str", "", "`geographic` (the maps) or `environmental` (PCA space)."),
    Column("D", "float", "", "Schoener's D between the two niches (0 none, 1 identical)."),
    Column("I", "float", "", "Similarity I from the Hellinger distance (0 to 1)."),
    Column("D_tested", "float", "", "D of the refitted maps the geographic tests use."),
    *_p("equivalency_p", "equivalency test"),
    *_p("similarity_p_ab", "similarity test of A against B's available environment"),
    *_p("similarity_p_ba", "similarity test of B against A's available environment"),
    Column("breadth_a", "float", "", "Standardised Levins breadth of A's niche."),
    Column("breadth_b", "float", "", "Standardised Levins breadth of B's niche."),
    Column("stability", "float", "share", "Share of B's niche inside A's (analogue cells)."),
    Column("expansion", "float", "share", "Share of B's niche outside A's (analogue cells)."),
    Column("unfilling", "float", "share", "Share of A's niche that B leaves empty."),
    Column("analogue_share_a", "float", "share",
           "Share of A's records in environment available to both."),
    Column("analogue_share_b", "float", "share",
           "Share of B's records in environment available to both."),
    Column("n_replicates", "int", "", "Replicates asked for per test."),
    Column("similarity_hypothesis", "str", "",
           "What the similarity tests ask: `conserved` or `diverged`."),
)

#: Columns of candidates.csv and the `sites` layer of candidates.gpkg, best site first.
CANDIDATES = (
    *_contract(
        Column("rank", "int", "", "Rank of the site (1 = survey first)."),
        Column("site_id", "str", "", "Site identifier by rank (S01 = rank 1)."),
        Column("kind", "str", "", "`isolated`, `near-range` or `within-range`."),
        Column("longitude", "float", "degrees", "Longitude of the most suitable cell (WGS84)."),
        Column("latitude", "float", "degrees", "Latitude of the most suitable cell (WGS84)."),
        Column("x", "float", "", "x of the most suitable cell in the grid CRS."),
        Column("y", "float", "", "y of the most suitable cell in the grid CRS."),
        Column("area_km2", "float", "km2", "Geodesic area of the site."),
        Column("mean_suitability", "float", "", "Area-weighted mean clade suitability."),
        Column("nearest_taxon", "str", "", "Taxon whose known range is cheapest to reach."),
        Column("cost_distance", "float", "",
               "Least accumulated cost to that range (km-weighted resistance)."),
        Column("gap_km", "float", "km",
               "Separating gap: the longest unsuitable crossing on the best route."),
        Column("score", "float", "", "Weighted score the rank is based on."),
    ),
    Column("site_key", "str", "", "Key from the location: the 0.01-degree cell of the site."),
    Column("threshold_set", "str", "", "Threshold set the site was found at."),
    Column("row", "int", "", "Grid row of the most suitable cell."),
    Column("col", "int", "", "Grid column of the most suitable cell."),
    Column("n_cells", "int", "", "Grid cells of the site."),
    Column("max_suitability", "float", "", "Highest clade suitability in the site."),
    Column("agreement", "float", "share", "Share of families calling the site suitable."),
    Column("novel_share", "float", "share", "Share of the site's cells with MESS < 0."),
    Column("clamped_share", "float", "share",
           "Share of the site's cells where a model's predictors were clamped to their "
           "calibration range."),
    Column("elevation_min", "float", "m", "Lowest elevation in the site."),
    Column("elevation_max", "float", "m", "Highest elevation in the site."),
    Column("cost_to_<taxon>", "float", "", "Least accumulated cost to the taxon's range."),
    Column("suitable_for", "str", "", "Taxa with a margin >= 0, best first."),
    Column("niche_fit", "float", "share",
           "How far into the best-fitting taxon's niche the site lies (0-1)."),
    Column("margin_<taxon>", "float", "",
           "Area-weighted mean suitability for the taxon minus its threshold."),
    Column("unsuitable_km", "float", "km", "Unsuitable ground on the best route."),
    Column("stepping_stones", "int", "", "Suitable patches the best route hops through."),
    Column("barrier_depth", "float", "", "Deepest unsuitability (1 - s) on the path."),
    Column("path_km", "float", "km", "Length of the least-cost path."),
    Column("nearest_record_km", "float", "km", "Geodesic distance to the nearest record."),
    Column("between_ranges", "bool", "", "The site lies on a corridor between two ranges."),
    Column("stability", "str", "",
           "`both`, `<set>-only` or `untested`: found at both threshold sets or one."),
    Column("relaxed_block", "int", "", "Patch of the broader threshold set holding the site."),
    Column("walk_hours", "float", "hours", "Walking time from the nearest start point."),
    Column("kind_<slice>", "str", "",
           "Kind of the site in that time slice (adds `joined`, `unsuitable`, `drowned`)."),
    Column("gap_km_<slice>", "float", "km",
           "Separating gap in that time slice (0 when joined, empty when unsuitable)."),
    Column("n_slices", "int", "", "Time slices, the present included."),
    Column("n_slices_isolated", "int", "", "Time slices in which the site was isolated."),
    Column("ever_connected", "bool", "",
           "Joined to or near a known range in any time slice."),
    Column("connected_in", "str", "", "Time slices in which the site was connected."),
    Column("connected_to", "str", "", "Taxa the site was connected to."),
    Column("stable_share", "float", "share",
           "Share of the site's area suitable in every time slice."),
    Column("refugium", "bool", "", "Some cell of the site is suitable in every time slice."),
    Column("climatic_stability", "float", "share",
           "Mean climatic stability of the clade over the site's cells."),
    Column("score_suitability", "float", "share", "Suitability component of the score."),
    Column("score_isolation", "float", "share", "Isolation component of the score."),
    Column("score_survey_gap", "float", "share", "Survey-gap component of the score."),
    Column("score_agreement", "float", "share", "Agreement component of the score."),
    Column("score_area", "float", "share", "Area component of the score."),
    Column("score_novelty", "float", "share", "Novelty component (1 - novel_share)."),
    Column("score_access", "float", "share", "Access component of the score."),
    Column("score_isolation_history", "float", "share",
           "Isolation-history component of the score (time slices)."),
    Column("rank_low", "int", "", "5th percentile of the rank over the weight draws."),
    Column("rank_high", "int", "", "95th percentile of the rank over the weight draws."),
    Column("rank_robustness", "float", "share",
           "Share of weight draws keeping the site in the top k."),
    Column("refit_suitable", "float", "share",
           "Share of bootstrap refits of the records in which the site stays suitable."),
    Column("refit_isolated", "float", "share",
           "Share of bootstrap refits in which the site stays isolated."),
    Column("refit_top_k", "float", "share",
           "Share of bootstrap refits in which the site stays in the top k."),
    Column("group_id", "int", "", "Group of sites close to each other."),
    Column("group_size", "int", "", "Sites in the group."),
)


def contract(columns) -> list:
    """Names of the contract columns, in order (the leading columns of the CSV)."""
    return [c.name for c in columns if c.contract]


def find_column(columns, name: str) -> Column | None:
    """The registry entry of ``name`` (None when it has none)."""
    return next((c for c in columns if c.matches(name)), None)


def header(columns, present) -> list:
    """Column order of a table: the contract columns in registry order (written empty
    when missing), then the other present columns in their present order."""
    lead = contract(columns)
    return lead + [n for n in present if n not in lead]


def empty_frame(columns):
    """An empty table with the contract columns and their dtypes (the schema of a
    table with no rows, e.g. the `sites` layer of a run that found no site)."""
    kinds = {"int": "int64", "float": "float64", "str": "object", "bool": "bool"}
    return pd.DataFrame({c.name: pd.Series(dtype=kinds[c.dtype])
                         for c in columns if c.contract})


def columns_markdown(columns) -> str:
    """The table's columns as a Markdown table for the docs."""
    lines = ["| column | type | unit | meaning |", "| --- | --- | --- | --- |"]
    for c in columns:
        name = f"**`{c.name}`**" if c.contract else f"`{c.name}`"
        lines.append(f"| {name} | {c.dtype} | {c.unit} | {c.meaning} |")
    return "\n".join(lines)


def contract_markdown(tables: dict) -> str:
    """The contract columns of each table as one short Markdown table (for the README).

    Parameters
    ----------
    tables : dict
        File name (``"candidates.csv"``) to its column registry, in the order to list.
    """
    lines = ["| file | contract columns, always written first, in this order |",
             "| --- | --- |"]
    for file, columns in tables.items():
        names = ", ".join(f"`{n}`" for n in contract(columns))
        lines.append(f"| `{file}` | {names} |")
    return "\n".join(lines)
