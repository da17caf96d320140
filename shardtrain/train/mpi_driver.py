"""Partitioned training with one MPI rank per shard: the same shards, the same worker code.

`train_partitioned` is collective (the MPI twin of `coordinator.train_partitioned`, reached
as `api.run(config, transport="mpi")`): every rank of the communicator calls it with the same shard
directory and settings. Rank r loads shard r only (`shards.load_shard`), wraps the
communicator in an `MpiTransport` and runs `worker.run_worker`, exactly as a worker process
of the pipes coordinator does; only the transport differs. Rank 0 plays the coordinator's
part as well: it collects every rank's per-epoch reports and final summary and builds the
same `PartitionedRunResult` as `accounting.train_partitioned` (epoch records, traffic
measured against predicted, per-worker rows).

Control messages between the ranks and rank 0 are msgpack bytes (`codec.encode_message`,
no pickle), sent point to point under tags of their own, so they never mix with the halo
and all-reduce frames; like the pipes' control channel they are not counted in the profile.
Every wait on them is polled under the same deadline as the transport's receives.

Failures. Rank 0 checks everything that can be checked before training (options, the
shard manifest, one rank per shard, initial weights) and then sends every rank its start
message; the other ranks do nothing before it arrives. A failed check sends a stop message
instead and raises `JobStopped` on every rank (reported by rank 0 only), so the job ends
cleanly with one error line. Once training has started, the rank that fails must report
its error and end the whole job with `abort_job` (comm.Abort): MPI collectives cannot time
out, and the other ranks would wait for ever. A rank that dies is ended by the MPI launcher
(mpiexec kills the job); a rank that hangs makes its peers miss the transport's deadline
(a RunError naming it), and they abort the job.
"""
from __future__ import annotations

import time
from typing import Callable, cast

from shardtrain import defaults
from shardtrain.errors import InputError, ParameterError, RunError
from shardtrain.train import accounting
from shardtrain.train.accounting import PartitionedRunResult, ShardDirFacts
from shardtrain.train.codec import (
    decode_message,
    decode_summary,
    encode_message,
    encode_summary,
    pack_array,
    unpack_array,
)
from shardtrain.train.processes import pin_blas_threads
from shardtrain.train.settings import TrainSettings
from shardtrain.train.worker import run_worker

ROOT = 0
TAG_START = 11          # rank 0 -> all: settings, shard facts, initial weights (or stop)
TAG_REPORT = 12         # rank r -> 0: one epoch report
TAG_SUMMARY = 13        # rank r -> 0: the run_worker summary
TAG_CHECK = 14          # rank r -> 0: its shard check (error text or None)
TAG_GO = 15             # rank 0 -> all: every shard checked (go) or stop
NAP_S = 0.0005          # sleep between polls of control messages


class JobStopped(Exception):
    """Rank 0 stopped the job before training: exit with `code`; `report` is True on
    rank 0 only (the one rank that prints the message)."""

    def __init__(self, message: str, code: int, report: bool):
        super().__init__(message)
        self.code, self.report = code, report


def world():
    """MPI.COMM_WORLD; a ParameterError naming `transport` when mpi4py is not installed."""
    try:
        from mpi4py import MPI
    except ImportError as exc:
        raise ParameterError("transport", f"mpi4py cannot be imported ({exc}); install the "
                             f"'mpi' extra: pip install 'shardtrain[mpi]'",
                             value="mpi") from None
    return MPI.COMM_WORLD


def abort_job(comm, code: int) -> None:
    """End every rank of the job with exit status `code` (after reporting the error)."""
    comm.Abort(code)


# ---------------------------------------------------------------- control messages

def _poll(comm, reqs: list, timeout_s: float, what: str) -> list:
    """Wait for MPI requests, polled, with a deadline; RunError naming `what`."""
    from mpi4py import MPI

    statuses = [MPI.Status() for _ in reqs]
    done = [False] * len(reqs)
    last = time.perf_counter()
    while not all(done):
        for i, req in enumerate(reqs):
            if not done[i] and req.Test(statuses[i]):
                done[i] = True
                last = time.perf_counter()
        if all(done):
            break
        if time.perf_counter() - last > timeout_s:
            raise RunError(f"rank {comm.Get_rank()}: timed out after {timeout_s:g} s "
                           f"waiting for {what}")
        time.sleep(NAP_S)
    return statuses


def _probe(comm, source: int, tag: int, timeout_s: float, what: str):
    """The status of the next message from `source` with `tag`, waiting at most timeout_s."""
    from mpi4py import MPI

    status = MPI.Status()
    start = time.perf_counter()
    while not comm.Iprobe(source=source, tag=tag, status=status):
        if time.perf_counter() - start > timeout_s:
            raise RunError(f"rank {comm.Get_rank()}: timed out after {timeout_s:g} s "
                           f"waiting for {what}")
        time.sleep(NAP_S)
    return status


