"""GraphSAGE with the mean aggregator (Hamilton, Ying & Leskovec, NeurIPS 2017), from memory.

Layer l: H' = drop_l(H), Z = H' W_self + (D⁻¹A H') W_neigh (+ b), A the adjacency without
self-loops, D⁻¹A its row normalisation (a vertex without neighbours aggregates zero), no
output normalisation; H_{l+1} = ReLU(Z) except on the last layer. `propagate` multiplies
by D⁻¹A (`common.operator_matrix("sage", ...)`), `propagate_t` by its transpose.
Exchange order per `schedule.model_hops`: transform-first sends T = H' W_neigh
(Z = H' W_self + D⁻¹A T), aggregate-first sends H' (Z = H' W_self + (D⁻¹A H') W_neigh).
"""
from __future__ import annotations

import numpy as np

from shardtrain.train.models.common import params_like


def forward(params, x, hops, propagate, drop, local=None):
    h = x
    cache: dict = {"drop": drop, "h": [], "hd": [], "a": []}
    last = len(params) - 1
    for l, ((w_self, w_neigh, b), hop) in enumerate(zip(params, hops)):
        hd = drop(l, h)
        if hop.transform_first:
            a = None
            z = propagate(l, hd @ w_neigh)
        else:
            a = propagate(l, hd)
            z = a @ w_neigh
        z += hd @ w_self
        if b is not None:
            z += b
        cache["h"].append(h)
        cache["hd"].append(hd)
        cache["a"].append(a)
        h = np.maximum(z, 0) if l < last else z
    return h, cache


def backward(params, cache, dlogits, hops, propagate_t):
    """Transform-first: dT = Pᵀ dZ, dW_neigh = H'ᵀ dT, dH' = dZ W_selfᵀ + dT W_neighᵀ.
    Aggregate-first: dW_neigh = (P H')ᵀ dZ, dH' = dZ W_selfᵀ + Pᵀ (dZ W_neighᵀ) (not for
    layer 0). Both: dW_self = H'ᵀ dZ, db = Σ dZ; dropout and ReLU as GCN's."""
    drop = cache["drop"]
    grads = []
    dz = dlogits
    for l in range(len(params) - 1, -1, -1):
        (w_self, w_neigh, b), hop = params[l], hops[l]
        hd, a = cache["hd"][l], cache["a"][l]
        db = dz.sum(axis=0) if b is not None else None
        dw_self = hd.T @ dz
        dhd = None
        if hop.transform_first:
            dt = propagate_t(l, dz)
            dw_neigh = hd.T @ dt
            if l > 0:
                dhd = dz @ w_self.T
                dhd += dt @ w_neigh.T
        else:
            dw_neigh = a.T @ dz
            if l > 0:
                dhd = propagate_t(l, dz @ w_neigh.T)
                dhd += dz @ w_self.T
        grads.append(params_like(params[l], (dw_self, dw_neigh, db)))
        if l > 0:
            dz = drop(l, dhd) * (cache["h"][l] > 0)
    return grads[::-1]
