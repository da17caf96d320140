"""The training loop on one shard, driven through a transport.

`run_worker` is the whole of a worker's job and knows nothing of processes: the pipes
coordinator runs it in a child process (`process_main`), an MPI entry point can run it on a
rank; both hand it a transport, a profile and a `report` callable for per-epoch records.

Per layer, the model calls two closures built here from the shard (see the layout CONTRACT
in `shardtrain/plan/shards.py`) and the transport:
- propagate(l, M): send M[send_to(q)] to every peer q, receive q's rows straight into
  their slice of a preallocated M_halo buffer, return Â_P [M; M_halo] (computed as
  A_oo M + A_oh M_halo, see HaloOps);
- propagate_t(l, G): Â_Pᵀ G has a row per owned AND halo column; the halo rows belong to
  their owners, so send (A_ohᵀ G)[halo_from(q)] back to q and add what each peer sends for
  my send rows at send_to(q) (indices are unique per peer) to A_ooᵀ G.
The model code is the reference's (`model.train_step`), so the run equals the reference.

Control messages (`encode_message`/`decode_message`) are msgpack maps; arrays travel as
{"dtype", "shape", "data": raw bytes}. No pickle.
"""
from __future__ import annotations

import logging
import os
import resource
import signal
import time
from contextlib import contextmanager
from typing import TYPE_CHECKING, Callable

import msgpack
import numpy as np
import scipy.sparse as sp

from shardtrain.compat import add_csr_product
from shardtrain.plan import schedule
from shardtrain.plan.schedule import layer_dims, layer_hops
from shardtrain.train import model, stopping
from shardtrain.train.settings import TrainSettings
from shardtrain.transport.wire import KIND_HALO

if TYPE_CHECKING:
    from shardtrain.transport.base import Transport
    from shardtrain.transport.pipes import PipeTransport

log = logging.getLogger(__name__)

FORWARD, BACKWARD, EVAL = "forward", "backward", "eval"
BLAS_ENV = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")


# ---------------------------------------------------------------- control messages

def pack_array(a: np.ndarray) -> dict:
    a = np.ascontiguousarray(a)
    return {"dtype": a.dtype.str, "shape": list(a.shape), "data": a.tobytes()}


def unpack_array(d: dict) -> np.ndarray:
    dt = np.dtype(d["dtype"])
    if dt.hasobject:
        raise ValueError("object arrays are not accepted in control messages")
    return np.frombuffer(d["data"], dtype=dt).reshape(d["shape"]).copy()


def encode_message(msg: dict) -> bytes:
    return msgpack.packb(msg, use_bin_type=True)


def decode_message(raw: bytes) -> dict:
    return msgpack.unpackb(raw, raw=False, strict_map_key=False)


# ---------------------------------------------------------------- halo products

