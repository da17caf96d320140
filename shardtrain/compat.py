"""Every private or version-dependent library call of the package, one shim each.

Each shim is one function with a public-looking signature. The private call behind it is
checked ONCE against its public equivalent on a tiny input: scipy's kernels when this
module is imported, on small-integer values (exact in any summation order, so the check
tests the call's meaning, not its rounding); METIS at its first call (pymetis is loaded only
to partition); the log receiver when it is made. If the private call is missing, raises, or
gives another result (a changed signature or meaning), the shim uses the public path
instead, records why in `FALLBACKS` and says so once with a `CompatWarning`. Both paths give
the same values; callers that need the kernel's bits (the worker's split products) get them
whenever the kernel is present, which `FALLBACKS` tells.

Shims:
- `add_csr_product(a, x, out)`: out += a @ x without a temporary (scipy's `csr_matvecs`).
- `scale_csr_rows(a, factor)`: a[i, :] *= factor[i] in place (scipy's `csr_scale_rows`).
- `metis_part_graph(...)`: METIS with several weights per vertex, through the C library in
  pymetis's private `_internal` module. No public path exists, so a failed check is a
  `RunError` at the first call instead of a fallback.
- `worker_log_receiver(ctx, sub_handler, name)`: multiprocessing-logging's handler with its
  queue made in the run's multiprocessing context (it replaces an attribute the library's
  __init__ sets); the standard library's QueueListener when that does not take.
- `parse_toml(text)`: the standard library's `tomllib` (Python 3.11+); on 3.10, where it
  does not exist, None (the caller refuses a TOML file and asks for JSON).
"""
from __future__ import annotations

import functools
import logging
import logging.handlers
import warnings

import numpy as np
import scipy.sparse as sp

from shardtrain.errors import RunError, option


class CompatWarning(RuntimeWarning):
    """A private library call is unusable here; the public (slower) path is used."""


FALLBACKS: dict[str, str] = {}    # shim name -> why it uses the public path in this process


def _fall_back(name: str, reason: str) -> None:
    FALLBACKS[name] = reason
    warnings.warn(f"shardtrain.compat.{name}: using the public path ({reason})",
                  CompatWarning, stacklevel=2)


def _private(name: str):
    """scipy.sparse._sparsetools.<name>, or None (and the reason) when it is not there."""
    try:
        from scipy.sparse import _sparsetools
    except ImportError as exc:
        return None, f"scipy.sparse._sparsetools not importable: {exc}"
    fn = getattr(_sparsetools, name, None)
    return (fn, "") if fn is not None else (None, f"_sparsetools has no {name}")


def _tiny_csr(dtype) -> sp.csr_matrix:
    """3 x 4 CSR with small-integer values and one empty row."""
    return sp.csr_matrix((np.array([2, -1, 3, 1, 4], dtype=dtype),
                          np.array([0, 3, 1, 2, 3], dtype=np.int32),
                          np.array([0, 2, 2, 5], dtype=np.int32)), shape=(3, 4))


def _checked_kernel(name: str, shim: str, differs):
    """scipy.sparse._sparsetools.<name> when it is there and `differs(fn, dtype)` finds it
    agreeing with the public path on a tiny input in float32 and float64; else None, with
    the reason recorded for `shim` (`_fall_back`)."""
    fn, why = _private(name)
    if fn is not None:
        try:
            why = next((f"{name} gave {d} ({t.__name__})" for t in (np.float32, np.float64)
                        if (d := differs(fn, t))), "")
        except Exception as exc:     # a changed signature raises TypeError/ValueError
            why = f"{name} failed on a 3x4 check: {type(exc).__name__}: {exc}"
    if why:
        _fall_back(shim, why)
        return None
    return fn


# ------------------------------------------------------------------ out += a @ x
# Remove when scipy offers a public sparse @ dense product into an existing array (out=).

def _matvecs_differs(fn, dtype) -> str:
    """'' when fn accumulates like the public product y + a @ x on a tiny input."""
    a = _tiny_csr(dtype)
    x = np.arange(8, dtype=dtype).reshape(4, 2) - 3
    out = np.arange(6, dtype=dtype).reshape(3, 2)
    want = out + a @ x
    fn(a.shape[0], a.shape[1], x.shape[1], a.indptr, a.indices, a.data, x.reshape(-1),
       out.reshape(-1))
    return "" if out.tobytes() == want.tobytes() else "another result than y + a @ x"


_csr_matvecs = _checked_kernel("csr_matvecs", "add_csr_product", _matvecs_differs)


