"""What one training run holds around its training: the checkpoint folders it locks and the
schedule of checkpoints it writes, the temporary shard folder it builds, its signal handling and
the phase it is in (for the line an interruption prints). Used by `api.run`.

Signals: for the whole run, Ctrl-C, SIGTERM and SIGHUP raise in the main thread as Ctrl-C
does (the run then ends with `Interrupted`, exit 4 in every phase). Only the first one
raises: later ones are ignored, so the clean-up (stopping workers, removing temporary
shards) is never cut short.
"""
from __future__ import annotations

import shutil
import signal
import tempfile
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from shardtrain import defaults
from shardtrain.errors import Interrupted, ParameterError, option

if TYPE_CHECKING:
    from shardtrain.train.checkpoint import Checkpoint

DEFAULT_CHECKPOINT_EVERY = defaults.CHECKPOINT_EVERY
STOP_SIGNALS = (signal.SIGINT, signal.SIGTERM, signal.SIGHUP)


# ---------------------------------------------------------------- signals

class Terminated(KeyboardInterrupt):
    """SIGTERM or SIGHUP, handled like Ctrl-C: the coordinator stops the workers."""

    def __init__(self, signal_name: str):
        super().__init__(signal_name)
        self.signal_name = signal_name


class signals_as_interrupt:
    """Ctrl-C, SIGTERM and SIGHUP raise KeyboardInterrupt (`Terminated`) in the main thread
    while inside; only the first one raises. Outside the main thread (embedded use) the
    handlers are left alone."""

    def __enter__(self):
        fired = [False]

        def handler(signum, frame):
            if fired[0]:
                return
            fired[0] = True
            if signum == signal.SIGINT:
                raise KeyboardInterrupt()
            raise Terminated(signal.Signals(signum).name)
        self.saved = {}
        try:
            for sig in STOP_SIGNALS:
                self.saved[sig] = signal.signal(sig, handler)
        except ValueError:           # not the main thread (embedded use): leave them alone
            for sig, old in self.saved.items():
                signal.signal(sig, old)
            self.saved = {}
        return self

    def __exit__(self, *exc):
        for sig, old in self.saved.items():
            signal.signal(sig, old)
        return False


# ---------------------------------------------------------------- the session

@dataclass
class Session:
    """One run's phase text and held checkpoint-folder locks."""

    phase: str = "checking the options"
    locks: list = field(default_factory=list)

    def interrupted(self, exc: KeyboardInterrupt) -> Interrupted:
        """The Interrupted of a signal outside the training loop."""
        return Interrupted(f"stopped by {getattr(exc, 'signal_name', 'Ctrl-C')} while "
                           f"{self.phase}; no worker is left and no temporary file (start "
                           f"the same command again)")

    def release(self) -> None:
        for held in self.locks:
            held.release()
        self.locks = []


@dataclass
class Checkpoints:
    """The checkpoint options resolved: the folder written (the resumed one when none is
    given), epochs between checkpoints, the checkpoint resumed (or None)."""

    folder: str | None
    every: int | None
    resume: str | None
    resumed: Checkpoint | None


def open_checkpoints(session: Session, folder: str | None, every: int | None,
                     resume: str | None) -> Checkpoints:
    """Lock the `resume` and `checkpoint` folders for the whole run (one run per folder),
    read the checkpoint resumed, check the folder written and fill in the interval (the
    resumed run's, else DEFAULT_CHECKPOINT_EVERY)."""
    from shardtrain.train import checkpoint

    for param, path in (("resume", resume), ("checkpoint", folder)):
        if path and not any(Path(path).resolve() == held.folder.resolve()
                            for held in session.locks):
            session.locks.append(checkpoint.lock_folder(path, param))
    resumed = checkpoint.read_checkpoint(resume) if resume else None
    if resumed is not None and folder is None:
        folder = resume
    if folder is not None:
        checkpoint.check_folder(folder, resuming_from=resume)
        if every is None:
            stored = resumed.doc.get("checkpoint_every") if resumed is not None else None
            every = stored if isinstance(stored, int) and stored > 0 \
                else DEFAULT_CHECKPOINT_EVERY
    return Checkpoints(folder, every, resume, resumed)


