"""What every waveform reader returns and checks: the record, its columns, units and checks."""

from __future__ import annotations

import math
import re
from collections.abc import Callable, Sequence
from dataclasses import dataclass, replace

import numpy as np

from labseq.analysis import MIN_RECORD_SAMPLES
from labseq.errors import InputError
from labseq_instruments.text import quoted

#: Largest deviation of one time step from the mean step, as a fraction of it. Text files round
#: times to a few significant digits, so exact equality cannot be asked for; a missing sample
#: (a step of twice the interval) is far outside.
UNIFORM_TOLERANCE = 0.05
#: Largest magnitude accepted in a volts column: a megavolt is far beyond any power-supply probe.
MAX_ABS_VOLTS = 1e6
#: Times checked at a time by :func:`check_uniform` (a block of them and of their steps is all
#: the memory the check takes).
CHECK_BLOCK_SAMPLES = 1 << 16

#: Where sample k of a record sits in its file, for an error message ("line 812", "row 3").
Where = Callable[[int], str]


@dataclass(frozen=True)
class FileRecord:
    """A uniformly sampled record read from a waveform file: ``volts[k]`` at
    ``t0_s + k·sample_interval_s`` (the scope's own record, codes and scaling, is
    :class:`labseq_instruments.Waveform`).

    ``clipped`` marks the samples at the edge of the scope's screen, where the true voltage is
    unknown (None where the file does not say). ``note`` says what was read where the file held
    a choice or a conversion (a column, a capture, units); None for the plain ``time_s,volts``.
    """

    volts: np.ndarray
    sample_interval_s: float
    t0_s: float
    clipped: np.ndarray | None = None
    note: str | None = None

    def noted(self, note: str | None) -> FileRecord:
        """The same record with ``note``."""
        return replace(self, note=note)


@dataclass(frozen=True)
class Column:
    """One column of a file: its place in a row, its name, the unit the file gives it."""

    index: int
    name: str
    unit: str | None = None


def listing(names: Sequence[str], limit: int = 12) -> str:
    """Names for an error message: all of a few, the first ``limit`` of many."""
    shown = ", ".join(quoted(str(name), 40) for name in names[:limit])
    return shown if len(names) <= limit else f"{shown} … and {len(names) - limit} more"


# -- units ----------------------------------------------------------------------------------

#: SI prefixes a time or voltage unit in a file may carry (BIPM SI brochure, 9th ed., table 7).
_PREFIXES = {"p": 1e-12, "n": 1e-9, "u": 1e-6, "µ": 1e-6, "μ": 1e-6, "m": 1e-3, "k": 1e3, "K": 1e3}
_UNIT_WORDS = {
    **dict.fromkeys(("s", "sec", "secs", "second", "seconds"), "time"),
    **dict.fromkeys(("v", "volt", "volts"), "volts"),
    # Units of other quantities, recognised so that a column in them is refused by name.
    **dict.fromkeys(("a", "amp", "amps", "w", "hz", "%", "div", "db", "dbm", "ω", "ohm"), "other"),
}
_UNIT = re.compile(r"(?P<prefix>[pnuµμmkK]?)(?P<word>[A-Za-z%Ωω]+)")
TIME_UNITS_HINT = "s, ms, us (or µs), ns or ps"


def parse_unit(text: str) -> tuple[str, float] | None:
    """(kind, factor to SI) of a unit as files write it — ``s``, ``µs``, ``(V)``, ``[mV]``,
    ``Volt`` — where kind is ``time``, ``volts`` or ``other``; None when ``text`` is no unit."""
    body = text.strip().strip("()[]").strip()
    match = _UNIT.fullmatch(body)
    if not match:
        return None
    word = match.group("word").lower()
    if match.group("prefix") and word in _UNIT_WORDS:
        return _UNIT_WORDS[word], _PREFIXES[match.group("prefix")]
    whole = body.lower()  # "sec" or "volt" read whole, not as a prefix and a word
    return (_UNIT_WORDS[whole], 1.0) if whole in _UNIT_WORDS else None


