"""Epoch time of each model of the message-passing family: 1 and 2 workers against a
PyTorch peer, one run.

    python benchmarks/bench_models.py --out benchmarks/results/bench_models.json
        [--vertices 200000 --avg-degree 10 --features 64 --hidden 16 --gat-hidden 8
         --heads 8 --epochs 4 --models gcn,sage,gin,gat]

On one synthesized parcel network (float32, 2 layers, dropout 0.5), per model (gcn, sage,
gin, gat; GAT's width per head `--gat-hidden`, the paper's 8 x 8 heads by default):
- 1 worker and 2 workers over pipes (metis shards, built once and shared by the models),
  epoch_s = the slowest worker's training step, median over the epochs after the first;
- peer: the same model hand-written in PyTorch sparse on the CPU, full graph, same sizes,
  one thread (torch.set_num_threads(1), as each worker runs BLAS on one thread), training
  step only (forward, backward, Adam) like epoch_s; skipped with a note when torch is not
  installed (it is not a project dependency). Its definitions are the issue's:
  GCN Z = Â H W; SAGE-mean Z = H W_self + (D⁻¹A H) W_neigh; GIN-0 Z = ReLU((A + I) H W_a)
  W_b; GAT per head e_vu = LeakyReLU_0.2(att_src·T[u] + att_dst·T[v]) over u in N(v) ∪ {v},
  softmax per v (max subtracted), dropout on α, Σ_u α_vu T[u], heads concatenated + ELU,
  one head on the output layer (scores on edges, segment max/sum by scatter_reduce /
  index_add_, the aggregation by index_add_ of α-scaled gathered rows).
Goals (issue 13): each model's 2-worker epoch >= 1.7x faster than its 1-worker epoch on 2
cores, and no slower than the peer. On a shared machine the wall figures measure the
neighbours too, so beside every figure sit the 1-minute load average before and after,
the CPU seconds the run itself used, and the other processes' busy CPU over the run
(machine busy CPU from /proc/stat minus this process, its waited-for children and the
workers' own profiled CPU, in cores; the workers' shard loading counts as "others").
"""
from __future__ import annotations

import argparse
import os
import statistics
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_train import _in_child, _median_epoch  # noqa: E402  (the helpers of bench_train)

CLASSES = 6
MODELS = ("gcn", "sage", "gin", "gat")


def _busy_cpu_s() -> float:
    """CPU seconds the whole machine spent busy since boot (/proc/stat, all cores)."""
    with open("/proc/stat") as f:
        fields = [int(v) for v in f.readline().split()[1:]]
    idle = fields[3] + (fields[4] if len(fields) > 4 else 0)      # idle + iowait
    return (sum(fields[:8]) - idle) / os.sysconf("SC_CLK_TCK")


def _own_cpu_s() -> float:
    t = os.times()
    return t.user + t.system + t.children_user + t.children_system


class _Load:
    """The machine's load over one measured run (see the module docstring)."""

    workers_cpu_s = 0.0      # CPU of processes that are not our waited-for children

    def __enter__(self):
        self.load, self.busy, self.own = os.getloadavg()[0], _busy_cpu_s(), _own_cpu_s()
        self.start = time.perf_counter()
        return self

    def __exit__(self, *exc):
        wall = time.perf_counter() - self.start
        own = _own_cpu_s() - self.own + self.workers_cpu_s
        others = max(0.0, _busy_cpu_s() - self.busy - own)
        self.figures = {"load_before": self.load, "load_after": os.getloadavg()[0],
                        "wall_s": wall, "own_cpu_s": own, "others_cpu_s": others,
                        "others_busy_cores": others / wall if wall > 0 else 0.0}


def _settings(args, kind: str):
    from shardtrain.train.settings import TrainSettings
    return TrainSettings(layers=2, hidden=args.gat_hidden if kind == "gat" else args.hidden,
                         dropout=0.5, epochs=args.epochs, dtype="float32", model=kind,
                         heads=args.heads)


def _graph(args):
    from shardtrain.data.synth import parcel_network
    return parcel_network(args.vertices, args.avg_degree, CLASSES, args.features, seed=1)


