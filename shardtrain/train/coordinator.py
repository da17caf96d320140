"""Starting, watching and stopping the worker processes of one partitioned training run.

The coordinator starts one "forkserver" process per shard (like a spawned child, it holds
only the pipe ends it is given, see `transport/pipes.py`), with BLAS pinned to one thread
in the environment before numpy is imported there, and again with threadpoolctl. The workers
run their epochs on their own and report
each epoch over a control pipe (msgpack, no pickle); the coordinator adds the reports up,
watches every worker's liveness (its process sentinel) while it waits, and stops them all
on the first failure: a dead or failing worker becomes a RunError naming it, its exit
status or signal and the last thing it was doing, never a hang.

epoch_s of a record is the slowest worker's wall time of that training step (forward,
backward, all-reduce, Adam; without the evaluation forward): the same span the reference
times, and what a cluster would wait for, since the all-reduce makes every step end at the
pace of the slowest worker.
"""
from __future__ import annotations

import logging
import multiprocessing
import os
import time
from dataclasses import replace
from multiprocessing.connection import Connection, wait
from typing import Callable, Final, cast

from shardtrain import defaults
from shardtrain.compat import worker_log_receiver
from shardtrain.errors import Interrupted, RunError, option
from shardtrain.train import model
from shardtrain.train.accounting import (
    PartitionedRunResult,
    ShardDirFacts,
    assemble_result,
    check_epochs_run,
    epoch_record,
    shard_dir_facts,
)
from shardtrain.train.codec import decode_message, decode_summary
from shardtrain.train.processes import (
    JOIN_S,
    blas_env_pinned,
    describe_exit,
    ensure_descriptors,
    mesh_pairs,
    stop_workers,
)
from shardtrain.train.settings import TrainSettings
from shardtrain.train.worker_process import WorkerOptions, process_main

log = logging.getLogger(__name__)

# forkserver: each worker is forked from a clean server process that has already imported
# numpy, scipy and the worker code (with BLAS pinned), so it holds only the pipe ends it is
# given, like a spawned child, without paying the interpreter start per worker.
START_METHOD: Final = "forkserver"
PRELOAD = ["numpy", "scipy.sparse", "msgpack", "threadpoolctl", "shardtrain.train.worker",
           "shardtrain.train.processes", "shardtrain.train.worker_process",
           "shardtrain.train.halo", "shardtrain.train.codec", "shardtrain.train.model",
           "shardtrain.plan.shards", "shardtrain.transport.meter",
           "shardtrain.transport.pipes"]
ERROR_GRACE_S = 0.5          # after a reported error, time to notice a silent death
POLL_S = 0.2                 # the watch loop wakes at least this often
PHASE_CHARS = 160            # room for a worker's phase text in shared memory


# ---------------------------------------------------------------- worker logs

class _Dispatch(logging.Handler):
    """Hand a worker's record to this process's logging tree, as if logged here."""

    def emit(self, record: logging.LogRecord) -> None:
        logging.getLogger(record.name).handle(record)


# ---------------------------------------------------------------- epoch aggregation

class _EpochBook:
    """Collects the per-worker reports of each epoch; a record is complete with k reports."""

    def __init__(self, k: int):
        self.k = k
        self.pending: dict[int, dict[int, dict]] = {}
        self.last_epoch: list[int | None] = [None] * k
        self.checkpoint: int | None = None    # the epoch of the latest checkpoint written

    def add(self, rep: dict) -> dict | None:
        w, e = int(rep["worker"]), int(rep["epoch"])
        self.last_epoch[w] = e
        if rep.get("checkpoint") is not None:
            self.checkpoint = int(rep["checkpoint"])
        bucket = self.pending.setdefault(e, {})
        bucket[w] = rep
        if len(bucket) < self.k:
            return None
        del self.pending[e]
        return epoch_record(e, [bucket[r] for r in range(self.k)])


# ---------------------------------------------------------------- the run

