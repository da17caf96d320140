"""The library API of training: describe a run with a `RunConfig`, start it with `run`.

    outcome = run(RunConfig(source="shards"), transport="pipes")
    outcome.result.epochs, outcome.document        # the records; the run JSON

A run trains on a graph file (partitioned over `workers` shards built in a temporary
folder, or `mode="reference"`: single-process, the oracle), on an in-memory graph
(`graph=`), or on a shard directory written by `shardtrain split`. `transport="pipes"`
(default) starts one worker process per shard on this machine (`coordinator`);
`transport="mpi"` is collective: every rank of the MPI job calls `run` with the same
config, each trains its own shard (`mpi_driver`), and rank 0 gets the outcome (the other
ranks get None).

Every check of the config is made before anything is read, locked or started
(`check_config`), with errors naming the parameter of the value (a `ParameterError`; the
command line words it with its option); the caller's
own checks (`check=`, e.g. of its output paths) run next, then the checkpoint folders are
locked. The caller sees the run through callbacks: `on_ready(Ready)` once the inputs are
read (before partitioning and training), `on_epoch(record)` per epoch, and
`deliver(outcome)` at the end, still inside the run (locks held, signals handled), to
write and print its outputs. Nothing here prints.
"""
from __future__ import annotations

import math
import sys
import time
from contextlib import ExitStack, nullcontext
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

import numpy as np

from shardtrain import defaults
from shardtrain.data.graphdir import GRAPH_MANIFEST, is_graph_dir
from shardtrain.errors import EXIT_BAD_INPUT, InputError, ParameterError, option
from shardtrain.plan.shards import SHARDS_MANIFEST
from shardtrain.train import rundoc, session
from shardtrain.train.mpi_driver import JobStopped
from shardtrain.train.settings import TrainSettings

TRANSPORTS = ("pipes", "mpi")
MODES = ("partitioned", "reference", "single-process")
MAX_TIMEOUT_S = 1e6          # poll(2) takes a C int of milliseconds: 2**31 ms is ~2.1e6 s
MAX_SLOW_FACTOR = 1000.0     # a straggler's sleep must stay within what time.sleep takes
MPI_STOP_TIMEOUT_S = 60.0    # how long rank 0 waits for the others to take a stop message
# (RunConfig field or settings field, largest value, why): values above these cannot be
# used by the code
LIMITS = (
    ("epochs", 999_999, "checkpoint files are named by six-digit epochs"),
    ("checkpoint_every", 999_999, f"at most the largest {option('epochs')}"),
    ("max_frame_bytes", 2**62, "frame sizes are 64-bit integers"),
)


@dataclass
class RunConfig:
    """One training run.

    source: a graph file (.npz, .mtx, edge list) or a shard directory; graph: an
    in-memory `Graph` instead of a file (source is then only its label in the run JSON).
    features, labels, input_dim: how to read a graph file (`readers.load_graph`).
    mode: "partitioned", "reference" (single-process; graph sources only) or
    "single-process" (graph sources only): one process computing exactly what the run
    partitioned by workers/method or assignment computes under `settings`' halo scheme
    (`single_process.SchemeProducts`; with every scheme off it is the reference).
    workers, method, assignment (a vertex -> worker file), imbalance: the partition of a
    graph source (a shard directory brings its own; `workers`, if given, must agree).
    checkpoint, checkpoint_every, resume: checkpoint folder, epochs between checkpoints
    (default 10, or the resumed run's), a folder to resume from. warm_start: a checkpoint
    folder of a run on another graph (an older version of this one) to continue from: its
    weights and Adam state, the epochs numbered on after its epoch (`settings.epochs` more
    of them), early stopping started afresh; the model shape must be the same.
    init_weights: an .npz of weights to start from. timeout_s: deadline of every receive;
    max_frame_bytes: the largest halo/all-reduce frame accepted (None: 2 GiB); link: a
    `transport.link.LinkModel` to emulate; slow_workers: {worker: factor >= 1} stragglers.
    The BLAS threads per process are `settings.threads`.
    """

    source: str
    settings: TrainSettings = field(default_factory=TrainSettings)
    mode: str = "partitioned"
    graph: Any = None
    features: str | None = None
    labels: str | None = None
    input_dim: int | None = None
    workers: int | None = None
    method: str | None = None
    assignment: str | None = None
    imbalance: float = defaults.IMBALANCE
    checkpoint: str | None = None
    checkpoint_every: int | None = None
    resume: str | None = None
    warm_start: str | None = None
    init_weights: str | None = None
    timeout_s: float = defaults.TIMEOUT_S
    max_frame_bytes: int | None = None
    link: Any = None
    slow_workers: dict[int, float] = field(default_factory=dict)

    @property
    def reference(self) -> bool:
        return self.mode == "reference"

    @property
    def single_process(self) -> bool:
        return self.mode == "single-process"


