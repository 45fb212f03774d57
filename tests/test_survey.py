"""Scoring field results: binomial test vs scipy, AUC vs scikit-learn."""

import numpy as np
import pandas as pd
import pytest
from _synthetic_run import TAXA, make_run
from scipy import stats
from sklearn.metrics import roc_auc_score

from screener.errors import InputError
from screener.survey import (
    read_field_results,
    render_survey_report,
    score_survey,
    updated_records,
)


@pytest.fixture(scope="module")
def run():
    return make_run()


def _clade(run):
    return np.fmax(*[t.suitability.astype(float) for t in run.taxa.values()])


def _write(tmp_path, text):
    p = tmp_path / "field.csv"
    p.write_text(text, encoding="utf-8")
    return p


@pytest.fixture
def field_csv(tmp_path, run):
    s = run.sites
    # site 1 found by id; site 2 visited by coordinates inside it, not found;
    # site 3 new lineage by id; one find off any site by coordinates.
    lon, lat = run.grid.lonlat(35, 3)
    text = (
        "site_id,longitude,latitude,date,taxon,outcome,effort_hours\n"
        f"{s.site_id[0]},,,2025-03-01,{TAXA[0]},found,6\n"
        f",{s.longitude[1]},{s.latitude[1]},2025-03-02,{TAXA[1]},not-found,4.5\n"
        f"{s.site_id[2]},,,2025-03-03,Alpha sp. nov.,new-lineage,8\n"
        f",{float(lon)},{float(lat)},2025-03-04,{TAXA[0]},Found,2\n"
    )
    return text


def test_read_field_results(tmp_path, field_csv):
    fr = read_field_results(_write(tmp_path, field_csv))
    assert list(fr["line"]) == [2, 3, 4, 5]
    assert list(fr["outcome"]) == ["found", "not-found", "new-lineage", "found"]
    assert fr["date"][0].isoformat() == "2025-03-01"
    assert np.isnan(fr["longitude"][0]) and fr["effort_hours"][1] == 4.5


def test_read_field_results_reports_every_bad_line(tmp_path):
    text = (
        "site_id,date,taxon,outcome,effort_hours\n"
        "s1,2025-03-01,A,found,1\n"
        "s2,03/01/2025,A,found,1\n"
        "s3,2025-03-01,,seen,-2\n"
    )
    with pytest.raises(InputError) as exc:
        read_field_results(_write(tmp_path, text))
    msg = str(exc.value)
    assert "line 3: date '03/01/2025'" in msg
    assert "line 4: taxon is empty" in msg and "line 4: outcome 'seen'" in msg
    assert "line 4: effort_hours -2.0 is negative" in msg


def test_read_field_results_missing_column(tmp_path):
    with pytest.raises(InputError, match="site_id or longitude"):
        read_field_results(_write(tmp_path, "date,taxon,outcome\n2025-01-01,A,found\n"))


def test_score_survey_against_scipy_and_sklearn(tmp_path, run, field_csv):
    fr = read_field_results(_write(tmp_path, field_csv))
    s = _clade(run)
    thr = 0.35
    score = score_survey(fr, run.sites, run.grid, s, threshold=thr, n_background=10**6)
    valid = run.grid.mask & np.isfinite(s)
    areas = np.asarray(run.grid.cell_area_km2)
    share = areas[valid & (s >= thr)].sum() / areas[valid].sum()
    assert score.area_share == pytest.approx(share)
    assert (score.n_visited, score.n_hits) == (3, 2)
    # One-sided binomial test (Anderson et al. 2002) via scipy.stats.binomtest, and
    # the same tail as a sum of the binomial distribution: P(X >= 2), X ~ Bin(3, p).
    assert score.binomial_p == pytest.approx(
        stats.binomtest(2, 3, share, alternative="greater").pvalue, rel=1e-12
    )
    assert score.binomial_p == pytest.approx(stats.binom.sf(1, 3, share), rel=1e-9)
    # AUC of the new records against every valid cell, vs sklearn.metrics.roc_auc_score.
    # finds given by site only are not test records: only the find at (35, 3)
    pres = np.r_[s[35, 3]]
    bg = s[valid]
    y = np.r_[np.ones(pres.size), np.zeros(bg.size)]
    assert score.n_new_records == 1 and score.n_background == bg.size
    assert score.auc == pytest.approx(roc_auc_score(y, np.r_[pres, bg]), rel=1e-12)
    assert score.n_new_lineage == 1
    md = render_survey_report(score)
    assert f"p = {score.binomial_p:.4g}" in md and "not evidence of absence" in md


