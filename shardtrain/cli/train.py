"""Train a GCN: on the whole graph in one process, or partitioned over worker processes.

`shardtrain train GRAPH --reference` trains single-process (the oracle).
`shardtrain train GRAPH --workers K --method M` partitions the graph, builds the shards in a
temporary directory and trains with one process per shard, exchanging halo rows over pipes;
`shardtrain train SHARD_DIR` trains on the shards written by `shardtrain split`.
`mpiexec -n K shardtrain train SHARD_DIR --transport mpi` runs one MPI rank per shard.
Per epoch: loss, train/val/test accuracy; at the end a per-worker table of time, traffic and
memory, and the measured payload against the survey's prediction. --seed seeds the split
masks the graph does not give, the initial weights and the dropout masks.

Faults: a worker that dies or fails ends the run (exit 3) with one line naming it, its
exit status or signal and its last phase; Ctrl-C, SIGTERM or SIGHUP, in any phase, stops
every worker and removes the temporary shards (exit 4), and during training names the
`--resume DIR` that continues from the latest checkpoint
(`--checkpoint DIR --checkpoint-every N`). In float64 a resumed run ends with the very
same weights, bit for bit, as a run that was never interrupted. `--reference` runs take
--checkpoint/--resume too (a checkpoint resumes only a run of the mode that wrote it).
"""
from __future__ import annotations

import math
import sys
from pathlib import Path

import numpy as np

from shardtrain import defaults
from shardtrain.cli.common import (
    add_graph_arguments,
    add_scheme_arguments,
    positive_int_type,
    scheme_settings,
)
from shardtrain.errors import (
    EXIT_BAD_INPUT,
    EXIT_INTERRUPTED,
    EXIT_RUN_FAILED,
    InputError,
    RunError,
)
from shardtrain.plan.schedule import MODELS
from shardtrain.train import api
from shardtrain.train.settings import DTYPES, TrainSettings, max_threads
from shardtrain.transport.frames import DEFAULT_MAX_FRAME_BYTES

WORKER_COLUMNS = [
    ("worker", "worker", None),
    ("compute_s", "compute s", "{:.3f}"),
    ("exchange_s", "exchange s", "{:.3f}"),
    ("allreduce_s", "all-reduce s", "{:.3f}"),
    ("wait_s", "wait s", "{:.3f}"),
    ("bytes_sent", "sent", None),
    ("bytes_received", "received", None),
    ("cpu_s", "CPU s", "{:.3f}"),
    ("peak_rss_bytes", "peak RSS", None),
]


def _number(option: str, kind):
    def convert(text: str):
        try:
            return kind(text)
        except ValueError:
            raise InputError(f"{option} {text!r}: not {'an integer' if kind is int else 'a number'}"
                             ) from None
    return convert


def _threads_type(text: str) -> int:
    value = _number("--threads", int)(text)
    if not 1 <= value <= max_threads():
        raise InputError(f"--threads {text!r}: must lie in 1..{max_threads()} "
                         f"(4 x this machine's {max_threads() // 4} cores)")
    return value