@dataclass
class Ready:
    """What `on_ready` is told once the inputs are read: the graph (a graph source) or the
    shard directory, its facts, manifest and split counts (None under MPI, where rank 0
    reads only the manifest); the epochs to run and those already done (a resume)."""

    epochs: int
    done: int = 0
    graph: Any = None
    shard_dir: str | None = None
    facts: Any = None
    manifest: dict | None = None
    counts: dict | None = None


@dataclass
class RunOutcome:
    """What `run` returns: the result (`reference.RunResult` or
    `accounting.PartitionedRunResult`), the run JSON (`rundoc.run_document`), the labels
    by global id for the predictions file (None where unknown) and the mode."""

    result: Any
    document: dict
    labels: np.ndarray | None
    mode: str
    transport: str


# ---------------------------------------------------------------- checks

def is_shard_dir(path) -> bool:
    return Path(path).is_dir() and (Path(path) / SHARDS_MANIFEST).is_file()


_MPI = f"{option('transport')} mpi"     # "with transport mpi" (the CLI: "--transport mpi")


def check_config(config: RunConfig, transport: str = defaults.TRANSPORT) -> bool:
    """Everything that can be checked without reading the inputs; returns whether the
    source is a shard directory. A ParameterError naming the RunConfig field (or
    `transport`) otherwise."""
    if transport not in TRANSPORTS:
        raise ParameterError("transport", f"expected one of {', '.join(TRANSPORTS)}",
                             value=repr(transport))
    if config.mode not in MODES:
        raise ParameterError("mode", f"expected one of {', '.join(MODES)}",
                             value=repr(config.mode))
    if config.link is not None and (config.reference or transport == "mpi"):
        raise ParameterError("link", "not available with "
                             f"{option('reference') if config.reference else _MPI} "
                             "(it slows the pipes between worker processes)")
    if transport == "mpi" and not is_shard_dir(config.source):
        raise ParameterError("transport", f"{config.source} is not a shard directory (write "
                             f"one with `shardtrain split`; every rank must see it at this "
                             f"path)", value="mpi")
    settings = config.settings.validate()
    if config.single_process:
        _check_single_process(config, transport)
    if settings.halo_stale:
        for option_name, path in (("checkpoint", config.checkpoint),
                                  ("resume", config.resume)):
            if path:
                raise ParameterError(option_name, f"not available with "
                                                  f"{option('halo_stale')} (a "
                                           f"checkpoint does not hold the stale halo rows "
                                           f"the next epoch would use)")
    if config.reference and not settings.scheme.exact(settings.np_dtype):
        name = ("halo_stale" if settings.scheme.stale else
                "halo_keep" if settings.scheme.sampled else "halo_format")
        raise ParameterError(name, f"not available with {option('reference')} (no halo; "
                                   f"{option('single_process')} with {option('workers')} "
                                   f"computes a scheme's run in one process)")
    for name, top, why in LIMITS:
        value = getattr(settings if name == "epochs" else config, name)
        if value is not None and value > top:
            raise ParameterError(name, f"must be at most {top:,} ({why})", value=value)
    if not (math.isfinite(config.timeout_s) and 0 < config.timeout_s <= MAX_TIMEOUT_S):
        raise ParameterError("timeout_s", f"must be a number of seconds > 0 and at most "
                             f"{MAX_TIMEOUT_S:g} (the receive deadlines wait in whole "
                             f"milliseconds of a C int)", value=f"{config.timeout_s:g}")
    if not 0 <= config.imbalance < 1:
        raise ParameterError("imbalance", "must lie in [0, 1)", value=f"{config.imbalance:g}")
    if config.init_weights is not None and not Path(config.init_weights).is_file():
        raise ParameterError("init_weights", "no such file", value=config.init_weights)
    from_shards = config.graph is None and is_shard_dir(config.source)
    if config.graph is None and not Path(config.source).exists():
        raise InputError(f"{config.source}: no such file or directory")
    if from_shards:
        for name, given in (("reference", config.reference),
                            ("single_process", config.single_process),
                            ("method", config.method),
                            ("assignment", config.assignment),
                            ("features", config.features), ("labels", config.labels)):
            if given:
                raise ParameterError(name, f"not allowed with a shard directory "
                                           f"({config.source})")
    elif (config.graph is None and Path(config.source).is_dir()
          and not is_graph_dir(config.source)):
        raise InputError(f"{config.source}: a directory without {SHARDS_MANIFEST} or "
                         f"{GRAPH_MANIFEST} (neither a shard directory nor a graph directory)")
    elif config.reference:
        for name, given in (("method", config.method), ("assignment", config.assignment),
                            ("workers", config.workers is not None)):
            if given:
                raise ParameterError(name, f"not allowed with {option('reference')} "
                                           f"(no partition)")
    else:
        if config.workers is None and config.assignment is None:
            raise ParameterError("workers", f"give {option('workers')} K with "
                                 f"{option('method')} M, {option('assignment')} FILE, or "
                                 f"{option('reference')} to train on a graph")
        if config.method is None and config.assignment is None:
            raise ParameterError("method", f"give {option('method')} M or "
                                 f"{option('assignment')} FILE with {option('workers')}")
    if config.workers is not None and config.workers < 1:
        raise ParameterError("workers", "must be at least 1", value=config.workers)
    if config.method is not None:
        from shardtrain.plan.partition import METHODS
        if config.method not in METHODS:
            raise ParameterError("method", f"expected one of {', '.join(METHODS)}",
                                 value=repr(config.method))
    if config.assignment is not None:
        from shardtrain.data.readers import require_regular_file
        require_regular_file(config.assignment, param="assignment")
    _check_run_options(config, transport)
    return from_shards


