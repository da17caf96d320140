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
import signal
import time
from contextlib import contextmanager
from dataclasses import dataclass, field
from multiprocessing.connection import Connection, wait
from typing import Callable, Final, cast

import numpy as np

from shardtrain.compat import worker_log_receiver
from shardtrain.errors import InputError, Interrupted, RunError
from shardtrain.train import model, worker
from shardtrain.train.settings import TrainSettings

log = logging.getLogger(__name__)

# forkserver: each worker is forked from a clean server process that has already imported
# numpy, scipy and the worker code (with BLAS pinned), so it holds only the pipe ends it is
# given, like a spawned child, without paying the interpreter start per worker.
START_METHOD: Final = "forkserver"
PRELOAD = ["numpy", "scipy.sparse", "msgpack", "threadpoolctl", "shardtrain.train.worker",
           "shardtrain.train.model", "shardtrain.plan.shards", "shardtrain.transport.meter",
           "shardtrain.transport.pipes"]
JOIN_S = 5.0                 # how long stopped workers get before they are killed
ERROR_GRACE_S = 0.5          # after a reported error, time to notice a silent death
POLL_S = 0.2                 # the watch loop wakes at least this often
PHASE_CHARS = 160            # room for a worker's phase text in shared memory


@dataclass
class PartitionedRunResult:
    """What `train_partitioned` returns: the reference's RunResult fields plus the account
    of the run (traffic measured and predicted, per-worker rows, merged profile)."""

    epochs: list[dict]
    params: model.Params
    predictions: np.ndarray
    traffic: dict = field(default_factory=dict)
    workers: list[dict] = field(default_factory=list)
    profile: dict = field(default_factory=dict)
    labels: np.ndarray | None = None     # the shards' labels by global id (-1: none)
    early_stop: dict | None = None       # stopping.EarlyStop.summary(), or None when off


# ---------------------------------------------------------------- worker logs

class _Dispatch(logging.Handler):
    """Hand a worker's record to this process's logging tree, as if logged here."""

    def emit(self, record: logging.LogRecord) -> None:
        logging.getLogger(record.name).handle(record)


# ---------------------------------------------------------------- shard directory facts

@dataclass(frozen=True)
class ShardDirFacts:
    workers: int
    num_vertices: int
    num_classes: int
    input_dim: int


def shard_dir_facts(shard_dir, manifest: dict | None = None) -> ShardDirFacts:
    """Worker count, graph size, classes and feature width from the shard manifest
    (checked by `shards.load_manifest`; pass `manifest` when it is already read)."""
    from shardtrain.plan.shards import MANIFEST, load_manifest

    m = manifest if manifest is not None else load_manifest(shard_dir)
    if m.get("input_dim") is None:
        raise InputError(f"{os.path.join(str(shard_dir), MANIFEST)}: the shards have no "
                         f"vertex features (input_dim null): nothing to train on")
    return ShardDirFacts(workers=m["workers"], num_vertices=m["num_vertices"],
                         num_classes=m["num_classes"], input_dim=m["input_dim"])


# ---------------------------------------------------------------- process handling

@contextmanager
def _blas_env_pinned():
    """Spawned children copy the environment at start: pin BLAS before they import numpy."""
    saved = {name: os.environ.get(name) for name in worker.BLAS_ENV}
    os.environ.update({name: "1" for name in worker.BLAS_ENV})
    try:
        yield
    finally:
        for name, value in saved.items():
            if value is None:
                os.environ.pop(name, None)
            else:
                os.environ[name] = value


def describe_exit(code: int | None) -> str:
    if code is None:
        return "still running"
    if code < 0:
        try:
            return f"killed by signal {signal.Signals(-code).name}"
        except ValueError:
            return f"killed by signal {-code}"
    return f"exit status {code}"


def stop_workers(procs: list, join_s: float = JOIN_S) -> None:
    """Terminate whatever still runs, wait, kill stragglers: no orphan survives."""
    for p in procs:
        if p.is_alive():
            p.terminate()
    deadline = time.monotonic() + join_s
    for p in procs:
        p.join(max(0.0, deadline - time.monotonic()))
    for p in procs:
        if p.is_alive():
            p.kill()
            p.join(join_s)


# descriptors of a run beyond the pipe mesh, measured with /proc/self/fd (k = 2..8): one
# sentinel and one control-pipe end per worker stay open, plus the forkserver's socket,
# the log queue and the resource tracker (tests/test_runtime_promises.py checks it)
FDS_PER_PAIR = 4             # one pipe each way, both ends, until both workers started
FDS_PER_WORKER = 2
FDS_MARGIN = 32


