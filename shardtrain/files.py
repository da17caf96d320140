"""Atomic output: every file shardtrain writes goes to a temporary name in the same folder,
is flushed to disk, and is then renamed onto its final name. A crash or an error part-way
leaves either the old file or nothing, never a half-written one.

The temporary names start with '.' and contain 'tmp', so they are hidden and easy to spot.

Before any work a command calls `check_paths` with its inputs and outputs by option name:
an output that is an input, or another output, or a folder that would swallow an input, is
refused, and every output folder is proved writable by creating and removing a probe file
there (permission bits say nothing when running as root). A full disk while writing is a
`RunError` (exit 3) naming the file; the temporary file is removed. JSON we write is strict:
NaN and infinities become null, never the bare `NaN` that strict parsers reject.
"""
from __future__ import annotations

import errno
import fnmatch
import json
import math
import os
import shutil
import tempfile
from contextlib import contextmanager
from pathlib import Path
from typing import Iterator

import numpy as np

from shardtrain.errors import InputError, RunError

# errors that mean "no room or no write access here" (or a failing disk), not a bug:
# one line, exit 3
SPACE_ERRNOS = frozenset(e for e in (errno.ENOSPC, errno.EFBIG, errno.EROFS, errno.EIO,
                                     errno.EACCES, errno.EPERM,
                                     getattr(errno, "EDQUOT", None)) if e)


def _write_failed(path: Path, exc: OSError) -> RunError:
    return RunError(f"{path}: could not be written ({exc.strerror or exc}); no partial "
                    f"file was left")


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
    try:
        fd, tmp_name = tempfile.mkstemp(prefix=f".{path.name}.", suffix=f".tmp{path.suffix}",
                                        dir=path.parent)
    except OSError as exc:
        if exc.errno in SPACE_ERRNOS:
            raise _write_failed(path, exc) from None
        raise
    os.close(fd)
    tmp = Path(tmp_name)
    try:
        os.chmod(tmp, 0o666 & ~_umask())   # mkstemp makes 0600; give the usual permissions
        yield tmp
        _fsync_file(tmp)
        os.replace(tmp, path)
    except OSError as exc:
        tmp.unlink(missing_ok=True)
        if exc.errno in SPACE_ERRNOS:
            raise _write_failed(path, exc) from None
        raise
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    _fsync_dir(path.parent)


def write_text_atomic(path: str | os.PathLike, text: str) -> None:
    with atomic_output(path) as tmp:
        with open(tmp, "w", encoding="utf-8", newline="\n") as fh:
            fh.write(text)


