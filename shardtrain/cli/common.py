"""Options shared by the commands: the GRAPH argument with its vertex-data files, and
comma-separated lists of numbers or names."""
from __future__ import annotations

import argparse
import re
import sys

from shardtrain import defaults
from shardtrain.data.readers import LoadedGraph, load_graph
from shardtrain.errors import InputError
from shardtrain.units import parse_size


def add_graph_arguments(parser: argparse.ArgumentParser) -> None:
    """GRAPH, --features, --labels, --input-dim, --seed."""
    parser.add_argument("graph", metavar="GRAPH",
                        help="graph file: .npz bundle, .mtx, or edge list (.csv .tsv .txt "
                             ".edges); or a graph directory written by `shardtrain ingest`")
    parser.add_argument("--features", metavar="FILE",
                        help="vertex features, .npy or .csv (one row per vertex)")
    parser.add_argument("--labels", metavar="FILE",
                        help="vertex labels, .npy or text with one integer per line (-1 = none)")
    parser.add_argument("--input-dim", metavar="D", type=positive_int_type("--input-dim"),
                        help="feature width to plan for when the graph has no features")
    parser.add_argument("--seed", metavar="S", type=seed_type("--seed"), default=defaults.SEED,
                        help=f"seed of the split masks the graph file does not give, the "
                             f"seeded partition methods, the weights and dropout "
                             f"(default {defaults.SEED})")


def add_plan_shape_arguments(parser: argparse.ArgumentParser) -> None:
    """The model shape and partition options a survey or forecast plans for (not trained)."""
    add = parser.add_argument
    d = defaults
    add("--model", default=d.MODEL, metavar="NAME",
        help=f"message-passing model: gcn, sage, gin, gat (default {d.MODEL})")
    add("--heads", type=int_type("--heads"), default=d.HEADS, metavar="K",
        help=f"attention heads per hidden layer of --model gat (default {d.HEADS})")
    add("--layers", type=positive_int_type("--layers"), default=d.LAYERS,
        help=f"layers (default {d.LAYERS})")
    add("--hidden", type=positive_int_type("--hidden"), default=d.HIDDEN,
        help=f"hidden width (default {d.HIDDEN})")
    add("--dtype", default=d.DTYPE, help=f"training dtype, float32 or float64 (default {d.DTYPE})")
    add("--bias", action="store_true", help="the model has biases (more to all-reduce)")
    add("--classes", type=positive_int_type("--classes"), default=None, metavar="C",
        help="number of classes, when the graph has no labels")
    add("--imbalance", type=float_type("--imbalance"), default=d.IMBALANCE,
        help=f"METIS load imbalance tolerance ({d.IMBALANCE:g})")


def load_graph_from_args(args: argparse.Namespace) -> LoadedGraph:
    return load_graph(args.graph, features=args.features, labels=args.labels,
                      input_dim=args.input_dim, seed=args.seed)


MIN_MEMORY_BUDGET = 64 << 10      # below this no pass has room for a useful chunk


def memory_budget_type(option: str = "--memory-budget"):
    """An argparse `type=` for a memory budget: a size of at least 1 MiB, at most the
    memory this process can count on."""
    def convert(text: str) -> int:
        from shardtrain.data.memory import memory_limit

        value = parse_size(text, option)
        if value < MIN_MEMORY_BUDGET:
            raise InputError(f"{option} {text!r}: must be at least 64K")
        limit, said = memory_limit()
        if value > limit:
            raise InputError(f"{option} {text!r}: more than the memory there is ({said})")
        return value
    return convert


def add_memory_budget_argument(parser: argparse.ArgumentParser, help: str | None = None
                               ) -> None:
    """--memory-budget SIZE (default None: `data.memory.default_memory_budget`, a quarter
    of physical memory), for every command that streams; parsed by `units.parse_size`."""
    parser.add_argument("--memory-budget", metavar="SIZE", type=memory_budget_type(),
                        default=None,
                        help=help or "working memory to stay within, e.g. 512M or 4G "
                                     "(default: a quarter of this machine's memory)")


def int_type(option: str):
    """An argparse `type=` that turns bad text into an InputError naming the option."""
    def convert(text: str) -> int:
        try:
            return int(text)
        except ValueError:
            raise InputError(f"{option} {text!r}: not an integer") from None
    return convert


# the partitioners (pymetis, fennel's and the split's numpy generators, the random
# method's int64 hash key), the dropout stream and MPI's msgpack messages all take a seed
# up to a signed 64-bit integer (checked in every mode by tests/test_runtime_promises.py)
SEED_MAX = 2**63 - 1


