"""GCN maths written out: Glorot init, dropout masks, forward, backward, loss, Adam; and
the parameters, initialisation, weight decay and dispatch of the other models of the
family (`schedule.MODELS`: GraphSAGE, GIN, GAT), whose forward and backward live in
`train/models/` and follow the same rules below.

The model knows nothing of shards or transports. It multiplies by Â only through two
functions it is handed:
- `propagate(layer, M)`: M holds the rows this process owns (n_rows, w); returns
  Â_P [M; M_halo] (n_rows, w). The reference passes `Â @ M`.
- `propagate_t(layer, G)`: returns the owned rows of Â^T G summed over all processes
  (n_rows, w). The reference passes `Â.T @ G` (= `Â @ G`: Â is symmetric).
Each layer follows `schedule.layer_hops(dims)`: transform-first (T = H W, Z = propagate(T))
or aggregate-first (A = propagate(H), Z = A W). The worker and the reference call the very
same `train_step`, which is why partitioned training equals single-process training.

Layer l (Kipf & Welling, ICLR 2017): H_l' = drop_l(H_l), Z_l = Â H_l' W_l (+ b_l),
H_{l+1} = ReLU(Z_l); no ReLU on the last layer; softmax cross-entropy on the training rows.
"""
from __future__ import annotations

from typing import Callable, NamedTuple

import numpy as np

from shardtrain.errors import InputError
from shardtrain.keys import GOLDEN64 as _GOLDEN64
from shardtrain.keys import MASK64 as _MASK64
from shardtrain.keys import splitmix64 as _splitmix64
from shardtrain.plan.schedule import LayerHop, layer_hops, layer_param_shapes
from shardtrain.train.models import gat, gin, sage

Params = list  # per layer: (w, b) for GCN, a SageLayer/GinLayer/GatLayer for the others
Grads = list    # shaped like Params
Propagate = Callable[[int, np.ndarray], np.ndarray]
Drop = Callable[[int, np.ndarray], np.ndarray]


# ---------------------------------------------------------------- parameters

class SageLayer(NamedTuple):
    """GraphSAGE layer parameters (saved as w_self{l}, w_neigh{l}, b{l})."""
    w_self: np.ndarray
    w_neigh: np.ndarray
    b: "np.ndarray | None"


class GinLayer(NamedTuple):
    """GIN layer parameters (saved as w_a{l}, w_b{l}, b_a{l}, b_b{l})."""
    w_a: np.ndarray
    w_b: np.ndarray
    b_a: "np.ndarray | None"
    b_b: "np.ndarray | None"


class GatLayer(NamedTuple):
    """GAT layer parameters (saved as w{l}, att_src{l}, att_dst{l}, b{l})."""
    w: np.ndarray
    att_src: np.ndarray
    att_dst: np.ndarray
    b: "np.ndarray | None"


# a GCN layer is the plain tuple (w, b); the other models' layers are these NamedTuples,
# whose fields are the names of `schedule.layer_param_shapes`
LAYER_TYPES: dict[str, type[SageLayer] | type[GinLayer] | type[GatLayer]] = {
    "sage": SageLayer, "gin": GinLayer, "gat": GatLayer}
GCN_FIELDS = ("w", "b")


def _fields(layer) -> tuple[str, ...]:
    return getattr(layer, "_fields", GCN_FIELDS)


def _layer_of(model: str, values: dict):
    """A layer tuple of `model` from {field: array} (missing biases None)."""
    if model == "gcn":
        return (values["w"], values.get("b"))
    kind = LAYER_TYPES[model]
    fields: list = [values.get(f) for f in kind._fields]
    return kind(*fields)


def _model_of(hops) -> str:
    return hops[0].model if hops else "gcn"


# ---------------------------------------------------------------- initialisation

