"""Single-process reference: epoch time and where it goes, on the demo parcel network.

Default size: 200 k depots, ~2 M routes, 128 features, hidden 64, float32, BLAS on one
thread. Reports per-epoch training-step seconds (min and median over --epochs), the dropout
masks' share of an epoch (both layers' masks), one Â @ M product at width 64 (in the
reference's locality order), and the evaluation forward.

    python benchmarks/bench_reference.py --out benchmarks/results/bench_reference.json
"""
from __future__ import annotations

import argparse
import platform
import time

import numpy as np
from threadpoolctl import threadpool_limits

from shardtrain.data.graph import normalized_adjacency
from shardtrain.data.synth import parcel_network
from shardtrain.files import write_json_atomic
from shardtrain.plan.schedule import layer_hops
from shardtrain.train import model
from shardtrain.train.reference import locality_order, model_dims, train_reference
from shardtrain.train.settings import TrainSettings


def _timed(fn, repeat):
    """Wall and CPU seconds (min, median): CPU time stays meaningful on a busy machine."""
    wall, cpu = [], []
    for _ in range(repeat):
        w0, c0 = time.perf_counter(), time.process_time()
        fn()
        wall.append(time.perf_counter() - w0)
        cpu.append(time.process_time() - c0)
    return {"min_s": min(wall), "median_s": float(np.median(wall)),
            "cpu_min_s": min(cpu), "cpu_median_s": float(np.median(cpu))}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", required=True)
    ap.add_argument("--vertices", type=int, default=200_000)
    ap.add_argument("--avg-degree", type=float, default=20.0)
    ap.add_argument("--features", type=int, default=128)
    ap.add_argument("--hidden", type=int, default=64)
    ap.add_argument("--classes", type=int, default=6)
    ap.add_argument("--epochs", type=int, default=10)
    ap.add_argument("--repeat", type=int, default=5)
    args = ap.parse_args()

    graph = parcel_network(args.vertices, args.avg_degree, args.classes, args.features, seed=0)
    settings = TrainSettings(hidden=args.hidden, epochs=args.epochs, seed=0)
    n = graph.num_vertices
    dims = model_dims(graph, settings)
    with threadpool_limits(1):
        run = train_reference(graph, settings)
        steps = [r["epoch_s"] for r in run.epochs]
        ids = np.arange(n)

        def masks():
            for layer, (d_in, _) in enumerate(dims):
                model.dropout_mask(0, 1, layer, ids, d_in, settings.dropout, np.float32)

        a_hat = normalized_adjacency(graph)
        order = locality_order(a_hat)          # the row order the reference trains in
        a_hat = a_hat[order][:, order].astype(np.float32)
        m = np.random.default_rng(0).standard_normal((n, args.hidden), dtype=np.float32)
        x = graph.features[order].astype(np.float32)
        hops = layer_hops(dims)
        def evaluate():
            return model.forward(run.params, x, hops, lambda l, h: a_hat @ h,
                                                 model.no_dropout)
        step = {"min_s": min(steps), "median_s": float(np.median(steps))}
        # the same training step again, outside the trainer, for its CPU time
        params = [(w.copy(), None if b is None else b.copy()) for w, b in run.params]
        adam = model.Adam(params, settings.lr)
        train = graph.train_mask[order]
        labels = graph.labels[order]
        def step_again():
            return model.train_step(
                    params, adam, x, labels, train, int(train.sum()), hops, lambda l, h: a_hat @ h,
                    lambda l, g: a_hat @ g, model.Dropout(0, 1, settings.dropout, order),
                    lambda flat: None, settings.weight_decay)
        step.update({k: v for k, v in _timed(step_again, args.repeat).items()
                     if k.startswith("cpu")})
        mask_t = _timed(masks, args.repeat)
        result = {
            "graph": {"vertices": n, "edges": graph.num_edges, "features": args.features,
                      "classes": args.classes},
            "settings": settings.to_dict(),
            "machine": platform.platform(),
            "train_step": step,
            "dropout_masks_per_epoch": mask_t,
            "spmm_width_hidden": _timed(lambda: a_hat @ m, args.repeat),
            "evaluation_forward": _timed(evaluate, args.repeat),
            "ratio_dropout_masks_vs_train_step_cpu": mask_t["cpu_median_s"] / step["cpu_median_s"],
            "final_test_acc": run.epochs[-1]["test_acc"],
        }
    write_json_atomic(args.out, result)


if __name__ == "__main__":
    main()
