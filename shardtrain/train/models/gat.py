"""GAT (Veličković, Cucurull, Casanova, Romero, Liò & Bengio, ICLR 2018), from memory.

Layer l with K heads (K = `--heads` on hidden layers, 1 on the output layer), width d per
head: H' = drop_l(H), T = H' W (K·d columns, head h in columns h·d..h·d+d-1); for every
vertex v and every u in N(v) ∪ {v} (the pattern of Â):
    e_vu,h = LeakyReLU_0.2(att_src_h · T_h[u] + att_dst_h · T_h[v]),
    α_v·,h = softmax over u of e_v·,h (the row maximum subtracted first, for stability),
    out_h[v] = Σ_u drop(α_vu,h) T_h[u],
with drop(α) the inverted dropout of the layer's rate, keyed by (seed, epoch, layer,
head, global id of v, global id of u) (`common.edge_keep_mask`). Hidden layers
concatenate the heads, add b and apply ELU; the output layer is its single head (+ b),
no activation.

Through the schedule: `propagate(l, T)` returns [T; T_halo] (T of every local column,
the exchange of `schedule.model_hops`: K·d columns per halo row), so the attention terms
att_src · T[u] of halo sources are computed where they are used, not sent. Backward
returns, per local column u, dT[u] = Σ_v α'_vu dOut[v] + ds_src[u] att_src: the gradient
rows of T with the attention-source terms folded in (K·d columns, not K·d + K); the
owner adds them up (`propagate_t`) and adds its own ds_dst[v] att_dst. The attention
vectors' gradients are sums over edges, each edge owned by its destination's owner, so
they are local partial sums like every weight gradient.
"""
from __future__ import annotations

import numpy as np

from shardtrain.train.models.common import edge_keep_mask, elu, elu_grad, params_like

SLOPE = 0.2      # LeakyReLU's negative slope in the paper


def _edge_keep(drop, layer: int, heads: int, local):
    """(E, heads) booleans: the attention coefficients the dropout keeps, or None (no
    dropout). A kept coefficient is multiplied by the inverted-dropout scale
    (`model.mask_scale` in the dtype at hand), a dropped one by 0 (`_dropped`)."""
    rate = getattr(drop, "rate", 0.0)
    if not rate:
        return None
    from shardtrain.train.model import _threshold
    return edge_keep_mask(drop.seed, drop.epoch, layer, heads,
                          local.col_ids[local.indices], drop.global_ids[local.rows],
                          _threshold(rate))


def _dropped(values: np.ndarray, keep, rate: float) -> np.ndarray:
    """values * keep * scale (a fresh array, column-major so that each head's values are
    contiguous for `LocalGraph.product_heads`; `values` itself when keep is None)."""
    if keep is None:
        return values
    from shardtrain.train.model import mask_scale
    out = np.empty(values.shape[::-1], dtype=values.dtype).T     # column-major
    np.multiply(values, keep, out=out)
    out *= mask_scale(rate, values.dtype)
    return out


_BLOCK_WORDS = 1 << 16        # values per block of the per-edge passes (in cache)