def checkpoint_schedule(ckpts: Checkpoints, settings, *, workers: int, dims, graph_fp,
                        shard_dir=None, source_label: str) -> dict | None:
    """Check the resumed checkpoint against this run; the checkpoint schedule ({"folder",
    "every", "identity"}) or None. `shard_dir` None: a reference run."""
    from shardtrain.train import checkpoint

    if ckpts.folder is None and ckpts.resumed is None:
        return None
    if shard_dir is None:
        identity = checkpoint.run_identity(settings, workers=1, dims=dims,
                                           graph_fingerprint=graph_fp,
                                           shards_fingerprint=None, mode="reference")
    else:
        identity = checkpoint.run_identity(settings, workers=workers, dims=dims,
                                           graph_fingerprint=graph_fp,
                                           shards_fingerprint=checkpoint.shard_dir_fingerprint(
                                               shard_dir))
    if ckpts.resumed is not None:
        checkpoint.check_resumable(ckpts.resumed, identity, epochs=settings.epochs,
                                   graph_label=source_label)
    check_not_stopped(ckpts.resumed, settings)
    return {"folder": str(ckpts.folder), "every": int(ckpts.every or 0),
            "identity": identity}


def check_not_stopped(resumed, settings) -> None:
    """A checkpoint written where early stopping ended its run has nothing to continue."""
    early = getattr(resumed, "early", None) if resumed is not None else None
    if not early or not settings.early_stop:
        return
    best = int(np.asarray(early.get("early_best_epoch", resumed.epoch)))
    if resumed.epoch - best >= settings.early_stop:
        raise ParameterError("resume", f"that run stopped early at epoch {resumed.epoch} (no "
                             f"better validation loss since epoch {best}, "
                             f"{option('early_stop')} {settings.early_stop}); nothing to "
                             f"continue", value=resumed.folder)


# ---------------------------------------------------------------- the reference run

def train_reference_checkpointed(graph, settings, init, schedule, resumed, on_epoch):
    """The single-process run, checkpointed per `schedule`, continuing `resumed`; Ctrl-C
    becomes Interrupted naming the checkpoint and the `resume` that continues it."""
    from shardtrain.train import checkpoint
    from shardtrain.train.reference import train_reference

    done = [resumed.epoch if resumed is not None else 0]

    def each_epoch(rec):
        done[0] = rec["epoch"]
        if on_epoch is not None:
            on_epoch(rec)
    try:
        return train_reference(
            graph, settings, init_params=resumed.params if resumed is not None else init,
            init_adam=resumed.adam if resumed is not None else None,
            first_epoch=resumed.epoch + 1 if resumed is not None else 1, on_epoch=each_epoch,
            init_early=resumed.early if resumed is not None else None,
            on_epoch_end=None if schedule is None else checkpoint.epoch_writer(
                schedule, settings.epochs))
    except KeyboardInterrupt:
        where = f"after epoch {done[0]}" if done[0] else "before the first epoch ended"
        saved = None if schedule is None else checkpoint.latest_epoch(schedule["folder"])
        if schedule is None:
            text = (f"no checkpoint was written (add {option('checkpoint')} DIR to be able "
                    f"to resume)")
        elif saved is None:
            text = f"no checkpoint was written yet in {schedule['folder']} (nothing to resume)"
        else:
            text = (f"the latest checkpoint (epoch {saved}) is intact in "
                    f"{schedule['folder']}: run the same command with {option('resume')} "
                    f"{schedule['folder']} to continue")
        raise Interrupted(f"training stopped {where}; {text}") from None


# ---------------------------------------------------------------- temporary shards

@contextmanager
def temporary_folder():
    """A fresh folder for the shards of a run on a graph file, removed at the end
    whatever happens; yields the shard directory's path inside it."""
    tmp_dir = tempfile.mkdtemp(prefix="shardtrain-shards-")
    try:
        yield str(Path(tmp_dir) / "shards")
    finally:
        shutil.rmtree(tmp_dir, ignore_errors=True)


def build_shard_dir(session: Session, graph, *, workers: int, method: str | None,
                    assignment, seed: int, imbalance: float, dims, shard_dir: str) -> None:
    """Partition (or take the given assignment) and save the shards for the workers."""
    from shardtrain.data.graph import fingerprint
    from shardtrain.hooks import pause_point
    from shardtrain.plan.shards import build_shards, save_shards

    details = None
    if assignment is None:
        from shardtrain.plan.partition import partition_plan
        session.phase = "partitioning"
        pause_point("partitioning")
        assert method is not None          # checked: method or assignment
        assignment, details = partition_plan(graph, method, workers, seed=seed,
                                             imbalance=imbalance)
    session.phase = "building the shards"
    pause_point("building shards")
    shards = build_shards(graph, assignment, workers)
    meta = {"num_classes": dims[-1][1], "input_dim": dims[0][0],
            "method": method or "assignment", "seed": seed,
            "graph_fingerprint": fingerprint(graph)}
    if details is not None:
        meta["partition"] = details      # how the plan was made (METIS: scheme, balance)
    save_shards(shard_dir, shards, meta=meta)
    pause_point("shards built")
