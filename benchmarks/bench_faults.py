"""How fast a dead worker is noticed, and what a checkpoint costs; one run.

    python benchmarks/bench_faults.py --out benchmarks/results/bench_faults.json
        [--vertices 20000 --avg-degree 10 --features 64 --hidden 32 --workers 4 --epochs 6]

The synthesized parcel network (seed 1, 6 roles), float64, 2 layers, split into metis
shards. For each moment of an epoch (forward exchange, backward exchange, all-reduce,
compute, checkpoint write), one worker is SIGKILLed there by the test-only fault hook
(`shardtrain.testing.faults`), which first writes the wall-clock time; the figure is the seconds
from that moment until train_partitioned raised its RunError, which it does after every
worker has been stopped and joined: an upper bound of the detection time (goal: < 5 s).
Then the killed run is resumed
from its last checkpoint and its final weights are compared with an uninterrupted run's
(bit for bit). Also: the epoch time with and without a checkpoint after every epoch.
"""
from __future__ import annotations

import argparse
import json
import os
import shutil
import statistics
import tempfile
import time
from pathlib import Path

import numpy as np

CLASSES = 6


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", required=True)
    ap.add_argument("--vertices", type=int, default=20000)
    ap.add_argument("--avg-degree", type=float, default=10)
    ap.add_argument("--features", type=int, default=64)
    ap.add_argument("--hidden", type=int, default=32)
    ap.add_argument("--workers", type=int, default=4)
    ap.add_argument("--epochs", type=int, default=6)
    args = ap.parse_args()

    from shardtrain.data.synth import parcel_network
    from shardtrain.errors import RunError
    from shardtrain.plan.partition import partition
    from shardtrain.plan.schedule import layer_dims
    from shardtrain.plan.shards import build_shards, save_shards
    from shardtrain.testing import faults
    from shardtrain.train import checkpoint as ck
    from shardtrain.train import model
    from shardtrain.train.coordinator import train_partitioned
    from shardtrain.train.settings import TrainSettings

    k, epochs = args.workers, args.epochs
    settings = TrainSettings(hidden=args.hidden, epochs=epochs, dtype="float64", seed=3)
    tmp = Path(tempfile.mkdtemp(prefix="bench-faults-"))
    try:
        graph = parcel_network(args.vertices, args.avg_degree, CLASSES, args.features, seed=1)
        shard_dir = tmp / "shards"
        save_shards(shard_dir, build_shards(graph, partition(graph, "metis", k, seed=0), k),
                    meta={"method": "metis", "seed": 0})
        dims = layer_dims(args.features, args.hidden, CLASSES, 2)
        identity = ck.run_identity(settings, workers=k, dims=dims, graph_fingerprint=None,
                                   shards_fingerprint=ck.shard_dir_fingerprint(shard_dir))

        def plan(folder, every):
            return {"folder": str(folder), "every": every, "identity": identity}

        start = time.perf_counter()
        plain = train_partitioned(shard_dir, settings, timeout_s=30)
        plain_s = time.perf_counter() - start
        want = model.params_to_arrays(plain.params)
        start = time.perf_counter()
        saved = train_partitioned(shard_dir, settings, timeout_s=30,
                                  checkpoint=plan(tmp / "every", 1))
        saved_s = time.perf_counter() - start
        mid = max(2, epochs // 2 + 1)
        cases = {"forward exchange": f"1@epoch {mid} forward exchange, layer 1=kill",
                 "backward exchange": f"{k - 1}@epoch {mid} backward exchange=kill",
                 "all-reduce": f"1@epoch {mid} all-reduce=kill",
                 "compute": f"{k - 1}@epoch {mid} compute=kill",
                 "checkpoint write": f"0@epoch {mid} checkpoint write, index not yet "
                                     f"renamed=kill"}
        rows = []
        for name, spec in cases.items():
            folder = tmp / f"ck-{name.replace(' ', '-')}"
            stamp = tmp / "stamp"
            message = None
            try:
                train_partitioned(shard_dir, settings, timeout_s=30,
                                  checkpoint=plan(folder, 1),
                                  fault=faults.parse(spec, stamp=str(stamp)),
                                  on_epoch=None)
            except RunError as exc:
                message = str(exc)
                stopped = time.time()
            killed = float(stamp.read_text())
            resumed = train_partitioned(shard_dir, settings, timeout_s=30,
                                        resume=ck.read_checkpoint(folder))
            got = model.params_to_arrays(resumed.params)
            rows.append({"phase": name, "fault": spec, "message": message,
                         "detected_and_stopped_s": stopped - killed,
                         "resumed_from_epoch": resumed.epochs[0]["epoch"] - 1,
                         "resume_bit_equal": all(np.array_equal(got[n], want[n])
                                                 for n in want)})
        doc = {"graph": {"vertices": graph.num_vertices, "edges": graph.num_edges,
                         "features": args.features}, "workers": k, "epochs": epochs,
               "run_s_without_checkpoints": plain_s, "run_s_checkpoint_every_epoch": saved_s,
               "median_epoch_s_without": statistics.median(r["epoch_s"] for r in plain.epochs),
               "median_epoch_s_with": statistics.median(r["epoch_s"] for r in saved.epochs),
               "kills": rows, "load_average": list(os.getloadavg())}
        Path(args.out).parent.mkdir(parents=True, exist_ok=True)
        Path(args.out).write_text(json.dumps(doc, indent=1) + "\n")
        print(json.dumps(doc, indent=1))
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    main()
