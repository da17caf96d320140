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
import shutil
import signal
import sys
import tempfile
from pathlib import Path

import numpy as np

from shardtrain.cli.common import add_graph_arguments, load_graph_from_args, positive_int_type
from shardtrain.errors import InputError, Interrupted
from shardtrain.train import rundoc
from shardtrain.train.settings import DTYPES, TrainSettings, max_threads

MANIFEST_NAME = "shards.json"
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
    parser.add_argument("--imbalance", type=_number("--imbalance", float), default=0.03,
                        help="allowed partition imbalance (default 0.03)")
    d = TrainSettings()
    parser.add_argument("--layers", type=_number("--layers", int), default=d.layers,
                        help=f"GCN layers (default {d.layers})")
    parser.add_argument("--hidden", type=_number("--hidden", int), default=d.hidden,
                        help=f"hidden width (default {d.hidden})")
    parser.add_argument("--dropout", type=_number("--dropout", float), default=d.dropout,
                        help=f"dropout rate on every layer's input (default {d.dropout})")
    parser.add_argument("--lr", type=_number("--lr", float), default=d.lr,
                        help=f"Adam learning rate (default {d.lr})")
    parser.add_argument("--weight-decay", type=_number("--weight-decay", float),
                        default=d.weight_decay,
                        help=f"L2 penalty on the first layer's weights (default {d.weight_decay})")
    parser.add_argument("--epochs", type=_number("--epochs", int), default=d.epochs,
                        help=f"training epochs (default {d.epochs})")
    parser.add_argument("--dtype", default=d.dtype,
                        help=f"{' or '.join(DTYPES)} (default {d.dtype})")
    parser.add_argument("--bias", action="store_true", help="add a bias to every layer")
    parser.add_argument("--early-stop", type=_number("--early-stop", int), default=0,
                        metavar="N", help="stop when the validation loss has not improved "
                        "(become strictly lower than the best so far) for N epochs; the "
                        "final weights and predictions are the best epoch's (default 0: "
                        "off; the GCN paper uses 10)")
    parser.add_argument("--threads", type=_threads_type, default=d.threads, metavar="N",
                        help=f"BLAS threads per process, the same in both modes: the "
                        f"reference's one process, each worker (default {d.threads}: the "
                        f"workers are the parallelism, and the reference then gets the "
                        f"CPU of one worker; at most {max_threads()})")
    parser.add_argument("--timeout", type=_number("--timeout", float), default=60.0,
                        metavar="S", help="deadline of every halo/all-reduce receive (default 60)")
    parser.add_argument("--max-frame-bytes", type=positive_int_type("--max-frame-bytes"),
                        metavar="N", help="refuse halo/all-reduce frames larger than N bytes "
                                          "(default 2 GiB)")
    parser.add_argument("--checkpoint", metavar="DIR",
                        help="write checkpoints (weights, Adam state, epoch, run identity) "
                             "into DIR, atomically")
    parser.add_argument("--checkpoint-every", type=positive_int_type("--checkpoint-every"),
                        metavar="N", help="epochs between checkpoints (default 10; one is "
                                          "always written after the last epoch)")
    parser.add_argument("--resume", metavar="DIR",
                        help="continue the run whose checkpoint is in DIR (same graph, "
                             "settings and workers; checkpoints go on into DIR)")
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
    parser.add_argument("--quiet", action="store_true", help="no per-epoch output")
    parser.add_argument("--emulate-link", metavar="GBPS[:LATENCY_US]",
                        help="make the pipes no faster than a network link of GBPS Gbit/s per "
                             "worker and LATENCY_US microseconds per call (to check a "
                             "forecast on this machine; partitioned runs over pipes only)")
    parser.add_argument("--transport", choices=("pipes", "mpi"), default="pipes",
                        help="pipes: worker processes on this machine (default); mpi: one "
                             "rank per shard of SHARD_DIR, under mpiexec")


# ---------------------------------------------------------------- validation