def add_arguments(parser) -> None:
    add_graph_arguments(parser)
    mode = parser.add_mutually_exclusive_group()
    mode.add_argument("--reference", action="store_true",
                      help="train on the whole graph in one process (no shards, no workers)")
    mode.add_argument("--workers", type=_number("--workers", int), metavar="K",
                      help="partition GRAPH into K shards and train with K worker processes")
    split = parser.add_mutually_exclusive_group()
    split.add_argument("--method", metavar="M", help="partition method (with --workers)")
    split.add_argument("--assignment", metavar="FILE",
                       help="vertex -> worker file to partition by (.npy, or one worker id "
                            "per line); the worker count follows from it (--workers, if "
                            "given, must agree)")
    parser.add_argument("--imbalance", type=_number("--imbalance", float),
                        default=defaults.IMBALANCE,
                        help=f"allowed partition imbalance (default {defaults.IMBALANCE:g})")
    parser.add_argument("--model", default=defaults.MODEL, metavar="NAME",
                        help=f"message-passing model: {', '.join(MODELS)} (default "
                             f"{defaults.MODEL}; see README 'Models')")
    parser.add_argument("--heads", type=_number("--heads", int), default=defaults.HEADS,
                        metavar="K", help=f"attention heads per hidden layer of --model gat "
                                          f"(default {defaults.HEADS})")
    parser.add_argument("--layers", type=_number("--layers", int), default=defaults.LAYERS,
                        help=f"layers (default {defaults.LAYERS})")
    parser.add_argument("--hidden", type=_number("--hidden", int), default=defaults.HIDDEN,
                        help=f"hidden width (default {defaults.HIDDEN})")
    parser.add_argument("--dropout", type=_number("--dropout", float),
                        default=defaults.DROPOUT, help=f"dropout rate on every layer's input "
                                                       f"(default {defaults.DROPOUT})")
    parser.add_argument("--lr", type=_number("--lr", float), default=defaults.LR,
                        help=f"Adam learning rate (default {defaults.LR})")
    parser.add_argument("--weight-decay", type=_number("--weight-decay", float),
                        default=defaults.WEIGHT_DECAY,
                        help=f"L2 penalty on the first layer's weights (default "
                             f"{defaults.WEIGHT_DECAY})")
    parser.add_argument("--epochs", type=_number("--epochs", int), default=defaults.EPOCHS,
                        help=f"training epochs (default {defaults.EPOCHS})")
    parser.add_argument("--dtype", default=defaults.DTYPE,
                        help=f"{' or '.join(DTYPES)} (default {defaults.DTYPE})")
    parser.add_argument("--bias", action="store_true", help="add a bias to every layer")
    parser.add_argument("--early-stop", type=_number("--early-stop", int),
                        default=defaults.EARLY_STOP,
                        metavar="N", help="stop when the validation loss has not improved "
                        "(become strictly lower than the best so far) for N epochs; the "
                        f"final weights and predictions are the best epoch's (default "
                        f"{defaults.EARLY_STOP}: off; the GCN paper uses 10)")
    parser.add_argument("--threads", type=_threads_type, default=defaults.THREADS,
                        metavar="N",
                        help=f"BLAS threads per process, the same in both modes: the "
                        f"reference's one process, each worker (default {defaults.THREADS}: "
                        f"the workers are the parallelism, and the reference then gets the "
                        f"CPU of one worker; at most {max_threads()})")
    add_scheme_arguments(parser)
    parser.add_argument("--single-process", action="store_true",
                        help="with --workers K --method M (or --assignment): compute in ONE "
                             "process exactly what the K-worker run computes under the halo "
                             "scheme (the same sampled halos and rounding); with every "
                             "scheme off it equals --reference")
    parser.add_argument("--timeout", type=_number("--timeout", float),
                        default=defaults.TIMEOUT_S, metavar="S",
                        help=f"deadline of every halo/all-reduce receive (default "
                             f"{defaults.TIMEOUT_S:g})")
    parser.add_argument("--max-frame-bytes", type=positive_int_type("--max-frame-bytes"),
                        metavar="N", help=f"refuse halo/all-reduce frames larger than N bytes "
                                          f"(default {DEFAULT_MAX_FRAME_BYTES >> 30} GiB)")
    parser.add_argument("--checkpoint", metavar="DIR",
                        help="write checkpoints (weights, Adam state, epoch, run identity) "
                             "into DIR, atomically")
    parser.add_argument("--checkpoint-every", type=positive_int_type("--checkpoint-every"),
                        metavar="N", help=f"epochs between checkpoints (default "
                                          f"{defaults.CHECKPOINT_EVERY}; one is always "
                                          f"written after the last epoch)")
    parser.add_argument("--resume", metavar="DIR",
                        help="continue the run whose checkpoint is in DIR (same graph, "
                             "settings and workers; checkpoints go on into DIR)")
    parser.add_argument("--warm-start", metavar="DIR",
                        help="continue from the checkpoint in DIR taken on another graph (an "
                             "older version of this one, e.g. before `shardtrain update`): "
                             "its weights and Adam state; --epochs more epochs, numbered on "
                             "from the checkpoint's; the model shape must be the same")
    parser.add_argument("--slow-worker", metavar="W:FACTOR", action="append", default=[],
                        help="make worker W's compute FACTOR (>= 1) times slower, to see the "
                             "wait a straggler causes (repeatable)")
    parser.add_argument("--json", metavar="OUT", help="write the run's account as JSON")
    parser.add_argument("--plot", metavar="DIR", help="write PNG pictures of the run to DIR "
                                                      "(time per worker, loss/accuracy, traffic)")
    parser.add_argument("--weights", metavar="OUT.npz", help="write the final weights")
    parser.add_argument("--init-weights", metavar="IN.npz", help="start from these weights")
    parser.add_argument("--predictions", metavar="OUT.csv",
                        help="write vertex,predicted,label (label empty where unknown)")
    parser.add_argument("--predictions-sql", metavar="URL",
                        help="also write the predictions into a database: sqlite:///PATH or "
                             "postgresql://USER@HOST:PORT/DB (with --predictions-table)")
    parser.add_argument("--predictions-table", metavar="NAME",
                        help="the new table of (id, predicted, label) rows, written in one "
                             "transaction (all rows or none); ids are the original ones")
    parser.add_argument("--replace-table", action="store_true",
                        help="replace --predictions-table if it exists (in the same "
                             "transaction)")
    parser.add_argument("--quiet", action="store_true", help="no per-epoch output")
    parser.add_argument("--emulate-link", metavar="GBPS[:LATENCY_US]",
                        help="make the pipes no faster than a network link of GBPS Gbit/s per "
                             "worker and LATENCY_US microseconds per call (to check a "
                             "forecast on this machine; partitioned runs over pipes only)")
    parser.add_argument("--transport", choices=api.TRANSPORTS, default=defaults.TRANSPORT,
                        help="pipes: worker processes on this machine (default); mpi: one "
                             "rank per shard of SHARD_DIR, under mpiexec")


