"""Outputs never destroy inputs, every output location is proved writable before the work,
a write that fails (disk full) is one line with exit 3 and leaves nothing, and every JSON
we write parses with a strict parser.

The rules are the project's (common practice for command-line tools: refuse before any
work, name the option and the file; RFC 8259 has no NaN or Infinity, so a strict parser
must be able to read every JSON we write).
"""
from __future__ import annotations

import hashlib
import json
import os
import re
import resource
import signal
import subprocess
import sys

import numpy as np
import pytest
from helpers import depot_graph, save_graph

from shardtrain.cli import main

QUICK = ["--epochs", "2", "--hidden", "8", "--quiet", "--timeout", "20"]
W2 = ["--workers", "2", "--method", "random"]


@pytest.fixture(scope="module")
def d(tmp_path_factory):
    """Inputs: a graph, its edge list, a survey and a forecast JSON, a shard directory,
    a run JSON, a hard link and a symlink to the graph, and a folder holding all of them."""
    d = tmp_path_factory.mktemp("inputs")
    save_graph(d / "g.npz", depot_graph(n=160))
    with np.load(d / "g.npz") as z:
        np.savetxt(d / "edges.csv", z["edges"], fmt="%d", delimiter=",")
    assert main(["survey", str(d / "g.npz"), *W2, "--json", str(d / "s.json")]) == 0
    assert main(["forecast", str(d / "s.json"), "--flops-per-worker", "1e9", "--json",
                 str(d / "f.json")]) == 0
    assert main(["split", str(d / "g.npz"), *W2, "--out", str(d / "shards")]) == 0
    assert main(["train", str(d / "g.npz"), "--reference", *QUICK, "--json",
                 str(d / "run.json")]) == 0
    os.link(d / "g.npz", d / "hard.npz")
    os.symlink(d / "g.npz", d / "soft.npz")
    (d / "a_file").write_text("x\n")
    return d


def _snapshot(folder) -> dict:
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            if p.is_file() else "dir" for p in sorted(folder.rglob("*"))}


def _one_line(err: str) -> str:
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert "Traceback" not in err
    return lines[0]