def _settings(args) -> TrainSettings:
    return TrainSettings(layers=args.layers, hidden=args.hidden, dropout=args.dropout,
                         lr=args.lr, weight_decay=args.weight_decay, epochs=args.epochs,
                         seed=args.seed, dtype=args.dtype, bias=bool(args.bias),
                         early_stop=args.early_stop, threads=args.threads).validate()


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
                        "--init-weights": args.init_weights, "--resume": args.resume},
                outputs={"--json": args.json, "--weights": args.weights,
                         "--predictions": args.predictions},
                out_dirs={"--plot": getattr(args, "plot", None),
                          "--checkpoint": args.checkpoint},
                allow=(("--checkpoint", "--resume"),))


def is_graph_dir(path: str) -> bool:
    from shardtrain.data.graphdir import is_graph_dir as check

    return check(path)


def _is_shard_dir(path: str) -> bool:
    return Path(path).is_dir() and (Path(path) / MANIFEST_NAME).is_file()


def _check_options(args) -> tuple[TrainSettings, bool]:
    """Everything that can be checked without reading the graph; returns (settings,
    whether the positional argument is a shard directory)."""
    settings = _settings(args)
    for option, value, top, why in LIMITS:
        value = getattr(args, value)
        if value is not None and value > top:
            raise InputError(f"{option} {value}: must be at most {top:,} ({why})")
    if not (math.isfinite(args.timeout) and 0 < args.timeout <= MAX_TIMEOUT_S):
        raise InputError(f"--timeout {args.timeout:g}: must be a number of seconds > 0 and "
                         f"at most {MAX_TIMEOUT_S:g} (the receive deadlines wait in whole "
                         f"milliseconds of a C int)")
    if not 0 <= args.imbalance < 1:
        raise InputError(f"--imbalance {args.imbalance:g}: must lie in [0, 1)")
    _check_output(args.json, "--json", ".json")
    _check_output(args.weights, "--weights", ".npz")
    _check_output(args.predictions, "--predictions", ".csv")
    if getattr(args, "plot", None) is not None:
        from shardtrain.report.plots import check_plot_dir
        check_plot_dir(args.plot)
    if args.init_weights is not None and not Path(args.init_weights).is_file():
        raise InputError(f"--init-weights {args.init_weights}: no such file")
    if not Path(args.graph).exists():
        raise InputError(f"{args.graph}: no such file or directory")
    shard_dir = _is_shard_dir(args.graph)
    if shard_dir:
        for flag, given in (("--reference", args.reference), ("--method", args.method),
                            ("--assignment", args.assignment),
                            ("--features", args.features), ("--labels", args.labels)):
            if given:
                raise InputError(f"{flag}: not allowed with a shard directory ({args.graph})")
    elif Path(args.graph).is_dir() and not is_graph_dir(args.graph):
        raise InputError(f"{args.graph}: a directory without {MANIFEST_NAME} or graph.json "
                         f"(neither a shard directory nor a graph directory)")
    elif args.reference:
        for flag, given in (("--method", args.method), ("--assignment", args.assignment)):
            if given:
                raise InputError(f"{flag}: not allowed with --reference (no partition)")
    else:
        if args.workers is None and args.assignment is None:
            raise InputError("--workers: give --workers K with --method M, --assignment "
                             "FILE, or --reference to train on a graph")
        if args.method is None and args.assignment is None:
            raise InputError("--method: give --method M or --assignment FILE with --workers")
    if args.workers is not None and args.workers < 1:
        raise InputError(f"--workers {args.workers}: must be at least 1")
    if args.method is not None:
        from shardtrain.plan.partition import METHODS
        if args.method not in METHODS:
            raise InputError(f"--method {args.method!r}: expected one of {', '.join(METHODS)}")
    if args.assignment is not None:
        from shardtrain.data.readers import require_regular_file
        require_regular_file(args.assignment, option="--assignment")
    _check_paths(args)              # before the checkpoint lock creates its folder
    _check_fault_options(args)
    return settings, shard_dir


