# Command line: `shardtrain <command> ...`. Each command lives in its own module here with
# `add_arguments(parser)` and `run(args) -> int`. This package is the only place that prints
# or exits; everything below it raises `shardtrain.errors` exceptions.
from __future__ import annotations

import argparse
import importlib
import sys

from shardtrain.errors import (
    EXIT_BAD_INPUT,
    EXIT_INTERRUPTED,
    EXIT_RUN_FAILED,
    InputError,
    Interrupted,
    RunError,
)

# command name -> module under shardtrain.cli, in the order `--help` lists them
COMMANDS = {
    "demo": "demo",
    "synth": "synth",
    "ingest": "ingest",
    "survey": "survey",
    "split": "split",
    "train": "train",
    "forecast": "forecast",
    "sweep": "sweep",
    "report": "report",
}


# what `shardtrain --help` tells a user (pre-wrapped: argparse would join the lines)
DESCRIPTION = """\
Plan and check partitioned training of a graph neural network (a GCN) before you pay for a
cluster. shardtrain splits a graph into shards with halo vertices, predicts every plan's
per-worker memory and network traffic, trains for real with one process per worker on this
machine (exchanging halo rows at every layer, forward and backward, and all-reducing the
gradients), proves the result equals single-process training and the bytes sent equal the
prediction, and forecasts the epoch time on the link speed and CPUs you describe.

Workflow: try `shardtrain demo` first (the whole workflow on an invented parcel-delivery
network, one HTML page). Then, on your graph: synth (a demo graph; or bring your own .npz,
.mtx or edge-list file) -> survey -> split -> train -> forecast -> report. A graph larger
than memory: ingest (edge files or Parquet into a memory-mapped graph directory, which every
command takes) -> survey -> split -> train under MPI.
`shardtrain COMMAND --help` describes each command.
"""


class _Parser(argparse.ArgumentParser):
    """argparse that reports a bad option as one line and exit status 2."""

    def error(self, message):  # noqa: D401 - argparse hook
        raise InputError(f"{self.prog}: {message}")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="shardtrain", description=DESCRIPTION,
                     formatter_class=argparse.RawDescriptionHelpFormatter)
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    sub.required = True
    for name, module_name in COMMANDS.items():
        try:
            module = importlib.import_module(f"shardtrain.cli.{module_name}")
        except ModuleNotFoundError as exc:
            if exc.name != f"shardtrain.cli.{module_name}":
                raise
            continue  # command not built yet
        assert module.__doc__ is not None   # every command module's docstring is its help
        p = sub.add_parser(name, help=module.__doc__.strip().splitlines()[0],
                           description=module.__doc__)
        module.add_arguments(p)
        p.set_defaults(_run=module.run)
    return parser


def main(argv: list[str] | None = None) -> int:
    from shardtrain.cli.flags import flag_of
    from shardtrain.errors import naming
    from shardtrain.files import finish_outputs

    code = 1
    try:
        with naming(flag_of):   # every error names its parameters as options (cli/flags.py)
            code = _main(argv)
    finally:   # a failed command leaves no empty output folder it created
        finish_outputs(failed=code != 0)
    return code


def _main(argv: list[str] | None) -> int:
    try:
        args = build_parser().parse_args(argv)
        return int(args._run(args) or 0)
    except InputError as exc:   # parameters named as options (cli/flags.py)
        from shardtrain.cli.flags import cli_message
        print(f"shardtrain: error: {cli_message(exc)}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except RunError as exc:
        from shardtrain.cli.flags import cli_message
        print(f"shardtrain: run failed: {cli_message(exc)}", file=sys.stderr)
        return EXIT_RUN_FAILED
    except Interrupted as exc:
        print(f"shardtrain: interrupted: {exc}", file=sys.stderr)
        return EXIT_INTERRUPTED
    except KeyboardInterrupt:
        print("shardtrain: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED


if __name__ == "__main__":
    sys.exit(main())
