"""Command line: `shardtrain <command> ...`. Each command lives in its own module here with
`add_arguments(parser)` and `run(args) -> int`. This package is the only place that prints
or exits; everything below it raises `shardtrain.errors` exceptions.
"""
from __future__ import annotations

import argparse
import importlib
import sys

from shardtrain.errors import (EXIT_BAD_INPUT, EXIT_INTERRUPTED, EXIT_RUN_FAILED,
                               InputError, Interrupted, RunError)

# command name -> module under shardtrain.cli, in the order `--help` lists them
COMMANDS = {
    "demo": "demo",
    "synth": "synth",
    "split": "split",
    "survey": "survey",
    "train": "train",
    "forecast": "forecast",
    "report": "report",
}


class _Parser(argparse.ArgumentParser):
    """argparse that reports a bad option as one line and exit status 2."""

    def error(self, message):  # noqa: D401 - argparse hook
        raise InputError(f"{self.prog}: {message}")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="shardtrain", description=__doc__.splitlines()[0])
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    sub.required = True
    for name, module_name in COMMANDS.items():
        try:
            module = importlib.import_module(f"shardtrain.cli.{module_name}")
        except ModuleNotFoundError as exc:
            if exc.name != f"shardtrain.cli.{module_name}":
                raise
            continue  # command not built yet
        p = sub.add_parser(name, help=module.__doc__.strip().splitlines()[0],
                           description=module.__doc__)
        module.add_arguments(p)
        p.set_defaults(_run=module.run)
    return parser


def main(argv: list[str] | None = None) -> int:
    from shardtrain.files import finish_outputs

    code = 1
    try:
        code = _main(argv)
    finally:   # a failed command leaves no empty output folder it created
        finish_outputs(failed=code != 0)
    return code


def _main(argv: list[str] | None) -> int:
    try:
        args = build_parser().parse_args(argv)
        return int(args._run(args) or 0)
    except InputError as exc:
        print(f"shardtrain: error: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except RunError as exc:
        print(f"shardtrain: run failed: {exc}", file=sys.stderr)
        return EXIT_RUN_FAILED
    except Interrupted as exc:
        print(f"shardtrain: interrupted: {exc}", file=sys.stderr)
        return EXIT_INTERRUPTED
    except KeyboardInterrupt:
        print("shardtrain: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED


if __name__ == "__main__":
    sys.exit(main())