def descriptors_needed(k: int, open_now: int | None = None) -> int:
    """Open files the coordinator holds at its peak (just after the first worker started,
    every pipe of the mesh still open), on top of `open_now` (default: counted)."""
    if open_now is None:
        open_now = _open_descriptors()
    return open_now + FDS_PER_PAIR * len(mesh_pairs(k)) + FDS_PER_WORKER * k + FDS_MARGIN


def _open_descriptors() -> int:
    try:
        return len(os.listdir("/proc/self/fd")) - 1      # less the listing's own
    except OSError:
        return 64                                          # no /proc: a generous guess


def ensure_descriptors(k: int) -> None:
    """Make room for a run of k workers before anything starts: raise the soft limit of
    open files up to the hard limit when that suffices, else an InputError naming
    `ulimit -n`."""
    import resource

    need = descriptors_needed(k)
    soft, hard = resource.getrlimit(resource.RLIMIT_NOFILE)
    if soft == resource.RLIM_INFINITY or need <= soft:
        return
    if hard == resource.RLIM_INFINITY or need <= hard:
        try:
            resource.setrlimit(resource.RLIMIT_NOFILE,
                               (need if hard == resource.RLIM_INFINITY else hard, hard))
            return
        except (OSError, ValueError):
            pass
    raise InputError(f"--workers {k}: {k} worker processes need about {need:,} open files, "
                     f"but this shell allows {soft:,} (hard limit {hard:,}): raise it with "
                     f"`ulimit -n {need}` or use fewer workers")


def mesh_pairs(k: int, peer_sets: list[set[int]] | None = None) -> set[tuple[int, int]]:
    """Pipe pairs: halo peers (all pairs when unknown) plus ring neighbours."""
    from shardtrain.transport.pipes import ring_pairs

    pairs = set(ring_pairs(k))
    if peer_sets is None:
        pairs |= {(p, q) for p in range(k) for q in range(p + 1, k)}
    else:
        pairs |= {(min(p, q), max(p, q)) for p in range(k) for q in peer_sets[p] if q != p}
    return pairs


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


def epoch_record(epoch: int, reports: list[dict]) -> dict:
    """Sum the workers' parts (in rank order) into the reference's epoch record.

    val_loss: the global mean the workers decided on with early stopping (their
    all-reduced value, so the record and the stop decision agree to the bit), else the
    sum of the workers' cross-entropy sums over the global validation count."""
    train_loss = sum(r["loss_part"] for r in reports)
    loss = train_loss + reports[0]["penalty"]
    correct = np.sum([r["correct"] for r in reports], axis=0)
    totals = np.sum([r["totals"] for r in reports], axis=0)
    acc = [model.accuracy(int(c), int(t)) for c, t in zip(correct, totals)]
    if "val_loss" in reports[0]:
        val_loss = reports[0]["val_loss"]
    else:
        val_loss = model.mean_loss(sum(r.get("val_loss_sum", 0.0) for r in reports),
                                   int(totals[1]))
    return {"epoch": epoch, "loss": loss, "train_loss": train_loss, "val_loss": val_loss,
            "train_acc": acc[0], "val_acc": acc[1], "test_acc": acc[2],
            "epoch_s": max(r["step_s"] for r in reports)}


# ---------------------------------------------------------------- the run

