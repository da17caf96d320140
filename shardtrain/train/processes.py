"""Process-manager pieces shared by the pipes coordinator, its worker processes and the
MPI driver: BLAS threads per process, exit descriptions, stopping child processes, the
open-file budget of a pipe mesh.
"""
from __future__ import annotations

import os
import signal
import time
from contextlib import contextmanager

from shardtrain.errors import ParameterError

JOIN_S = 5.0                 # how long stopped workers get before they are killed
BLAS_ENV = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")


def pin_blas_threads(threads: int = 1) -> None:
    """`threads` BLAS threads in this process (the `threads` setting, default 1: the
    workers are the parallelism). threadpoolctl raises the limit too, so a forkserver
    child started with the pinned environment can still use more."""
    for name in BLAS_ENV:
        os.environ[name] = str(int(threads))
    from threadpoolctl import threadpool_limits
    threadpool_limits(int(threads))


@contextmanager
def blas_env_pinned():
    """Spawned children copy the environment at start: pin BLAS before they import numpy."""
    saved = {name: os.environ.get(name) for name in BLAS_ENV}
    os.environ.update({name: "1" for name in BLAS_ENV})
    try:
        yield
    finally:
        for name, value in saved.items():
            if value is None:
                os.environ.pop(name, None)
            else:
                os.environ[name] = value


def describe_exit(code: int | None) -> str:
    if code is None:
        return "still running"
    if code < 0:
        try:
            return f"killed by signal {signal.Signals(-code).name}"
        except ValueError:
            return f"killed by signal {-code}"
    return f"exit status {code}"


def stop_workers(procs: list, join_s: float = JOIN_S) -> None:
    """Terminate whatever still runs, wait, kill stragglers: no orphan survives."""
    for p in procs:
        if p.is_alive():
            p.terminate()
    deadline = time.monotonic() + join_s
    for p in procs:
        p.join(max(0.0, deadline - time.monotonic()))
    for p in procs:
        if p.is_alive():
            p.kill()
            p.join(join_s)


# descriptors of a run beyond the pipe mesh, measured with /proc/self/fd (k = 2..8): one
# sentinel and one control-pipe end per worker stay open, plus the forkserver's socket,
# the log queue and the resource tracker (tests/test_runtime_promises.py checks it)
FDS_PER_PAIR = 4             # one pipe each way, both ends, until both workers started
FDS_PER_WORKER = 2
FDS_MARGIN = 32


def descriptors_needed(k: int, open_now: int | None = None) -> int:
    """Open files the coordinator holds at its peak (just after the first worker started,
    every pipe of the mesh still open), on top of `open_now` (default: counted)."""
    if open_now is None:
        open_now = _open_descriptors()
    return open_now + FDS_PER_PAIR * len(mesh_pairs(k)) + FDS_PER_WORKER * k + FDS_MARGIN


def _open_descriptors() -> int:
    try:
        return len(os.listdir("/proc/self/fd")) - 1      # less the listing's own
    except OSError:
        return 64                                          # no /proc: a generous guess


def ensure_descriptors(k: int) -> None:
    """Make room for a run of k workers before anything starts: raise the soft limit of
    open files up to the hard limit when that suffices, else a ParameterError about
    `workers` naming `ulimit -n`."""
    import resource

    need = descriptors_needed(k)
    soft, hard = resource.getrlimit(resource.RLIMIT_NOFILE)
    if soft == resource.RLIM_INFINITY or need <= soft:
        return
    if hard == resource.RLIM_INFINITY or need <= hard:
        try:
            resource.setrlimit(resource.RLIMIT_NOFILE,
                               (need if hard == resource.RLIM_INFINITY else hard, hard))
            return
        except (OSError, ValueError):
            pass
    raise ParameterError("workers", f"{k} worker processes need about {need:,} open files, "
                         f"but this shell allows {soft:,} (hard limit {hard:,}): raise it "
                         f"with `ulimit -n {need}` or use fewer workers", value=k)


def mesh_pairs(k: int, peer_sets: list[set[int]] | None = None) -> set[tuple[int, int]]:
    """Pipe pairs: halo peers (all pairs when unknown) plus ring neighbours."""
    from shardtrain.transport.pipes import ring_pairs

    pairs = set(ring_pairs(k))
    if peer_sets is None:
        pairs |= {(p, q) for p in range(k) for q in range(p + 1, k)}
    else:
        pairs |= {(min(p, q), max(p, q)) for p in range(k) for q in peer_sets[p] if q != p}
    return pairs
