"""Benchmark: graphs larger than memory, through the CLI (issue 11's goals).

For each scale (undirected edges; 111 M vertices and 1.6 B edges at the largest, the size of
the largest public node-classification benchmark, from memory) it runs, each as its own
`python -m shardtrain` process:
  1. `synth --out DIR` (the streamed parcel network, written through ingest's external sort);
  2. the edges of that graph, once each, written as an (m, 2) int32 `.npy` source, then
     `ingest SOURCE.npy --out DIR2` (the ingest goal: seconds and memory of ingest alone);
  3. `survey DIR2 --method random,range,fennel --workers 16,64,256`.
Memory is the peak, over the process tree, of RssAnon + RssShmem from /proc/PID/status, polled
every 0.1 s (pages of memory-mapped files are page cache and can be dropped: RssFile is
reported beside, not counted). The JSON holds per step: wall and CPU seconds, seconds per
edge, peak memory, the graph directory's size on disk; a table of seconds per edge across the
scales (goal: within 1.5x of each other) and, with --plot, a log-log PNG.

Goals (issue 11): at 1.6 B edges ingest <= 30 min, survey <= 30 min, peak <= 8 GiB, graph dir
<= 16 GB; at 100 M edges ingest and survey peak <= 2 GiB with --memory-budget 1G.

    python benchmarks/bench_scale.py --scales 10M,100M --out benchmarks/results/bench_scale.json
    python benchmarks/bench_scale.py --scales 1.6B --work /big/disk --out ...   (about an hour)
"""
from __future__ import annotations

import argparse
import os
import platform
import shutil
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np

VERTICES_PER_EDGE = 111e6 / 1.6e9      # the shape of the 1.6 B-edge target graph
GIB = 1 << 30


def _parse_count(text: str) -> int:
    mult = {"K": 1e3, "M": 1e6, "B": 1e9, "G": 1e9}
    t = text.strip().upper()
    return int(float(t[:-1]) * mult[t[-1]]) if t[-1] in mult else int(float(t))


def _tree(pid: int) -> list[int]:
    """pid and all its descendants (from /proc/*/stat parent ids)."""
    children: dict[int, list[int]] = {}
    for entry in os.listdir("/proc"):
        if entry.isdigit():
            try:
                with open(f"/proc/{entry}/stat") as fh:
                    ppid = int(fh.read().rsplit(")", 1)[1].split()[1])
            except (OSError, IndexError, ValueError):
                continue
            children.setdefault(ppid, []).append(int(entry))
    out, todo = [], [pid]
    while todo:
        p = todo.pop()
        out.append(p)
        todo += children.get(p, [])
    return out


def _status(pid: int) -> dict[str, int]:
    fields = {}
    try:
        with open(f"/proc/{pid}/status") as fh:
            for line in fh:
                key, _, rest = line.partition(":")
                if key in ("RssAnon", "RssShmem", "RssFile"):
                    fields[key] = int(rest.split()[0]) * 1024
    except OSError:
        pass
    return fields


def run_measured(cmd: list[str], env: dict) -> dict:
    """Run a command; wall/CPU seconds and peak tree memory (anon + shmem; file beside)."""
    start, cpu0 = time.perf_counter(), os.times()
    proc = subprocess.Popen(cmd, env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT,
                            text=True)
    peak = {"counted": 0, "file": 0}
    done = threading.Event()

    def poll() -> None:
        while not done.is_set():
            anon = file = 0
            for p in _tree(proc.pid):
                s = _status(p)
                anon += s.get("RssAnon", 0) + s.get("RssShmem", 0)
                file += s.get("RssFile", 0)
            peak["counted"] = max(peak["counted"], anon)
            peak["file"] = max(peak["file"], file)
            done.wait(0.1)

    t = threading.Thread(target=poll, daemon=True)
    t.start()
    out, _ = proc.communicate()
    done.set()
    t.join()
    cpu1 = os.times()
    return {"command": " ".join(cmd[2:]), "exit": proc.returncode,
            "wall_s": time.perf_counter() - start,
            "cpu_s": (cpu1.children_user - cpu0.children_user
                      + cpu1.children_system - cpu0.children_system),
            "peak_bytes": peak["counted"], "peak_file_pages_bytes": peak["file"],
            "output_tail": out.strip().splitlines()[-6:],
            "load_avg_1m": os.getloadavg()[0]}


def dir_bytes(path: Path) -> int:
    return sum(p.stat().st_size for p in path.rglob("*") if p.is_file())