def glorot_init(dims: list[tuple[int, int]], seed: int, dtype, bias: bool = False,
                hops: list[LayerHop] | None = None) -> Params:
    """Glorot & Bengio (2010) uniform weights, limit sqrt(6 / (fan_in + fan_out)); zero biases.

    Drawn in float64 from one numpy Generator, layer by layer and inside a layer in name
    order (`schedule.layer_param_shapes`), then cast: float32 and float64 runs start from
    the same weights up to rounding. A weight matrix (d_in x d_out) has the fans of its two
    dimensions; GAT's attention array (K x d) is K vectors of d, each Glorot as a (d x 1)
    matrix: limit sqrt(6 / (d + 1)) (from memory of the paper's code). `hops` gives the model
    (`schedule.model_hops`); without it the model is GCN over `dims`.
    """
    rng = np.random.default_rng(seed)
    if hops is None:
        hops = layer_hops(dims)
    model = _model_of(hops)
    params: Params = []
    for hop in hops:
        values = {}
        for field, shape, kind in layer_param_shapes(hop, bias):
            if kind == "bias":
                values[field] = np.zeros(shape, dtype=dtype)
                continue
            fan_in, fan_out = (shape[1], 1) if kind == "att" else shape
            limit = np.sqrt(6.0 / (fan_in + fan_out))
            values[field] = rng.uniform(-limit, limit, size=shape).astype(dtype)
        params.append(_layer_of(model, values))
    return params


def param_names(params: Params) -> list[str]:
    """Names in flatten order: w0, b0 (when biased), w1, ... for GCN; the model's fields
    with the layer number for the others (w_self0, w_neigh0, b0, ...): keys of the
    weights .npz."""
    names = []
    for l, layer in enumerate(params):
        for field, value in zip(_fields(layer), layer):
            if value is not None:
                names.append(f"{field}{l}")
    return names


def copy_params(params: Params) -> Params:
    """A deep copy of the arrays, in the layers' own tuple types."""
    out = []
    for layer in params:
        values = [None if a is None else a.copy() for a in layer]
        out.append(type(layer)(*values) if hasattr(layer, "_fields") else tuple(values))
    return out


def params_to_arrays(params: Params) -> dict[str, np.ndarray]:
    """{name: array} for saving (see `param_names`)."""
    return dict(zip(param_names(params), _leaves(params)))


def params_from_arrays(arrays, dims: list[tuple[int, int]], bias: bool, dtype,
                       source: str = "weights", hops: list[LayerHop] | None = None) -> Params:
    """Check names and shapes against the model and return Params in `dtype`.

    `arrays` is any mapping name -> array (e.g. an opened .npz). Errors name `source`.
    `hops` gives the model (`schedule.model_hops`); without it, GCN over `dims`.
    """
    if hops is None:
        hops = layer_hops(dims)
    model = _model_of(hops)
    params: Params = []
    expected = set()
    for l, hop in enumerate(hops):
        got = {}
        for field, shape, _ in layer_param_shapes(hop, bias):
            key = f"{field}{l}"
            expected.add(key)
            if key not in arrays:
                raise InputError(f"{source}: missing array '{key}' (expected shape {shape})")
            a = np.asarray(arrays[key])
            if a.shape != shape:
                raise InputError(f"{source}: array '{key}' has shape {a.shape}, "
                                 f"the model needs {shape}")
            if not np.issubdtype(a.dtype, np.floating) or not np.all(np.isfinite(a)):
                raise InputError(f"{source}: array '{key}' must be finite floating point")
            got[field] = a.astype(dtype, copy=True)
        params.append(_layer_of(model, got))
    extra = sorted(set(arrays.keys()) - expected)
    if extra:
        name = "" if model == "gcn" else f" {model}"
        raise InputError(f"{source}: unexpected array '{extra[0]}' for a {len(hops)}-layer"
                         f"{name} model {'with' if bias else 'without'} bias")
    return params


# ---------------------------------------------------------------- dropout masks

# _splitmix64 and its constants: shardtrain.keys (one copy for every stage)


def _row_keys(seed: int, epoch: int, layer: int, global_ids: np.ndarray) -> np.ndarray:
    """One 32-bit key per vertex: SplitMix64 of (key of (seed, epoch, layer)) + id * golden."""
    base = _splitmix64(_splitmix64(_splitmix64(int(seed) & _MASK64) ^ (int(epoch) & _MASK64))
                       ^ (int(layer) & _MASK64))
    x = np.asarray(global_ids).astype(np.uint64)
    x *= np.uint64(_GOLDEN64)
    x += np.uint64(base)
    x ^= x >> np.uint64(30)
    x *= np.uint64(0xBF58476D1CE4E5B9)
    x ^= x >> np.uint64(27)
    x *= np.uint64(0x94D049BB133111EB)
    x ^= x >> np.uint64(31)
    return (x >> np.uint64(32)).astype(np.uint32)