def _torch_peer(args, conn) -> None:
    """One model (args.peer_model) in PyTorch, in a child process (see the docstring)."""
    try:
        import torch
    except ImportError as exc:
        conn.send({"skipped": f"torch not importable ({exc}); pip install torch to add it"})
        return
    import numpy as np

    from shardtrain.data.graph import normalized_adjacency
    from shardtrain.train.models.common import operator_matrix
    torch.set_num_threads(1)
    kind, graph = args.peer_model, _graph(args)
    a_hat = normalized_adjacency(graph)

    def sparse(m):
        m = m.tocsr()
        # (torch warns that sparse CSR is in beta: expected)
        return torch.sparse_csr_tensor(torch.from_numpy(m.indptr.astype(np.int64)),
                                       torch.from_numpy(m.indices.astype(np.int64)),
                                       torch.from_numpy(m.data.astype(np.float32)), m.shape)

    n, f, c, hid, heads = graph.num_vertices, args.features, CLASSES, args.hidden, args.heads
    glorot = lambda *shape: torch.nn.init.xavier_uniform_(  # noqa: E731
        torch.empty(*shape)).requires_grad_()
    drop = torch.nn.functional.dropout
    if kind == "gat":
        hid = args.gat_hidden
        coo = a_hat.tocoo()
        dst, src = torch.from_numpy(coo.row.astype(np.int64)), torch.from_numpy(
            coo.col.astype(np.int64))
        shapes = [(f, heads, hid), (heads * hid, 1, c)]
        params = []
        for d_in, k, d_out in shapes:
            params += [glorot(d_in, k * d_out), glorot(k, d_out), glorot(k, d_out)]

        def layer(h, w, att_src, att_dst, k, d_out):
            t = (drop(h, 0.5) @ w).view(n, k, d_out)
            s_src, s_dst = (t * att_src).sum(-1), (t * att_dst).sum(-1)
            e = torch.nn.functional.leaky_relu(s_src[src] + s_dst[dst], 0.2)
            top = torch.full((n, k), -torch.inf).scatter_reduce(
                0, dst[:, None].expand(-1, k), e, "amax", include_self=True)
            ex = torch.exp(e - top[dst])
            alpha = ex / torch.zeros(n, k).index_add_(0, dst, ex)[dst]
            alpha = drop(alpha, 0.5)
            return torch.zeros(n, k, d_out).index_add_(
                0, dst, alpha[:, :, None] * t[src]).reshape(n, k * d_out)

        def forward(x):
            h = torch.nn.functional.elu(layer(x, *params[:3], heads, hid))
            return layer(h, *params[3:], 1, c), [params[0]]
    elif kind == "gin":
        op = sparse(operator_matrix("gin", a_hat))
        params = [glorot(f, hid), glorot(hid, hid), glorot(hid, hid), glorot(hid, c)]

        def forward(x):
            h = torch.relu(torch.relu((op @ drop(x, 0.5)) @ params[0]) @ params[1])
            return torch.relu(op @ (drop(h, 0.5) @ params[2])) @ params[3], params[:2]
    elif kind == "sage":
        op = sparse(operator_matrix("sage", a_hat))
        params = [glorot(f, hid), glorot(f, hid), glorot(hid, c), glorot(hid, c)]

        def forward(x):
            xd = drop(x, 0.5)
            h = torch.relu(xd @ params[0] + op @ (xd @ params[1]))
            hd = drop(h, 0.5)
            return hd @ params[2] + op @ (hd @ params[3]), params[:2]
    else:
        op = sparse(a_hat)
        params = [glorot(f, hid), glorot(hid, c)]

        def forward(x):
            h = torch.relu(op @ (drop(x, 0.5) @ params[0]))
            return op @ (drop(h, 0.5) @ params[1]), params[:1]
    x = torch.from_numpy(np.ascontiguousarray(graph.features, dtype=np.float32))
    y = torch.from_numpy(graph.labels)
    train = torch.from_numpy(graph.train_mask)
    opt = torch.optim.Adam(params, lr=0.01)
    times, cpu = [], []
    for _ in range(args.epochs):
        start, c0 = time.perf_counter(), time.process_time()
        opt.zero_grad()
        z, decayed = forward(x)
        loss = torch.nn.functional.cross_entropy(z[train], y[train]) \
            + 5e-4 * 0.5 * sum((w ** 2).sum() for w in decayed)
        loss.backward()
        opt.step()
        times.append(time.perf_counter() - start)
        cpu.append(time.process_time() - c0)
    conn.send({"epoch_s": statistics.median(times[1:] or times), "threads": 1,
               "epoch_s_all": times, "cpu_s_per_epoch": statistics.median(cpu[1:] or cpu),
               "note": "training step only (no evaluation forward)",
               "version": torch.__version__})


