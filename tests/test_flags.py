"""Library errors name their parameter; the command line words them with its option.

`shardtrain.errors.ParameterError` carries the Python parameter; `shardtrain.cli.flags.FLAGS`
is the one table from parameter to option. Checked here: every parameter the library raises
about is in the table (or deliberately in `NOT_OPTIONS`), library messages no longer spell
flags, and the CLI's words for a few cases are today's, exactly (common practice: a
message a user may script against does not change under a refactor).
"""
from __future__ import annotations

import ast
import pickle
from pathlib import Path

import pytest

from shardtrain.cli import main
from shardtrain.cli.flags import FLAGS, NOT_OPTIONS, cli_message, flag_of
from shardtrain.errors import (
    InputError,
    Interrupted,
    ParameterError,
    RunError,
    marked,
    name_parameter,
    naming,
    option,
)
from shardtrain.train.settings import TrainSettings

PACKAGE = Path(__file__).resolve().parents[1] / "shardtrain"

# modules that still word their messages with flags (to move to ParameterError): none;
# nothing below cli/ may start an error message with "--"
NOT_YET_MOVED: set[str] = set()


def _library_modules():
    for path in sorted(PACKAGE.rglob("*.py")):
        rel = path.relative_to(PACKAGE).as_posix()
        if not rel.startswith(("cli/", "testing/")):
            yield rel, ast.parse(path.read_text(), filename=str(path))


def _name(func) -> str:
    return func.id if isinstance(func, ast.Name) else getattr(func, "attr", "")


def _const(node):
    return node.value if isinstance(node, ast.Constant) and isinstance(node.value, str) else None


def _raised_params() -> set[str]:
    """Every parameter name the library passes to ParameterError, directly or through its
    small helpers (`need(ok, "name", ...)`, `_check_positive("name", ...)`, a tuple
    `("name", ...)` in a list of checks, a `param="name"` default)."""
    found: set[str] = set()
    for _, tree in _library_modules():
        for node in ast.walk(tree):
            if isinstance(node, ast.Call):
                name = _name(node.func)
                args = node.args
                if name == "ParameterError" and args and _const(args[0]):
                    found.add(_const(args[0]))
                elif name == "need" and len(args) > 1 and _const(args[1]):
                    found.add(_const(args[1]))
                elif name in ("_check_positive", "name_parameter", "option") and args:
                    arg = args[1] if name == "name_parameter" else args[0]
                    if _const(arg):
                        found.add(_const(arg))
            elif isinstance(node, ast.arguments):
                pos = node.posonlyargs + node.args
                for arg, default in zip(pos[len(pos) - len(node.defaults):], node.defaults):
                    if arg.arg == "param" and _const(default):
                        found.add(_const(default))
                for arg, default in zip(node.kwonlyargs, node.kw_defaults):
                    if arg.arg == "param" and default is not None and _const(default):
                        found.add(_const(default))
    # checkpoint.check_resumable raises about each recorded training setting by its name
    found |= {f for f in TrainSettings().to_dict()}
    return found


def test_every_parameter_the_library_names_has_an_option_or_is_declared_not_one():
    raised = _raised_params()
    assert len(raised) > 30              # the scan found the raise sites at all
    missing = sorted(p for p in raised if p not in FLAGS and p not in NOT_OPTIONS)
    assert missing == []
    assert not set(FLAGS) & NOT_OPTIONS
    assert all(flag.startswith("--") for flag in FLAGS.values())


_ERRORS = ("InputError", "ParameterError", "RunError", "Interrupted", "ValueError", "refuse",
           "_fail", "_Bad")


def _message_texts(tree):
    """Every literal piece of text of the error messages raised in a module."""
    for node in ast.walk(tree):
        if isinstance(node, ast.Call) and _name(node.func) in _ERRORS:
            for arg in node.args[:3]:
                for piece in ast.walk(arg):
                    text = _const(piece)
                    if text is not None:
                        yield node.lineno, text


def _spells_a_flag(text: str) -> bool:
    return text.startswith("--") or " --" in text or "(--" in text


def test_library_messages_spell_no_flag():
    found = [f"{rel}:{line}: {text!r}" for rel, tree in _library_modules()
             if rel not in NOT_YET_MOVED for line, text in _message_texts(tree)
             if _spells_a_flag(text)]
    assert found == []


def test_the_scan_sees_a_flag_worded_message(tmp_path):
    # the check above can fail: it flags a module written the old way
    tree = ast.parse('raise InputError(f"--method {m!r}: unknown; give --seed")')
    assert [t for _, t in _message_texts(tree) if _spells_a_flag(t)] == [
        "--method ", ": unknown; give --seed"]


def test_parameter_error_words():
    exc = ParameterError("method", "unknown; expected one of metis", value=repr("x"))
    assert str(exc) == "method 'x': unknown; expected one of metis"
    assert cli_message(exc) == "--method 'x': unknown; expected one of metis"
    both = ParameterError("input_dim", "the graph has no features", also=("classes",))
    assert str(both) == "input_dim, classes: the graph has no features"
    assert cli_message(both) == "--input-dim, --classes: the graph has no features"
    mid = ParameterError("features", "file type '.x'", prefix="f.x: unknown ", sep=" ")
    assert cli_message(mid) == "f.x: unknown --features file type '.x'"
    hint = RunError(f"try another {option('seed')} or method")
    assert (str(hint), cli_message(hint)) == ("try another seed or method",
                                              "try another --seed or method")
    unknown = ParameterError("not_a_param", "text")
    assert cli_message(unknown) == "not_a_param: text"
    assert cli_message(InputError("g.txt:3: bad")) == "g.txt:3: bad"
    again = pickle.loads(pickle.dumps(both))     # crosses a process boundary intact
    assert (type(again), again.params, str(again)) == (ParameterError, both.params, str(both))