def add_csr_product(a, x: np.ndarray, out: np.ndarray) -> None:
    """out += a @ x in place, for a CSR matrix `a` (m, n), x (n, w), out (m, w).

    scipy's own kernel (the one `a @ x` runs after zeroing a fresh output) when `a`'s
    values, x and out share one dtype and out is C-contiguous: no temporary, and row i adds
    its entries to out[i] in column order, so adding two column blocks of a matrix into a
    zeroed `out` gives the bits of the whole product. Otherwise `out += a @ x`.
    """
    if (_csr_matvecs is not None and x.shape[1] > 0 and a.format == "csr"
            and a.data.dtype == x.dtype == out.dtype and out.flags.c_contiguous
            and a.indptr.dtype == a.indices.dtype):
        x = np.ascontiguousarray(x)       # a copy only for a strided x (same values)
        _csr_matvecs(a.shape[0], a.shape[1], x.shape[1], a.indptr, a.indices, a.data,
                     x.reshape(-1), out.reshape(-1))
    else:
        out += a @ x


# ------------------------------------------------------------------ a[i, :] *= f[i]
# Remove when scipy offers a public in-place row scaling of a CSR matrix.

def _scale_rows_differs(fn, dtype) -> str:
    """'' when fn scales rows like the public repeat-and-multiply on a tiny input."""
    a = _tiny_csr(dtype)
    factor = np.array([3, -2, 5], dtype=dtype)
    want = a.data * np.repeat(factor, np.diff(a.indptr))
    fn(a.shape[0], a.shape[1], a.indptr, a.indices, a.data, factor)
    return "" if a.data.tobytes() == want.tobytes() else "another result than the " \
        "repeated factors"


_csr_scale_rows = _checked_kernel("csr_scale_rows", "scale_csr_rows", _scale_rows_differs)


def scale_csr_rows(a: sp.csr_matrix, factor: np.ndarray) -> None:
    """a[i, :] *= factor[i] in place (a CSR matrix with contiguous values, factor (m,)).

    The factors are taken in a's dtype first, so both paths multiply each value once by the
    same number (the same bits). scipy's kernel when present; else the factors repeated per
    entry, a full extra pass over the entries.
    """
    factor = np.ascontiguousarray(factor, dtype=a.data.dtype)
    if factor.shape != (a.shape[0],):
        raise ValueError(f"factor: must have shape ({a.shape[0]},), got {factor.shape}")
    if (_csr_scale_rows is not None and a.format == "csr" and a.data.flags.c_contiguous
            and a.indptr.dtype == a.indices.dtype):
        _csr_scale_rows(a.shape[0], a.shape[1], a.indptr, a.indices, a.data, factor)
    else:
        a.data *= np.repeat(factor, np.diff(a.indptr))


# ------------------------------------------------------------------ METIS, ncon weights
# Remove when pymetis's part_graph passes ncon (several weights per vertex) to METIS.
# pymetis is needed only to partition, so this check runs at the first call, once per
# process, not at import (workers never load pymetis).

@functools.lru_cache(maxsize=1)
def _metis_library():
    """(ctypes handle of the METIS C library inside pymetis's extension module, its option
    indices), checked against pymetis's public `part_graph` on a tiny graph; RunError if
    unusable (the METIS calls need that private module: no public path does ncon > 1)."""
    import ctypes

    import pymetis
    try:
        import pymetis._internal as internal
        keys = internal.options_indices  # type: ignore[attr-defined]  # missing from pymetis's stub
        lib = ctypes.CDLL(internal.__file__)
        pointer = ctypes.POINTER(ctypes.c_int64)
        for name in ("METIS_PartGraphKway", "METIS_PartGraphRecursive"):
            fn = getattr(lib, name)
            fn.argtypes = [pointer] * 8 + [ctypes.c_void_p, ctypes.c_void_p] + [pointer] * 3
            fn.restype = ctypes.c_int
        lib.METIS_SetDefaultOptions.argtypes = [pointer]
        lib.METIS_SetDefaultOptions.restype = ctypes.c_int
    except (ImportError, OSError, AttributeError) as exc:
        raise RunError(f"this pymetis does not expose the METIS C library shardtrain calls "
                       f"for vertex+edge balance ({type(exc).__name__}: {exc})") from None
    if pymetis.zero_copy_dtype() != np.dtype(np.int64):
        raise RunError(f"this pymetis was built with 32-bit METIS indices; "
                       f"{option('method')} metis needs the 64-bit build")
    # two triangles joined by one edge, vertex weights 1..6: the public call must agree
    xadj = np.array([0, 2, 4, 7, 10, 12, 14], dtype=np.int64)
    adjncy = np.array([1, 2, 0, 2, 0, 1, 3, 2, 4, 5, 3, 5, 3, 4], dtype=np.int64)
    weights = np.arange(1, 7, dtype=np.int64)
    for recursive in (False, True):
        mine = _metis_call(lib, keys, xadj, adjncy, 2, weights, 1, recursive=recursive,
                           seed=0, ufactor=30, niter=10)
        public = pymetis.part_graph(2, adjacency=pymetis.CSRAdjacency(xadj, adjncy),
                                    vweights=weights, recursive=recursive,
                                    options=pymetis.Options(ufactor=30, seed=0, niter=10))
        if not np.array_equal(mine, np.asarray(public.vertex_part, dtype=np.int64)):
            raise RunError("this pymetis's METIS library disagrees with its own part_graph on "
                           "a 6-vertex check; the vertex+edge balanced plan is unavailable")
    return lib, keys


