"""A blocking exchange then compute, against the same exchange started, computed over, then
waited for: step time side by side in one run, over pipes with an emulated link.

Two processes (this one is rank 0, a spawned child rank 1) on a pipe pair with
`--emulate-link GBPS:LATENCY_US`. Each step swaps one `--mib` MiB float32 frame each way and
does a fixed compute (`--compute` float64 400 x 400 matrix products, BLAS on one thread).
Cases, interleaved, `--repeat` rounds of `--steps` steps each (median step time kept):
  blocking   exchange(...); compute
  started    h = exchange_start(...); compute; h.wait()
Also reported: the link's own time for one frame (link.py's model), the compute alone, and
rank 0's profile "overlap" counters of the started case (seconds hidden behind compute).
With compute and transfer of similar length the started step should approach
max(compute, transfer) instead of their sum.

    python benchmarks/bench_overlap.py --out benchmarks/results/bench_overlap.json
"""
from __future__ import annotations

import argparse
import json
import multiprocessing
import os
import platform
import statistics
import time
from pathlib import Path

import numpy as np

from shardtrain.files import atomic_output, json_text
from shardtrain.transport.link import parse_link
from shardtrain.transport.meter import Profile
from shardtrain.transport.pipes import PipeTransport, make_pipe_mesh

MIB = 1 << 20


def _compute(rounds: int, a: np.ndarray) -> float:
    x = a
    for _ in range(rounds):
        x = np.tanh(x @ a)
    return float(x[0, 0])


def _steps(t: PipeTransport, case: str, steps: int, frame: np.ndarray, rounds: int,
           a: np.ndarray, epoch0: int) -> list[float]:
    peer = 1 - t.rank
    inc = {peer: np.empty_like(frame)}
    times = []
    for s in range(steps):
        meta = {"kind": "halo", "epoch": epoch0 + s, "layer": 0, "direction": "forward"}
        t0 = time.perf_counter()
        if case == "blocking":
            t.exchange({peer: frame}, inc, **meta)
            _compute(rounds, a)
        elif case == "started":
            h = t.exchange_start({peer: frame}, inc, **meta)
            _compute(rounds, a)
            h.wait()
        else:                                    # compute alone
            _compute(rounds, a)
        times.append(time.perf_counter() - t0)
    return times


def _rank(rank, ends, link_text, plan, steps, mib, rounds, conn):
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    t = PipeTransport(rank, 2, ends, Profile(rank), timeout_s=120,
                      link=parse_link(link_text))
    frame = np.ones(mib * MIB // 4, np.float32)
    a = np.random.default_rng(0).standard_normal((400, 400)) / 20
    out: dict[str, list[float]] = {}
    for i, case in enumerate(plan):
        # a blocking exchange lines the two ranks up before each batch
        t.exchange({1 - rank: np.zeros(1)}, {1 - rank: np.empty(1)}, kind="sync",
                   epoch=i, layer=0, direction="forward")
        out.setdefault(case, []).extend(_steps(t, case, steps, frame, rounds, a,
                                               1000 * (i + 1)))
    result = {"times": out, "profile": t.profile.to_dict()}
    t.close()
    if conn is not None:
        conn.send_bytes(json.dumps(result).encode())
    return result


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", required=True)
    ap.add_argument("--emulate-link", default="0.5:200")
    ap.add_argument("--mib", type=int, default=4)
    ap.add_argument("--compute", type=int, default=60, help="matrix products per step")
    ap.add_argument("--steps", type=int, default=5)
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args(argv)
    os.environ["OPENBLAS_NUM_THREADS"] = "1"
    link = parse_link(args.emulate_link)
    plan = ["compute", "blocking", "started"] * args.repeat
    ctx = multiprocessing.get_context("spawn")
    ends = make_pipe_mesh(2, {(0, 1)})
    reader, writer = ctx.Pipe(duplex=False)
    child = ctx.Process(target=_rank, args=(1, ends[1], args.emulate_link, plan, args.steps,
                                            args.mib, args.compute, writer))
    child.start()
    writer.close()
    ends[1].close()
    mine = _rank(0, ends[0], args.emulate_link, plan, args.steps, args.mib, args.compute,
                 None)
    theirs = json.loads(reader.recv_bytes())
    child.join(60)
    frame_bytes = args.mib * MIB
    med = {case: statistics.median(mine["times"][case]) for case in ("compute", "blocking",
                                                                     "started")}
    link_s = link.latency_us * 1e-6 + link.seconds(frame_bytes)
    result = {
        "benchmark": "bench_overlap", "python": platform.python_version(),
        "cpus": os.cpu_count(), "emulate_link": args.emulate_link, "frame_mib": args.mib,
        "compute_products": args.compute, "steps": args.steps, "repeat": args.repeat,
        "link_s_per_frame": link_s,
        "median_step_s": med,
        "ratio_started_vs_blocking": med["started"] / med["blocking"],
        "ideal_ratio": max(med["compute"], link_s) / (med["compute"] + link_s),
        "overlap_rank0": mine["profile"]["overlap"],
        "overlap_rank1": theirs["profile"]["overlap"],
    }
    out = Path(args.out)
    out.parent.mkdir(parents=True, exist_ok=True)
    with atomic_output(out) as tmp:
        tmp.write_text(json_text(result))
    print(json_text(result))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