def _check_single_process(config: RunConfig, transport: str) -> None:
    """The single-process mode: pipes only, no checkpoints, links or stragglers."""
    if transport == "mpi":
        raise ParameterError("single_process", f"not available with {_MPI} (one process)")
    for name, given in (("checkpoint", config.checkpoint), ("resume", config.resume),
                        ("checkpoint_every", config.checkpoint_every),
                        ("warm_start", config.warm_start),
                        ("slow_workers", config.slow_workers),
                        ("max_frame_bytes", config.max_frame_bytes), ("link", config.link)):
        if given:
            raise ParameterError(name, f"not available with {option('single_process')}")


def _check_run_options(config: RunConfig, transport: str) -> None:
    """checkpoint, checkpoint_every, resume, slow_workers, max_frame_bytes."""
    extras = [name for name, given in (
        ("checkpoint", config.checkpoint), ("checkpoint_every", config.checkpoint_every),
        ("resume", config.resume), ("slow_workers", config.slow_workers),
        ("max_frame_bytes", config.max_frame_bytes)) if given]
    for name in extras:
        if config.reference and name in ("slow_workers", "max_frame_bytes"):
            raise ParameterError(name, f"not available with {option('reference')} "
                                       f"(partitioned runs only)")
        if transport == "mpi" and name != "max_frame_bytes":
            raise ParameterError(name, f"not available with {_MPI}")
    if config.checkpoint_every is not None and not (config.checkpoint or config.resume):
        raise ParameterError("checkpoint_every", f"give {option('checkpoint')} DIR as well")
    for w, f in config.slow_workers.items():
        if not (isinstance(w, int) and w >= 0 and math.isfinite(f) and
                1 <= f <= MAX_SLOW_FACTOR):
            raise ParameterError("slow_workers", f"expected W >= 0 and 1 <= FACTOR <= "
                                 f"{MAX_SLOW_FACTOR:g}", value=f"{w}:{f:g}")
    if config.workers is not None:
        check_slow_range(config.slow_workers, config.workers)
    if config.resume and config.init_weights:
        raise ParameterError("init_weights", f"not allowed with {option('resume')} (the "
                             f"checkpoint holds the weights)")
    if config.warm_start is not None:
        if transport == "mpi":
            raise ParameterError("warm_start", f"not available with {_MPI}")
        for name, given in (("resume", config.resume), ("init_weights", config.init_weights)):
            if given:
                raise ParameterError(name, f"not allowed with {option('warm_start')} (the "
                                           f"checkpoint holds the weights)")
        if not Path(config.warm_start).is_dir():
            raise ParameterError("warm_start", "no such folder", value=config.warm_start)