def json_safe(obj):
    """`obj` with every non-finite float (NaN, +-inf, also numpy's) replaced by None and
    numpy scalars by Python numbers, so that `json.dumps(allow_nan=False)` accepts it."""
    if isinstance(obj, dict):
        return {k: json_safe(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [json_safe(v) for v in obj]
    if isinstance(obj, np.generic):
        obj = obj.item()
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    return obj


def json_text(obj) -> str:
    """Strict JSON text of `obj` (indent 1, keys in insertion order, a trailing newline):
    non-finite numbers are written as null (see `json_safe`), never as bare NaN."""
    return json.dumps(json_safe(obj), indent=1, sort_keys=False, allow_nan=False) + "\n"


def write_json_atomic(path: str | os.PathLike, obj) -> None:
    """Strict JSON (`json_text`) written atomically."""
    write_text_atomic(path, json_text(obj))


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
    try:
        tmp = Path(tempfile.mkdtemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent))
    except OSError as exc:
        if exc.errno in SPACE_ERRNOS:
            raise _write_failed(path, exc) from None
        raise
    try:
        os.chmod(tmp, 0o777 & ~_umask())
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
    except OSError as exc:
        shutil.rmtree(tmp, ignore_errors=True)
        if exc.errno in SPACE_ERRNOS:
            raise _write_failed(path, exc) from None
        raise
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    _fsync_dir(path.parent)


def read_json_document(file: str | os.PathLike, *, format: str, version: int, what: str,
                       kind: str | None = None) -> dict:
    """A JSON file we wrote ourselves (`{"format": format, "version": version, ...}`), or an
    InputError naming the file: unreadable, too large or too deeply nested, not JSON,
    another format, another version, or (with `kind`, see `shardtrain.documents.SHAPES`)
    not of that document's shape. `what` names the document in messages ("checkpoint",
    "shard manifest")."""
    from shardtrain import documents

    file = Path(file)
    doc = documents.parse_json_file(file, max_bytes=documents.MAX_BYTES.get(
        kind, documents.DEFAULT_MAX_BYTES), line_first=False)
    if not isinstance(doc, dict) or doc.get("format") != format:
        raise InputError(f"{file}: not a {what} (format is not {format!r})")
    if doc.get("version") != version:
        raise InputError(f"{file}: {what} version {doc.get('version')!r}, this shardtrain "
                         f"reads version {version}")
    return doc if kind is None else documents.validate(doc, kind, file)


# ---------------------------------------------------------------- output checks

def _identity(path: Path):
    """What tells two paths apart: (device, inode) of an existing file or folder, else the
    resolved path (so 'a/../b' and a symlinked folder compare equal to 'b')."""
    try:
        st = os.stat(path)
        return ("inode", st.st_dev, st.st_ino)
    except OSError:
        return ("path", str(path.resolve()))


def _inside(path: Path, folder: Path) -> bool:
    """Whether `path` is `folder` or lies somewhere below it (resolved paths)."""
    p, f = path.resolve(), folder.resolve()
    return p == f or f in p.parents


def _cwd() -> Path:
    """The current folder, or a path inside no folder when it was removed under us."""
    try:
        return Path.cwd()
    except OSError:
        return Path("/nonexistent-current-folder")


def _probe(folder: Path, where: str) -> None:
    """Create and remove a file in `folder`: the only test of writability that also holds
    for root, read-only mounts and full disks (os.access trusts permission bits)."""
    try:
        fd, name = tempfile.mkstemp(prefix=".shardtrain-probe-", suffix=".tmp", dir=folder)
    except OSError as exc:
        raise InputError(f"{where}: cannot write in folder {folder} "
                         f"({exc.strerror or exc})") from None
    os.close(fd)
    try:
        os.unlink(name)
    except OSError:
        pass


probe_folder = _probe
is_inside = _inside
current_folder = _cwd


def _flatten(named: dict | None) -> list[tuple[str, Path]]:
    out = []
    for option, value in (named or {}).items():
        values = value if isinstance(value, (list, tuple)) else [value]
        out += [(option, Path(v)) for v in values if v is not None and str(v) != ""]
    return out



def _claim(seen: dict, ident, opt: str, p: Path, noun: str) -> None:
    """One output per path: refuse option `opt`'s path `p` when another output has the same
    identity, or when its folder does not exist; record it in `seen`."""
    where = f"{opt} {p}"
    if ident in seen:
        raise InputError(f"{where}: also given as {seen[ident]} (give each output its "
                         f"own {noun})")
    seen[ident] = where
    folder = p.absolute().parent
    if not folder.is_dir():
        raise InputError(f"{where}: folder {folder} does not exist")

# The names each out_dirs option writes (and replaces) inside its folder.
OUT_DIR_WRITES = {"--plot": ("*.png", ".*.tmp.png"),
                  "--checkpoint": ("checkpoint.json", "state-*.npz", ".*.tmp*")}

# Folders the checks created-to-be (for `remove_empty_outputs` after a failed run).
_PENDING_DIRS: list[Path] = []


def check_paths(*, inputs: dict | None = None, outputs: dict | None = None,
                out_dirs: dict | None = None, replaced_dirs: dict | None = None,
                allow=()) -> None:
    """Refuse, before any work, outputs that would destroy an input or each other, or that
    cannot be written. InputError naming the option and the file.

    Each argument maps an option name ("GRAPH", "--json", ...) to a path, a list of paths
    or None (not given):
    - `inputs`: files or folders read (a folder counts with everything inside it);
    - `outputs`: files written (atomically, so the folder must take a new file);
    - `out_dirs`: folders written into, created when missing (--plot, --checkpoint);
    - `replaced_dirs`: folders built aside and renamed into place whole (split --out, demo
      --out): they must not hold an input, nor be or hold the current folder.
    `allow` lists (out_dir option, input option) pairs that may share a folder (train's
    --checkpoint going on in the --resume folder).
    Paths compare by (device, inode) when they exist, by resolved path otherwise. A folder
    in `out_dirs` that does not exist yet is remembered: `remove_empty_outputs()` removes it
    again if it is still empty when the command fails.
    """
    ins, outs = _flatten(inputs), _flatten(outputs)
    dirs, whole = _flatten(out_dirs), _flatten(replaced_dirs)
    in_ids = {_identity(p): (opt, p) for opt, p in ins}

    seen: dict = {}
    for opt, p in outs:
        where = f"{opt} {p}"
        if p.is_dir():
            raise InputError(f"{where}: is a folder (give a file name)")
        ident = _identity(p)
        if ident in in_ids:
            iopt, ip = in_ids[ident]
            raise InputError(f"{where}: is the input {iopt} {ip}; writing it would destroy "
                             f"it (give another file name)")
        for iopt, ip in ins:
            if ip.is_dir() and p.exists() and _inside(p, ip):
                raise InputError(f"{where}: would replace a file inside the input {iopt} "
                                 f"{ip} (give another file name)")
        _claim(seen, ident, opt, p, "file")
        _probe(p.absolute().parent, where)

    for opt, p in dirs + whole:
        where = f"{opt} {p}"
        if p.exists() and not p.is_dir():
            raise InputError(f"{where}: exists and is not a folder")
        _claim(seen, _identity(p), opt, p, "name")
    for opt, p in whole:
        where = f"{opt} {p}"
        for iopt, ip in ins:
            if _inside(ip, p):
                raise InputError(f"{where}: holds the input {iopt} {ip}, which replacing "
                                 f"the folder would destroy (give another folder)")
        if _inside(_cwd(), p):
            raise InputError(f"{where}: is or holds the current folder, which cannot be "
                             f"replaced (run from another folder or give another {opt})")
        _probe(p.absolute().parent, where)
    for opt, p in dirs:
        where = f"{opt} {p}"
        patterns = OUT_DIR_WRITES.get(opt, ("*",))
        for iopt, ip in ins:
            if (opt, iopt) in allow:
                continue
            if _identity(ip) == _identity(p):
                raise InputError(f"{where}: is the input {iopt} {ip} (give another folder)")
            if ip.absolute().parent.resolve() == p.resolve() and \
                    any(fnmatch.fnmatch(ip.name, pat) for pat in patterns):
                raise InputError(f"{where}: would write over the input {iopt} {ip} (give "
                                 f"another folder)")
        if p.is_dir():
            _probe(p, where)
        else:
            _probe(p.absolute().parent, where)
            _PENDING_DIRS.append(p.absolute())


def finish_outputs(*, failed: bool) -> None:
    """At the end of a command: when it failed, remove the output folders `check_paths`
    saw missing that the command created and left empty (one with anything in it is
    kept); either way forget them."""
    while _PENDING_DIRS:
        p = _PENDING_DIRS.pop()
        if not failed:
            continue
        try:
            if p.is_dir() and not any(p.iterdir()):
                p.rmdir()
        except OSError:
            pass
