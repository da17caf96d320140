"""What the models beside GCN share: their operators, the local structure, edge dropout."""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp

from shardtrain.compat import add_csr_product
from shardtrain.keys import MASK64 as _MASK64
from shardtrain.keys import splitmix64 as _mix_int


def params_like(layer, values):
    """`values` in the layer's own tuple type (a NamedTuple of the model's fields)."""
    return type(layer)(*values)


def operator_matrix(model: str, adj_hat):
    """The model's aggregation operator from Â's rows (CSR, float64, shape (rows, cols),
    the self-loop of row i at column i, as a shard's `adj` and the full Â both are):

    - sage: D⁻¹A (Hamilton et al. 2017, mean aggregator): Â's pattern without the
      self-loops, every entry of row i equal to 1/deg(i); a row without neighbours is empty
      (the vertex aggregates zero). Only the row's own degree is needed, which the row's
      owner has.
    - gin: A + I (Xu et al. 2019, GIN-0: H + A H): Â's pattern, every entry 1.
    - gcn, gat: Â itself (GAT uses only its pattern, N(v) ∪ {v}).
    The shards therefore store Â for every model; each worker derives its operator.
    """
    if model in ("gcn", "gat"):
        return adj_hat
    a = adj_hat.tocsr()
    indptr = np.asarray(a.indptr, dtype=np.int64)
    indices = np.asarray(a.indices)
    rows = np.repeat(np.arange(a.shape[0], dtype=np.int64), np.diff(indptr))
    if model == "gin":
        return sp.csr_matrix((np.ones(indices.size), indices.copy(), indptr.copy()),
                             shape=a.shape)
    if model != "sage":
        raise ValueError(f"unknown model {model!r}")
    keep = indices != rows
    counts = np.bincount(rows[keep], minlength=a.shape[0]).astype(np.int64)
    new_ptr = np.zeros(a.shape[0] + 1, dtype=np.int64)
    np.cumsum(counts, out=new_ptr[1:])
    inv = np.zeros(a.shape[0])
    np.divide(1.0, counts, out=inv, where=counts > 0)
    return sp.csr_matrix((inv[rows[keep]], indices[keep].copy(), new_ptr), shape=a.shape)


