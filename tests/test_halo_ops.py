"""The worker's product helpers against scipy's public sparse product, and dropout applied
from the boolean keep mask against the float mask (bit for bit)."""
from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp

from shardtrain import compat
from shardtrain.train import halo, model


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
@pytest.mark.parametrize("kernel", [True, False])
def test_accumulate_product_adds_the_scipy_product(dtype, kernel, monkeypatch):
    # Reference: scipy.sparse's public CSR @ dense product.
    if not kernel:
        monkeypatch.setattr(compat, "_csr_matvecs", None)    # the public fallback path
    a = sp.random(300, 500, density=0.02, format="csr", random_state=1, dtype=dtype)
    x = np.random.default_rng(2).standard_normal((500, 7)).astype(dtype)
    y0 = np.random.default_rng(3).standard_normal((300, 7)).astype(dtype)
    y = y0.copy()
    compat.add_csr_product(a, x, y)
    tol = 1e-5 if dtype == np.float32 else 1e-12      # rounding of a different sum order
    np.testing.assert_allclose(y, y0 + a @ x, rtol=tol, atol=tol)


def test_split_blocks_give_the_bits_of_the_whole_product():
    # Reference: scipy's A @ [M; M_halo] on the unsplit matrix; the split accumulation
    # sums every row's entries in the same column order, so the bits agree.
    a = sp.random(400, 700, density=0.03, format="csr", random_state=4)
    a.sort_indices()
    m = np.random.default_rng(5).standard_normal((700, 5))
    z = np.zeros((400, 5))
    compat.add_csr_product(halo.column_block(a, 0, 400), np.ascontiguousarray(m[:400]), z)
    compat.add_csr_product(halo.column_block(a, 400, 700),
                               np.ascontiguousarray(m[400:]), z)
    assert z.tobytes() == (a @ m).tobytes()


def test_selection_matrix_adds_rows_at_their_targets():
    # Reference: numpy fancy-index addition out[rows] += x (rows unique).
    rows = np.random.default_rng(6).permutation(50)[:20]
    x = np.random.default_rng(7).standard_normal((20, 3))
    out = np.random.default_rng(8).standard_normal((50, 3))
    want = out.copy()
    want[rows] += x
    compat.add_csr_product(halo.selection_matrix(rows, 50, np.float64), x, out)
    assert out.tobytes() == want.tobytes()


def test_transpose_shares_a_symmetric_block_and_transposes_others():
    # Reference: scipy's .T.
    s = sp.random(60, 60, density=0.1, format="csr", random_state=9)
    sym = (s + s.T).tocsr()
    sym.sort_indices()
    assert halo.transpose_csr(sym) is sym
    t = halo.transpose_csr(s.tocsr())
    assert (t != s.T).nnz == 0


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_dropout_from_keep_mask_equals_float_mask(dtype):
    # Reference: h * dropout_mask, the float mask (common practice for inverted dropout).
    ids = np.random.default_rng(10).permutation(5000)
    h = np.random.default_rng(11).standard_normal((5000, 37)).astype(dtype)
    want = h * model.dropout_mask(2, 3, 1, ids, 37, 0.3, dtype)
    got = model.Dropout(2, 3, 0.3, ids)(1, h)
    assert got.dtype == want.dtype and got.tobytes() == want.tobytes()
