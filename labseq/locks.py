"""Exclusive locks so two labseq processes never drive the same bench or write the same store.

A lock is an operating-system lock on a small file in a per-user directory: ``flock`` on
POSIX, ``msvcrt.locking`` on Windows (each imported only on its own platform, when a lock is
taken). The system releases it when the process ends, however it ends, so a killed run never
blocks the next one. Three rules keep the files themselves safe:

* the directory belongs to the user and nobody else may write it (checked, not assumed);
* a lock file is opened without following a symbolic link (``O_NOFOLLOW``) and never truncated:
  the holder's record is written over a fixed-width field, so a planted link cannot make labseq
  overwrite another file;
* the file is removed when its lock is let go, and files left by killed processes are removed
  by the next process that finds them free; a process that opened a file just before it was
  removed notices that the path no longer names the file it locked, and tries again.

Locks are keyed by what they protect, not by how it was spelled: the store by its device and
inode (so a symbolic or hard link to it is the same store), an instrument by its resource string
with case and spacing ignored.
"""

from __future__ import annotations

import contextlib
import hashlib
import os
import stat
import sys
import tempfile
import time
from collections.abc import Iterable, Iterator
from contextlib import ExitStack, contextmanager
from pathlib import Path

from labseq.errors import LabseqError
from labseq.process import process_start_time

#: The holder's record at the start of a lock file: "<pid> <start time>", space-padded.
RECORD_BYTES = 64
#: Windows locks a byte range; this byte, past the record, is the one that is locked.
_WINDOWS_LOCK_OFFSET = RECORD_BYTES
#: Lock files untouched for this long are candidates for the stale-file sweep.
STALE_AFTER_S = 3600.0
#: Bound on the files one sweep looks at, so a crowded directory costs little.
SWEEP_LIMIT = 256
#: How often a waiting process tries a held lock again.
RETRY_INTERVAL_S = 0.2


class LockError(LabseqError):
    """Another labseq process holds the bench or the store, or the lock directory is unsafe."""


def lock_dir() -> Path:
    """The per-user lock directory, created on first use with mode 0700, owner and mode checked.

    POSIX: ``$XDG_RUNTIME_DIR/labseq-locks`` (a per-user directory by definition), else
    ``<temp>/labseq-locks-<uid>``. Windows: ``%LOCALAPPDATA%\\labseq\\locks`` (per-user by its
    access rights). ``LABSEQ_LOCK_DIR`` overrides both (it must pass the same checks).
    """
    override = os.environ.get("LABSEQ_LOCK_DIR")
    if override:
        path = Path(override)
    elif sys.platform == "win32":
        base = os.environ.get("LOCALAPPDATA") or tempfile.gettempdir()
        path = Path(base) / "labseq" / "locks"
    elif os.environ.get("XDG_RUNTIME_DIR"):
        path = Path(os.environ["XDG_RUNTIME_DIR"]) / "labseq-locks"
    else:
        path = Path(tempfile.gettempdir()) / f"labseq-locks-{os.getuid()}"
    try:
        path.mkdir(mode=0o700, parents=True, exist_ok=True)
    except OSError as error:
        raise LockError(f"cannot create the lock directory {path}: {error.strerror}") from None
    _check_private_dir(path)
    return path


def _check_private_dir(path: Path) -> None:
    """Refuse a lock directory that is a link, not a directory, or open to other users."""
    info = os.lstat(path)
    if stat.S_ISLNK(info.st_mode) or not stat.S_ISDIR(info.st_mode):
        raise LockError(
            f"the lock directory {path} is not a plain directory (a link or a file); "
            "remove it, or set LABSEQ_LOCK_DIR to a private directory"
        )
    if sys.platform == "win32":
        return  # ownership and access are ACLs there; %LOCALAPPDATA% is the user's own
    if info.st_uid != os.geteuid():
        raise LockError(
            f"the lock directory {path} belongs to user id {info.st_uid}, not to you "
            f"({os.geteuid()}); another user may have made it: remove it, or set LABSEQ_LOCK_DIR"
        )
    if info.st_mode & 0o022:
        raise LockError(
            f"the lock directory {path} has mode {stat.S_IMODE(info.st_mode):04o}; other users "
            f"may write in it. Make it private (chmod 700 {path}) or set LABSEQ_LOCK_DIR"
        )
    if info.st_mode & 0o055:  # readable by others (as older labseq versions made it): tighten
        os.chmod(path, 0o700)


def _open_lock_file(path: Path) -> int:
    """Open (creating if needed) a lock file without following a link; check it is a plain file
    of ours with one name."""
    flags = os.O_RDWR | os.O_CREAT | getattr(os, "O_NOFOLLOW", 0) | getattr(os, "O_BINARY", 0)
    try:
        fd = os.open(path, flags, 0o600)
    except OSError as error:
        raise LockError(
            f"cannot open the lock file {path}: {error.strerror} (a link where a lock file "
            "should be is refused)"
        ) from None
    info = os.fstat(fd)
    ours = sys.platform == "win32" or info.st_uid == os.geteuid()
    if not stat.S_ISREG(info.st_mode) or info.st_nlink != 1 or not ours:
        os.close(fd)
        raise LockError(
            f"the lock file {path} is not a plain file of yours with a single name; remove it"
        )
    return fd


