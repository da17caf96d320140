"""Helpers shared by several test modules (no test module imports another one).

Each helper keeps the meaning it had in the module that first defined it; where a check
rests on something outside the project, the test that uses it names the source.
"""
from __future__ import annotations

import os
import shutil
import subprocess
import sys
import time

import numpy as np

from shardtrain.data.graph import Graph, csr_from_edges

# ---------------------------------------------------------------- graphs

def depot_graph(n=300, classes=4, features=24, seed=3) -> Graph:
    """A small random delivery network: routes mostly between depots of the same role."""
    rng = np.random.default_rng(seed)
    role = rng.integers(0, classes, n)
    src = rng.integers(0, n, 6 * n)
    dst = np.where(rng.random(6 * n) < 0.7,
                   rng.permutation(n)[np.searchsorted(np.sort(role), role[src]) % n],
                   rng.integers(0, n, 6 * n))
    indptr, indices, _ = csr_from_edges(src, dst, n)
    x = rng.normal(size=(n, features)) + 0.5 * np.eye(classes, features)[role]
    train = np.zeros(n, bool)
    train[rng.choice(n, 40, replace=False)] = True
    rest = np.flatnonzero(~train)
    val = np.zeros(n, bool)
    val[rest[:80]] = True
    test = ~(train | val)
    labels = role.astype(np.int64)
    labels[rng.choice(rest[80:], 10, replace=False)] = -1     # some depots without a role
    test &= labels >= 0
    return Graph(indptr, indices, x, labels, train, val, test)


def _graph(src, dst, n, features, labels, train, val, test):
    indptr, indices, _ = csr_from_edges(src, dst, n)
    return Graph(indptr, indices, features, labels, train, val, test)


def digits_graphs(k=10, per_class=5, seed=0):
    """scikit-learn's handwritten digits (Alpaydin & Kaynak 1998, UCI; shipped in
    scikit-learn) as a k-nearest-neighbour graph, and the same vertices without edges."""
    from sklearn.datasets import load_digits
    from sklearn.neighbors import kneighbors_graph

    x, y = load_digits(return_X_y=True)
    x = x / 16.0
    n = x.shape[0]
    knn = kneighbors_graph(x, k, include_self=False).tocoo()   # symmetrised by csr_from_edges
    rng = np.random.default_rng(seed)
    train = np.zeros(n, dtype=bool)
    for c in range(10):
        train[rng.choice(np.flatnonzero(y == c), per_class, replace=False)] = True
    rest = rng.permutation(np.flatnonzero(~train))
    val = np.zeros(n, dtype=bool)
    val[rest[:300]] = True
    test = ~train & ~val
    with_edges = _graph(knn.row, knn.col, n, x, y.astype(np.int64), train, val, test)
    no_edges = _graph(np.zeros(0, np.int64), np.zeros(0, np.int64), n, x, y.astype(np.int64),
                      train, val, test)
    return with_edges, no_edges


def save_graph(path, g: Graph) -> None:
    """Write `g` as a graph `.npz` the CLI reads (each undirected edge once)."""
    rows = np.repeat(np.arange(g.num_vertices), g.degrees)
    keep = rows < g.indices
    np.savez(path, edges=np.stack([rows[keep], g.indices[keep]], axis=1),
             num_vertices=np.int64(g.num_vertices), features=g.features, labels=g.labels,
             train_mask=g.train_mask, val_mask=g.val_mask, test_mask=g.test_mask)


# ---------------------------------------------------------------- partitioned runs

def run_partitioned(tmp_path, graph, assignment, k, settings, **kw):
    """Build the shards, write them as a shard directory and train from it."""
    from shardtrain.plan.shards import build_shards, save_shards
    from shardtrain.train.coordinator import train_partitioned

    shards = build_shards(graph, assignment, k)
    save_shards(tmp_path / "shards", shards, meta={"method": "test", "seed": 0})
    return train_partitioned(tmp_path / "shards", settings, timeout_s=30, **kw), shards


# ---------------------------------------------------------------- MPI

MPI_RUN_TIMEOUT_S = 60


