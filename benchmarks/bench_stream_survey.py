"""Benchmark: the streaming survey of a graph directory against the in-memory survey.

A parcel network of about `--edges` undirected routes (default 10 M; `data.synth.
parcel_network`, mean degree 20) is written once as a graph directory (`write_graph_dir`)
and once as a graph `.npz`. Each method (default random, range, fennel) is surveyed at
`--workers` (default 16,64,256) by `shardtrain survey` in a fresh process: on the graph
directory under `--memory-budget` (default 1G), and on the file (the in-memory survey).
Per plan: partition and count/build seconds, seconds per edge; per run: wall seconds and
the peak, sampled by this process every 20 ms, of the child's RssAnon + RssShmem (mapped
file pages, RssFile, reported beside, not counted). The graph-dir run also reports the
peak it measured itself. The machine is shared: the 1-minute load average is recorded.

`--metis-memory` instead measures METIS's peak over the loaded graph (the factor behind
`streaming.METIS_BYTES_PER_ENTRY`) on small parcel networks, one fresh process per case.

    python benchmarks/bench_stream_survey.py --out benchmarks/results/bench_stream_survey.json
"""
from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")

from shardtrain.files import write_json_atomic  # noqa: E402
from shardtrain.plan.memwatch import rss_now  # noqa: E402


def _run_watched(cmd: list[str]) -> dict:
    """Run cmd; its wall seconds and peak anon+shmem / file RSS sampled every 20 ms."""
    start = time.perf_counter()
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    peak = {"anon_shmem": 0, "file": 0}

    def watch() -> None:
        while proc.poll() is None:
            now = rss_now(str(proc.pid))
            for key in peak:
                peak[key] = max(peak[key], now[key])
            time.sleep(0.02)

    t = threading.Thread(target=watch, daemon=True)
    t.start()
    out, err = proc.communicate()
    t.join()
    if proc.returncode != 0:
        raise SystemExit(f"{' '.join(cmd)} failed:\n{err}")
    return {"wall_s": time.perf_counter() - start, "peak_rss_bytes": peak["anon_shmem"],
            "peak_file_rss_bytes": peak["file"]}


