"""The HTML report: self-contained, escaped, complete; renders in headless Chromium."""

import html
import subprocess
from html.parser import HTMLParser

import numpy as np
import pytest
from _synthetic_run import TAXA, ensure_debian_tool, make_run
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
    assert sum(1 for t in p.tags if t == "img") >= 5
    site_rows = [
        r
        for r in p.rows
        if r and r[0].isdigit() and len(r) > 5 and r[1] in set(run.sites.site_id)
    ]
    assert [r[1] for r in site_rows] == list(run.sites.site_id)
    text = " ".join(p.text)
    for d in run.dropped:
        assert any(r[:1] == [str(d.line)] and d.reason in r for r in p.rows)
    for reading in run.overlap_readings:
        assert reading in text
    assert FULL_PRECISION_MARKER in text
    for heading, _ in CAUTIONS:
        assert heading in text
    assert "score_isolation" in text and "Provenance" in text


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
    exe = ensure_debian_tool("chromium", "chromium")
    if exe is None:
        pytest.skip("chromium is not installed and could not be installed")
    return exe


@pytest.mark.slow
def test_report_renders_in_headless_chromium(tmp_path, report, chromium):
    page = tmp_path / "report.html"
    page.write_text(report, encoding="utf-8")
    shot = tmp_path / "shot.png"
    cmd = [
        chromium,
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-quic",
        "--no-first-run",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        f"--user-data-dir={tmp_path / 'profile'}",
        f"--screenshot={shot}",
        "--window-size=1280,2000",
        page.as_uri(),
    ]
    subprocess.run(cmd, capture_output=True, timeout=120, check=False)
    assert shot.exists()
    pixels = mimage.imread(str(shot))
    assert pixels.shape[0] == 2000 and pixels.shape[1] == 1280
    assert float(np.var(pixels[..., :3])) > 1e-3  # not a blank page