def train_partitioned(shard_dir, settings: TrainSettings, *, timeout_s: float = 60.0,
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
    naming the latest checkpoint and the `--resume DIR` that continues from it.
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
    options = {"timeout_s": float(timeout_s), "link": link, "init_params": init_params,
               "load_shard": load_shard,
               "max_frame_bytes": int(max_frame_bytes or frames.DEFAULT_MAX_FRAME_BYTES),
               "checkpoint": checkpoint, "fault": fault or hooks.fault_spec()}
    first = 1
    if resume is not None:
        options["resume"] = {"epoch": resume.epoch, "params": resume.params,
                             "adam": resume.adam, "early": getattr(resume, "early", None)}
        first = resume.epoch + 1
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
        with _blas_env_pinned():
            for r in range(k):
                mine, theirs = ctx.Pipe(duplex=True)
                mine_opts = {**options, "phase": phases[r], "slow": slow.get(r, 1.0)}
                p = ctx.Process(target=worker.process_main, name=f"shardtrain-worker-{r}",
                                args=(r, k, str(shard_dir), settings.to_dict(),
                                      facts.num_classes, ends[r], theirs, logs.queue,
                                      log_level, mine_opts), daemon=True)
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


def _interrupted_text(book: _EpochBook, plan: dict | None) -> str:
    """What an interrupted run says: where it stopped and how to go on."""
    done = [e for e in book.last_epoch if e is not None]
    where = (f"after epoch {min(done)}" if len(done) == book.k else "before the first epoch "
             "ended")
    if plan is None:
        return (f"workers stopped {where}; no checkpoint was written (add --checkpoint DIR "
                f"to be able to resume)")
    from shardtrain.train.checkpoint import INDEX

    epoch = book.checkpoint
    try:                       # worker 0 may have committed one after its last report
        import json
        with open(os.path.join(plan["folder"], INDEX), encoding="utf-8") as fh:
            epoch = int(json.load(fh)["epoch"])
    except (OSError, ValueError, KeyError, TypeError):
        pass
    if epoch is None:
        return (f"workers stopped {where}; no checkpoint was written yet in "
                f"{plan['folder']} (nothing to resume)")
    return (f"workers stopped {where}; the latest checkpoint (epoch {epoch}) is intact in "
            f"{plan['folder']}: run the same command with --resume {plan['folder']} to "
            f"continue")


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
                    msg = worker.decode_message(cast(Connection, obj).recv_bytes())
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


def check_epochs_run(records: list[dict], summaries: list[dict], epochs: int) -> None:
    """Every worker ran the same epochs, all reported: `epochs`, or fewer when early
    stopping ended the run (the summaries say where)."""
    runs = sorted({int(s.get("epochs_run", epochs)) for s in summaries})
    if len(runs) != 1:
        raise RunError(f"workers ran different numbers of epochs ({runs}): the early-stop "
                       f"decision was not unanimous")
    stopped = (summaries[0].get("early_stop") or {}).get("stopped_at") is not None
    if len(records) != runs[0] or (runs[0] != epochs and not stopped):
        raise RunError(f"workers finished after {len(records)} of {epochs} epochs")


CONSEQUENCE = "closed its pipe"     # the transport's words for a peer that went away


def _root_cause(errors: list[str]) -> str:
    """The first error that is not only the echo of another worker's exit."""
    return next((e for e in errors if CONSEQUENCE not in e), errors[0])


def _drain(conn, r, book, records, summaries, on_epoch) -> list[str]:
    """Messages a worker sent just before it exited."""
    errors = []
    try:
        while conn.poll():
            errors += _handle(worker.decode_message(conn.recv_bytes()), r, book, records,
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
        summaries[r] = worker.decode_summary(msg)
    elif kind == "error":
        return [f"worker {r} failed during {msg.get('phase')}: {msg.get('message')}"]
    else:
        return [f"worker {r} sent an unknown control message {kind!r}"]
    return []


def _where(epoch) -> str:
    return "before reporting any epoch" if epoch is None else f"after reporting epoch {epoch}"


def _epochs_text(last: list) -> str:
    return ", ".join(f"worker {r}: {'-' if e is None else e}" for r, e in enumerate(last))


# ---------------------------------------------------------------- results

class _Structure:
    """What the survey reads off a shard, rebuilt from a worker's summary."""

    def __init__(self, w: int, send_ptr, halo_ptr):
        self.worker = w
        self.send_ptr = np.asarray(send_ptr, dtype=np.int64)
        self.halo_ptr = np.asarray(halo_ptr, dtype=np.int64)

    def peers(self) -> list[int]:
        recv = np.diff(self.halo_ptr) > 0
        send = np.diff(self.send_ptr) > 0
        return [int(q) for q in np.flatnonzero(recv | send)]


def assemble_result(records, summaries, facts: ShardDirFacts, settings: TrainSettings,
                    epochs_run: int | None = None) -> PartitionedRunResult:
    """One result from the epoch records and every worker's `run_worker` summary (in rank
    order): predictions and labels by global id, worker 0's weights, merged profile,
    traffic measured against predicted, per-worker rows. Transport-agnostic (pipes or MPI).
    """
    from shardtrain.transport.meter import merge

    k = facts.workers
    epochs_run = len(records) if epochs_run is None else int(epochs_run)
    early_stop = summaries[0].get("early_stop")
    evals = epochs_run + max(int(s.get("extra_evals", 0)) for s in summaries)
    predictions = np.full(facts.num_vertices, -1, dtype=np.int64)
    labels = np.full(facts.num_vertices, -1, dtype=np.int64)
    for s in summaries:
        predictions[s["owned"]] = s["predictions"]
        labels[s["owned"]] = s["labels"]
    dims = model_dims_of(facts, settings)
    params = model.params_from_arrays(summaries[0]["params"], dims, settings.bias,
                                      settings.np_dtype, source="worker 0")
    merged = merge([s["profile"] for s in summaries])
    traffic = traffic_account(merged, [s["profile"] for s in summaries],
                              [_Structure(s["worker"], s["send_ptr"], s["halo_ptr"])
                               for s in summaries], dims, settings, epochs=epochs_run,
                              evals=evals, stop_votes=epochs_run if early_stop else 0)
    rows = []
    for row, s in zip(merged["per_worker"], summaries):
        rows.append({"worker": row["rank"], "compute_s": row["compute_s"],
                     "exchange_s": row["exchange_s"], "allreduce_s": row["allreduce_s"],
                     "wait_s": row["wait_s"], "bytes_sent": row["bytes_sent"],
                     "bytes_received": row["bytes_received"], "cpu_s": row["cpu_s"],
                     "process_cpu_s": s["cpu_s"], "peak_rss_bytes": s["peak_rss_bytes"]})
    assert len(rows) == k
    profile = {key: v for key, v in merged.items() if key != "per_worker"}
    return PartitionedRunResult(records, params, predictions, traffic, rows, profile, labels,
                                early_stop)


def model_dims_of(facts: ShardDirFacts, settings: TrainSettings) -> list[tuple[int, int]]:
    from shardtrain.plan.schedule import layer_dims

    return layer_dims(facts.input_dim, settings.hidden, facts.num_classes, settings.layers)


def traffic_account(merged: dict, profiles: list[dict], structures, dims,
                    settings: TrainSettings, epochs: int | None = None,
                    evals: int | None = None, stop_votes: int = 0) -> dict:
    """Measured payload and framing (from the merged profile) against the survey's
    prediction, in total and per (src, dst, kind, layer, direction). The all-reduce is
    compared per (src, dst): its steps' direction names are the transport's own.
    `epochs`: the epochs this run did (fewer than settings.epochs after a resume or an
    early stop); `evals`: its evaluation forwards (default `epochs`); `stop_votes`: its
    early-stopping votes (see `survey.stop_vote_bytes`)."""
    from shardtrain.plan import survey
    from shardtrain.plan.schedule import layer_hops

    hops = layer_hops(dims)
    itemsize = settings.np_dtype.itemsize
    elements = survey.parameter_elements(hops, bias=settings.bias)
    predicted = survey.predict_traffic(structures, hops, itemsize, param_elements=elements)
    epochs = settings.epochs if epochs is None else int(epochs)
    evals = epochs if evals is None else int(evals)
    predicted_total = survey.predict_run_payload(predicted, epochs, evals, stop_votes)
    breakdown_pred = survey.predict_payload_breakdown(structures, hops, itemsize,
                                                      param_elements=elements, epochs=epochs,
                                                      evals=evals, stop_votes=stop_votes)

    def key_of(src, dst, kind, layer, direction):
        if kind == survey.KIND_ALLREDUCE:
            return (src, dst, kind, layer, "all")
        return (src, dst, kind, layer, direction)

    table: dict[tuple, list[int]] = {}
    for key, b in breakdown_pred.items():
        table.setdefault(key_of(*key), [0, 0, 0])[1] += int(b)
    measured_rows = _sender_rows(profiles)
    for key, (pay, framing) in measured_rows.items():
        row = table.setdefault(key_of(*key), [0, 0, 0])
        row[0] += pay
        row[2] += framing
    breakdown = [{"src": s, "dst": d, "kind": kind, "layer": layer, "direction": direction,
                  "measured_payload_bytes": v[0], "predicted_payload_bytes": v[1],
                  "framing_bytes": v[2]}
                 for (s, d, kind, layer, direction), v in sorted(table.items())]
    by_kind = merged["by_kind"]
    return {
        "measured_payload_bytes": int(merged["payload_bytes"]),
        "predicted_payload_bytes": int(predicted_total),
        "measured_framing_bytes": int(merged["framing_bytes"]),
        "frames": int(merged["frames"]),
        "halo_payload_bytes": int(by_kind.get(survey.KIND_HALO, {}).get("payload_bytes", 0)),
        "allreduce_payload_bytes": int(by_kind.get(survey.KIND_ALLREDUCE, {})
                                       .get("payload_bytes", 0)),
        "predicted_allreduce_payload_bytes": int(
            epochs * predicted["allreduce_bytes"]
            + stop_votes * int(survey.stop_vote_bytes(len(structures)).sum())),
        "predicted_per_epoch": predicted,
        "sender_receiver_consistent": bool(merged["consistent"]),
        "pair_payload_bytes": merged["pair_payload_bytes"],
        "by_layer_direction": merged["by_layer_direction"],
        "breakdown": breakdown,
        "breakdown_matches": all(r["measured_payload_bytes"] == r["predicted_payload_bytes"]
                                 for r in breakdown),
    }


def _sender_rows(profiles: list[dict]) -> dict[tuple, tuple[int, int]]:
    """(src, dst, kind, layer, direction) -> (payload, framing), from the senders' side."""
    return {(r["src"], r["dst"], r["kind"], r["layer"], r["direction"]):
            (r["payload_bytes"], r["framing_bytes"])
            for d in profiles for r in d["bytes"] if r["src"] == d["rank"]}
