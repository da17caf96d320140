"""Generate the parcel network, write it as an .npz bundle and as a text edge list, and load
both back: times, edges/s and peak resident memory of each phase.

    python benchmarks/bench_load_synth.py --out benchmarks/results/bench_load_synth.json

Each phase runs in its own process so its peak RSS (resource.getrusage) is its own. Goals
(issue 2): 1 M vertices / 10 M edges generated in under a minute with memory a small multiple
of the output; a 10 M-edge text edge list loaded in seconds. The text phase also times the two
text readers side by side on the same file (np.loadtxt fast path vs the byte scanner).
"""
from __future__ import annotations

import argparse
import json
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np


def peak_rss_bytes() -> int:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024  # Linux reports KiB


def int_rows_to_text(rows: np.ndarray) -> bytes:
    """Non-negative int matrix -> 'a b\\n' lines, vectorised (a loop over digit places only)."""
    rows = np.asarray(rows, dtype=np.int64)
    m, k = rows.shape
    width = len(str(int(rows.max()))) if rows.size else 1
    cells = np.full((m, k, width + 1), ord(" "), dtype=np.uint8)
    ndigits = np.ones(rows.shape, dtype=np.int64)
    for place in range(1, width):
        ndigits += rows >= 10 ** place
    value = rows.copy()
    for pos in range(width - 1, -1, -1):
        value, digit = np.divmod(value, 10)
        cells[:, :, pos] = digit + ord("0")
    cells[:, -1, width] = ord("\n")
    keep = np.arange(width + 1)[None, None, :] >= (width - ndigits)[:, :, None]
    return cells[keep].tobytes()


def phase_synth(args, work: Path) -> dict:
    from shardtrain.data.synth import edge_array, parcel_network
    from shardtrain.files import save_npz_atomic

    baseline = peak_rss_bytes()   # interpreter + numpy/scipy, before any graph exists
    t0 = time.perf_counter()
    g = parcel_network(args.vertices, args.avg_degree, args.classes, args.features, args.seed)
    t1 = time.perf_counter()
    edges = edge_array(g)
    save_npz_atomic(work / "g.npz", edges=edges, num_vertices=g.num_vertices,
                    features=g.features, labels=g.labels, train_mask=g.train_mask,
                    val_mask=g.val_mask, test_mask=g.test_mask)
    t2 = time.perf_counter()
    synth_rss = peak_rss_bytes()
    text = int_rows_to_text(edges)
    with open(work / "g.txt", "wb") as fh:   # bench scratch file, removed at the end
        fh.write(b"# parcel routes: depot depot\n")
        fh.write(text)
    t3 = time.perf_counter()
    del text
    output_bytes = int(edges.nbytes + g.features.nbytes + g.labels.nbytes + 3 * g.num_vertices)
    return {"vertices": g.num_vertices, "edges": g.num_edges, "max_degree": int(g.degrees.max()),
            "synth_s": t1 - t0, "save_npz_s": t2 - t1, "write_text_s": t3 - t2,
            "npz_bytes": (work / "g.npz").stat().st_size,
            "text_bytes": (work / "g.txt").stat().st_size,
            "output_array_bytes": output_bytes, "baseline_rss_bytes": baseline,
            "synth_peak_rss_bytes": synth_rss,
            "peak_rss_above_baseline_over_output": (synth_rss - baseline) / output_bytes}


def phase_load(args, work: Path, name: str) -> dict:
    from shardtrain.data.readers import load_graph

    baseline = peak_rss_bytes()
    t0 = time.perf_counter()
    loaded = load_graph(work / name)
    t1 = time.perf_counter()
    out = {"load_s": t1 - t0, "edges": loaded.graph.num_edges,
           "edges_per_s": loaded.graph.num_edges / (t1 - t0),
           "baseline_rss_bytes": baseline, "peak_rss_bytes": peak_rss_bytes()}
    return out


def phase_readers(args, work: Path) -> dict:
    """The two text readers on the same file, side by side."""
    from shardtrain.data import textscan

    path = work / "g.txt"
    t0 = time.perf_counter()
    fast = textscan.TextTable(path, kind="int", columns=2, what="edges")
    t1 = time.perf_counter()
    scan = textscan.TextTable.__new__(textscan.TextTable)
    scan.path, scan.kind, scan.columns, scan.what, scan.header = path, "int", 2, "edges", None
    values, _ = scan._read()
    t2 = time.perf_counter()
    assert np.array_equal(values, fast.values), "the two readers disagree"
    return {"loadtxt_parse_s": t1 - t0, "scanner_parse_s": t2 - t1,
            "scanner_over_loadtxt": (t2 - t1) / (t1 - t0)}


PHASES = {"synth": phase_synth, "load_npz": lambda a, w: phase_load(a, w, "g.npz"),
          "load_text": lambda a, w: phase_load(a, w, "g.txt"), "text_readers": phase_readers}


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", required=True, help="JSON file to write")
    parser.add_argument("--vertices", type=int, default=1_000_000)
    parser.add_argument("--avg-degree", type=float, default=20.0)
    parser.add_argument("--classes", type=int, default=6)
    parser.add_argument("--features", type=int, default=32)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--phase", choices=sorted(PHASES), help=argparse.SUPPRESS)
    parser.add_argument("--work", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.phase:   # child process: one phase, result as JSON on stdout
        cpu0 = time.process_time()
        result = PHASES[args.phase](args, Path(args.work))
        result["phase_cpu_s"] = time.process_time() - cpu0   # other users' load cannot inflate it
        print(json.dumps(result))
        return 0

    from shardtrain.files import write_json_atomic

    work = Path(tempfile.mkdtemp(prefix="bench_load_synth_"))
    results = {"params": {k: getattr(args, k) for k in
                          ("vertices", "avg_degree", "classes", "features", "seed")}}
    try:
        for phase in PHASES:   # in order: later phases read the files the first one wrote
            cmd = [sys.executable, __file__, "--out", args.out, "--phase", phase,
                   "--work", str(work), "--vertices", str(args.vertices),
                   "--avg-degree", str(args.avg_degree), "--classes", str(args.classes),
                   "--features", str(args.features), "--seed", str(args.seed)]
            done = subprocess.run(cmd, capture_output=True, text=True, check=True)
            results[phase] = json.loads(done.stdout.strip().splitlines()[-1])
            print(phase, json.dumps(results[phase]), flush=True)
    finally:
        shutil.rmtree(work, ignore_errors=True)
    results["goals"] = {
        "synth_under_60_s": results["synth"]["synth_s"] < 60,
        "text_load_s": results["load_text"]["load_s"],
    }
    Path(args.out).parent.mkdir(parents=True, exist_ok=True)
    write_json_atomic(args.out, results)
    return 0


if __name__ == "__main__":
    sys.exit(main())
