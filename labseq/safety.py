"""Electrical-safety rules the runner applies on a real bench, and turning signals into clean exits.

The voltage limits are those of energy source class ES1 in IEC 62368-1 (60 V DC, 30 V AC rms for
steady state; values from memory of the standard's table of ES1 limits).

Signals: while a run drives the bench, SIGINT, SIGTERM and SIGHUP go to one :class:`SignalLatch`
for the whole run. The first one is latched inside the handler itself and, while the sweep runs,
raised as :class:`Interrupted`; every later one is only counted, so a second signal a few
milliseconds after the first (as ``timeout``, CI runners and service managers send) can never cut
the shutdown short. There is no moment between the sweep and the shutdown when the default
handlers (which would kill the process with the outputs on) are back in place.
"""

from __future__ import annotations

import signal
import threading
from collections.abc import Iterator
from contextlib import AbstractContextManager, contextmanager
from types import FrameType, TracebackType

#: ES1 steady-state limits of IEC 62368-1 (from memory).
ES1_DC_V = 60.0
ES1_AC_RMS_V = 30.0

#: The bus counts as below ES1 once it reads below this (the ES1 DC limit).
SAFE_BUS_V = ES1_DC_V

#: The signals that end a run cleanly, and the exit status of a run each one ended:
#: 128 + the signal number, as shells report a process ended by that signal.
HANDLED_SIGNALS = (signal.SIGHUP, signal.SIGINT, signal.SIGTERM)

_ES1_DC = f"{ES1_DC_V:g} V"
CAUTIONS = f"""\
CAUTION — hazardous voltage on the bench.
  * The DUT's switch node and bulk capacitor reach hundreds of volts; the bulk capacitor stays
    charged after the source is off. Treat every node as live until it is measured below {_ES1_DC}.
  * Power the DUT through an isolating transformer or an isolated source; never defeat the
    oscilloscope's protective earth to float a probe — use differential or suitably rated probes.
  * Keep covers and interlocks in place while the sweep runs unattended; keep hands off the DUT.
  * labseq switches the load and the source off on every exit and waits for the bus to fall,
    but it does not replace your lab's rules, local electrical codes or the judgement of
    qualified, licensed people. Follow those first."""


def signal_exit_code(signal_name: str) -> int:
    """The exit status of a run ended by ``signal_name``: 129 SIGHUP, 130 SIGINT, 143 SIGTERM."""
    return 128 + int(signal.Signals[signal_name])


class Interrupted(BaseException):
    """SIGINT, SIGTERM or SIGHUP arrived: unwind so the bench is left safe.

    A BaseException, like KeyboardInterrupt, so that ``except Exception`` in point-error handling
    does not swallow it.
    """

    def __init__(self, signal_name: str) -> None:
        super().__init__(f"interrupted by {signal_name}")
        self.signal_name = signal_name

    @property
    def exit_code(self) -> int:
        return signal_exit_code(self.signal_name)


class SignalLatch:
    """The handler of SIGINT, SIGTERM and SIGHUP for the whole of a run: a context manager, or
    :meth:`install`-ed for the rest of a command's process.

    The first signal is latched in :attr:`first`; if it arrives while :attr:`raising` is set, it
    is raised as :class:`Interrupted` — once: the handler clears :attr:`raising` before it raises.
    Every signal, first or later, is counted in :attr:`count` and does nothing else, so the code
    after :meth:`hold` (the shutdown) runs to its end whatever arrives. The handler sets its
    state before it makes any call, so a signal handled while another is being handled (Python
    may run the handler again at any call) cannot raise a second exception.

    Outside the main thread (where Python cannot set handlers, and which signals never reach)
    the latch does nothing.
    """

    def __init__(self) -> None:
        self.count = 0
        self.raising = True
        self._first: int | None = None
        self._last: int | None = None
        self._previous: dict[int, object] = {}

    @property
    def first(self) -> str | None:
        """The name of the first signal that arrived (``"SIGTERM"``), or None."""
        return None if self._first is None else signal.Signals(self._first).name

    @property
    def last(self) -> str | None:
        """The name of the latest signal, or None."""
        return None if self._last is None else signal.Signals(self._last).name

    def _handle(self, signum: int, _frame: FrameType | None) -> None:
        self.count += 1
        self._last = signum
        if self._first is not None:
            return
        self._first = signum
        if self.raising:
            self.raising = False
            raise Interrupted(signal.Signals(signum).name)

    def hold(self) -> None:
        """From now on signals are latched and counted, never raised (the shutdown begins)."""
        self.raising = False

    def install(self) -> SignalLatch:
        """Install the handlers for the rest of the process (a command's whole life: no
        default handler comes back between the run's end and the process's exit)."""
        if threading.current_thread() is threading.main_thread():
            try:
                for sig in HANDLED_SIGNALS:
                    self._previous[sig] = signal.signal(sig, self._handle)
            except BaseException:  # a signal raised while the handlers were being installed
                self.__exit__(None, None, None)
                raise
        return self

    def __enter__(self) -> SignalLatch:
        return self.install()

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        traceback: TracebackType | None,
    ) -> None:
        for sig, previous in self._previous.items():
            signal.signal(sig, previous)  # type: ignore[arg-type]
        self._previous.clear()


@contextmanager
def _signal_handler(handler: object) -> Iterator[None]:
    """Within the block, the handled signals go to ``handler`` (main thread only)."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    previous = {sig: signal.signal(sig, handler) for sig in HANDLED_SIGNALS}  # type: ignore[arg-type]
    try:
        yield
    finally:
        for sig, old in previous.items():
            signal.signal(sig, old)


def _raise_interrupted(signum: int, _frame: object) -> None:
    raise Interrupted(signal.Signals(signum).name)


def signals_raise_interrupted() -> AbstractContextManager[None]:
    """Within the block, SIGINT, SIGTERM and SIGHUP raise :class:`Interrupted` (for commands
    that drive no outputs, such as ``labseq sim``; a run uses :class:`SignalLatch`)."""
    return _signal_handler(_raise_interrupted)