class HaloOps:
    """propagate / propagate_t of one shard over a transport, with buffers reused per
    (layer, width): the halo rows received forward, the send blocks, the receive blocks.

    Â_P is kept split by columns into its owned block A_oo (n_owned x n_owned) and halo
    block A_oh (n_owned x n_halo), in the training dtype, with their transposes:
    - forward:  Z = A_oo M + A_oh M_halo, both accumulated into one fresh output, so M is
      never copied into a stacked [M; M_halo] and every row sums its entries in the same
      column order as Â_P [M; M_halo] would (the same bits);
    - backward: the halo rows A_ohᵀ G go to their owners first, then A_ooᵀ G is computed
      and the peers' contributions are added at the send rows.
    """

    def __init__(self, shard, transport: Transport, profile, dtype):
        self.shard, self.transport, self.profile = shard, transport, profile
        self.n_owned = shard.num_owned
        self.n_local = shard.num_owned + shard.num_halo
        self.dtype = np.dtype(dtype)
        with profile.phase("compute"):
            adj = shard.adj.astype(self.dtype, copy=False)   # (n_owned, n_owned + n_halo)
            adj = adj.tocsr() if adj.format != "csr" else adj
            self.adj_own = _column_block(adj, 0, self.n_owned)
            self.adj_halo = _column_block(adj, self.n_owned, self.n_local)
            del adj
            self.adj_own_t = _transpose(self.adj_own)        # once, not per hop
            self.adj_halo_t = self.adj_halo.T.tocsr()
        self.peers = shard.peers()
        self.send_idx = {q: shard.send_to(q) for q in self.peers}
        self.halo_rows = {q: shard.halo_from(q) for q in self.peers}
        with profile.phase("compute"):
            # out[send_to(q)] += received rows, as one pass of a 0/1 selection matrix (the
            # send rows are unique per peer, so each output row gets at most one 1.0 * x)
            self.scatter = {q: _selection(self.send_idx[q], self.n_owned, self.dtype)
                            for q in self.peers}
        self.epoch = 0
        self._blocks: dict[tuple, np.ndarray] = {}
        self.on_phase: Callable[[str], None] = lambda text: None

    def _block(self, key: tuple, rows: int, width: int) -> np.ndarray:
        buf = self._blocks.get(key)
        if buf is None or buf.shape != (rows, width):
            buf = self._blocks[key] = np.empty((rows, width), dtype=self.dtype)
        return buf

    def propagate(self, direction: str) -> Callable[[int, np.ndarray], np.ndarray]:
        def propagate(layer: int, m: np.ndarray) -> np.ndarray:
            self.on_phase(f"epoch {self.epoch} {direction} exchange, layer {layer}")
            width = m.shape[1]
            with self.profile.phase("compute"):
                m = np.ascontiguousarray(m, dtype=self.dtype)
                outgoing = {}
                for q in self.peers:
                    idx = self.send_idx[q]
                    buf = self._block(("send", layer, width, q), idx.shape[0], width)
                    outgoing[q] = np.take(m, idx, axis=0, out=buf)
                halo = self._block(("halo", layer, width), self.n_local - self.n_owned,
                                   width)
                incoming = {q: halo[self.halo_rows[q]] for q in self.peers}
            with self.profile.phase("exchange"):
                self.transport.exchange(outgoing, incoming, kind=KIND_HALO, epoch=self.epoch,
                                        layer=layer, direction=direction)
            self.on_phase(f"epoch {self.epoch} compute")
            with self.profile.phase("compute"):
                z = np.zeros((self.n_owned, width), dtype=self.dtype)   # fresh: the model's
                add_csr_product(self.adj_own, m, z)
                add_csr_product(self.adj_halo, halo, z)
                return z
        return propagate

    def propagate_t(self, layer: int, g: np.ndarray) -> np.ndarray:
        self.on_phase(f"epoch {self.epoch} backward exchange, layer {layer}")
        width = g.shape[1]
        with self.profile.phase("compute"):
            g = np.ascontiguousarray(g, dtype=self.dtype)
            halo = self._block(("halo_t", layer, width), self.n_local - self.n_owned, width)
            halo.fill(0)
            add_csr_product(self.adj_halo_t, g, halo)          # rows owned by the peers
            outgoing = {q: halo[self.halo_rows[q]] for q in self.peers}
            incoming = {q: self._block(("recv", layer, width, q), self.send_idx[q].shape[0],
                                       width) for q in self.peers}
        with self.profile.phase("exchange"):
            self.transport.exchange(outgoing, incoming, kind=KIND_HALO, epoch=self.epoch,
                                    layer=layer, direction=BACKWARD)
        self.on_phase(f"epoch {self.epoch} compute")
        with self.profile.phase("compute"):
            out = np.zeros((self.n_owned, width), dtype=self.dtype)
            add_csr_product(self.adj_own_t, g, out)
            for q in self.peers:
                add_csr_product(self.scatter[q], incoming[q], out)
            return out


def _selection(rows: np.ndarray, n: int, dtype):
    """CSR (n, len(rows)) with a 1 at (rows[i], i): S @ X puts row i of X at rows[i]."""
    m = rows.shape[0]
    return sp.csr_matrix((np.ones(m, dtype=dtype), (rows, np.arange(m))), shape=(n, m))


