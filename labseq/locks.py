"""Exclusive locks so two labseq processes never drive the same bench or write the same run.

A lock is an ``flock`` on a small file: the kernel releases it when the process ends, however it
ends (SIGKILL included), so a crashed run never leaves a stale lock behind. The file keeps the
holder's pid for the message the next process prints.
"""

from __future__ import annotations

import fcntl
import hashlib
import os
import tempfile
from collections.abc import Iterable, Iterator
from contextlib import ExitStack, contextmanager
from pathlib import Path

from labseq.errors import LabseqError


class LockError(LabseqError):
    """Another labseq process holds the bench or the store."""


def lock_dir() -> Path:
    """Where bench locks live: the user's runtime directory, else the system temp directory."""
    base = os.environ.get("XDG_RUNTIME_DIR") or tempfile.gettempdir()
    path = Path(base) / "labseq-locks"
    path.mkdir(parents=True, exist_ok=True)
    return path


@contextmanager
def exclusive(path: Path, what: str) -> Iterator[None]:
    """Hold an exclusive lock on ``path`` for the block; :class:`LockError` names ``what`` and
    the process that has it when it is taken."""
    fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            holder = os.pread(fd, 64, 0).decode("ascii", "replace").strip() or "unknown"
            raise LockError(
                f"{what} is in use by another labseq process (pid {holder}); wait for it to "
                "finish or stop it, then try again"
            ) from None
        os.ftruncate(fd, 0)
        os.pwrite(fd, f"{os.getpid()}\n".encode("ascii"), 0)
        yield
    finally:
        os.close(fd)  # closing releases the lock


def bench_lock_path(resource: str) -> Path:
    """The lock file of one VISA resource (case and spacing do not make it another one)."""
    key = "".join(resource.split()).lower()
    return lock_dir() / f"{hashlib.sha256(key.encode()).hexdigest()[:20]}.lock"


@contextmanager
def run_locks(store_path: Path, resources: Iterable[str]) -> Iterator[None]:
    """Lock the store and every instrument resource of a run, all or nothing."""
    with ExitStack() as stack:
        stack.enter_context(exclusive(Path(f"{store_path}.lock"), f"the store {store_path}"))
        for resource in sorted(set(resources)):
            stack.enter_context(exclusive(bench_lock_path(resource), f"the instrument {resource}"))
        yield