def time_scale(text: str, what: str) -> float:
    """Seconds per unit of a time unit given by the user (``--time-unit us`` → 1e-6)."""
    unit = parse_unit(text)
    if unit is None or unit[0] != "time":
        raise InputError(f"{what} {quoted(text, 20)}: give a time unit: {TIME_UNITS_HINT}")
    return unit[1]


# -- columns --------------------------------------------------------------------------------


def channel_number(name: str) -> int | None:
    """The scope channel a column name refers to: 2 for ``CH2``, ``Channel 2``, ``C2``."""
    match = re.fullmatch(r"(?:ch|chan|channel|c)\s*(\d+)", name.strip(), re.IGNORECASE)
    return int(match.group(1)) if match else None


def pick_channel(path: object, channels: Sequence[Column], wanted: str | None) -> Column:
    """The voltage column named or numbered by ``--channel`` (``wanted``), or the only one.

    A name matches a column's name in any case; a number N picks the column of scope channel N
    (``CH2``, ``Channel 2``) where the file names one, else the N-th voltage column.
    """
    numbered = ", ".join(f"{k}: {quoted(c.name, 40)}" for k, c in enumerate(channels[:12], 1))
    if len(channels) > 12:
        numbered += f" … and {len(channels) - 12} more"
    if wanted is None:
        if len(channels) == 1:
            return channels[0]
        raise InputError(
            f"{path}: {len(channels)} voltage columns ({numbered}); choose one with --channel "
            "NAME or --channel N"
        )
    by_name = [c for c in channels if c.name.strip().lower() == wanted.strip().lower()]
    if len(by_name) == 1:
        return by_name[0]
    if wanted.strip().isdigit():
        number = int(wanted)
        by_channel = [c for c in channels if channel_number(c.name) == number]
        if len(by_channel) == 1:
            return by_channel[0]
        if not by_channel and not by_name and 1 <= number <= len(channels):
            return channels[number - 1]
    raise InputError(
        f"{path}: --channel {quoted(wanted, 40)} matches {len(by_name) or 'no'} voltage "
        f"column(s) of {numbered}; give a name, or a number from 1 to {len(channels)}"
    )


def volts_scale(path: object, column: Column) -> float:
    """Volts per unit of a voltage column (1 where the file gives no unit; 1e-3 for mV)."""
    if not column.unit:
        return 1.0
    unit = parse_unit(column.unit)
    if unit is None or unit[0] != "volts":
        raise InputError(
            f"{path}: column {quoted(column.name, 40)} is in {quoted(column.unit, 20)}; analyze "
            "needs a voltage column (V, mV or kV) — choose another with --channel"
        )
    return unit[1]


# -- checks ---------------------------------------------------------------------------------


def _row(sample: int) -> str:
    return f"row {sample + 1}"


def check_volts(
    path: object, volts: np.ndarray, *, volts_name: str = "volts", where: Where = _row
) -> None:
    """Check a volts column: long enough, finite, and plausibly in volts.

    The checks of a record that holds are cheap in memory (no temporary of its size); the place
    of a failure is found only once one has failed.
    """
    if volts.size < MIN_RECORD_SAMPLES:
        raise InputError(f"{path}: {volts.size} samples; at least {MIN_RECORD_SAMPLES} are needed")
    low, high = float(volts.min()), float(volts.max())  # NaN when any sample is NaN
    if not (np.isfinite(low) and np.isfinite(high)):
        bad = np.flatnonzero(~np.isfinite(volts))
        raise InputError(
            f"{path}: {volts_name} has {bad.size} missing or non-finite value(s), first at "
            f"{where(int(bad[0]))}"
        )
    if max(-low, high) > MAX_ABS_VOLTS:
        largest = int(np.argmax(np.abs(volts)))
        raise InputError(
            f"{path}: {volts_name} reaches {volts[largest]:.3g} V at {where(largest)}; values "
            f"beyond ±{MAX_ABS_VOLTS:.0e} V are no measurement — check that the column is in volts"
        )


