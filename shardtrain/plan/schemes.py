"""Halo schemes: what a training exchange sends instead of every halo row, exact.

A `HaloScheme` is the per-run description of how the TRAINING halo exchanges (forward and
backward) differ from the exact ones; the evaluation forward (direction "eval") is always
the exact exchange of the full halo in the training dtype. Everything here is what both
the trainer and the survey need, so it lives in the plan stage (the survey may not import
train/): the keyed random choices, the wire widths, and the payload they cause.

Boundary-node sampling (`keep` = P < 1): Wan et al., "BNS-GCN: Efficient Full-Graph
Training of Graph Convolutional Networks with Partition-Parallelism and Random Boundary
Node Sampling", MLSys 2022. Definition implemented (from memory of the paper): in every
training epoch each worker p keeps each of its halo (boundary) vertices independently with
probability P and drops the others for that whole epoch (all layers, forward and
backward). A dropped halo vertex's column is removed from Â_P (its rows never cross the
wire, in either direction); a kept halo column of Â_P is scaled by 1/P, so that
E[Ã_P H] = Â_P H (an unbiased estimate of the full aggregation, as the paper's variance
argument assumes). Â keeps the normalisation of the FULL graph (degrees are not recomputed
on the sampled graph), and the owned columns are never dropped or scaled. The backward pass
is the exact gradient of that sampled forward (Ã_Pᵀ), so only the kept halo rows' gradients
go back to their owners, scaled by 1/P. P is used as a multiple of 2^-32 (`keep_threshold`);
the scale is the inverse of that kept probability. Evaluation uses the full graph, exact.

Which halo vertices worker p keeps in epoch e is counter-based: vertex v is kept when the
high 32 bits of a SplitMix64 hash of (seed, stream KEEP, e, p, global id v) lie below
`keep_threshold(P)` (`halo_keep_mask`). It depends on no row order and no process layout
beyond the worker the vertex is a halo of, so the SENDER q of p's halo rows computes the
same choice for its send rows to p with p's key, and no control traffic is needed; the
survey replays it to predict the payload of every epoch.

Compressed rows (`format`): the training exchanges carry rows as float32, float16,
bfloat16 or int8 (`FORMATS`); None means the training dtype (exact). The codecs are in
`shardtrain.train.compress`; their wire layout (what the payload counts) is here:
`row_bytes(width)` = width * 4 (float32), width * 2 (float16, bfloat16: uint16 on the
wire), width + 4 (int8: one byte per entry plus a float32 scale per row).

Stale halos with an overlapped exchange (`stale`): Wan et al., "PipeGCN: Efficient
Full-Graph Training of Graph Convolutional Networks with Pipelined Feature Communication",
ICLR 2022. Definition implemented (from memory of the paper; the warm-up and the rule under
sampling are ours, stated here): training epoch t uses, for every layer, the halo rows and
the halo gradients that epoch t-1 computed, so the exchange of epoch t's rows is started as
soon as they are computed and only has to complete before epoch t+1 needs them: it runs
while the rest of epoch t (and its evaluation) computes. Per layer l of epoch t >= 2, on
worker p:
- forward:  Z = A_oo M(t) + A_oh H(t-1), H(t-1) the rows of M(t-1) its owners sent in
  epoch t-1; the rows of M(t) are sent now, for epoch t+1;
- backward: out = A_ooᵀ G(t) + Σ_q (the gradients q computed for p's rows in epoch t-1);
  p's own halo gradients (A_ohᵀ G(t)) are sent now, for epoch t+1.
So the step is NOT the gradient of its own forward (stale gradients, as in the paper).
Epoch 1 (the warm-up) exchanges synchronously, exactly, and its rows serve epoch 1 and
again epoch 2: the paper starts its pipeline the same way (from memory), and zeros instead
would make epoch 1 a model without edges between shards, a large spurious error. Every
epoch (the last one too, its rows then unused; it is waited for after the loop) exchanges
its rows once, so without sampling the payload of every epoch is the synchronous run's.
Under sampling (`keep` < 1) the halo of epoch t-1 is used whole: the halo vertices kept,
their 1/P scale AND their rows. The forward exchange of epoch t carries the rows kept under
epoch t's key (as the synchronous run); epoch t's propagation uses the sampled Â_P of
epoch s(t) = max(t-1, 1) (the keep set of the rows it holds), forward and backward; so the
BACKWARD exchange of epoch t carries the gradients of the halo columns kept in epoch s(t):
epochs 1 and 2 both send epoch 1's kept rows, epoch t >= 2 sends epoch t-1's
(`backward_keep_epochs`). Compressed rows are encoded under the key of the epoch that
sends them.
Smoothing (`smooth` = γ > 0, the paper's smoothing variant, from memory): what epoch t uses
is an exponential moving average of the stale rows, U(1) = R(1) (the warm-up's rows), U(t)
= γ U(t-1) + (1 - γ) R(t-1) for t >= 2, R the received rows (decoded), kept per halo row
forward and per (owner row, sending peer) backward. It needs `stale` and every halo row
(keep 1: a sampled row has no running average). 0 <= γ < 1; 0 is plain stale.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from shardtrain import defaults
from shardtrain.errors import ParameterError, option
from shardtrain.keys import GOLDEN64 as _GOLDEN64
from shardtrain.keys import MASK64 as _MASK64
from shardtrain.keys import splitmix64 as _splitmix64
from shardtrain.plan.schedule import LayerHop
from shardtrain.transport.wire import KIND_HALO

FORMATS = ("float32", "float16", "bfloat16", "int8")
# the numpy dtype each format travels as (bfloat16 as its 16 raw bits)
WIRE_DTYPES: dict[str, np.dtype] = {"float32": np.dtype("<f4"), "float16": np.dtype("<f2"),
               "bfloat16": np.dtype("<u2"), "int8": np.dtype("i1")}
INT8_SCALE_BYTES = 4          # the per-row float32 scale of an int8 row, on the wire
KEEP_ONE = 1 << 32            # keep_threshold of P = 1: every halo vertex kept

# stream tags: the keyed hashes of one scheme never collide with another's or dropout's
STREAM_KEEP = 0x4B454550      # "KEEP"
STREAM_ROUND = 0x524F554E     # "ROUN"
DIRECTION_CODES = {"forward": 1, "backward": 2}


@dataclass(frozen=True)
class HaloScheme:
    """keep: fraction P of halo vertices each worker keeps per epoch (0 < P <= 1);
    format: wire format of training halo rows (None: the training dtype, exact);
    stale: epoch t uses epoch t-1's halo rows and gradients, exchanged meanwhile;
    smooth: γ of the moving average of stale rows (0: none)."""

    keep: float = defaults.HALO_KEEP
    format: str | None = defaults.HALO_FORMAT
    stale: bool = defaults.HALO_STALE
    smooth: float = defaults.HALO_SMOOTH

    def check(self) -> "HaloScheme":
        """ParameterError naming `halo_keep` or `halo_format`."""
        k = self.keep
        if (isinstance(k, bool) or not isinstance(k, (int, float, np.integer, np.floating))
                or not np.isfinite(k) or not 0 < k <= 1):
            raise ParameterError("halo_keep", "must be a fraction P with 0 < P <= 1",
                                 value=repr(k))
        if self.format is not None and self.format not in FORMATS:
            raise ParameterError("halo_format", f"expected one of {', '.join(FORMATS)}",
                                 value=repr(self.format))
        if not isinstance(self.stale, (bool, np.bool_)):
            raise ParameterError("halo_stale", "must be true or false", value=repr(self.stale))
        g = self.smooth
        if (isinstance(g, bool) or not isinstance(g, (int, float, np.integer, np.floating))
                or not np.isfinite(g) or not 0 <= g < 1):
            raise ParameterError("halo_smooth", "must be a factor γ with 0 <= γ < 1",
                                 value=repr(g))
        if g and not self.stale:
            raise ParameterError("halo_smooth", "smooths stale halo rows: give "
                                 "halo_stale as well", value=repr(g))
        if g and self.sampled:
            raise ParameterError("halo_smooth", "needs every halo row kept (halo_keep 1): "
                                 "a sampled row has no running average", value=repr(g))
        return self

    @property
    def sampled(self) -> bool:
        return keep_threshold(self.keep) < KEEP_ONE

    def compressed(self, dtype) -> bool:
        """Whether rows change on the wire for a run in `dtype`."""
        return self.format is not None and self.format != np.dtype(dtype).name

    def exact(self, dtype) -> bool:
        return not self.sampled and not self.compressed(dtype) and not self.stale

    def wire_dtype(self, dtype) -> np.dtype:
        return np.dtype(dtype) if not self.compressed(dtype) else WIRE_DTYPES[str(self.format)]

    def row_bytes(self, width: int, dtype) -> int:
        """Payload bytes of one halo row `width` wide in a training exchange."""
        if not self.compressed(dtype):
            return int(width) * np.dtype(dtype).itemsize
        if self.format == "int8":
            return int(width) + INT8_SCALE_BYTES if width else 0
        return int(width) * WIRE_DTYPES[str(self.format)].itemsize

    def wire_width(self, width: int, dtype) -> int:
        """Columns of the wire array of a row `width` wide (int8: + 4 scale bytes)."""
        if self.compressed(dtype) and self.format == "int8":
            return int(width) + INT8_SCALE_BYTES
        return int(width)

    def to_dict(self) -> dict:
        return {"halo_keep": float(self.keep), "halo_format": self.format,
                "halo_stale": bool(self.stale), "halo_smooth": float(self.smooth)}


def scheme_of(settings) -> HaloScheme:
    """The scheme a TrainSettings (or SurveySettings) describes, checked. The schemes act on
    a model's halo product by a fixed operator (GCN's Â, SAGE's D⁻¹A, GIN's A + I); GAT's
    attention is no fixed operator, and GAT refuses a scheme."""
    scheme = HaloScheme(getattr(settings, "halo_keep", defaults.HALO_KEEP),
                        getattr(settings, "halo_format", defaults.HALO_FORMAT),
                        getattr(settings, "halo_stale", defaults.HALO_STALE),
                        getattr(settings, "halo_smooth", defaults.HALO_SMOOTH)).check()
    model = getattr(settings, "model", defaults.MODEL)
    dtype = np.dtype(getattr(settings, "dtype", defaults.DTYPE))
    if model == "gat" and not scheme.exact(dtype):
        param = ("halo_keep" if scheme.sampled else
                 "halo_stale" if scheme.stale else "halo_format")
        raise ParameterError(param, f"a halo scheme is not available with {option('model')} "
                                    f"gat (its attention is no fixed halo operator)")
    return scheme


def scheme_of_entry(entry: dict | None) -> HaloScheme:
    """The scheme of a document's "halo_scheme" entry (a survey's, a run's), checked."""
    entry = entry or {}
    return HaloScheme(entry.get("halo_keep", defaults.HALO_KEEP),
                      entry.get("halo_format", defaults.HALO_FORMAT),
                      bool(entry.get("halo_stale", defaults.HALO_STALE)),
                      entry.get("halo_smooth", defaults.HALO_SMOOTH)).check()


