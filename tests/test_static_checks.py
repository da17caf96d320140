"""Static checks run as part of the suite: the type checker and the linter, configured in
pyproject.toml ([tool.mypy], [tool.ruff]), must pass."""
from __future__ import annotations

import importlib.util
import re
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent

needs_mypy = pytest.mark.skipif(importlib.util.find_spec("mypy") is None,
                                reason="mypy is not installed (it is in the `test` extra)")


def _mypy(*args: str, cwd: Path = ROOT) -> subprocess.CompletedProcess:
    # the config file is named explicitly, so the check cannot silently run without it
    return subprocess.run([sys.executable, "-m", "mypy", "--config-file",
                           str(ROOT / "pyproject.toml"), *args], cwd=cwd,
                          capture_output=True, text=True, timeout=300)


@needs_mypy
def test_mypy_passes_on_the_package():
    res = _mypy()
    output = res.stdout + res.stderr
    assert res.returncode == 0, f"mypy reported errors:\n{output}"
    # the configured `packages` were checked: every module of shardtrain, not none
    modules = len(list((ROOT / "shardtrain").rglob("*.py")))
    checked = re.search(r"no issues found in (\d+) source files", output)
    assert checked is not None, output
    assert int(checked.group(1)) == modules, output


@needs_mypy
def test_mypy_config_catches_optional_misuse_in_untyped_code(tmp_path):
    # the body of an unannotated function is checked (check_untyped_defs) and a stale
    # `type: ignore` is reported (warn_unused_ignores): the suite's check has teeth
    bad = tmp_path / "bad_module.py"
    bad.write_text("from typing import Optional\n\n\n"
                   "def width(x: Optional[str]) -> int:\n"
                   "    return 0 if x is None else len(x)\n\n\n"
                   "def untyped(x=None):\n"
                   "    w: Optional[str] = None\n"
                   "    return w.strip()\n\n\n"
                   "n: int = 1  # type: ignore[assignment]\n")
    res = _mypy(str(bad), cwd=tmp_path)
    output = res.stdout + res.stderr
    assert res.returncode == 1, output
    assert '"None" of "str | None" has no attribute "strip"' in output, output
    assert 'Unused "type: ignore" comment' in output, output


needs_ruff = pytest.mark.skipif(importlib.util.find_spec("ruff") is None,
                                reason="ruff is not installed (it is in the `test` extra)")


@needs_ruff
def test_ruff_passes_on_the_repository():
    # lint and import order ([tool.ruff] in pyproject.toml) over the package, tests and
    # benchmarks
    res = subprocess.run([sys.executable, "-m", "ruff", "check", "--config",
                          str(ROOT / "pyproject.toml"), "shardtrain", "tests", "benchmarks"],
                         cwd=ROOT, capture_output=True, text=True, timeout=120)
    assert res.returncode == 0, f"ruff reported:\n{res.stdout}{res.stderr}"


@needs_ruff
def test_ruff_config_catches_an_unused_import(tmp_path):
    # the check is live: the same configuration flags a planted unused import
    bad = tmp_path / "planted.py"
    bad.write_text("import os\n")
    res = subprocess.run([sys.executable, "-m", "ruff", "check", "--config",
                          str(ROOT / "pyproject.toml"), str(bad)],
                         cwd=ROOT, capture_output=True, text=True, timeout=120)
    assert res.returncode != 0 and "F401" in res.stdout, res.stdout + res.stderr