def train_partitioned(shard_dir, settings: TrainSettings, *,
                      timeout_s: float = defaults.TIMEOUT_S,
                      init_params=None, on_epoch: Callable[[dict], None] | None = None,
                      link=None, max_frame_bytes: int | None = None,
                      load_shard=None, facts: "ShardDirFacts | None" = None,
                      checkpoint: dict | None = None, resume=None,
                      slow: dict[int, float] | None = None, fault: dict | None = None
                      ) -> PartitionedRunResult:
    """Train on the shards in `shard_dir`, one process per shard, over pipes.

    `init_params`: {name: array} or model Params to start from (validated by every worker
    against the model shape). `link`: a transport.link.LinkModel to emulate a network.
    `timeout_s`: deadline of every receive; the coordinator itself gives up when no worker
    has said anything for 4 x timeout_s + 30 s. `load_shard` (a module-level function
    (dir, worker) -> Shard) and `facts` replace reading the shard directory, for tests.
    `checkpoint`: {"folder", "every", "identity" (checkpoint.run_identity)}: worker 0
    writes a checkpoint every `every` epochs and after the last (the folder is created).
    `resume`: a checkpoint.Checkpoint to continue from (checked by the caller with
    checkpoint.check_resumable); the run then does the epochs after it. `slow`: {worker:
    factor} stragglers (worker.SlowCompute). `fault`: test-only (shardtrain.hooks;
    default: from the environment).

    A worker that dies or fails is a RunError naming it, its exit status or signal and its
    last phase; Ctrl-C (KeyboardInterrupt) stops every worker and becomes Interrupted,
    naming the latest checkpoint and the `resume` folder that continues from it.
    """
    from shardtrain import hooks
    from shardtrain.transport import frames
    from shardtrain.transport.pipes import make_pipe_mesh

    settings.validate()
    if facts is None:
        from shardtrain.plan.shards import check_shard_dir

        # the whole set, before any process starts: a broken shard is one line, exit 2
        facts = shard_dir_facts(shard_dir, check_shard_dir(shard_dir))
    k = facts.workers
    if init_params is not None and not isinstance(init_params, dict):
        init_params = model.params_to_arrays(init_params)
    resumed = None
    first = 1
    if resume is not None:
        resumed = {"epoch": resume.epoch, "params": resume.params, "adam": resume.adam,
                   "early": getattr(resume, "early", None)}
        first = resume.epoch + 1
    options = WorkerOptions(timeout_s=float(timeout_s), link=link, init_params=init_params,
                            load_shard=load_shard,
                            max_frame_bytes=int(max_frame_bytes
                                                or frames.DEFAULT_MAX_FRAME_BYTES),
                            checkpoint=checkpoint, resume=resumed,
                            fault=fault or hooks.fault_spec())
    if checkpoint is not None:
        os.makedirs(checkpoint["folder"], exist_ok=True)
    slow = slow or {}
    ctx = multiprocessing.get_context(START_METHOD)
    if START_METHOD == "forkserver":
        ctx.set_forkserver_preload(PRELOAD)
    ensure_descriptors(k)
    logs = worker_log_receiver(ctx, _Dispatch(), "shardtrain-worker-logs")
    log_level = logging.getLogger("shardtrain").getEffectiveLevel()
    ends = make_pipe_mesh(k, mesh_pairs(k))
    procs, ctrls = [], []
    phases = [ctx.RawArray("c", PHASE_CHARS) for _ in range(k)]
    book = _EpochBook(k)
    try:
        with blas_env_pinned():
            for r in range(k):
                mine, theirs = ctx.Pipe(duplex=True)
                mine_opts = replace(options, slow=slow.get(r, 1.0))
                p = ctx.Process(target=process_main, name=f"shardtrain-worker-{r}",
                                args=(r, k, str(shard_dir), settings.to_dict(),
                                      facts.num_classes, ends[r], theirs, logs.queue,
                                      log_level, mine_opts, phases[r]), daemon=True)
                p.start()
                theirs.close()
                ends[r].close()          # the child has its own copies now
                procs.append(p)
                ctrls.append(mine)
        records, summaries = _watch(procs, ctrls, k, settings.epochs - first + 1, on_epoch,
                                    4 * float(timeout_s) + 30.0, book, phases)
        for p in procs:
            p.join(JOIN_S)
    except KeyboardInterrupt:
        stop_workers(procs)
        raise Interrupted(_interrupted_text(book, checkpoint)) from None
    finally:
        for e in ends:
            e.close()
        stop_workers(procs)
        for c in ctrls:
            c.close()
        logs.close()
    return assemble_result(records, summaries, facts, settings, epochs_run=len(records))


def _interrupted_text(book: _EpochBook, schedule: dict | None) -> str:
    """What an interrupted run says: where it stopped and how to go on."""
    done = [e for e in book.last_epoch if e is not None]
    where = (f"after epoch {min(done)}" if len(done) == book.k else "before the first epoch "
             "ended")
    if schedule is None:
        return (f"workers stopped {where}; no checkpoint was written (add "
                f"{option('checkpoint')} DIR to be able to resume)")
    from shardtrain.train.checkpoint import INDEX

    epoch = book.checkpoint
    try:                       # worker 0 may have committed one after its last report
        import json
        with open(os.path.join(schedule["folder"], INDEX), encoding="utf-8") as fh:
            epoch = int(json.load(fh)["epoch"])
    except (OSError, ValueError, KeyError, TypeError):
        pass
    if epoch is None:
        return (f"workers stopped {where}; no checkpoint was written yet in "
                f"{schedule['folder']} (nothing to resume)")
    return (f"workers stopped {where}; the latest checkpoint (epoch {epoch}) is intact in "
            f"{schedule['folder']}: run the same command with {option('resume')} "
            f"{schedule['folder']} to continue")