@dataclass
class LocalGraph:
    """The rows a process owns as CSR over its local columns ([owned | halo]), with the
    global id of every local column (GAT's attention and its dropout keys).

    `indptr` (rows + 1), `indices` (local column per entry, sorted within a row, the
    self-loop included), `rows` (row per entry), `col_ids` (global id per local column).
    """
    indptr: np.ndarray
    indices: np.ndarray
    rows: np.ndarray
    col_ids: np.ndarray
    _by_col: tuple | None = None

    @property
    def num_rows(self) -> int:
        return int(self.indptr.shape[0] - 1)

    @property
    def num_cols(self) -> int:
        return int(self.col_ids.shape[0])

    @property
    def counts(self) -> np.ndarray:
        """Entries per row (every row has its self-loop)."""
        return np.diff(self.indptr)

    def by_column(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(perm, col_indptr, rows[perm]): the entries in column order, the transpose's
        CSR structure (computed once)."""
        if self._by_col is None:
            perm = np.argsort(self.indices, kind="stable")
            col_ptr = np.zeros(self.num_cols + 1, dtype=np.int64)
            np.cumsum(np.bincount(self.indices, minlength=self.num_cols), out=col_ptr[1:])
            self._by_col = (perm, col_ptr, self.rows[perm])
        return self._by_col

    def row_blocks(self, entries: int) -> list[tuple[int, int, int, int]]:
        """(r0, r1, e0, e1) per block of consecutive rows holding about `entries` entries
        (a row is never split; e0, e1 its entry range): the blocks the per-edge passes run
        over so their arrays stay in cache (a loop over blocks, not vertices)."""
        n = self.num_rows
        if n == 0:
            return []
        cuts = np.searchsorted(self.indptr, np.arange(0, int(self.indptr[-1]),
                                                      max(1, entries)), side="right") - 1
        bounds = np.unique(np.concatenate([np.clip(cuts, 0, n), [0, n]]))
        return [(int(r0), int(r1), int(self.indptr[r0]), int(self.indptr[r1]))
                for r0, r1 in zip(bounds[:-1], bounds[1:])]

    def product_heads(self, values: np.ndarray, x: np.ndarray) -> np.ndarray:
        """(rows, K, d): per head h, (the matrix with values[:, h]) @ x[:, h, :]; values
        (E, K), x (num_cols, K, d). Each head one `product`'s kernel call on head-major
        copies (one transpose of each operand rather than K strided copies)."""
        k = values.shape[1]
        vt = np.ascontiguousarray(values.T.astype(x.dtype, copy=False))
        xt = np.ascontiguousarray(x.transpose(1, 0, 2))
        out = np.zeros((k, self.num_rows, x.shape[2]), dtype=x.dtype)
        for head in range(k):            # a loop over heads, not vertices
            add_csr_product(_Csr(self.indptr, self.indices, vt[head],
                                 (self.num_rows, self.num_cols)), xt[head], out[head])
        return out.transpose(1, 0, 2)

    def product_t_heads(self, values: np.ndarray, g: np.ndarray) -> np.ndarray:
        """(num_cols, K, d): per head h, (the same matrix)ᵀ @ g[:, h, :]; g (rows, K, d);
        `product_t`'s kernel per head on head-major copies."""
        perm, col_ptr, rows = self.by_column()
        k = values.shape[1]
        vt = np.ascontiguousarray(values.T.astype(g.dtype, copy=False))
        vt = np.take(vt, perm, axis=1)
        gt = np.ascontiguousarray(g.transpose(1, 0, 2))
        out = np.zeros((k, self.num_cols, g.shape[2]), dtype=g.dtype)
        for head in range(k):
            add_csr_product(_Csr(col_ptr, rows, vt[head], (self.num_cols, self.num_rows)),
                            gt[head], out[head])
        return out.transpose(1, 0, 2)

    def product(self, values: np.ndarray, x: np.ndarray) -> np.ndarray:
        """(rows x cols matrix with `values` at the entries) @ x, x (num_cols, w)."""
        out = np.zeros((self.num_rows, x.shape[1]), dtype=x.dtype)
        add_csr_product(_Csr(self.indptr, self.indices, values.astype(x.dtype, copy=False),
                             (self.num_rows, self.num_cols)), x, out)
        return out

    def product_t(self, values: np.ndarray, g: np.ndarray) -> np.ndarray:
        """(the same matrix)ᵀ @ g, g (num_rows, w): rows of every local column."""
        perm, col_ptr, rows = self.by_column()
        out = np.zeros((self.num_cols, g.shape[1]), dtype=g.dtype)
        add_csr_product(_Csr(col_ptr, rows, values[perm].astype(g.dtype, copy=False),
                             (self.num_cols, self.num_rows)), g, out)
        return out


@dataclass
class _Csr:
    """The fields `compat.add_csr_product` reads of a CSR matrix, without scipy's checks
    (the structure is a LocalGraph's, checked when it was built)."""
    indptr: np.ndarray
    indices: np.ndarray
    data: np.ndarray
    shape: tuple[int, int]
    format: str = "csr"

    def __matmul__(self, x):
        return sp.csr_matrix((self.data, self.indices, self.indptr), shape=self.shape) @ x


def local_graph(adj_hat, col_ids: np.ndarray) -> LocalGraph:
    """LocalGraph of Â's rows (a shard's `adj` with col_ids = [owned | halo], or the whole
    Â with col_ids = the row order's ids)."""
    a = adj_hat.tocsr()
    indptr = np.asarray(a.indptr, dtype=np.int64)
    rows = np.repeat(np.arange(a.shape[0], dtype=np.int64), np.diff(indptr))
    return LocalGraph(indptr, np.asarray(a.indices, dtype=np.int64), rows,
                      np.asarray(col_ids, dtype=np.int64))


def _mix64(x: np.ndarray, t: np.ndarray) -> np.ndarray:
    """SplitMix64's finaliser (Steele, Lea & Flood 2014), on uint64 arrays, in place; t is
    scratch of x's shape."""
    np.right_shift(x, np.uint64(30), out=t)
    x ^= t
    x *= np.uint64(0xBF58476D1CE4E5B9)
    np.right_shift(x, np.uint64(27), out=t)
    x ^= t
    x *= np.uint64(0x94D049BB133111EB)
    np.right_shift(x, np.uint64(31), out=t)
    x ^= t
    return x




EDGE_DOMAIN = 0x6174746E      # keeps the edge stream apart from the vertex masks' stream


def edge_keep_mask(seed: int, epoch: int, layer: int, heads: int, src_ids: np.ndarray,
                   dst_ids: np.ndarray, threshold: int) -> np.ndarray:
    """Boolean (E, heads): True where attention coefficient (dst, src, head) is kept.

    Counter-based: entry (e, h) depends only on (seed, epoch, layer, head h, global id of
    the destination vertex, global id of the source vertex), so every process layout
    draws the same. Key of (seed, epoch, layer, head) by chained SplitMix64; per entry the
    SplitMix64 finaliser of key + dst * golden + src * (another odd constant); kept when
    its top 16 bits are >= `threshold` (the vertex masks' rule: P(kept) = 1 - threshold /
    2^16), i.e. when the 64-bit value is >= threshold * 2^48.
    Computed in blocks of edges small enough that the hash passes stay in cache (the loop
    runs over blocks, not edges).
    """
    base = _mix_int(_mix_int(_mix_int(_mix_int(int(seed) & _MASK64) ^ EDGE_DOMAIN)
                             ^ (int(epoch) & _MASK64)) ^ (int(layer) & _MASK64))
    head_keys = np.array([_mix_int(base ^ h) for h in range(heads)], dtype=np.uint64)
    dst = np.asarray(dst_ids)
    src = np.asarray(src_ids)
    n = dst.shape[0]
    keep = np.empty((n, heads), dtype=bool)
    if threshold >= 1 << 16:
        keep[...] = False
        return keep
    bound = np.uint64(int(threshold) << 48)
    block = max(1, _EDGE_BLOCK_WORDS // max(heads, 1))
    x = np.empty((min(block, n), heads), dtype=np.uint64)
    t = np.empty_like(x)
    pair = np.empty(min(block, n), dtype=np.uint64)
    p2 = np.empty_like(pair)
    for start in range(0, n, block):
        stop = min(start + block, n)
        xs, ts, ps, qs = x[:stop - start], t[:stop - start], pair[:stop - start], \
            p2[:stop - start]
        ps[...] = dst[start:stop].astype(np.uint64, copy=False)
        ps *= np.uint64(0x9E3779B97F4A7C15)
        qs[...] = src[start:stop].astype(np.uint64, copy=False)
        qs *= np.uint64(0xD1B54A32D192ED03)
        ps += qs
        np.add(ps[:, None], head_keys[None, :], out=xs)
        _mix64(xs, ts)
        np.greater_equal(xs, bound, out=keep[start:stop])
    return keep


_EDGE_BLOCK_WORDS = 1 << 15      # uint64 words per block of the edge hash (256 KiB)


def elu(z: np.ndarray) -> np.ndarray:
    """ELU (Clevert et al. 2016, alpha 1): z for z > 0, exp(z) - 1 otherwise, as
    max(z, 0) + expm1(min(z, 0)) (one of the two terms is 0)."""
    out = np.maximum(z, 0)
    neg = np.minimum(z, 0)
    np.expm1(neg, out=neg)
    out += neg
    return out


def elu_grad(z: np.ndarray) -> np.ndarray:
    """d ELU / dz: 1 for z > 0, exp(z) otherwise, i.e. exp(min(z, 0))."""
    g = np.minimum(z, 0)
    np.exp(g, out=g)
    return g
