"""Habits of the test suite and the docs: helpers in one place, references that resolve.

Common practice (no outside source): a test module imported by another one runs its
module-level code twice and ties unrelated tests together, so shared helpers live in
tests/helpers.py; a reference to a document must name a file and section that exist.
"""
from __future__ import annotations

import ast
import re
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
DESIGN = ROOT / "docs" / "design.md"


def _test_modules():
    return sorted((ROOT / "tests").glob("test_*.py"))


def _imported_names(path: Path) -> set[str]:
    names = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            names.update(a.name.split(".")[0] for a in node.names)
        elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
            names.add(node.module.split(".")[0])
    return names


def test_no_test_module_imports_another():
    modules = {p.stem for p in _test_modules()}
    offenders = {p.name: sorted(_imported_names(p) & modules) for p in _test_modules()}
    assert {k: v for k, v in offenders.items() if v} == {}


def _sources():
    for folder in ("shardtrain", "tests", "benchmarks"):
        yield from sorted((ROOT / folder).rglob("*.py"))
    yield from sorted(ROOT.glob("*.md"))
    yield from sorted((ROOT / "docs").rglob("*.md"))


def test_every_design_reference_names_an_existing_section():
    headings = set(re.findall(r"^#+ (\d+(?:\.\d+)*)\.? ", DESIGN.read_text(encoding="utf-8"),
                              flags=re.M))
    assert {"1.2", "1.4", "1.7", "2.1", "3.2"} <= headings
    cited = {}
    for path in _sources():
        text = path.read_text(encoding="utf-8")
        # "docs/design.md §1.7", "docs/design.md (§1.2, §1.4)"
        for ref in re.findall(r"docs/design\.md[^\n]{0,4}((?:§\d+(?:\.\d+)*(?:, )?)+)", text):
            for section in re.findall(r"§(\d+(?:\.\d+)*)", ref):
                cited.setdefault(section, []).append(path.name)
    assert cited, "no reference to docs/design.md found: the pattern is wrong"
    assert {s: f for s, f in cited.items() if s not in headings} == {}


def test_no_reference_to_a_design_file_outside_the_repository():
    missing = "DESIGN" + ".md"          # written apart so this file does not match itself
    hits = [p.name for p in _sources() if missing in p.read_text(encoding="utf-8")]
    assert hits == []