# (id, argv with {d} {out} placeholders, regex of the one line)
CLOBBER = [
    ("train weights onto graph", ["train", "{d}/g.npz", "--reference", *QUICK, "--weights",
                                  "{d}/g.npz"], r"--weights .*g\.npz: is the input GRAPH"),
    ("train weights onto hard link", ["train", "{d}/g.npz", "--reference", *QUICK,
                                      "--weights", "{d}/hard.npz"],
     r"--weights .*hard\.npz: is the input GRAPH"),
    ("train weights onto symlink", ["train", "{d}/soft.npz", "--reference", *QUICK,
                                    "--weights", "{d}/g.npz"],
     r"--weights .*g\.npz: is the input GRAPH"),
    ("train predictions onto edge list", ["train", "{d}/edges.csv", "--reference", *QUICK,
                                          "--predictions", "{d}/edges.csv"],
     r"--predictions .*edges\.csv: is the input GRAPH"),
    ("train json onto manifest", ["train", "{d}/shards", *QUICK, "--json",
                                  "{d}/shards/shards.json"],
     r"--json .*shards\.json: (is the input|would replace a file inside the input) GRAPH"),
    ("train checkpoint into shard dir", ["train", "{d}/shards", *QUICK, "--checkpoint",
                                         "{d}/shards"], r"--checkpoint .*shards: is the input"),
    ("train two outputs, one file", ["train", "{d}/g.npz", "--reference", *QUICK,
                                     "--json", "{out}/x.json", "--plot", "{out}/x.json"],
     r"--plot .*x\.json: also given as --json"),
    ("forecast json onto survey", ["forecast", "{d}/s.json", "--flops-per-worker", "1e9",
                                   "--json", "{d}/s.json"], r"--json .*s\.json: is the input"),
    ("forecast calibration = json (new)", ["forecast", "{d}/g.npz", *W2, "--calibration",
                                           "{out}/c.json", "--json", "{out}/c.json"],
     r"--calibration .*c\.json: also given as --json"),
    ("forecast json onto calibration", ["forecast", "{d}/g.npz", *W2, "--calibration",
                                        "{d}/f.json", "--json", "{d}/f.json"],
     r"--json .*f\.json: is the input --calibration"),
    ("report html onto survey", ["report", "{d}/s.json", "--html", "{d}/s.json"],
     r"--html .*s\.json: is the input"),
    ("report html onto a json of the folder", ["report", "{d}", "--html", "{d}/run.json"],
     r"--html .*run\.json: is the input"),
    ("survey json = csv", ["survey", "{d}/g.npz", *W2, "--json", "{out}/o.txt", "--csv",
                           "{out}/o.txt"], r"--csv .*o\.txt: also given as --json"),
    ("survey json onto graph", ["survey", "{d}/g.npz", *W2, "--json", "{d}/g.npz"],
     r"--json .*g\.npz: is the input GRAPH"),
    ("split out holds the graph", ["split", "{d}/g.npz", *W2, "--out", "{d}", "--overwrite"],
     r"--out .*: holds the input GRAPH"),
    ("synth onto nothing writable", ["synth", "/proc/shardtrain-test.npz", "--vertices",
                                     "300"], r"cannot write in folder /proc"),
    ("train json unwritable", ["train", "{d}/g.npz", "--reference", *QUICK, "--json",
                               "/proc/x.json"], r"--json /proc/x\.json: cannot write in folder"),
    ("train plot unwritable", ["train", "{d}/g.npz", "--reference", *QUICK, "--plot",
                               "/proc/pics"], r"--plot /proc/pics: cannot write in folder"),
    ("train checkpoint unwritable", ["train", "{d}/g.npz", *W2, *QUICK, "--checkpoint",
                                     "/proc/ck"], r"--checkpoint /proc/ck: cannot write"),
    ("survey csv unwritable", ["survey", "{d}/g.npz", *W2, "--csv", "/proc/s.csv"],
     r"--csv /proc/s\.csv: cannot write in folder"),
    ("split out unwritable", ["split", "{d}/g.npz", *W2, "--out", "/proc/shards"],
     r"--out /proc/shards: cannot write in folder"),
    ("demo out unwritable", ["demo", "--quick", "--out", "/proc/demo"],
     r"--out /proc/demo: cannot write in folder"),
    ("report html unwritable", ["report", "{d}/s.json", "--html", "/proc/r.html"],
     r"--html /proc/r\.html: cannot write in folder"),
    ("forecast plot unwritable", ["forecast", "{d}/s.json", "--flops-per-worker", "1e9",
                                  "--plot", "/proc/pics"], r"--plot /proc/pics: cannot write"),
]


@pytest.mark.parametrize("case", CLOBBER, ids=[c[0] for c in CLOBBER])
def test_an_output_never_destroys_an_input(d, tmp_path, capsys, case):
    _, template, pattern = case
    out = tmp_path / "out"
    out.mkdir()
    argv = [a.format(d=d, out=out) for a in template]
    before, capsys_out = _snapshot(d), capsys.readouterr()
    assert main(argv) == 2
    captured = capsys.readouterr()
    line = _one_line(captured.err)
    assert re.search(pattern, line), line
    assert captured.out == "", "work was done before the refusal"
    assert _snapshot(d) == before, "an input changed"
    assert list(out.iterdir()) == [], "output left behind"
    del capsys_out


def test_demo_refuses_to_replace_the_folder_it_runs_in(run_cli, tmp_path):
    here = tmp_path / "here"
    here.mkdir()
    r = run_cli("demo", "--quick", "--out", ".", cwd=here)
    assert r.returncode == 2
    assert re.search(r"--out \.: is or holds the current folder", _one_line(r.stderr))
    assert list(here.iterdir()) == [] and sorted(p.name for p in tmp_path.iterdir()) == ["here"]


def _low_fsize(limit: int):
    def apply():
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)  # the write raises EFBIG instead
        resource.setrlimit(resource.RLIMIT_FSIZE, (limit, limit))
    return apply


