"""Per-layer exchange schedule: the one place that decides what crosses the wire.

The worker follows it and the survey counts it, so predicted and measured bytes agree
by construction.
"""
from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class LayerHop:
    layer: int
    d_in: int
    d_out: int
    transform_first: bool   # T = H W is exchanged (d_out wide) instead of H (d_in wide)
    forward_width: int      # columns per halo row sent in the forward exchange
    backward_width: int     # columns per halo row sent back in the backward exchange (0: none)


def layer_dims(input_dim: int, hidden: int, classes: int, layers: int) -> list[tuple[int, int]]:
    """(d_in, d_out) of each GCN layer: input -> hidden x (layers-1) -> classes."""
    widths = [input_dim] + [hidden] * (layers - 1) + [classes]
    return list(zip(widths[:-1], widths[1:]))


def layer_hops(dims: list[tuple[int, int]]) -> list[LayerHop]:
    """Transform before the exchange when it shrinks the rows (d_out < d_in).

    Backward: gradients of halo rows go back to their owners at the exchanged width. The
    first layer in aggregate-first order needs none: its input (the features) has no
    gradient, and dW0 = (Â X)_P^T dZ_P is local. In transform-first order it does need
    one, because dT_P collects contributions from every worker that aggregated T_P.
    """
    hops = []
    for layer, (d_in, d_out) in enumerate(dims):
        tf = d_out < d_in
        fwd = d_out if tf else d_in
        bwd = fwd if (tf or layer > 0) else 0
        hops.append(LayerHop(layer, d_in, d_out, tf, fwd, bwd))
    return hops


# the workers' per-epoch stop vote: an all-reduce of [val loss sum, val count] in float64
VOTE_ELEMENTS = 2
VOTE_ITEMSIZE = 8
