"""Compare partition plans: halo, replication, traffic per epoch and memory per worker.

For every method x worker count, the graph is partitioned and its shards built (structure
only); nothing is trained and no process is started, so worker counts far beyond this
machine (up to 1024 and more) can be compared. Traffic is the payload the trainer will
measure: forward and backward halo exchanges and the ring all-reduce of one epoch.
GRAPH may also be a shard directory (from `split` or `update`): the plan it holds is
surveyed, on the graph read back from its shards (the same JSON as a survey of that graph
with that assignment).
"""
from __future__ import annotations

import csv
import io
import sys
from pathlib import Path

import numpy as np

from shardtrain import defaults
from shardtrain.cli.common import (
    add_graph_arguments,
    add_memory_budget_argument,
    add_plan_shape_arguments,
    add_scheme_arguments,
    load_graph_from_args,
    parse_int_list,
    parse_name_list,
    positive_int_type,
    scheme_settings,
)
from shardtrain.data.graphdir import is_graph_dir
from shardtrain.errors import InputError, RunError
from shardtrain.files import check_paths, write_json_atomic, write_text_atomic
from shardtrain.plan.survey import SurveySettings, check_plans, survey
from shardtrain.report.tables import format_table
from shardtrain.units import human_bytes

DEFAULT_METHODS = defaults.listed(defaults.COMPARED_METHODS)
DEFAULT_WORKERS = defaults.listed(defaults.SURVEY_WORKERS)

# One flat row per plan: (CSV column, value of a plan).
CSV_COLUMNS = [
    ("method", lambda p: p["method"]),
    ("workers", lambda p: p["workers"]),
    ("edge_cut", lambda p: p["edge_cut"]),
    ("replication_factor", lambda p: f"{p['replication_factor']:.6f}"),
    ("halo_max", lambda p: int(p["imbalance"]["halo"]["max"])),
    ("halo_mean", lambda p: f"{p['imbalance']['halo']['mean']:.3f}"),
    ("forward_bytes", lambda p: _halo(p, "forward")),
    ("backward_bytes", lambda p: _halo(p, "backward")),
    ("training_halo_bytes_of_run",
     lambda p: p["traffic"].get("halo_scheme", {}).get("training_halo_bytes", "")),
    ("allreduce_bytes", lambda p: p["traffic"]["allreduce_bytes"]),
    ("eval_forward_bytes", lambda p: p["traffic"]["eval_forward_bytes"]),
    ("epoch_payload_bytes", lambda p: p["epoch_payload_bytes"]),
    ("max_memory_bytes", lambda p: p["max_memory_bytes"]),
    ("owned_max_over_mean", lambda p: f"{p['imbalance']['owned']['max_over_mean']:.4f}"),
    ("local_edges_max_over_mean",
     lambda p: f"{p['imbalance']['local_edges']['max_over_mean']:.4f}"),
    ("halo_max_over_mean", lambda p: f"{p['imbalance']['halo']['max_over_mean']:.4f}"),
    ("bytes_sent_max_over_mean",
     lambda p: f"{p['imbalance']['bytes_sent']['max_over_mean']:.4f}"),
    ("partition_s", lambda p: f"{p['partition_s']:.3f}"),
    ("partition_scheme", lambda p: p.get("partition", {}).get("scheme", "")),
    ("partition_balance", lambda p: p.get("partition", {}).get("balance", "")),
    ("build_s", lambda p: f"{p['build_s']:.3f}"),
]

TABLE_COLUMNS = [
    ("method", "method", None),
    ("workers", "workers", "{:,}"),
    ("edge_cut", "edge cut", "{:,}"),
    ("replication", "replication", "{:.3f}"),
    ("halo", "halo max/mean", None),
    ("forward", "fwd/epoch", human_bytes),
    ("backward", "bwd/epoch", human_bytes),
    ("allreduce", "all-reduce", human_bytes),
    ("memory", "max mem/worker", human_bytes),
    ("owned_imb", "owned imb", "{:.3f}"),
    ("edges_imb", "edges imb", "{:.3f}"),
    ("sent_imb", "sent imb", "{:.3f}"),
    ("scheme", "METIS plan", None),
]


def _scheme_note(details: dict) -> str | None:
    """'kway', 'recursive', 'kway v+e' (balanced by vertices and edges); None (shown '-')
    for the other methods."""
    if "scheme" not in details:
        return None
    both = details.get("balance") == "vertices+edges"
    return details["scheme"] + (" v+e" if both else "")


