"""The docs say what the code does: quick start, cautions, settings table, layout."""

import re
from pathlib import Path

from screener.outputs.cautions import cautions
from screener.project import settings_table_markdown

ROOT = Path(__file__).resolve().parents[1]


def test_readme_quick_start_is_exactly_two_commands():
    text = (ROOT / "README.md").read_text()
    block = text.split("## Quick start", 1)[1].split("```bash", 1)[1].split("```", 1)[0]
    lines = [ln for ln in block.strip().splitlines() if ln.strip()]
    assert lines == [
        "python -m pip install . && screener demo --out demo-results",
        "python -m pip install '.[test]' && python -m pytest",
    ]
    ci = (ROOT / ".ci" / "run").read_text()
    assert "python -m pip install '.[test]' && python -m pytest" in ci


def test_readme_carries_every_caution():
    text = " ".join((ROOT / "README.md").read_text().split())
    for heading, body in cautions():
        assert heading in text
        assert " ".join(body.split()) in text


def test_user_guide_settings_table_is_current():
    guide = (ROOT / "docs" / "user-guide.md").read_text()
    table = guide.split("<!-- settings-table:start -->", 1)[1].split(
        "<!-- settings-table:end -->", 1)[0]
    assert table.strip() == settings_table_markdown().strip(), (
        "docs/user-guide.md is out of date: regenerate the table from "
        "screener.project.settings_table_markdown()"
    )


def test_top_level_layout():
    import shutil
    import subprocess

    import pytest

    if shutil.which("git") is None or not (ROOT / ".git").exists():
        pytest.skip("not a git checkout: the tracked layout cannot be read")
    files = subprocess.run(["git", "ls-files"], cwd=ROOT, capture_output=True, text=True,
                           check=True).stdout.split()
    tracked = {f.split("/", 1)[0] for f in files}
    allowed = {"README.md", "DEVELOPERS.md", "pyproject.toml", "screener", "tests",
               "demo_data", "docs", "LICENSE", ".ci", ".gitignore"}
    assert tracked <= allowed, tracked - allowed


def test_benchmarks_are_scripts_not_tests():
    bench = ROOT / "tests" / "benchmarks"
    names = [p.name for p in bench.glob("*.py")]
    assert names and all(re.fullmatch(r"bench_\w+\.py", n) for n in names), names