def dropout_mask(seed: int, epoch: int, layer: int, global_ids: np.ndarray, width: int,
                 rate: float, dtype) -> np.ndarray | None:
    """Inverted-dropout mask (len(global_ids), width) of 0 or 1/(1-rate); None when rate is 0.

    Counter-based: entry (v, c) depends only on (seed, epoch, layer, global id v, column c),
    so any subset of vertices in any order gets exactly the rows the full graph gets.
    Each vertex gets a 32-bit key (high half of SplitMix64 of a key of (seed, epoch, layer)
    plus id * golden ratio); each pair of columns one 32-bit MurmurHash3 finaliser (Appleby)
    of vertex key + pair * constant, split into two 16-bit uniforms. The kept
    probability is therefore 1 - rate rounded to a multiple of 2^-16 (exact for 0.5), and the
    scale is the inverse of that kept probability. Little-endian machines assumed (the split
    of a 32-bit hash into its 16-bit halves).
    """
    if rate == 0:
        return None
    mask = keep_mask(seed, epoch, layer, global_ids, width, rate).astype(dtype)
    mask *= mask_scale(rate, dtype)
    return mask


def mask_scale(rate: float, dtype):
    """The inverted-dropout scale 1 / P(kept), P(kept) a multiple of 2^-16 (see dropout_mask)."""
    return np.dtype(dtype).type(65536.0 / (65536 - _threshold(rate)))


def _threshold(rate: float) -> int:
    return min(int(round(rate * 65536)), 65535)


def keep_mask(seed: int, epoch: int, layer: int, global_ids: np.ndarray, width: int,
              rate: float) -> np.ndarray:
    """Boolean (len(global_ids), width): True where `dropout_mask` is the scale, not 0."""
    ids = np.asarray(global_ids)
    n = ids.shape[0]
    half = (width + 1) // 2
    keys = _row_keys(seed, epoch, layer, ids)
    pair_keys = np.arange(half, dtype=np.uint32) * np.uint32(0x85EBCA77)
    threshold = np.uint16(_threshold(rate))
    keep = np.empty((n, width), dtype=bool)
    # Blocks of rows small enough (~256 KiB) that the hash passes stay in cache, faster than
    # whole-array passes (benchmarks/bench_reference.py times the masks). The loop runs over
    # blocks, not vertices.
    block = _block_rows(half)
    x = np.empty((min(block, n), half), dtype=np.uint32)
    t = np.empty_like(x)
    for start in range(0, n, block):
        stop = min(start + block, n)
        xs, ts = x[:stop - start], t[:stop - start]
        np.add(keys[start:stop, None], pair_keys[None, :], out=xs)
        _fmix32(xs, ts)
        np.greater_equal(xs.view(np.uint16)[:, :width], threshold, out=keep[start:stop])
    return keep


_BLOCK_WORDS = 1 << 16