# ---------------------------------------------------------------- options

def _check_output(path, option: str, suffix: str | None = None) -> None:
    if path is None:
        return
    p = Path(path)
    if suffix and p.suffix.lower() != suffix:
        raise InputError(f"{option} {path}: the file name must end in {suffix}")
    if p.is_dir():
        raise InputError(f"{option} {path}: is a directory")
    if not p.parent.is_dir():
        raise InputError(f"{option} {path}: folder {p.parent} does not exist")


def _check_paths(args) -> None:
    """No output may be an input or another output, and every output must be writable."""
    from shardtrain.files import check_paths

    check_paths(inputs={"GRAPH": args.graph, "--features": args.features,
                        "--labels": args.labels, "--assignment": args.assignment,
                        "--init-weights": args.init_weights, "--resume": args.resume,
                        "--warm-start": args.warm_start},
                outputs={"--json": args.json, "--weights": args.weights,
                         "--predictions": args.predictions},
                out_dirs={"--plot": getattr(args, "plot", None),
                          "--checkpoint": args.checkpoint},
                allow=(("--checkpoint", "--resume"),))


def parse_slow_workers(items: list[str]) -> dict[int, float]:
    """['1:3', '0:1.5'] -> {1: 3.0, 0: 1.5}; InputError naming --slow-worker."""
    out: dict[int, float] = {}
    for text in items:
        who, sep, factor = text.partition(":")
        try:
            w, f = int(who), float(factor)
        except ValueError:
            raise InputError(f"--slow-worker {text!r}: expected W:FACTOR, e.g. 1:3") from None
        if not sep or w < 0:
            raise InputError(f"--slow-worker {text!r}: expected W:FACTOR with W >= 0")
        if not (math.isfinite(f) and f >= 1):
            raise InputError(f"--slow-worker {text!r}: FACTOR must be a number >= 1")
        if f > api.MAX_SLOW_FACTOR:
            raise InputError(f"--slow-worker {text!r}: FACTOR must be at most "
                             f"{api.MAX_SLOW_FACTOR:g} (the straggler's sleeps must stay finite)")
        if w in out:
            raise InputError(f"--slow-worker {text!r}: worker {w} given twice")
        out[w] = f
    return out