def mpiexec() -> str:
    """The `mpiexec` beside this Python (the mpich wheel's), or skip the test."""
    import pytest

    try:
        import mpi4py  # noqa: F401
    except ImportError:
        pytest.skip("mpi4py is not installed (pip install -e '.[mpi]')")
    exe = shutil.which("mpiexec", path=os.pathsep.join([os.path.dirname(sys.executable),
                                                        os.environ.get("PATH", "")]))
    if exe is None:
        pytest.skip("mpiexec not found (the mpich wheel of the 'mpi' extra provides it)")
    return exe


def launch_mpi(n: int, program: list[str], timeout=MPI_RUN_TIMEOUT_S):
    """`mpiexec -n N python PROGRAM...` -> (CompletedProcess, wall seconds)."""
    env = {**os.environ, "OPENBLAS_NUM_THREADS": "1", "OMP_NUM_THREADS": "1"}
    t0 = time.perf_counter()
    proc = subprocess.run([mpiexec(), "-n", str(n), sys.executable, *program],
                          capture_output=True, text=True, timeout=timeout, env=env)
    return proc, time.perf_counter() - t0


# ---------------------------------------------------------------- processes

def processes_with_token(token: str) -> list[int]:
    """Processes whose environment carries `token` (a CLI run and all its descendants)."""
    found = []
    needle = token.encode()
    for name in os.listdir("/proc"):
        if name.isdigit():
            try:
                with open(f"/proc/{name}/environ", "rb") as fh:
                    if needle in fh.read():
                        found.append(int(name))
            except OSError:
                pass
    return found


# ---------------------------------------------------------------- forecast documents

def model_doc(dims, dtype="float32"):
    """The `model` part of a survey document for layer shapes `dims`."""
    from shardtrain.plan.schedule import layer_hops
    hops = layer_hops(dims)
    return {"dtype": dtype, "dims": [list(d) for d in dims],
            "parameters": sum(a * b for a, b in dims),
            "hops": [{"layer": h.layer, "d_in": h.d_in, "d_out": h.d_out,
                      "transform_first": h.transform_first, "forward_width": h.forward_width,
                      "backward_width": h.backward_width} for h in hops]}


def hand_plan(send_rows, owned, local_edges, params, itemsize=4):
    """A survey-shaped plan from its send matrix (halo of p = rows others send p)."""
    from shardtrain.transport.ring import ring_send_elements

    s = np.asarray(send_rows, dtype=np.int64)
    k = s.shape[0]
    halo = s.sum(axis=0)
    return {"method": "hand", "workers": k,
            "shards": [{"worker": w, "owned": int(owned[w]), "halo": int(halo[w]),
                        "local_edges": int(local_edges[w])} for w in range(k)],
            "traffic": {"send_rows": s.tolist(),
                        "allreduce_bytes_per_worker":
                            (ring_send_elements(params, k) * itemsize).tolist()}}


def frame_header_bytes(dtype, shape, kind="halo", layer=0, direction="backward"):
    """Framing bytes of one frame, as the transport's own encoder makes them."""
    from shardtrain.transport.frames import encode_header

    return len(encode_header(kind=kind, epoch=0, layer=layer, direction=direction, source=0,
                             dtype=dtype, shape=list(shape)))



def plan_assignment(graph, k: int, method: str) -> np.ndarray:
    """A k-worker assignment of `graph`: seeded random ids, or `partition`'s plan."""
    from shardtrain.plan.partition import partition
    if method == "random":
        return np.random.default_rng(k).integers(0, k, graph.num_vertices)
    return np.asarray(partition(graph, method, k, seed=0, imbalance=0.03))


def assert_same_run(run, want, rtol: float = 1e-9) -> None:
    """Every epoch's loss and validation loss to `rtol` relative, and every final weight
    array to `rtol` of its largest value (docs/design.md section 1.7)."""
    import pytest

    from shardtrain.train import model
    assert len(run.epochs) == len(want.epochs)
    for got, ref in zip(run.epochs, want.epochs):
        assert got["loss"] == pytest.approx(ref["loss"], rel=rtol, abs=0)
        assert got["val_loss"] == pytest.approx(ref["val_loss"], rel=rtol, abs=0)
    want_w = model.params_to_arrays(want.params)
    got_w = model.params_to_arrays(run.params)
    assert sorted(got_w) == sorted(want_w)
    for name, w in want_w.items():
        assert np.max(np.abs(got_w[name] - w)) <= rtol * np.max(np.abs(w)), name
