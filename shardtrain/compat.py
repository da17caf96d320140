"""Every private or version-dependent library call of the package, one shim each.

Each shim is one function with a public-looking signature. The private call behind it is
checked ONCE, when this module is imported, against its public equivalent on a tiny input
whose values are small integers (exact in any summation order, so the check tests the
call's meaning, not its rounding). If the private call is missing, raises, or gives another
result (a changed signature or meaning), the shim uses the public path instead, records
why in `FALLBACKS` and says so once with a `CompatWarning`. Both paths give the same values;
callers that need the kernel's bits (the worker's split products) get them whenever the
kernel is present, which `FALLBACKS` tells.

Shims:
- `add_csr_product(a, x, out)`: out += a @ x without a temporary (scipy's `csr_matvecs`).
- `scale_csr_rows(a, factor)`: a[i, :] *= factor[i] in place (scipy's `csr_scale_rows`).
"""
from __future__ import annotations

import warnings

import numpy as np
import scipy.sparse as sp


class CompatWarning(RuntimeWarning):
    """A private library call is unusable here; the public (slower) path is used."""


FALLBACKS: dict[str, str] = {}    # shim name -> why it uses the public path in this process


def _fall_back(name: str, reason: str) -> None:
    FALLBACKS[name] = reason
    warnings.warn(f"shardtrain.compat.{name}: using the public scipy path ({reason})",
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


# ------------------------------------------------------------------ out += a @ x
# Remove when scipy offers a public sparse @ dense product into an existing array (out=).

def _check_matvecs(fn) -> str:
    """'' when fn accumulates like the public product on a tiny input, else why not."""
    try:
        for dtype in (np.float32, np.float64):
            a = _tiny_csr(dtype)
            x = np.arange(8, dtype=dtype).reshape(4, 2) - 3
            out = np.arange(6, dtype=dtype).reshape(3, 2)
            want = out + a @ x
            fn(a.shape[0], a.shape[1], x.shape[1], a.indptr, a.indices, a.data,
               x.reshape(-1), out.reshape(-1))
            if out.tobytes() != want.tobytes():
                return f"csr_matvecs gave another result than y + a @ x ({dtype.__name__})"
    except Exception as exc:     # a changed signature raises TypeError/ValueError
        return f"csr_matvecs failed on a 3x4 check: {type(exc).__name__}: {exc}"
    return ""


_csr_matvecs, _why = _private("csr_matvecs")
_why = _why or _check_matvecs(_csr_matvecs)
if _why:
    _csr_matvecs = None
    _fall_back("add_csr_product", _why)


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

def _check_scale_rows(fn) -> str:
    """'' when fn scales rows like the public repeat-and-multiply on a tiny input."""
    try:
        for dtype in (np.float32, np.float64):
            a = _tiny_csr(dtype)
            factor = np.array([3, -2, 5], dtype=dtype)
            want = a.data * np.repeat(factor, np.diff(a.indptr))
            fn(a.shape[0], a.shape[1], a.indptr, a.indices, a.data, factor)
            if a.data.tobytes() != want.tobytes():
                return f"csr_scale_rows gave another result than the repeated factors " \
                       f"({dtype.__name__})"
    except Exception as exc:     # a changed signature raises TypeError/ValueError
        return f"csr_scale_rows failed on a 3x4 check: {type(exc).__name__}: {exc}"
    return ""


_csr_scale_rows, _why = _private("csr_scale_rows")
_why = _why or _check_scale_rows(_csr_scale_rows)
if _why:
    _csr_scale_rows = None
    _fall_back("scale_csr_rows", _why)
del _why


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
