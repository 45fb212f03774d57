"""Column registries: every column a stage writes is registered, docs are generated."""

from __future__ import annotations

from pathlib import Path

import pytest

from screener.columns import (
    CANDIDATES,
    EVALUATION,
    OVERLAP,
    columns_markdown,
    contract,
    empty_frame,
    find_column,
    header,
)
from screener.evaluation import FamilyEvaluation
from screener.outputs import tables
from screener.overlap import OVERLAP_COLUMNS

ROOT = Path(__file__).resolve().parents[1]
TABLES = {"candidates": CANDIDATES, "evaluation": EVALUATION, "overlap": OVERLAP}


@pytest.mark.parametrize("name", list(TABLES))
def test_registry_is_well_formed(name):
    cols = TABLES[name]
    names = [c.name for c in cols]
    assert len(names) == len(set(names)), "a column is registered twice"
    for c in cols:
        assert c.dtype in ("int", "float", "str", "bool")
        assert c.unit in ("", "km", "km2", "degrees", "m", "hours", "share")
        assert c.meaning.endswith(".") and len(c.meaning) > 3
    # the contract columns come first
    flags = [c.contract for c in cols]
    assert flags == sorted(flags, reverse=True) and flags[0]


def test_overlap_registry_is_the_overlap_stage_list():
    assert contract(OVERLAP) == list(OVERLAP_COLUMNS)
    assert tables.OVERLAP_COLUMNS == list(OVERLAP_COLUMNS)


def test_every_evaluation_field_is_registered():
    row = FamilyEvaluation("ellipsoid", 5, "jackknife").as_row()
    for name in ["taxon", *row]:
        assert find_column(EVALUATION, name) is not None, name
    for t in ("mtp", "p10", "relaxed", "maxsss"):
        for stem in ("threshold", "area_km2", "training_omission"):
            assert find_column(EVALUATION, f"{stem}_{t}") is not None


def test_per_taxon_columns_match_any_taxon_name():
    assert find_column(CANDIDATES, "cost_to_Nebrivex sp. (north)").name == "cost_to_<taxon>"
    assert find_column(CANDIDATES, "margin_A").unit == ""
    assert find_column(CANDIDATES, "cost_distance").name == "cost_distance"
    assert find_column(CANDIDATES, "made_up") is None


def test_header_puts_the_contract_first_and_keeps_the_rest_in_order():
    present = ["score", "zeta", "rank", "alpha"]
    got = header(CANDIDATES, present)
    assert got[: len(contract(CANDIDATES))] == contract(CANDIDATES)
    assert got[len(contract(CANDIDATES)):] == ["zeta", "alpha"]


def test_empty_table_has_the_contract_columns_and_types():
    df = empty_frame(CANDIDATES)
    assert list(df.columns) == contract(CANDIDATES) and len(df) == 0
    assert str(df["rank"].dtype) == "int64" and str(df["gap_km"].dtype) == "float64"


@pytest.mark.parametrize("name", list(TABLES))
def test_user_guide_column_tables_are_current(name):
    guide = (ROOT / "docs" / "user-guide.md").read_text(encoding="utf-8")
    table = guide.split(f"<!-- columns:{name}:start -->", 1)[1].split(
        f"<!-- columns:{name}:end -->", 1)[0]
    assert table.strip() == columns_markdown(TABLES[name]).strip(), (
        "docs/user-guide.md is out of date: run python tests/test_docs.py --write"
    )