# ---------------------------------------------------------------- progress

class _Progress:
    """A tqdm bar on a terminal, one line per epoch otherwise, nothing with --quiet."""

    def __init__(self, epochs: int, quiet: bool, done: int = 0):
        self.bar = None
        self.quiet = quiet
        if not quiet and sys.stderr.isatty():
            from tqdm import tqdm
            self.bar = tqdm(total=epochs, initial=done, unit="epoch", file=sys.stderr)
        self.epochs = epochs

    def __call__(self, rec: dict) -> None:
        if self.bar is not None:
            self.bar.update(1)
            self.bar.set_postfix(loss=f"{rec['loss']:.4f}", val=_acc(rec["val_acc"]))
        elif not self.quiet:
            print(epoch_line(rec, self.epochs), flush=True)

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()


def _acc(v) -> str:
    return "-" if v is None else f"{v:.3f}"


def epoch_line(rec: dict, epochs: int) -> str:
    val_loss = rec.get("val_loss")
    return (f"epoch {rec['epoch']:>{len(str(epochs))}}/{epochs}  loss {rec['loss']:.6f}  "
            f"val loss {'-' if val_loss is None else f'{val_loss:.6f}'}  "
            f"train {_acc(rec['train_acc'])}  val {_acc(rec['val_acc'])}  "
            f"test {_acc(rec['test_acc'])}  {rec['epoch_s']:.3f} s")


# ---------------------------------------------------------------- outputs

def _csv_field(a: np.ndarray) -> np.ndarray:
    """Text values as CSV fields: quoted (quotes doubled) where they hold , " or a newline."""
    if a.dtype.kind != "U" or a.shape[0] == 0:
        return a.astype(str)
    special = np.zeros(a.shape[0], dtype=bool)
    for ch in (",", '"', "\n", "\r"):
        special |= np.strings.find(a, ch) >= 0
    if not special.any():
        return a
    quoted = np.strings.add(np.strings.add('"', np.strings.replace(a, '"', '""')), '"')
    return np.where(special, quoted, a)


def predictions_csv(predicted: np.ndarray, labels: np.ndarray | None,
                    vertex_ids: np.ndarray | None = None) -> str:
    """vertex,predicted,label lines, label empty where unknown (vectorised text); `vertex_ids`
    (the graph directory's original ids) name the vertices, else 0..n-1."""
    n = predicted.shape[0]
    ids = np.arange(n).astype(str) if vertex_ids is None else _csv_field(vertex_ids)
    pred = predicted.astype(str)
    if labels is None:
        lab = np.full(n, "", dtype="<U1")
    else:
        lab = np.where(labels >= 0, labels.astype(str), "")
    rows = np.char.add(np.char.add(np.char.add(np.char.add(ids, ","), pred), ","), lab)
    return "vertex,predicted,label\n" + ("\n".join(rows.tolist()) + "\n" if n else "")


def _vertex_ids(args) -> np.ndarray | None:
    """The original ids of GRAPH's vertices (a graph directory ingested from a database),
    else None (the ids are 0..n-1)."""
    from shardtrain.data.graphdir import is_graph_dir, read_vertex_id_files, read_vertex_ids

    if is_graph_dir(args.graph):
        return read_vertex_ids(args.graph)
    if api.is_shard_dir(args.graph):       # split from a graph directory that kept its ids
        from shardtrain.plan.shards import SHARDS_MANIFEST, load_manifest
        m = load_manifest(args.graph)
        rec = (m.get("meta") or {}).get("vertex_ids")
        if rec is not None:
            return read_vertex_id_files(Path(args.graph), rec, int(m["num_vertices"]),
                                        Path(args.graph) / SHARDS_MANIFEST)
    return None


