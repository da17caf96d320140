"""Bad graph input: one line naming the file and line (or key, or option); through the CLI,
exit status 2, one line on stderr, no traceback and no output file."""
from __future__ import annotations

import importlib.util
import os
import re

import numpy as np
import pytest

from shardtrain.cli.flags import cli_message
from shardtrain.data.readers import load_graph
from shardtrain.errors import InputError
from shardtrain.files import save_npz_atomic


def text(name, *lines):
    def write(d):
        (d / name).write_text("".join(line + "\n" for line in lines))
        return d / name
    return write


def npz(name="g.npz", **arrays):
    def write(d):
        save_npz_atomic(d / name, **arrays)
        return d / name
    return write


def raw(name, data: bytes):
    def write(d):
        (d / name).write_bytes(data)
        return d / name
    return write


E = np.array([[0, 1], [1, 2]])
# (case id, graph writer, extra files {option: writer}, other load_graph kwargs, message regex)
CASES = [
    ("missing", lambda d: d / "nope.txt", {}, {}, r"nope\.txt: no such file"),
    ("directory", lambda d: (d / "dir.txt").mkdir() or d / "dir.txt", {}, {},
     r"dir\.txt: is a directory"),
    ("extension", text("g.xyz", "0 1"), {}, {}, r"g\.xyz: unknown graph file type '\.xyz'"),
    ("word id", text("g.txt", "# c", "0 1", "1 x"), {}, {}, r"g\.txt:3: 'x' is not an integer"),
    ("float id", text("g.txt", "0 1.5"), {}, {}, r"g\.txt:1: '1\.5' is not an integer"),
    ("negative id", text("g.txt", "0 1", "2 -4"), {}, {}, r"g\.txt:2: negative vertex id -4"),
    ("huge id", text("g.txt", "0 1", "1 1234567890123456789012"), {}, {},
     r"g\.txt:2: number too large"),
    ("three columns", text("g.csv", "0,1", "1,2,3"), {}, {},
     r"g\.csv:2: expected 2 columns, found 3"),
    ("one column", text("g.tsv", "0\t1", "% c", "2"), {}, {},
     r"g\.tsv:3: expected 2 columns, found 1"),
    ("id beyond features", text("g.txt", "0 1", "1 5"),
     {"features": lambda d: np.save(d / "x.npy", np.ones((3, 2))) or d / "x.npy"},
     {}, r"g\.txt:2: vertex id 5 >= number of vertices 3"),
    ("id beyond num_vertices", npz(edges=np.array([[0, 1], [1, 5]]), num_vertices=3), {}, {},
     r"g\.npz: edges\[1\]: vertex id 5 >= number of vertices 3"),
    ("empty", text("g.txt", "# only a comment"), {}, {}, r"g\.txt: empty graph"),
    ("nan feature csv", text("g.txt", "0 1", "1 2"),
     {"features": text("x.csv", "1,2", "3,4", "nan,5")}, {}, r"x\.csv:3: NaN or infinite"),
    ("inf feature npy", text("g.txt", "0 1", "1 2"),
     {"features": lambda d: np.save(d / "x.npy", np.array([[1.0], [np.inf], [0]])) or d / "x.npy"},
     {}, r"x\.npy: row 1: NaN or infinite"),
    ("ragged feature csv", text("g.txt", "0 1"), {"features": text("x.csv", "1,2", "3")}, {},
     r"x\.csv:2: expected 2 columns, found 1"),
    ("feature rows", npz(edges=E, num_vertices=4, features=np.ones((3, 2))), {}, {},
     r"g\.npz: key 'features': 3 feature rows, but the graph has 4 vertices"),
    ("id beyond labels", text("g.txt", "0 1", "1 2"), {"labels": text("y.txt", "0", "1")}, {},
     r"g\.txt:2: vertex id 2 >= number of vertices 2 \(the rows of --labels .*y\.txt\)"),
    ("label rows", npz(edges=E, num_vertices=3), {"labels": text("y.txt", "0", "1")}, {},
     r"--labels .*y\.txt: 2 labels, but the graph has 3 vertices"),
    ("label below -1", text("g.txt", "0 1"), {"labels": text("y.txt", "0", "-2")}, {},
     r"y\.txt:2: label -2"),
    ("no training vertex", npz(edges=E, labels=np.array([-1, -1, -1])), {}, {},
     r"g\.npz: labels given but no training vertex"),
    ("empty train mask", npz(edges=E, labels=np.array([0, 1, 0]), train_mask=np.zeros(3, bool),
                             val_mask=np.ones(3, bool), test_mask=np.zeros(3, bool)), {}, {},
     r"no training vertex"),
    ("mask length", npz(edges=E, labels=np.array([0, 1, 0]), train_mask=np.ones(2, bool),
                        val_mask=np.ones(3, bool), test_mask=np.ones(3, bool)), {}, {},
     r"g\.npz: key 'train_mask' has length 2, the graph has 3 vertices"),
    ("mask dtype", npz(edges=E, labels=np.array([0, 1, 0]), train_mask=np.ones(3),
                       val_mask=np.ones(3, bool), test_mask=np.ones(3, bool)), {}, {},
     r"g\.npz: key 'train_mask' must be a 1-D bool array"),
    ("no edges key", npz(links=E), {}, {}, r"g\.npz: unknown key 'links'"),
    ("edges missing", npz(labels=np.zeros(3, int)), {}, {}, r"g\.npz: missing key 'edges'"),
    ("edges shape", npz(edges=np.arange(6)), {}, {}, r"g\.npz: key 'edges' must be an m x 2"),
    ("edges dtype", npz(edges=E.astype(float)), {}, {}, r"key 'edges' must be an m x 2 integer"),
    ("labels dtype", npz(edges=E, labels=np.zeros(3)), {}, {},
     r"g\.npz: key 'labels': labels must be a 1-D integer array"),
    ("corrupt npz", raw("g.npz", b"not a zip"), {}, {}, r"g\.npz: not a readable \.npz bundle"),
    ("garbage mtx", raw("g.mtx", b"hello\n"), {}, {}, r"g\.mtx:1: not a readable Matrix Market"),
    ("non-square mtx", raw("g.mtx", b"%%MatrixMarket matrix coordinate pattern general\n"
                                    b"2 3 1\n1 3\n"), {}, {},
     r"g\.mtx:2: adjacency must be square"),
    ("input dim", text("g.txt", "0 1"), {"features": text("x.csv", "1,2", "3,4")},
     {"input_dim": 5}, r"--input-dim 5 does not match the 2 feature columns"),
]


