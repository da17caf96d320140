"""Every JSON document we read is checked against its shape at the door
(`shardtrain.documents`): wrong types, NaN, strings for numbers, missing keys, negative or
absurd sizes and deep nesting are one InputError naming the file and the key; through the
command line, exit status 2 and one line, no traceback.

The documents are the real outputs of our own commands, edited by hand as a user would
(the rule is the project's: validation at the door that names the parameter).
"""
from __future__ import annotations

import copy
import json
import re

import pytest
from helpers import depot_graph, save_graph

from shardtrain import documents
from shardtrain.cli import main
from shardtrain.errors import InputError

QUICK = ["--epochs", "2", "--hidden", "8", "--quiet", "--timeout", "20"]
W2 = ["--workers", "2", "--method", "random"]


@pytest.fixture(scope="module")
def docs(tmp_path_factory):
    d = tmp_path_factory.mktemp("docs")
    save_graph(d / "g.npz", depot_graph(n=160))
    save_graph(d / "other.npz", depot_graph(n=170, seed=8))
    assert main(["survey", str(d / "g.npz"), *W2, "--json", str(d / "s.json")]) == 0
    assert main(["forecast", str(d / "s.json"), "--flops-per-worker", "1e9", "--json",
                 str(d / "f.json")]) == 0
    assert main(["train", str(d / "g.npz"), *W2, *QUICK, "--json", str(d / "run.json"),
                 "--checkpoint", str(d / "ck")]) == 0
    assert main(["train", str(d / "other.npz"), "--reference", *QUICK, "--json",
                 str(d / "other_run.json")]) == 0
    from shardtrain.forecast.calibrate import from_flops
    (d / "cal.json").write_text(json.dumps(from_flops(1e9, "float32")))
    loaded = {kind: json.loads((d / name).read_text()) for kind, name in (
        ("survey", "s.json"), ("forecast", "f.json"), ("run", "run.json"),
        ("checkpoint", "ck/checkpoint.json"), ("calibration", "cal.json"))}
    return d, loaded


def test_our_own_documents_pass(docs):
    _, loaded = docs
    for kind, doc in loaded.items():
        assert documents.validate(copy.deepcopy(doc), kind, kind) == doc


def _set(path: str, value):
    """A mutation: set the value at a dotted path with [i] indices (or delete: ...)."""
    def mutate(doc):
        keys = re.findall(r"[^.\[\]]+", path)
        node = doc
        for k in keys[:-1]:
            node = node[int(k)] if isinstance(node, list) else node[k]
        last = int(keys[-1]) if isinstance(node, list) else keys[-1]
        if value is _DELETE:
            del node[last]
        else:
            node[last] = value
    return mutate


_DELETE = object()
NAN, INF = float("nan"), float("inf")