def write_outputs(args, result, labels, doc: dict) -> None:
    from shardtrain.files import save_npz_atomic, write_json_atomic, write_text_atomic
    from shardtrain.train import model

    ids = None
    if args.predictions or getattr(args, "prediction_target", None) is not None:
        ids = _vertex_ids(args)
        if ids is not None and ids.shape[0] != result.predictions.shape[0]:
            raise InputError(f"{args.graph}: {ids.shape[0]:,} original vertex ids for "
                             f"{result.predictions.shape[0]:,} vertices")
    target = getattr(args, "prediction_target", None)
    if target is not None:       # first: the one output another program may fail to take
        from shardtrain.data.sqlsource import write_predictions
        known = ids if ids is not None else np.arange(result.predictions.shape[0])
        write_predictions(target, known, result.predictions, labels)
    if args.weights:
        save_npz_atomic(args.weights, **model.params_to_arrays(result.params))
    if args.predictions:
        write_text_atomic(args.predictions, predictions_csv(result.predictions, labels, ids))
    if args.json:
        write_json_atomic(args.json, doc)
    if getattr(args, "plot", None):
        from shardtrain.report.plots import run_plots
        run_plots(doc, args.plot)


def _worker_table(rows: list[dict]) -> str:
    from shardtrain.report.tables import format_table
    from shardtrain.units import human_bytes

    cols = [(key, head, human_bytes if key in ("bytes_sent", "bytes_received",
                                               "peak_rss_bytes") else fmt)
            for key, head, fmt in WORKER_COLUMNS]
    if any(r.get("exchange_in_flight_s") for r in rows):
        # started exchanges (--halo-stale): their time in flight and the part hidden
        # behind the worker's compute (transport.meter.Profile "overlap")
        at = [c[0] for c in cols].index("wait_s") + 1
        cols[at:at] = [("exchange_in_flight_s", "in flight s", "{:.3f}"),
                       ("hidden_exchange_s", "hidden s", "{:.3f}")]
    return format_table(rows, cols)


def _traffic_lines(traffic: dict) -> list[str]:
    from shardtrain.units import human_bytes

    m, p = traffic["measured_payload_bytes"], traffic["predicted_payload_bytes"]
    verdict = "equal" if m == p else f"DIFFERENT by {m - p:+,} bytes"
    lines = [f"payload: measured {m:,} bytes ({human_bytes(m)}), predicted {p:,} bytes "
             f"({verdict}); framing {traffic['measured_framing_bytes']:,} bytes in "
             f"{traffic['frames']:,} frames"]
    scheme = (traffic.get("predicted_per_epoch") or {}).get("halo_scheme")
    if scheme is not None:
        train = sum(r["measured_payload_bytes"] for r in traffic["breakdown"]
                    if r["kind"] == "halo" and r["direction"] != "eval")
        expected = scheme["expected_forward_bytes"] + scheme["expected_backward_bytes"]
        lines.append(f"halo scheme: keep {scheme['halo_keep']:g}, format "
                     f"{scheme['halo_format'] or 'the training dtype'}: training halo "
                     f"{human_bytes(train)} in all (expected {human_bytes(expected)} per "
                     f"epoch); the evaluation forward exchanges the full halo, exact")
    return lines


def _count(mask) -> str:
    return "-" if mask is None else f"{int(np.count_nonzero(mask)):,}"


def graph_line(graph) -> str:
    """One line of the graph's size, printed before training."""
    dim = graph.input_dim
    return (f"graph: {graph.num_vertices:,} vertices, {graph.num_edges:,} edges, "
            f"{'-' if dim is None else f'{dim:,}'} features, {graph.num_classes:,} classes; "
            f"split: {_count(graph.train_mask)} train, {_count(graph.val_mask)} val, "
            f"{_count(graph.test_mask)} test")


def shard_dir_line(shard_dir, facts, m: dict, counts: dict | None = None) -> str:
    """The same line for a shard directory, from its manifest `m` and, where given, the
    mask counts of all its shards (`shards.split_counts`; an MPI rank 0 may see only its
    own shard, so it shows the manifest's training count alone)."""
    split = (f"{int(m['num_train_global']):,} train" if counts is None else
             f"{counts['train']:,} train, {counts['val']:,} val, {counts['test']:,} test")
    return (f"graph: {facts.num_vertices:,} vertices, {int(m.get('num_edges') or 0):,} "
            f"edges, {facts.input_dim:,} features, {facts.num_classes:,} classes; split: "
            f"{split}; {facts.workers} shards in {shard_dir}")