def keep_epoch_used(epoch: int, stale: bool, first: int = 1) -> int:
    """The epoch whose keep set (and, stale, rows) training `epoch` propagates with:
    itself, or under `stale` s(t) = max(t - 1, first)."""
    return max(epoch - 1, first) if stale else epoch


def backward_keep_epochs(epochs: range, stale: bool) -> list[int]:
    """The keep epoch of each epoch's BACKWARD exchange (see the module text)."""
    return [keep_epoch_used(e, stale, epochs.start) for e in epochs]


# ---------------------------------------------------------------- keyed hashes

# _splitmix64 and its constants: shardtrain.keys (one copy for every stage)


def stream_key(*words: int) -> int:
    """One 64-bit key of a tuple of integers (chained SplitMix64)."""
    key = 0
    for w in words:
        key = _splitmix64(key ^ (int(w) & _MASK64))
    return key


def vertex_hash(key: int, global_ids: np.ndarray) -> np.ndarray:
    """uint64 per vertex: SplitMix64 of key + id * golden ratio (vectorised)."""
    x = np.asarray(global_ids).astype(np.uint64)
    x *= np.uint64(_GOLDEN64)
    x += np.uint64(key)
    x ^= x >> np.uint64(30)
    x *= np.uint64(0xBF58476D1CE4E5B9)
    x ^= x >> np.uint64(27)
    x *= np.uint64(0x94D049BB133111EB)
    x ^= x >> np.uint64(31)
    return x