def check_slow_range(slow: dict[int, float], workers: int) -> None:
    for w in slow:
        if w >= workers:
            raise ParameterError("slow_workers", f"worker {w} does not exist (workers "
                                 f"0..{workers - 1})", value=f"{w}:{slow[w]:g}")


def check_model_fits(dims, settings: TrainSettings) -> None:
    """Refuse (naming hidden and layers) a model whose weights and Adam state (three
    copies, every process holds them) alone exceed this machine's memory."""
    import os

    from shardtrain.plan.survey import parameter_elements

    elements = parameter_elements(settings.hops(dims), bias=settings.bias)
    need = 3 * elements * settings.np_dtype.itemsize
    try:
        have = os.sysconf("SC_PHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
    except (OSError, ValueError):
        return
    if need > have:
        from shardtrain.units import human_bytes
        raise InputError(f"{option('hidden')} {settings.hidden} {option('layers')} "
                         f"{settings.layers}: the weights and optimiser state alone need "
                         f"{human_bytes(need)}, this machine has {human_bytes(have)}")


def read_warm_start(folder, settings: TrainSettings):
    """(the checkpoint in `folder` with its early-stopping state left out, the settings
    with `epochs` counted on from its epoch)."""
    import dataclasses

    from shardtrain.train import checkpoint

    ckpt = checkpoint.read_checkpoint(folder, param="warm_start")
    total = ckpt.epoch + settings.epochs
    top = dict((name, limit) for name, limit, _ in LIMITS)["epochs"]
    if total > top:
        raise ParameterError("epochs", f"the checkpoint in {folder} is at epoch {ckpt.epoch}: "
                                       f"{ckpt.epoch} + {settings.epochs} is above {top:,}",
                             value=settings.epochs)
    return (dataclasses.replace(ckpt, early={}),
            dataclasses.replace(settings, epochs=total))


def check_warm_start(ckpt, dims, settings: TrainSettings) -> None:
    """Refuse (one line naming warm_start) a checkpoint of another model shape: layers and
    widths (feature width, hidden, classes), bias, or dtype."""
    from shardtrain.train import model

    theirs = [list(map(int, d)) for d in ckpt.doc["dims"]]
    mine = [list(map(int, d)) for d in dims]
    if theirs != mine:
        raise ParameterError("warm_start", f"the checkpoint's model has layers {theirs}, this "
                                           f"run's has {mine} (another feature width, hidden "
                                           f"width, layer count or class count)",
                             value=ckpt.folder)
    their_dtype = ckpt.doc["settings"].get("dtype")
    if their_dtype != settings.dtype:
        raise ParameterError("warm_start", f"the checkpoint was trained in {their_dtype}, this "
                                           f"run asks for {settings.dtype}",
                             value=ckpt.folder)
    model.params_from_arrays(ckpt.params, dims, settings.bias, settings.np_dtype,
                             source=f"{option('warm_start')} {ckpt.folder}")


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
                                    source=str(path), hops=settings.hops(dims))


# ---------------------------------------------------------------- initial weights

