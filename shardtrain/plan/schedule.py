"""Per-layer exchange schedule: the one place that decides what crosses the wire.

The worker follows it and the survey counts it, so predicted and measured bytes agree
by construction. Every model of the message-passing family (`MODELS`) has its rule here,
and `layer_param_shapes` gives each layer's parameters (names and shapes), so the survey
counts the all-reduce of any model and the model draws exactly those arrays.
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
    model: str = "gcn"      # one of MODELS
    heads: int = 1          # GAT: attention heads of this layer (d_out is the width per head)
    inner: int = 0          # GIN: width of the layer's MLP (W_a is d_in x inner)


# the message-passing models a run can train (the first is the default)
MODELS = ("gcn", "sage", "gin", "gat")
MAX_HEADS = 1024        # GAT heads per layer we accept


def layer_dims(input_dim: int, hidden: int, classes: int, layers: int, *, model: str = "gcn",
               heads: int = 1) -> list[tuple[int, int]]:
    """(d_in, d_out) of each layer: input -> hidden x (layers-1) -> classes.

    GAT: d_out is the width of one head, and a hidden layer's output (its next layer's d_in)
    is `heads` x hidden (the heads concatenated); the output layer has one head.
    """
    widths = [input_dim] + [hidden] * (layers - 1) + [classes]
    ins = [widths[0]] + [w * (heads if model == "gat" else 1) for w in widths[1:-1]]
    return list(zip(ins, widths[1:]))


def model_hops(dims: list[tuple[int, int]], model: str = "gcn", *, hidden: int = 0,
               heads: int = 1) -> list[LayerHop]:
    """The schedule of `model` over `dims` (`layer_dims` with the same model and heads).

    - gcn: `layer_hops`.
    - sage: the neighbour path D⁻¹A H W_neigh is linear in H like GCN's, so the same rule:
      send H W_neigh (d_out wide) when d_out < d_in, else H; gradients back at that width,
      none for layer 0 in aggregate-first order (dW_neigh = (D⁻¹A H)ᵀ dZ is local).
    - gin: the sum (A + I) H comes before W_a, and (A + I)(H W_a) = ((A + I) H) W_a, so
      send H W_a (`hidden` wide) when hidden < d_in, else H; backward as GCN's.
    - gat: T = H W (heads x d_out wide) is exchanged, always: the attention needs T of
      every neighbour. Its gradient rows (the attention-source terms folded in, see
      `train/models/gat.py`) go back at the same width on every layer, layer 0 included
      (dW = H'ᵀ dT needs every worker's part of dT).
    """
    if model == "gcn":
        return layer_hops(dims)
    if model not in MODELS:
        raise ValueError(f"unknown model {model!r}")
    hops = []
    last = len(dims) - 1
    for layer, (d_in, d_out) in enumerate(dims):
        if model == "gat":
            k = heads if layer < last else 1
            hops.append(LayerHop(layer, d_in, d_out, True, k * d_out, k * d_out, "gat", k))
            continue
        narrow = hidden if model == "gin" else d_out
        tf = narrow < d_in
        fwd = narrow if tf else d_in
        bwd = fwd if (tf or layer > 0) else 0
        hops.append(LayerHop(layer, d_in, d_out, tf, fwd, bwd, model, 1,
                             hidden if model == "gin" else 0))
    return hops


# kinds of parameter: "weight" (Glorot over its two dimensions, in the weight decay when
# in layer 0), "att" (GAT's attention vectors: Glorot of one (d_out x 1) vector per head),
# "bias" (zeros)
def layer_param_shapes(hop: LayerHop, bias: bool) -> list[tuple[str, tuple[int, ...], str]]:
    """(field, shape, kind) of one layer's parameters, in flatten/name order; the saved
    name is field + layer number (w_self0, att_src1, b_a0, ...)."""
    d_in, d_out = hop.d_in, hop.d_out
    out: list[tuple[str, tuple[int, ...], str]]
    if hop.model == "sage":
        out = [("w_self", (d_in, d_out), "weight"), ("w_neigh", (d_in, d_out), "weight")]
        if bias:
            out.append(("b", (d_out,), "bias"))
    elif hop.model == "gin":
        out = [("w_a", (d_in, hop.inner), "weight"), ("w_b", (hop.inner, d_out), "weight")]
        if bias:
            out += [("b_a", (hop.inner,), "bias"), ("b_b", (d_out,), "bias")]
    elif hop.model == "gat":
        k = hop.heads
        out = [("w", (d_in, k * d_out), "weight"), ("att_src", (k, d_out), "att"),
               ("att_dst", (k, d_out), "att")]
        if bias:
            out.append(("b", (k * d_out,), "bias"))
    else:
        out = [("w", (d_in, d_out), "weight")]
        if bias:
            out.append(("b", (d_out,), "bias"))
    return out


def output_width(hop: LayerHop) -> int:
    """Columns of the layer's output (GAT: its heads concatenated)."""
    return hop.heads * hop.d_out


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
