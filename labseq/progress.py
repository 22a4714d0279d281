"""What the user sees while a run goes: a progress bar with point, capture, elapsed and ETA, or
nothing at all in quiet mode (errors still reach stderr)."""

from __future__ import annotations

import sys
import time

from rich.console import Console
from rich.progress import (
    BarColumn,
    MofNCompleteColumn,
    TextColumn,
    TimeElapsedColumn,
    TimeRemainingColumn,
)
from rich.progress import Progress as RichProgress
from rich.status import Status

from labseq.units import format_si

#: Where no live line can be drawn (stderr is not a terminal), a wait is printed this often.
WAIT_PRINT_INTERVAL_S = 10.0
#: Width given to output that is not a terminal (a file, a pipe, a CI log): wide enough that
#: nothing is wrapped, which the reader's own viewer does better.
UNWRAPPED_WIDTH = 10_000


def make_console(*, stderr: bool = False) -> Console:
    """A rich console for stdout (or stderr) that wraps only on a terminal: written to a file or
    a pipe, every line stays whole (a resource string, a caution, a table row never split)."""
    stream = sys.stderr if stderr else sys.stdout
    terminal = stream.isatty()
    return Console(
        stderr=stderr,
        soft_wrap=not terminal,
        width=None if terminal else UNWRAPPED_WIDTH,
    )


class Progress:
    """Progress of a sweep on the terminal (stderr), or silence with ``quiet``."""

    def __init__(self, *, quiet: bool = False, console: Console | None = None) -> None:
        self.quiet = quiet
        self.console = console or make_console(stderr=True)
        self._bar: RichProgress | None = None
        self._task = None
        self._status: Status | None = None
        self._last_wait_print: float | None = None

    def start(self, total: int, done: int = 0) -> None:
        """Show the bar for ``total`` points of which ``done`` are already done."""
        if self.quiet:
            return
        self._bar = RichProgress(
            TextColumn("[bold]{task.description}"),
            BarColumn(),
            MofNCompleteColumn(),
            TextColumn("elapsed"),
            TimeElapsedColumn(),
            TextColumn("ETA"),
            TimeRemainingColumn(),
            console=self.console,
            transient=False,
        )
        self._bar.start()
        self._task = self._bar.add_task("starting", total=total, completed=done)

    def point(
        self, index: int, total: int, line_v: float, load_a: float, capture: int, captures: int
    ) -> None:
        """Say which point and capture are being taken."""
        if self._bar is not None:
            self._bar.update(
                self._task,
                description=(
                    f"point {index}/{total}  {format_si(line_v, 'V')} / {format_si(load_a, 'A')}"
                    f"  capture {capture}/{captures}"
                ),
            )

    def advance(self) -> None:
        """One more point is finished (done, failed or skipped)."""
        if self._bar is not None:
            self._bar.advance(self._task)

    def message(self, text: str, *, error: bool = False, always: bool = False) -> None:
        """A line for the user; errors (and ``always`` lines) are shown even in quiet mode."""
        if error or always or not self.quiet:
            self.console.print(text, style="bold red" if error else None, markup=False)

    def waiting(self, text: str | None) -> None:
        """Show what the run is waiting for (``None`` ends it), in place of the bar: as a live
        line on a terminal, else (and in quiet mode, so that a long wait never looks like a
        hang) as a printed line at most every :data:`WAIT_PRINT_INTERVAL_S`."""
        if self._bar is not None or text is None:
            self.stop()  # the bar's work is over once the run waits for something else
        if text is None:
            return
        if self.console.is_terminal and not self.quiet:
            if self._status is None:
                self._status = self.console.status(text)
                self._status.start()
            else:
                self._status.update(text)
            return
        now = time.monotonic()
        if self._last_wait_print is None or now - self._last_wait_print >= WAIT_PRINT_INTERVAL_S:
            self._last_wait_print = now
            self.console.print(text, markup=False)

    def stop(self) -> None:
        """Remove the live displays (the last state stays on screen)."""
        if self._bar is not None:
            self._bar.stop()
            self._bar = None
        if self._status is not None:
            self._status.stop()
            self._status = None
        self._last_wait_print = None