def _try_lock(fd: int) -> bool:
    """Take the system lock on ``fd`` without waiting; False if another process holds it."""
    if sys.platform == "win32":
        import msvcrt

        os.lseek(fd, _WINDOWS_LOCK_OFFSET, os.SEEK_SET)
        try:
            msvcrt.locking(fd, msvcrt.LK_NBLCK, 1)
        except OSError:
            return False
        return True
    import fcntl

    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        return False
    return True


def _read_record(fd: int) -> str:
    os.lseek(fd, 0, os.SEEK_SET)
    return os.read(fd, RECORD_BYTES).decode("ascii", "replace").strip()


def _write_record(fd: int) -> None:
    """Write this process's pid and start time over the fixed-width record (no truncation)."""
    started = process_start_time(os.getpid())
    record = f"{os.getpid()} {started if started is not None else 0:.3f}"
    os.lseek(fd, 0, os.SEEK_SET)
    os.write(fd, record.ljust(RECORD_BYTES - 1).encode("ascii") + b"\n")


def _same_file(fd: int, path: Path) -> bool:
    """Whether ``path`` still names the file open as ``fd`` (it may have been removed)."""
    try:
        on_disk = os.stat(path, follow_symlinks=False)
    except FileNotFoundError:
        return False
    held = os.fstat(fd)
    return (on_disk.st_dev, on_disk.st_ino) == (held.st_dev, held.st_ino)


def _release(fd: int, path: Path) -> None:
    """Remove the lock file and let go of it. On POSIX it is removed while still held, so nobody
    else can be holding it; Windows cannot remove a file that is open, so there it is closed
    first and removed only if no other process has opened it meanwhile."""
    if sys.platform == "win32":
        os.close(fd)
        with contextlib.suppress(OSError):
            os.unlink(path)
        return
    with contextlib.suppress(OSError):
        os.unlink(path)
    os.close(fd)  # closing releases the lock


def _holder_message(record: str) -> str:
    pid = record.split()[0] if record.split() else ""
    return f"pid {pid}" if pid.isdigit() else "pid unknown"


@contextmanager
def exclusive(path: Path, what: str, *, wait_s: float = 0.0) -> Iterator[None]:
    """Hold an exclusive lock on ``path`` for the block.

    With ``wait_s`` > 0 a held lock is tried again until it is free or ``wait_s`` has passed.
    Raises :class:`LockError` naming ``what`` and the process that holds it.
    """
    deadline = time.monotonic() + wait_s
    while True:
        fd = _open_lock_file(path)
        if _try_lock(fd):
            if _same_file(fd, path):
                break
            os.close(fd)  # locked a file its holder had just removed: take the new one
            continue
        record = _read_record(fd)
        os.close(fd)
        if time.monotonic() >= deadline:
            waited = f" after waiting {wait_s:g} s" if wait_s > 0 else ""
            raise LockError(
                f"{what} is in use by another labseq process ({_holder_message(record)}){waited}; "
                "wait for it to finish or stop it, then try again"
            )
        time.sleep(RETRY_INTERVAL_S)
    try:
        _write_record(fd)
        yield
    finally:
        _release(fd, path)


def remove_stale_locks(directory: Path, *, older_than_s: float = STALE_AFTER_S) -> int:
    """Remove lock files left by processes that ended without letting go (killed or crashed);
    returns how many. A file is removed only while this process holds its lock."""
    removed = 0
    now = time.time()
    for path in sorted(directory.glob("*.lock"))[:SWEEP_LIMIT]:
        try:
            if now - os.lstat(path).st_mtime < older_than_s:
                continue
            fd = _open_lock_file(path)
        except (OSError, LockError):
            continue
        if _try_lock(fd) and _same_file(fd, path):
            _release(fd, path)
            removed += 1
        else:
            os.close(fd)
    return removed


def _key_path(key: str) -> Path:
    return lock_dir() / f"{hashlib.sha256(key.encode()).hexdigest()[:24]}.lock"


def store_lock_path(store_path: Path) -> Path:
    """The lock file of a store: keyed by the file itself (device and inode), so the same store
    reached through a link or another spelling of its path shares one lock. A store that does
    not exist yet is keyed by its resolved path."""
    try:
        info = os.stat(store_path)
        key = f"store:{info.st_dev}:{info.st_ino}"
    except OSError:
        key = f"store:{os.path.realpath(store_path)}"
    return _key_path(key)


def bench_lock_path(resource: str) -> Path:
    """The lock file of one VISA resource (case and spacing do not make it another one)."""
    return _key_path("".join(resource.split()).lower())


def store_lock(store_path: Path, *, wait_s: float = 0.0) -> contextlib.AbstractContextManager[None]:
    """Exclusive use of the store at ``store_path`` (see :func:`exclusive`)."""
    return exclusive(store_lock_path(store_path), f"the store {store_path}", wait_s=wait_s)


@contextmanager
def instrument_locks(resources: Iterable[str]) -> Iterator[None]:
    """Lock every instrument resource, all or nothing; first clear away lock files that killed
    processes left behind."""
    with contextlib.suppress(OSError, LockError):
        remove_stale_locks(lock_dir())
    with ExitStack() as stack:
        for resource in sorted(set(resources)):
            stack.enter_context(exclusive(bench_lock_path(resource), f"the instrument {resource}"))
        yield


@contextmanager
def run_locks(store_path: Path, resources: Iterable[str]) -> Iterator[None]:
    """Lock the store and every instrument resource of a run, all or nothing."""
    with store_lock(store_path), instrument_locks(resources):
        yield
