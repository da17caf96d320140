"""Single-process, full-graph GCN training: the oracle partitioned training must equal.

No shards, no workers, no transport: propagate is Â @ M and the all-reduce is a no-op.
It calls the same `model.train_step` as the worker, with the same dropout keys (global
vertex ids, epoch numbers 1..epochs), so the two differ only by the order of sums.

Rows are numbered in reverse Cuthill-McKee order (Cuthill & McKee 1969, via scipy) so that
neighbours sit close together in memory, as each worker's shard does: Â @ M is faster
than in id order (benchmarks/bench_shards.py compares the two orders). Only the order of
sums changes; results come back in global id order.
"""
from __future__ import annotations

import time
from dataclasses import dataclass
from typing import Callable

import numpy as np
from scipy.sparse.csgraph import reverse_cuthill_mckee

from shardtrain.data.graph import Graph, normalized_adjacency
from shardtrain.errors import InputError, ParameterError, option
from shardtrain.plan.schedule import layer_dims, layer_hops
from shardtrain.train import model, stopping
from shardtrain.train.settings import TrainSettings


@dataclass
class RunResult:
    epochs: list[dict]          # {"epoch", "loss", "train_loss", "val_loss", "train_acc",
                                #  "val_acc", "test_acc", "epoch_s"}
    params: model.Params        # final weights (the best epoch's with early stopping)
    predictions: np.ndarray     # (n,) int64, argmax of those weights' evaluation forward
    early_stop: dict | None = None   # stopping.EarlyStop.summary(), or None when off


def check_trainable(graph: Graph) -> None:
    """The graph must carry features, labels and at least one labelled training vertex."""
    if graph.features is None:
        raise InputError(f"graph: no vertex features (give {option('features')})")
    if graph.labels is None:
        raise InputError(f"graph: no vertex labels (give {option('labels')})")
    if graph.train_mask is None or not np.any(graph.train_mask):
        raise InputError("graph: no training vertices (the training split is empty)")
    if np.any(graph.labels[graph.train_mask] < 0):
        raise InputError("graph: some training vertices have no label")


def model_dims(graph: Graph, settings: TrainSettings) -> list[tuple[int, int]]:
    assert graph.input_dim is not None     # callers ran check_trainable (features given)
    return layer_dims(graph.input_dim, settings.hidden, graph.num_classes, settings.layers)


def _noop_allreduce(flat: np.ndarray) -> None:
    """One process: its partial sums are already the totals."""


def locality_order(a_hat) -> np.ndarray:
    """Reverse Cuthill-McKee order of a symmetric sparse matrix (int64 vertex ids)."""
    return reverse_cuthill_mckee(a_hat, symmetric_mode=True).astype(np.int64)


def train_reference(graph: Graph, settings: TrainSettings, *, init_params=None,
                    init_adam: dict | None = None, first_epoch: int = 1,
                    on_epoch: Callable[[dict], None] | None = None,
                    on_epoch_end: Callable | None = None,
                    reorder: bool = True, init_early: dict | None = None,
                    training_products: Callable | None = None) -> RunResult:
    """Train epochs first_epoch..settings.epochs; record the loss and accuracies of each.

    loss = the objective of that step's forward pass (cross-entropy + weight-decay penalty
    at the weights that forward used); train_loss = its cross-entropy alone; val_loss and
    the accuracies come from an evaluation forward (no dropout) after the step.
    BLAS runs on `settings.threads` threads (threadpoolctl), as each worker does.
    With `settings.early_stop` = N > 0 the run stops after N epochs without a strictly
    lower validation loss and returns the best epoch's weights and predictions
    (`shardtrain.train.stopping`); `init_early` (the `stopping` arrays of a checkpoint) resumes
    that state. `init_params` (Params or {name: array} of the right shapes)
    replaces Glorot. To resume after epoch E, give the weights and `init_adam`
    (`model.Adam.state()` arrays, e.g. a checkpoint's) and `first_epoch=E + 1`: the epoch
    keys the dropout stream, so the run goes on exactly as if never stopped.
    `on_epoch_end(epoch, params, adam)` runs after each epoch's evaluation and before
    `on_epoch(record)` (a place to write checkpoints, as worker 0 does); with early
    stopping it is called as `on_epoch_end(epoch, params, adam, early=EarlyStop,
    last=bool)` (`checkpoint.epoch_writer` takes both).
    `reorder=False` keeps rows in id order (same maths, slower products).
    `training_products(epoch)` -> (propagate, propagate_t), rows in id order (so it implies
    `reorder=False`): the products of that epoch's training step instead of Â's
    (`single_process.SchemeProducts.epoch`, a halo scheme); the evaluation stays Â.
    """
    from threadpoolctl import threadpool_limits

    settings.validate()
    check_trainable(graph)
    if not 1 <= first_epoch <= settings.epochs:
        raise ValueError(f"first_epoch {first_epoch} is not in 1..{settings.epochs}")
    with threadpool_limits(limits=settings.threads):
        return _train(graph, settings, init_params, init_adam, first_epoch, on_epoch,
                      on_epoch_end, reorder and training_products is None, init_early,
                      training_products)


