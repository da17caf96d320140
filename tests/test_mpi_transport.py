"""The MPI transport under a real `mpiexec -n 2` and `-n 3`: same data, same byte counts as
the pipes transport for the same pattern, deadlines and bad frames named.

The test starts mpiexec on this very file; `python tests/test_mpi_transport.py MODE OUTDIR`
is the per-rank program.
"""
from __future__ import annotations

import os
import shutil
import subprocess
import sys
import threading
import time
from pathlib import Path

import msgpack
import numpy as np
import pytest

from shardtrain.transport.meter import Profile
from shardtrain.transport.pipes import PipeTransport, make_pipe_mesh, ring_pairs

pytestmark = pytest.mark.mpi      # every test here starts mpiexec

ROWS, WIDTH = 20_000, 3          # 480 kB float64 frames: past MPI's small-message path
SUM_SIZES = (100_003, 2)         # an odd size, and one below the rank count


def _payload(p, q, epoch, dtype):
    base = np.arange((ROWS + p + 2 * q) * WIDTH, dtype=np.float64).reshape(-1, WIDTH)
    return (base * (p + 1) - q + epoch).astype(dtype)


def _sum_input(rank, size, dtype):
    return np.random.default_rng(rank * 7 + size).standard_normal(size).astype(dtype)


def pattern(transports, rank, k) -> dict:
    """Exchange with every peer both ways, then sum vectors: the same on any transport.

    `transports` is a list; the all-reduces cycle through it (MPI runs its own all-reduce and
    the ring over point-to-point)."""
    t = transports[0]
    peers = [q for q in range(k) if q != rank]
    ok = True
    for epoch, direction, dtype in ((0, "forward", np.float32), (0, "backward", np.float64)):
        inc = {q: np.empty(_payload(q, rank, epoch, dtype).shape, dtype) for q in peers}
        t.exchange({q: _payload(rank, q, epoch, dtype) for q in peers}, inc, kind="halo",
                   epoch=epoch, layer=1, direction=direction)
        ok &= all(np.array_equal(inc[q], _payload(q, rank, epoch, dtype)) for q in peers)
    sums = []
    for i, size in enumerate(SUM_SIZES * 2):
        for dtype in (np.float32, np.float64):
            buf = _sum_input(rank, size, dtype)
            transports[i % len(transports)].allreduce_sum(buf, epoch=1)
            sums.append(buf.tobytes())
    return {"ok": bool(ok), "sums": sums}


def _expected_sums(k):
    out = []
    for size in SUM_SIZES * 2:
        for dtype in (np.float32, np.float64):
            out.append((dtype, np.sum([_sum_input(r, size, dtype).astype(np.float64)
                                       for r in range(k)], axis=0)))
    return out


def _pipes_run(k):
    """The same pattern over pipes, one thread per rank (the poll loop releases the GIL)."""
    ends = make_pipe_mesh(k, {(p, q) for p in range(k) for q in range(p + 1, k)} | ring_pairs(k))
    results = {}

    def run(r):
        prof = Profile(r)
        t = PipeTransport(r, k, ends[r], prof, timeout_s=30)
        results[r] = {**pattern([t], r, k), "profile": prof.to_dict()}
        t.close()
    threads = [threading.Thread(target=run, args=(r,)) for r in range(k)]
    for th in threads:
        th.start()
    for th in threads:
        th.join(60)
    return [results[r] for r in range(k)]


def _mpiexec():
    exe = shutil.which("mpiexec", path=os.pathsep.join([os.path.dirname(sys.executable),
                                                        os.environ.get("PATH", "")]))
    try:
        import mpi4py  # noqa: F401
    except ImportError:
        pytest.skip("mpi4py is not installed (pip install -e '.[mpi]')")
    if exe is None:
        pytest.skip("mpiexec not found (the mpich wheel of the 'mpi' extra provides it)")
    return exe


def _launch(n, mode, out: Path, timeout=60):
    env = {**os.environ, "OPENBLAS_NUM_THREADS": "1", "OMP_NUM_THREADS": "1"}
    t0 = time.perf_counter()
    proc = subprocess.run([_mpiexec(), "-n", str(n), sys.executable, __file__, mode, str(out)],
                          capture_output=True, text=True, timeout=timeout, env=env)
    return proc, time.perf_counter() - t0


def _rows(profile):
    return sorted(tuple(r.values()) for r in profile["bytes"])


@pytest.mark.parametrize("k", [2, 3])
def test_mpi_equals_pipes_in_data_and_byte_counts(k, tmp_path):
    proc, _ = _launch(k, "pattern", tmp_path)
    assert proc.returncode == 0, proc.stderr[-2000:]
    mpi = [msgpack.unpackb((tmp_path / f"rank{r}.msgpack").read_bytes()) for r in range(k)]
    pipes = _pipes_run(k)
    for r in range(k):
        assert mpi[r]["ok"] and pipes[r]["ok"]
        # Every (src, dst, kind, layer, direction) row, payload AND framing, as over pipes.
        assert _rows(mpi[r]["profile"]) == _rows(pipes[r]["profile"])
    for i, (dtype, exact) in enumerate(_expected_sums(k)):
        # Reference: numpy's sum of the inputs; identical bits on every rank.
        for res in (mpi, pipes):
            got = [np.frombuffer(x["sums"][i], dtype) for x in res]
            assert all(g.tobytes() == got[0].tobytes() for g in got)
            tol = 1e-5 if dtype == np.float32 else 1e-12
            np.testing.assert_allclose(got[0], exact, rtol=tol, atol=tol)


@pytest.mark.parametrize("mode,message", [
    ("silent", r"timed out after 1 s waiting for worker 1 \(halo forward, layer 0, epoch 0\)"),
    ("wrong", r"frame from worker 1: expected epoch 0, got 9"),
])
def test_mpi_failures_are_named_and_abort_the_job(mode, message, tmp_path):
    proc, elapsed = _launch(2, mode, tmp_path)
    assert proc.returncode != 0
    assert elapsed < 30
    import re
    assert re.search(message, (tmp_path / "error.txt").read_text())


# --- the per-rank program -------------------------------------------------------------------

def _child(mode: str, out: Path) -> None:
    from mpi4py import MPI

    from shardtrain.errors import RunError
    from shardtrain.transport.mpi import MpiTransport

    comm = MPI.COMM_WORLD
    rank, k = comm.Get_rank(), comm.Get_size()
    prof = Profile(rank)
    t = MpiTransport(comm, prof, timeout_s=1 if mode != "pattern" else 30)
    if mode == "pattern":
        ring = MpiTransport(comm, prof, timeout_s=30, allreduce="ring")
        result = pattern([t, ring], rank, k)
        (out / f"rank{rank}.msgpack").write_bytes(
            msgpack.packb({**result, "profile": prof.to_dict()}))
        return
    try:
        if rank == 0:
            t.exchange({}, {1: np.empty(4)}, kind="halo", epoch=0, layer=0, direction="forward")
        elif mode == "wrong":
            t.exchange({0: np.zeros(4)}, {}, kind="halo", epoch=9, layer=0, direction="forward")
        comm.Barrier()                         # rank 1 waits here until rank 0 aborts
    except RunError as exc:
        (out / "error.txt").write_text(str(exc))
        t.abort(3)


if __name__ == "__main__":
    _child(sys.argv[1], Path(sys.argv[2]))