def initial_weights(config: RunConfig):
    """The weights a run of `config` would start from (`--init-weights`, else Glorot of the
    settings' seed), as Params, without training: what `train --epochs 0 --weights OUT`
    writes. `config.settings.epochs` may be 0 here (and only here). Reads the graph's
    feature width and classes (or a shard directory's manifest)."""
    from dataclasses import replace

    from shardtrain.train import model

    settings = config.settings
    if settings.epochs == 0:
        settings = replace(settings, epochs=1)
    config = replace(config, settings=settings)
    from_shards = check_config(config)
    if from_shards:
        from shardtrain.train.accounting import model_dims_of, shard_dir_facts

        dims = model_dims_of(shard_dir_facts(config.source), settings)
    else:
        from shardtrain.train.reference import check_trainable, model_dims

        graph, _ = _load_graph(config)
        check_trainable(graph)
        dims = model_dims(graph, settings)
    check_model_fits(dims, settings)
    if config.init_weights:
        return load_init_weights(config.init_weights, dims, settings)
    return model.glorot_init(dims, settings.seed, settings.np_dtype, settings.bias,
                             hops=settings.hops(dims))


# ---------------------------------------------------------------- the run

def run(config: RunConfig, *, transport: str = defaults.TRANSPORT,
        on_epoch: Callable[[dict], None] | None = None,
        on_ready: Callable[[Ready], None] | None = None,
        check: Callable[[], None] | None = None,
        deliver: Callable[[RunOutcome], None] | None = None,
        signals: bool = True) -> RunOutcome | None:
    """Train as `config` says over `transport` ("pipes" or "mpi"); see the module text.

    `signals`: turn Ctrl-C, SIGTERM and SIGHUP into `Interrupted` for the whole run (pipes
    only; `session.signals_as_interrupt`). Under MPI, `mpi_driver.JobStopped` means rank 0's
    checks failed before training (exit with its code); any other error happened after
    the start: report it and call `abort_mpi_job`.
    """
    if transport == "mpi":
        return _run_mpi(config, on_epoch, on_ready, check, deliver)
    sess = session.Session()
    with session.signals_as_interrupt() if signals else nullcontext():
        try:
            return _run_pipes(config, transport, sess, on_epoch, on_ready, check, deliver)
        except KeyboardInterrupt as exc:     # a signal outside the training loop
            raise sess.interrupted(exc) from None
        finally:
            sess.release()