DEFAULT_CHECKPOINT_EVERY = 10
MAX_TIMEOUT_S = 1e6          # poll(2) takes a C int of milliseconds: 2**31 ms is ~2.1e6 s
MAX_SLOW_FACTOR = 1000.0     # a straggler's sleep must stay within what time.sleep takes
# (option, attribute, largest value, why): values above these cannot be used by the code
LIMITS = (
    ("--epochs", "epochs", 999_999, "checkpoint files are named by six-digit epochs"),
    ("--checkpoint-every", "checkpoint_every", 999_999, "at most the largest --epochs"),
    ("--max-frame-bytes", "max_frame_bytes", 2**62, "frame sizes are 64-bit integers"),
)


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
        if f > MAX_SLOW_FACTOR:
            raise InputError(f"--slow-worker {text!r}: FACTOR must be at most "
                             f"{MAX_SLOW_FACTOR:g} (the straggler's sleeps must stay finite)")
        if w in out:
            raise InputError(f"--slow-worker {text!r}: worker {w} given twice")
        out[w] = f
    return out


def _check_fault_options(args) -> None:
    """--checkpoint, --checkpoint-every, --resume, --slow-worker, --max-frame-bytes."""
    from shardtrain.train import checkpoint

    extras = [(flag, given) for flag, given in (
        ("--checkpoint", args.checkpoint), ("--checkpoint-every", args.checkpoint_every),
        ("--resume", args.resume), ("--slow-worker", args.slow_worker),
        ("--max-frame-bytes", args.max_frame_bytes)) if given]
    for flag, _ in extras:
        if args.reference and flag in ("--slow-worker", "--max-frame-bytes"):
            raise InputError(f"{flag}: not available with --reference (partitioned runs only)")
        if args.transport == "mpi" and flag != "--max-frame-bytes":
            raise InputError(f"{flag}: not available with --transport mpi")
    if args.checkpoint_every is not None and not (args.checkpoint or args.resume):
        raise InputError("--checkpoint-every: give --checkpoint DIR as well")
    slow = parse_slow_workers(args.slow_worker)
    if args.workers is not None:
        _check_slow_range(slow, args.workers)
    if args.resume and args.init_weights:
        raise InputError("--init-weights: not allowed with --resume (the checkpoint holds "
                         "the weights)")
    # held for the whole run (released by `run`): one run per checkpoint folder
    locks = vars(args).setdefault("locks", [])
    for option, folder in (("--resume", args.resume), ("--checkpoint", args.checkpoint)):
        if folder and not any(Path(folder).resolve() == held.folder.resolve()
                              for held in locks):
            locks.append(checkpoint.lock_folder(folder, option))
    args.resumed = checkpoint.read_checkpoint(args.resume) if args.resume else None
    if args.resumed is not None and args.checkpoint is None:
        args.checkpoint = args.resume
    if args.checkpoint is not None:
        checkpoint.check_folder(args.checkpoint, resuming_from=args.resume)
        if args.checkpoint_every is None:
            stored = (args.resumed.doc.get("checkpoint_every") if args.resumed is not None
                      else None)
            args.checkpoint_every = stored if isinstance(stored, int) and stored > 0 \
                else DEFAULT_CHECKPOINT_EVERY