# (kind, mutation, regex of the message after "FILE: ")
BAD = [
    ("survey", _set("plans.0.workers", "2"),
     r"key plans\[0\]\.workers: must be an integer >= 1 and <= 1048576 \(got \"2\"\)"),
    ("survey", _set("plans.0.workers", 10 ** 30), r"key plans\[0\]\.workers: must be an int"),
    ("survey", _set("plans.0.shards.1.halo", -1),
     r"key plans\[0\]\.shards\[1\]\.halo: must be an integer >= 0 \(got -1\)"),
    ("survey", _set("plans.0.shards.0.owned", NAN), r"shards\[0\]\.owned: .*\(got NaN\)"),
    ("survey", _set("model.dtype", "float16"), r"key model\.dtype: must be one of"),
    ("survey", _set("plans.0.traffic", _DELETE), r"key plans\[0\]\.traffic: is missing"),
    ("survey", _set("plans.0.workers", 3), r"key plans\[0\]\.shards: must list workers 0\.\.2"),
    ("survey", _set("plans.0.traffic.pair_bytes", [[0, 1], [2]]),
     r"key plans\[0\]\.traffic\.pair_bytes: must be a 2-dimensional rectangular list"),
    ("survey", _set("plans", []), r"key plans: must have 1 to"),
    ("survey", _set("plans.0.traffic.allreduce_bytes_per_worker", [1]),
     r"key plans\[0\]\.traffic\.allreduce_bytes_per_worker: must be 2 \(workers is 2\)"),
    ("survey", _set("plans.0.imbalance.owned", "x"),
     r"key plans\[0\]\.imbalance\.owned: must be an object \(got \"x\"\)"),
    ("survey", _set("model.hops.0.layer", None), r"key model\.hops\[0\]\.layer: must be"),
    ("survey", _set("model.hops.0.d_in", True), r"key model\.hops\[0\]\.d_in: must be an int"),
    ("run", _set("epochs.1.epoch_s", -1),
     r"key epochs\[1\]\.epoch_s: must be a finite number >= 0 or null \(got -1\)"),
    ("run", _set("epochs.0.loss", "big"), r"key epochs\[0\]\.loss: must be a finite number"),
    ("run", _set("epochs.0.test_acc", 1.5), r"test_acc: must be a finite number >= 0 and <= 1"),
    ("run", _set("workers.0.bytes_sent", -5), r"key workers\[0\]\.bytes_sent: must be an int"),
    ("run", _set("graph.vertices", -1), r"key graph\.vertices: must be an integer >= 0"),
    ("forecast", _set("plans.0.link_gbps", 0), r"key plans\[0\]\.link_gbps: .* > 0"),
    ("forecast", _set("plans.0.epoch_s", NAN), r"key plans\[0\]\.epoch_s: .*\(got NaN\)"),
    ("forecast", _set("fastest.epoch_s", -INF), r"key fastest\.epoch_s: .*\(got -Infinity\)"),
    ("checkpoint", _set("epoch", -1), r"key epoch: must be an integer >= 1"),
    ("checkpoint", _set("epoch", "2"), r"key epoch: must be an integer"),
    ("checkpoint", _set("state_file", "../../etc/passwd"), r"key state_file: is not a valid"),
    ("checkpoint", _set("workers", NAN), r"key workers: must be an integer"),
    ("checkpoint", _set("dims.1.0", 99), r"key dims\[1\]: must take the width"),
    ("checkpoint", _set("settings", _DELETE), r"key settings: is missing"),
    ("checkpoint", _set("checkpoint_every", 0), r"key checkpoint_every: must be an integer"),
    ("calibration", _set("elementwise.bytes_per_s", INF),
     r"key elementwise\.bytes_per_s: must be a finite number > 0 \(got Infinity\)"),
    ("calibration", _set("dense.0.flops_per_s", "fast"), r"key dense\[0\]\.flops_per_s"),
]


@pytest.mark.parametrize("case", BAD, ids=[f"{c[0]} {c[2][:40]}" for c in BAD])
def test_a_bad_document_names_the_file_and_the_key(docs, case):
    kind, mutate, pattern = case
    doc = copy.deepcopy(docs[1][kind])
    mutate(doc)
    with pytest.raises(InputError) as err:
        documents.validate(doc, kind, "FILE.json")
    message = str(err.value)
    assert message.startswith("FILE.json: ") and "\n" not in message
    assert re.search(pattern, message), message


def test_nan_where_null_is_allowed_is_read_as_null(docs):
    doc = copy.deepcopy(docs[1]["run"])
    doc["epochs"][0]["loss"] = NAN
    doc["epochs"][0]["val_acc"] = INF
    out = documents.validate(doc, "run", "run.json")
    assert out["epochs"][0]["loss"] is None and out["epochs"][0]["val_acc"] is None