def test_while_the_cli_runs_str_names_the_option():
    # a message passed on as text (MPI rank 0 sends str(exc) to the printing rank) keeps the
    # option's name: cli.main runs each command inside errors.naming(flags.flag_of)
    exc = ParameterError("dropout", "must be a number in [0, 1) (got 1.5)")
    with naming(flag_of):
        assert str(exc) == "--dropout: must be a number in [0, 1) (got 1.5)"
    assert str(exc) == "dropout: must be a number in [0, 1) (got 1.5)"


def test_name_parameter_rewords_only_its_own_head():
    exc = name_parameter(InputError("calibration c.json:1: not JSON"), "calibration", "c.json")
    assert isinstance(exc, ParameterError)
    assert cli_message(exc) == "--calibration c.json:1: not JSON"
    other = InputError("c.json: cannot read")
    assert name_parameter(other, "calibration", "c.json") is other


@pytest.mark.parametrize("argv,expected", [
    # today's exact lines (each reaches a library ParameterError)
    (["train", "G", "--reference", "--dropout", "1.5"],
     "--dropout: must be a number in [0, 1) (got 1.5)"),
    (["train", "G", "--reference", "--lr", "0"], "--lr: must be a number > 0 (got 0.0)"),
    (["train", "G", "--workers", "2", "--method", "range", "--emulate-link", "x"],
     "--emulate-link: expected GBPS[:LATENCY_US] such as 10 or 0.1:50, got 'x'"),
    (["demo", "--vertices", "3", "--out", "OUT"], "--vertices 3: must be an integer >= 200"),
])
def test_cli_words_library_errors_as_before(tmp_path, capsys, argv, expected):
    from helpers import depot_graph, save_graph

    graph = tmp_path / "g.npz"
    save_graph(graph, depot_graph())
    argv = [str(graph) if a == "G" else str(tmp_path / "o") if a == "OUT" else a
            for a in argv]
    assert main(argv) == 2
    assert capsys.readouterr().err == f"shardtrain: error: {expected}\n"


def test_the_scan_sees_interrupted_and_value_errors():
    tree = ast.parse('raise Interrupted("run it again with --resume " + d)\n'
                     'raise ValueError("--early-stop: no validation vertices")')
    assert [t for _, t in _message_texts(tree) if _spells_a_flag(t)] == [
        "run it again with --resume ", "--early-stop: no validation vertices"]


def test_a_worker_processes_error_keeps_its_parameter_for_the_coordinators_reader():
    # a pipes worker runs outside cli.main's naming: it sends its message with the mentions
    # still marked, and the coordinator's RunError words them as the CLI does
    exc = ParameterError("early_stop", "the graph has no validation vertices")
    sent = f"worker 1 failed during epoch 1: ParameterError: {marked(exc)}"
    assert cli_message(RunError(sent)) == (
        "worker 1 failed during epoch 1: ParameterError: --early-stop: the graph has no "
        "validation vertices")
    assert str(RunError(sent)).endswith("ParameterError: early_stop: the graph has no "
                                        "validation vertices")
    assert marked(ValueError("plain")) == "plain"
    stopped = Interrupted(f"run the same command with {option('resume')} ck to continue")
    with naming(flag_of):
        assert str(stopped) == "run the same command with --resume ck to continue"
    assert str(stopped) == "run the same command with resume ck to continue"


@pytest.mark.parametrize("changes,param,text", [
    # the library's words name RunConfig fields and run()'s transport
    ({"workers": 0, "method": "range"}, "workers", "workers 0: must be at least 1"),
    ({"timeout_s": 0.0, "mode": "reference"}, "timeout_s",
     "timeout_s 0: must be a number of seconds > 0"),
    ({"mode": "reference", "slow_workers": {0: 2.0}}, "slow_workers",
     "slow_workers: not available with reference (partitioned runs only)"),
    ({}, "workers", "workers: give workers K with method M, assignment FILE, or reference"),
    ({"workers": 2, "method": "range", "checkpoint_every": 5}, "checkpoint_every",
     "checkpoint_every: give checkpoint DIR as well"),
])
def test_run_config_errors_name_the_field(tmp_path, changes, param, text):
    from helpers import depot_graph, save_graph

    from shardtrain.train.api import RunConfig, check_config

    graph = tmp_path / "g.npz"
    save_graph(graph, depot_graph())
    with pytest.raises(ParameterError) as info:
        check_config(RunConfig(source=str(graph), **changes))
    assert info.value.param == param and str(info.value).startswith(text)
    assert "--" not in str(info.value)


def test_run_names_its_transport(tmp_path):
    from shardtrain.train.api import RunConfig, check_config

    with pytest.raises(ParameterError) as info:
        check_config(RunConfig(source=str(tmp_path)), transport="sockets")
    assert cli_message(info.value) == "--transport 'sockets': expected one of pipes, mpi"
