"""The training loop on one shard, driven through a transport.

`run_worker` is the whole of a worker's job and knows nothing of processes: the pipes
coordinator runs it in a child process (`worker_process.process_main`), the MPI driver on
a rank; both hand it a transport, a profile and a `report` callable for per-epoch records.
The halo products it hands the model are `halo.HaloOps`; the model code is the reference's
(`model.train_step`), so the run equals the reference.
"""
from __future__ import annotations

import resource
import time
from contextlib import contextmanager
from typing import Callable

import numpy as np

from shardtrain.errors import ParameterError
from shardtrain.plan import schedule, schemes
from shardtrain.train import model, stopping
from shardtrain.train.halo import EVAL, FORWARD, HaloOps
from shardtrain.train.models.common import local_graph, operator_matrix
from shardtrain.train.settings import TrainSettings
from shardtrain.transport.base import Transport

# ---------------------------------------------------------------- a straggler on purpose

class SlowCompute:
    """A profile whose compute phases take `factor` times as long: after each one it
    sleeps (factor - 1) x the compute time it measured (its own, without nested phases),
    inside the phase, so the profile books the delay as compute and the other workers'
    waits show what a straggler costs them (`slow_workers`)."""

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
    return settings.model_dims(int(shard.features.shape[1]), num_classes)


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
    hops = settings.hops(dims)
    if init_params is None:
        params = model.glorot_init(dims, settings.seed, dtype, settings.bias, hops=hops)
    else:
        arrays = init_params if isinstance(init_params, dict) else \
            model.params_to_arrays(init_params)
        params = model.params_from_arrays(arrays, dims, settings.bias, dtype,
                                          source="initial weights", hops=hops)
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
    local = None
    if settings.model == "gcn":
        ops = HaloOps(shard, transport, profile, dtype, scheme=settings.scheme,
                      seed=settings.seed)
    else:
        with profile.phase("compute"):
            operator = operator_matrix(settings.model, shard.adj)
        ops = HaloOps(shard, transport, profile, dtype, scheme=settings.scheme,
                      seed=settings.seed, adj=operator)
    ops.on_phase = on_phase
    ops.first_epoch = epochs.start        # a stale scheme's warm-up epoch
    propagate_train, propagate_eval = ops.propagate(FORWARD), ops.propagate(EVAL)
    propagate_t = ops.propagate_t
    if settings.model == "gat":
        # GAT's products are its own (attention per edge): the exchange hands it [T; T_halo]
        with profile.phase("compute"):
            local = local_graph(shard.adj, np.concatenate([shard.owned, shard.halo]))
        propagate_train, propagate_eval = ops.gather(FORWARD), ops.gather(EVAL)
        propagate_t = ops.gather_t

    def allreduce(flat: np.ndarray) -> None:
        on_phase(f"epoch {ops.epoch} all-reduce")
        with profile.phase("allreduce"):
            transport.allreduce_sum(flat, epoch=ops.epoch)
        on_phase(f"epoch {ops.epoch} compute")

    early = None
    if settings.early_stop:
        early = stopping.EarlyStop.from_state(settings.early_stop, init_early or {}, dims,
                                              settings.bias, dtype, source="early-stop state",
                                              hops=hops)
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
                                         propagate_t, drop, allreduce,
                                         settings.weight_decay, local=local)
        step_s = time.perf_counter() - start
        on_phase(f"epoch {epoch} evaluation")
        with profile.phase("compute"):
            # [0]: the evaluation's cache is not kept alive into the next step
            logits = model.forward(params, x, hops, propagate_eval, model.no_dropout,
                                   local)[0]
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
    ops.finish()                          # a stale scheme: the last epoch's exchanges

    extra_evals = 0
    if early is not None and early.best_params is not None:
        params = early.best_params
        if best_logits is None:      # best epoch before a resume: evaluate its weights again
            on_phase("evaluation of the best epoch's weights")
            with profile.phase("compute"):
                best_logits, _ = model.forward(params, x, hops, propagate_eval,
                                               model.no_dropout, local)
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
        "halo_kept": schemes.worker_kept_rows(
            shard.halo, shard.halo_ptr, shard.worker, settings.scheme, settings.seed,
            range(epochs.start, epochs.start + epochs_run)).tolist(),
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
        raise ParameterError("early_stop", "the graph has no validation vertices (the "
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
