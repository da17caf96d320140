"""GAT's attention checked against the paper's definition written as a plain loop over
vertices (Veličković et al., ICLR 2018, eqs. 1-4, from memory): for every vertex v and
every u in N(v) ∪ {v}, e_vu = LeakyReLU_0.2(a_src · W h_u + a_dst · W h_v), α_v· the
softmax over u, out[v] = Σ_u α_vu W h_u per head, heads concatenated then ELU on hidden
layers. The package code is vectorised; this test loops on purpose.
"""
from __future__ import annotations

import math

import numpy as np
import scipy.sparse as sp

from shardtrain.data.graph import Graph, csr_from_edges, normalized_adjacency
from shardtrain.plan.schedule import layer_dims, model_hops
from shardtrain.train import model
from shardtrain.train.models import gat
from shardtrain.train.models.common import edge_keep_mask, local_graph


def _small_graph(n=9, seed=2):
    rng = np.random.default_rng(seed)
    src, dst = rng.integers(0, n, 14), rng.integers(0, n, 14)
    indptr, indices, _ = csr_from_edges(src, dst, n)
    x = rng.normal(size=(n, 5))
    return Graph(indptr, indices, x, rng.integers(0, 3, n), np.ones(n, bool), None, None)


def _loop_layer(h, w, att_src, att_dst, b, neighbours, heads, d, hidden):
    n = h.shape[0]
    t = h @ w
    out = np.zeros((n, heads * d))
    for v in range(n):
        for k in range(heads):
            tk = t[:, k * d:(k + 1) * d]
            us = sorted(set(neighbours[v]) | {v})
            scores = []
            for u in us:
                s = float(att_src[k] @ tk[u] + att_dst[k] @ tk[v])
                scores.append(s if s > 0 else 0.2 * s)
            top = max(scores)
            ex = [math.exp(s - top) for s in scores]
            total = sum(ex)
            for u, e in zip(us, ex):
                out[v, k * d:(k + 1) * d] += (e / total) * tk[u]
    if b is not None:
        out += b
    if hidden:
        out = np.where(out > 0, out, np.expm1(np.minimum(out, 0)))
    return out


def test_forward_equals_a_per_vertex_loop():
    g = _small_graph()
    n = g.num_vertices
    neighbours = [list(g.indices[g.indptr[v]:g.indptr[v + 1]]) for v in range(n)]
    dims = layer_dims(5, 4, 3, 2, model="gat", heads=3)
    hops = model_hops(dims, "gat", hidden=4, heads=3)
    params = model.glorot_init(dims, 1, np.float64, True, hops=hops)
    rng = np.random.default_rng(0)
    params = [model.GatLayer(p.w, p.att_src * 3, p.att_dst * 3, rng.normal(size=p.b.shape))
              for p in params]
    a_hat = normalized_adjacency(g)
    local = local_graph(a_hat, np.arange(n))
    logits, _ = model.forward(params, g.features, hops, lambda l, m: m, model.no_dropout,
                              local)
    h = g.features
    for l, (p, hop) in enumerate(zip(params, hops)):
        h = _loop_layer(h, p.w, p.att_src, p.att_dst, p.b, neighbours, hop.heads, hop.d_out,
                        hidden=l < len(hops) - 1)
    np.testing.assert_allclose(logits, h, rtol=1e-12, atol=1e-12)


def test_softmax_is_stable_for_large_scores():
    # scores of order 1e3 overflow exp() without the per-vertex maximum subtracted
    g = _small_graph()
    local = local_graph(normalized_adjacency(g), np.arange(g.num_vertices))
    t = np.random.default_rng(1).normal(size=(g.num_vertices, 2, 3)) * 1e3
    att = np.ones((2, 3))
    alpha, _ = gat.attention(t, t, att, att, local)
    assert np.all(np.isfinite(alpha))
    sums = np.add.reduceat(alpha, local.indptr[:-1], axis=0)
    np.testing.assert_allclose(sums, 1.0, rtol=1e-12)


def test_attention_dropout_depends_only_on_the_endpoints_ids():
    # counter-based: the same (seed, epoch, layer, head, dst, src) keeps the same decision
    # in any edge order and any process layout; kept fraction close to 1 - rate
    rng = np.random.default_rng(4)
    dst, src = rng.integers(0, 10**6, 20000), rng.integers(0, 10**6, 20000)
    threshold = 32768                                  # rate 0.5
    keep = edge_keep_mask(3, 5, 1, 4, src, dst, threshold)
    perm = rng.permutation(dst.size)
    np.testing.assert_array_equal(edge_keep_mask(3, 5, 1, 4, src[perm], dst[perm],
                                                 threshold), keep[perm])
    assert keep.shape == (20000, 4)
    assert abs(keep.mean() - 0.5) < 0.01
    # another epoch, layer, head or the reversed edge draws independently
    other = edge_keep_mask(3, 6, 1, 4, src, dst, threshold)
    assert abs((keep == other).mean() - 0.5) < 0.02
    swapped = edge_keep_mask(3, 5, 1, 4, dst, src, threshold)
    assert abs((keep == swapped).mean() - 0.5) < 0.02
    assert abs((keep[:, 0] == keep[:, 1]).mean() - 0.5) < 0.02


