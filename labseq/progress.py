"""What the user sees while a run goes: a progress bar with point, capture, elapsed and ETA, or
nothing at all in quiet mode (errors still reach stderr)."""

from __future__ import annotations

from rich.console import Console
from rich.progress import (
    BarColumn,
    MofNCompleteColumn,
    TextColumn,
    TimeElapsedColumn,
    TimeRemainingColumn,
)
from rich.progress import Progress as RichProgress

from labseq.units import format_si


class Progress:
    """Progress of a sweep on the terminal (stderr), or silence with ``quiet``."""

    def __init__(self, *, quiet: bool = False, console: Console | None = None) -> None:
        self.quiet = quiet
        self.console = console or Console(stderr=True)
        self._bar: RichProgress | None = None
        self._task = None

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

    def message(self, text: str, *, error: bool = False) -> None:
        """A line for the user; errors are shown even in quiet mode."""
        if error or not self.quiet:
            self.console.print(text, style="bold red" if error else None, markup=False)

    def stop(self) -> None:
        """Remove the live display (the last state stays on screen)."""
        if self._bar is not None:
            self._bar.stop()
            self._bar = None