def model_label(args) -> str:
    """'gcn 2x16', 'gat 2x8, 8 heads': the model a run trains, in its closing line."""
    heads = f", {args.heads} heads" if args.model == "gat" else ""
    return f"{args.model} {args.layers}x{args.hidden}{heads}"


def _say_early_stop(summary: dict | None, quiet: bool) -> None:
    """The closing line of an early-stopping run: where it stopped, which weights it kept."""
    if quiet or summary is None:
        return
    where = (f"stopped at epoch {summary['stopped_at']}" if summary["stopped_at"] is not None
             else "ran every epoch")
    print(f"early stop (patience {summary['patience']}): {where}; weights and predictions "
          f"of the best epoch, {summary['best_epoch']} (validation loss "
          f"{summary['best_val_loss']:.6f})")


# ---------------------------------------------------------------- the command

def config_of(args) -> api.RunConfig:
    """The RunConfig the options describe (parsed, not yet checked: `api.run` checks)."""
    link = None
    if args.emulate_link is not None:
        from shardtrain.transport.link import parse_link
        link = parse_link(args.emulate_link, "link")
    settings = TrainSettings(layers=args.layers, hidden=args.hidden, dropout=args.dropout,
                             lr=args.lr, weight_decay=args.weight_decay, epochs=args.epochs,
                             seed=args.seed, dtype=args.dtype, bias=bool(args.bias),
                             early_stop=args.early_stop, threads=args.threads,
                             model=args.model, heads=args.heads, **scheme_settings(args))
    mode = "reference" if args.reference else "partitioned"
    if args.single_process:
        if args.reference:
            raise InputError("--single-process: not allowed with --reference (give "
                             "--workers K --method M or --assignment FILE)")
        mode = "single-process"
    return api.RunConfig(
        source=args.graph, settings=settings, mode=mode,
        features=args.features, labels=args.labels, input_dim=args.input_dim,
        workers=args.workers, method=args.method, assignment=args.assignment,
        imbalance=args.imbalance, checkpoint=args.checkpoint,
        checkpoint_every=args.checkpoint_every, resume=args.resume,
        warm_start=args.warm_start, init_weights=args.init_weights, timeout_s=args.timeout,
        max_frame_bytes=args.max_frame_bytes, link=link,
        slow_workers=parse_slow_workers(args.slow_worker))


def _check_outputs(args) -> None:
    """The output options: names, folders, none an input or another output."""
    _check_output(args.json, "--json", ".json")
    _check_output(args.weights, "--weights", ".npz")
    _check_output(args.predictions, "--predictions", ".csv")
    args.prediction_target = None
    if (args.predictions_sql is None) != (args.predictions_table is None):
        raise InputError("--predictions-sql and --predictions-table: give both or neither")
    if args.replace_table and args.predictions_table is None:
        raise InputError("--replace-table: only with --predictions-table")
    if args.predictions_sql is not None:
        from shardtrain.data.sqlsource import check_prediction_target
        args.prediction_target = check_prediction_target(
            args.predictions_sql, args.predictions_table, args.replace_table)
    if getattr(args, "plot", None) is not None:
        from shardtrain.report.plots import check_plot_dir
        check_plot_dir(args.plot)
    _check_paths(args)