def _transpose(a):
    """aᵀ as CSR, or `a` itself when a is symmetric bit for bit (Â's owned block is: its
    values are d_i^-1/2 d_j^-1/2), which saves a copy of the largest block."""
    t = a.T.tocsr()
    t.sort_indices()
    same = (np.array_equal(t.indptr, a.indptr) and np.array_equal(t.indices, a.indices)
            and np.array_equal(t.data, a.data))
    return a if same else t


def _column_block(adj, lo: int, hi: int):
    """Columns lo..hi-1 of a CSR matrix with sorted indices, renumbered from 0 (CSR, the
    row order of entries kept)."""
    block = adj[:, lo:hi]
    return block.tocsr() if block.format != "csr" else block


# ---------------------------------------------------------------- a straggler on purpose

class SlowCompute:
    """A profile whose compute phases take `factor` times as long: after each one it
    sleeps (factor - 1) x the compute time it measured (its own, without nested phases),
    inside the phase, so the profile books the delay as compute and the other workers'
    waits show what a straggler costs them (--slow-worker)."""

    def __init__(self, profile, factor: float):
        self._profile, self.factor = profile, float(factor)
        self._inner = 0.0                  # time spent in phases nested in the current one

    def __getattr__(self, name):
        return getattr(self._profile, name)

    @contextmanager
    def phase(self, name: str):
        start = time.perf_counter()
        outer_inner, self._inner = self._inner, 0.0
        try:
            with self._profile.phase(name):
                yield
                own = time.perf_counter() - start - self._inner
                if name == "compute" and own > 0:
                    time.sleep((self.factor - 1.0) * own)
        finally:
            self._inner = outer_inner + (time.perf_counter() - start)


# ---------------------------------------------------------------- the training loop

def shard_dims(shard, settings: TrainSettings, num_classes: int) -> list[tuple[int, int]]:
    return layer_dims(int(shard.features.shape[1]), settings.hidden, num_classes,
                      settings.layers)


def _split_masks(shard) -> list:
    return [shard.train_mask, shard.val_mask, shard.test_mask]