def check_model_fits(dims, settings: TrainSettings) -> None:
    """Refuse (naming --hidden/--layers) a model whose weights and Adam state (three
    copies, every process holds them) alone exceed this machine's memory."""
    import os

    elements = sum(int(a) * int(b) + (int(b) if settings.bias else 0) for a, b in dims)
    need = 3 * elements * settings.np_dtype.itemsize
    try:
        have = os.sysconf("SC_PHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
    except (OSError, ValueError):
        return
    if need > have:
        from shardtrain.units import human_bytes
        raise InputError(f"--hidden {settings.hidden} --layers {settings.layers}: the "
                         f"weights and optimiser state alone need {human_bytes(need)}, this "
                         f"machine has {human_bytes(have)}")


def _check_slow_range(slow: dict[int, float], workers: int) -> None:
    for w in slow:
        if w >= workers:
            raise InputError(f"--slow-worker {w}:{slow[w]:g}: worker {w} does not exist "
                             f"(workers 0..{workers - 1})")


def load_init_weights(path, dims, settings: TrainSettings):
    """Params from an .npz (no pickle), checked against the model: InputError naming it."""
    from shardtrain.train import model

    try:
        with np.load(path, allow_pickle=False) as bundle:
            arrays = {key: bundle[key] for key in bundle.files}
    except (OSError, ValueError) as exc:
        raise InputError(f"{path}: not a readable .npz of weights: "
                         f"{' '.join(str(exc).split())}") from None
    return model.params_from_arrays(arrays, dims, settings.bias, settings.np_dtype,
                                    source=str(path))


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

def predictions_csv(predicted: np.ndarray, labels: np.ndarray | None) -> str:
    """vertex,predicted,label lines, label empty where unknown (vectorised text)."""
    n = predicted.shape[0]
    ids = np.arange(n).astype(str)
    pred = predicted.astype(str)
    if labels is None:
        lab = np.full(n, "", dtype="<U1")
    else:
        lab = np.where(labels >= 0, labels.astype(str), "")
    rows = np.char.add(np.char.add(np.char.add(np.char.add(ids, ","), pred), ","), lab)
    return "vertex,predicted,label\n" + ("\n".join(rows.tolist()) + "\n" if n else "")


def write_outputs(args, result, labels, doc: dict) -> None:
    from shardtrain.files import save_npz_atomic, write_json_atomic, write_text_atomic
    from shardtrain.train import model

    if args.weights:
        save_npz_atomic(args.weights, **model.params_to_arrays(result.params))
    if args.predictions:
        write_text_atomic(args.predictions, predictions_csv(result.predictions, labels))
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
    return format_table(rows, cols)


def _traffic_lines(traffic: dict) -> list[str]:
    from shardtrain.units import human_bytes

    m, p = traffic["measured_payload_bytes"], traffic["predicted_payload_bytes"]
    verdict = "equal" if m == p else f"DIFFERENT by {m - p:+,} bytes"
    return [f"payload: measured {m:,} bytes ({human_bytes(m)}), predicted {p:,} bytes "
            f"({verdict}); framing {traffic['measured_framing_bytes']:,} bytes in "
            f"{traffic['frames']:,} frames"]


# ---------------------------------------------------------------- the command

def _emulated_link(args):
    """--emulate-link parsed (a transport.link.LinkModel) or None; refused where no pipes run."""
    if args.emulate_link is None:
        return None
    from shardtrain.transport.link import parse_link
    link = parse_link(args.emulate_link, "--emulate-link")
    if args.reference or args.transport == "mpi":
        raise InputError("--emulate-link: not available with "
                         f"{'--reference' if args.reference else '--transport mpi'} "
                         "(it slows the pipes between worker processes)")
    return link


def run(args) -> int:
    link = _emulated_link(args)
    if args.transport == "mpi":
        from shardtrain.cli.train_mpi import run_mpi
        return run_mpi(args)
    phase = ["checking the options"]
    args.locks = []
    with _signals_as_interrupt():
        try:
            return _run(args, phase, link)
        except KeyboardInterrupt as exc:     # a signal outside the training loop
            raise Interrupted(f"stopped by {getattr(exc, 'signal_name', 'Ctrl-C')} while "
                              f"{phase[0]}; no worker is left and no temporary file (start "
                              f"the same command again)") from None
        finally:
            for held in args.locks:
                held.release()


def _run(args, phase: list, link) -> int:
    from shardtrain.hooks import pause_point

    settings, from_shards = _check_options(args)

    progress = None
    tmp_dir = None
    try:
        if from_shards:
            from shardtrain.plan.shards import check_shard_dir, split_counts
            from shardtrain.train.coordinator import model_dims_of, shard_dir_facts

            phase[0] = "checking the shard directory"
            manifest = check_shard_dir(args.graph)
            facts = shard_dir_facts(args.graph, manifest)
            counts = split_counts(args.graph, manifest)
            if settings.early_stop and not counts["val"]:
                raise InputError(f"--early-stop: {args.graph} has no validation vertices "
                                 f"(the validation split is empty)")
            if args.workers is not None and args.workers != facts.workers:
                raise InputError(f"--workers {args.workers}: {args.graph} holds "
                                 f"{facts.workers} shards")
            _check_descriptors(facts.workers)
            dims = model_dims_of(facts, settings)
            check_model_fits(dims, settings)
            init = (load_init_weights(args.init_weights, dims, settings)
                    if args.init_weights else None)
            graph_doc = rundoc.graph_of_shards(args.graph, facts)
            if not args.quiet:
                print(_shard_dir_line(args.graph, facts, counts), flush=True)
            shard_dir, labels = args.graph, None
            graph_fp = _manifest_fingerprint(shard_dir)
        else:
            from shardtrain.train.reference import check_early_stop, check_trainable, model_dims

            phase[0] = "reading the graph"
            loaded = load_graph_from_args(args)
            graph = loaded.graph
            check_trainable(graph)
            check_early_stop(graph, settings)
            dims = model_dims(graph, settings)
            check_model_fits(dims, settings)
            init = (load_init_weights(args.init_weights, dims, settings)
                    if args.init_weights else None)
            assignment = None
            if args.assignment is not None:
                from shardtrain.plan.partition import load_assignment
                assignment, k = load_assignment(args.assignment, graph.num_vertices)
                if args.workers is not None and args.workers != k:
                    raise InputError(f"--workers {args.workers}: {args.assignment} assigns "
                                     f"vertices to {k} workers")
                args.workers = k
            elif not args.reference:
                from shardtrain.plan.partition import check_workers
                check_workers(args.workers, graph.num_vertices)
            graph_doc = rundoc.graph_of_file(loaded.source, graph, loaded.notes)
            if not args.quiet:
                print(graph_line(graph), flush=True)
            labels = graph.labels
            from shardtrain.data.graph import fingerprint
            graph_fp = fingerprint(graph)
            if not args.reference:
                _check_descriptors(args.workers)
                tmp_dir = tempfile.mkdtemp(prefix="shardtrain-shards-")
                shard_dir = str(Path(tmp_dir) / "shards")
                _build_shard_dir(graph, args, assignment, shard_dir, dims, phase)
        plan = (_reference_plan(args, settings, dims, graph_fp) if args.reference
                else _checkpoint_plan(args, settings, shard_dir, dims, graph_fp))
        progress = _Progress(settings.epochs, args.quiet,
                             args.resumed.epoch if args.resumed is not None else 0)
        phase[0] = "starting the training"
        pause_point("training")
        if args.reference:
            result = _train_reference(graph, settings, init, plan, args.resumed, progress)
        else:
            from shardtrain.train.coordinator import train_partitioned
            result = train_partitioned(shard_dir, settings, timeout_s=args.timeout,
                                       init_params=init, on_epoch=progress,
                                       max_frame_bytes=args.max_frame_bytes,
                                       checkpoint=plan, resume=args.resumed,
                                       slow=parse_slow_workers(args.slow_worker),
                                       link=link)
            if labels is None:
                labels = result.labels
        phase[0] = "writing the outputs"
        progress.close()
        progress = None
    finally:
        if progress is not None:
            progress.close()
        if tmp_dir is not None:
            shutil.rmtree(tmp_dir, ignore_errors=True)

    extra = {}
    if args.resumed is not None:
        extra["resumed_from"] = {"folder": str(args.resume), "epoch": args.resumed.epoch}
    if plan is not None:
        extra["checkpoint"] = {"folder": plan["folder"], "every": plan["every"]}
    if args.slow_worker:
        extra["slow_workers"] = {str(w): f
                                 for w, f in parse_slow_workers(args.slow_worker).items()}
    if link is not None:
        extra["emulated_link"] = {"gbps": link.gbps, "latency_us": link.latency_us}
    doc = rundoc.run_document(settings, graph_doc, result,
                              mode="reference" if args.reference else "partitioned", **extra)
    write_outputs(args, result, labels, doc)
    if not args.quiet:
        last = result.epochs[-1]
        print(f"final: loss {last['loss']:.6f}  train {_acc(last['train_acc'])}  "
              f"val {_acc(last['val_acc'])}  test {_acc(last['test_acc'])}")
        _say_early_stop(result.early_stop, args.quiet)
        if not args.reference:
            print(_worker_table(result.workers))
            for line in _traffic_lines(result.traffic):
                print(line)
    return 0


def _count(mask) -> str:
    return "-" if mask is None else f"{int(np.count_nonzero(mask)):,}"


def graph_line(graph) -> str:
    """One line of the graph's size, printed before training."""
    dim = graph.input_dim
    return (f"graph: {graph.num_vertices:,} vertices, {graph.num_edges:,} edges, "
            f"{'-' if dim is None else f'{dim:,}'} features, {graph.num_classes:,} classes; "
            f"split: {_count(graph.train_mask)} train, {_count(graph.val_mask)} val, "
            f"{_count(graph.test_mask)} test")


def _shard_dir_line(shard_dir, facts, counts: dict | None = None) -> str:
    """The same line for a shard directory, from its manifest and, where given, the mask
    counts of all its shards (`shards.split_counts`; an MPI rank 0 may see only its own
    shard, so it shows the manifest's training count alone)."""
    from shardtrain.plan.shards import load_manifest

    m = load_manifest(shard_dir)
    split = (f"{int(m['num_train_global']):,} train" if counts is None else
             f"{counts['train']:,} train, {counts['val']:,} val, {counts['test']:,} test")
    return (f"graph: {facts.num_vertices:,} vertices, {int(m.get('num_edges') or 0):,} "
            f"edges, {facts.input_dim:,} features, {facts.num_classes:,} classes; split: "
            f"{split}; {facts.workers} shards in {shard_dir}")


def _manifest_fingerprint(shard_dir):
    from shardtrain.plan.shards import load_manifest

    return load_manifest(shard_dir).get("graph_fingerprint")


def _checkpoint_plan(args, settings, shard_dir, dims, graph_fp) -> dict | None:
    """Check --slow-worker and --resume against the shards; the checkpoint plan or None."""
    from shardtrain.train import checkpoint
    from shardtrain.train.coordinator import shard_dir_facts

    k = shard_dir_facts(shard_dir).workers
    _check_slow_range(parse_slow_workers(args.slow_worker), k)
    if args.checkpoint is None and args.resumed is None:
        return None
    identity = checkpoint.run_identity(settings, workers=k, dims=dims,
                                       graph_fingerprint=graph_fp,
                                       shards_fingerprint=checkpoint.shard_dir_fingerprint(
                                           shard_dir))
    if args.resumed is not None:
        checkpoint.check_resumable(args.resumed, identity, epochs=settings.epochs,
                                   graph_label=str(args.graph))
    _check_not_stopped(args.resumed, settings)
    return {"folder": str(args.checkpoint), "every": int(args.checkpoint_every),
            "identity": identity}


def _check_not_stopped(resumed, settings) -> None:
    """A checkpoint written where early stopping ended its run has nothing to continue."""
    early = getattr(resumed, "early", None) if resumed is not None else None
    if not early or not settings.early_stop:
        return
    best = int(np.asarray(early.get("early_best_epoch", resumed.epoch)))
    if resumed.epoch - best >= settings.early_stop:
        raise InputError(f"--resume {resumed.folder}: that run stopped early at epoch "
                         f"{resumed.epoch} (no better validation loss since epoch {best}, "
                         f"--early-stop {settings.early_stop}); nothing to continue")


def _say_early_stop(summary: dict | None, quiet: bool) -> None:
    """The closing line of an early-stopping run: where it stopped, which weights it kept."""
    if quiet or summary is None:
        return
    where = (f"stopped at epoch {summary['stopped_at']}" if summary["stopped_at"] is not None
             else "ran every epoch")
    print(f"early stop (patience {summary['patience']}): {where}; weights and predictions "
          f"of the best epoch, {summary['best_epoch']} (validation loss "
          f"{summary['best_val_loss']:.6f})")


def _reference_plan(args, settings, dims, graph_fp) -> dict | None:
    """Check --resume against this reference run; the checkpoint plan or None."""
    from shardtrain.train import checkpoint

    if args.checkpoint is None and args.resumed is None:
        return None
    identity = checkpoint.run_identity(settings, workers=1, dims=dims,
                                       graph_fingerprint=graph_fp, shards_fingerprint=None,
                                       mode="reference")
    if args.resumed is not None:
        checkpoint.check_resumable(args.resumed, identity, epochs=settings.epochs,
                                   graph_label=str(args.graph))
    _check_not_stopped(args.resumed, settings)
    return {"folder": str(args.checkpoint), "every": int(args.checkpoint_every),
            "identity": identity}


def _train_reference(graph, settings, init, plan, resumed, progress):
    """The single-process run, checkpointed per `plan`, continuing `resumed`; Ctrl-C
    becomes Interrupted naming the checkpoint and the --resume that continues it."""
    from shardtrain.errors import Interrupted
    from shardtrain.train import checkpoint
    from shardtrain.train.reference import train_reference

    done = [resumed.epoch if resumed is not None else 0]

    def on_epoch(rec):
        done[0] = rec["epoch"]
        progress(rec)
    try:
        return train_reference(
            graph, settings, init_params=resumed.params if resumed is not None else init,
            init_adam=resumed.adam if resumed is not None else None,
            first_epoch=resumed.epoch + 1 if resumed is not None else 1, on_epoch=on_epoch,
            init_early=resumed.early if resumed is not None else None,
            on_epoch_end=None if plan is None else checkpoint.epoch_writer(plan,
                                                                           settings.epochs))
    except KeyboardInterrupt:
        where = f"after epoch {done[0]}" if done[0] else "before the first epoch ended"
        saved = None if plan is None else checkpoint.latest_epoch(plan["folder"])
        if plan is None:
            text = "no checkpoint was written (add --checkpoint DIR to be able to resume)"
        elif saved is None:
            text = f"no checkpoint was written yet in {plan['folder']} (nothing to resume)"
        else:
            text = (f"the latest checkpoint (epoch {saved}) is intact in {plan['folder']}: "
                    f"run the same command with --resume {plan['folder']} to continue")
        raise Interrupted(f"training stopped {where}; {text}") from None


class _Terminated(KeyboardInterrupt):
    """SIGTERM or SIGHUP, handled like Ctrl-C: the coordinator stops the workers."""

    def __init__(self, signal_name: str):
        super().__init__(signal_name)
        self.signal_name = signal_name


STOP_SIGNALS = (signal.SIGINT, signal.SIGTERM, signal.SIGHUP)


class _signals_as_interrupt:
    """For the whole command, Ctrl-C, SIGTERM and SIGHUP raise in the main thread as Ctrl-C
    does (exit 4 in every phase). Only the first one raises: later ones are ignored, so the
    clean-up (stopping workers, removing temporary shards) is never cut short."""

    def __enter__(self):
        fired = [False]

        def handler(signum, frame):
            if fired[0]:
                return
            fired[0] = True
            if signum == signal.SIGINT:
                raise KeyboardInterrupt()
            raise _Terminated(signal.Signals(signum).name)
        self.saved = {}
        try:
            for sig in STOP_SIGNALS:
                self.saved[sig] = signal.signal(sig, handler)
        except ValueError:           # not the main thread (embedded use): leave them alone
            for sig, old in self.saved.items():
                signal.signal(sig, old)
            self.saved = {}
        return self

    def __exit__(self, *exc):
        for sig, old in self.saved.items():
            signal.signal(sig, old)
        return False


def _check_descriptors(k: int) -> None:
    """Enough open files for k workers, before anything is built (InputError otherwise)."""
    from shardtrain.train.coordinator import ensure_descriptors

    ensure_descriptors(k)


def _build_shard_dir(graph, args, assignment, shard_dir: str, dims, phase: list) -> None:
    """Partition (or take the given assignment) and save the shards for the workers."""
    from shardtrain.hooks import pause_point
    from shardtrain.plan.shards import build_shards, save_shards

    k = args.workers
    details = None
    if assignment is None:
        from shardtrain.plan.partition import partition_plan
        phase[0] = "partitioning"
        pause_point("partitioning")
        assignment, details = partition_plan(graph, args.method, k, seed=args.seed,
                                             imbalance=args.imbalance)
    phase[0] = "building the shards"
    pause_point("building shards")
    shards = build_shards(graph, assignment, k)
    from shardtrain.data.graph import fingerprint
    meta = {"num_classes": dims[-1][1], "input_dim": dims[0][0],
            "method": args.method or "assignment", "seed": args.seed,
            "graph_fingerprint": fingerprint(graph)}
    if details is not None:
        meta["partition"] = details      # how the plan was made (METIS: scheme, balance)
    save_shards(shard_dir, shards, meta=meta)
    pause_point("shards built")
