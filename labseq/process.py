"""Whether the process that owns a run is still alive, on any operating system.

A process id alone is not an identity: ids are reused, so a run whose process died long ago can
look alive because another process now has its id. The start time of the process (as the
operating system reports it, through psutil) is recorded with the id and compared as well.
psutil is imported when a check is made: its platform backend is then the one of the system
labseq runs on, and nothing platform-specific is loaded at start-up.
"""

from __future__ import annotations

#: Two readings of one process's start time agree within this (the system reports it rounded).
START_TIME_TOLERANCE_S = 1.0


def process_start_time(pid: int) -> float | None:
    """The start time of process ``pid`` in seconds since the epoch, or None if there is none
    (or it cannot be read)."""
    import psutil

    try:
        return psutil.Process(pid).create_time()
    except (psutil.Error, OSError, ValueError, OverflowError):
        return None


def process_alive(pid: int | None, started_at: float | None) -> bool:
    """True when process ``pid`` exists and, if ``started_at`` is known, started then.

    Without a recorded start time (runs stored by an older labseq) only the id is checked.
    """
    if pid is None or pid <= 0:
        return False
    if started_at is None:
        import psutil

        try:
            return psutil.pid_exists(pid)
        except (OSError, ValueError, OverflowError):
            return False
    now_started = process_start_time(pid)
    return now_started is not None and abs(now_started - started_at) <= START_TIME_TOLERANCE_S
