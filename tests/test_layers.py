"""The stage packages and their one-way rule (DEVELOPERS.md, "Layout").

Every import inside the package, at module level or inside a function, may only point at
its own stage or one below it. The order is the project's own choice (issue 10): base
modules, data, transport, plan, train, forecast, report, demo, cli; `shardtrain.testing` is
reached only through `shardtrain.hooks` (by name, at run time), never by an import.
"""
from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parent.parent / "shardtrain"
STAGES = ("base", "data", "transport", "plan", "train", "forecast", "report", "demo", "cli")
RANK = {name: i for i, name in enumerate(STAGES)}
RANK["testing"] = RANK["train"]       # test-only code that wraps a transport


def stage_of(module: str) -> str:
    """'shardtrain.plan.shards' -> 'plan'; top-level modules are the base."""
    parts = module.split(".")
    assert parts[0] == "shardtrain", module
    if module == "shardtrain.__main__":       # `python -m shardtrain`: the command line
        return "cli"
    if len(parts) > 1 and (PACKAGE / parts[1]).is_dir():
        return parts[1]
    return "base"


def module_name(path: Path) -> str:
    rel = path.relative_to(PACKAGE.parent).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def imports_of(path: Path) -> list[tuple[int, str]]:
    """(line, imported module) for every import of a shardtrain module in the file."""
    tree = ast.parse(path.read_text(), filename=str(path))
    found = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            found += [(node.lineno, a.name) for a in node.names if a.name.startswith("shardtrain")]
        elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
            if node.module == "shardtrain":
                found += [(node.lineno, f"shardtrain.{a.name}") for a in node.names]
            elif node.module.startswith("shardtrain."):
                found.append((node.lineno, node.module))
    return found


def violations(package: Path = PACKAGE) -> list[str]:
    out = []
    for path in sorted(package.rglob("*.py")):
        here = module_name(path)
        mine = stage_of(here)
        for line, target in imports_of(path):
            theirs = stage_of(target)
            if theirs == "testing" and mine != "testing":
                out.append(f"{path.relative_to(package.parent)}:{line}: {here} imports {target}"
                           " (test-only code: go through shardtrain.hooks)")
            elif RANK[theirs] > RANK[mine]:
                out.append(f"{path.relative_to(package.parent)}:{line}: {here} ({mine}) imports "
                           f"{target} ({theirs}), which is above it")
    return out


def test_every_import_points_down_the_stages():
    assert violations() == []


def test_every_package_is_a_known_stage():
    packages = {p.name for p in PACKAGE.iterdir() if (p / "__init__.py").exists()}
    assert packages <= set(RANK), packages - set(RANK)


def test_the_check_fails_on_an_upward_import(tmp_path):
    """A package whose data stage imports the plan stage is caught (the test can fail)."""
    fake = tmp_path / "shardtrain"
    for stage in ("data", "plan"):
        (fake / stage).mkdir(parents=True)
        (fake / stage / "__init__.py").write_text("")
    (fake / "__init__.py").write_text("")
    (fake / "data" / "graph.py").write_text("def f():\n    from shardtrain.plan import shards\n")
    (fake / "plan" / "shards.py").write_text("from shardtrain.data.graph import f\n")
    global PACKAGE
    saved, PACKAGE = PACKAGE, fake
    try:
        found = violations(fake)
    finally:
        PACKAGE = saved
    assert len(found) == 1 and "shardtrain.data.graph (data) imports shardtrain.plan" in found[0]


@pytest.mark.parametrize("module, stage", [("shardtrain.errors", "base"),
                                           ("shardtrain.plan.shards", "plan"),
                                           ("shardtrain.transport", "transport")])
def test_stage_of(module, stage):
    assert stage_of(module) == stage