def test_parsing_is_bounded_in_depth_and_size(tmp_path, monkeypatch):
    deep = tmp_path / "deep.json"
    deep.write_text("[" * 200_000 + "]" * 200_000)       # would exhaust the parser's stack
    with pytest.raises(InputError, match=r"deep\.json: nested deeper than 64 levels"):
        documents.parse_json_file(deep)
    shallow_but_deep = tmp_path / "d2.json"
    shallow_but_deep.write_text('{"a":' + "[" * 80 + "]" * 80 + "}")
    with pytest.raises(InputError, match=r"nested deeper than 64"):
        documents.parse_json_file(shallow_but_deep)
    big = tmp_path / "big.json"
    big.write_text("[" + "0," * 600 + "0]")
    with pytest.raises(InputError, match=r"big\.json: 1,203 bytes, larger than"):
        documents.parse_json_file(big, max_bytes=1000)
    latin = tmp_path / "latin.json"
    latin.write_bytes(b'{"a": "\xe9"}')
    with pytest.raises(InputError, match=r"latin\.json:1: not a JSON file \(not UTF-8"):
        documents.parse_json_file(latin)


def _edit(src, dst, mutate):
    doc = json.loads(src.read_text())
    mutate(doc)
    dst.write_text(json.dumps(doc))
    return dst


def _cli_one_line(capsys, argv) -> str:
    capsys.readouterr()
    assert main([str(a) for a in argv]) == 2
    captured = capsys.readouterr()
    lines = captured.err.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in captured.err, captured.err
    assert captured.out == ""
    return lines[0]


def test_a_float16_survey_is_refused_before_any_timing(docs, tmp_path, capsys):
    """Before, the calibration's timing line came first: two lines on stderr."""
    d, _ = docs
    bad = _edit(d / "s.json", tmp_path / "s16.json", _set("model.dtype", "float16"))
    line = _cli_one_line(capsys, ["forecast", bad])
    assert re.search(r"s16\.json: key model\.dtype: must be one of 'float32', 'float64'", line)


def test_report_refuses_a_survey_and_a_run_of_different_graphs(docs, tmp_path, capsys):
    d, _ = docs
    line = _cli_one_line(capsys, ["report", d / "s.json", d / "other_run.json", "--html",
                                  tmp_path / "r.html"])
    assert re.search(r"other_run\.json: a run JSON of another graph than the survey JSON "
                     r"s\.json", line), line
    assert not (tmp_path / "r.html").exists()
    # the same graph under another seed (other split masks) is the same graph
    assert main(["train", str(d / "g.npz"), "--reference", *QUICK, "--seed", "7", "--json",
                 str(tmp_path / "seed7.json")]) == 0
    assert main(["report", str(d / "s.json"), str(tmp_path / "seed7.json"), "--html",
                 str(tmp_path / "ok.html")]) == 0


@pytest.mark.parametrize("mutation, pattern", [
    (_set("epoch", -1), r"checkpoint\.json: key epoch: must be an integer >= 1"),
    (_set("workers", "two"), r"checkpoint\.json: key workers: must be an integer"),
    (_set("dims", {"a": 1}), r"checkpoint\.json: key dims: must be a list"),
])
def test_a_hand_edited_checkpoint_index_is_one_line(docs, tmp_path, capsys, mutation,
                                                     pattern):
    import shutil

    d, _ = docs
    ck = tmp_path / "ck"
    shutil.copytree(d / "ck", ck)
    _edit(ck / "checkpoint.json", ck / "checkpoint.json", mutation)
    line = _cli_one_line(capsys, ["train", d / "g.npz", *W2, *QUICK, "--epochs", "4",
                                  "--resume", ck])
    assert re.search(pattern, line), line


def test_report_refuses_a_run_with_a_negative_epoch_time(docs, tmp_path, capsys):
    d, _ = docs
    bad = _edit(d / "run.json", tmp_path / "bad_run.json", _set("epochs.1.epoch_s", -1))
    line = _cli_one_line(capsys, ["report", bad, "--html", tmp_path / "r.html"])
    assert re.search(r"bad_run\.json: key epochs\[1\]\.epoch_s: must be a finite number "
                     r">= 0 or null \(got -1\)", line), line
