"""Epoch time of partitioned training against the reference and a PyTorch peer, one run.

    python benchmarks/bench_train.py --out benchmarks/results/bench_train.json
        [--vertices 200000 --avg-degree 20 --features 128 --hidden 64 --epochs 10]

Side by side on the same synthesized parcel network (float32, 2 layers, dropout 0.5):
- reference: single process, whole graph (run in a child process, so its peak RSS is its own);
- 1, 2, 4 workers over pipes (metis shards), epoch_s = slowest worker's step;
- peer: a hand-written full-graph GCN in PyTorch sparse on the CPU (same shapes, 2 threads),
  skipped with a note when torch is not installed (it is not a project dependency);
- exchange payload throughput (halo bytes / exchange wall time) against a raw pipe measured
  in the same run; total worker peak RSS against the reference's.
Epoch times are medians over the epochs after the first (warm-up).
"""
from __future__ import annotations

import argparse
import json
import multiprocessing
import os
import statistics
import sys
import tempfile
import time
from pathlib import Path

CLASSES = 6


def _graph(args):
    from shardtrain.synth import parcel_network
    return parcel_network(args.vertices, args.avg_degree, CLASSES, args.features, seed=1)


def _settings(args):
    from shardtrain.settings import TrainSettings
    return TrainSettings(layers=2, hidden=args.hidden, dropout=0.5, epochs=args.epochs,
                         dtype="float32")


def _median_epoch(records) -> float:
    times = [r["epoch_s"] for r in records[1:]] or [records[0]["epoch_s"]]
    return statistics.median(times)


def _reference_child(args, conn) -> None:
    for name in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
        os.environ[name] = "1"
    from threadpoolctl import threadpool_limits
    threadpool_limits(1)
    from shardtrain.reference import train_reference
    graph = _graph(args)
    from shardtrain.worker import peak_rss_bytes
    base = peak_rss_bytes()
    result = train_reference(graph, _settings(args))
    conn.send({"epoch_s": _median_epoch(result.epochs), "loss": result.epochs[-1]["loss"],
               "peak_rss_bytes": peak_rss_bytes(), "rss_after_graph_bytes": base})


def _torch_child(args, conn) -> None:
    try:
        import torch
    except ImportError as exc:
        conn.send({"skipped": f"torch not importable ({exc}); pip install torch to add it"})
        return
    import numpy as np
    from shardtrain.graph import normalized_adjacency
    torch.set_num_threads(2)
    graph = _graph(args)
    a = normalized_adjacency(graph).tocoo()
    a_t = torch.sparse_coo_tensor(  # noqa: the beta-state warnings of torch are expectednp.vstack([a.row, a.col]), a.data.astype(np.float32),
                                  a.shape).coalesce().to_sparse_csr()
    x = torch.from_numpy(np.ascontiguousarray(graph.features, dtype=np.float32))
    y = torch.from_numpy(graph.labels)
    train = torch.from_numpy(graph.train_mask)
    w0 = torch.nn.init.xavier_uniform_(torch.empty(args.features, args.hidden)).requires_grad_()
    w1 = torch.nn.init.xavier_uniform_(torch.empty(args.hidden, CLASSES)).requires_grad_()
    opt = torch.optim.Adam([w0, w1], lr=0.01)
    times = []
    for _ in range(args.epochs):
        start = time.perf_counter()
        opt.zero_grad()
        h = torch.relu(a_t @ (torch.nn.functional.dropout(x, 0.5) @ w0))
        z = a_t @ (torch.nn.functional.dropout(h, 0.5) @ w1)
        loss = torch.nn.functional.cross_entropy(z[train], y[train]) + 5e-4 * 0.5 * (w0 ** 2).sum()
        loss.backward()
        opt.step()
        times.append(time.perf_counter() - start)
    conn.send({"epoch_s": statistics.median(times[1:] or times), "threads": 2,
               "version": torch.__version__})


def _in_child(target, args):
    ctx = multiprocessing.get_context("spawn")
    mine, theirs = ctx.Pipe()
    p = ctx.Process(target=target, args=(args, theirs))
    p.start()
    theirs.close()
    out = mine.recv() if mine.poll(3600) else {"skipped": "no answer"}
    p.join(60)
    return out


def _raw_pipe_gbps(nbytes: int = 256 << 20) -> float:
    """One pipe between two processes, 1 MiB writes of one buffer: bytes per second."""
    import numpy as np
    r, w = os.pipe()
    pid = os.fork()
    if pid == 0:
        os.close(r)
        buf = memoryview(np.zeros(1 << 20, np.uint8))
        sent = 0
        while sent < nbytes:
            sent += os.write(w, buf)
        os._exit(0)
    os.close(w)
    buf = bytearray(1 << 20)
    got, start = 0, time.perf_counter()
    while got < nbytes:
        n = os.readv(r, [buf])
        if n == 0:
            break
        got += n
    seconds = time.perf_counter() - start
    os.waitpid(pid, 0)
    os.close(r)
    return got / seconds


