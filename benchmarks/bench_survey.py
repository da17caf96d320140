"""Benchmark: the full survey on a synthesized parcel network (default 1 M depots, 10 M routes).

Per plan (method x workers): partition time, shard build time, survey time, build rate
(undirected edges per second, as in bench_shards.py), and the process's peak RSS during
that plan (the kernel's high-water mark is reset before each plan). Goal (issue 2): 4
methods x workers {2,4,8,16} in under 3 minutes in total; shard build >= 5 M edges/s.
The machine is shared: every time is given as wall and CPU seconds of this process, with
the 1-minute load average, and the goals are judged on both.

Default methods: metis, fennel, random, range. metis-volume is left out: on this
power-law graph METIS's volume refinement takes minutes per plan (`--methods` adds it).

Memory check: `survey.predict_memory` against the measured peak RSS of a real worker
(`worker.run_worker`, one worker, so no peers: a transport that has nothing to send) on a
smaller random graph, in a fresh process per dtype.

    python benchmarks/bench_survey.py --out benchmarks/results/bench_survey.json
"""
from __future__ import annotations

import argparse
import os
import platform
import sys
import time

import numpy as np

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")

from shardtrain.files import write_json_atomic  # noqa: E402
from shardtrain.plan import survey as sv  # noqa: E402
from shardtrain.plan.schedule import layer_dims, layer_hops  # noqa: E402

GOAL_TOTAL_S = 180.0
GOAL_BUILD_EDGES_PER_S = 5e6


def _status_kib(field: str) -> int:
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith(field + ":"):
                return int(line.split()[1])
    return -1


def _reset_peak_rss() -> None:
    """Reset VmHWM to the current RSS (Linux: write 5 to /proc/self/clear_refs)."""
    try:
        with open("/proc/self/clear_refs", "w") as fh:
            fh.write("5")
    except OSError:
        pass


DEFAULT_METHODS = ("metis", "fennel", "random", "range")


class _NoPeers:
    """The transport of a single worker: no halo, no all-reduce partners."""

    def exchange(self, outgoing, incoming, **kw):
        assert not outgoing and not incoming

    def allreduce_sum(self, flat, **kw):
        pass


SHARD_ARRAYS = ("owned", "halo", "halo_ptr", "send_idx", "send_ptr", "features", "labels",
                "train_mask", "val_mask", "test_mask")


def _write_memory_shard(path: str, vertices: int, edges: int, features: int) -> None:
    """One worker's shard of a random graph, saved as plain arrays (as a worker loads it)."""
    from shardtrain.data.graph import Graph, csr_from_edges
    from shardtrain.plan.shards import build_shards

    rng = np.random.default_rng(0)
    ip, ix, _ = csr_from_edges(rng.integers(0, vertices, edges), rng.integers(0, vertices, edges),
                               vertices)
    train = np.zeros(vertices, dtype=bool)
    train[:1000] = True
    graph = Graph(ip, ix, features=rng.normal(size=(vertices, features)).astype(np.float32),
                  labels=rng.integers(0, 6, vertices), train_mask=train, val_mask=~train,
                  test_mask=~train)
    shard = build_shards(graph, np.zeros(vertices, dtype=np.int64), 1)[0]
    arrays = {name: getattr(shard, name) for name in SHARD_ARRAYS}
    np.savez(path, adj_indptr=shard.adj.indptr, adj_indices=shard.adj.indices,
             adj_data=shard.adj.data, num_train=shard.num_train_global, **arrays)


def _memory_check_child(path: str, hidden: int, dtype: str, model: str = "gcn") -> None:
    """Run in a fresh process: load the shard, predict, train 3 epochs, report peak RSS."""
    import json

    import scipy.sparse as sp

    from shardtrain.plan.shards import Shard
    from shardtrain.train import worker
    from shardtrain.train.settings import TrainSettings
    from shardtrain.transport.meter import Profile

    with np.load(path, allow_pickle=False) as z:
        a = {key: z[key] for key in z.files}
    n, h = a["owned"].shape[0], a["halo"].shape[0]
    adj = sp.csr_matrix((a["adj_data"], a["adj_indices"], a["adj_indptr"]), shape=(n, n + h))
    shard = Shard(worker=0, workers=1, num_vertices_global=n, adj=adj,
                  num_train_global=int(a["num_train"]), **{k: a[k] for k in SHARD_ARRAYS})
    del a
    features, classes = shard.features.shape[1], 6
    settings = TrainSettings(layers=2, hidden=hidden, epochs=3, dtype=dtype, model=model)
    hops = settings.hops(settings.model_dims(features, classes))
    predicted = sv.predict_memory(shard, hops, np.dtype(dtype).itemsize,
                                  param_elements=sv.parameter_elements(hops),
                                  input_dim=features, feature_itemsize=shard.features.itemsize)
    worker.run_worker(shard, settings, _NoPeers(), Profile(0), lambda r: None,
                      num_classes=classes)
    measured = _status_kib("VmHWM") * 1024
    print(json.dumps({"model": model, "dtype": dtype, "owned": n, "nnz": int(adj.nnz),
                      "features": features,
                      "hidden": hidden, "predicted_bytes": predicted,
                      "measured_peak_rss_bytes": measured,
                      "predicted_over_measured": predicted / measured}))