def _run_pipes(config, transport, sess, on_epoch, on_ready, check, deliver) -> RunOutcome:
    from shardtrain.hooks import pause_point

    from_shards = check_config(config, transport)
    if check is not None:
        check()                  # the caller's checks, before a checkpoint lock makes a folder
    ckpts = session.open_checkpoints(sess, config.checkpoint, config.checkpoint_every,
                                     config.resume)
    settings = config.settings
    done = ckpts.resumed.epoch if ckpts.resumed is not None else 0
    warm = None
    if config.warm_start is not None:
        warm, settings = read_warm_start(config.warm_start, settings)
        done = warm.epoch
    with ExitStack() as stack:
        labels = None
        graph = None
        if from_shards:
            from shardtrain.plan.shards import check_shard_dir, load_manifest, split_counts
            from shardtrain.train.accounting import model_dims_of, shard_dir_facts
            from shardtrain.train.processes import ensure_descriptors

            sess.phase = "checking the shard directory"
            manifest = check_shard_dir(config.source)
            facts = shard_dir_facts(config.source, manifest)
            counts = split_counts(config.source, manifest)
            if settings.early_stop and not counts["val"]:
                raise ParameterError("early_stop", f"{config.source} has no validation "
                                     f"vertices (the validation split is empty)")
            if config.workers is not None and config.workers != facts.workers:
                raise ParameterError("workers", f"{config.source} holds {facts.workers} "
                                     f"shards", value=config.workers)
            ensure_descriptors(facts.workers)
            dims = model_dims_of(facts, settings)
            check_model_fits(dims, settings)
            if warm is not None:
                check_warm_start(warm, dims, settings)
            init = (load_init_weights(config.init_weights, dims, settings)
                    if config.init_weights else None)
            graph_doc = rundoc.graph_of_shards(config.source, facts)
            if on_ready is not None:
                on_ready(Ready(settings.epochs, done, shard_dir=str(config.source),
                               facts=facts, manifest=load_manifest(config.source),
                               counts=counts))
            shard_dir = config.source
            graph_fp = load_manifest(shard_dir).get("graph_fingerprint")
            workers = facts.workers
        else:
            from shardtrain.data.graph import fingerprint
            from shardtrain.train.reference import (
                check_early_stop,
                check_trainable,
                model_dims,
            )

            sess.phase = "reading the graph"
            graph, graph_doc = _load_graph(config)
            check_trainable(graph)
            check_early_stop(graph, settings)
            dims = model_dims(graph, settings)
            check_model_fits(dims, settings)
            if warm is not None:
                check_warm_start(warm, dims, settings)
            init = (load_init_weights(config.init_weights, dims, settings)
                    if config.init_weights else None)
            assignment = None
            workers = config.workers
            if config.assignment is not None:
                from shardtrain.plan.partition import load_assignment
                assignment, k = load_assignment(config.assignment, graph.num_vertices)
                if workers is not None and workers != k:
                    raise ParameterError("workers", f"{config.assignment} assigns vertices "
                                         f"to {k} workers", value=workers)
                workers = k
            elif not config.reference:
                from shardtrain.plan.partition import check_workers
                check_workers(workers, graph.num_vertices)
            if config.single_process and assignment is None:
                from shardtrain.plan.partition import partition_plan

                sess.phase = "partitioning"        # as session.build_shard_dir does
                assert workers is not None and config.method is not None
                assignment, _ = partition_plan(graph, config.method, workers,
                                               seed=settings.seed, imbalance=config.imbalance)
            if on_ready is not None:
                on_ready(Ready(settings.epochs, done, graph=graph))
            labels = graph.labels
            graph_fp = fingerprint(graph)
            shard_dir = None
            if not (config.reference or config.single_process):
                from shardtrain.train.processes import ensure_descriptors

                assert workers is not None      # checked above or set by the assignment
                ensure_descriptors(workers)
                shard_dir = stack.enter_context(session.temporary_folder())
                session.build_shard_dir(sess, graph, workers=workers, method=config.method,
                                        assignment=assignment, seed=settings.seed,
                                        imbalance=config.imbalance, dims=dims,
                                        shard_dir=shard_dir)
        if not (config.reference or config.single_process):
            from shardtrain.train.accounting import shard_dir_facts

            workers = shard_dir_facts(shard_dir).workers
            check_slow_range(config.slow_workers, workers)
        schedule = session.checkpoint_schedule(ckpts, settings, workers=workers or 1,
                                               dims=dims, graph_fp=graph_fp,
                                               shard_dir=shard_dir,
                                               source_label=str(config.source))
        sess.phase = "starting the training"
        pause_point("training")
        if config.reference:
            result = session.train_reference_checkpointed(graph, settings, init, schedule,
                                                          ckpts.resumed or warm, on_epoch)
        elif config.single_process:
            from shardtrain.train.single_process import train_single_process
            assert graph is not None and assignment is not None   # a graph source, split
            result = train_single_process(graph, settings, assignment, init_params=init,
                                          on_epoch=on_epoch)
        else:
            from shardtrain.train.coordinator import train_partitioned
            result = train_partitioned(shard_dir, settings, timeout_s=config.timeout_s,
                                       init_params=init, on_epoch=on_epoch,
                                       max_frame_bytes=config.max_frame_bytes,
                                       checkpoint=schedule, resume=ckpts.resumed or warm,
                                       slow=dict(config.slow_workers), link=config.link)
            if labels is None:
                labels = result.labels
        sess.phase = "writing the outputs"
    extra: dict = {}
    if ckpts.resumed is not None:
        extra["resumed_from"] = {"folder": str(config.resume),
                                 "epoch": ckpts.resumed.epoch}
    if warm is not None:
        extra["warm_start"] = {"folder": str(config.warm_start), "epoch": warm.epoch,
                               "graph_fingerprint": warm.doc.get("graph_fingerprint"),
                               "shards_fingerprint": warm.doc.get("shards_fingerprint")}
    if schedule is not None:
        extra["checkpoint"] = {"folder": schedule["folder"], "every": schedule["every"]}
    if config.slow_workers:
        extra["slow_workers"] = {str(w): f for w, f in config.slow_workers.items()}
    if config.link is not None:
        extra["emulated_link"] = {"gbps": config.link.gbps,
                                  "latency_us": config.link.latency_us}
    mode = config.mode
    doc = rundoc.run_document(settings, graph_doc, result, mode=mode, **extra)
    outcome = RunOutcome(result, doc, labels, mode, transport)
    if deliver is not None:
        deliver(outcome)
    return outcome


