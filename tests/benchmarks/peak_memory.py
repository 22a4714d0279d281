"""Peak memory of an action, for the benchmarks.

Two measures. tracemalloc's peak counts numpy's and Python's allocations exactly and repeats from
run to run, but traces every one of them, which makes code that creates many small objects (a
text reader's lines) ten to twenty times slower. The resident-set high-water counts everything
(BLAS buffers, SQLite's pages, the allocator's arenas) at no cost to the action; Linux resets it
on request (``/proc/self/clear_refs``) and reports it as ``VmHWM`` in ``/proc/self/status``. It
is taken in a fresh process: one that has already held and freed arrays of the same size reuses
that memory, and its high-water hardly moves.
"""

from __future__ import annotations

import gc
import subprocess
import sys
import tracemalloc
from collections.abc import Callable
from pathlib import Path

STATUS = Path("/proc/self/status")
CLEAR_REFS = Path("/proc/self/clear_refs")
#: A fresh interpreter that runs ``setup``, then measures ``action`` (an expression).
CHILD = """\
import sys
sys.path.insert(0, {here!r})
from peak_memory import resident_peak_bytes
{setup}
print(resident_peak_bytes(lambda: {action}))
"""


def traced_peak_bytes(action: Callable[[], object]) -> int:
    """tracemalloc's peak over ``action`` (what it allocates and holds at its busiest)."""
    gc.collect()
    tracemalloc.start()
    try:
        action()
        return tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()


def resident_high_water_available() -> bool:
    return CLEAR_REFS.exists() and STATUS.exists()


def status_bytes(key: str) -> int:
    """A memory figure of /proc/self/status (given there in kB)."""
    for line in STATUS.read_text().splitlines():
        if line.startswith(key + ":"):
            return int(line.split()[1]) * 1024
    raise LookupError(f"{key} is not in {STATUS}")


def resident_peak_bytes(action: Callable[[], object]) -> int:
    """What ``action`` adds to this process's resident-set high-water (Linux only)."""
    gc.collect()
    CLEAR_REFS.write_text("5")  # the high-water mark starts again from the resident set now
    before = status_bytes("VmRSS")
    action()
    return status_bytes("VmHWM") - before


def fresh_resident_peak_bytes(setup: str, action: str) -> int | None:
    """What the expression ``action`` adds to the resident-set high-water of a fresh interpreter
    that has run ``setup`` (Python statements: imports, inputs); None where the system does not
    tell it."""
    if not resident_high_water_available():
        return None
    script = CHILD.format(here=str(Path(__file__).parent), setup=setup, action=action)
    done = subprocess.run(
        [sys.executable, "-c", script], capture_output=True, text=True, timeout=600, check=True
    )
    return int(done.stdout.split()[-1])
