"""`mpiexec -n R shardtrain survey GRAPH_DIR --transport mpi`: the same JSON as one process.

Issue 11 asks for identical JSON (timings aside) with 1, 2 and 4 ranks. The oracle is the
one-process streaming survey, itself checked field by field against the in-memory survey and
scipy (tests/test_stream_survey.py); the comparison uses scripts/outputs_diff.py's timing rule.
"""
from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest
from helpers import launch_mpi

from shardtrain.data.graphdir import write_graph_dir
from shardtrain.data.synth import parcel_network

pytestmark = pytest.mark.mpi

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "scripts"))
from outputs_diff import differences  # noqa: E402

# a budget small enough that every plan is counted in many chunks (more than ranks)
COMMON = ["--workers", "3,16", "--method", "random,range,fennel", "--memory-budget", "2M",
          "--hidden", "8"]


@pytest.fixture(scope="module")
def folder_and_local(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("mpi_survey")
    folder = tmp / "g"
    write_graph_dir(parcel_network(30_000, 8, 4, 3, seed=2), folder)
    out = tmp / "local.json"
    done = subprocess.run([sys.executable, "-m", "shardtrain", "survey", str(folder), *COMMON,
                           "--json", str(out)], capture_output=True, text=True)
    assert done.returncode == 0, done.stderr
    local = json.loads(out.read_text())
    assert all(c["chunks"] > 4 for c in local["streaming"]["chunks"])
    return folder, local, tmp


@pytest.mark.parametrize("ranks", [1, 2, pytest.param(4, marks=pytest.mark.slow)])
def test_ranks_write_the_one_process_json(folder_and_local, ranks):
    folder, local, tmp = folder_and_local
    out = tmp / f"mpi{ranks}.json"
    proc, _ = launch_mpi(ranks, ["-m", "shardtrain", "survey", str(folder), *COMMON,
                                 "--transport", "mpi", "--json", str(out)], timeout=300)
    assert proc.returncode == 0, proc.stderr
    found: list[str] = []
    differences(local, json.loads(out.read_text()), "", found)
    assert found == []
    # one rank prints: the table once
    assert proc.stdout.count("fennel       16") == 1


def test_bad_input_is_one_line_from_one_rank(folder_and_local, tmp_path):
    folder, _, _ = folder_and_local
    proc, _ = launch_mpi(2, ["-m", "shardtrain", "survey", str(folder), "--workers", "0",
                             "--transport", "mpi", "--json", str(tmp_path / "x.json")])
    assert proc.returncode == 2
    lines = [ln for ln in proc.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1 and lines[0].startswith("shardtrain: error: --workers")
    assert not (tmp_path / "x.json").exists()


def test_a_graph_file_is_refused_under_mpi(tmp_path):
    from shardtrain.data.synth import edge_array

    g = parcel_network(300, 4, 3, 2, seed=1)
    f = tmp_path / "g.csv"
    f.write_text("\n".join(f"{u},{v}" for u, v in edge_array(g)) + "\n")
    proc, _ = launch_mpi(2, ["-m", "shardtrain", "survey", str(f), "--workers", "2",
                             "--transport", "mpi"])
    assert proc.returncode == 2
    assert proc.stderr.strip().count("\n") == 0 and "not a graph directory" in proc.stderr
