"""Reading input files safely: only regular files, of bounded size, never blocking.

A path given as input may name a folder, a named pipe (which blocks a reader until someone writes to
it), a device such as ``/dev/zero`` (endless) or a link to one.  Every input file dnmr reads goes
through :func:`read_input_bytes`, which refuses all of these with one line before reading a byte.
"""
from __future__ import annotations

import os
import stat
from pathlib import Path

from dnmr.errors import InputError


def _kind(mode: int) -> str:
    """What a non-regular file is, in words."""
    if stat.S_ISDIR(mode):
        return "a folder"
    if stat.S_ISFIFO(mode):
        return "a named pipe"
    if stat.S_ISCHR(mode) or stat.S_ISBLK(mode):
        return "a device"
    if stat.S_ISSOCK(mode):
        return "a socket"
    return "not a regular file"


def regular_file_size(path: str | Path, what: str = "file") -> int:
    """The size (bytes) of `path` after checking that it is a regular file (links followed).

    Raises
    ------
    InputError
        When `path` is missing, unreadable, a folder, a named pipe, a device or a socket.
    """
    try:
        info = os.stat(path)
    except OSError as err:
        raise InputError(f"cannot read the {what} ({err.strerror}); check the path", source=path) from None
    if not stat.S_ISREG(info.st_mode):
        raise InputError(f"is {_kind(info.st_mode)}, not a {what}; give a regular file", source=path)
    return info.st_size


def read_input_bytes(path: str | Path, max_bytes: int, what: str = "file") -> bytes:
    """The contents of the regular file `path`, refused unread when larger than `max_bytes`.

    The file is opened without blocking and checked again once open, so a named pipe swapped in
    between the check and the read cannot hang the program, and at most `max_bytes` + 1 bytes are read
    whatever the file turns out to be.

    Parameters
    ----------
    path : str or Path
        The file.
    max_bytes : int
        Largest size accepted (bytes).
    what : str
        What the file should be, for messages ("model file", "spectrum file" ...).
    """
    size = regular_file_size(path, what)
    if size > max_bytes:
        raise InputError(f"holds {size} bytes, more than the {max_bytes // 2**20} MiB a {what} may have",
                         source=path)
    try:
        fd = os.open(path, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0))
    except OSError as err:
        raise InputError(f"cannot read the {what} ({err.strerror}); check the path", source=path) from None
    with os.fdopen(fd, "rb") as handle:
        if not stat.S_ISREG(os.fstat(handle.fileno()).st_mode):
            raise InputError(f"is not a regular file, not a {what}; give a regular file", source=path)
        data = handle.read(max_bytes + 1)
    if len(data) > max_bytes:
        raise InputError(f"holds more than the {max_bytes // 2**20} MiB a {what} may have", source=path)
    return data