def _phase_text(buf) -> str:
    try:
        return buf.value.decode(errors="replace") or "starting"
    except (AttributeError, ValueError):
        return "an unknown phase"


def _watch(procs, ctrls, k, epochs, on_epoch, stall_s, book=None, phases=None):
    """Read reports until every worker is done; a failure stops the run with a RunError.

    A worker that exits without a word (a signal, os._exit) is the cause and is named at
    once. A reported error waits ERROR_GRACE_S for such a silent death, because the peers of
    a dead worker report "closed its pipe" errors that are only the consequence.
    """
    book = book if book is not None else _EpochBook(k)
    records: list[dict] = []
    summaries: list[dict | None] = [None] * k
    errors: list[str] = []
    error_deadline = None
    open_conns = {c: r for r, c in enumerate(ctrls)}
    sentinels = {p.sentinel: r for r, p in enumerate(procs)}
    last_news = time.monotonic()
    while any(s is None for s in summaries):
        if error_deadline is not None and time.monotonic() >= error_deadline:
            raise RunError(_root_cause(errors))
        ready = wait(list(open_conns) + list(sentinels), timeout=POLL_S)
        if not ready and time.monotonic() - last_news > stall_s:
            raise RunError(f"no worker reported anything for {stall_s:g} s (epochs reported: "
                           f"{_epochs_text(book.last_epoch)})")
        for obj in ready:
            if obj in open_conns:
                r = open_conns[obj]
                try:
                    msg = decode_message(cast(Connection, obj).recv_bytes())
                except (EOFError, OSError):
                    del open_conns[obj]        # the death shows up on its sentinel
                    continue
                last_news = time.monotonic()
                errors += _handle(msg, r, book, records, summaries, on_epoch)
            elif obj in sentinels:
                r = sentinels.pop(obj)
                errors += _drain(ctrls[r], r, book, records, summaries, on_epoch)
                if summaries[r] is None and not any(e.startswith(f"worker {r} ")
                                                    for e in errors):
                    procs[r].join(1.0)
                    during = (f"during {_phase_text(phases[r])}, " if phases is not None
                              else "")
                    raise RunError(f"worker {r} died ({describe_exit(procs[r].exitcode)}) "
                                   f"{during}{_where(book.last_epoch[r])}")
        if errors and error_deadline is None:
            error_deadline = time.monotonic() + ERROR_GRACE_S
    if errors:
        raise RunError(_root_cause(errors))
    check_epochs_run(records, cast("list[dict]", summaries), epochs)   # the loop filled all
    return records, summaries


CONSEQUENCE = "closed its pipe"     # the transport's words for a peer that went away


def _root_cause(errors: list[str]) -> str:
    """The first error that is not only the echo of another worker's exit."""
    return next((e for e in errors if CONSEQUENCE not in e), errors[0])


def _drain(conn, r, book, records, summaries, on_epoch) -> list[str]:
    """Messages a worker sent just before it exited."""
    errors = []
    try:
        while conn.poll():
            errors += _handle(decode_message(conn.recv_bytes()), r, book, records,
                              summaries, on_epoch)
    except (EOFError, OSError):
        pass
    return errors


def _handle(msg, r, book, records, summaries, on_epoch) -> list[str]:
    """Apply one control message; returns the error it reports, if any."""
    kind = msg.get("type")
    if kind == "epoch":
        rec = book.add(msg)
        if rec is not None:
            records.append(rec)
            if on_epoch is not None:
                on_epoch(rec)
    elif kind == "done":
        summaries[r] = decode_summary(msg)
    elif kind == "error":
        return [f"worker {r} failed during {msg.get('phase')}: {msg.get('message')}"]
    else:
        return [f"worker {r} sent an unknown control message {kind!r}"]
    return []


def _where(epoch) -> str:
    return "before reporting any epoch" if epoch is None else f"after reporting epoch {epoch}"


def _epochs_text(last: list) -> str:
    return ", ".join(f"worker {r}: {'-' if e is None else e}" for r, e in enumerate(last))


