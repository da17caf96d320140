"""Train every combination of halo schemes and compare them with the exact one.

`shardtrain sweep GRAPH --workers K --method M --halo-keep 1,0.3,0.1 --halo-format
float32,int8 --epochs N` trains each (keep, format) in turn over worker processes (the
exact scheme first) and prints one table: measured halo payload per training epoch,
measured epoch time (median), final test accuracy and test accuracy at the best
validation epoch, each relative to the exact scheme (payload and time as ratios,
accuracies in points). `--emulate-link G:L` trains over an emulated link; `--json` writes
the rows, `--plot DIR` accuracy and epoch time against traffic.
"""
from __future__ import annotations

import sys

from shardtrain import defaults
from shardtrain.cli.common import (
    add_graph_arguments,
    float_type,
    parse_name_list,
    positive_int_type,
)
from shardtrain.errors import InputError
from shardtrain.files import check_paths, write_json_atomic
from shardtrain.report.tables import format_table
from shardtrain.train import api
from shardtrain.train.settings import DTYPES, TrainSettings
from shardtrain.units import human_bytes


def add_arguments(parser) -> None:
    add_graph_arguments(parser)
    add = parser.add_argument
    add("--workers", type=positive_int_type("--workers"), metavar="K",
        help="partition GRAPH into K shards (one worker process each)")
    split = parser.add_mutually_exclusive_group()
    split.add_argument("--method", metavar="M", help="partition method (with --workers)")
    split.add_argument("--assignment", metavar="FILE", help="vertex -> worker file instead")
    add("--halo-keep", default=defaults.listed((defaults.HALO_KEEP,)), metavar="P,P,...",
        help="fractions of halo vertices kept per epoch to compare (0 < P <= 1; default "
             f"{defaults.HALO_KEEP:g})")
    add("--halo-format", default=None, metavar="F,F,...",
        help="wire formats of training halo rows to compare (float32, float16, bfloat16, "
             "int8; default: the training dtype, exact)")
    add("--halo-stale", default=None, metavar="off,on",
        help="synchronous (off) and/or stale halos with an overlapped exchange (on) to "
             "compare (default: off)")
    add("--epochs", type=positive_int_type("--epochs"), default=defaults.EPOCHS,
        help=f"training epochs of every run (default {defaults.EPOCHS})")
    add("--layers", type=positive_int_type("--layers"), default=defaults.LAYERS,
        help=f"GCN layers (default {defaults.LAYERS})")
    add("--hidden", type=positive_int_type("--hidden"), default=defaults.HIDDEN,
        help=f"hidden width (default {defaults.HIDDEN})")
    add("--dropout", type=float_type("--dropout"), default=defaults.DROPOUT,
        help=f"dropout rate (default {defaults.DROPOUT})")
    add("--lr", type=float_type("--lr"), default=defaults.LR,
        help=f"Adam learning rate (default {defaults.LR})")
    add("--dtype", default=defaults.DTYPE,
        help=f"{' or '.join(DTYPES)} (default {defaults.DTYPE})")
    add("--imbalance", type=float_type("--imbalance"), default=defaults.IMBALANCE,
        help=f"allowed partition imbalance (default {defaults.IMBALANCE:g})")
    add("--emulate-link", metavar="GBPS[:LATENCY_US]",
        help="train every run over an emulated link of this bandwidth and latency")
    add("--timeout", type=float_type("--timeout"), default=defaults.TIMEOUT_S, metavar="S",
        help=f"deadline of every receive (default {defaults.TIMEOUT_S:g})")
    add("--json", metavar="OUT", help="write the sweep as JSON")
    add("--plot", metavar="DIR", help="write PNG pictures (accuracy and epoch time against "
                                      "halo payload) to DIR")
    add("--quiet", action="store_true", help="print only the table")


def _keeps(text: str) -> list[float]:
    out = []
    for item in parse_name_list(text, "--halo-keep"):
        try:
            out.append(float(item))
        except ValueError:
            raise InputError(f"--halo-keep {item!r}: not a number") from None
    return out


def _formats(text: str | None, dtype: str) -> list[str | None]:
    if text is None:
        return [None]
    return [None if f == dtype else f for f in parse_name_list(text, "--halo-format")]