def _ours(shard_dir, settings, epochs: int) -> dict:
    from shardtrain.train.coordinator import train_partitioned
    with _Load() as load:
        result = train_partitioned(shard_dir, settings, timeout_s=1800)
        # the workers are not this process's children (os.times misses them): their own
        # profiled CPU (every phase but loading the shard) stands for it
        load.workers_cpu_s = sum(w["cpu_s"] for w in result.workers)
    cpu = [w["cpu_s"] / epochs for w in result.workers]
    return {"epoch_s": _median_epoch(result.epochs),
            "epoch_s_all": [e["epoch_s"] for e in result.epochs],
            "cpu_s_per_epoch_sum": sum(cpu),
            "peak_rss_bytes_max": max(w["peak_rss_bytes"] for w in result.workers),
            "payload_bytes": result.traffic["measured_payload_bytes"],
            "payload_equals_prediction": result.traffic["measured_payload_bytes"]
            == result.traffic["predicted_payload_bytes"], **load.figures}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", required=True)
    ap.add_argument("--vertices", type=int, default=200_000)
    ap.add_argument("--avg-degree", type=float, default=10.0)
    ap.add_argument("--features", type=int, default=64)
    ap.add_argument("--hidden", type=int, default=16)
    ap.add_argument("--gat-hidden", type=int, default=8)
    ap.add_argument("--heads", type=int, default=8)
    ap.add_argument("--epochs", type=int, default=4)
    ap.add_argument("--models", default=",".join(MODELS))
    args = ap.parse_args(argv)

    from shardtrain.files import write_json_atomic
    from shardtrain.plan.partition import partition
    from shardtrain.plan.shards import build_shards, save_shards

    graph = _graph(args)
    out: dict = {"vertices": graph.num_vertices, "edges": graph.num_edges,
                 "features": args.features, "hidden": args.hidden,
                 "gat_hidden": args.gat_hidden, "heads": args.heads, "epochs": args.epochs,
                 "cpus": os.cpu_count(), "models": {}}
    with tempfile.TemporaryDirectory() as tmp:
        dirs = {}
        for k in (1, 2):
            a = partition(graph, "metis", k, seed=0) if k > 1 else \
                [0] * graph.num_vertices
            dirs[k] = Path(tmp) / f"s{k}"
            save_shards(dirs[k], build_shards(graph, a, k),
                        meta={"method": "metis", "seed": 0, "num_classes": CLASSES,
                              "input_dim": args.features})
        del graph
        for kind in args.models.split(","):
            row: dict = {}
            for k in (1, 2):
                row[f"{k}_workers"] = _ours(dirs[k], _settings(args, kind), args.epochs)
                print(f"{kind} {k} workers: {row[f'{k}_workers']['epoch_s']:.3f} s/epoch",
                      file=sys.stderr)
            with _Load() as load:
                peer = _in_child(_torch_peer, argparse.Namespace(**vars(args),
                                                                 peer_model=kind))
            row["torch_peer"] = dict(peer, **load.figures)
            print(f"{kind} torch peer: {peer.get('epoch_s', peer)}", file=sys.stderr)
            row["speedup_2_over_1"] = row["1_workers"]["epoch_s"] / row["2_workers"]["epoch_s"]
            row["goal_1_7x_met"] = row["speedup_2_over_1"] >= 1.7
            if "epoch_s" in peer:
                row["peer_over_2_workers"] = peer["epoch_s"] / row["2_workers"]["epoch_s"]
                row["goal_no_slower_than_peer_met"] = row["peer_over_2_workers"] >= 1.0
            out["models"][kind] = row
    write_json_atomic(args.out, out)
    for kind, row in out["models"].items():
        peer = row["torch_peer"].get("epoch_s")
        print(f"{kind}: 1 worker {row['1_workers']['epoch_s']:.3f} s, 2 workers "
              f"{row['2_workers']['epoch_s']:.3f} s, x{row['speedup_2_over_1']:.2f}, "
              f"torch {peer if peer is None else round(peer, 3)} s")
    return 0


if __name__ == "__main__":
    sys.exit(main())
