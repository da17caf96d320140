"""Input files are opened only once they are known to be regular files (every reader goes here)."""
from __future__ import annotations

import os
import stat
from pathlib import Path

from shardtrain.errors import InputError

_FILE_KINDS = ((stat.S_ISFIFO, "a named pipe (FIFO)"), (stat.S_ISCHR, "a character device"),
               (stat.S_ISBLK, "a block device"), (stat.S_ISSOCK, "a socket"))


def require_regular_file(path: str | os.PathLike, what: str = "file",
                         option: str | None = None) -> Path:
    """`path` as a Path when it is a regular file (symbolic links followed), else InputError
    (prefixed with `option`, e.g. "--assignment", when given).

    Checked with os.stat before anything opens the file: opening a FIFO for reading blocks
    until a writer comes, and a character device can be read without end. Every reader of a
    graph, features, labels or assignment file goes through here.
    """
    path = Path(path)
    said = f"{option} {path}" if option else f"{path}"
    try:
        mode = os.stat(path).st_mode
    except FileNotFoundError:
        raise InputError(f"{said}: no such {what}") from None
    except NotADirectoryError:
        raise InputError(f"{said}: no such {what} (a parent is not a folder)") from None
    except OSError as exc:
        raise InputError(f"{said}: cannot read: {exc.strerror or exc}") from None
    if stat.S_ISDIR(mode):
        raise InputError(f"{said}: is a directory, expected a {what}")
    if not stat.S_ISREG(mode):
        kind = next((name for test, name in _FILE_KINDS if test(mode)), "a special file")
        raise InputError(f"{said}: is {kind}, expected a regular {what}")
    return path


def open_checked(path: Path, what: str = "file"):
    require_regular_file(path, what)
    try:
        return open(path, "rb")
    except OSError as exc:
        raise InputError(f"{path}: cannot read: {exc.strerror or exc}") from None
