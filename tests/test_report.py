"""The HTML report: self-contained, escaped, complete; renders in headless Chromium."""

import html
from html.parser import HTMLParser

import numpy as np
import pytest
from _synthetic_run import TAXA, make_run
from matplotlib import image as mimage

from screener.outputs.cautions import CAUTIONS, cautions_markdown, cautions_short
from screener.outputs.privacy import FULL_PRECISION_MARKER, generalised_result
from screener.outputs.report import render_report


class _Collect(HTMLParser):
    def __init__(self):
        super().__init__()
        self.tags, self.links, self.rows, self.text = [], [], [], []
        self._row = None

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        for k, v in attrs:
            if k in ("src", "href"):
                self.links.append((tag, k, v))
        if tag == "tr":
            self._row = []

    def handle_endtag(self, tag):
        if tag == "tr" and self._row is not None:
            self.rows.append(self._row)
            self._row = None

    def handle_data(self, data):
        self.text.append(data)
        if self._row is not None and data.strip():
            self._row.append(data.strip())


@pytest.fixture(scope="module")
def run():
    return make_run()


@pytest.fixture(scope="module")
def report(run):
    return render_report(run)


def test_report_parses_and_holds_the_tables(report, run):
    p = _Collect()
    p.feed(report)
    p.close()
    # No external assets and no script: only inline images and in-page anchors.
    assert "script" not in p.tags
    for tag, attr, value in p.links:
        assert (
            value.startswith("data:image/png;base64,")
            if attr == "src"
            else value.startswith("#")
        ), (tag, attr, value)
    assert sum(1 for t in p.tags if t == "img") >= len(run.taxa) + 2  # maps, plan, paths
    site_rows = [
        r
        for r in p.rows
        if r and r[0].isdigit() and len(r) > 5 and r[1] in set(run.sites.site_id)
    ]
    # the plan and its score components, both in rank order
    assert [r[1] for r in site_rows] == list(run.sites.site_id) * 2
    text = " ".join(p.text)
    for d in run.dropped:
        assert any(r[:1] == [str(d.line)] and d.reason in r for r in p.rows)
    for reading in run.overlap_readings:
        assert reading in text
    assert FULL_PRECISION_MARKER in text
    for heading, _ in CAUTIONS:
        assert heading in text
    # column names may break after their underscores (<wbr>) but read as written
    assert "score_isolation" in report.replace("<wbr>", "") and "Provenance" in text


def test_plan_and_warnings_give_novel_and_clamped_shares(report, run):
    p = _Collect()
    p.feed(report.replace("<wbr>", ""))
    text = " ".join(" ".join(p.text).split())
    plan = [r for r in p.rows if r and r[0].isdigit() and len(r) > 10]
    header = next(r for r in p.rows if r[:2] == ["rank", "site"])
    i_novel, i_clamped = header.index("novel_share"), header.index("clamped_share")
    for row, site in zip(plan, run.sites.to_dict("records"), strict=False):
        assert float(row[i_novel]) == pytest.approx(site["novel_share"], abs=5e-4)
        assert float(row[i_clamped]) == pytest.approx(site["clamped_share"], abs=5e-4)
    for site in run.sites.to_dict("records"):
        assert f"clamped_share {100 * site['clamped_share']:.0f}%" in text


def test_report_reads_plan_first_and_provenance_last(report, run):
    p = _Collect()
    p.feed(report)
    text = " ".join(p.text)
    order = [text.index(h) for h in ("Where to go first", "The plan",
                                     "The evidence, taxon by taxon", "Cautions",
                                     "Raw provenance")]
    assert order == sorted(order)
    top = run.sites.iloc[0]
    assert f"Go first to site {top['site_id']}" in " ".join(text.split())
    # one evidence card per taxon, each with its three parts
    for part in ("How well the model is supported", "What limits it",
                 "What it implies for the sites"):
        assert text.count(part) == len(run.taxa)
    # no per-taxon block of response curves, AUC-drop importance or threshold rows
    for gone in ("Permutation importance", "drop in training AUC", "Response curves",
                 "<caption>Thresholds</caption>"):
        assert gone not in report


def test_report_title_holds_the_project_name(run):
    import dataclasses

    r = dataclasses.replace(
        run, settings={**run.settings, "project": {"name": "Ridge <frogs> 2027"}})
    out = render_report(r)
    assert "<title>Ridge &lt;frogs&gt; 2027: survey screening report</title>" in out
    assert "<h1>Ridge &lt;frogs&gt; 2027: survey screening report</h1>" in out