def _recv_message(comm, source: int, tag: int, timeout_s: float, what: str) -> dict:
    from mpi4py import MPI

    status = _probe(comm, source, tag, timeout_s, what)
    buf = bytearray(status.Get_count(MPI.BYTE))
    req = comm.Irecv([buf, MPI.BYTE], source=status.Get_source(), tag=tag)
    _poll(comm, [req], timeout_s, what)
    try:
        return decode_message(bytes(buf))
    except Exception as exc:  # noqa: BLE001 - any decoding failure names the sender
        raise RunError(f"rank {comm.Get_rank()}: unreadable control message from rank "
                       f"{status.Get_source()} ({what}): {exc}") from None


class _Outbox:
    """Non-blocking sends of control messages; the bytes live until the send completes."""

    def __init__(self, comm):
        self.comm = comm
        self.pending: list = []

    def send(self, dest: int, tag: int, msg: dict) -> None:
        from mpi4py import MPI

        data = encode_message(msg)
        req = self.comm.Isend([data, MPI.BYTE], dest=dest, tag=tag)
        self.pending.append((req, data))
        self.pending = [(r, d) for r, d in self.pending if not r.Test()]

    def flush(self, timeout_s: float, what: str) -> None:
        """Wait until every message has been taken by its receiver."""
        _poll(self.comm, [r for r, _ in self.pending], timeout_s, what)
        self.pending = []


# ---------------------------------------------------------------- rank 0's book of epochs

class _Book:
    """Rank 0's collection of epoch reports: a record is complete with one per rank."""

    def __init__(self, comm, k: int, on_epoch: Callable[[dict], None] | None):
        self.comm, self.k, self.on_epoch = comm, k, on_epoch
        self.pending: dict[int, dict[int, dict]] = {}
        self.records: list[dict] = []

    def add(self, rep: dict) -> None:
        e, w = int(rep["epoch"]), int(rep["worker"])
        bucket = self.pending.setdefault(e, {})
        bucket[w] = rep
        if len(bucket) == self.k:
            del self.pending[e]
            rec = accounting.epoch_record(e, [bucket[r] for r in range(self.k)])
            self.records.append(rec)
            if self.on_epoch is not None:
                self.on_epoch(rec)

    def drain(self) -> None:
        """Take the reports that have arrived, without waiting."""
        while self.comm.Iprobe(source=_any_source(), tag=TAG_REPORT):
            self.add(_recv_message(self.comm, _any_source(), TAG_REPORT, 1.0, "a report"))

    def wait_for(self, epochs: int, timeout_s: float) -> None:
        """Take reports until `epochs` records are complete."""
        while len(self.records) < epochs:
            bucket = self.pending.get(min(self.pending), {}) if self.pending else {}
            missing = [r for r in range(self.k) if r not in bucket]
            self.add(_recv_message(self.comm, _any_source(), TAG_REPORT, timeout_s,
                                   f"the epoch reports of ranks {missing}"))


def _any_source() -> int:
    from mpi4py import MPI
    return MPI.ANY_SOURCE


# ---------------------------------------------------------------- the run

def check_world(comm, facts: ShardDirFacts, shard_dir) -> None:
    """One rank per shard: InputError otherwise."""
    size = comm.Get_size()
    if size != facts.workers:
        raise InputError(f"{shard_dir} holds {facts.workers} shards but the MPI job has "
                         f"{size} rank{'s' if size != 1 else ''}: start it with "
                         f"mpiexec -n {facts.workers}")


def stop_job(comm, code: int, timeout_s: float = 60.0) -> None:
    """On rank 0, before training: tell every other rank to exit with `code`."""
    out = _Outbox(comm)
    for q in range(1, comm.Get_size()):
        out.send(q, TAG_START, {"stop": int(code)})
    out.flush(timeout_s, "the other ranks to take the stop message")


def _start(comm, shard_dir, settings, init_params, timeout_s: float):
    """Rank 0 checks and sends (settings, facts, initial weights); the others receive them.

    Returns (settings, facts, init_params) on every rank, or raises JobStopped."""
    from shardtrain.errors import EXIT_BAD_INPUT

    if comm.Get_rank() != ROOT:
        msg = _recv_message(comm, ROOT, TAG_START, timeout_s, "the start message of rank 0")
        if "stop" in msg:
            raise JobStopped("stopped by rank 0", int(msg["stop"]), report=False)
        packed = msg["init_params"]
        init = None if packed is None else {k: unpack_array(v)
                                            for k, v in packed.items()}
        return (TrainSettings.from_dict(msg["settings"], source="start message of rank 0"),
                ShardDirFacts(**msg["facts"]), init)
    try:
        if settings is None:
            raise InputError("mpi_driver.train_partitioned: rank 0 needs the training settings")
        settings.validate()
        facts = accounting.shard_dir_facts(shard_dir)
        check_world(comm, facts, shard_dir)
        if init_params is not None and not isinstance(init_params, dict):
            from shardtrain.train import model
            init_params = model.params_to_arrays(init_params)
    except InputError as exc:
        stop_job(comm, EXIT_BAD_INPUT, timeout_s)
        raise JobStopped(str(exc), EXIT_BAD_INPUT, report=True) from None
    msg = {"settings": settings.to_dict(), "facts": vars(facts),
           "init_params": None if init_params is None else
           {name: pack_array(a) for name, a in init_params.items()}}
    out = _Outbox(comm)
    for q in range(1, comm.Get_size()):
        out.send(q, TAG_START, msg)
    out.flush(timeout_s, "the other ranks to take the start message")
    return settings, facts, init_params