def test_score_survey_needs_threshold_or_share(run):
    fr = pd.DataFrame(
        columns=[
            "line",
            "site_id",
            "longitude",
            "latitude",
            "date",
            "taxon",
            "outcome",
            "effort_hours",
        ]
    )
    with pytest.raises(InputError, match="threshold"):
        score_survey(fr, run.sites, run.grid, _clade(run))
    with pytest.raises(InputError, match="area_share"):
        score_survey(fr, run.sites, run.grid, _clade(run), area_share=1.5)


def test_updated_records_appends_find_localities_without_editing_input(
    tmp_path, run, field_csv
):
    fr = read_field_results(_write(tmp_path, field_csv))
    orig = pd.DataFrame({"taxon": [TAXA[0]], "longitude": [36.1], "latitude": [-2.1]})
    keep = orig.copy()
    out = updated_records(orig, fr, modelled_taxa=TAXA, min_records=3)
    pd.testing.assert_frame_equal(orig, keep)
    # finds given by site only (lines 2 and 4) are not localities: not added
    assert len(out) == 2 and list(out["source"]) == ["input", "field survey 2025-03-04 (found)"]
    lon, lat = run.grid.lonlat(35, 3)
    assert out["longitude"][1] == pytest.approx(float(lon))
    assert list(out["note"]) == ["", ""]


def test_single_record_new_lineage_is_kept_with_a_note(tmp_path, run):
    lon, lat = run.grid.lonlat(20, 20)
    text = (
        "site_id,longitude,latitude,date,taxon,outcome,effort_hours\n"
        f",{float(lon)},{float(lat)},2025-03-04,Alpha sp. nov.,new-lineage,2\n"
    )
    fr = read_field_results(_write(tmp_path, text))
    orig = pd.DataFrame({"taxon": [TAXA[0]] * 3, "longitude": [36.1] * 3,
                         "latitude": [-2.1] * 3})
    out = updated_records(orig, fr, modelled_taxa=TAXA, min_records=3)
    assert out["taxon"].tolist()[-1] == "Alpha sp. nov."
    assert "left out of modelling" in out["note"].iloc[-1]
    assert (out["note"].iloc[:3] == "").all()


def test_auc_uses_find_localities_only(tmp_path, run):
    # the same find given by site only, and at its own coordinates: only the second
    # is a test record
    s = run.sites
    lon, lat = run.grid.lonlat(35, 3)
    text = (
        "site_id,longitude,latitude,date,taxon,outcome,effort_hours\n"
        f"{s.site_id[0]},,,2025-03-01,{TAXA[0]},found,6\n"
        f",{float(lon)},{float(lat)},2025-03-04,{TAXA[0]},found,2\n"
    )
    fr = read_field_results(_write(tmp_path, text))
    clade = _clade(run)
    score = score_survey(fr, s, run.grid, clade, threshold=0.35, n_background=10**6)
    assert score.n_new_records == 1
    assert score.finds_without_locality == [
        "line 2: a find given by site only (no coordinates)"
    ]
    valid = run.grid.mask & np.isfinite(clade)
    bg = clade[valid]
    y = np.r_[1.0, np.zeros(bg.size)]
    # sklearn.metrics.roc_auc_score as the reference
    assert score.auc == pytest.approx(roc_auc_score(y, np.r_[clade[35, 3], bg]), rel=1e-12)
