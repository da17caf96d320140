"""Analytic gradients of the GCN against central finite differences (standard practice),
in float64, for 1-3 layers, both transform orders, bias on/off, dropout on with fixed masks.

Â is replaced by a random NON-symmetric sparse matrix P (propagate = P @ M,
propagate_t = Pᵀ @ G), so a backward that used propagate where it needs the transpose fails.
"""
from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp

from shardtrain.plan.schedule import layer_dims, layer_hops
from shardtrain.train import model

N = 13
CLASSES = 3


def _problem(input_dim, hidden, layers, bias, seed=1):
    rng = np.random.default_rng(seed)
    p = sp.random(N, N, density=0.3, random_state=seed, format="csr") + sp.identity(N)
    p = sp.csr_matrix(p)
    x = rng.normal(size=(N, input_dim))
    labels = rng.integers(0, CLASSES, size=N)
    train = rng.random(N) < 0.6
    dims = layer_dims(input_dim, hidden, CLASSES, layers)
    hops = layer_hops(dims)
    params = model.glorot_init(dims, seed=seed, dtype=np.float64, bias=bias)
    # non-zero biases so their effect on the kinks and the loss is exercised
    params = [(w, None if b is None else rng.normal(size=b.shape) * 0.1) for w, b in params]
    n_train_global = int(train.sum()) + 4   # as if other workers held 4 more training rows
    return p, x, labels, train, hops, params, n_train_global


def _objective(params, p, x, labels, train, hops, drop, n_train_global, wd):
    logits, cache = model.forward(params, x, hops, lambda l, m: p @ m, drop)
    loss, dlogits = model.loss_and_grad(logits, labels, train, n_train_global)
    return loss + model.weight_decay_penalty(params, wd), logits, cache, dlogits


@pytest.mark.parametrize("layers", [1, 2, 3])
@pytest.mark.parametrize("input_dim,hidden", [(6, 8), (10, 4)])
@pytest.mark.parametrize("bias", [False, True])
def test_gradients_match_central_differences(layers, input_dim, hidden, bias):
    p, x, labels, train, hops, params, n_train_global = _problem(input_dim, hidden, layers, bias)
    # the chosen dims give both orders across the parametrisation
    assert any(h.transform_first for h in hops) or layers == 1
    drop = model.Dropout(seed=3, epoch=7, rate=0.4, global_ids=np.arange(N))
    wd = 0.05
    calls = []

    def propagate_t(l, g):
        calls.append(l)
        return p.T @ g

    _, _, cache, dlogits = _objective(params, p, x, labels, train, hops, drop,
                                      n_train_global, wd)
    grads = model.backward(params, cache, dlogits, hops, propagate_t)
    model.add_weight_decay(grads, params, wd)
    # propagate_t is called exactly where the schedule has a backward exchange
    assert sorted(calls) == sorted(h.layer for h in hops if h.backward_width > 0)

    eps = 1e-6
    for l in range(layers):
        for which in (0, 1):
            arr = params[l][which]
            if arr is None:
                assert grads[l][which] is None
                continue
            numeric = np.zeros_like(arr)
            for idx in np.ndindex(arr.shape):
                old = arr[idx]
                arr[idx] = old + eps
                up = _objective(params, p, x, labels, train, hops, drop, n_train_global, wd)[0]
                arr[idx] = old - eps
                down = _objective(params, p, x, labels, train, hops, drop, n_train_global, wd)[0]
                arr[idx] = old
                numeric[idx] = (up - down) / (2 * eps)
            np.testing.assert_allclose(grads[l][which], numeric, rtol=1e-5, atol=1e-8,
                                       err_msg=f"layer {l} {'wb'[which]}")


def test_loss_gradient_matches_central_differences():
    """d loss / d logits, with the global training count as divisor."""
    rng = np.random.default_rng(5)
    logits = rng.normal(size=(9, 4)) * 3
    labels = rng.integers(0, 4, size=9)
    train = rng.random(9) < 0.5
    train[0] = True
    loss, d = model.loss_and_grad(logits, labels, train, 11)
    eps = 1e-6
    numeric = np.zeros_like(logits)
    for idx in np.ndindex(logits.shape):
        up, down = logits.copy(), logits.copy()
        up[idx] += eps
        down[idx] -= eps
        numeric[idx] = (model.loss_and_grad(up, labels, train, 11)[0]
                        - model.loss_and_grad(down, labels, train, 11)[0]) / (2 * eps)
    np.testing.assert_allclose(d, numeric, rtol=1e-6, atol=1e-9)
    assert np.all(d[~train] == 0)
    # the value itself: mean cross-entropy written the textbook way, times n_masked / 11
    p = np.exp(logits) / np.exp(logits).sum(axis=1, keepdims=True)
    expected = -np.log(p[train, labels[train]]).sum() / 11
    assert loss == pytest.approx(expected, rel=1e-12)


def test_loss_is_stable_for_huge_logits():
    """log-sum-exp (common practice): no overflow for logits of 1e4."""
    logits = np.array([[1e4, 0.0, -1e4], [0.0, 1e4, 0.0]])
    loss, d = model.loss_and_grad(logits, np.array([0, 0]), np.array([True, True]), 2)
    assert np.isfinite(loss) and np.all(np.isfinite(d))
    assert loss == pytest.approx(1e4 / 2)
