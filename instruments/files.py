"""Reading a file named by the user: only a regular file, and never one that would block or
never end (a named pipe, ``/dev/zero``, a terminal) — whatever a symbolic link points at."""

from __future__ import annotations

import os
import stat
from pathlib import Path

#: What the file types that are not regular files are called in a message.
_KINDS = (
    (stat.S_ISDIR, "a directory"),
    (stat.S_ISFIFO, "a named pipe (FIFO)"),
    (stat.S_ISCHR, "a character device"),
    (stat.S_ISBLK, "a block device"),
    (stat.S_ISSOCK, "a socket"),
)


class FileProblem(OSError):
    """The file cannot be read as a regular file; its message says why, without the path.
    ``kind`` is what the file is instead ("a named pipe (FIFO)"), None when it is missing or
    unreadable."""

    def __init__(self, message: str, kind: str | None = None) -> None:
        super().__init__(message)
        self.kind = kind


def not_regular(mode: int) -> str | None:
    """What a file of ``mode`` (``st_mode``) is when it is not a regular file, else None."""
    if stat.S_ISREG(mode):
        return None
    return next((kind for test, kind in _KINDS if test(mode)), "not a regular file")


def check_regular_file(path: Path) -> None:
    """:class:`FileProblem` unless ``path`` is (or links to) a regular file: "no such file",
    "is a named pipe (FIFO), not a regular file", … Nothing is opened: opening a FIFO blocks."""
    try:
        mode = path.stat().st_mode
    except FileNotFoundError:
        raise FileProblem("no such file") from None
    except OSError as exc:
        raise FileProblem(f"cannot read it: {exc.strerror or exc}") from None
    kind = not_regular(mode)
    if kind is not None:
        raise FileProblem(f"is {kind}, not a regular file", kind)


def read_regular_file(path: Path) -> bytes:
    """The bytes of the regular file ``path``; :class:`FileProblem` for anything else. The type
    is checked again on the opened file (O_NONBLOCK: a FIFO swapped in meanwhile cannot block)."""
    check_regular_file(path)
    try:
        fd = os.open(path, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0) | getattr(os, "O_BINARY", 0))
    except OSError as exc:
        raise FileProblem(f"cannot read it: {exc.strerror or exc}") from None
    with os.fdopen(fd, "rb") as handle:
        kind = not_regular(os.fstat(fd).st_mode)
        if kind is not None:
            raise FileProblem(f"is {kind}, not a regular file", kind)
        try:
            return handle.read()
        except OSError as exc:
            raise FileProblem(f"cannot read it: {exc.strerror or exc}") from None