def test_attention_dropout_is_the_same_on_every_shard_layout():
    # the reference's masks on its edges equal a shard's masks on the same edges
    g = _small_graph(n=30, seed=5)
    n = g.num_vertices
    drop = model.Dropout(seed=2, epoch=3, rate=0.5, global_ids=np.arange(n))
    full = local_graph(normalized_adjacency(g), np.arange(n))
    whole = gat._edge_keep(drop, 1, 2, full)
    order = np.random.default_rng(0).permutation(n)
    a = sp.csr_matrix(normalized_adjacency(g))[order][:, order]
    a.sort_indices()
    part = local_graph(a, order)
    shuffled = gat._edge_keep(model.Dropout(2, 3, 0.5, order), 1, 2, part)
    key_full = full.col_ids[full.rows] * n + full.col_ids[full.indices]
    key_part = part.col_ids[part.rows] * n + part.col_ids[part.indices]
    np.testing.assert_array_equal(whole[np.argsort(key_full)], shuffled[np.argsort(key_part)])


def _gat_step(g, dtype, heads=3):
    """Logits and gradients of one GAT training forward + backward (dropout on)."""
    n = g.num_vertices
    dims = layer_dims(5, 4, 3, 2, model="gat", heads=heads)
    hops = model_hops(dims, "gat", hidden=4, heads=heads)
    params = model.glorot_init(dims, 1, dtype, True, hops=hops)
    local = local_graph(normalized_adjacency(g), np.arange(n))
    drop = model.Dropout(seed=4, epoch=2, rate=0.4, global_ids=np.arange(n))
    x = g.features.astype(dtype)
    logits, cache = model.forward(params, x, hops, lambda l, m: m, drop, local)
    dlogits = np.random.default_rng(3).normal(size=logits.shape).astype(dtype)
    grads = model.backward(params, cache, dlogits, hops, lambda l, m: m)
    return logits, grads


def test_blocked_passes_give_the_bits_of_one_block(monkeypatch):
    # the per-edge passes run over blocks of whole rows; blocks of a few entries (many
    # rows split across blocks' edges) must give exactly the one-block result, which the
    # per-vertex loop above checks
    g = _small_graph(n=40, seed=6)
    for dtype in (np.float64, np.float32):
        whole = _gat_step(g, dtype)
        monkeypatch.setattr(gat, "_BLOCK_WORDS", 7)
        blocked = _gat_step(g, dtype)
        monkeypatch.undo()
        assert whole[0].tobytes() == blocked[0].tobytes()
        for gw, gb in zip(whole[1], blocked[1]):
            for a, b in zip(gw, gb):
                assert (a is None and b is None) or a.tobytes() == b.tobytes()


def test_row_blocks_cover_every_row_once():
    g = _small_graph(n=40, seed=6)
    local = local_graph(normalized_adjacency(g), np.arange(g.num_vertices))
    for entries in (1, 5, 13, 10**6):
        blocks = local.row_blocks(entries)
        rows = np.concatenate([np.arange(r0, r1) for r0, r1, _, _ in blocks])
        np.testing.assert_array_equal(rows, np.arange(local.num_rows))
        for r0, r1, e0, e1 in blocks:
            assert (e0, e1) == (local.indptr[r0], local.indptr[r1])
        assert (len(blocks) > 1) if entries < local.indptr[-1] else (len(blocks) == 1)


def test_head_products_equal_scipy_per_head():
    # scipy's sparse product per head, the definition of out_h = A_h T_h (and A_hᵀ G_h)
    g = _small_graph(n=30, seed=8)
    local = local_graph(normalized_adjacency(g), np.arange(g.num_vertices))
    rng = np.random.default_rng(5)
    values = rng.random((local.indices.size, 3))
    x = rng.normal(size=(local.num_cols, 3, 2))
    out = local.product_heads(values, x)
    out_t = local.product_t_heads(np.asfortranarray(values), x)
    for h in range(3):
        a = sp.csr_matrix((values[:, h], local.indices, local.indptr),
                          shape=(local.num_rows, local.num_cols))
        np.testing.assert_allclose(out[:, h, :], a @ x[:, h, :], rtol=1e-13)
        np.testing.assert_allclose(out_t[:, h, :], a.T @ x[:, h, :], rtol=1e-13)
