"""shardtrain.compat: each shim against its public scipy/numpy equivalent (reference:
scipy.sparse's public CSR @ dense product and numpy's elementwise multiply), on both the
private kernel and the public fallback, and the import-time check that picks between them."""
from __future__ import annotations

import importlib
import logging
import logging.handlers
import types
import warnings

import numpy as np
import pytest
import scipy.sparse
import scipy.sparse as sp
from scipy.sparse import _sparsetools

from shardtrain import compat

DTYPES = [np.float32, np.float64]


@pytest.fixture(params=["kernel", "fallback"])
def path(request, monkeypatch):
    """Run a test on scipy's private kernels, then on the public path."""
    assert compat._csr_matvecs is not None and compat._csr_scale_rows is not None, \
        f"this scipy should have both kernels: {compat.FALLBACKS}"
    if request.param == "fallback":
        monkeypatch.setattr(compat, "_csr_matvecs", None)
        monkeypatch.setattr(compat, "_csr_scale_rows", None)
    return request.param


def _matrix(m, n, dtype, seed, density=0.05):
    a = sp.random(m, n, density=density, format="csr", random_state=seed, dtype=dtype)
    a.sort_indices()
    return a


@pytest.mark.parametrize("dtype", DTYPES)
def test_add_csr_product_on_integers_is_exact(dtype, path):
    # Reference: y0 + a @ x (scipy public product); integer values are exact in any order.
    rng = np.random.default_rng(1)
    a = _matrix(40, 30, dtype, 2)
    a.data = rng.integers(-4, 5, a.nnz).astype(dtype)
    x = rng.integers(-4, 5, (30, 6)).astype(dtype)
    y0 = rng.integers(-4, 5, (40, 6)).astype(dtype)
    y = y0.copy()
    compat.add_csr_product(a, x, y)
    assert y.dtype == dtype and y.tobytes() == (y0 + a @ x).tobytes()


@pytest.mark.parametrize("dtype", DTYPES)
def test_add_csr_product_into_zeros_gives_the_public_bits(dtype, path):
    # Reference: a @ x (scipy public product), bit for bit when starting from zeros.
    a = _matrix(200, 150, dtype, 3)
    x = np.random.default_rng(4).standard_normal((150, 5)).astype(dtype)
    y = np.zeros((200, 5), dtype=dtype)
    compat.add_csr_product(a, x, y)
    assert y.tobytes() == (a @ x).tobytes()


@pytest.mark.parametrize("shape", [(0, 5), (5, 0), (0, 0), (4, 3)])
def test_add_csr_product_empty(shape, path):
    # Reference: a @ x (scipy public product) on empty and all-zero matrices, width 0 too.
    a = sp.csr_matrix(shape, dtype=np.float64)
    for width in (0, 3):
        x = np.ones((shape[1], width))
        y = np.full((shape[0], width), 2.0)
        compat.add_csr_product(a, x, y)
        assert y.tobytes() == (np.full((shape[0], width), 2.0) + a @ x).tobytes()


@pytest.mark.parametrize("dtype", DTYPES)
def test_add_csr_product_non_contiguous(dtype, path):
    # Reference: y0 + a @ x (scipy public product) with strided x and strided out: a
    # strided out must be written in place, not into a copy.
    rng = np.random.default_rng(5)
    a = _matrix(60, 50, dtype, 6)
    a.data = rng.integers(-3, 4, a.nnz).astype(dtype)
    xbig = rng.integers(-3, 4, (50, 8)).astype(dtype)
    x = xbig[:, ::2]
    ybig = rng.integers(-3, 4, (60, 8)).astype(dtype)
    y = ybig[:, 1::2]
    want = y + a @ x
    compat.add_csr_product(a, x, y)
    assert not y.flags.c_contiguous and np.array_equal(ybig[:, 1::2], want)
    yt = rng.integers(-3, 4, (4, 60)).astype(dtype).T          # Fortran-ordered out
    want = yt + a @ x
    compat.add_csr_product(a, x, yt)
    assert np.array_equal(yt, want)


def test_add_csr_product_mixed_dtypes_use_the_public_rules(path):
    # Reference: y += a @ x under numpy's casting rules (float32 matrix, float64 rows).
    a = _matrix(30, 20, np.float32, 7)
    x = np.random.default_rng(8).standard_normal((20, 3))
    y = np.zeros((30, 3))
    compat.add_csr_product(a, x, y)
    assert y.tobytes() == (np.zeros((30, 3)) + a @ x).tobytes()