def _partitioned(args, graph, k: int) -> dict:
    from shardtrain.coordinator import train_partitioned
    from shardtrain.partition import partition
    from shardtrain.shards import build_shards, save_shards

    with tempfile.TemporaryDirectory(prefix="bench-train-") as tmp:
        t0 = time.perf_counter()
        assignment = partition(graph, "metis" if k > 1 else "range", k, seed=0)
        shards = build_shards(graph, assignment, k)
        save_shards(Path(tmp) / "s", shards, meta={"method": "metis", "seed": 0})
        halo_rows = sum(s.num_halo for s in shards)
        del shards
        prep = time.perf_counter() - t0
        result = train_partitioned(Path(tmp) / "s", _settings(args), timeout_s=300)
    ex = sum(w["exchange_s"] + w["wait_s"] for w in result.workers)
    active = sum(w["exchange_s"] for w in result.workers)
    halo = result.traffic["halo_payload_bytes"]
    return {"workers": k, "epoch_s": _median_epoch(result.epochs),
            "loss": result.epochs[-1]["loss"], "prepare_s": prep, "halo_rows": halo_rows,
            "measured_payload_bytes": result.traffic["measured_payload_bytes"],
            "predicted_payload_bytes": result.traffic["predicted_payload_bytes"],
            "halo_payload_bytes": halo,
            # bytes each worker moved (sent + received) per second inside exchanges,
            # with and without the time blocked on a peer that was still computing
            "exchange_throughput_bytes_per_s": (2 * halo / ex) if ex > 0 else None,
            "exchange_active_throughput_bytes_per_s": (2 * halo / active) if active > 0 else None,
            "total_peak_rss_bytes": sum(w["peak_rss_bytes"] for w in result.workers),
            "per_worker": result.workers}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", required=True)
    ap.add_argument("--vertices", type=int, default=200_000)
    ap.add_argument("--avg-degree", type=float, default=20)
    ap.add_argument("--features", type=int, default=128)
    ap.add_argument("--hidden", type=int, default=64)
    ap.add_argument("--epochs", type=int, default=10)
    ap.add_argument("--workers", default="1,2,4")
    args = ap.parse_args()

    out = {"settings": vars(args), "cpus": os.cpu_count()}
    out["raw_pipe_bytes_per_s"] = _raw_pipe_gbps()
    out["reference"] = _in_child(_reference_child, args)
    print("reference", out["reference"], file=sys.stderr)
    graph = _graph(args)
    out["graph"] = {"vertices": graph.num_vertices, "edges": graph.num_edges}
    runs = []
    for k in [int(v) for v in args.workers.split(",")]:
        runs.append(_partitioned(args, graph, k))
        print(f"{k} workers: {runs[-1]['epoch_s']:.3f} s/epoch", file=sys.stderr)
    out["partitioned"] = runs
    del graph
    out["torch_peer"] = _in_child(_torch_child, args)
    by_k = {r["workers"]: r for r in runs}
    ratios = {}
    if 1 in by_k and 2 in by_k:
        ratios["speedup_2_over_1"] = by_k[1]["epoch_s"] / by_k[2]["epoch_s"]
    if 2 in by_k and "epoch_s" in out["torch_peer"]:
        ratios["torch_over_2_workers"] = out["torch_peer"]["epoch_s"] / by_k[2]["epoch_s"]
    if "epoch_s" in out["reference"]:
        ratios["reference_over_1_worker"] = out["reference"]["epoch_s"] / by_k[1]["epoch_s"] \
            if 1 in by_k else None
        ratios["memory_total_over_reference"] = {
            k: r["total_peak_rss_bytes"] / out["reference"]["peak_rss_bytes"]
            for k, r in by_k.items()}
    ratios["exchange_over_raw_pipe"] = {
        k: (r["exchange_throughput_bytes_per_s"] or 0) / out["raw_pipe_bytes_per_s"]
        for k, r in by_k.items() if k > 1}
    ratios["exchange_active_over_raw_pipe"] = {
        k: (r["exchange_active_throughput_bytes_per_s"] or 0) / out["raw_pipe_bytes_per_s"]
        for k, r in by_k.items() if k > 1}
    out["ratios"] = ratios
    Path(args.out).parent.mkdir(parents=True, exist_ok=True)
    Path(args.out).write_text(json.dumps(out, indent=1) + "\n")
    print(json.dumps(ratios, indent=1))


if __name__ == "__main__":
    main()
