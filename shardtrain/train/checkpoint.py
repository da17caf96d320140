"""Checkpoints of a partitioned run: write them atomically, read them back, refuse a
resume that contradicts them.

A checkpoint folder holds two kinds of file:
- `state-EEEEEE.npz`: the weights (`w0`, `b0`, ...) and the Adam state (`adam_t`,
  `adam_m_<name>`, `adam_v_<name>`) after the step of epoch E, and with early stopping
  its state (`early_best_epoch`, `early_best_loss`, `early_best_<name>`: see
  `shardtrain.train.stopping`); plain arrays, read back with allow_pickle=False;
- `checkpoint.json`: the index: the epoch, the state file's name and SHA-256, and the
  run's identity (settings, model dims, worker count, graph and shard-directory
  fingerprints) that a resume must match.
Both are written through `shardtrain.files` (temporary name, fsync, rename). The state file
is written first under a new name, then the index is renamed onto the old one: that
rename is the commit. A crash at any moment leaves the previous index and the state file
it names untouched, so the latest committed checkpoint is always readable. Older state
files are removed only after the commit.

The same format serves a reference run (`reference.train_reference`, one process, the whole
graph): its identity records mode "reference" (workers 1, no shard fingerprint), and a
resume refuses a checkpoint of the other mode, since the two runs sum in different orders
and cannot continue each other bit for bit.

The random stream needs no saved position: dropout masks come from a counter-based
generator keyed by (seed, epoch, layer, global vertex id), so the epoch IS the position;
the index records the seed and the next epoch to make that explicit.
"""
from __future__ import annotations

import hashlib
import json
import re
import zipfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np

from shardtrain import defaults
from shardtrain.errors import InputError, ParameterError, option
from shardtrain.files import read_json_document

FORMAT = "shardtrain-checkpoint"
VERSION = 1
INDEX = "checkpoint.json"
_STATE_RE = re.compile(r"state-\d{6}\.npz")
# settings a resume may change: how long the run goes on, how many BLAS threads it uses
_FREE_SETTINGS = ("epochs", "threads")
# settings older checkpoints do not record (what they trained with: GCN, where heads is moot;
# every halo row, exact, synchronous)
_ABSENT_MEANS = {"early_stop": 0, "model": defaults.MODEL, "heads": defaults.HEADS,
                 "halo_keep": 1.0, "halo_format": None, "halo_stale": False,
                 "halo_smooth": 0.0}


def state_file_name(epoch: int) -> str:
    return f"state-{epoch:06d}.npz"


