"""GIN-0 (Xu, Hu, Leskovec & Jegelka, ICLR 2019; ε = 0), from memory.

Layer l: H' = drop_l(H), U = H' + A H' = (A + I) H', Z = MLP(U) with
MLP(U) = ReLU(U W_a (+ b_a)) W_b (+ b_b), the MLP's width `--hidden`; H_{l+1} = ReLU(Z)
except on the last layer. `propagate` multiplies by A + I
(`common.operator_matrix("gin", ...)`, symmetric). Exchange order per
`schedule.model_hops`: transform-first sends T = H' W_a (P1 = (A + I) T), aggregate-first
sends H' (P1 = U W_a); the two are equal because (A + I)(H' W_a) = ((A + I) H') W_a.
"""
from __future__ import annotations

import numpy as np

from shardtrain.train.models.common import params_like


def forward(params, x, hops, propagate, drop, local=None):
    h = x
    cache: dict = {"drop": drop, "h": [], "hd": [], "u": [], "p1": [], "q": []}
    last = len(params) - 1
    for l, ((w_a, w_b, b_a, b_b), hop) in enumerate(zip(params, hops)):
        hd = drop(l, h)
        if hop.transform_first:
            u = None
            p1 = propagate(l, hd @ w_a)
        else:
            u = propagate(l, hd)
            p1 = u @ w_a
        if b_a is not None:
            p1 += b_a
        q = np.maximum(p1, 0)
        z = q @ w_b
        if b_b is not None:
            z += b_b
        for key, value in (("h", h), ("hd", hd), ("u", u), ("p1", p1), ("q", q)):
            cache[key].append(value)
        h = np.maximum(z, 0) if l < last else z
    return h, cache


def backward(params, cache, dlogits, hops, propagate_t):
    """dW_b = Qᵀ dZ, dQ = dZ W_bᵀ, dP1 = dQ [P1 > 0]; transform-first: dT = Pᵀ dP1,
    dW_a = H'ᵀ dT, dH' = dT W_aᵀ; aggregate-first: dW_a = Uᵀ dP1, dH' = Pᵀ (dP1 W_aᵀ) (not
    for layer 0); biases the column sums; dropout and ReLU between layers as GCN's."""
    drop = cache["drop"]
    grads = []
    dz = dlogits
    for l in range(len(params) - 1, -1, -1):
        (w_a, w_b, b_a, b_b), hop = params[l], hops[l]
        hd, u, p1, q = cache["hd"][l], cache["u"][l], cache["p1"][l], cache["q"][l]
        db_b = dz.sum(axis=0) if b_b is not None else None
        dw_b = q.T @ dz
        dp1 = (dz @ w_b.T) * (p1 > 0)
        db_a = dp1.sum(axis=0) if b_a is not None else None
        dhd = None
        if hop.transform_first:
            dt = propagate_t(l, dp1)
            dw_a = hd.T @ dt
            if l > 0:
                dhd = dt @ w_a.T
        else:
            dw_a = u.T @ dp1
            if l > 0:
                dhd = propagate_t(l, dp1 @ w_a.T)
        grads.append(params_like(params[l], (dw_a, dw_b, db_a, db_b)))
        if l > 0:
            dz = drop(l, dhd) * (cache["h"][l] > 0)
    return grads[::-1]