def _edge_dots(dz3: np.ndarray, t_loc: np.ndarray, local) -> np.ndarray:
    """(E, K): dOut_h[v] · T_h[u] for every entry (v, u) and head h; dz3 (n_rows, K, d),
    t_loc (n_cols, K, d). Both rows gathered for all heads at once, in blocks of rows
    (`LocalGraph.row_blocks`), each head's dot product over d as einsum("ed,ed->e")
    computes it."""
    n_rows, k, d = dz3.shape
    out = np.empty((local.indices.shape[0], k), dtype=np.result_type(dz3, t_loc))
    counts = local.counts
    for r0, r1, e0, e1 in local.row_blocks(_BLOCK_WORDS // max(k * d, 1)):
        a = np.repeat(dz3[r0:r1], counts[r0:r1], axis=0).reshape(-1, d)
        b = t_loc[local.indices[e0:e1]].reshape(-1, d)
        out[e0:e1] = np.einsum("ed,ed->e", a, b).reshape(-1, k)
    return out


def _score_grads(alpha: np.ndarray, dalpha: np.ndarray, pre: np.ndarray,
                 local) -> tuple[np.ndarray, np.ndarray]:
    """(dpre (E, K), ds_dst (n_rows, K)) from dα (a fresh array, overwritten): the
    softmax's de_vu = α_vu dα_vu - α_vu Σ_u' α_vu' dα_vu', the LeakyReLU's dpre = de (pre
    > 0) or SLOPE de, ds_dst[v] = Σ_u dpre_vu; over blocks of whole rows."""
    counts = local.counts
    k = alpha.shape[1]
    dpre = np.multiply(alpha, dalpha, out=dalpha)
    ds_dst = np.zeros((local.num_rows, k), dtype=dpre.dtype)
    for r0, r1, e0, e1 in local.row_blocks(_BLOCK_WORDS // max(k, 1)):
        w, cnt = dpre[e0:e1], counts[r0:r1]
        starts = local.indptr[r0:r1] - e0
        sums = np.repeat(np.add.reduceat(w, starts, axis=0), cnt, axis=0)
        sums *= alpha[e0:e1]
        w -= sums
        np.multiply(w, SLOPE, out=w, where=~(pre[e0:e1] > 0))
        ds_dst[r0:r1] = np.add.reduceat(w, starts, axis=0)
    return dpre, ds_dst


def attention(t_loc: np.ndarray, t_own: np.ndarray, att_src: np.ndarray,
              att_dst: np.ndarray, local) -> tuple[np.ndarray, np.ndarray]:
    """(α, pre): α (E, K) the softmax per row and head, pre (E, K) the scores before the
    LeakyReLU. t_loc (n_cols, K, d), t_own (n_rows, K, d). The per-edge passes run over
    blocks of whole rows (`LocalGraph.row_blocks`), each row's max and sum taken in its
    entry order."""
    s_src = np.einsum("ckd,kd->ck", t_loc, att_src)
    s_dst = np.einsum("rkd,kd->rk", t_own, att_dst)
    counts = local.counts
    k = s_src.shape[1]
    pre = np.empty((local.indices.shape[0], k), dtype=s_src.dtype)
    e = np.empty_like(pre)
    for r0, r1, e0, e1 in local.row_blocks(_BLOCK_WORDS // max(k, 1)):
        p, x, cnt = pre[e0:e1], e[e0:e1], counts[r0:r1]
        np.take(s_src, local.indices[e0:e1], axis=0, out=p)
        p += np.repeat(s_dst[r0:r1], cnt, axis=0)
        np.multiply(p, SLOPE, out=x)
        np.maximum(p, x, out=x)               # LeakyReLU (slope < 1)
        starts = local.indptr[r0:r1] - e0
        x -= np.repeat(np.maximum.reduceat(x, starts, axis=0), cnt, axis=0)
        np.exp(x, out=x)
        x /= np.repeat(np.add.reduceat(x, starts, axis=0), cnt, axis=0)
    return e, pre


def forward(params, x, hops, propagate, drop, local=None):
    if local is None:
        raise ValueError("gat needs the local structure (local=)")
    h = x
    cache: dict = {"drop": drop, "local": local, "layers": []}
    last = len(params) - 1
    for l, ((w, att_src, att_dst, b), hop) in enumerate(zip(params, hops)):
        k, d = hop.heads, hop.d_out
        hd = drop(l, h)
        t = hd @ w
        t_loc = propagate(l, t).reshape(-1, k, d)
        alpha, pre = attention(t_loc, t.reshape(-1, k, d), att_src, att_dst, local)
        keep = _edge_keep(drop, l, k, local)
        coef = _dropped(alpha, keep, getattr(drop, "rate", 0.0))
        z = local.product_heads(coef, t_loc).reshape(local.num_rows, k * d)
        if b is not None:
            z += b
        cache["layers"].append({"h": h, "hd": hd, "t_loc": t_loc, "alpha": alpha,
                                "pre": pre, "keep": keep, "coef": coef, "z": z})
        h = elu(z) if l < last else z
    return h, cache


def backward(params, cache, dlogits, hops, propagate_t):
    """Per layer, heads h, edges (v, u): dα'_vu = dOut_h[v] · T_h[u]; dα = dα' · mask;
    softmax: de_vu = α_vu (dα_vu - Σ_u' α_vu' dα_vu'); LeakyReLU: dpre = de · (1 or 0.2);
    ds_src[u] = Σ_v dpre_vu, ds_dst[v] = Σ_u dpre_vu; datt_src_h = Σ_u ds_src[u] T_h[u],
    datt_dst_h = Σ_v ds_dst[v] T_h[v]; dT_loc[u] = Σ_v α'_vu dOut_h[v] + ds_src[u] att_src_h,
    dT = propagate_t(dT_loc) + ds_dst att_dst; dW = H'ᵀ dT, dH' = dT Wᵀ; ELU' between
    layers."""
    drop, local = cache["drop"], cache["local"]
    grads = []
    dz = dlogits
    for l in range(len(params) - 1, -1, -1):
        (w, att_src, att_dst, b), hop = params[l], hops[l]
        c = cache["layers"][l]
        k, d = hop.heads, hop.d_out
        t_loc, alpha, coef = c["t_loc"], c["alpha"], c["coef"]
        n_rows = local.num_rows
        db = dz.sum(axis=0) if b is not None else None
        dz3 = np.ascontiguousarray(dz).reshape(n_rows, k, d)
        dt_loc = np.ascontiguousarray(local.product_t_heads(coef, dz3))
        dalpha = _edge_dots(dz3, t_loc, local)         # dα' (one E x K array alive)
        dalpha = _dropped(dalpha, c["keep"], getattr(drop, "rate", 0.0))
        dpre, ds_dst = _score_grads(alpha, dalpha, c["pre"], local)
        del dalpha
        ds_src = np.stack([np.bincount(local.indices, weights=dpre[:, head],
                                       minlength=local.num_cols) for head in range(k)],
                          axis=1).astype(dpre.dtype)
        t_own = t_loc[:n_rows]
        datt_src = np.einsum("ck,ckd->kd", ds_src, t_loc)
        datt_dst = np.einsum("rk,rkd->kd", ds_dst, t_own)
        dt_loc += ds_src[:, :, None] * att_src[None, :, :]
        dt = propagate_t(l, dt_loc.reshape(local.num_cols, k * d))
        dt += (ds_dst[:, :, None] * att_dst[None, :, :]).reshape(n_rows, k * d)
        dw = c["hd"].T @ dt
        grads.append(params_like(params[l], (dw, datt_src, datt_dst, db)))
        if l > 0:
            dhd = dt @ w.T
            dz = drop(l, dhd) * elu_grad(cache["layers"][l - 1]["z"])
    return grads[::-1]