def _block_rows(words_per_row: int) -> int:
    return max(1, _BLOCK_WORDS // max(words_per_row, 1))


def _fmix32(x: np.ndarray, t: np.ndarray) -> None:
    """MurmurHash3's 32-bit finaliser (Appleby), in place; t is scratch of x's shape."""
    np.right_shift(x, 16, out=t)
    x ^= t
    x *= np.uint32(0x85EBCA6B)
    np.right_shift(x, 13, out=t)
    x ^= t
    x *= np.uint32(0xC2B2AE35)
    np.right_shift(x, 16, out=t)
    x ^= t


def apply_keep(h: np.ndarray, keep: np.ndarray, scale) -> np.ndarray:
    """h * dropout_mask, bit for bit (h * 1 * s == h * s, h * 0 * s == h * 0), without
    building the float mask: block by block, so each block is written once while in cache."""
    out = np.empty_like(h)
    block = _block_rows(h.shape[1])
    for start in range(0, h.shape[0], block):
        o = out[start:start + block]
        np.multiply(h[start:start + block], keep[start:start + block], out=o)
        o *= scale
    return out


class Dropout:
    """drop(layer, h) for one epoch of one process: h * mask.

    Inverted dropout is an elementwise linear map, so it is its own adjoint: `backward`
    calls the same drop on the gradient. Masks are kept as booleans (a quarter of a float32
    mask) and only for layers >= 1, which `backward` asks for a second time; layer 0's is
    not kept (nothing differentiates through the features). A rate of 0 makes it the
    identity. `global_ids` are the global ids of the rows, in row order.
    """

    def __init__(self, seed: int, epoch: int, rate: float, global_ids: np.ndarray):
        self.seed, self.epoch, self.rate = seed, epoch, rate
        self.global_ids = global_ids
        self._keep: dict[int, np.ndarray] = {}

    def __call__(self, layer: int, h: np.ndarray) -> np.ndarray:
        if self.rate == 0:
            return h
        keep = self._keep.get(layer)
        if keep is None or keep.shape != h.shape:
            keep = keep_mask(self.seed, self.epoch, layer, self.global_ids, h.shape[1],
                             self.rate)
            if layer > 0:
                self._keep[layer] = keep
        return apply_keep(h, keep, mask_scale(self.rate, h.dtype))


def no_dropout(layer: int, h: np.ndarray) -> np.ndarray:
    """The evaluation drop: identity."""
    return h


# ---------------------------------------------------------------- forward and backward

_OTHER_MODELS = {"sage": sage, "gin": gin, "gat": gat}


def forward(params: Params, x: np.ndarray, hops: list[LayerHop], propagate: Propagate,
            drop: Drop, local=None) -> tuple[np.ndarray, dict]:
    """Logits of the rows this process owns, and what backward needs.

    `drop(layer, h)` must be elementwise and linear in h (h * mask, or the identity);
    backward applies the same drop to the gradient of the dropped input. `propagate` must
    return a fresh array (the bias is added to it in place). The model is `hops[0].model`:
    GCN here, the others in `train/models/` (GAT also needs `local`, a
    `models.common.LocalGraph`, and `propagate` returning [M; M_halo]).
    """
    if _model_of(hops) != "gcn":
        return _OTHER_MODELS[_model_of(hops)].forward(params, x, hops, propagate, drop, local)
    h = x
    cache: dict = {"drop": drop, "h": [], "hd": [], "a": []}
    last = len(params) - 1
    for l, ((w, b), hop) in enumerate(zip(params, hops)):
        hd = drop(l, h)
        if hop.transform_first:
            a = None
            z = propagate(l, hd @ w)
        else:
            a = propagate(l, hd)
            z = a @ w
        if b is not None:
            z += b
        cache["h"].append(h)
        cache["hd"].append(hd)
        cache["a"].append(a)
        h = np.maximum(z, 0) if l < last else z
    return h, cache


def backward(params: Params, cache: dict, dlogits: np.ndarray, hops: list[LayerHop],
             propagate_t: Propagate) -> Grads:
    """Weight (and bias) gradients per layer; partial sums over this process's rows.

    Transform-first:  dT = Âᵀ dZ,  dW = H'ᵀ dT,  dH' = dT Wᵀ.
    Aggregate-first:  dW = Aᵀ dZ,  dA = dZ Wᵀ,  dH' = Âᵀ dA (skipped for layer 0:
    the features need no gradient, so layer 0 then has no backward exchange).
    Dropout: dH = drop(dH'); ReLU: dZ_{l-1} = dH * [H > 0].
    (GCN; the other models' backward is in `train/models/`.)
    """
    if _model_of(hops) != "gcn":
        return _OTHER_MODELS[_model_of(hops)].backward(params, cache, dlogits, hops,
                                                       propagate_t)
    drop = cache["drop"]
    grads: Grads = [None] * len(params)
    dz = dlogits
    for l in range(len(params) - 1, -1, -1):
        (w, b), hop = params[l], hops[l]
        hd, a = cache["hd"][l], cache["a"][l]
        db = dz.sum(axis=0) if b is not None else None
        if hop.transform_first:
            dt = propagate_t(l, dz)
            dw = hd.T @ dt
            dhd = dt @ w.T if l > 0 else None
        else:
            dw = a.T @ dz
            dhd = propagate_t(l, dz @ w.T) if l > 0 else None
        grads[l] = (dw, db)
        if l > 0:
            dz = drop(l, dhd) * (cache["h"][l] > 0)   # not in place: may be the caller's buffer
    return grads


# ---------------------------------------------------------------- objective

def loss_and_grad(logits: np.ndarray, labels: np.ndarray, train_mask: np.ndarray,
                  n_train_global: int) -> tuple[float, np.ndarray]:
    """This process's part of the mean softmax cross-entropy over all training vertices.

    Sum over the masked rows divided by the GLOBAL training count, so the parts of all
    processes add up to the mean. Log-sum-exp for stability. dlogits is 0 off the mask.
    """
    dlogits = np.zeros_like(logits)
    rows = np.flatnonzero(train_mask)
    if rows.size == 0:
        return 0.0, dlogits
    z = logits[rows]
    z = z - z.max(axis=1, keepdims=True)
    lse = np.log(np.exp(z).sum(axis=1, keepdims=True))
    logp = z - lse
    y = np.asarray(labels)[rows]
    loss = -float(logp[np.arange(rows.size), y].sum()) / n_train_global
    p = np.exp(logp)
    p[np.arange(rows.size), y] -= 1
    dlogits[rows] = p / np.asarray(n_train_global, dtype=logits.dtype)
    return loss, dlogits


def cross_entropy_sum(logits: np.ndarray, labels: np.ndarray, mask) -> tuple[float, int]:
    """(sum of the softmax cross-entropy over the masked rows, number of masked rows).

    The validation loss of an epoch is the sum over all processes divided by the summed
    count (the GLOBAL number of validation vertices): the same definition in the reference
    and the workers, with `loss_and_grad`'s log-sum-exp. (0.0, 0) for a None or empty mask.
    """
    if mask is None:
        return 0.0, 0
    rows = np.flatnonzero(mask)
    if rows.size == 0:
        return 0.0, 0
    z = logits[rows]
    z = z - z.max(axis=1, keepdims=True)
    lse = np.log(np.exp(z).sum(axis=1))
    y = np.asarray(labels)[rows]
    return float((lse - z[np.arange(rows.size), y]).sum()), int(rows.size)


def mean_loss(total: float, count: int) -> float | None:
    """total / count, or None (JSON null) when there is nothing to average."""
    return None if count == 0 else float(total) / count


def _first_weights(layer) -> list[int]:
    """Positions of the weight matrices in a layer tuple (fields named w...)."""
    return [i for i, f in enumerate(_fields(layer)) if f.startswith("w")]


def weight_decay_penalty(params: Params, wd: float) -> float:
    """wd * 0.5 * sum of ||W||^2 over the first layer's weight matrices (Kipf & Welling
    2017: W0 for GCN; w_self0 + w_neigh0, w_a0 + w_b0, w0 for the others; GAT's
    attention vectors and all biases are not decayed)."""
    total = 0.0
    for i in _first_weights(params[0]):
        w0 = params[0][i]
        total += float(np.dot(w0.ravel(), w0.ravel()))
    return float(wd) * 0.5 * total


def add_weight_decay(grads: Grads, params: Params, wd: float) -> None:
    """dW += wd * W for the first layer's weight matrices, in place (after the all-reduce,
    so it is added once)."""
    if wd:
        for i in _first_weights(params[0]):
            grads[0][i][...] += params[0][i].dtype.type(wd) * params[0][i]


# ---------------------------------------------------------------- flat gradient vector

def _leaves(tree) -> list[np.ndarray]:
    return [a for layer in tree for a in layer if a is not None]


def flatten(grads: Grads) -> np.ndarray:
    """One contiguous 1-D array in the order w0, b0, w1, ... (what the all-reduce sums)."""
    return np.concatenate([g.ravel() for g in _leaves(grads)])


def unflatten(flat: np.ndarray, like_params: Params) -> Grads:
    """Split a flat vector back into per-layer (dw, db) shaped like `like_params` (views)."""
    out: Grads = []
    pos = 0
    for layer in like_params:
        values: list = []
        for p in layer:
            if p is None:
                values.append(None)
                continue
            values.append(flat[pos:pos + p.size].reshape(p.shape))
            pos += p.size
        out.append(type(layer)(*values) if hasattr(layer, "_fields") else tuple(values))
    if pos != flat.size:
        raise ValueError(f"flat gradient has {flat.size} entries, the model {pos}")
    return out


# ---------------------------------------------------------------- Adam

class Adam:
    """Adam (Kingma & Ba 2015, Algorithm 1) with bias correction, updating params in place."""

    def __init__(self, params: Params, lr: float, beta1: float = 0.9, beta2: float = 0.999,
                 eps: float = 1e-8):
        self.lr, self.beta1, self.beta2, self.eps = lr, beta1, beta2, eps
        self.names = param_names(params)
        self.m = [np.zeros_like(p) for p in _leaves(params)]
        self.v = [np.zeros_like(p) for p in _leaves(params)]
        self.t = 0

    def step(self, params: Params, grads: Grads) -> None:
        self.t += 1
        b1, b2, t = self.beta1, self.beta2, self.t
        c1 = 1.0 - b1 ** t
        c2 = 1.0 - b2 ** t
        for p, g, m, v in zip(_leaves(params), _leaves(grads), self.m, self.v):
            dt = p.dtype.type
            m *= dt(b1)
            m += dt(1.0 - b1) * g                      # m_t = b1 m + (1 - b1) g
            v *= dt(b2)
            v += dt(1.0 - b2) * (g * g)                # v_t = b2 v + (1 - b2) g^2
            m_hat = m / dt(c1)
            v_hat = v / dt(c2)
            p -= dt(self.lr) * m_hat / (np.sqrt(v_hat) + dt(self.eps))

    def state(self) -> dict[str, np.ndarray]:
        """Checkpoint arrays: adam_t, adam_m_<name>, adam_v_<name>."""
        d = {"adam_t": np.asarray(self.t, dtype=np.int64)}
        for name, m, v in zip(self.names, self.m, self.v):
            d[f"adam_m_{name}"] = m.copy()
            d[f"adam_v_{name}"] = v.copy()
        return d

    def load_state(self, d, source: str = "checkpoint") -> None:
        if "adam_t" not in d:
            raise InputError(f"{source}: missing array 'adam_t'")
        t = int(np.asarray(d["adam_t"]))
        for i, name in enumerate(self.names):
            for kind, store in (("m", self.m), ("v", self.v)):
                key = f"adam_{kind}_{name}"
                if key not in d:
                    raise InputError(f"{source}: missing array '{key}'")
                a = np.asarray(d[key])
                if a.shape != store[i].shape:
                    raise InputError(f"{source}: array '{key}' has shape {a.shape}, "
                                     f"expected {store[i].shape}")
                store[i][...] = a
        self.t = t


# ---------------------------------------------------------------- one training step

def train_step(params: Params, adam: Adam, x: np.ndarray, labels: np.ndarray,
               train_mask: np.ndarray, n_train_global: int, hops: list[LayerHop],
               propagate: Propagate, propagate_t: Propagate, drop: Drop,
               allreduce: Callable[[np.ndarray], None], weight_decay: float,
               local=None) -> float:
    """Forward, loss, backward, all-reduce of the flat gradient, weight decay, Adam step.

    Returns this process's loss part (without the weight-decay penalty; compute that with
    `weight_decay_penalty` BEFORE the step, at the weights this forward used).
    """
    logits, cache = forward(params, x, hops, propagate, drop, local)
    loss_part, dlogits = loss_and_grad(logits, labels, train_mask, n_train_global)
    del logits
    grads = backward(params, cache, dlogits, hops, propagate_t)
    del cache
    flat = flatten(grads)
    allreduce(flat)
    grads = unflatten(flat, params)
    add_weight_decay(grads, params, weight_decay)
    adam.step(params, grads)
    return loss_part


def correct_counts(logits: np.ndarray, labels: np.ndarray, masks: list) -> list[int]:
    """Correct argmax predictions inside each mask (0 for a None mask)."""
    pred = np.argmax(logits, axis=1)
    hit = pred == np.asarray(labels)
    return [0 if m is None else int(np.count_nonzero(hit & m)) for m in masks]


def accuracy(correct: int, total: int) -> float | None:
    """correct / total, or None (JSON null) for an empty or missing split."""
    return None if total == 0 else correct / total
