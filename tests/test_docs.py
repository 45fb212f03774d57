"""The docs say what the code does: quick start, cautions, settings table, layout."""

import re
from pathlib import Path

from screener.columns import (
    CANDIDATES,
    EVALUATION,
    OVERLAP,
    columns_markdown,
    contract_markdown,
)
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
        "docs/user-guide.md is out of date: run python tests/test_docs.py --write"
    )


#: The generated blocks of the docs: (file, marker name, generator).  Each block sits
#: between ``<!-- NAME:start -->`` and ``<!-- NAME:end -->``; ``python tests/test_docs.py
#: --write`` regenerates them all.
GENERATED = [
    ("README.md", "columns:contract", lambda: contract_markdown(
        {"candidates.csv": CANDIDATES, "evaluation.csv": EVALUATION,
         "overlap.csv": OVERLAP})),
    ("docs/user-guide.md", "settings-table", settings_table_markdown),
    ("docs/user-guide.md", "columns:candidates", lambda: columns_markdown(CANDIDATES)),
    ("docs/user-guide.md", "columns:evaluation", lambda: columns_markdown(EVALUATION)),
    ("docs/user-guide.md", "columns:overlap", lambda: columns_markdown(OVERLAP)),
]


def _block(text: str, name: str) -> str:
    """The text between the start and end markers ``name`` (an error if either is missing)."""
    start, end = f"<!-- {name}:start -->", f"<!-- {name}:end -->"
    assert start in text and end in text, f"markers {start} ... {end} are missing"
    return text.split(start, 1)[1].split(end, 1)[0]


def _with_block(text: str, name: str, body: str) -> str:
    """``text`` with the block ``name`` replaced by ``body``."""
    start, end = f"<!-- {name}:start -->", f"<!-- {name}:end -->"
    head, rest = text.split(start, 1)
    return f"{head}{start}\n{body.strip()}\n{end}{rest.split(end, 1)[1]}"


def test_readme_contract_columns_table_is_current():
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    file, name, make = GENERATED[0]
    assert _block(readme, name).strip() == make().strip(), (
        "README.md is out of date: run python tests/test_docs.py --write"
    )


def test_write_keeps_the_text_around_each_block():
    """What ``--write`` does to a file: only the block between its markers changes."""
    for file, name, make in GENERATED:
        text = (ROOT / file).read_text(encoding="utf-8")
        new = _with_block(text, name, make())
        assert _block(new, name).strip() == make().strip()
        start, end = f"<!-- {name}:start -->", f"<!-- {name}:end -->"
        assert new.split(start)[0] == text.split(start)[0]
        assert new.split(end)[1] == text.split(end)[1]


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
    # benchmark scripts, and helpers they share (a leading underscore)
    assert names and all(re.fullmatch(r"(bench|_)\w+\.py", n) for n in names), names
    assert any(n.startswith("bench_") for n in names)


METHOD_DOCS = ["intake", "models", "overlap", "isolation", "timeslices", "outputs"]


def test_terms_page_lists_every_user_facing_name():
    """docs/terms.md gives the origin of every command, option, setting and column."""
    import click

    from screener.cli import main
    from screener.evaluation import FamilyEvaluation
    from screener.models import PointProcessNiche
    from screener.outputs.tables import (
        CANDIDATE_COLUMNS,
        EVALUATION_COLUMNS,
        OVERLAP_COLUMNS,
    )
    from screener.project import SCHEMA

    text = (ROOT / "docs" / "terms.md").read_text()
    names = set()
    for section, keys in SCHEMA.items():
        names.add(f"[{section}]")
        names.update(keys)
    for param in main.params:
        names.update(o for o in param.opts if o.startswith("--"))
    for command_name, command in main.commands.items():
        names.add(command_name)
        for param in command.params:
            if isinstance(param, click.Option):
                names.update(o for o in param.opts if o.startswith("--"))
    names.update(EVALUATION_COLUMNS, OVERLAP_COLUMNS, CANDIDATE_COLUMNS)
    names.update(FamilyEvaluation("f", 1, "m").as_row())
    deprecated = PointProcessNiche.deprecated_params
    names.update(k for k in PointProcessNiche().get_params() if k not in deprecated)
    missing = sorted(n for n in names if f"`{n}`" not in text)
    assert not missing, f"docs/terms.md does not list: {missing}"


def _validation_sections():
    """The "## Validation" section of each docs/methods/*.md, in pipeline order."""
    parts = []
    for name in METHOD_DOCS:
        path = ROOT / "docs" / "methods" / f"{name}.md"
        if not path.exists():
            continue
        text = path.read_text()
        title = text.splitlines()[0].lstrip("# ").strip()
        if "## Validation" not in text:
            continue
        body = text.split("## Validation", 1)[1]
        body = re.split(r"\n## ", body, maxsplit=1)[0].strip()
        parts.append(f"## {title}\n\nFrom [methods/{name}.md](methods/{name}.md).\n\n{body}\n")
    return parts


VALIDATION_HEADER = """# Validation

Every check of the screener against something outside the project: a published formula or
worked example, a reference library, or real data that a package ships. Each row names the
check, its source and the tolerance; the test that runs it is in `tests/`. "From memory" marks
a published value quoted without re-checking the source; "common practice" marks a rule of
thumb. This page is assembled from the Validation section of each methods page
(`python tests/test_docs.py --write` regenerates it).
"""


def expected_validation() -> str:
    return VALIDATION_HEADER + "\n" + "\n".join(_validation_sections())


def test_validation_table_is_current():
    text = (ROOT / "docs" / "validation.md").read_text()
    assert text == expected_validation(), (
        "docs/validation.md is out of date: run python tests/test_docs.py --write"
    )


if __name__ == "__main__":
    import sys

    if "--write" in sys.argv:
        (ROOT / "docs" / "validation.md").write_text(expected_validation())
        print("wrote docs/validation.md")
        for file, name, make in GENERATED:
            path = ROOT / file
            text = path.read_text(encoding="utf-8")
            new = _with_block(text, name, make())
            if new != text:
                path.write_text(new, encoding="utf-8")
                print(f"wrote the {name} block of {file}")
