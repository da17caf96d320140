"""Bad input to every command: exit status 2, exactly one line on stderr naming the file
(and line) or the option, no traceback, and nothing left behind in the output folder.

The rule is the project's (common practice for command-line tools: fail before any work,
say what and where). These cases add to tests/test_bad_input_io.py (graph files) and
tests/test_train_cli.py (train's basic options) without repeating them.
"""
from __future__ import annotations

import json
import re
import shutil

import pytest
from helpers import depot_graph, save_graph

from shardtrain.cli import main
from shardtrain.errors import ParameterError
from shardtrain.forecast.calibrate import CALIBRATION_VERSION

TRAIN = ["--epochs", "4", "--dtype", "float64", "--hidden", "8", "--quiet", "--timeout", "20"]
W2 = ["--workers", "2", "--method", "random"]


@pytest.fixture(scope="module")
def inputs(tmp_path_factory):
    """Good inputs the cases break one at a time: a graph, another graph, a shard
    directory, a checkpoint folder of a 2-worker run, weights."""
    d = tmp_path_factory.mktemp("inputs")
    save_graph(d / "g.npz", depot_graph(n=200))
    save_graph(d / "other.npz", depot_graph(n=200, seed=4))
    assert main(["split", str(d / "g.npz"), *W2, "--out", str(d / "shards")]) == 0
    assert main(["train", str(d / "g.npz"), *W2, *TRAIN, "--checkpoint", str(d / "ck"),
                 "--checkpoint-every", "2", "--weights", str(d / "w.npz")]) == 0
    (d / "empty").mkdir()
    (d / "a_file").write_text("x\n")
    (d / "assign_word.txt").write_text("0\n1\nx\n" + "0\n" * 197)
    (d / "assign_short.txt").write_text("0\n1\n")
    (d / "garbage.json").write_text("{not json\n")
    (d / "unknown.json").write_text(json.dumps({"what": 1}) + "\n")
    (d / "cal_bad_speed.json").write_text(json.dumps(
        {"version": CALIBRATION_VERSION, "dtype": "float32", "threads": 1,
         "sparse": [{"nnz": 10, "width": 8, "nnz_cols_per_s": -1.0}],
         "dense": [{"d_in": 16, "d_out": 16, "flops_per_s": 1e9}],
         "elementwise": {"bytes_per_s": 1e9}, "dropout_masks": {"elements_per_s": 1e8}}))
    (d / "cal_no_dense.json").write_text(json.dumps(
        {"version": CALIBRATION_VERSION, "dtype": "float32", "sparse": [], "elementwise": {}}))
    assert main(["survey", str(d / "g.npz"), *W2, "--json", str(d / "survey.json")]) == 0
    return d


def _broken_index(d, out):
    bad = out / "ck_bad_index"
    shutil.copytree(d / "ck", bad)
    (bad / "checkpoint.json").write_text("{\"format\": \"shardtrain-checkpoint\",\n")
    return bad