def add_arguments(parser) -> None:
    add_graph_arguments(parser)
    add = parser.add_argument

    add("--workers", default=None, metavar="K,K,...",
        help=f"worker counts to compare (default {DEFAULT_WORKERS})")
    add("--method", default=None, metavar="M,M,...",
        help=f"partition methods to compare (default {DEFAULT_METHODS}; metis-volume, the "
             "communication-volume objective, is offered too but takes minutes per plan on "
             "million-vertex power-law graphs)")
    add("--assignment", default=None, metavar="FILE",
        help="survey a partition made elsewhere (.npy, or one worker id per line in vertex "
             "order) in place of --method; the worker count follows from it (--workers, "
             "if given, must agree)")
    add_plan_shape_arguments(parser)
    add_scheme_arguments(parser)
    add("--epochs", type=positive_int_type("--epochs"), default=defaults.EPOCHS,
        help=f"training epochs a halo scheme's payload is replayed over (default "
             f"{defaults.EPOCHS}; with --seed, the run's exact payload)")
    add_memory_budget_argument(
        parser, help="memory a survey of a graph directory may use, e.g. 512M or 4G (default "
                     "a quarter of this machine's memory): sets the chunk of rows read at a "
                     "time and whether METIS may run")
    add("--transport", default="local", choices=("local", "mpi"),
        help="local (default): one process; mpi: run under `mpiexec -n R` on a graph "
             "directory, each rank counting a block of its vertex chunks (rank 0 partitions "
             "and writes the same JSON as one process)")
    add("--json", default=None, metavar="OUT.json", help="write the full survey as JSON")
    add("--csv", default=None, metavar="OUT.csv", help="write one row per plan as CSV")
    add("--plot", default=None, metavar="DIR",
        help="write PNG pictures to DIR (traffic heat map; traffic and replication "
             "against workers)")


def _check_output(path: str | None, option: str) -> None:
    if path is not None and not Path(path).parent.is_dir():
        raise InputError(f"{option}: folder {Path(path).parent} does not exist")


def _settings(args) -> SurveySettings:
    return SurveySettings(layers=args.layers, hidden=args.hidden, dtype=args.dtype,
                          classes=args.classes, input_dim=args.input_dim, bias=args.bias,
                          imbalance=args.imbalance, seed=args.seed, model=args.model,
                          heads=args.heads, epochs=args.epochs, **scheme_settings(args))


def table_rows(result: dict) -> list[dict]:
    rows = []
    for p in result["plans"]:
        imb = p["imbalance"]
        rows.append({
            "method": p["method"], "workers": p["workers"], "edge_cut": p["edge_cut"],
            "replication": p["replication_factor"],
            "halo": f"{imb['halo']['max']:,.0f}/{imb['halo']['mean']:,.0f}",
            "forward": _halo(p, "forward"),
            "backward": _halo(p, "backward"),
            "allreduce": p["traffic"]["allreduce_bytes"],
            "memory": p["max_memory_bytes"],
            "owned_imb": imb["owned"]["max_over_mean"],
            "edges_imb": imb["local_edges"]["max_over_mean"],
            "sent_imb": imb["bytes_sent"]["max_over_mean"],
            "scheme": _scheme_note(p.get("partition", {})),
        })
    return rows


def _halo(plan: dict, direction: str):
    """A plan's halo payload per training epoch: under a halo scheme its expectation."""
    scheme = plan["traffic"].get("halo_scheme")
    if scheme is not None:
        return int(round(scheme[f"expected_{direction}_bytes"]))
    return plan["traffic"][f"{direction}_bytes"]


def csv_text(result: dict) -> str:
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow([name for name, _ in CSV_COLUMNS])
    for p in result["plans"]:
        w.writerow([value(p) for _, value in CSV_COLUMNS])
    return buf.getvalue()


def _write_outputs(args, result: dict) -> None:
    if args.json:
        write_json_atomic(args.json, result)
    if args.csv:
        write_text_atomic(args.csv, csv_text(result))
    if args.plot:
        from shardtrain.report.plots import survey_plots

        survey_plots(result, args.plot)


def run(args) -> int:
    if args.transport == "mpi":
        return _run_mpi(args)
    return _run(args)


class _Agreement:
    """Under MPI every rank checks the options and inputs itself; before the first
    collective they agree (one all-reduce) on whether all passed. The lowest failing rank
    then reports its error (one line), the others leave with the same exit status quietly;
    a failure after that point ends the job (`abort`), or the others would wait for ever."""

    def __init__(self, group):
        self.group, self.done = group, False

    def __call__(self, error: Exception | None) -> bool:
        """True when every rank passed; else raise `error` on the reporting rank."""
        g = self.group
        self.done = True
        failed = np.array([g.size if error is None else g.rank], dtype=np.int64)
        first = -int(g.allreduce(-failed, op="max")[0])      # the lowest failing rank
        if first == g.size:
            return True
        if g.rank == first and error is not None:
            raise error
        return False