@pytest.mark.parametrize("case", CASES, ids=[c[0] for c in CASES])
def test_bad_input_names_file_and_line(tmp_path, case):
    _, make_graph, extra, kwargs, pattern = case
    files = {option: str(write(tmp_path)) for option, write in extra.items()}
    with pytest.raises(InputError) as info:
        load_graph(make_graph(tmp_path), **files, **kwargs)
    message = cli_message(info.value)   # as the command line words it (cli/flags.py)
    assert "\n" not in message
    assert re.search(pattern, message), message


def assert_clean_failure(result, folder, pattern):
    assert result.returncode == 2, result.stderr
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1, result.stderr
    assert "Traceback" not in result.stderr
    assert re.search(pattern, lines[0]), lines[0]
    assert not [p for p in os.listdir(folder) if p.startswith("out") or "tmp" in p]


@pytest.mark.parametrize("option,value,pattern", [
    ("--vertices", "lots", r"--vertices 'lots': not an integer"),
    ("--homophily", "1.5", r"--homophily 1\.5: must be between 0 and 1"),
])
def test_synth_bad_options_exit_2(run_cli, tmp_path, option, value, pattern):
    result = run_cli("synth", tmp_path / "out.npz", "--vertices", "50", option, value)
    assert_clean_failure(result, tmp_path, pattern)


def test_synth_bad_output_exit_2(run_cli, tmp_path):
    result = run_cli("synth", tmp_path / "out.csv", "--vertices", "50")
    assert_clean_failure(result, tmp_path, r"out\.csv: the output must be an \.npz file")
    result = run_cli("synth", tmp_path / "missing" / "out.npz", "--vertices", "50")
    assert_clean_failure(result, tmp_path, r"folder .*missing does not exist")


@pytest.mark.skipif(importlib.util.find_spec("shardtrain.cli.survey") is None,
                    reason="survey command not built yet")
@pytest.mark.parametrize("case", [c for c in CASES if c[0] in
                                  ("word id", "three columns", "nan feature csv", "mask length")],
                         ids=lambda c: c[0])
def test_bad_graph_through_the_cli(run_cli, tmp_path, case):
    _, make_graph, extra, _, pattern = case
    args = ["survey", make_graph(tmp_path), "--workers", "2", "--method", "random",
            "--json", tmp_path / "out.json"]
    for option, write in extra.items():
        args += [f"--{option}", write(tmp_path)]
    assert_clean_failure(run_cli(*args), tmp_path, pattern)