class _Screen:
    """The command's printing around `api.run`: the input line, the progress, the
    closing lines; `deliver` writes the output files first."""

    def __init__(self, args):
        self.args = args
        self.progress: _Progress | None = None

    def ready(self, info: api.Ready) -> None:
        if not self.args.quiet:
            if info.graph is not None:
                line = graph_line(info.graph)
            else:
                line = shard_dir_line(info.shard_dir, info.facts, info.manifest or {},
                                      info.counts)
            print(line, flush=True)
        self.progress = _Progress(info.epochs, self.args.quiet, info.done)

    def epoch(self, rec: dict) -> None:
        if self.progress is not None:
            self.progress(rec)

    def close(self) -> None:
        if self.progress is not None:
            self.progress.close()
            self.progress = None

    def deliver(self, outcome: api.RunOutcome) -> None:
        self.close()
        args, result = self.args, outcome.result
        write_outputs(args, result, outcome.labels, outcome.document)
        if not args.quiet:
            last = result.epochs[-1]
            print(f"final ({model_label(args)}): loss {last['loss']:.6f}  "
                  f"train {_acc(last['train_acc'])}  "
                  f"val {_acc(last['val_acc'])}  test {_acc(last['test_acc'])}")
            _say_early_stop(result.early_stop, args.quiet)
            if outcome.mode == "partitioned":
                print(_worker_table(result.workers))
                for line in _traffic_lines(result.traffic):
                    print(line)


def _write_initial_weights(args) -> int:
    """`--epochs 0 --weights OUT.npz`: the initial weights (Glorot, or --init-weights
    checked against the model), nothing trained. Under MPI rank 0 writes them."""
    from shardtrain.files import save_npz_atomic
    from shardtrain.train import model

    if not args.weights:
        raise InputError("--epochs 0: trains nothing; give --weights OUT.npz to write the "
                         "initial weights")
    for flag, given in (("--json", args.json), ("--predictions", args.predictions),
                        ("--checkpoint", args.checkpoint), ("--resume", args.resume),
                        ("--plot", getattr(args, "plot", None))):
        if given:
            raise InputError(f"{flag}: not written with --epochs 0 (only --weights is)")
    if args.transport == "mpi" and api.mpi_rank_and_size()[0] != 0:
        return 0
    args.epochs = 1                       # a valid config; initial_weights trains nothing
    config = config_of(args)
    _check_outputs(args)
    params = api.initial_weights(config)
    save_npz_atomic(args.weights, **model.params_to_arrays(params))
    if not args.quiet:
        names = ", ".join(model.param_names(params))
        print(f"initial weights of {config.settings.model} ({names}) written to "
              f"{args.weights}; nothing trained (--epochs 0)")
    return 0


def run(args) -> int:
    if args.epochs == 0:
        return _write_initial_weights(args)
    config = config_of(args)
    screen = _Screen(args)
    if args.transport == "mpi":
        return _run_mpi_rank(config, args, screen)
    try:
        api.run(config, transport=args.transport, on_epoch=screen.epoch, on_ready=screen.ready,
                check=lambda: _check_outputs(args), deliver=screen.deliver)
    finally:
        screen.close()
    return 0


def _run_mpi_rank(config: api.RunConfig, args, screen: _Screen) -> int:
    """One rank of `mpiexec -n K shardtrain train SHARD_DIR --transport mpi`: rank 0 checks,
    prints and writes; a failure after the start names its rank and ends the whole job."""
    rank, size = api.mpi_rank_and_size()
    try:
        api.run(config, transport="mpi", on_epoch=screen.epoch, on_ready=screen.ready,
                check=lambda: _check_outputs(args), deliver=screen.deliver)
        return 0
    except api.JobStopped as exc:
        if exc.report:
            print(f"shardtrain: error: {exc}", file=sys.stderr)
        return exc.code
    except BaseException as exc:  # noqa: BLE001 - one rank's failure must end every rank
        screen.close()
        if isinstance(exc, InputError):
            code, what = EXIT_BAD_INPUT, "error"
        elif isinstance(exc, RunError):
            code, what = EXIT_RUN_FAILED, "run failed"
        elif isinstance(exc, KeyboardInterrupt):
            code, what = EXIT_INTERRUPTED, "interrupted"
        else:                              # a bug: show where, then end the job all the same
            import traceback
            traceback.print_exc()
            code, what = EXIT_RUN_FAILED, "internal error"
        print(f"shardtrain: {what}: rank {rank} of {size}: {exc}", file=sys.stderr,
              flush=True)
        api.abort_mpi_job(code)
        return code