def _run_mpi(args) -> int:
    try:
        from shardtrain.transport.mpi import MpiGroup

        group = MpiGroup()
    except ImportError:
        raise InputError("--transport mpi: mpi4py is not installed (pip install "
                         "'shardtrain[mpi]')") from None
    agree = _Agreement(group)
    try:
        return _run(args, group=group, agree=agree)
    except (InputError, RunError) as exc:
        if agree.done:               # past the agreement: the other ranks are in a collective
            from shardtrain.cli.flags import cli_message

            print(f"shardtrain: run failed (rank {group.rank}): {cli_message(exc)}",
                  file=sys.stderr, flush=True)
            group.abort(3)
        if agree(exc):
            raise AssertionError("unreachable: this rank failed") from None
        return 2 if isinstance(exc, InputError) else 3


def _run(args, group=None, agree=None) -> int:
    # cheap option checks first, then the graph, then the checks that need the graph
    if args.assignment is not None and args.method is not None:
        raise InputError("--assignment: give it in place of --method, not with it")
    workers = parse_int_list(args.workers or DEFAULT_WORKERS, "--workers")
    methods = parse_name_list(args.method or DEFAULT_METHODS, "--method")
    _check_output(args.json, "--json")
    _check_output(args.csv, "--csv")
    if args.plot is not None:
        from shardtrain.report.plots import check_plot_dir

        check_plot_dir(args.plot)
    if group is not None and not is_graph_dir(args.graph):
        raise InputError(f"--transport mpi: {args.graph} is not a graph directory (the "
                         f"survey streams over one: write it with `shardtrain ingest`)")
    if group is None or group.rank == 0:       # one rank writes the outputs (and probes them)
        check_paths(inputs={"GRAPH": args.graph, "--features": args.features,
                            "--labels": args.labels, "--assignment": args.assignment},
                    outputs={"--json": args.json, "--csv": args.csv},
                    out_dirs={"--plot": args.plot})
    settings = _settings(args)
    budget = args.memory_budget
    from shardtrain.plan.update import is_shard_dir

    if is_shard_dir(args.graph):
        return _run_shard_dir(args, settings)
    if is_graph_dir(args.graph):
        if (settings.halo_keep, settings.halo_format, settings.halo_stale,
                settings.halo_smooth) != (defaults.HALO_KEEP, defaults.HALO_FORMAT,
                                          defaults.HALO_STALE, defaults.HALO_SMOOTH):
            raise InputError(f"--halo-keep/--halo-format/--halo-stale: not available for a "
                             f"graph directory ({args.graph}): survey a graph file")
        return _run_graph_dir(args, methods, workers, settings, budget, group, agree)
    loaded = load_graph_from_args(args)
    graph = loaded.graph
    assignment = None
    if args.assignment is not None:
        from shardtrain.plan.partition import load_assignment

        assignment, k = load_assignment(args.assignment, graph.num_vertices)
        if args.workers is not None and workers != [k]:
            raise InputError(f"--workers {args.workers}: {args.assignment} assigns "
                             f"vertices to {k} workers")
        methods, workers = [f"file:{Path(args.assignment).name}"], [k]
        check_plans(graph, [], workers, settings)
    else:
        check_plans(graph, methods, workers, settings)
    for note in getattr(loaded, "notes", None) or []:
        print(note, file=sys.stderr)

    result = survey(graph, methods, workers, settings, assignment=assignment,
                    on_plan=_plan_line)
    result["graph"]["source"] = str(getattr(loaded, "source", args.graph))
    _report(args, result)
    return 0


def _run_shard_dir(args, settings) -> int:
    """GRAPH is a shard directory (`split`, `update`): survey the plan it holds, on the
    graph read back from its shards (`plan.update.read_shard_graph`): the same JSON as a
    survey of that graph with that assignment, the plan labelled by the manifest's method."""
    from shardtrain.plan.update import read_shard_graph

    for option, value in (("--features", args.features), ("--labels", args.labels),
                          ("--assignment", args.assignment), ("--method", args.method),
                          ("--workers", args.workers)):
        if value is not None:
            raise InputError(f"{option}: {args.graph} is a shard directory, which holds its "
                             f"own plan and vertex data")
    held = read_shard_graph(args.graph)
    meta = held.manifest.get("meta") or {}
    if settings.input_dim is None and meta.get("input_dim") is not None:
        import dataclasses

        settings = dataclasses.replace(settings, input_dim=int(meta["input_dim"]))
    label = held.manifest.get("method") or "assignment"
    for note in held.notes:
        print(note, file=sys.stderr)
    result = survey(held.graph, [label], [held.workers], settings,
                    assignment=held.assignment, on_plan=_plan_line)
    result["graph"]["source"] = str(args.graph)
    _report(args, result)
    return 0


