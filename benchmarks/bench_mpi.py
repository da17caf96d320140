"""Epoch time of partitioned training under MPI (2 ranks) against pipes (2 workers), one run.

    python benchmarks/bench_mpi.py --out benchmarks/results/bench_mpi.json
        [--vertices 200000 --avg-degree 20 --features 128 --hidden 64 --epochs 10]

The graph of the trainer benchmark (bench_train.py: the synthesized parcel network, seed 1,
6 roles), float32, 2 layers, dropout 0.5, split once into 2 metis shards; then, side by side
on the same shard directory:
- pipes: `coordinator.train_partitioned`, 2 worker processes;
- MPI: `mpiexec -n 2 shardtrain train SHARD_DIR --transport mpi` (the mpich wheel's
  launcher unless --mpiexec is given), 2 ranks.
Epoch times are medians over the epochs after the first (warm-up); epoch_s is the slowest
worker's training step in both. With --repeats R the two alternate (pipes, MPI, pipes, ...)
and the best median of each is compared, since other jobs on a shared machine slow whichever
runs at a bad moment; CPU seconds per epoch (slowest worker's, training and evaluation) sit
beside the wall times because the load only delays the wall clock. The load average is
recorded. Skipped with a note where mpi4py or mpiexec is missing.
"""
from __future__ import annotations

import argparse
import json
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

CLASSES = 6          # as bench_train.py


def _median_epoch(records) -> float:
    times = [r["epoch_s"] for r in records[1:]] or [records[0]["epoch_s"]]
    return statistics.median(times)


def _summary(epochs, workers, traffic) -> dict:
    return {"epoch_s": _median_epoch(epochs), "epoch_s_all": [e["epoch_s"] for e in epochs],
            "cpu_s_per_epoch": max(w["cpu_s"] for w in workers) / len(epochs),
            "load_average_1min": os.getloadavg()[0],
            "loss": [e["loss"] for e in epochs],
            "measured_payload_bytes": traffic["measured_payload_bytes"],
            "predicted_payload_bytes": traffic["predicted_payload_bytes"],
            "per_worker": workers}


def _mpiexec(given: str | None) -> str | None:
    if given:
        return given
    return shutil.which("mpiexec", path=os.pathsep.join([os.path.dirname(sys.executable),
                                                        os.environ.get("PATH", "")]))


def _mpi_run(launcher: str, shard_dir: Path, args, tmp: Path) -> dict:
    run_json = tmp / "mpi.json"
    env = {**os.environ, "OPENBLAS_NUM_THREADS": "1", "OMP_NUM_THREADS": "1"}
    t0 = time.perf_counter()
    proc = subprocess.run(
        [launcher, "-n", "2", sys.executable, "-m", "shardtrain", "train", str(shard_dir),
         "--transport", "mpi", "--layers", "2", "--hidden", str(args.hidden), "--dropout",
         "0.5", "--epochs", str(args.epochs), "--dtype", "float32", "--timeout", "300",
         "--quiet", "--json", str(run_json)], capture_output=True, text=True, env=env)
    launch_s = time.perf_counter() - t0
    if proc.returncode != 0:
        raise SystemExit(f"mpiexec failed ({proc.returncode}): {proc.stderr[-2000:]}")
    doc = json.loads(run_json.read_text())
    return {**_summary(doc["epochs"], doc["workers"], doc["traffic"]), "job_wall_s": launch_s}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", required=True)
    ap.add_argument("--vertices", type=int, default=200_000)
    ap.add_argument("--avg-degree", type=float, default=20)
    ap.add_argument("--features", type=int, default=128)
    ap.add_argument("--hidden", type=int, default=64)
    ap.add_argument("--epochs", type=int, default=10)
    ap.add_argument("--repeats", type=int, default=1, help="alternating runs of each")
    ap.add_argument("--mpiexec", help="MPI launcher (default: mpiexec beside python or on PATH)")
    args = ap.parse_args()

    from shardtrain.data.synth import parcel_network
    from shardtrain.files import write_json_atomic
    from shardtrain.plan.partition import partition
    from shardtrain.plan.shards import build_shards, save_shards
    from shardtrain.train.coordinator import train_partitioned
    from shardtrain.train.settings import TrainSettings

    settings = TrainSettings(layers=2, hidden=args.hidden, dropout=0.5, epochs=args.epochs,
                             dtype="float32")
    out = {"settings": vars(args), "cpus": os.cpu_count()}
    with tempfile.TemporaryDirectory(prefix="bench-mpi-") as tmp:
        shard_dir = Path(tmp) / "shards"
        t0 = time.perf_counter()
        graph = parcel_network(args.vertices, args.avg_degree, CLASSES, args.features, seed=1)
        out["graph"] = {"vertices": graph.num_vertices, "edges": graph.num_edges}
        shards = build_shards(graph, partition(graph, "metis", 2, seed=0), 2)
        save_shards(shard_dir, shards, meta={"method": "metis", "seed": 0,
                                             "num_classes": graph.num_classes,
                                             "input_dim": graph.input_dim})
        out["halo_rows"] = [s.num_halo for s in shards]
        del graph, shards
        out["prepare_s"] = time.perf_counter() - t0
        print(f"graph and shards: {out['prepare_s']:.1f} s", file=sys.stderr)

        launcher = _mpiexec(args.mpiexec)
        try:
            import mpi4py  # noqa: F401
            missing = None if launcher else "mpiexec not found"
        except ImportError as exc:
            missing = f"mpi4py not importable ({exc})"
        out["pipes_runs"], out["mpi_runs"] = [], []
        for _ in range(args.repeats):
            pipes = train_partitioned(shard_dir, settings, timeout_s=300)
            out["pipes_runs"].append(_summary(pipes.epochs, pipes.workers, pipes.traffic))
            print(f"pipes, 2 workers: {out['pipes_runs'][-1]['epoch_s']:.3f} s/epoch",
                  file=sys.stderr)
            if missing:
                continue
            out["mpi_runs"].append(_mpi_run(launcher, shard_dir, args, Path(tmp)))
            print(f"MPI, 2 ranks: {out['mpi_runs'][-1]['epoch_s']:.3f} s/epoch",
                  file=sys.stderr)
        best = {k: min(out[f"{k}_runs"], key=lambda r: r["epoch_s"])
                for k in ("pipes", "mpi") if out[f"{k}_runs"]}
        out["pipes"] = best["pipes"]
        if missing:
            out["mpi"] = {"skipped": f"{missing}; pip install -e '.[mpi]'"}
        else:
            out["mpi"] = best["mpi"]
            loss_diff = max(abs(a - b) / abs(b) for a, b in
                            zip(out["mpi"]["loss"], out["pipes"]["loss"]))
            out["ratios"] = {
                "mpi_over_pipes_epoch_s": out["mpi"]["epoch_s"] / out["pipes"]["epoch_s"],
                "mpi_over_pipes_cpu_s_per_epoch": out["mpi"]["cpu_s_per_epoch"]
                / out["pipes"]["cpu_s_per_epoch"],
                "max_relative_loss_difference_float32": loss_diff,
                "payload_equal": out["mpi"]["measured_payload_bytes"]
                == out["pipes"]["measured_payload_bytes"]
                == out["mpi"]["predicted_payload_bytes"],
            }
    write_json_atomic(args.out, out)
    print(json.dumps(out.get("ratios", {}), indent=1))


if __name__ == "__main__":
    main()