class TimeAxis:
    """The checks of :func:`check_uniform` on a time column given a block at a time, so that a
    reader can check the times without keeping them: the count, the first and last time, the
    first non-finite time and the first step that does not increase, and the shortest and longest
    step (the step that deviates most from the mean step is one of those two)."""

    def __init__(self) -> None:
        self.count = 0
        self.first_s = self.last_s = math.nan
        self.non_finite = 0
        self.first_non_finite: int | None = None
        self.first_backward: int | None = None  # index of the step's first sample
        self.shortest = self.longest = (math.nan, -1)  # (step, index of its first sample)

    def add(self, time_s: np.ndarray) -> None:
        """Take the next block of times."""
        if not time_s.size:
            return
        bad = np.flatnonzero(~np.isfinite(time_s))
        if bad.size and self.first_non_finite is None:
            self.first_non_finite = self.count + int(bad[0])
        self.non_finite += bad.size
        joined = time_s if self.count == 0 else np.concatenate(([self.last_s], time_s))
        offset = max(self.count - 1, 0)  # index of the first sample of the first step
        if self.count == 0:
            self.first_s = float(time_s[0])
        self.count += time_s.size
        self.last_s = float(time_s[-1])
        if joined.size < 2 or self.non_finite:
            return
        steps = np.diff(joined)
        backward = np.flatnonzero(steps <= 0)
        if backward.size and self.first_backward is None:
            self.first_backward = offset + int(backward[0])
        shortest, longest = int(np.argmin(steps)), int(np.argmax(steps))
        if not steps[shortest] >= self.shortest[0]:  # also where no step was seen yet (NaN)
            self.shortest = (float(steps[shortest]), offset + shortest)
        if not steps[longest] <= self.longest[0]:
            self.longest = (float(steps[longest]), offset + longest)

    def check(
        self, path: object, *, time_name: str = "time_s", where: Where = _row
    ) -> tuple[float, float]:
        """(sample interval, time of the first sample), or the error :func:`check_uniform`
        raises for these times."""
        if self.non_finite:
            raise InputError(
                f"{path}: {time_name} has {self.non_finite} missing or non-finite value(s), first "
                f"at {where(self.first_non_finite or 0)}"
            )
        if self.first_backward is not None:
            raise InputError(
                f"{path}: {time_name} does not increase at {where(self.first_backward + 1)}; sort "
                "the samples by time"
            )
        interval = (self.last_s - self.first_s) / (self.count - 1)
        # |step − interval| is largest at the shortest or the longest step (the first of the two
        # where they tie), as np.argmax over all steps would find it
        (short_s, short_at), (long_s, long_at) = self.shortest, self.longest
        below, above = interval - short_s, long_s - interval
        step_s, worst = (
            (short_s, short_at)
            if below > above or (below == above and short_at < long_at)
            else (long_s, long_at)
        )
        if max(below, above) > UNIFORM_TOLERANCE * interval:
            raise InputError(
                f"{path}: {time_name} is not uniformly sampled: the step at {where(worst + 1)} is "
                f"{step_s:.6g} s, the mean step {interval:.6g} s (±{UNIFORM_TOLERANCE:.0%} "
                "allowed)"
            )
        return interval, self.first_s


def check_uniform(
    path: object,
    time_s: np.ndarray,
    volts: np.ndarray,
    *,
    time_name: str = "time_s",
    volts_name: str = "volts",
    where: Where = _row,
) -> FileRecord:
    """Check a (time, volts) pair is a finite, increasing, uniformly sampled record.

    ``where`` turns a sample index into the place in the file that an error names. The times
    are checked a block at a time (:class:`TimeAxis`), so no temporary of their size is made.
    """
    check_volts(path, volts, volts_name=volts_name, where=where)
    axis = TimeAxis()
    for start in range(0, time_s.size, CHECK_BLOCK_SAMPLES):
        axis.add(time_s[start : start + CHECK_BLOCK_SAMPLES])
    interval, t0 = axis.check(path, time_name=time_name, where=where)
    return FileRecord(volts=volts, sample_interval_s=interval, t0_s=t0)