def file_sha256(path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def shard_dir_fingerprint(shard_dir) -> str:
    """SHA-256 (16 hex digits) of the manifest and every shard file, in manifest order."""
    from shardtrain.plan.shards import SHARDS_MANIFEST, load_manifest

    manifest = load_manifest(shard_dir)
    h = hashlib.sha256()
    for name in [SHARDS_MANIFEST, *manifest["files"]]:
        h.update(name.encode() + b"\0")
        with open(Path(shard_dir) / name, "rb") as fh:
            for block in iter(lambda: fh.read(1 << 20), b""):
                h.update(block)
    return h.hexdigest()[:16]


MODES = ("partitioned", "reference")


def run_identity(settings, *, workers: int, dims, graph_fingerprint, shards_fingerprint,
                 mode: str = "partitioned") -> dict:
    """What a checkpoint must share with the run that resumes it."""
    if mode not in MODES:
        raise ValueError(f"mode {mode!r} is not one of {MODES}")
    return {"mode": mode,
            "settings": {k: v for k, v in settings.to_dict().items()
                         if k not in _FREE_SETTINGS},
            "workers": int(workers), "dims": [list(map(int, d)) for d in dims],
            "graph_fingerprint": graph_fingerprint, "shards_fingerprint": shards_fingerprint}


def mode_of(doc: dict) -> str:
    """The run mode a checkpoint index records (written before modes were: partitioned)."""
    return doc.get("mode", "partitioned")


def write_checkpoint(folder, epoch: int, params: dict, adam_state: dict, identity: dict, *,
                     every: int, before_commit: Callable[[], None] | None = None,
                     early_state: dict | None = None) -> Path:
    """Write the checkpoint of `epoch` into `folder` (which must exist); returns the index.

    `before_commit` runs after the state file is on disk and before the index is renamed
    (a place for tests to stop the process at the worst moment).
    """
    from shardtrain.files import save_npz_atomic, write_json_atomic

    folder = Path(folder)
    state_name = state_file_name(epoch)
    save_npz_atomic(folder / state_name, **params, **adam_state, **(early_state or {}))
    doc = {"format": FORMAT, "version": VERSION, "epoch": int(epoch),
           "state_file": state_name, "state_sha256": file_sha256(folder / state_name),
           "checkpoint_every": int(every),
           "random_stream": {"generator": "counter-based, keyed by (seed, epoch, layer, "
                                          "vertex)", "seed": identity["settings"]["seed"],
                             "next_epoch": int(epoch) + 1},
           **identity}
    if before_commit is not None:
        before_commit()
    write_json_atomic(folder / INDEX, doc)
    for old in folder.iterdir():          # superseded state files and stray temporaries
        if old.name != state_name and (_STATE_RE.fullmatch(old.name)
                                       or (old.name.startswith(".state-")
                                           and ".tmp" in old.name)):
            old.unlink(missing_ok=True)
    return folder / INDEX


def epoch_writer(schedule: dict, last_epoch: int, *,
                 before_commit: Callable[[int], None] | None = None,
                 on_stage: Callable[[int, str], None] | None = None):
    """An end-of-epoch hook `(epoch, params, adam) -> {"checkpoint": epoch} | None` that
    writes a checkpoint every schedule["every"] epochs and after `last_epoch` into
    schedule["folder"] (created here; its parent must exist). `schedule` is {"folder",
    "every", "identity"}; `before_commit(epoch)` as in `write_checkpoint`;
    `on_stage(epoch, "write" | "done")` brackets each write (the worker names its phase
    with it)."""
    from shardtrain.train import model

    Path(schedule["folder"]).mkdir(exist_ok=True)
    stage = on_stage or (lambda epoch, what: None)

    def write(epoch: int, params, adam, *, early=None, last: bool = False) -> dict | None:
        # `early` (stopping.EarlyStop) is saved with the state; `last`: the run stops here
        if epoch % schedule["every"] and epoch != last_epoch and not last:
            return None
        stage(epoch, "write")
        write_checkpoint(schedule["folder"], epoch, model.params_to_arrays(params),
                         adam.state(), schedule["identity"], every=schedule["every"],
                         before_commit=(None if before_commit is None
                                        else lambda: before_commit(epoch)),
                         early_state=None if early is None else early.state())
        stage(epoch, "done")
        return {"checkpoint": epoch}
    return write


def latest_epoch(folder) -> int | None:
    """The epoch of the committed checkpoint in `folder`, or None (none, or unreadable)."""
    try:
        epoch = json.loads((Path(folder) / INDEX).read_text(encoding="utf-8"))["epoch"]
    except (OSError, ValueError, KeyError, TypeError, RecursionError):
        return None
    ok = isinstance(epoch, int) and not isinstance(epoch, bool) and epoch >= 1
    return epoch if ok else None


@dataclass
class Checkpoint:
    folder: Path
    epoch: int
    doc: dict                    # the index
    params: dict                 # w0, b0, ... -> array
    adam: dict                   # adam_t, adam_m_*, adam_v_* -> array
    early: dict = field(default_factory=dict)   # early_* -> array (stopping.EarlyStop)


def has_checkpoint(folder) -> bool:
    return (Path(folder) / INDEX).is_file()


def read_checkpoint(folder, param: str = "resume") -> Checkpoint:
    """The committed checkpoint in `folder`; a ParameterError naming `param` and the folder,
    or an InputError naming the file."""
    folder = Path(folder)
    index = folder / INDEX
    if not folder.is_dir():
        raise ParameterError(param, "no such folder", value=folder)
    if not index.is_file():
        raise ParameterError(param, f"no {INDEX} (not a checkpoint folder)", value=folder)
    # the shape (documents.CHECKPOINT): epoch >= 1, a state-NNNNNN.npz name, settings ...
    doc = read_json_document(index, format=FORMAT, version=VERSION,
                             what="shardtrain checkpoint", kind="checkpoint")
    epoch, state_name = doc["epoch"], doc["state_file"]
    state = folder / state_name
    if not state.is_file():
        raise InputError(f"{state}: no such file (named by {index})")
    if file_sha256(state) != doc.get("state_sha256"):
        raise InputError(f"{state}: contents differ from the SHA-256 recorded in {index}")
    try:
        with np.load(state, allow_pickle=False) as z:
            arrays = {k: z[k] for k in z.files}
    except (OSError, ValueError, EOFError, KeyError, zipfile.BadZipFile) as exc:
        raise InputError(f"{state}: not a readable .npz ({' '.join(str(exc).split())})"
                         ) from None
    from shardtrain.train.stopping import PREFIX as EARLY

    params = {k: v for k, v in arrays.items() if not k.startswith(("adam_", EARLY))}
    adam = {k: v for k, v in arrays.items() if k.startswith("adam_")}
    early = {k: v for k, v in arrays.items() if k.startswith(EARLY)}
    step = np.asarray(adam.get("adam_t", -1))
    if step.shape != () or step.dtype.kind not in "iuf" or step != epoch:
        raise InputError(f"{state}: Adam step count differs from the epoch {epoch} in {index}")
    return Checkpoint(folder, epoch, doc, params, adam, early)


def check_resumable(ckpt: Checkpoint, identity: dict, *, epochs: int,
                    graph_label: str = "GRAPH") -> None:
    """Refuse (InputError naming the option and what differs) a resume that contradicts
    the checkpoint: another graph, shard layout, model shape, worker count or setting."""
    doc, src = ckpt.doc, f"{option('resume')} {ckpt.folder}"
    mine_mode, their_mode = identity.get("mode", "partitioned"), mode_of(doc)
    if mine_mode != their_mode:
        raise InputError(f"{src}: the checkpoint was written by a {their_mode} run, this is a "
                         f"{mine_mode} run (resume it in the mode that wrote it"
                         f"{', with ' + option('reference') if their_mode == 'reference' else ''})")
    for key, mine in identity["settings"].items():
        theirs = doc["settings"].get(key, _ABSENT_MEANS.get(key))
        if theirs != mine:
            raise ParameterError(key, f"this run asks for {mine!r}, the checkpoint in "
                                      f"{ckpt.folder} was written with {theirs!r} "
                                      f"({src} needs the same settings)")
    if doc["workers"] != identity["workers"]:
        raise ParameterError("workers", f"this run has {identity['workers']} workers, the "
                                        f"checkpoint in {ckpt.folder} was written by "
                                        f"{doc['workers']} (resume on the same worker count)")
    if doc["dims"] != identity["dims"]:
        raise InputError(f"{graph_label}: model layers {identity['dims']} differ from the "
                         f"checkpoint's {doc['dims']} ({src}): another feature width or "
                         f"class count")
    for key, what in (("graph_fingerprint", "graph"),
                      ("shards_fingerprint", "shard layout")):
        mine, theirs = identity.get(key), doc.get(key)
        if mine is not None and theirs is not None and mine != theirs:
            raise InputError(f"{graph_label}: a different {what} from the checkpoint's "
                             f"(fingerprint {mine} against {theirs} in {ckpt.folder})")
    if ckpt.epoch >= epochs:
        raise ParameterError("epochs", f"the checkpoint in {ckpt.folder} is already at "
                                       f"epoch {ckpt.epoch}; ask for more epochs to continue",
                             value=epochs)


def check_folder(folder, *, resuming_from=None) -> Path:
    """The `checkpoint` folder: it may be missing (the run creates it; its parent must
    exist); one holding another run's checkpoint is refused unless that run is the one
    being resumed."""
    folder = Path(folder)
    if folder.exists() and not folder.is_dir():
        raise ParameterError("checkpoint", "exists and is not a folder", value=folder)
    if not folder.parent.is_dir():
        raise ParameterError("checkpoint", f"folder {folder.parent} does not exist",
                             value=folder)
    if has_checkpoint(folder) and (resuming_from is None or
                                   Path(resuming_from).resolve() != folder.resolve()):
        raise ParameterError("checkpoint", f"holds a checkpoint already; continue it "
                                           f"with {option('resume')} {folder} or choose an "
                                           f"empty folder",
                             value=folder)
    return folder


class FolderLock:
    """An exclusive lock on a checkpoint folder, held for a whole run (see `lock_folder`)."""

    fd: int | None                          # None once released

    def __init__(self, folder: Path, fd: int, created: bool):
        self.folder, self.fd, self.created = folder, fd, created

    def release(self) -> None:
        """Unlock; a folder this lock created and nothing filled is removed again."""
        import os

        if self.fd is None:
            return
        os.close(self.fd)                    # closing the descriptor drops the flock
        self.fd = None
        if self.created:
            try:
                self.folder.rmdir()          # only when empty: a checkpoint stays
            except OSError:
                pass


def lock_folder(folder, param: str = "checkpoint") -> FolderLock:
    """Take an exclusive, non-blocking flock(2) on the checkpoint folder itself (created
    when missing; its parent must exist), so a second run writing or resuming it is refused
    with one line naming the folder. The kernel drops the lock when the process ends, however
    it ends; no lock file is left behind."""
    import fcntl
    import os

    folder = Path(folder)
    if folder.exists() and not folder.is_dir():
        raise ParameterError(param, "exists and is not a folder", value=folder)
    created = False
    if not folder.exists():
        if param == "resume":
            raise ParameterError(param, "no such folder", value=folder)
        if not folder.parent.is_dir():
            raise ParameterError(param, f"folder {folder.parent} does not exist", value=folder)
        folder.mkdir()
        created = True
    fd = os.open(folder, os.O_RDONLY | os.O_DIRECTORY | os.O_CLOEXEC)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except OSError:
        os.close(fd)
        raise ParameterError(param, "another shardtrain run is using this checkpoint folder "
                                    "(it holds the folder's lock); wait for it to end or "
                                    "choose another folder", value=folder) from None
    return FolderLock(folder, fd, created)
