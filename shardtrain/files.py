"""Atomic output: every file shardtrain writes goes to a temporary name in the same folder,
is flushed to disk, and is then renamed onto its final name. A crash or an error part-way
leaves either the old file or nothing, never a half-written one.

The temporary names start with '.' and contain 'tmp', so they are hidden and easy to spot.
"""
from __future__ import annotations

import json
import os
import shutil
import tempfile
from contextlib import contextmanager
from pathlib import Path
from typing import Iterator

import numpy as np

from shardtrain.errors import InputError


def _fsync_dir(folder: Path) -> None:
    """Make the rename itself durable (a no-op where directories cannot be opened)."""
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def _fsync_file(path: Path) -> None:
    with open(path, "rb+") as fh:
        os.fsync(fh.fileno())


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def _check_folder(path: Path) -> None:
    folder = path.parent
    if not folder.is_dir():
        raise InputError(f"{path}: folder {folder} does not exist")


@contextmanager
def atomic_output(path: str | os.PathLike) -> Iterator[Path]:
    """Yield a temporary path beside `path`; on success fsync it and rename it onto `path`,
    on an exception remove it and re-raise.

    The caller writes the temporary path however it likes (open(), np.savez, ...). The
    temporary name keeps the final suffix, because some writers (np.savez) add '.npz'
    when it is missing.
    """
    path = Path(path)
    _check_folder(path)
    fd, tmp_name = tempfile.mkstemp(prefix=f".{path.name}.", suffix=f".tmp{path.suffix}",
                                    dir=path.parent)
    os.close(fd)
    tmp = Path(tmp_name)
    os.chmod(tmp, 0o666 & ~_umask())   # mkstemp makes 0600; give the usual permissions
    try:
        yield tmp
        _fsync_file(tmp)
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    _fsync_dir(path.parent)


def write_text_atomic(path: str | os.PathLike, text: str) -> None:
    with atomic_output(path) as tmp:
        with open(tmp, "w", encoding="utf-8", newline="\n") as fh:
            fh.write(text)


def write_json_atomic(path: str | os.PathLike, obj) -> None:
    """JSON with indent 1, keys in insertion order, a trailing newline."""
    write_text_atomic(path, json.dumps(obj, indent=1, sort_keys=False) + "\n")


def save_npz_atomic(path: str | os.PathLike, **arrays) -> None:
    """np.savez (uncompressed) of plain arrays; object arrays are refused (no pickle)."""
    arrays = {k: np.asarray(v) for k, v in arrays.items()}
    for key, arr in arrays.items():
        if arr.dtype.hasobject:
            raise TypeError(f"save_npz_atomic: array {key!r} has object dtype (would need pickle)")
    with atomic_output(path) as tmp:
        with open(tmp, "wb") as fh:  # a file object, so numpy never renames the target
            np.savez(fh, **arrays)


@contextmanager
def atomic_directory(path: str | os.PathLike, *, overwrite: bool = False) -> Iterator[Path]:
    """Yield a fresh temporary sibling directory; on success rename it onto `path`.

    An existing non-empty `path` is refused (InputError) unless overwrite=True, in which case
    it is replaced only after the new contents are complete. On an exception the temporary
    directory is removed and `path` is untouched.
    """
    path = Path(path)
    _check_folder(path)
    if path.exists() and not path.is_dir():
        raise InputError(f"{path}: exists and is not a directory")
    if path.is_dir() and any(path.iterdir()) and not overwrite:
        raise InputError(f"{path}: directory exists and is not empty (use an overwrite option)")
    tmp = Path(tempfile.mkdtemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent))
    os.chmod(tmp, 0o777 & ~_umask())
    try:
        yield tmp
        for child in tmp.rglob("*"):
            if child.is_file():
                _fsync_file(child)
        old = None
        if path.exists():
            # Move the old directory aside first so the swap is two renames, never a gap
            # with a half-deleted tree under the final name.
            old = Path(tempfile.mkdtemp(prefix=f".{path.name}.", suffix=".old.tmp",
                                        dir=path.parent))
            os.rmdir(old)
            os.replace(path, old)
        try:
            os.replace(tmp, path)
        except BaseException:
            if old is not None:
                os.replace(old, path)
            raise
        if old is not None:
            shutil.rmtree(old, ignore_errors=True)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    _fsync_dir(path.parent)


def read_json_document(file: str | os.PathLike, *, format: str, version: int, what: str) -> dict:
    """A JSON file we wrote ourselves (`{"format": format, "version": version, ...}`), or an
    InputError naming the file: unreadable, not JSON, another format, or another version.
    `what` names the document in messages ("checkpoint", "shard manifest")."""
    file = Path(file)
    try:
        doc = json.loads(file.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, ValueError) as exc:
        raise InputError(f"{file}: not readable JSON ({' '.join(str(exc).split())})") from None
    if not isinstance(doc, dict) or doc.get("format") != format:
        raise InputError(f"{file}: not a {what} (format is not {format!r})")
    if doc.get("version") != version:
        raise InputError(f"{file}: {what} version {doc.get('version')!r}, this shardtrain "
                         f"reads version {version}")
    return doc