@pytest.mark.parametrize("dtype", DTYPES)
def test_scale_csr_rows_equals_elementwise_multiply(dtype, path):
    # Reference: numpy's a.data * factor repeated per row (one multiply per entry: same bits).
    a = _matrix(80, 60, dtype, 9, density=0.1)
    factor = np.random.default_rng(10).standard_normal(80).astype(dtype)
    want = a.data * np.repeat(factor, np.diff(a.indptr))
    compat.scale_csr_rows(a, factor)
    assert a.data.dtype == dtype and a.data.tobytes() == want.tobytes()


def test_scale_csr_rows_empty_and_strided_factor(path):
    # Reference: numpy's elementwise multiply; an empty matrix stays empty.
    a = sp.csr_matrix((0, 4))
    compat.scale_csr_rows(a, np.empty(0))
    assert a.nnz == 0
    a = _matrix(10, 10, np.float64, 11, density=0.3)
    factor = np.arange(20, dtype=np.float64)[::2]
    want = a.data * np.repeat(factor, np.diff(a.indptr))
    compat.scale_csr_rows(a, factor)
    assert a.data.tobytes() == want.tobytes()
    with pytest.raises(ValueError, match="factor"):
        compat.scale_csr_rows(a, np.ones(3))


def _reload(monkeypatch, **replace):
    """compat imported afresh against a stand-in for scipy.sparse._sparsetools whose named
    symbols are replaced (None: removed); scipy's own modules keep the real one, so the
    public product still works."""
    fake = types.ModuleType("scipy.sparse._sparsetools")
    for name in ("csr_matvecs", "csr_scale_rows"):
        value = replace.get(name, getattr(_sparsetools, name))
        if value is not None:
            setattr(fake, name, value)
    monkeypatch.setattr(scipy.sparse, "_sparsetools", fake)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        fresh = importlib.reload(compat)
    return fresh, [w for w in caught if issubclass(w.category, fresh.CompatWarning)]


@pytest.fixture
def restore_compat(monkeypatch):
    yield
    monkeypatch.undo()               # the real _sparsetools first, then
    importlib.reload(compat)         # the real kernels again for the rest of the suite
    assert compat.FALLBACKS == {}


def _changed_signature(*args):       # a kernel that grew a parameter
    raise TypeError("expected 9 arguments, got 8")


def _wrong_result(*args):            # a kernel whose meaning changed: does nothing
    return None


@pytest.mark.parametrize("replacement", [None, _changed_signature, _wrong_result],
                         ids=["missing", "changed-signature", "changed-result"])
def test_import_check_falls_back_and_says_so_once(replacement, monkeypatch, restore_compat):
    # Reference: the public product and multiply, as above, after the fallback is chosen.
    fresh, said = _reload(monkeypatch, csr_matvecs=replacement, csr_scale_rows=replacement)
    assert fresh._csr_matvecs is None and fresh._csr_scale_rows is None
    assert set(fresh.FALLBACKS) == {"add_csr_product", "scale_csr_rows"}
    assert len(said) == 2 and all("public path" in str(w.message) for w in said)
    a = _matrix(50, 40, np.float64, 12)
    x = np.random.default_rng(13).standard_normal((40, 4))
    y = np.zeros((50, 4))
    fresh.add_csr_product(a, x, y)
    assert y.tobytes() == (a @ x).tobytes()
    factor = np.random.default_rng(14).standard_normal(50)
    want = a.data * np.repeat(factor, np.diff(a.indptr))
    fresh.scale_csr_rows(a, factor)
    assert a.data.tobytes() == want.tobytes()


def test_import_check_keeps_working_kernels_silently(monkeypatch, restore_compat):
    # Reference: the check itself; the real kernels pass it without a warning.
    fresh, said = _reload(monkeypatch)
    assert fresh.FALLBACKS == {} and said == []
    assert fresh._csr_matvecs is _sparsetools.csr_matvecs
    assert fresh._csr_scale_rows is _sparsetools.csr_scale_rows


def _grid_csr(side):
    import networkx as nx

    a = nx.to_scipy_sparse_array(nx.grid_2d_graph(side, side), format="csr")
    a.sort_indices()
    return a.indptr.astype(np.int64), a.indices.astype(np.int64)


