"""Declared limits per role, and the checks every setpoint and every text passes before sending.

Nothing reaches an instrument until it has been checked here: a setpoint outside its declared
range raises :class:`LimitError`, text that could smuggle a second command raises
:class:`UnsafeTextError`, a keyword outside its allowed set raises :class:`LimitError`.
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import dataclass

from labseq_instruments.errors import LimitError, UnsafeTextError


@dataclass(frozen=True)
class SourceLimits:
    """What the line source may be asked for (volts are DC volts or AC rms volts)."""

    max_voltage_v: float
    max_current_a: float
    min_frequency_hz: float = 45.0
    max_frequency_hz: float = 65.0

    def __post_init__(self) -> None:
        check_setpoint("max_voltage_v", self.max_voltage_v, 0.0, math.inf, "V")
        check_setpoint("max_current_a", self.max_current_a, 0.0, math.inf, "A")
        check_setpoint("min_frequency_hz", self.min_frequency_hz, 0.0, math.inf, "Hz")
        check_setpoint(
            "max_frequency_hz", self.max_frequency_hz, self.min_frequency_hz, math.inf, "Hz"
        )


@dataclass(frozen=True)
class LoadLimits:
    """What the electronic load may be asked to sink."""

    max_current_a: float

    def __post_init__(self) -> None:
        check_setpoint("max_current_a", self.max_current_a, 0.0, math.inf, "A")


@dataclass(frozen=True)
class ScopeLimits:
    """The settings a scope family accepts, as its command map's ``[limits]`` table declares."""

    min_volts_per_div: float = 1e-3
    max_volts_per_div: float = 1e3
    max_offset_v: float = 1e4
    min_seconds_per_div: float = 1e-10
    max_seconds_per_div: float = 1e2
    min_record_length: int = 100
    max_record_length: int = 100_000_000
    min_probe_ratio: float = 1e-3
    max_probe_ratio: float = 1e4
    max_bandwidth_limit_hz: float = 1e11


def check_setpoint(setting: str, value: float, low: float, high: float, unit: str = "") -> float:
    """Return ``value`` as a float if it is finite and within ``[low, high]``.

    Raises
    ------
    LimitError
        Naming the setting, the value and the allowed range.
    """
    suffix = f" {unit}" if unit else ""
    try:
        number = float(value)
    except (TypeError, ValueError):
        raise LimitError(f"{setting}: {value!r} is not a number") from None
    if not math.isfinite(number):
        raise LimitError(f"{setting}: {number!r} is not a finite number")
    if not low <= number <= high:
        raise LimitError(
            f"{setting} = {number:g}{suffix} is outside the allowed range "
            f"{low:g}{suffix} to {high:g}{suffix}"
        )
    return number


def check_count(setting: str, value: int, low: int, high: int) -> int:
    """Return ``value`` if it is an integer within ``[low, high]`` (record lengths, channels)."""
    if isinstance(value, bool) or not isinstance(value, int):
        raise LimitError(f"{setting}: {value!r} is not a whole number")
    if not low <= value <= high:
        raise LimitError(f"{setting} = {value} is outside the allowed range {low} to {high}")
    return value


def check_text(what: str, text: str) -> str:
    """Return ``text`` if it carries no command separator, terminator or control character.

    A ``;`` would start a second command and a line end would end the message early
    (IEEE 488.2 7.4.1 and 7.5); any control character is refused with them.
    """
    if not isinstance(text, str):
        raise UnsafeTextError(f"{what}: {text!r} is not text")
    for char in text:
        if char == ";" or ord(char) < 0x20 or ord(char) == 0x7F:
            raise UnsafeTextError(
                f"{what} {text!r} contains {char!r}; separators and control characters "
                "are refused so that no second command can be sent"
            )
    return text


def check_word(what: str, word: str, allowed: Iterable[str]) -> str:
    """Return the allowed keyword matching ``word`` (case-insensitive), else refuse it."""
    check_text(what, word)
    choices = list(allowed)
    for choice in choices:
        if word.lower() == choice.lower():
            return choice
    raise LimitError(f"{what} {word!r} is not one of: {', '.join(choices)}")


def format_number(value: float) -> str:
    """Format a checked setpoint for SCPI with round-trip precision (shortest exact repr)."""
    return repr(float(value))
