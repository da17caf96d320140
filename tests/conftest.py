"""Shared test helpers."""
from __future__ import annotations

import os
import subprocess
import sys

import pytest

# Keep BLAS to one thread in tests: the machine has 2 cores and workers run in parallel.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("MKL_NUM_THREADS", "1")


def _run_cli(*args, cwd=None, timeout=300, env=None):
    """Run `python -m shardtrain ARGS` and return the CompletedProcess (text mode)."""
    return subprocess.run([sys.executable, "-m", "shardtrain", *map(str, args)], cwd=cwd,
                          capture_output=True, text=True, timeout=timeout, env=env)


@pytest.fixture
def run_cli():
    return _run_cli