def _plan_line(plan) -> None:
    print(f"  {plan['method']:<14} k={plan['workers']:<5} partition "
          f"{plan['partition_s']:.2f} s, shards {plan['build_s']:.2f} s", file=sys.stderr)


def _bar_factory():
    """A named tqdm bar per pass on a terminal; None (no bars) otherwise."""
    if not sys.stderr.isatty():
        return None
    from tqdm import tqdm

    def make(name: str, total):
        return tqdm(total=total, desc=name, unit="pass" if total is None else "entry",
                    unit_scale=total is not None, leave=False, file=sys.stderr)
    return make


def _run_graph_dir(args, methods, workers, settings, budget, group=None, agree=None) -> int:
    """GRAPH is a graph directory: plans and survey stream over its mapped arrays (with a
    `group` of MPI ranks, each counting its block of chunks; rank 0 prints and writes)."""
    from shardtrain.data.graphdir import open_graph_dir
    from shardtrain.plan.stream_survey import stream_survey
    from shardtrain.plan.streaming import load_assignment_mapped

    for option, value in (("--features", args.features), ("--labels", args.labels)):
        if value is not None:
            raise InputError(f"{option}: {args.graph} is a graph directory, which holds its "
                             f"own vertex data (give it to `ingest` instead)")
    gd = open_graph_dir(args.graph)
    assignment = None
    if args.assignment is not None:
        assignment, k = load_assignment_mapped(args.assignment, gd.num_vertices)
        if args.workers is not None and workers != [k]:
            raise InputError(f"--workers {args.workers}: {args.assignment} assigns "
                             f"vertices to {k} workers")
        methods, workers = [f"file:{Path(args.assignment).name}"], [k]

    lead = group is None or group.rank == 0

    def line(plan) -> None:
        if lead:
            print(f"  {plan['method']:<14} k={plan['workers']:<5} partition "
                  f"{plan['partition_s']:.2f} s, count {plan['build_s']:.2f} s",
                  file=sys.stderr)

    if agree is not None:
        from shardtrain.plan.stream_survey import check_stream_survey

        # every check the survey makes before its first plan, then the ranks agree
        check_stream_survey(gd, methods, workers, settings, assignment=assignment,
                            memory_budget=budget)
        agree(None)
    result = stream_survey(gd, methods, workers, settings, assignment=assignment,
                           memory_budget=budget, on_plan=line,
                           progress=_bar_factory() if lead else None, group=group)
    if not lead:
        return 0
    result["graph"]["source"] = str(args.graph)
    stream = result["streaming"]
    print(f"streamed under a memory budget of {human_bytes(stream['memory_budget_bytes'])}: "
          f"peak {human_bytes(stream['peak_rss_bytes'])} (anonymous + shared; mapped file "
          f"pages {human_bytes(stream['peak_file_rss_bytes'])} beside)", file=sys.stderr)
    _report(args, result)
    return 0


def model_label(m: dict) -> str:
    """'GCN', 'SAGE', 'GIN' or 'GAT x8 heads' for a survey's "model" entry (a survey
    written before the model family reads as GCN)."""
    name = str(m.get("name", "gcn")).upper()
    return f"{name} x{m['heads']} heads" if "heads" in m else name


def _report(args, result: dict) -> None:
    m = result["model"]
    print(f"{result['graph']['vertices']:,} vertices, {result['graph']['edges']:,} edges; "
          f"{model_label(m)} "
          f"{' -> '.join(str(d) for d in [m['dims'][0][0]] + [d[1] for d in m['dims']])} "
          f"({m['dtype']}); traffic is payload per training epoch")
    scheme = m.get("halo_scheme")
    if scheme is not None:
        print(f"halo scheme: keep {scheme['halo_keep']:g}, format "
              f"{scheme['halo_format'] or m['dtype']}"
              f"{', stale' if scheme.get('halo_stale') else ''}: fwd/bwd are the expected "
              f"halo payload "
              f"of a training epoch; the {scheme['epochs']}-epoch run with seed "
              f"{scheme['seed']} sends exactly (training halo rows, all epochs):")
        for p in result["plans"]:
            print(f"  {p['method']:<14} k={p['workers']:<5} "
                  f"{p['traffic']['halo_scheme']['training_halo_bytes']:,} bytes")
    print(format_table(table_rows(result), TABLE_COLUMNS))
    _write_outputs(args, result)
