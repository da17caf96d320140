"""`shardtrain ingest` at 1 M and 10 M edge rows (and 100 M with --huge) under
`--memory-budget 1G`: seconds per edge row and peak memory of the whole process tree.

    python benchmarks/bench_ingest.py --out benchmarks/results/bench_ingest.json [--huge]

The edges are a skewed random parcel network (route ends drawn with power-law depot weights,
5 % loops and repeated routes, so the cleanup has work), written as a raw m x 2 .npy array
and as Parquet (row groups of 1 M rows). Each ingest runs as `python -m shardtrain ingest`
in its own process; a sampler reads /proc/PID/status of it and of every descendant (the
watcher process included) every 20 ms. Memory is the peak over time of the tree's
RssAnon + RssShmem (issue 11's rule); the page-cache pages of mapped files (RssFile) are
reported beside it but not counted.
"""
from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np


def _status(pid: int) -> dict:
    out = {}
    try:
        with open(f"/proc/{pid}/status") as fh:
            for line in fh:
                key, _, value = line.partition(":")
                if key in ("RssAnon", "RssShmem", "RssFile"):
                    out[key] = int(value.split()[0]) * 1024
    except OSError:
        pass
    return out


def _tree(pid: int) -> list[int]:
    pids, todo = [], [pid]
    while todo:
        p = todo.pop()
        pids.append(p)
        try:
            with open(f"/proc/{p}/task/{p}/children") as fh:
                todo += [int(c) for c in fh.read().split()]
        except OSError:
            pass
    return pids


def run_sampled(cmd: list[str]) -> dict:
    """Run `cmd`; its wall time and the peaks of the tree's counted and mapped memory."""
    start = time.perf_counter()
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    peak = {"counted": 0, "file": 0}
    done = threading.Event()

    def sample():
        while not done.is_set():
            stats = [_status(p) for p in _tree(proc.pid)]
            counted = sum(s.get("RssAnon", 0) + s.get("RssShmem", 0) for s in stats)
            peak["counted"] = max(peak["counted"], counted)
            peak["file"] = max(peak["file"], sum(s.get("RssFile", 0) for s in stats))
            done.wait(0.02)

    t = threading.Thread(target=sample)
    t.start()
    out, err = proc.communicate()
    done.set()
    t.join()
    seconds = time.perf_counter() - start
    if proc.returncode != 0:
        raise SystemExit(f"{' '.join(cmd)} failed:\n{err}")
    return {"seconds": seconds, "peak_rss_anon_shmem_bytes": peak["counted"],
            "peak_rss_file_bytes": peak["file"], "stdout": out.strip()}


def write_edges(work: Path, rows: int, seed: int) -> tuple[Path, Path, int]:
    """A skewed random edge set as .npy (written through a map, in chunks) and Parquet."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    n = max(1000, rows // 10)
    rng = np.random.default_rng(seed)
    weight = rng.pareto(1.5, n) + 1.0
    cum = np.cumsum(weight / weight.sum())
    npy = work / f"edges-{rows}.npy"
    pq_path = work / f"edges-{rows}.parquet"
    arr = np.lib.format.open_memmap(npy, mode="w+", dtype=np.int64, shape=(rows, 2))
    writer = None
    step = 1 << 20
    for s in range(0, rows, step):          # loop over chunks of rows
        k = min(step, rows - s)
        src = np.minimum(np.searchsorted(cum, rng.random(k)), n - 1)
        dst = rng.integers(0, n, k)
        loops = rng.random(k) < 0.02
        dst[loops] = src[loops]
        again = rng.random(k) < 0.03
        src[again], dst[again] = dst[np.flatnonzero(again) - 1], src[np.flatnonzero(again) - 1]
        arr[s:s + k, 0], arr[s:s + k, 1] = src, dst
        table = pa.table({"src": src, "dst": dst})
        if writer is None:
            writer = pq.ParquetWriter(pq_path, table.schema)
        writer.write_table(table, row_group_size=step)
    arr.flush()
    del arr
    assert writer is not None
    writer.close()
    return npy, pq_path, n


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", default="benchmarks/results/bench_ingest.json")
    ap.add_argument("--huge", action="store_true", help="also 100 M edge rows")
    ap.add_argument("--sizes", default=None, help="comma-separated edge rows (overrides)")
    ap.add_argument("--budget", default="1G")
    ap.add_argument("--formats", default="npy,parquet")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--work", default=None, help="scratch folder (default: a temporary one)")
    args = ap.parse_args(argv)
    sizes = ([int(x) for x in args.sizes.split(",")] if args.sizes else
             [1_000_000, 10_000_000] + ([100_000_000] if args.huge else []))
    work = Path(args.work or tempfile.mkdtemp(prefix="bench-ingest-"))
    work.mkdir(parents=True, exist_ok=True)
    results = []
    try:
        for rows in sizes:
            npy, pq_path, n = write_edges(work, rows, args.seed)
            for fmt in args.formats.split(","):
                source = npy if fmt == "npy" else pq_path
                out = work / f"graph-{rows}-{fmt}"
                shutil.rmtree(out, ignore_errors=True)
                cmd = [sys.executable, "-m", "shardtrain", "ingest", str(source), "--out",
                       str(out), "--memory-budget", args.budget]
                r = run_sampled(cmd)
                manifest = json.loads((out / "graph.json").read_text())
                on_disk = sum(p.stat().st_size for p in out.iterdir())
                row = {"format": fmt, "edge_rows": rows, "vertices": manifest["num_vertices"],
                       "edges": manifest["num_edges"], "cleanup": manifest["cleanup"],
                       "buckets": manifest["ingest"]["buckets"],
                       "seconds": r["seconds"], "s_per_edge_row": r["seconds"] / rows,
                       "peak_rss_anon_shmem_bytes": r["peak_rss_anon_shmem_bytes"],
                       "peak_rss_file_bytes_not_counted": r["peak_rss_file_bytes"],
                       "graph_dir_bytes": on_disk, "command": " ".join(cmd[1:])}
                results.append(row)
                print(f"{fmt:8s} {rows:>12,} rows  {r['seconds']:7.1f} s  "
                      f"{r['seconds'] / rows * 1e9:6.0f} ns/row  peak "
                      f"{r['peak_rss_anon_shmem_bytes'] / 2**20:7.0f} MiB "
                      f"(+{r['peak_rss_file_bytes'] / 2**20:.0f} MiB mapped)  "
                      f"{manifest['ingest']['buckets']} buckets", flush=True)
                shutil.rmtree(out, ignore_errors=True)
            npy.unlink()
            pq_path.unlink()
    finally:
        if args.work is None:
            shutil.rmtree(work, ignore_errors=True)
    doc = {"benchmark": "ingest", "memory_budget": args.budget, "cpus": os.cpu_count(),
           "results": results}
    Path(args.out).parent.mkdir(parents=True, exist_ok=True)
    Path(args.out).write_text(json.dumps(doc, indent=1) + "\n")
    print(f"wrote {args.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