def run_worker(shard, settings: TrainSettings, transport: Transport, profile,
               report: Callable[[dict], None],
               *, num_classes: int, init_params=None, init_adam: dict | None = None,
               epochs_range: range | None = None,
               on_phase: Callable[[str], None] | None = None,
               on_epoch_end: Callable[..., dict | None] | None = None, slow_factor: float = 1.0,
               init_early: dict | None = None) -> dict:
    """Train on `shard` for the epochs of `epochs_range` (default 1..settings.epochs).

    After every step an evaluation forward (no dropout, halo frames with direction "eval")
    gives the correct counts and the validation cross-entropy sum; `report` receives
    {"worker", "epoch", "loss_part", "penalty", "correct": [train, val, test], "totals":
    [...], "val_loss_sum", "step_s", "eval_s"} (the coordinator adds the parts and the
    penalty once, since every worker computes the same penalty), plus "val_loss" (the
    global mean every worker decided on) with early stopping.
    Early stopping (`settings.early_stop` = N > 0, `shardtrain.train.stopping`): after the
    evaluation every worker all-reduces [val loss sum, val count] (float64, kind
    "allreduce", `schedule.VOTE_ELEMENTS`), so all hold the same global loss, take the same
    decision and stop at the same epoch; the returned weights and predictions are the
    best epoch's. `init_early` (checkpoint arrays) resumes that state; when the best epoch
    lies before the resume and is never beaten, one more evaluation forward of its weights
    gives the predictions ("extra_evals": 1).
    Returns {"worker", "owned", "predictions", "labels", "params" (dict name -> array), "profile",
    "peak_rss_bytes", "cpu_s", "send_ptr", "halo_ptr", "epochs_run", "extra_evals",
    "early_stop" (summary or None)}.
    `num_classes` is the whole graph's (a shard may lack some classes). To resume, give
    `init_params`, `init_adam` (`model.Adam.state()` arrays) and the remaining
    `epochs_range`: the dropout keys are the epoch numbers, so the run continues exactly.
    `on_epoch_end(epoch, params, adam)` runs after each epoch's evaluation and before its
    report (worker 0 writes checkpoints there); a dict it returns is added to the report.
    `slow_factor` > 1 makes every compute phase that many times longer (`SlowCompute`).
    """
    dtype = settings.np_dtype
    on_phase = on_phase or (lambda text: None)
    if slow_factor > 1.0:
        profile = SlowCompute(profile, slow_factor)
    dims = shard_dims(shard, settings, num_classes)
    hops = layer_hops(dims)
    if init_params is None:
        params = model.glorot_init(dims, settings.seed, dtype, settings.bias)
    else:
        arrays = init_params if isinstance(init_params, dict) else \
            model.params_to_arrays(init_params)
        params = model.params_from_arrays(arrays, dims, settings.bias, dtype,
                                          source="initial weights")
    adam = model.Adam(params, settings.lr)
    if init_adam is not None:
        adam.load_state(init_adam, source="initial optimiser state")
    epochs = epochs_range if epochs_range is not None else range(1, settings.epochs + 1)

    with profile.phase("compute"):
        x = np.ascontiguousarray(shard.features, dtype=dtype)
    labels = shard.labels
    masks = _split_masks(shard)
    totals = [0 if m is None else int(np.count_nonzero(m)) for m in masks]
    train_mask = shard.train_mask if shard.train_mask is not None \
        else np.zeros(shard.num_owned, dtype=bool)
    ops = HaloOps(shard, transport, profile, dtype)
    ops.on_phase = on_phase
    propagate_train, propagate_eval = ops.propagate(FORWARD), ops.propagate(EVAL)

    def allreduce(flat: np.ndarray) -> None:
        on_phase(f"epoch {ops.epoch} all-reduce")
        with profile.phase("allreduce"):
            transport.allreduce_sum(flat, epoch=ops.epoch)
        on_phase(f"epoch {ops.epoch} compute")

    early = None
    if settings.early_stop:
        early = stopping.EarlyStop.from_state(settings.early_stop, init_early or {}, dims,
                                              settings.bias, dtype, source="early-stop state")
    best_logits = None
    epochs_run = 0
    logits = None
    for epoch in epochs:
        ops.epoch = epoch
        on_phase(f"epoch {epoch} compute")
        start = time.perf_counter()
        with profile.phase("compute"):
            penalty = model.weight_decay_penalty(params, settings.weight_decay)
            drop = model.Dropout(settings.seed, epoch, settings.dropout, shard.owned)
            loss_part = model.train_step(params, adam, x, labels, train_mask,
                                         shard.num_train_global, hops, propagate_train,
                                         ops.propagate_t, drop, allreduce,
                                         settings.weight_decay)
        step_s = time.perf_counter() - start
        on_phase(f"epoch {epoch} evaluation")
        with profile.phase("compute"):
            logits, _ = model.forward(params, x, hops, propagate_eval, model.no_dropout)
            correct = model.correct_counts(logits, labels, masks)
            val_sum, val_count = model.cross_entropy_sum(logits, labels, masks[1])
        eval_s = time.perf_counter() - start - step_s
        epochs_run += 1
        decided, stop = {}, False
        if early is not None:
            val_loss = _global_val_loss(val_sum, val_count, allreduce)
            if early.update(epoch, val_loss, params):
                best_logits = logits
            stop = early.should_stop(epoch)
            decided = {"val_loss": val_loss}
        if on_epoch_end is None:
            extra = None
        elif early is None:
            extra = on_epoch_end(epoch, params, adam)
        else:
            extra = on_epoch_end(epoch, params, adam, early=early, last=stop)
        report({"worker": shard.worker, "epoch": epoch, "loss_part": float(loss_part),
                "penalty": float(penalty), "correct": correct, "totals": totals,
                "val_loss_sum": val_sum, **decided,
                "step_s": step_s, "eval_s": eval_s, **(extra or {})})
        if stop:
            break

    extra_evals = 0
    if early is not None and early.best_params is not None:
        params = early.best_params
        if best_logits is None:      # best epoch before a resume: evaluate its weights again
            on_phase("evaluation of the best epoch's weights")
            with profile.phase("compute"):
                best_logits, _ = model.forward(params, x, hops, propagate_eval,
                                               model.no_dropout)
            extra_evals = 1
        logits = best_logits
    on_phase("finished")
    predictions = (np.argmax(logits, axis=1).astype(np.int64) if logits is not None
                   else np.zeros(0, dtype=np.int64))
    usage = resource.getrusage(resource.RUSAGE_SELF)
    return {
        "worker": shard.worker,
        "owned": np.asarray(shard.owned, dtype=np.int64),
        "predictions": predictions,
        "labels": (np.asarray(shard.labels, dtype=np.int64) if shard.labels is not None
                   else np.full(shard.num_owned, -1, dtype=np.int64)),
        "params": model.params_to_arrays(params) if shard.worker == 0 else None,
        "profile": profile.to_dict(),     # (SlowCompute passes to_dict through)
        "peak_rss_bytes": peak_rss_bytes(),
        "cpu_s": float(usage.ru_utime + usage.ru_stime),
        "send_ptr": [int(v) for v in shard.send_ptr],
        "halo_ptr": [int(v) for v in shard.halo_ptr],
        "epochs_run": epochs_run,
        "extra_evals": extra_evals,
        "early_stop": None if early is None else early.summary(),
    }


