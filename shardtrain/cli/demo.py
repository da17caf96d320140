"""Run the whole workflow on an invented parcel-delivery network and write an HTML report.

Synthesizes the network (depots, truck routes, depot roles), surveys every partition method
on 2, 4 and 8 workers, trains the plan with the least traffic on --workers worker processes
in float64, checks it against single-process training (loss of every epoch and final
weights to a relative 1e-9; measured payload == predicted, byte for byte), forecasts epoch
times at 1 and 10 Gbit/s, and writes everything to --out with report.html on top.
"""
from __future__ import annotations

import sys

from shardtrain import defaults as d
from shardtrain.cli.common import int_type
from shardtrain.demo.workflow import DemoSettings, run_demo
from shardtrain.units import human_bytes, human_seconds


def add_arguments(parser) -> None:
    parser.add_argument("--out", metavar="DIR", default=d.DEMO_OUT,
                        help=f"output folder (default ./{d.DEMO_OUT}); must be new or empty")
    parser.add_argument("--vertices", metavar="N", type=int_type("--vertices"), default=None,
                        help=f"depots in the network (default {d.DEMO_VERTICES:,}; "
                             f"--quick {d.DEMO_QUICK_VERTICES})")
    parser.add_argument("--workers", metavar="K", type=int_type("--workers"),
                        default=d.DEMO_WORKERS,
                        help=f"worker processes of the training run (default {d.DEMO_WORKERS})")
    parser.add_argument("--epochs", metavar="E", type=int_type("--epochs"), default=None,
                        help=f"training epochs (default {d.DEMO_EPOCHS}; "
                             f"--quick {d.DEMO_QUICK_EPOCHS})")
    parser.add_argument("--seed", metavar="S", type=int_type("--seed"), default=d.SEED,
                        help=f"seed of the network, the partitions, the weights and dropout "
                             f"(default {d.SEED})")
    parser.add_argument("--quick", action="store_true",
                        help="tiny sizes (a few seconds of work; for tests)")
    parser.add_argument("--overwrite", action="store_true",
                        help="replace the folder of an earlier demo")


def _settings(args) -> DemoSettings:
    given = {"out": args.out, "workers": args.workers, "seed": args.seed,
             "overwrite": bool(args.overwrite)}
    if args.vertices is not None:
        given["vertices"] = args.vertices
    if args.epochs is not None:
        given["epochs"] = args.epochs
    return (DemoSettings.quick(**given) if args.quick else DemoSettings(**given)).validate()


def summary_lines(r) -> list[str]:
    """The closing summary; its last line says where the report is."""

    c, p = r.check, r.choice
    acc = r.final.get("test_acc")
    lines = [
        f"best plan: {p['method']} on {p['workers']} workers ({p['reason']})",
        f"test accuracy {'-' if acc is None else f'{acc:.3f}'} after {r.final['epoch']} epochs "
        f"(majority role {r.chance['majority']:.3f}, uniform guess {r.chance['uniform']:.3f})",
        f"equal to single-process training: passed, max relative difference "
        f"{c['max_rel_diff']:.2e} (allowed {c['rtol']:g})",
        f"payload measured == predicted: {c['measured_payload_bytes']:,} bytes "
        f"({human_bytes(c['measured_payload_bytes'])})",
        "forecast epoch: " + ", ".join(
            f"{human_seconds(f['epoch_s'])} at {f['link_gbps']:g} Gbit/s" for f in r.forecast),
        f"done in {r.total_s:.1f} s; files in {r.out_dir}/",
        f"report: {r.report}",
    ]
    return lines


def run(args) -> int:
    settings = _settings(args)

    def on_step(text: str) -> None:
        print(text, file=sys.stderr, flush=True)

    result = run_demo(settings, on_step=on_step)
    for line in summary_lines(result):
        print(line)
    return 0