def keep_threshold(keep: float) -> int:
    """P as a multiple of 2^-32, at least 1: vertex kept when its 32-bit hash < this."""
    return int(min(max(round(float(keep) * KEEP_ONE), 1), KEEP_ONE))


def keep_scale(keep: float) -> float:
    """1 / (kept probability): the factor of a kept halo column (1.0 when P = 1)."""
    return KEEP_ONE / keep_threshold(keep)


def halo_keep_mask(seed: int, epoch: int, worker: int, global_ids: np.ndarray,
                   keep: float) -> np.ndarray:
    """Boolean per vertex: does `worker` keep halo vertex v (by global id) in `epoch`."""
    ids = np.asarray(global_ids)
    threshold = keep_threshold(keep)
    if threshold >= KEEP_ONE:
        return np.ones(ids.shape[0], dtype=bool)
    h = vertex_hash(stream_key(seed, STREAM_KEEP, epoch, worker), ids) >> np.uint64(32)
    return h < np.uint64(threshold)


# ---------------------------------------------------------------- predicted payload

def worker_kept_rows(halo: np.ndarray, halo_ptr, worker: int, scheme: HaloScheme,
                     seed: int, epochs: range) -> np.ndarray:
    """(len(epochs), k) int64: rows of `worker`'s halo owned by q that it keeps in each
    epoch (the replay of `halo_keep_mask`; the full counts when nothing is sampled).
    `halo` are its halo global ids, grouped by owner as `halo_ptr` says."""
    ptr = np.asarray(halo_ptr, dtype=np.int64)
    k = ptr.shape[0] - 1
    owner = np.repeat(np.arange(k), np.diff(ptr))
    out = np.zeros((len(epochs), k), dtype=np.int64)
    for i, e in enumerate(epochs):         # a loop over epochs, not vertices
        kept = halo_keep_mask(seed, e, worker, halo, scheme.keep)
        out[i] = np.bincount(owner[kept], minlength=k)
    return out