def seed_type(option: str):
    """An integer seed in [0, 2**63 - 1], the range every consumer of --seed takes."""
    as_int = int_type(option)

    def convert(text: str) -> int:
        value = as_int(text)
        if not 0 <= value <= SEED_MAX:
            raise InputError(f"{option} {text!r}: must be an integer from 0 to 2**63 - 1")
        return value
    return convert


def positive_int_type(option: str):
    as_int = int_type(option)

    def convert(text: str) -> int:
        value = as_int(text)
        if value < 1:
            raise InputError(f"{option} {text!r}: must be at least 1")
        return value
    return convert


def float_type(option: str):
    """An argparse `type=` for numbers, with an InputError naming the option."""
    def convert(text: str) -> float:
        try:
            return float(text)
        except ValueError:
            raise InputError(f"{option} {text!r}: not a number") from None
    return convert


def parse_int_list(text: str, option: str) -> list[int]:
    """'2,4,8' -> [2, 4, 8]; spaces allowed, duplicates kept in order given."""
    parts = [p.strip() for p in str(text).split(",")]
    if not parts or any(not p for p in parts):
        raise InputError(f"{option} {text!r}: expected comma-separated integers, e.g. 2,4,8")
    try:
        return [int(p) for p in parts]
    except ValueError:
        bad = next(p for p in parts if not re.fullmatch(r"[+-]?\d+", p))
        raise InputError(f"{option} {text!r}: {bad!r} is not an integer") from None


def parse_name_list(text: str, option: str) -> list[str]:
    """'metis,random' -> ['metis', 'random']; names are [A-Za-z0-9_.-]+."""
    parts = [p.strip() for p in str(text).split(",")]
    if not parts or any(not p for p in parts):
        raise InputError(f"{option} {text!r}: expected comma-separated names, e.g. metis,random")
    for p in parts:
        if not re.fullmatch(r"[A-Za-z0-9_.\-]+", p):
            raise InputError(f"{option} {text!r}: {p!r} is not a valid name")
    return parts


# earlier private names, still imported by some commands
_int = int_type
_positive_int = positive_int_type


class _Bar:
    """A named tqdm bar on a terminal (stderr a tty); nothing otherwise."""

    def __init__(self, name: str, total: int, unit: str):
        from tqdm import tqdm

        self.bar = tqdm(total=total or None, desc=name, unit=unit, unit_scale=True,
                        file=sys.stderr, leave=False)

    def update(self, k: int) -> None:
        self.bar.update(k)

    def close(self) -> None:
        self.bar.close()


def terminal_progress():
    """A progress factory (name, total, unit) -> bar for the long passes: named tqdm bars
    when stderr is a terminal, nothing otherwise."""
    from shardtrain.data.ingest import no_progress

    return _Bar if sys.stderr.isatty() else no_progress


def add_scheme_arguments(parser: argparse.ArgumentParser) -> None:
    """--halo-keep and --halo-format (`plan.schemes.HaloScheme`; checked by the library)."""
    from shardtrain.plan.schemes import FORMATS

    parser.add_argument("--halo-keep", type=float_type("--halo-keep"),
                        default=defaults.HALO_KEEP, metavar="P",
                        help="boundary-node sampling (Wan et al., BNS-GCN, MLSys 2022): each "
                             "epoch every worker keeps a random fraction P of its halo "
                             "vertices, 0 < P <= 1, and only their rows cross the wire in "
                             "training; evaluation uses the full halo (default "
                             f"{defaults.HALO_KEEP:g}: every row)")
    parser.add_argument("--halo-format", metavar="F", default=defaults.HALO_FORMAT,
                        help=f"wire format of training halo rows: {', '.join(FORMATS)} "
                             "(int8: a float32 scale per row, stochastic rounding); default: "
                             "the training dtype (exact)")
    parser.add_argument("--halo-stale", action="store_true",
                        help="stale halos with an overlapped exchange (Wan et al., PipeGCN, "
                             "ICLR 2022): epoch t uses the halo rows and gradients of epoch "
                             "t-1, so each epoch's exchange runs while the next computes; "
                             "epoch 1 exchanges synchronously")
    parser.add_argument("--halo-smooth", type=float_type("--halo-smooth"),
                        default=defaults.HALO_SMOOTH, metavar="GAMMA",
                        help="with --halo-stale: use a moving average of the stale rows, "
                             "U = GAMMA U + (1 - GAMMA) rows, 0 <= GAMMA < 1 (default "
                             f"{defaults.HALO_SMOOTH:g}: none)")


def scheme_settings(args: argparse.Namespace) -> dict:
    """The settings fields of the scheme options."""
    return {"halo_keep": args.halo_keep, "halo_format": args.halo_format,
            "halo_stale": bool(args.halo_stale), "halo_smooth": args.halo_smooth}
