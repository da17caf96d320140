"""Early stopping on the validation loss, one rule for the reference and the workers.

Rule (the GCN paper's, Kipf & Welling 2017, from memory: "stop when the validation loss
has not decreased for 10 consecutive epochs"): after each epoch's evaluation forward, the
epoch *improves* when its validation loss is STRICTLY lower than the best so far (the
first epoch always does; a NaN loss never beats a number, any number beats a NaN best).
The run stops after epoch e when
e - best_epoch >= patience, i.e. after `patience` epochs in a row without an improvement.
The run's final weights (and predictions) are those of the best epoch, whether or not the
rule triggered before the last epoch.

The state a resume needs is small: best epoch, best loss and the best weights
(`state()` / `from_state()`, arrays for the checkpoint's .npz). Nothing here knows of
processes: every worker holds its own `EarlyStop` and feeds it the same global loss (an
all-reduce), so all of them stop at the same epoch.
"""
from __future__ import annotations

import math

import numpy as np

from shardtrain.errors import InputError
from shardtrain.train import model

PREFIX = "early_"            # checkpoint array names: early_best_epoch, early_best_w0, ...


class EarlyStop:
    """Patience counter over validation losses, holding a copy of the best weights."""

    def __init__(self, patience: int):
        if patience < 1:
            raise ValueError(f"patience must be >= 1, got {patience}")
        self.patience = int(patience)
        self.best_epoch: int | None = None
        self.best_loss = math.inf
        self.best_params: model.Params | None = None
        self.stopped_at: int | None = None

    def update(self, epoch: int, val_loss: float, params: model.Params) -> bool:
        """Take epoch `epoch`'s loss; True when it improved (the weights are then copied)."""
        improved = (self.best_epoch is None or val_loss < self.best_loss
                    or (math.isnan(self.best_loss) and not math.isnan(val_loss)))
        if improved:
            self.best_epoch, self.best_loss = int(epoch), float(val_loss)
            self.best_params = model.copy_params(params)
        return improved

    def should_stop(self, epoch: int) -> bool:
        """After epoch `epoch`: has the loss not improved for `patience` epochs?"""
        stop = self.best_epoch is not None and epoch - self.best_epoch >= self.patience
        if stop:
            self.stopped_at = int(epoch)
        return stop

    def summary(self) -> dict:
        """The run JSON's `early_stop` entry."""
        return {"patience": self.patience, "best_epoch": self.best_epoch,
                "best_val_loss": None if self.best_epoch is None else self.best_loss,
                "stopped_at": self.stopped_at, "weights": "best epoch"}

    def state(self) -> dict[str, np.ndarray]:
        """Checkpoint arrays: early_best_epoch, early_best_loss, early_best_<name>."""
        if self.best_epoch is None:
            return {}
        assert self.best_params is not None     # set together with best_epoch in update()
        out = {f"{PREFIX}best_epoch": np.asarray(self.best_epoch, dtype=np.int64),
               f"{PREFIX}best_loss": np.asarray(self.best_loss, dtype=np.float64)}
        for name, a in model.params_to_arrays(self.best_params).items():
            out[f"{PREFIX}best_{name}"] = a.copy()
        return out

    @classmethod
    def from_state(cls, patience: int, arrays: dict, dims, bias: bool, dtype,
                   source: str = "checkpoint", hops=None) -> "EarlyStop":
        """Rebuild from `state()` arrays (InputError naming `source` when incomplete)."""
        es = cls(patience)
        if not arrays:
            return es
        for key in ("best_epoch", "best_loss"):
            if f"{PREFIX}{key}" not in arrays:
                raise InputError(f"{source}: missing array '{PREFIX}{key}'")
        es.best_epoch = int(np.asarray(arrays[f"{PREFIX}best_epoch"]))
        es.best_loss = float(np.asarray(arrays[f"{PREFIX}best_loss"]))
        weights = {k[len(PREFIX) + 5:]: v for k, v in arrays.items()
                   if k.startswith(f"{PREFIX}best_") and k not in
                   (f"{PREFIX}best_epoch", f"{PREFIX}best_loss")}
        es.best_params = model.params_from_arrays(weights, dims, bias, dtype,
                                                  source=f"{source} (best weights)",
                                                  hops=hops)
        return es


def state_arrays(arrays: dict) -> dict:
    """The early-stopping arrays among a checkpoint state's arrays."""
    return {k: v for k, v in arrays.items() if k.startswith(PREFIX)}