def kept_halo_rows(halos: list[np.ndarray], halo_ptrs: list, scheme: HaloScheme, seed: int,
                   epochs: range) -> np.ndarray:
    """(len(epochs), k, k) int64: `worker_kept_rows` of every worker p (in worker order)."""
    return np.stack([worker_kept_rows(h, ptr, p, scheme, seed, epochs)
                     for p, (h, ptr) in enumerate(zip(halos, halo_ptrs))], axis=1)


def backward_kept(kept: np.ndarray, scheme: HaloScheme) -> np.ndarray:
    """The kept rows of each epoch's BACKWARD exchange, from `kept` of the epochs
    start.. (axis 0) of a run that started at epoch 1: `kept` itself, or under `stale`
    row i = kept[max(i - 1, 0)] (`backward_keep_epochs`)."""
    if not scheme.stale or kept.shape[0] == 0:
        return kept
    return kept[[max(i - 1, 0) for i in range(kept.shape[0])]]


def scheme_payload_breakdown(kept: np.ndarray, halo_rows: np.ndarray, hops: list[LayerHop],
                             dtype, scheme: HaloScheme, *, evals: int) -> dict:
    """Predicted halo payload of a run under `scheme` per (src, dst, kind, layer,
    direction), the trainer's counter keys: training epoch e sends, forward, q -> p
    kept[e, p, q] rows of `forward_width` and, backward, p -> q `backward_kept`'s rows
    of `backward_width` (stale: those of epoch s(e)), each of `scheme.row_bytes`; every
    evaluation forward sends the full halo (`halo_rows[p, q]` rows q -> p) in the
    training dtype. Halo keys only (the all-reduce is the survey's own); pairs with
    nothing sent are left out."""
    itemsize = np.dtype(dtype).itemsize
    rows = kept.sum(axis=0)                    # (k, k): p's kept halo rows owned by q
    rows_b = backward_kept(kept, scheme).sum(axis=0)
    out: dict[tuple, int] = {}
    k = halo_rows.shape[0]
    for p in range(k):
        for q in np.flatnonzero(halo_rows[p] > 0).tolist():
            for h in hops:
                fwd = int(rows[p, q]) * scheme.row_bytes(h.forward_width, dtype)
                bwd = int(rows_b[p, q]) * scheme.row_bytes(h.backward_width, dtype)
                ev = evals * int(halo_rows[p, q]) * h.forward_width * itemsize
                if fwd:
                    out[(q, p, KIND_HALO, h.layer, "forward")] = fwd
                if ev:
                    out[(q, p, KIND_HALO, h.layer, "eval")] = ev
                if bwd:
                    out[(p, q, KIND_HALO, h.layer, "backward")] = bwd
    return out