def _check_shards(comm, shard_dir, timeout_s: float) -> None:
    """Every rank checks the manifest and its own shard (`shards.check_shard_dir`, the
    pipes coordinator's check, so the message is the same); rank 0 gathers the results in
    rank order and tells every rank to go on or stop. A bad shard is one line from rank 0
    and exit status 2 on every rank, before any training starts."""
    from shardtrain.errors import EXIT_BAD_INPUT
    from shardtrain.plan.shards import check_shard_dir

    rank = comm.Get_rank()
    try:
        check_shard_dir(shard_dir, workers=[rank])
        mine = None
    except InputError as exc:
        mine = str(exc)
    if rank != ROOT:
        out = _Outbox(comm)
        out.send(ROOT, TAG_CHECK, {"error": mine})
        out.flush(timeout_s, "rank 0 to take the shard check")
        msg = _recv_message(comm, ROOT, TAG_GO, timeout_s, "rank 0's word after the checks")
        if "stop" in msg:
            raise JobStopped("stopped by rank 0", int(msg["stop"]), report=False)
        return
    errors = [mine] + [_recv_message(comm, q, TAG_CHECK, timeout_s,
                                     f"the shard check of rank {q}")["error"]
                       for q in range(1, comm.Get_size())]
    first = next((e for e in errors if e is not None), None)
    out = _Outbox(comm)
    for q in range(1, comm.Get_size()):
        out.send(q, TAG_GO, {"go": True} if first is None else {"stop": EXIT_BAD_INPUT})
    out.flush(timeout_s, "the other ranks to take rank 0's word")
    if first is not None:
        raise JobStopped(first, EXIT_BAD_INPUT, report=True)


def train_partitioned(shard_dir, settings: TrainSettings | None, *, comm=None,
              timeout_s: float = defaults.TIMEOUT_S, init_params=None,
              on_epoch: Callable[[dict], None] | None = None, allreduce: str = "mpi",
              max_frame_bytes: int | None = None, load_shard=None,
              on_phase: Callable[[str], None] | None = None) -> PartitionedRunResult | None:
    """Train on the shards of `shard_dir`, one MPI rank per shard (collective).

    Returns the run's PartitionedRunResult on rank 0 and None on the other ranks.
    `settings`, `init_params` and `on_epoch` are used on rank 0 only: the other ranks get
    rank 0's settings and weights in the start message (pass None there). `timeout_s` is
    the deadline of every receive (halo, all-reduce, control). `allreduce`: "mpi" (MPI's
    own) or "ring" (see transport/mpi.py). `load_shard` ((dir, worker) -> Shard) replaces
    `shards.load_shard`, for tests. Raises JobStopped when rank 0's checks failed (exit
    normally with its code); any other InputError/RunError happened after the start: the
    caller reports it and calls `abort_job`.
    """
    from shardtrain.transport import frames
    from shardtrain.transport.meter import Profile
    from shardtrain.transport.mpi import MpiTransport

    comm = comm if comm is not None else world()
    rank, size = comm.Get_rank(), comm.Get_size()
    settings, facts, init_params = _start(comm, shard_dir, settings, init_params, timeout_s)
    if load_shard is None:
        _check_shards(comm, shard_dir, timeout_s)
    pin_blas_threads(settings.threads)
    if load_shard is None:
        from shardtrain.plan.shards import load_shard
    shard = load_shard(shard_dir, rank)
    profile = Profile(rank)
    transport = MpiTransport(comm, profile, timeout_s=timeout_s, allreduce=allreduce,
                             max_frame_bytes=int(max_frame_bytes or
                                                 frames.DEFAULT_MAX_FRAME_BYTES))
    outbox = _Outbox(comm)
    book = _Book(comm, size, on_epoch) if rank == ROOT else None

    def report(rec: dict) -> None:
        if book is None:
            outbox.send(ROOT, TAG_REPORT, rec)
        else:
            book.add(rec)
            book.drain()

    try:
        summary = run_worker(shard, settings, transport, profile, report,
                                    num_classes=facts.num_classes, init_params=init_params,
                                    on_phase=on_phase)
    finally:
        transport.close()
    if book is None:
        outbox.send(ROOT, TAG_SUMMARY, encode_summary(summary))
        outbox.flush(timeout_s, "rank 0 to take the reports and the summary")
        return None
    book.wait_for(int(summary["epochs_run"]), timeout_s)   # fewer after an early stop
    summaries = [summary] + [None] * (size - 1)
    for q in range(1, size):
        msg = _recv_message(comm, q, TAG_SUMMARY, timeout_s, f"the summary of rank {q}")
        summaries[q] = decode_summary(msg)
    accounting.check_epochs_run(book.records, cast("list[dict]", summaries),  # all filled
                                 settings.epochs)
    return accounting.assemble_result(book.records, summaries, facts, settings)