def _global_val_loss(val_sum: float, val_count: int, allreduce) -> float:
    """The validation loss over every worker's rows: all-reduce [sum, count] (float64, so
    the count is exact and every worker ends with the same bits), then divide."""
    vote = np.array([val_sum, float(val_count)], dtype=np.float64)
    assert vote.size == schedule.VOTE_ELEMENTS and vote.itemsize == schedule.VOTE_ITEMSIZE
    allreduce(vote)
    if vote[1] == 0:
        raise ValueError("--early-stop: the graph has no validation vertices (the "
                         "validation split is empty)")
    return float(vote[0] / vote[1])


def peak_rss_bytes() -> int:
    """High-water resident memory of this process image.

    VmHWM from /proc (Linux) rather than getrusage's ru_maxrss: a spawned child starts as a
    fork of the coordinator, and ru_maxrss keeps the parent's peak across the exec.
    """
    try:
        with open("/proc/self/status", "rb") as fh:
            for line in fh:
                if line.startswith(b"VmHWM:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    return int(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss) * 1024


def encode_summary(summary: dict) -> dict:
    """The `run_worker` result as a msgpack-friendly map."""
    out = dict(summary)
    out["owned"] = pack_array(summary["owned"])
    out["predictions"] = pack_array(summary["predictions"])
    out["labels"] = pack_array(summary["labels"])
    if summary["params"] is not None:
        out["params"] = {k: pack_array(v) for k, v in summary["params"].items()}
    return out


def decode_summary(msg: dict) -> dict:
    out = dict(msg)
    out["owned"] = unpack_array(msg["owned"])
    out["predictions"] = unpack_array(msg["predictions"])
    out["labels"] = unpack_array(msg["labels"])
    if msg.get("params") is not None:
        out["params"] = {k: unpack_array(v) for k, v in msg["params"].items()}
    return out


# ---------------------------------------------------------------- the worker process

def pin_blas_threads(threads: int = 1) -> None:
    """`threads` BLAS threads in this process (the --threads setting, default 1: the
    workers are the parallelism). threadpoolctl raises the limit too, so a forkserver
    child started with the pinned environment can still use more."""
    for name in BLAS_ENV:
        os.environ[name] = str(int(threads))
    from threadpoolctl import threadpool_limits
    threadpool_limits(int(threads))


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
                 ends, ctrl, log_queue, log_level: int, options: dict) -> None:
    """Entry point of worker process `rank` (started by the coordinator, forkserver/spawn).

    Loads only its own shard, trains, and talks to the coordinator over `ctrl` with msgpack
    messages: {"type": "epoch", ...} per epoch, then {"type": "done", ...}, or
    {"type": "error", "worker", "phase", "message"} on failure (exit status 1).
    SIGINT and SIGHUP are ignored: on a terminal Ctrl-C (or the terminal's closing) reaches
    every process of the group, and the coordinator decides (it stops the workers with
    SIGTERM).
    options: timeout_s, max_frame_bytes, link (LinkModel or None), init_params (dict or
    None), load_shard (a module-level function (dir, worker) -> Shard, or None for
    `shards.load_shard`; tests and fault injection pass their own), phase (a shared
    char buffer the coordinator reads when this process dies without a word), checkpoint
    ({"folder", "every", "identity"} or None; worker 0 writes), resume ({"epoch",
    "params", "adam"} or None), slow (compute factor), fault (test-only, see `shardtrain.hooks`).
    """
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGHUP, signal.SIG_IGN)     # a closed terminal: the coordinator decides
    pin_blas_threads(int(settings_dict.get("threads", 1)))
    _install_log_queue(log_queue, log_level)
    from shardtrain import hooks

    phase = ["starting"]
    phase_buf = options.get("phase")
    fault = hooks.phase_watcher(options.get("fault"), rank)

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
        load = options.get("load_shard")
        if load is None:
            from shardtrain.plan.shards import load_shard
            load = load_shard
        shard = load(shard_dir, rank)
        settings = TrainSettings.from_dict(settings_dict)
        profile = Profile(rank)
        transport = PipeTransport(rank, size, ends, profile, timeout_s=options["timeout_s"],
                                  max_frame_bytes=options["max_frame_bytes"],
                                  link=options.get("link"))
        fault.transport = transport
        log.debug("worker %d: %d owned, %d halo rows, peers %s", rank, shard.num_owned,
                  shard.num_halo, shard.peers())
        resume = options.get("resume")
        init_params, init_adam, epochs = options.get("init_params"), None, None
        init_early = None
        if resume is not None:
            init_params, init_adam = resume["params"], resume["adam"]
            init_early = resume.get("early")
            epochs = range(int(resume["epoch"]) + 1, settings.epochs + 1)
        plan = options.get("checkpoint") if rank == 0 else None
        summary = run_worker(shard, settings, transport, profile,
                             lambda rec: send({"type": "epoch", **rec}),
                             num_classes=num_classes, init_params=init_params,
                             init_adam=init_adam, epochs_range=epochs, on_phase=on_phase,
                             on_epoch_end=(_checkpoint_writer(plan, settings.epochs, on_phase)
                                           if plan else None),
                             slow_factor=float(options.get("slow") or 1.0),
                             init_early=init_early)
        send({"type": "done", **encode_summary(summary)})
    except BaseException as exc:  # noqa: BLE001 - everything must reach the coordinator
        status = 1
        log.debug("worker %d failed", rank, exc_info=True)
        try:
            send({"type": "error", "worker": rank, "phase": phase[0],
                  "message": f"{type(exc).__name__}: {exc}" if not str(exc) == "" else
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


def _checkpoint_writer(plan: dict, last_epoch: int, on_phase: Callable[[str], None]):
    """Worker 0's end-of-epoch hook: every plan["every"] epochs and at the last one, write
    the weights and Adam state (identical on every worker after the all-reduce, so one
    writer is enough and nothing large crosses the control pipe)."""
    from shardtrain.train import checkpoint

    def stage(epoch: int, what: str) -> None:
        on_phase(f"epoch {epoch} checkpoint write" if what == "write" else f"epoch {epoch} compute")

    return checkpoint.epoch_writer(
        plan, last_epoch, on_stage=stage,
        before_commit=lambda epoch: on_phase(f"epoch {epoch} checkpoint write, index not yet "
                                             f"renamed"))
