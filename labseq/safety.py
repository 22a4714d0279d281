"""Electrical-safety rules the runner applies on a real bench, and turning signals into clean exits.

The voltage limits are those of energy source class ES1 in IEC 62368-1 (60 V DC, 30 V AC rms for
steady state; values from memory of the standard's table of ES1 limits).
"""

from __future__ import annotations

import signal
import threading
from collections.abc import Iterator
from contextlib import AbstractContextManager, contextmanager

#: ES1 steady-state limits of IEC 62368-1 (from memory).
ES1_DC_V = 60.0
ES1_AC_RMS_V = 30.0

#: The bus is called safe once it reads below this (the ES1 DC limit).
SAFE_BUS_V = ES1_DC_V

CAUTIONS = """\
CAUTION — hazardous voltage on the bench.
  * The DUT's switch node and bulk capacitor reach hundreds of volts; the bulk capacitor stays
    charged after the source is off. Treat every node as live until it is measured below 60 V.
  * Power the DUT through an isolating transformer or an isolated source; never defeat the
    oscilloscope's protective earth to float a probe — use differential or suitably rated probes.
  * Keep covers and interlocks in place while the sweep runs unattended; keep hands off the DUT.
  * labseq switches the load and the source off on every exit and waits for the bus to fall,
    but it does not replace your lab's rules, local electrical codes or the judgement of
    qualified, licensed people. Follow those first."""


def exceeds_es1(line_v: float, line_is_ac: bool) -> bool:
    """Return True when a line setpoint is above the ES1 limit (AC values are rms)."""
    return line_v > (ES1_AC_RMS_V if line_is_ac else ES1_DC_V)


class Interrupted(BaseException):
    """SIGINT or SIGTERM arrived: unwind through every ``finally`` so the bench is left safe.

    A BaseException, like KeyboardInterrupt, so that ``except Exception`` in point-error handling
    does not swallow it.
    """

    def __init__(self, signal_name: str) -> None:
        super().__init__(f"interrupted by {signal_name}")
        self.signal_name = signal_name


@contextmanager
def _signal_handler(handler: object) -> Iterator[None]:
    """Within the block, SIGINT and SIGTERM go to ``handler`` (main thread only: elsewhere
    Python cannot set handlers, and signals reach only the main thread anyway)."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    previous = {sig: signal.signal(sig, handler) for sig in (signal.SIGINT, signal.SIGTERM)}
    try:
        yield
    finally:
        for sig, old in previous.items():
            signal.signal(sig, old)


def _raise_interrupted(signum: int, _frame: object) -> None:
    raise Interrupted(signal.Signals(signum).name)


def signals_raise_interrupted() -> AbstractContextManager[None]:
    """Within the block, SIGINT and SIGTERM raise :class:`Interrupted`."""
    return _signal_handler(_raise_interrupted)


def signals_ignored() -> AbstractContextManager[None]:
    """Within the block (making the bench safe), SIGINT and SIGTERM are ignored, so a second
    Ctrl-C cannot cut the shutdown short; each instrument call is bounded by its timeout."""
    return _signal_handler(signal.SIG_IGN)