STALE_WORDS = {"off": False, "on": True}


def _stales(text: str | None) -> list[bool]:
    if text is None:
        return [defaults.HALO_STALE]
    out = []
    for item in parse_name_list(text, "--halo-stale"):
        if item not in STALE_WORDS:
            raise InputError(f"--halo-stale {item!r}: expected off or on")
        out.append(STALE_WORDS[item])
    return list(dict.fromkeys(out))


def axes_of(args) -> dict[str, list]:
    axes: dict[str, list] = {
        "halo_keep": _keeps(args.halo_keep),
        "halo_format": list(dict.fromkeys(_formats(args.halo_format, args.dtype)))}
    if args.halo_stale is not None:
        axes["halo_stale"] = _stales(args.halo_stale)
    return axes


def config_of(args) -> api.RunConfig:
    link = None
    if args.emulate_link is not None:
        from shardtrain.transport.link import parse_link
        link = parse_link(args.emulate_link, "link")
    settings = TrainSettings(layers=args.layers, hidden=args.hidden, dropout=args.dropout,
                             lr=args.lr, epochs=args.epochs, seed=args.seed, dtype=args.dtype)
    return api.RunConfig(source=args.graph, settings=settings, features=args.features,
                         labels=args.labels, input_dim=args.input_dim, workers=args.workers,
                         method=args.method, assignment=args.assignment,
                         imbalance=args.imbalance, timeout_s=args.timeout, link=link)


TABLE_COLUMNS = [
    ("scheme", "scheme", None),
    ("payload", "halo/epoch", human_bytes),
    ("payload_ratio", "x exact", "{:.3f}"),
    ("epoch_s", "epoch s", "{:.4f}"),
    ("epoch_ratio", "x exact", "{:.3f}"),
    ("final", "test acc", "{:.3f}"),
    ("final_points", "pts", "{:+.1f}"),
    ("best", "test @ best val", "{:.3f}"),
    ("best_points", "pts", "{:+.1f}"),
    ("exact_bytes", "measured = predicted", None),
]


def table_rows(doc: dict) -> list[dict]:
    from shardtrain.report.plots import scheme_label

    return [{"scheme": scheme_label(r["scheme"]), "payload": r["halo_payload_per_epoch"],
             "payload_ratio": r["halo_payload_ratio"], "epoch_s": r["epoch_s"],
             "epoch_ratio": r["epoch_s_ratio"], "final": r["final_test_acc"],
             "final_points": r["final_test_acc_points"], "best": r["test_acc_at_best_val"],
             "best_points": r["test_acc_at_best_val_points"],
             "exact_bytes": "yes" if r["payload_equals_prediction"] else "NO"}
            for r in doc["rows"]]


def run(args) -> int:
    from shardtrain.train.sweep import combinations, sweep

    axes = axes_of(args)
    config = config_of(args)
    check_paths(inputs={"GRAPH": args.graph, "--features": args.features,
                        "--labels": args.labels, "--assignment": args.assignment},
                outputs={"--json": args.json}, out_dirs={"--plot": args.plot})
    if args.plot is not None:
        from shardtrain.report.plots import check_plot_dir
        check_plot_dir(args.plot)
    from dataclasses import replace
    for combo in combinations(axes):              # every value checked before any training
        settings = replace(config.settings, **combo).validate()
        api.check_config(replace(config, settings=settings))

    def line(row: dict) -> None:
        if not args.quiet:
            from shardtrain.report.plots import scheme_label
            print(f"  trained {scheme_label(row['scheme'])}: halo "
                  f"{human_bytes(row['halo_payload_per_epoch'])}/epoch, test "
                  f"{row['final_test_acc']:.3f}", file=sys.stderr, flush=True)

    doc = sweep(config, axes, on_run=line)
    doc["method"] = args.method or "assignment"
    if args.emulate_link is not None:
        doc["emulated_link"] = args.emulate_link
    print(format_table(table_rows(doc), TABLE_COLUMNS))
    if args.json:
        write_json_atomic(args.json, doc)
    if args.plot:
        from shardtrain.report.plots import sweep_plots
        sweep_plots(doc, args.plot)
    return 0