def _metis_call(lib, keys, xadj, adjncy, k: int, vweights, ncon: int, *, recursive: bool,
                seed: int, ufactor: int, niter: int) -> np.ndarray:
    import ctypes

    idx = ctypes.POINTER(ctypes.c_int64)

    def p(a):
        return a.ctypes.data_as(idx)

    options = np.zeros(64, dtype=np.int64)        # METIS_NOPTIONS is 40 in METIS 5
    lib.METIS_SetDefaultOptions(p(options))
    options[keys.UFACTOR], options[keys.SEED] = ufactor, seed
    options[keys.NITER], options[keys.NUMBERING] = niter, 0
    xadj = np.ascontiguousarray(xadj, dtype=np.int64)
    adjncy = np.ascontiguousarray(adjncy, dtype=np.int64)
    n = xadj.shape[0] - 1
    weights = None if vweights is None else np.ascontiguousarray(vweights, dtype=np.int64)
    nvtxs, ncons, nparts = (np.array([v], dtype=np.int64) for v in (n, ncon, k))
    objval, part = np.zeros(1, dtype=np.int64), np.zeros(n, dtype=np.int64)
    fn = lib.METIS_PartGraphRecursive if recursive else lib.METIS_PartGraphKway
    status = fn(p(nvtxs), p(ncons), p(xadj), p(adjncy),
                None if weights is None else p(weights), None, None, p(nparts),
                None, None, p(options), p(objval), p(part))
    if status != 1:                                # METIS_OK
        raise RunError(f"METIS failed (status {status}) partitioning {n} vertices into {k}")
    return part


def metis_part_graph(xadj, adjncy, k: int, vweights: np.ndarray | None, ncon: int, *,
                     recursive: bool, seed: int, ufactor: int, niter: int) -> np.ndarray:
    """int64 (n,) parts of METIS_PartGraphRecursive / METIS_PartGraphKway on the CSR graph
    (xadj, adjncy) with `ncon` vertex weights per vertex (vweights row-major n x ncon, or
    None), edge-cut objective, METIS's defaults but for ufactor, seed, niter, 0-based."""
    lib, keys = _metis_library()
    return _metis_call(lib, keys, xadj, adjncy, k, vweights, ncon, recursive=recursive,
                       seed=seed, ufactor=ufactor, niter=niter)


# ------------------------------------------------------------------ worker log receiver
# multiprocessing-logging makes its queue in the default ('fork') context, which children of
# another start method cannot share, so its handler's `queue` (assigned in its __init__, as
# in 0.4.0's source) is replaced by one made in the run's context. Remove when
# multiprocessing-logging's handler takes a context or a queue.

class _StdlibReceiver:
    """The standard library's way (QueueListener on a queue made in `ctx`): the fallback."""

    def __init__(self, ctx, sub_handler: logging.Handler):
        self.queue = ctx.Queue(-1)
        self._listener = logging.handlers.QueueListener(self.queue, sub_handler)
        self._listener.start()

    def close(self) -> None:
        self._listener.stop()            # handles every record already queued first
        self.queue.close()
        self.queue.join_thread()


def worker_log_receiver(ctx, sub_handler: logging.Handler, name: str):
    """A receiver in this process for the log records of child processes started from the
    multiprocessing context `ctx`: children put records on `.queue` (through a
    logging.handlers.QueueHandler), a thread here hands each to `sub_handler`, `.close()`
    handles the ones still queued and stops.

    multiprocessing-logging's handler with its queue made in `ctx`; if the replacement does
    not take (its __init__ no longer assigns `queue`), the standard library's QueueListener.
    """
    import multiprocessing_logging

    class Receiver(multiprocessing_logging.MultiProcessingHandler):
        @property
        def queue(self):
            return self._queue

        @queue.setter
        def queue(self, library_queue):
            library_queue.close()
            self._queue = ctx.Queue(-1)

    handler = Receiver(name, sub_handler=sub_handler)
    if "_queue" in vars(handler) and hasattr(handler, "_receive_thread"):
        return handler
    try:
        handler.close()
    except Exception:                # pragma: no cover - a library we no longer understand
        pass
    _fall_back("worker_log_receiver", "multiprocessing-logging's handler no longer assigns "
               "its queue in __init__; using logging.handlers.QueueListener")
    return _StdlibReceiver(ctx, sub_handler)


def parse_toml(text: str):
    """The TOML document `text` as a dict (`tomllib.loads`); None where this Python has no
    `tomllib` (3.10). A malformed document raises ValueError (`TOMLDecodeError` is one)."""
    try:
        import tomllib  # type: ignore[import-not-found,unused-ignore]
    except ModuleNotFoundError:   # Python 3.10
        return None
    return tomllib.loads(text)
