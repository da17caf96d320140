"""Raw pipe throughput against PipeTransport exchange throughput, side by side in one run.

Two processes (this one is rank 0, a spawned child is rank 1). Each case moves 64 MiB from
rank 0 to rank 1 and is timed at the receiver from a shared barrier to the last byte; the
best of --repeat rounds is kept (cases interleaved). Cases:
  raw_default   os.write / os.readv on a pipe with the kernel's default buffer (64 KiB)
  raw_1mib      the same with the buffer raised to 1 MiB (F_SETPIPE_SZ)
  transport     PipeTransport.exchange of one float32 array (pipes made by make_pipe_mesh)
  transport_bidirectional  both ranks send 64 MiB at once; aggregate payload throughput
  small_exchange_us  mean time of one exchange call of 64 bytes each way (fixed cost)
Goal (issue 3): transport payload throughput >= 80% of the raw pipe's (ratio_transport_vs_raw,
measured against the better raw case).

    python benchmarks/bench_pipe.py --out benchmarks/results/bench_pipe.json
"""
from __future__ import annotations

import argparse
import json
import multiprocessing
import os
import platform
import time
from pathlib import Path

import numpy as np

from shardtrain.files import atomic_output, json_text
from shardtrain.transport.meter import Profile
from shardtrain.transport.pipes import PIPE_BYTES, PipeTransport, _grow_pipe, make_pipe_mesh

MIB = 1 << 20
SMALL_CALLS = 2000
BUFFERS = (("default", 0), ("256kib", MIB // 4), ("1mib", MIB))   # transport pipe buffers


def _raw_send(fd, buf):
    mv = memoryview(buf).cast("B")
    off = 0
    while off < len(mv):
        off += os.write(fd, mv[off:])


def _raw_recv(fd, buf):
    mv = memoryview(buf).cast("B")
    off = 0
    while off < len(mv):
        n = os.readv(fd, [mv[off:]])
        if n == 0:
            raise RuntimeError("raw pipe closed early")
        off += n


def _run(rank, plan, nbytes, repeat, raw_pipes, meshes, barrier, result_conn):
    """Both ranks run the same plan; rank 1 reports the receive times."""
    data = np.ones(nbytes // 4, dtype=np.float32)
    sink = np.empty_like(data)
    transports = {name: PipeTransport(rank, 2, ends, Profile(rank), timeout_s=120)
                  for name, ends in meshes.items()}
    peer = 1 - rank
    times = {case: float("inf") for case in plan}
    for _ in range(repeat):              # cases interleaved: load changes hit them alike
        for case in plan:
            barrier.wait()
            t0 = time.perf_counter()
            if case.startswith("raw"):
                reader, writer = raw_pipes[case]
                if rank == 0:
                    _raw_send(writer.fileno(), data)
                else:
                    _raw_recv(reader.fileno(), sink)
            elif case.startswith("transport_bidirectional"):
                transports[case.rsplit("_", 1)[1]].exchange(
                    {peer: data}, {peer: sink}, kind="bench", epoch=0, layer=0,
                    direction="forward")
            else:
                out = {peer: data} if rank == 0 else {}
                inc = {peer: sink} if rank == 1 else {}
                transports[case.rsplit("_", 1)[1]].exchange(
                    out, inc, kind="bench", epoch=0, layer=0, direction="forward")
            times[case] = min(times[case], time.perf_counter() - t0)
    # Small frames: the fixed cost of one exchange call (both ways, 64 bytes each).
    small, small_in = np.ones(8), np.empty(8)
    t = transports[{size: name for name, size in BUFFERS}[PIPE_BYTES]]
    barrier.wait()
    t0 = time.perf_counter()
    for i in range(SMALL_CALLS):
        t.exchange({peer: small}, {peer: small_in}, kind="bench", epoch=i, layer=0,
                   direction="forward")
    times["small_exchange"] = (time.perf_counter() - t0) / SMALL_CALLS
    if rank == 1:
        result_conn.send_bytes(json.dumps(times).encode())
    for t in transports.values():
        t.close()


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", required=True)
    ap.add_argument("--mib", type=int, default=64)
    ap.add_argument("--repeat", type=int, default=9)
    args = ap.parse_args(argv)
    nbytes = args.mib * MIB
    ctx = multiprocessing.get_context("spawn")
    raw_pipes = {}
    for case, size in (("raw_default", 0), ("raw_1mib", MIB)):
        reader, writer = ctx.Pipe(duplex=False)
        _grow_pipe(writer.fileno(), size)
        raw_pipes[case] = (reader, writer)
    meshes = {name: make_pipe_mesh(2, {(0, 1)}, pipe_bytes=size) for name, size in BUFFERS}
    plan = ["raw_default", "raw_1mib"]
    plan += [f"transport_{name}" for name, _ in BUFFERS]
    plan += [f"transport_bidirectional_{name}" for name, _ in BUFFERS]
    barrier = ctx.Barrier(2)
    result_reader, result_writer = ctx.Pipe(duplex=False)
    child = ctx.Process(target=_run, args=(1, plan, nbytes, args.repeat, raw_pipes,
                                           {n: m[1] for n, m in meshes.items()}, barrier,
                                           result_writer))
    child.start()
    for m in meshes.values():
        m[1].close()
    _run(0, plan, nbytes, args.repeat, raw_pipes, {n: m[0] for n, m in meshes.items()},
         barrier, None)
    times = json.loads(result_reader.recv_bytes())
    child.join(60)

    small_us = times.pop("small_exchange") * 1e6
    gbps = {case: nbytes / t / 1e9 for case, t in times.items()}
    for name, _ in BUFFERS:
        gbps[f"transport_bidirectional_{name}"] *= 2      # payload moved both ways at once
    raw_best = max(gbps["raw_default"], gbps["raw_1mib"])
    chosen = f"transport_{ {size: name for name, size in BUFFERS}[PIPE_BYTES]}"
    result = {
        "transfer_bytes": nbytes,
        "repeat": args.repeat,
        "seconds_best": times,
        "gigabytes_per_s": gbps,
        "transport_pipe_bytes": PIPE_BYTES,
        "ratio_transport_vs_raw": gbps[chosen] / raw_best,
        "ratio_transport_vs_raw_by_buffer": {n: gbps[f"transport_{n}"] / raw_best
                                             for n, _ in BUFFERS},
        "ratio_bidirectional_vs_raw": gbps[chosen.replace("transport", "transport_bidirectional")]
                                      / raw_best,
        "goal_ratio": 0.8,
        "small_exchange_us": small_us,
        "machine": {"cpus": os.cpu_count(), "python": platform.python_version()},
    }
    out = Path(args.out)
    out.parent.mkdir(parents=True, exist_ok=True)
    with atomic_output(out) as tmp:
        tmp.write_text(json_text(result))   # strict JSON: NaN -> null
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