def _tampered_state(d, out):
    bad = out / "ck_tampered"
    shutil.copytree(d / "ck", bad)
    state = next(bad.glob("state-*.npz"))
    data = bytearray(state.read_bytes())
    data[len(data) // 2] ^= 0xFF
    state.write_bytes(bytes(data))
    return bad


def _full_demo_folder(d, out):
    (out / "demo_out").mkdir()
    (out / "demo_out" / "keep.txt").write_text("mine\n")
    return out / "demo_out"


def _full_split_folder(d, out):
    (out / "split_out").mkdir()
    (out / "split_out" / "keep.txt").write_text("mine\n")
    return out / "split_out"


# (id, argv with {g} {other} {shards} {ck} {w} {d} {out} placeholders or callables, regex)
CASES = [
    # synth
    ("synth avg-degree", ["synth", "{out}/s.npz", "--vertices", "50", "--avg-degree", "-3"],
     r"--avg-degree"),
    ("synth classes", ["synth", "{out}/s.npz", "--vertices", "50", "--classes", "0"],
     r"--classes"),
    ("synth features", ["synth", "{out}/s.npz", "--vertices", "50", "--features", "abc"],
     r"--features 'abc'"),
    ("synth exponent", ["synth", "{out}/s.npz", "--vertices", "50", "--degree-exponent",
                        "0.5"], r"--degree-exponent"),
    ("synth seed", ["synth", "{out}/s.npz", "--vertices", "50", "--seed", "1.5"], r"--seed"),
    ("synth grow weeks", ["synth", "{out}/s.npz", "--vertices", "50", "--grow", "0"],
     r"--grow"),
    ("synth growth alone", ["synth", "{out}/s.npz", "--vertices", "50", "--growth", "0.2"],
     r"--growth: give --grow"),
    # update (tests/test_update.py has the bad deltas)
    ("update nothing to do", ["update", "{shards}", "--out", "{out}/u"], r"--add-edges"),
    ("update edges file missing", ["update", "{shards}", "--add-edges", "{out}/none.txt",
                                   "--out", "{out}/u"], r"none\.txt"),
    ("update repartition without fresh", ["update", "{shards}", "--add-edges",
                                          "{d}/assign_short.txt", "--no-fresh",
                                          "--repartition-above", "10", "--out", "{out}/u"],
     r"--repartition-above: needs the fresh plan"),
    ("update not a shard dir", ["update", "{d}/empty", "--add-edges", "{d}/assign_short.txt",
                                "--out", "{out}/u"], r"empty/shards\.json"),
    # train --warm-start
    ("train warm-start missing", ["train", "{shards}", *TRAIN, "--warm-start", "{out}/none"],
     r"--warm-start .*none: no such folder"),
    ("train warm-start with resume", ["train", "{shards}", *TRAIN, "--warm-start", "{ck}",
                                      "--resume", "{ck}"], r"--resume: not allowed with "
                                                           r"--warm-start"),
    # split
    ("split method", ["split", "{g}", "--workers", "2", "--method", "nosuch", "--out",
                      "{out}/sh"], r"--method"),
    ("split workers", ["split", "{g}", "--workers", "0", "--method", "random", "--out",
                       "{out}/sh"], r"--workers"),
    ("split imbalance", ["split", "{g}", *W2, "--imbalance", "-1", "--out", "{out}/sh"],
     r"--imbalance"),
    ("split assignment word", ["split", "{g}", "--assignment", "{d}/assign_word.txt", "--out",
                               "{out}/sh"], r"assign_word\.txt:3"),
    ("split assignment short", ["split", "{g}", "--assignment", "{d}/assign_short.txt",
                                "--out", "{out}/sh"], r"assign_short\.txt"),
    ("split out not empty", ["split", "{g}", *W2, "--out", _full_split_folder],
     r"split_out"),
    # survey
    ("survey workers list", ["survey", "{g}", "--workers", "2,x", "--method", "random"],
     r"--workers '2,x'"),
    ("survey method list", ["survey", "{g}", "--workers", "2", "--method", "metis,,random"],
     r"--method"),
    ("survey dtype", ["survey", "{g}", "--workers", "2", "--method", "random", "--dtype",
                      "float16"], r"--dtype"),
    ("survey layers", ["survey", "{g}", "--workers", "2", "--method", "random", "--layers",
                       "0"], r"--layers"),
    ("survey model", ["survey", "{g}", "--workers", "2", "--method", "random", "--model",
                      "foo"], r"^shardtrain: error: --model: must be one of gcn, sage"),
    ("survey heads", ["survey", "{g}", "--workers", "2", "--method", "random", "--model",
                      "gat", "--heads", "0"], r"^shardtrain: error: --heads"),
    ("forecast model", ["forecast", "{g}", "--workers", "2", "--method", "random",
                        "--link-gbps", "10", "--model", "foo"], r"--model"),
    ("train resume model differs", ["train", "{g}", *W2, *TRAIN, "--epochs", "6", "--resume",
                                    "{ck}", "--model", "sage"],
     r"^shardtrain: error: --model: this run asks for 'sage', the checkpoint .* 'gcn'"),
    ("train init weights of another model", ["train", "{g}", *W2, *TRAIN, "--model", "gin",
                                             "--init-weights", "{d}/w.npz"],
     r"w\.npz: missing array 'w_a0'"),
    ("train epochs 0 without weights", ["train", "{g}", "--reference", "--epochs", "0"],
     r"^shardtrain: error: --epochs 0: .*--weights"),
    ("train epochs 0 with json", ["train", "{g}", "--reference", "--epochs", "0", "--weights",
                                  "{out}/w.npz", "--json", "{out}/r.json"],
     r"^shardtrain: error: --json: not written with --epochs 0"),
    ("survey csv folder", ["survey", "{g}", "--workers", "2", "--method", "random", "--csv",
                           "{out}/nope/s.csv"], r"nope"),
    # train: checkpoints, resume, stragglers, frames
    ("train checkpoint-every 0", ["train", "{g}", *W2, *TRAIN, "--checkpoint", "{out}/c",
                                  "--checkpoint-every", "0"], r"--checkpoint-every '0'"),
    ("train checkpoint-every alone", ["train", "{g}", *W2, *TRAIN, "--checkpoint-every", "2"],
     r"^shardtrain: error: --checkpoint-every: give --checkpoint DIR"),
    ("train checkpoint is a file", ["train", "{g}", *W2, *TRAIN, "--checkpoint",
                                    "{d}/a_file"], r"--checkpoint .*a_file: exists and is not"),
    ("train checkpoint parent missing", ["train", "{g}", *W2, *TRAIN, "--checkpoint",
                                         "{out}/no/c"], r"--checkpoint .*no/c: folder"),
    ("train checkpoint holds one", ["train", "{g}", *W2, *TRAIN, "--checkpoint", "{ck}"],
     r"--checkpoint .*ck: holds a checkpoint already; continue it with --resume"),
    ("train resume missing", ["train", "{g}", *W2, *TRAIN, "--resume", "{out}/none"],
     r"--resume .*none: no such folder"),
    ("train resume not a checkpoint", ["train", "{g}", *W2, *TRAIN, "--resume", "{d}/empty"],
     r"--resume .*empty: no checkpoint\.json"),
    ("train resume broken index", ["train", "{g}", *W2, *TRAIN, "--resume", _broken_index],
     r"ck_bad_index/checkpoint\.json: not readable JSON"),
    ("train resume tampered state", ["train", "{g}", *W2, *TRAIN, "--resume", _tampered_state],
     r"state-000004\.npz: contents differ from the SHA-256"),
    ("train resume hidden differs", ["train", "{g}", *W2, *TRAIN, "--epochs", "6", "--resume",
                                     "{ck}", "--hidden", "9"],
     r"^shardtrain: error: --hidden: this run asks for 9, the checkpoint .* with 8"),
    ("train resume dtype differs", ["train", "{g}", *W2, *TRAIN, "--epochs", "6", "--resume",
                                    "{ck}", "--dtype", "float32"],
     r"--dtype: this run asks for 'float32'"),
    ("train resume workers differ", ["train", "{g}", "--workers", "3", "--method", "random",
                                     *TRAIN, "--epochs", "6", "--resume", "{ck}"],
     r"--workers: this run has 3 workers, the checkpoint .* written by 2"),
    ("train resume other graph", ["train", "{other}", *W2, *TRAIN, "--epochs", "6",
                                  "--resume", "{ck}"],
     r"other\.npz: a different graph from the checkpoint's"),
    ("train resume finished", ["train", "{g}", *W2, *TRAIN, "--resume", "{ck}"],
     r"--epochs 4: the checkpoint .* already at epoch 4"),
    ("train resume with init weights", ["train", "{g}", *W2, *TRAIN, "--resume", "{ck}",
                                        "--init-weights", "{w}"],
     r"--init-weights: not allowed with --resume"),
    ("train resume reference", ["train", "{g}", "--reference", *TRAIN, "--epochs", "6",
                                "--resume", "{ck}"],
     r"--resume .*ck: the checkpoint was written by a partitioned run, this is a reference"),
    ("train reference slow worker", ["train", "{g}", "--reference", *TRAIN, "--slow-worker",
                                     "0:2"], r"--slow-worker: not available with --reference"),
    ("train slow no colon", ["train", "{g}", *W2, *TRAIN, "--slow-worker", "1"],
     r"--slow-worker '1': expected W:FACTOR"),
    ("train slow factor", ["train", "{g}", *W2, *TRAIN, "--slow-worker", "1:0.5"],
     r"--slow-worker '1:0\.5': FACTOR must be a number >= 1"),
    ("train slow range", ["train", "{g}", *W2, *TRAIN, "--slow-worker", "5:2"],
     r"--slow-worker 5:2: worker 5 does not exist \(workers 0\.\.1\)"),
    ("train slow range shards", ["train", "{shards}", *TRAIN, "--slow-worker", "2:2"],
     r"--slow-worker 2:2: worker 2 does not exist"),
    ("train slow twice", ["train", "{g}", *W2, *TRAIN, "--slow-worker", "1:2",
                          "--slow-worker", "1:3"], r"worker 1 given twice"),
    ("train max-frame-bytes", ["train", "{g}", *W2, *TRAIN, "--max-frame-bytes", "0"],
     r"--max-frame-bytes '0': must be at least 1"),
    ("train timeout word", ["train", "{g}", *W2, *TRAIN, "--timeout", "soon"],
     r"--timeout 'soon': not a number"),
    ("train shards with method", ["train", "{shards}", *TRAIN, "--method", "random"],
     r"--method: not allowed with a shard directory"),
    ("train shards worker count", ["train", "{shards}", *TRAIN, "--workers", "3"],
     r"--workers 3: .*holds 2 shards"),
    ("train predictions suffix", ["train", "{g}", *W2, *TRAIN, "--predictions",
                                  "{out}/p.txt"], r"--predictions .*p\.txt: the file name"),
    # forecast
    ("forecast link", ["forecast", "{g}", "--workers", "2", "--method", "random",
                       "--link-gbps", "fast"], r"--link-gbps"),
    ("forecast latency", ["forecast", "{g}", "--workers", "2", "--method", "random",
                          "--latency-us", "-5"], r"--latency-us"),
    ("forecast cores", ["forecast", "{g}", "--workers", "2", "--method", "random",
                        "--cores", "0"], r"--cores"),
    ("forecast target", ["forecast", "{g}", "--workers", "2", "--method", "random",
                         "--target-epoch-s", "-1"], r"--target-epoch-s"),
    # forecast --calibration: refused before surveying or timing anything
    ("forecast calibration garbage", ["forecast", "{g}", *W2, "--calibration",
                                      "{d}/garbage.json", "--json", "{out}/f.json"],
     r"^shardtrain: error: --calibration .*garbage\.json:1: not valid JSON"),
    ("forecast calibration garbage, survey input",
     ["forecast", "{d}/survey.json", "--calibration", "{d}/garbage.json", "--json",
      "{out}/f.json"], r"--calibration .*garbage\.json:1: not valid JSON"),
    ("forecast calibration other JSON", ["forecast", "{g}", *W2, "--calibration",
                                         "{d}/unknown.json", "--json", "{out}/f.json"],
     r"--calibration .*unknown\.json:1: not a calibration file"),
    ("forecast calibration a survey JSON", ["forecast", "{g}", *W2, "--calibration",
                                           "{d}/survey.json", "--json", "{out}/f.json"],
     r"--calibration .*survey\.json:1: not a calibration file"),
    ("forecast calibration bad speed", ["forecast", "{g}", *W2, "--calibration",
                                        "{d}/cal_bad_speed.json", "--json", "{out}/f.json"],
     r"--calibration .*cal_bad_speed\.json:1: not a usable calibration: "
     r"key sparse\[0\]\.nnz_cols_per_s: must be a finite number > 0 \(got -1\.0\)"),
    ("forecast calibration no dense", ["forecast", "{g}", *W2, "--calibration",
                                       "{d}/cal_no_dense.json", "--json", "{out}/f.json"],
     r"--calibration .*cal_no_dense\.json:1: not a usable calibration: key sparse: must "
     r"have 1 to"),
    ("forecast calibration directory", ["forecast", "{g}", *W2, "--calibration",
                                        "{d}/empty", "--json", "{out}/f.json"],
     r"--calibration .*empty: is a directory"),
    ("forecast calibration folder missing", ["forecast", "{g}", *W2, "--calibration",
                                             "{out}/no/cal.json", "--json", "{out}/f.json"],
     r"--calibration.*folder .*no does not exist"),
    # report
    ("report missing", ["report", "{out}/none.json", "--html", "{out}/r.html"], r"none\.json"),
    ("report garbage", ["report", "{d}/garbage.json", "--html", "{out}/r.html"],
     r"garbage\.json"),
    ("report unknown kind", ["report", "{d}/unknown.json", "--html", "{out}/r.html"],
     r"unknown\.json"),
    # demo
    ("demo vertices", ["demo", "--out", "{out}/demo", "--vertices", "0"], r"--vertices"),
    ("demo workers", ["demo", "--out", "{out}/demo", "--workers", "zero"], r"--workers"),
    ("demo folder not empty", ["demo", "--quick", "--out", _full_demo_folder], r"demo_out"),
]


def _argv(template, d, out) -> list[str]:
    names = {"g": d / "g.npz", "other": d / "other.npz", "shards": d / "shards",
             "ck": d / "ck", "w": d / "w.npz", "d": d, "out": out}
    return [str(a(d, out)) if callable(a) else a.format(**names) for a in template]


def _listing(folder) -> list[str]:
    return sorted(str(p.relative_to(folder)) for p in folder.rglob("*"))


@pytest.mark.parametrize("case", CASES, ids=[c[0] for c in CASES])
def test_bad_input_is_one_line_and_exit_2(inputs, tmp_path, capsys, case):
    _, template, pattern = case
    out = tmp_path / "out"
    out.mkdir()
    argv = _argv(template, inputs, out)
    before_inputs, before_out = _listing(inputs), _listing(out)
    capsys.readouterr()
    code = main(argv)
    err = capsys.readouterr().err
    lines = err.strip().splitlines()
    assert code == 2, err
    assert len(lines) == 1, err
    assert "Traceback" not in err
    assert re.search(pattern, lines[0]), lines[0]
    assert _listing(out) == before_out, "output left behind"
    assert _listing(inputs) == before_inputs, "inputs changed"


def test_at_least_thirty_distinct_cases():
    assert len({c[0] for c in CASES}) == len(CASES) >= 30


def test_a_calibration_cache_is_kept_replaced_or_refused(inputs, tmp_path):
    """--calibration semantics: missing -> time and write; ours for this dtype -> used;
    ours for another dtype or version -> re-timed and replaced; anything else refused
    (the cases above). The calibration is a dict of our own making (no outside source)."""
    from shardtrain.forecast.calibrate import from_flops, read_calibration

    assert read_calibration(tmp_path / "new.json", "float32") is None
    cal = dict(from_flops(1e9, "float32"), pipe={"bytes_per_s": 1e9})
    cal["sparse"][0]["nnz_cols_per_s"] = 5e8
    (tmp_path / "cal.json").write_text(json.dumps(cal))
    assert read_calibration(tmp_path / "cal.json", "float32") == cal
    assert read_calibration(tmp_path / "cal.json", "float64") is None
    (tmp_path / "old.json").write_text(json.dumps(dict(cal, version=CALIBRATION_VERSION + 1,
                                                       sparse=None)))
    assert read_calibration(tmp_path / "old.json", "float32") is None
    # A version-1 cache (written before the copying cost was timed) is re-timed, not used.
    v1 = {k: v for k, v in cal.items() if k != "transport_copy"}
    (tmp_path / "v1.json").write_text(json.dumps(dict(v1, version=1)))
    assert CALIBRATION_VERSION == 3
    assert read_calibration(tmp_path / "v1.json", "float32") is None
    # A version-2 cache (written before the roofs were measured) is re-timed, not used.
    v2 = {k: v for k, v in cal.items() if k != "roofline"}
    (tmp_path / "v2.json").write_text(json.dumps(dict(v2, version=2)))
    assert read_calibration(tmp_path / "v2.json", "float32") is None
    # ... while a version-3 file without them is refused as not usable
    (tmp_path / "v3.json").write_text(json.dumps(v2))
    with pytest.raises(ParameterError, match="roofline"):
        read_calibration(tmp_path / "v3.json", "float32")
