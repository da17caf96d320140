"""Analytic gradients of GraphSAGE, GIN and GAT against central finite differences
(standard practice), in float64, for 1-3 layers, both exchange orders where there are two,
bias on and off, dropout on with fixed masks (GAT: on the attention too).

SAGE and GIN get a random NON-symmetric sparse operator P (propagate = P @ M, propagate_t
= Pᵀ @ G), so a backward that used propagate where it needs the transpose fails. GAT gets
a local structure with halo columns whose rows are a fixed linear map R of the owned rows
(propagate = [T; R T], propagate_t = G_owned + Rᵀ G_halo): the gradient rows it returns
for halo columns are checked through R.
"""
from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp

from shardtrain.plan.schedule import layer_dims, model_hops
from shardtrain.train import model
from shardtrain.train.models.common import local_graph

N = 11
HALO = 4
CLASSES = 3


def _setup(kind, input_dim, hidden, layers, bias, heads=2, seed=1):
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(N, input_dim))
    labels = rng.integers(0, CLASSES, size=N)
    train = rng.random(N) < 0.7
    dims = layer_dims(input_dim, hidden, CLASSES, layers, model=kind, heads=heads)
    hops = model_hops(dims, kind, hidden=hidden, heads=heads)
    params = model.glorot_init(dims, seed, np.float64, bias, hops=hops)
    # non-zero biases (and larger attention vectors) so every term is exercised
    def perturbed(a):
        return a if a is None or a.ndim != 1 else a + rng.normal(size=a.shape) * 0.3

    params = [type(layer)(*[perturbed(a) for a in layer]) for layer in params]
    local = None
    if kind == "gat":
        pattern = sp.random(N, N + HALO, density=0.3, random_state=seed, format="csr")
        pattern = sp.csr_matrix(pattern + sp.eye(N, N + HALO))
        pattern.sort_indices()
        local = local_graph(pattern, np.arange(N + HALO))
        r = rng.normal(size=(HALO, N)) * 0.5

        def propagate(l, m):
            return np.concatenate([m, r @ m])

        def propagate_t(l, g):
            return g[:N] + r.T @ g[N:]
    else:
        p = sp.csr_matrix(sp.random(N, N, density=0.3, random_state=seed, format="csr"))

        def propagate(l, m):
            return p @ m

        def propagate_t(l, g):
            return p.T @ g
    return x, labels, train, hops, params, local, propagate, propagate_t


def _objective(params, x, labels, train, hops, propagate, drop, local, wd):
    logits, cache = model.forward(params, x, hops, propagate, drop, local)
    loss, dlogits = model.loss_and_grad(logits, labels, train, N + 3)
    return loss + model.weight_decay_penalty(params, wd), cache, dlogits


def _check(kind, input_dim, hidden, layers, bias, rate=0.4):
    x, labels, train, hops, params, local, propagate, propagate_t = _setup(
        kind, input_dim, hidden, layers, bias)
    drop = model.Dropout(seed=3, epoch=7, rate=rate, global_ids=np.arange(N))
    wd = 0.05
    calls = []

    def counted_t(l, g):
        calls.append(l)
        return propagate_t(l, g)

    _, cache, dlogits = _objective(params, x, labels, train, hops, propagate, drop, local, wd)
    grads = model.backward(params, cache, dlogits, hops, counted_t)
    model.add_weight_decay(grads, params, wd)
    assert sorted(calls) == sorted(h.layer for h in hops if h.backward_width > 0)
    eps = 1e-6
    names = model.param_names(params)
    assert names == model.param_names(grads)
    for l, layer in enumerate(params):
        for field, arr, g in zip(layer._fields, layer, grads[l]):
            if arr is None:
                assert g is None
                continue
            numeric = np.zeros_like(arr)
            for idx in np.ndindex(arr.shape):
                old = arr[idx]
                arr[idx] = old + eps
                up = _objective(params, x, labels, train, hops, propagate, drop, local, wd)[0]
                arr[idx] = old - eps
                down = _objective(params, x, labels, train, hops, propagate, drop, local,
                                  wd)[0]
                arr[idx] = old
                numeric[idx] = (up - down) / (2 * eps)
            np.testing.assert_allclose(g, numeric, rtol=1e-5, atol=1e-8,
                                       err_msg=f"{kind} layer {l} {field}")
    return hops


@pytest.mark.parametrize("kind", ["sage", "gin"])
@pytest.mark.parametrize("layers", [1, 2, 3])
@pytest.mark.parametrize("input_dim,hidden", [(6, 8), (10, 4)])
@pytest.mark.parametrize("bias", [False, True])
def test_sage_and_gin_gradients_match_central_differences(kind, layers, input_dim, hidden,
                                                          bias):
    hops = _check(kind, input_dim, hidden, layers, bias)
    # (10, 4) puts layer 0 transform-first, (6, 8) aggregate-first (with 2-3 layers): both
    # orders are covered
    narrow = hidden if kind == "gin" else hops[0].d_out
    assert hops[0].transform_first == (narrow < input_dim)


@pytest.mark.parametrize("layers", [1, 2, 3])
@pytest.mark.parametrize("bias", [False, True])
def test_gat_gradients_match_central_differences(layers, bias):
    _check("gat", 5, 3, layers, bias)


def test_gat_gradients_without_dropout():
    _check("gat", 4, 3, 2, True, rate=0.0)