def expected_epoch_halo_bytes(halo_rows: np.ndarray, hops: list[LayerHop], dtype,
                              scheme: HaloScheme) -> dict:
    """Expected halo payload of ONE training epoch under `scheme` (forward, backward):
    the full rows times the kept probability times the wire bytes of a row."""
    p = keep_threshold(scheme.keep) / KEEP_ONE
    rows = int(np.asarray(halo_rows).sum())
    fwd = sum(rows * scheme.row_bytes(h.forward_width, dtype) for h in hops)
    bwd = sum(rows * scheme.row_bytes(h.backward_width, dtype) for h in hops)
    return {"forward_bytes": p * fwd, "backward_bytes": p * bwd}


def plan_scheme_traffic(halos: list[np.ndarray], halo_ptrs: list, hops: list[LayerHop], dtype,
                        scheme: HaloScheme, *, seed: int, epochs: int) -> dict:
    """What a survey plan records of a scheme: the halo payload of every training epoch
    1..`epochs` for `seed` (the replay of the keep choices: what the trainer will measure),
    their sum, and the per-epoch expectation (`expected_epoch_halo_bytes`)."""
    kept = kept_halo_rows(halos, halo_ptrs, scheme, seed, range(1, epochs + 1))
    per_epoch_rows = kept.sum(axis=(1, 2))                      # (epochs,)
    per_epoch_back = backward_kept(kept, scheme).sum(axis=(1, 2))
    fwd_row = sum(scheme.row_bytes(h.forward_width, dtype) for h in hops)
    bwd_row = sum(scheme.row_bytes(h.backward_width, dtype) for h in hops)
    halo_rows = np.stack([np.diff(np.asarray(p, dtype=np.int64)) for p in halo_ptrs])
    expected = expected_epoch_halo_bytes(halo_rows, hops, dtype, scheme)
    forward = (per_epoch_rows * fwd_row).astype(np.int64)
    backward = (per_epoch_back * bwd_row).astype(np.int64)
    return {**scheme.to_dict(), "seed": int(seed), "epochs": int(epochs),
            "kept_fraction": keep_threshold(scheme.keep) / KEEP_ONE,
            "expected_forward_bytes": float(expected["forward_bytes"]),
            "expected_backward_bytes": float(expected["backward_bytes"]),
            "forward_bytes_per_epoch": forward.tolist(),
            "backward_bytes_per_epoch": backward.tolist(),
            "training_halo_bytes": int(forward.sum() + backward.sum())}