FULL = [  # (id, argv, the file named, the largest file size allowed)
    ("synth", ["synth", "{t}/big.npz", "--vertices", "3000"], r"big\.npz", 60_000),
    ("train weights", ["train", "{d}/g.npz", "--reference", "--epochs", "2", "--quiet",
                       "--hidden", "512", "--dtype", "float64", "--weights", "{t}/w.npz"],
     r"w\.npz", 60_000),
    ("train checkpoint", ["train", "{d}/g.npz", "--reference", "--epochs", "2", "--quiet",
                          "--hidden", "256", "--dtype", "float64", "--checkpoint", "{t}/ck"],
     r"ck/state-000002\.npz", 60_000),
    ("survey plot", ["survey", "{d}/g.npz", *W2, "--plot", "{t}/pics"], r"pics/.*\.png",
     8_000),
]


@pytest.mark.parametrize("case", FULL, ids=[c[0] for c in FULL])
def test_a_full_disk_is_one_line_exit_3_and_leaves_nothing(d, tmp_path, case):
    """RLIMIT_FSIZE makes every write past `limit` bytes fail with EFBIG, as a full disk
    fails with ENOSPC (both are in files.SPACE_ERRNOS), without filling a disk. The ck/
    and pics/ folders are created by the run before the failing write, and removed."""
    _, template, named, limit = case
    t = tmp_path / "t"
    t.mkdir()
    before = _snapshot(d)
    argv = [a.format(d=d, t=t) for a in template]
    r = subprocess.run([sys.executable, "-m", "shardtrain", *argv], capture_output=True,
                       text=True, timeout=300, preexec_fn=_low_fsize(limit))
    assert r.returncode == 3, r.stderr
    # survey's progress lines (indented) go to stderr too; the error is one line after them
    line = _one_line("\n".join(x for x in r.stderr.splitlines() if not x.startswith("  ")))
    assert re.search(rf"^shardtrain: run failed: .*{named}: could not be written "
                     r"\(File too large\)", line), line
    assert list(t.iterdir()) == [], "a partial file, temporary or empty folder was left"
    assert _snapshot(d) == before


def _strict(text: str):
    def refuse(name):
        raise ValueError(f"bare {name} in JSON")
    return json.loads(text, parse_constant=refuse)


def test_every_json_we_write_is_strict(d, tmp_path):
    """survey, train (reference and partitioned), forecast and the calibration cache."""
    t = tmp_path
    assert main(["train", str(d / "g.npz"), *W2, *QUICK, "--json", str(t / "p.json")]) == 0
    for f in ("s.json", "f.json", "run.json"):
        _strict((d / f).read_text())
    _strict((t / "p.json").read_text())
    _strict((d / "shards" / "shards.json").read_text())


def test_non_finite_values_are_written_as_null(tmp_path):
    from shardtrain.files import write_json_atomic

    write_json_atomic(tmp_path / "x.json", {"loss": float("nan"), "a": [np.float64("inf"),
                                                                          1.5, -np.inf],
                                            "n": np.int64(3)})
    assert _strict((tmp_path / "x.json").read_text()) == {"loss": None,
                                                          "a": [None, 1.5, None], "n": 3}


def test_created_output_folders_are_removed_only_when_empty_after_a_failure(tmp_path):
    from shardtrain.files import check_paths, finish_outputs

    a, b, c = tmp_path / "a", tmp_path / "b", tmp_path / "c"
    check_paths(out_dirs={"--plot": a, "--checkpoint": b})
    a.mkdir()
    b.mkdir()
    (b / "checkpoint.json").write_text("{}")
    finish_outputs(failed=True)
    assert not a.exists() and b.is_dir()        # the empty one went, the other stays
    check_paths(out_dirs={"--plot": c})
    c.mkdir()
    finish_outputs(failed=False)
    assert c.is_dir()                           # a command that succeeded keeps its folders


def test_a_failed_demo_removes_the_parent_folders_it_created(tmp_path, monkeypatch):
    from shardtrain.demo import workflow as demo
    from shardtrain.errors import RunError

    def fail(*args, **kwargs):
        raise RunError("step failed")
    monkeypatch.setattr(demo, "_run_steps", fail)
    with pytest.raises(RunError):
        demo.run_demo(demo.DemoSettings.quick(out=str(tmp_path / "a" / "b" / "out")))
    assert list(tmp_path.iterdir()) == []
