"""Input files are opened only once they are known to be regular files (every reader goes here)."""
from __future__ import annotations

import os
import stat
from pathlib import Path

from shardtrain.errors import InputError, ParameterError

_FILE_KINDS = ((stat.S_ISFIFO, "a named pipe (FIFO)"), (stat.S_ISCHR, "a character device"),
               (stat.S_ISBLK, "a block device"), (stat.S_ISSOCK, "a socket"))


def require_regular_file(path: str | os.PathLike, what: str = "file", *,
                         param: str | None = None) -> Path:
    """`path` as a Path when it is a regular file (symbolic links followed), else InputError;
    with `param` (the caller's parameter, e.g. "assignment") a `ParameterError` naming it.

    Checked with os.stat before anything opens the file: opening a FIFO for reading blocks
    until a writer comes, and a character device can be read without end. Every reader of a
    graph, features, labels or assignment file goes through here.
    """
    path = Path(path)

    def refuse(text: str):
        if param is not None:
            return ParameterError(param, text, value=path)
        return InputError(f"{path}: {text}")

    try:
        mode = os.stat(path).st_mode
    except FileNotFoundError:
        raise refuse(f"no such {what}") from None
    except NotADirectoryError:
        raise refuse(f"no such {what} (a parent is not a folder)") from None
    except OSError as exc:
        raise refuse(f"cannot read: {exc.strerror or exc}") from None
    if stat.S_ISDIR(mode):
        raise refuse(f"is a directory, expected a {what}")
    if not stat.S_ISREG(mode):
        kind = next((name for test, name in _FILE_KINDS if test(mode)), "a special file")
        raise refuse(f"is {kind}, expected a regular {what}")
    return path


def open_checked(path: Path, what: str = "file"):
    require_regular_file(path, what)
    try:
        return open(path, "rb")
    except OSError as exc:
        raise InputError(f"{path}: cannot read: {exc.strerror or exc}") from None