def _load_graph(config: RunConfig):
    """(graph, the run JSON's graph entry) of a graph source."""
    if config.graph is not None:
        return config.graph, rundoc.graph_of_file(config.source, config.graph)
    from shardtrain.data.readers import load_graph

    loaded = load_graph(config.source, features=config.features, labels=config.labels,
                        input_dim=config.input_dim, seed=config.settings.seed)
    return loaded.graph, rundoc.graph_of_file(loaded.source, loaded.graph, loaded.notes)


# ---------------------------------------------------------------- under MPI

def _prepare_mpi(config: RunConfig, check):
    """Rank 0's checks: (settings, shard facts, manifest, init weights); InputError
    otherwise."""
    from shardtrain.plan.shards import load_manifest
    from shardtrain.train.accounting import model_dims_of, shard_dir_facts

    check_config(config, "mpi")
    if check is not None:
        check()
    settings = config.settings
    facts = shard_dir_facts(config.source)
    if config.workers is not None and config.workers != facts.workers:
        raise ParameterError("workers", f"{config.source} holds {facts.workers} shards",
                             value=config.workers)
    dims = model_dims_of(facts, settings)
    check_model_fits(dims, settings)
    init = (load_init_weights(config.init_weights, dims, settings)
            if config.init_weights else None)
    return settings, facts, load_manifest(config.source), init


def _run_mpi(config, on_epoch, on_ready, check, deliver) -> RunOutcome | None:
    from shardtrain.train import mpi_driver

    comm = mpi_driver.world()
    settings: TrainSettings | None = None
    facts = init = None
    if comm.Get_rank() == mpi_driver.ROOT:
        try:
            settings, facts, manifest, init = _prepare_mpi(config, check)
        except InputError as exc:
            mpi_driver.stop_job(comm, EXIT_BAD_INPUT, MPI_STOP_TIMEOUT_S)
            raise JobStopped(str(exc), EXIT_BAD_INPUT, report=True) from None
        if on_ready is not None:
            on_ready(Ready(settings.epochs, 0, shard_dir=str(config.source), facts=facts,
                           manifest=manifest))
    result = mpi_driver.train_partitioned(config.source, settings, comm=comm,
                                          timeout_s=config.timeout_s, init_params=init,
                                          on_epoch=on_epoch,
                                          max_frame_bytes=config.max_frame_bytes)
    if result is None:
        return None
    assert settings is not None and facts is not None      # rank 0 set them
    doc = rundoc.run_document(settings, rundoc.graph_of_shards(config.source, facts), result,
                              mode="partitioned", transport="mpi")
    outcome = RunOutcome(result, doc, result.labels, "partitioned", "mpi")
    if deliver is not None:
        deliver(outcome)
    return outcome


def mpi_rank_and_size() -> tuple[int, int]:
    """This process's rank and the job's size (InputError when mpi4py is missing)."""
    from shardtrain.train import mpi_driver

    comm = mpi_driver.world()
    return comm.Get_rank(), comm.Get_size()


# The launcher forwards a rank's stderr on its own schedule and Abort ends the forwarder too.
MPI_ABORT_GRACE_S = 0.5


def abort_mpi_job(code: int) -> None:
    """End every rank of the MPI job with exit status `code` (after reporting the error).

    The error line has been written and flushed; the pause lets the launcher pass it on
    before the job is torn down (without it the line was sometimes lost).
    """
    from shardtrain.train import mpi_driver

    sys.stderr.flush()
    time.sleep(MPI_ABORT_GRACE_S)
    mpi_driver.abort_job(mpi_driver.world(), code)