def check_early_stop(graph: Graph, settings: TrainSettings) -> None:
    """Early stopping needs validation vertices with labels."""
    if not settings.early_stop:
        return
    if graph.val_mask is None or not np.any(graph.val_mask):
        raise ParameterError("early_stop", "the graph has no validation vertices (the "
                                           "validation split is empty)")


def _train(graph, settings, init_params, init_adam, first_epoch, on_epoch, on_epoch_end,
           reorder, init_early, training_products=None) -> RunResult:
    check_early_stop(graph, settings)
    dtype = settings.np_dtype
    n = graph.num_vertices
    a_hat = normalized_adjacency(graph)
    order = locality_order(a_hat) if reorder else np.arange(n, dtype=np.int64)
    if reorder:
        a_hat = a_hat[order][:, order]
        a_hat.sort_indices()
    a_hat = a_hat.astype(dtype)
    x = np.ascontiguousarray(graph.features[order], dtype=dtype)
    labels = graph.labels[order]
    dims = model_dims(graph, settings)
    hops = layer_hops(dims)
    if init_params is None:
        params = model.glorot_init(dims, settings.seed, dtype, settings.bias)
    else:
        arrays = init_params if isinstance(init_params, dict) \
            else model.params_to_arrays(init_params)
        params = model.params_from_arrays(arrays, dims, settings.bias, dtype,
                                          source="initial weights")
    adam = model.Adam(params, settings.lr)
    if init_adam is not None:
        adam.load_state(init_adam, source="initial optimiser state")
    masks = [None if m is None else m[order]
             for m in (graph.train_mask, graph.val_mask, graph.test_mask)]
    totals = [0 if m is None else int(np.count_nonzero(m)) for m in masks]
    n_train = totals[0]
    global_ids = order              # row i holds vertex order[i]: the dropout key
    assert masks[0] is not None     # check_trainable refused a graph without a training split

    def propagate(layer, m):
        return a_hat @ m

    def propagate_t(layer, g):
        return a_hat @ g            # Â is symmetric (bit for bit: d_i^-1/2 d_j^-1/2)

    early = None
    if settings.early_stop:
        early = stopping.EarlyStop.from_state(settings.early_stop, init_early or {}, dims,
                                              settings.bias, dtype, source="early-stop state")
    best_logits = None
    records = []
    logits = None
    for epoch in range(first_epoch, settings.epochs + 1):
        start = time.perf_counter()
        penalty = model.weight_decay_penalty(params, settings.weight_decay)
        drop = model.Dropout(settings.seed, epoch, settings.dropout, global_ids)
        step, step_t = (propagate, propagate_t) if training_products is None \
            else training_products(epoch)
        loss_part = model.train_step(params, adam, x, labels, masks[0], n_train, hops,
                                     step, step_t, drop, _noop_allreduce,
                                     settings.weight_decay)
        epoch_s = time.perf_counter() - start
        logits, _ = model.forward(params, x, hops, propagate, model.no_dropout)
        acc = [model.accuracy(c, t) for c, t in
               zip(model.correct_counts(logits, labels, masks), totals)]
        val_loss = model.mean_loss(*model.cross_entropy_sum(logits, labels, masks[1]))
        record = {"epoch": epoch, "loss": loss_part + penalty, "train_loss": loss_part,
                  "val_loss": val_loss, "train_acc": acc[0], "val_acc": acc[1],
                  "test_acc": acc[2], "epoch_s": epoch_s}
        records.append(record)
        stop = False
        if early is not None:
            assert val_loss is not None     # check_early_stop refused no validation vertices
            if early.update(epoch, val_loss, params):
                best_logits = logits
            stop = early.should_stop(epoch)
        if on_epoch_end is not None:
            if early is None:
                on_epoch_end(epoch, params, adam)
            else:
                on_epoch_end(epoch, params, adam, early=early, last=stop)
        if on_epoch is not None:
            on_epoch(record)
        if stop:
            break
    if early is not None:
        assert early.best_params is not None    # update() ran: at least one epoch did
        params = early.best_params
        if best_logits is None:      # best epoch before a resume: evaluate its weights again
            best_logits, _ = model.forward(params, x, hops, propagate, model.no_dropout)
        logits = best_logits
    assert logits is not None       # first_epoch <= epochs: the loop ran at least once
    predictions = np.empty(n, dtype=np.int64)
    predictions[order] = np.argmax(logits, axis=1)
    return RunResult(records, params, predictions,
                     None if early is None else early.summary())