@pytest.mark.parametrize("recursive", [False, True])
def test_metis_part_graph_with_one_weight_equals_pymetis(recursive):
    # Reference: pymetis's public part_graph (same options) on a networkx 12x12 grid.
    import pymetis

    xadj, adjncy = _grid_csr(12)
    w = 1 + np.arange(144, dtype=np.int64) % 3
    got = compat.metis_part_graph(xadj, adjncy, 4, w, 1, recursive=recursive, seed=3,
                                  ufactor=30, niter=10)
    want = pymetis.part_graph(4, adjacency=pymetis.CSRAdjacency(xadj, adjncy), vweights=w,
                              recursive=recursive,
                              options=pymetis.Options(ufactor=30, seed=3, niter=10))
    assert got.dtype == np.int64 and np.array_equal(got, want.vertex_part)


@pytest.fixture
def fresh_metis():
    compat._metis_library.cache_clear()
    yield
    compat._metis_library.cache_clear()


def test_metis_check_refuses_a_library_that_disagrees(monkeypatch, fresh_metis):
    # Reference: pymetis's part_graph, made to disagree: the check must notice it.
    import pymetis

    class Wrong:
        vertex_part = [0, 1, 0, 1, 0, 1]

    monkeypatch.setattr(pymetis, "part_graph", lambda *a, **kw: Wrong())
    xadj, adjncy = _grid_csr(3)
    with pytest.raises(compat.RunError, match="disagrees with its own part_graph"):
        compat.metis_part_graph(xadj, adjncy, 2, None, 1, recursive=False, seed=0,
                                ufactor=30, niter=10)


def test_metis_check_names_a_missing_private_module(monkeypatch, fresh_metis):
    # Reference: none needed: a pymetis without _internal is one RunError line, no traceback.
    import sys

    monkeypatch.setitem(sys.modules, "pymetis._internal", None)   # import then fails
    xadj, adjncy = _grid_csr(3)
    with pytest.raises(compat.RunError, match="does not expose the METIS C library"):
        compat.metis_part_graph(xadj, adjncy, 2, None, 1, recursive=False, seed=0,
                                ufactor=30, niter=10)


class _Collect(logging.Handler):
    def __init__(self):
        super().__init__()
        self.got = []

    def emit(self, record):
        self.got.append(record.getMessage())


def _through_receiver(receiver, ctx):
    """Messages a child-side QueueHandler put on the receiver's queue, as handed over."""
    assert type(receiver.queue) is type(ctx.Queue())          # made in the run's context
    child_side = logging.getLogger("shardtrain.test_compat.child")
    child_side.propagate = False
    handler = logging.handlers.QueueHandler(receiver.queue)
    child_side.addHandler(handler)
    try:
        for i in range(3):
            child_side.warning("depot %d", i)
    finally:
        child_side.removeHandler(handler)
        receiver.close()                                      # handles what is queued


def test_worker_log_receiver_hands_records_over_in_order():
    # Reference: the standard library's QueueHandler on the sending side (common practice).
    import multiprocessing

    ctx = multiprocessing.get_context("spawn")
    sink = _Collect()
    receiver = compat.worker_log_receiver(ctx, sink, "test-logs")
    assert "worker_log_receiver" not in compat.FALLBACKS
    assert isinstance(receiver, logging.Handler)               # multiprocessing-logging's
    _through_receiver(receiver, ctx)
    assert sink.got == ["depot 0", "depot 1", "depot 2"]


def test_worker_log_receiver_falls_back_when_the_library_changes(monkeypatch):
    # Reference: logging.handlers.QueueListener, the standard library's receiver.
    import multiprocessing

    import multiprocessing_logging

    class Changed(logging.Handler):          # a release whose __init__ keeps its own queue
        def __init__(self, name, sub_handler=None):
            super().__init__()
            self._own = multiprocessing.Queue(-1)

    monkeypatch.setattr(multiprocessing_logging, "MultiProcessingHandler", Changed)
    monkeypatch.delitem(compat.FALLBACKS, "worker_log_receiver", raising=False)
    ctx = multiprocessing.get_context("spawn")
    sink = _Collect()
    with pytest.warns(compat.CompatWarning, match="QueueListener"):
        receiver = compat.worker_log_receiver(ctx, sink, "test-logs")
    assert isinstance(receiver, compat._StdlibReceiver)
    _through_receiver(receiver, ctx)
    assert sink.got == ["depot 0", "depot 1", "depot 2"]
    monkeypatch.delitem(compat.FALLBACKS, "worker_log_receiver")