# (features, hidden, dtype, model): GCN transform-first in both layers, in both dtypes, and
# aggregate-first in layer 0 (features < hidden); each other model once (GAT: 8 heads of 8)
MEMORY_CONFIGS = ((128, 64, "float32", "gcn"), (128, 64, "float64", "gcn"),
                  (16, 64, "float32", "gcn"), (128, 64, "float32", "sage"),
                  (128, 64, "float32", "gin"), (128, 8, "float32", "gat"))


def _memory_check(configs=MEMORY_CONFIGS, vertices=200_000, edges=1_000_000) -> list[dict]:
    import json
    import subprocess
    import tempfile

    out = []
    with tempfile.TemporaryDirectory() as tmp:
        for features, hidden, dtype, model in configs:
            path = os.path.join(tmp, f"shard{features}.npz")
            if not os.path.exists(path):
                _write_memory_shard(path, vertices, edges, features)
            r = subprocess.run([sys.executable, __file__, "--memory-check-child", path,
                                "--hidden", str(hidden), "--dtype", dtype, "--model", model,
                                "--out", "-"],
                               capture_output=True, text=True, check=True)
            row = json.loads(r.stdout.strip().splitlines()[-1])
            out.append(row)
            print(f"  memory {model} {features}-{hidden} {dtype}: predicted "
                  f"{row['predicted_bytes'] / 2**20:.0f} MiB, measured "
                  f"{row['measured_peak_rss_bytes'] / 2**20:.0f} MiB", file=sys.stderr)
    return out