def write_edge_source(graph_dir: Path, out: Path, chunk_rows: int = 1 << 22) -> int:
    """Each undirected edge of GRAPH_DIR once (u < v) as an (m, 2) int32 .npy, by row chunks."""
    sys.path.insert(0, str(Path(__file__).resolve().parent.parent))
    from shardtrain.data.graphdir import open_graph_dir

    g = open_graph_dir(graph_dir)
    m, n = g.num_edges, g.num_vertices
    dtype = np.int32 if n < 2**31 else np.int64
    arr = np.lib.format.open_memmap(out, mode="w+", dtype=dtype, shape=(m, 2))
    at = 0
    for lo in range(0, n, chunk_rows):
        hi = min(lo + chunk_rows, n)
        a, b = int(g.indptr[lo]), int(g.indptr[hi])
        cols = np.asarray(g.indices[a:b], dtype=np.int64)
        rows = np.repeat(np.arange(lo, hi, dtype=np.int64), np.diff(g.indptr[lo:hi + 1]))
        up = rows < cols
        k = int(np.count_nonzero(up))
        arr[at:at + k, 0] = rows[up]
        arr[at:at + k, 1] = cols[up]
        at += k
    assert at == m
    arr.flush()
    del arr
    return m


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--scales", default="10M,100M", help="undirected edges per run, e.g. 10M,1.6B")
    ap.add_argument("--avg-degree", type=float, default=2 / VERTICES_PER_EDGE,
                    help="mean degree (default that of 111 M vertices / 1.6 B edges, ~28.8)")
    ap.add_argument("--features", type=int, default=1)
    ap.add_argument("--memory-budget", default="1G")
    ap.add_argument("--workers", default="16,64,256")
    ap.add_argument("--methods", default="random,range,fennel")
    ap.add_argument("--work", type=Path, default=Path("/tmp/shardtrain-bench-scale"))
    ap.add_argument("--keep", action="store_true", help="keep the graph directories")
    ap.add_argument("--plot", type=Path, help="log-log PNG of seconds per edge")
    ap.add_argument("--out", type=Path, required=True)
    args = ap.parse_args()
    env = dict(os.environ, OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1")
    py = [sys.executable, "-m", "shardtrain"]
    args.work.mkdir(parents=True, exist_ok=True)
    doc: dict = {"benchmark": "bench_scale", "python": platform.python_version(),
                 "cpus": os.cpu_count(), "memory_budget": args.memory_budget, "runs": []}
    for scale in args.scales.split(","):
        edges = _parse_count(scale)
        vertices = int(round(2 * edges / args.avg_degree))
        here = args.work / scale
        shutil.rmtree(here, ignore_errors=True)
        here.mkdir(parents=True)
        run: dict = {"scale": scale, "target_edges": edges, "vertices": vertices}
        synth_dir, src, ingest_dir = here / "synth", here / "edges.npy", here / "graph"
        run["synth"] = run_measured(py + ["synth", "--out", str(synth_dir), "--vertices",
                                          str(vertices), "--avg-degree", f"{args.avg_degree:g}",
                                          "--features", str(args.features), "--seed", "0",
                                          "--memory-budget", args.memory_budget], env)
        if run["synth"]["exit"] != 0:
            doc["runs"].append(run)
            break
        t0 = time.perf_counter()
        m = write_edge_source(synth_dir, src)
        run["edges"] = m
        run["write_source_s"] = time.perf_counter() - t0
        if not args.keep:
            shutil.rmtree(synth_dir)
        run["ingest"] = run_measured(py + ["ingest", str(src), "--out", str(ingest_dir),
                                           "--memory-budget", args.memory_budget], env)
        src.unlink()
        run["graph_dir_bytes"] = dir_bytes(ingest_dir)
        # the edge source carries no vertex data: the model's shape is given
        run["survey"] = run_measured(py + ["survey", str(ingest_dir), "--method", args.methods,
                                           "--workers", args.workers, "--memory-budget",
                                           args.memory_budget, "--input-dim",
                                           str(args.features), "--classes", "6", "--json",
                                           str(here / "survey.json")], env)
        for step in ("synth", "ingest", "survey"):
            run[step]["seconds_per_edge"] = run[step]["wall_s"] / max(m, 1)
        doc["runs"].append(run)
        if not args.keep:
            shutil.rmtree(ingest_dir)
    per_edge = {step: [r[step]["seconds_per_edge"] for r in doc["runs"] if step in r]
                for step in ("ingest", "survey")}
    doc["seconds_per_edge_spread"] = {s: (max(v) / min(v) if v else None)
                                      for s, v in per_edge.items()}
    doc["goal_linear_within_1_5x"] = all(x is not None and x <= 1.5
                                         for x in doc["seconds_per_edge_spread"].values())
    big = [r for r in doc["runs"] if r.get("edges", 0) >= 1.5e9]
    if big:
        r = big[0]
        doc["goal_billion"] = {
            "ingest_le_30_min": r["ingest"]["wall_s"] <= 1800,
            "survey_le_30_min": r["survey"]["wall_s"] <= 1800,
            "peak_le_8_gib": max(r[s]["peak_bytes"] for s in ("synth", "ingest", "survey"))
            <= 8 * GIB,
            "graph_dir_le_16_gb": r["graph_dir_bytes"] <= 16e9}
    mid = [r for r in doc["runs"] if 0.9e8 <= r.get("edges", 0) < 1.5e9]
    if mid and args.memory_budget.upper() in ("1G", "1GIB"):
        doc["goal_100m_peak_le_2_gib"] = all(r[s]["peak_bytes"] <= 2 * GIB
                                             for r in mid for s in ("ingest", "survey"))
    if args.plot and doc["runs"]:
        import matplotlib
        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
        fig, ax = plt.subplots(figsize=(5, 3.5))
        for step in ("synth", "ingest", "survey"):
            xs = [r["edges"] for r in doc["runs"] if step in r and "edges" in r]
            ys = [r[step]["seconds_per_edge"] for r in doc["runs"] if step in r and "edges" in r]
            ax.loglog(xs, ys, marker="o", label=step)
        ax.set_xlabel("undirected edges")
        ax.set_ylabel("seconds per edge")
        ax.legend()
        fig.tight_layout()
        fig.savefig(args.plot, dpi=120)
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text(__import__("json").dumps(doc, indent=1))
    print(__import__("json").dumps({k: v for k, v in doc.items() if k != "runs"}, indent=1))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