def _make_graphs(folder: Path, edges: int, seed: int) -> dict:
    import numpy as np

    from shardtrain.data.graphdir import write_graph_dir
    from shardtrain.data.synth import parcel_network

    t = time.perf_counter()
    g = parcel_network(max(edges // 10, 100), 20.0, 8, 16, seed)
    write_graph_dir(g, folder / "parcels.graph")
    rows = np.repeat(np.arange(g.num_vertices), g.degrees)
    keep = rows < g.indices
    np.savez(folder / "parcels.npz", edges=np.stack([rows[keep], g.indices[keep]], axis=1),
             num_vertices=np.int64(g.num_vertices), features=g.features, labels=g.labels)
    return {"vertices": g.num_vertices, "edges": g.num_edges,
            "make_s": time.perf_counter() - t}


def _survey(graph: Path, method: str, workers: str, out: Path, extra=()) -> dict:
    cmd = [sys.executable, "-m", "shardtrain", "survey", str(graph), "--method", method,
           "--workers", workers, "--json", str(out), *extra]
    run = _run_watched(cmd)
    doc = json.loads(out.read_text())
    run["plans"] = [{"workers": p["workers"], "partition_s": p["partition_s"],
                     "count_or_build_s": p["build_s"], "edge_cut": p["edge_cut"],
                     "pass_s": p.get("pass_s")} for p in doc["plans"]]
    if "streaming" in doc:
        run["self_measured"] = doc["streaming"]
    return run


def bench(args) -> dict:
    with tempfile.TemporaryDirectory(dir=args.tmp) as tmp:
        folder = Path(tmp)
        facts = _make_graphs(folder, args.edges, args.seed)
        m = facts["edges"]
        rows = []
        for method in args.methods.split(","):
            stream = _survey(folder / "parcels.graph", method, args.workers,
                             folder / "s.json", ("--memory-budget", args.memory_budget))
            memory = _survey(folder / "parcels.npz", method, args.workers, folder / "m.json")
            for s, i in zip(stream["plans"], memory["plans"]):
                assert s["edge_cut"] == i["edge_cut"]       # the same plan, both ways
                row = {"method": method, "workers": s["workers"], "edge_cut": s["edge_cut"]}
                for name, p in (("stream", s), ("memory", i)):
                    total = p["partition_s"] + p["count_or_build_s"]
                    row[f"{name}_partition_s"] = p["partition_s"]
                    row[f"{name}_count_or_build_s"] = p["count_or_build_s"]
                    row[f"{name}_s_per_edge"] = total / m
                rows.append(row)
            for name, run in (("stream", stream), ("memory", memory)):
                rows.append({"method": method, "run": name, "wall_s": run["wall_s"],
                             "peak_rss_bytes": run["peak_rss_bytes"],
                             "peak_file_rss_bytes": run["peak_file_rss_bytes"],
                             "peak_rss_bytes_per_edge": run["peak_rss_bytes"] / m,
                             **({"self_measured": run["self_measured"]}
                                if "self_measured" in run else {})})
            print(json.dumps(rows[-2:]), flush=True)
    return {"benchmark": "bench_stream_survey", "graph": facts,
            "memory_budget": args.memory_budget, "workers": args.workers,
            "load_average_1min": os.getloadavg()[0], "rows": rows}


_METIS_CHILD = r"""
import json, sys
from shardtrain.data.graphdir import open_graph_dir
from shardtrain.plan.memwatch import MemoryWatch, rss_now
from shardtrain.plan.partition import partition_plan
import pymetis  # noqa: F401  (imported before the baseline)
gd = open_graph_dir(sys.argv[1]); k = int(sys.argv[2])
base = rss_now()["anon_shmem"]
with MemoryWatch(0.005) as w:
    g = gd.graph(load=True)
    partition_plan(g, "metis", k)
n, e = gd.num_vertices, 2 * gd.num_edges
extra = w.peak - base - 8 * (n + 1) - 8 * e        # over the loaded graph
print(json.dumps({"vertices": n, "entries": e, "workers": k, "over_loaded_bytes": extra,
                  "bytes_per_entry": extra / e}))
"""


def metis_memory(args) -> dict:
    from shardtrain.data.graphdir import write_graph_dir
    from shardtrain.data.synth import parcel_network
    from shardtrain.plan.streaming import metis_memory_bytes

    cases = [(50_000, 10, (4, 64)), (200_000, 10, (16,)), (100_000, 30, (16, 256)),
             (400_000, 8, (4, 64))]
    rows = []
    with tempfile.TemporaryDirectory(dir=args.tmp) as tmp:
        for i, (n, deg, ks) in enumerate(cases):
            path = Path(tmp) / f"g{i}"
            write_graph_dir(parcel_network(n, deg, 4, 1, 1), path)
            for k in ks:
                r = subprocess.run([sys.executable, "-c", _METIS_CHILD, str(path), str(k)],
                                   capture_output=True, text=True, check=True)
                row = json.loads(r.stdout.strip().splitlines()[-1])
                row["estimate_bytes"] = metis_memory_bytes(row["vertices"], row["entries"] // 2)
                rows.append(row)
                print(json.dumps(row), flush=True)
    return {"benchmark": "bench_stream_survey --metis-memory", "rows": rows}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--edges", type=int, default=10_000_000)
    ap.add_argument("--methods", default="random,range,fennel")
    ap.add_argument("--workers", default="16,64,256")
    ap.add_argument("--memory-budget", default="1G")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--tmp", default=None, help="folder for the graph files (default: $TMPDIR)")
    ap.add_argument("--metis-memory", action="store_true",
                    help="measure METIS's peak over the loaded graph instead")
    ap.add_argument("--out", default=None, metavar="OUT.json")
    args = ap.parse_args(argv)
    result = metis_memory(args) if args.metis_memory else bench(args)
    if args.out:
        Path(args.out).parent.mkdir(parents=True, exist_ok=True)
        write_json_atomic(args.out, result)
    else:
        print(json.dumps(result, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main())
