"""The entry point of one worker process of the pipes coordinator (`coordinator.py`).

`process_main` loads only its own shard, builds its `PipeTransport`, runs
`worker.run_worker` and talks to the coordinator over a control pipe (`codec` messages).
Its options travel to the forkserver child as a `WorkerOptions`: a dataclass of plain
fields, which multiprocessing carries to the child on start like any other argument.
"""
from __future__ import annotations

import logging
import signal
from dataclasses import dataclass
from typing import TYPE_CHECKING, Callable

from shardtrain.errors import marked
from shardtrain.train.codec import encode_message, encode_summary
from shardtrain.train.processes import pin_blas_threads
from shardtrain.train.settings import TrainSettings
from shardtrain.train.worker import run_worker

if TYPE_CHECKING:
    from shardtrain.transport.link import LinkModel
    from shardtrain.transport.pipes import PipeTransport

log = logging.getLogger(__name__)


@dataclass(frozen=True)
class WorkerOptions:
    """What every worker of a run is told besides its rank, shard folder and settings.

    timeout_s: deadline of every receive; max_frame_bytes: largest frame accepted;
    link: the network link to emulate, or None; init_params: {name: array} to start from,
    or None; load_shard: a module-level function (dir, worker) -> Shard, or None for
    `shards.load_shard` (tests and fault injection pass their own); checkpoint:
    {"folder", "every", "identity"} or None (worker 0 writes); resume: {"epoch", "params",
    "adam", "early"} or None; slow: this worker's compute factor (1 = normal); fault:
    test-only, see `shardtrain.hooks`.
    """

    timeout_s: float
    max_frame_bytes: int
    link: LinkModel | None = None
    init_params: dict | None = None
    load_shard: Callable | None = None
    checkpoint: dict | None = None
    resume: dict | None = None
    slow: float = 1.0
    fault: dict | None = None


def _install_log_queue(log_queue, level: int) -> None:
    """Send this process's log records to the coordinator's multiprocessing-logging handler."""
    import logging.handlers

    root = logging.getLogger()
    for h in list(root.handlers):
        root.removeHandler(h)
    if log_queue is not None:
        root.addHandler(logging.handlers.QueueHandler(log_queue))
    root.setLevel(level)


def process_main(rank: int, size: int, shard_dir: str, settings_dict: dict, num_classes: int,
                 ends, ctrl, log_queue, log_level: int, options: WorkerOptions,
                 phase_buf=None) -> None:
    """Entry point of worker process `rank` (started by the coordinator, forkserver/spawn).

    Loads only its own shard, trains, and talks to the coordinator over `ctrl` with msgpack
    messages: {"type": "epoch", ...} per epoch, then {"type": "done", ...}, or
    {"type": "error", "worker", "phase", "message"} on failure (exit status 1).
    SIGINT and SIGHUP are ignored: on a terminal Ctrl-C (or the terminal's closing) reaches
    every process of the group, and the coordinator decides (it stops the workers with
    SIGTERM).
    `options`: see WorkerOptions; `phase_buf`: a shared char buffer the coordinator reads
    when this process dies without a word.
    """
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGHUP, signal.SIG_IGN)     # a closed terminal: the coordinator decides
    pin_blas_threads(int(settings_dict.get("threads", 1)))
    _install_log_queue(log_queue, log_level)
    from shardtrain import hooks

    phase = ["starting"]
    fault = hooks.phase_watcher(options.fault, rank)

    def on_phase(text: str) -> None:
        phase[0] = text
        if phase_buf is not None:
            phase_buf.value = text.encode()[:len(phase_buf) - 1]
        fault(text)

    def send(msg: dict) -> None:
        ctrl.send_bytes(encode_message(msg))

    transport: PipeTransport | None = None
    status = 0
    try:
        from shardtrain.transport.meter import Profile
        from shardtrain.transport.pipes import PipeTransport

        on_phase("loading shard")
        load = options.load_shard
        if load is None:
            from shardtrain.plan.shards import load_shard
            load = load_shard
        shard = load(shard_dir, rank)
        settings = TrainSettings.from_dict(settings_dict)
        profile = Profile(rank)
        transport = PipeTransport(rank, size, ends, profile, timeout_s=options.timeout_s,
                                  max_frame_bytes=options.max_frame_bytes,
                                  link=options.link)
        fault.transport = transport
        log.debug("worker %d: %d owned, %d halo rows, peers %s", rank, shard.num_owned,
                  shard.num_halo, shard.peers())
        resume = options.resume
        init_params, init_adam, epochs = options.init_params, None, None
        init_early = None
        if resume is not None:
            init_params, init_adam = resume["params"], resume["adam"]
            init_early = resume.get("early")
            epochs = range(int(resume["epoch"]) + 1, settings.epochs + 1)
        schedule = options.checkpoint if rank == 0 else None
        summary = run_worker(shard, settings, transport, profile,
                             lambda rec: send({"type": "epoch", **rec}),
                             num_classes=num_classes, init_params=init_params,
                             init_adam=init_adam, epochs_range=epochs, on_phase=on_phase,
                             on_epoch_end=(_checkpoint_writer(schedule, settings.epochs,
                                                              on_phase)
                                           if schedule else None),
                             slow_factor=float(options.slow or 1.0),
                             init_early=init_early)
        send({"type": "done", **encode_summary(summary)})
    except BaseException as exc:  # noqa: BLE001 - everything must reach the coordinator
        status = 1
        log.debug("worker %d failed", rank, exc_info=True)
        try:
            # the text keeps its parameter mentions: the coordinator's RunError words them
            # as its caller does (the command line: options)
            text = marked(exc)
            send({"type": "error", "worker": rank, "phase": phase[0],
                  "message": f"{type(exc).__name__}: {text}" if text else
                  type(exc).__name__})
        except (OSError, ValueError):
            pass
    finally:
        if transport is not None:
            transport.close()
        elif ends is not None:
            ends.close()
        ctrl.close()
    if status:
        raise SystemExit(status)


def _checkpoint_writer(schedule: dict, last_epoch: int, on_phase: Callable[[str], None]):
    """Worker 0's end-of-epoch hook: every schedule["every"] epochs and at the last one, write
    the weights and Adam state (identical on every worker after the all-reduce, so one
    writer is enough and nothing large crosses the control pipe)."""
    from shardtrain.train import checkpoint

    def stage(epoch: int, what: str) -> None:
        on_phase(f"epoch {epoch} checkpoint write" if what == "write" else f"epoch {epoch} compute")

    return checkpoint.epoch_writer(
        schedule, last_epoch, on_stage=stage,
        before_commit=lambda epoch: on_phase(f"epoch {epoch} checkpoint write, index not yet "
                                             f"renamed"))
