"""Training settings: one value shared by the reference, the workers and the CLI.

Defaults (`shardtrain.defaults`) are the GCN paper's setup (Kipf & Welling, ICLR 2017):
2 layers, 16 hidden units, dropout 0.5, learning rate 0.01, weight decay 5e-4 on the first
layer, 200 epochs, no bias. Two settings are the tool's own: `early_stop` (patience in
epochs, 0 = off; the paper stops after 10 epochs without a better validation loss) and
`threads` (BLAS threads per process, default 1: the workers are the parallelism, and the
reference gets the same CPU per process so that the two modes compare like for like).
"""
from __future__ import annotations

import os
from dataclasses import asdict, dataclass, fields

import numpy as np

from shardtrain import defaults
from shardtrain.errors import InputError, ParameterError
from shardtrain.plan.schedule import MAX_HEADS, MODELS, LayerHop, layer_dims, model_hops
from shardtrain.plan.schemes import HaloScheme, scheme_of

DTYPES = ("float32", "float64")


@dataclass
class TrainSettings:
    layers: int = defaults.LAYERS
    hidden: int = defaults.HIDDEN
    dropout: float = defaults.DROPOUT
    lr: float = defaults.LR
    weight_decay: float = defaults.WEIGHT_DECAY
    epochs: int = defaults.EPOCHS
    seed: int = defaults.SEED
    dtype: str = defaults.DTYPE
    bias: bool = defaults.BIAS
    early_stop: int = defaults.EARLY_STOP
    threads: int = defaults.THREADS
    model: str = defaults.MODEL
    heads: int = defaults.HEADS
    halo_keep: float = defaults.HALO_KEEP          # plan.schemes.HaloScheme
    halo_format: str | None = defaults.HALO_FORMAT
    halo_stale: bool = defaults.HALO_STALE
    halo_smooth: float = defaults.HALO_SMOOTH

    def validate(self) -> "TrainSettings":
        """Raise a ParameterError naming the first bad setting (the CLI names its option)."""
        def need(ok, param, rule, value):
            if not ok:
                raise ParameterError(param, f"must be {rule} (got {value!r})")

        need(_is_int(self.layers) and self.layers >= 1, "layers", "an integer >= 1",
             self.layers)
        need(_is_int(self.hidden) and self.hidden >= 1, "hidden", "an integer >= 1",
             self.hidden)
        need(_is_real(self.dropout) and 0 <= self.dropout < 1, "dropout",
             "a number in [0, 1)", self.dropout)
        need(_is_real(self.lr) and self.lr > 0, "lr", "a number > 0", self.lr)
        need(_is_real(self.weight_decay) and self.weight_decay >= 0, "weight_decay",
             "a number >= 0", self.weight_decay)
        need(_is_int(self.epochs) and self.epochs >= 1, "epochs", "an integer >= 1",
             self.epochs)
        need(_is_int(self.seed) and self.seed >= 0, "seed", "an integer >= 0", self.seed)
        need(self.dtype in DTYPES, "dtype", "one of " + ", ".join(DTYPES), self.dtype)
        need(isinstance(self.bias, (bool, np.bool_)), "bias", "true or false", self.bias)
        need(_is_int(self.early_stop) and self.early_stop >= 0, "early_stop",
             "an integer >= 0 (0: off)", self.early_stop)
        need(_is_int(self.threads) and 1 <= self.threads <= max_threads(), "threads",
             f"an integer in 1..{max_threads()} (4 x this machine's cores)", self.threads)
        need(self.model in MODELS, "model", "one of " + ", ".join(MODELS), self.model)
        need(_is_int(self.heads) and 1 <= self.heads <= MAX_HEADS, "heads",
             f"an integer in 1..{MAX_HEADS}", self.heads)
        scheme_of(self)
        return self

    def hops(self, dims: list[tuple[int, int]]) -> list[LayerHop]:
        """The exchange schedule of this model over `dims` (`model_dims`' output)."""
        return model_hops(dims, self.model, hidden=self.hidden, heads=self.heads)

    def model_dims(self, input_dim: int, classes: int) -> list[tuple[int, int]]:
        """(d_in, d_out) per layer of this model (GAT: d_out per head)."""
        return layer_dims(int(input_dim), self.hidden, int(classes), self.layers,
                          model=self.model, heads=self.heads)

    @property
    def scheme(self) -> HaloScheme:
        """The halo scheme of the training exchanges (`plan.schemes`)."""
        return HaloScheme(self.halo_keep, self.halo_format, self.halo_stale, self.halo_smooth)

    @property
    def np_dtype(self) -> np.dtype:
        return np.dtype(self.dtype)

    def to_dict(self) -> dict:
        return asdict(self)

    @classmethod
    def from_dict(cls, d: dict, source: str = "settings") -> "TrainSettings":
        """Build and validate; unknown keys are an error naming `source`."""
        known = {f.name for f in fields(cls)}
        unknown = sorted(set(d) - known)
        if unknown:
            raise InputError(f"{source}: unknown training setting '{unknown[0]}'")
        return cls(**d).validate()


def max_threads() -> int:
    """The most BLAS threads per process we accept: 4 x the cores (more only oversubscribes)."""
    return 4 * (os.cpu_count() or 1)


def _is_int(v) -> bool:
    return isinstance(v, (int, np.integer)) and not isinstance(v, (bool, np.bool_))


def _is_real(v) -> bool:
    return (isinstance(v, (int, float, np.integer, np.floating))
            and not isinstance(v, (bool, np.bool_)) and bool(np.isfinite(v)))