def _summary(graph_facts, dims, methods, workers, plans, total_s, memory_check, *,
             complete: bool, total_cpu_s: float) -> dict:
    build_rates = [p["build_edges_per_s"] for p in plans if p["build_edges_per_s"]]
    cpu_rates = [p["build_edges_per_cpu_s"] for p in plans if p["build_edges_per_cpu_s"]]
    return {
        "benchmark": "survey",
        "complete": complete,
        "machine": {"python": platform.python_version(), "cpus": os.cpu_count(),
                    "load_average_1min": os.getloadavg()[0]},
        "graph": graph_facts,
        "model": {"dims": dims, "dtype": "float32"},
        "methods": methods, "workers": workers,
        "plans": plans,
        "survey_total_s": total_s,
        "survey_total_cpu_s": total_cpu_s,
        "peak_rss_bytes": max(p["peak_rss_bytes"] for p in plans),
        "memory_check": memory_check,
        "goals": {"survey_total_s": GOAL_TOTAL_S, "met_total": total_s <= GOAL_TOTAL_S,
                  "build_edges_per_s": GOAL_BUILD_EDGES_PER_S,
                  "min_build_edges_per_s": min(build_rates) if build_rates else None,
                  "met_build": bool(build_rates) and min(build_rates) >= GOAL_BUILD_EDGES_PER_S,
                  "met_total_cpu": total_cpu_s <= GOAL_TOTAL_S,
                  "min_build_edges_per_cpu_s": min(cpu_rates) if cpu_rates else None,
                  "met_build_cpu": bool(cpu_rates) and min(cpu_rates) >= GOAL_BUILD_EDGES_PER_S,
                  "note": "build rates count undirected edges (graph.num_edges); wall figures "
                          "depend on the shared machine's load, CPU figures much less"},
    }


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", required=True)
    ap.add_argument("--vertices", type=int, default=1_000_000)
    ap.add_argument("--avg-degree", type=float, default=20.0)
    ap.add_argument("--classes", type=int, default=6)
    ap.add_argument("--features", type=int, default=32)
    ap.add_argument("--workers", default="2,4,8,16")
    ap.add_argument("--methods", default=None, help="default: " + ",".join(DEFAULT_METHODS))
    ap.add_argument("--hidden", type=int, default=16)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--dtype", default="float32", help=argparse.SUPPRESS)
    ap.add_argument("--skip-memory-check", action="store_true")
    ap.add_argument("--memory-only", action="store_true",
                    help="only the memory check (--memory-vertices, --memory-edges)")
    ap.add_argument("--memory-vertices", type=int, default=200_000)
    ap.add_argument("--memory-edges", type=int, default=1_000_000)
    ap.add_argument("--model", default="gcn", help=argparse.SUPPRESS)
    ap.add_argument("--memory-check-child", default=None, help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.memory_check_child:
        _memory_check_child(args.memory_check_child, args.hidden, args.dtype, args.model)
        return 0
    if args.memory_only:
        rows = _memory_check(vertices=args.memory_vertices, edges=args.memory_edges)
        write_json_atomic(args.out, {"memory_check": rows})
        return 0
    workers = [int(x) for x in args.workers.split(",")]
    methods = args.methods.split(",") if args.methods else list(DEFAULT_METHODS)

    from shardtrain.data.synth import parcel_network

    t = time.perf_counter()
    graph = parcel_network(vertices=args.vertices, avg_degree=args.avg_degree,
                           classes=args.classes, features=args.features, seed=args.seed)
    synth_s = time.perf_counter() - t
    print(f"graph: {graph.num_vertices:,} vertices, {graph.num_edges:,} edges "
          f"({synth_s:.1f} s)", file=sys.stderr)
    dims = layer_dims(graph.input_dim, args.hidden, graph.num_classes, 2)
    hops = layer_hops(dims)
    directed = int(graph.indices.shape[0])
    edges = graph.num_edges
    graph_facts = {"vertices": graph.num_vertices, "edges": graph.num_edges,
                   "directed_entries": directed, "input_dim": graph.input_dim,
                   "classes": graph.num_classes, "synth_s": synth_s}

    plans = []
    t_all, cpu_all = time.perf_counter(), time.process_time()
    for method in methods:
        for k in workers:
            _reset_peak_rss()
            load = os.getloadavg()[0]
            t, cpu = time.perf_counter(), time.process_time()
            plan = sv.survey_plan(graph, method, k, hops=hops, itemsize=4, seed=args.seed,
                                  imbalance=0.03)
            total, total_cpu = time.perf_counter() - t, time.process_time() - cpu
            row = {"method": method, "workers": k, "total_s": total, "total_cpu_s": total_cpu,
                   "partition_s": plan["partition_s"], "build_s": plan["build_s"],
                   "partition_cpu_s": plan["partition_cpu_s"], "build_cpu_s": plan["build_cpu_s"],
                   "survey_s": total - plan["partition_s"] - plan["build_s"],
                   "survey_cpu_s": total_cpu - plan["partition_cpu_s"] - plan["build_cpu_s"],
                   "load_average_1min": [load, os.getloadavg()[0]],
                   "build_edges_per_s": edges / plan["build_s"] if plan["build_s"] else None,
                   "build_edges_per_cpu_s": (edges / plan["build_cpu_s"]
                                             if plan["build_cpu_s"] else None),
                   "peak_rss_bytes": _status_kib("VmHWM") * 1024,
                   "edge_cut": plan["edge_cut"],
                   "replication_factor": plan["replication_factor"],
                   "epoch_payload_bytes": plan["epoch_payload_bytes"],
                   "max_memory_bytes": plan["max_memory_bytes"]}
            plans.append(row)
            print(f"  {method:<13} k={k:<3} partition {row['partition_s']:6.2f} s "
                  f"(CPU {row['partition_cpu_s']:6.2f})  build {row['build_s']:5.2f} s "
                  f"(CPU {row['build_cpu_s']:5.2f})  survey {row['survey_s']:5.2f} s  "
                  f"load {load:.1f}  "
                  f"rss {row['peak_rss_bytes'] / 2**30:.2f} GiB", file=sys.stderr)
            del plan
            # partial results survive an interrupted run
            write_json_atomic(args.out, _summary(graph_facts, dims, methods, workers, plans,
                                                 time.perf_counter() - t_all, [],
                                                 complete=False,
                                                 total_cpu_s=time.process_time() - cpu_all))
    total_s = time.perf_counter() - t_all
    total_cpu_s = time.process_time() - cpu_all
    del graph
    memory_check = [] if args.skip_memory_check else _memory_check()
    result = _summary(graph_facts, dims, methods, workers, plans, total_s, memory_check,
                      complete=True, total_cpu_s=total_cpu_s)
    write_json_atomic(args.out, result)
    print(f"survey of {len(plans)} plans: {total_s:.1f} s, CPU {total_cpu_s:.1f} s "
          f"(goal {GOAL_TOTAL_S:.0f} s)",
          file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
