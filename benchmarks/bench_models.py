"""Epoch time of each model of the message-passing family, 1 against 2 workers, one run.

    python benchmarks/bench_models.py --out benchmarks/results/bench_models.json
        [--vertices 200000 --avg-degree 10 --features 64 --hidden 16 --heads 8 --epochs 4]

On one synthesized parcel network (float32, 2 layers, dropout 0.5), per model (gcn, sage,
gin, gat): 1 worker and 2 workers over pipes (metis shards, built once and shared by the
models), epoch_s = the slowest worker's step, median over the epochs after the first.
Goal (issue 13): each model's 2-worker epoch >= 1.7x faster than its 1-worker epoch on 2
cores. CPU seconds per epoch (each worker's profiled CPU / epochs, summed) and the load
average sit beside every wall figure: on a shared machine the wall ratio measures the
neighbours too. The PyTorch peer of bench_train.py is not repeated here per model.
"""
from __future__ import annotations

import argparse
import os
import statistics
import sys
import tempfile
import time
from pathlib import Path

CLASSES = 6
MODELS = ("gcn", "sage", "gin", "gat")


def _median_epoch(records) -> float:
    times = [r["epoch_s"] for r in records[1:]] or [records[0]["epoch_s"]]
    return statistics.median(times)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", required=True)
    ap.add_argument("--vertices", type=int, default=200_000)
    ap.add_argument("--avg-degree", type=float, default=10.0)
    ap.add_argument("--features", type=int, default=64)
    ap.add_argument("--hidden", type=int, default=16)
    ap.add_argument("--heads", type=int, default=8)
    ap.add_argument("--epochs", type=int, default=4)
    ap.add_argument("--models", default=",".join(MODELS))
    args = ap.parse_args(argv)

    from shardtrain.data.synth import parcel_network
    from shardtrain.files import write_json_atomic
    from shardtrain.plan.partition import partition
    from shardtrain.plan.shards import build_shards, save_shards
    from shardtrain.train.coordinator import train_partitioned
    from shardtrain.train.settings import TrainSettings

    graph = parcel_network(args.vertices, args.avg_degree, CLASSES, args.features, seed=1)
    out: dict = {"vertices": graph.num_vertices, "edges": graph.num_edges,
                 "features": args.features, "hidden": args.hidden, "heads": args.heads,
                 "epochs": args.epochs, "cpus": os.cpu_count(), "models": {}}
    with tempfile.TemporaryDirectory() as tmp:
        dirs = {}
        for k in (1, 2):
            a = partition(graph, "metis", k, seed=0) if k > 1 else \
                [0] * graph.num_vertices
            dirs[k] = Path(tmp) / f"s{k}"
            save_shards(dirs[k], build_shards(graph, a, k),
                        meta={"method": "metis", "seed": 0, "num_classes": CLASSES,
                              "input_dim": args.features})
        for kind in args.models.split(","):
            settings = TrainSettings(layers=2, hidden=args.hidden, dropout=0.5,
                                     epochs=args.epochs, dtype="float32", model=kind,
                                     heads=args.heads)
            row: dict = {}
            for k in (1, 2):
                load = os.getloadavg()[0]
                start = time.perf_counter()
                result = train_partitioned(dirs[k], settings, timeout_s=600)
                cpu = [w["cpu_s"] / args.epochs for w in result.workers]
                row[f"{k}_workers"] = {
                    "epoch_s": _median_epoch(result.epochs),
                    "epoch_s_all": [e["epoch_s"] for e in result.epochs],
                    "cpu_s_per_epoch_sum": sum(cpu),
                    "peak_rss_bytes_max": max(w["peak_rss_bytes"] for w in result.workers),
                    "payload_bytes": result.traffic["measured_payload_bytes"],
                    "payload_equals_prediction": result.traffic["measured_payload_bytes"]
                    == result.traffic["predicted_payload_bytes"],
                    "wall_s": time.perf_counter() - start,
                    "load_before": load, "load_after": os.getloadavg()[0]}
                print(f"{kind} {k} workers: {row[f'{k}_workers']['epoch_s']:.3f} s/epoch",
                      file=sys.stderr)
            row["speedup_2_over_1"] = row["1_workers"]["epoch_s"] / row["2_workers"]["epoch_s"]
            row["goal_1_7x_met"] = row["speedup_2_over_1"] >= 1.7
            out["models"][kind] = row
    write_json_atomic(args.out, out)
    for kind, row in out["models"].items():
        print(f"{kind}: 1 worker {row['1_workers']['epoch_s']:.3f} s, 2 workers "
              f"{row['2_workers']['epoch_s']:.3f} s, x{row['speedup_2_over_1']:.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