def test_report_escapes_user_text(report):
    # The taxon name holds "<b>" and the drop reason "<script>": both must be text.
    assert "<b>beta</b>" not in report and html.escape(TAXA[1]) in report
    assert "<script>" not in report and "&lt;script&gt;x&lt;/script&gt;" in report


def test_generalised_report_has_no_marker(run):
    out = render_report(generalised_result(run))
    assert FULL_PRECISION_MARKER not in out


def test_cautions_single_source():
    md = cautions_markdown()
    assert all(f"### {h}" in md and t in md for h, t in CAUTIONS)
    assert len(cautions_short()) == len(CAUTIONS)
    words = " ".join(t for _, t in CAUTIONS).lower()
    for needed in (
        "hypotheses",
        "evacuation",
        "permits",
        "consent",
        "chytrid",
        "sensitive",
        "local regulations",
    ):
        assert needed in words


@pytest.fixture(scope="session")
def chromium():
    from _browser import find_chromium

    exe = find_chromium()
    if exe is None:
        pytest.skip("chromium is not installed and could not be installed")
    return exe


@pytest.mark.slow
@pytest.mark.parametrize("width", [1400, 800])
def test_report_renders_in_headless_chromium(tmp_path, report, chromium, width):
    from _browser import probe, screenshot

    page = tmp_path / "report.html"
    page.write_text(report, encoding="utf-8")
    got = probe(chromium, page, tmp_path, width=width)
    # no horizontal page scroll in a 1400 px window nor in a narrow (tablet) one, no
    # errors, every figure loads
    assert got["scrollWidth"] <= got["innerWidth"], got
    assert got["errors"] == []
    assert got["images"] >= 4 and got["brokenImages"] == []
    if width >= 1400:
        # at full width no table needs a sideways scroll of its own either: the plan's
        # score and every overlap column are in view
        assert got["overflowing"] == [], got["overflowing"]
    pixels = mimage.imread(str(screenshot(chromium, page, tmp_path, width=width,
                                          height=2000)))
    assert pixels.shape[0] == 2000 and pixels.shape[1] == width
    assert float(np.var(pixels[..., :3])) > 1e-3  # not a blank page


def test_a_wide_table_is_caught_by_the_overflow_check(tmp_path, chromium):
    # the check itself can fail: a bare 40-column table overflows a 1400 px window
    from _browser import probe

    cells = "".join(f"<td>column-{i:02d}-value</td>" for i in range(40))
    page = tmp_path / "wide.html"
    page.write_text(f"<!DOCTYPE html><html><head></head><body><table><tr>{cells}"
                    "</tr></table></body></html>", encoding="utf-8")
    got = probe(chromium, page, tmp_path)
    assert got["scrollWidth"] > got["innerWidth"]
    # and inside a scrolling box, the box is named as overflowing
    page.write_text(f"<!DOCTYPE html><html><head></head><body><section id='s'>"
                    f"<div style='overflow-x:auto'><table><tr><th>first</th>{cells}"
                    "</tr></table></div></section></body></html>", encoding="utf-8")
    got = probe(chromium, page, tmp_path)
    assert got["scrollWidth"] <= got["innerWidth"] and got["overflowing"] == ["s: first"]


def test_overlap_summary_claims_what_the_readings_claim():
    # The summary once counted raw equivalency p <= 0.05 in environmental space while
    # the readings claim only what survives Holm's correction (Holm 1979, Scand. J.
    # Stat. 6:65): on the demo it said "1 differ" beside readings that claimed nothing.
    import dataclasses

    from screener.outputs.report import _overlap_summary

    run = make_run()  # one pair: equivalency p 0.02 (geographic), 0.04 (environmental)
    assert "of 1 pair(s) of taxa compared, 1 differ" in _overlap_summary(run)
    ov = run.overlap.copy()
    ov["equivalency_p_holm"] = [0.096, 0.099]  # raw p small, corrected p not
    run = dataclasses.replace(run, overlap=ov)
    text = _overlap_summary(run)
    assert "0 differ" in text and "Holm-corrected equivalency p below 0.05" in text
    ov["equivalency_p_holm"] = [0.2, 0.03]  # either space is enough
    assert "1 differ" in _overlap_summary(dataclasses.replace(run, overlap=ov))
    # alpha is the run's
    loose = dataclasses.replace(run, settings={"overlap": {"alpha": 0.1}})
    assert "1 differ" in _overlap_summary(loose) and "below 0.1 " in _overlap_summary(loose)
