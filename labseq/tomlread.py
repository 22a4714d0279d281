"""Sequence files read table by table: every value converted to SI and checked, every problem
recorded with its key and line (:class:`labseq_instruments.tomlkeys.Problems`, the error style every
labseq file shares).

A :class:`Table` is one TOML table being read. Each getter takes a key, records it as known,
converts its value (quantities through :func:`labseq.units.parse_quantity`, durations with
their unit, fractions as 0.8 or '80 %', whole numbers, words from a list) and returns it, or
records what is wrong and returns None; :meth:`Table.finish` then reports the keys nobody asked
for, with the closest known name. :mod:`labseq.sequence` reads sequence files with it; a bench
kind reads its own ``[bench]`` keys with it (:mod:`labseq.bench_kinds`).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable
from typing import Any

from labseq.units import UnitError, format_si, parse_quantity
from labseq_instruments.text import quoted
from labseq_instruments.tomlkeys import Problems, describe_value

#: A key that is not in its table (distinct from any value the file can hold).
MISSING = object()
#: Relative tolerance under which two values of one array count as the same.
SAME_VALUE_RTOL = 1e-9


MISSING = object()


def _example(unit: str) -> str:
    """A short example of a quantity in ``unit`` for error messages."""
    return {
        "V": "'75 V'",
        "A": "'2.5 A'",
        "W": "'0.5 W'",
        "F": "'470pF'",
        "H": "'1.2uH'",
        "Hz": "'200kHz'",
        "s": "'50 ms'",
        "Ω": "'47 ohm'",
    }.get(unit, "'1.5'")


class Table:
    """One TOML table being read; remembers which keys were read to report unknown ones."""

    def __init__(self, data: dict[str, Any], prefix: str, out: Problems) -> None:
        self.data = data
        self.prefix = prefix
        self.out = out
        self.known: list[str] = []

    def key(self, name: str) -> str:
        return f"{self.prefix}.{name}" if self.prefix else name

    def raw(self, name: str, required: bool, what: str) -> Any:
        """The value of ``name``, or MISSING (recording a problem when it is required)."""
        self.known.append(name)
        if name in self.data:
            return self.data[name]
        if required:
            self.out.fail(self.key(name), f"missing; expected {what}")
        return MISSING

    def table(self, name: str, required: bool = True) -> Table | None:
        value = self.raw(name, required, "a table of settings")
        if value is MISSING:
            return None
        if not isinstance(value, dict):
            self.out.fail(
                self.key(name), f"expected a table of settings, got {describe_value(value)}"
            )
            return None
        return Table(value, self.key(name), self.out)

    def _convert(self, name: str, value: Any, convert: Callable[[Any, str], Any]) -> Any:
        try:
            return convert(value, self.key(name))
        except (UnitError, ValueError, OverflowError, TypeError) as exc:
            self.out.fail(self.key(name), str(exc).removeprefix(f"{self.key(name)}: "))
            return None

    def quantity(
        self,
        name: str,
        unit: str,
        *,
        default: Any = MISSING,
        minimum: float | None = 0.0,
        allow_equal: bool = False,
        maximum: float | None = None,
    ) -> float | None:
        """A quantity in ``unit``, SI float; must be above ``minimum`` (or equal when allowed)
        and, when given, at most ``maximum``."""
        value = self.raw(name, default is MISSING, f"a quantity in {unit}, e.g. {_example(unit)}")
        if value is MISSING:
            return None if default is MISSING else default
        return self._convert(
            name, value, lambda v, k: quantity(v, unit, k, minimum, allow_equal, maximum)
        )

    def fraction(self, name: str, *, default: Any = MISSING, allow_zero: bool = False) -> Any:
        """A fraction written as a number (0.05) or a percentage ('5 %'); 0 < f ≤ 1."""
        value = self.raw(name, default is MISSING, "a fraction such as 0.8 or '80 %'")
        if value is MISSING:
            return None if default is MISSING else default
        return self._convert(name, value, lambda v, k: _fraction(v, k, allow_zero))

    def integer(
        self, name: str, *, default: Any = MISSING, minimum: int = 1, maximum: int | None = None
    ) -> Any:
        """A whole number ≥ ``minimum`` and ≤ ``maximum`` when given (engineering notation such
        as '20k' accepted)."""
        value = self.raw(name, default is MISSING, f"a whole number ≥ {minimum}, e.g. 20000")
        if value is MISSING:
            return None if default is MISSING else default
        return self._convert(name, value, lambda v, k: _integer(v, k, minimum, maximum))

    def text(self, name: str, *, default: Any = MISSING, choices: Iterable[str] = ()) -> Any:
        """A string, optionally one of ``choices``."""
        choices = tuple(choices)
        what = f"one of {_or_list(choices)}" if choices else "a string"
        value = self.raw(name, default is MISSING, what)
        if value is MISSING:
            return None if default is MISSING else default
        return self._convert(name, value, lambda v, k: _text(v, choices))

    def boolean(self, name: str, *, default: bool) -> bool | None:
        value = self.raw(name, False, "true or false")
        if value is MISSING:
            return None if default is MISSING else default
        if not isinstance(value, bool):
            self.out.fail(self.key(name), f"expected true or false, got {describe_value(value)}")
            return None
        return value

    def finish(self) -> None:
        """Report keys nobody asked for, with the closest known name as a suggestion."""
        self.out.unknown_keys(self.data, self.known, self.prefix)

    def values(self, name: str, convert: Callable[[Any, str], float]) -> list[float] | None:
        """A non-empty array, each element converted by ``convert(value, key)``; problems name
        the element's index, and a value given twice is refused."""
        raw = self.raw(name, True, "an array of values, e.g. ['36 V', '48 V']")
        if raw is MISSING:
            return None
        if not isinstance(raw, list) or not raw:
            self.out.fail(
                self.key(name), f"expected a non-empty array of values, got {describe_value(raw)}"
            )
            return None
        results: list[float] = []
        for index, value in enumerate(raw):
            key = f"{self.key(name)}[{index}]"
            try:
                results.append(convert(value, key))
            except (UnitError, ValueError, OverflowError, TypeError) as exc:
                self.out.fail(key, str(exc).removeprefix(f"{key}: "))
        if len(results) != len(raw):
            return None
        for index, value in enumerate(results):
            for earlier in results[:index]:
                if math.isclose(value, earlier, rel_tol=SAME_VALUE_RTOL):
                    self.out.fail(
                        f"{self.key(name)}[{index}]",
                        f"duplicate point: {quoted(raw[index])} is the same value as an earlier "
                        "entry; each value may appear once",
                    )
                    break
        return results


def _or_list(choices: Iterable[str]) -> str:
    return " or ".join(f'"{c}"' for c in choices)


def quantity(
    value: Any,
    unit: str,
    key: str,
    minimum: float | None,
    allow_equal: bool,
    maximum: float | None = None,
) -> float:
    result = parse_quantity(value, unit, what=key)
    if unit == "s" and result != 0 and not _names_unit(value, unit):
        raise ValueError(
            f"{quoted(value)} has no unit; a duration needs one, e.g. '5 s' or '5000 ms' (a bare "
            "number could be meant in either)"
        )
    if minimum is not None and (result < minimum or (result == minimum and not allow_equal)):
        relation = "≥" if allow_equal else ">"
        raise ValueError(
            f"{format_si(result, unit)} is out of range; must be {relation} "
            f"{format_si(minimum, unit)}, e.g. {_example(unit)}"
        )
    if maximum is not None and result > maximum:
        raise ValueError(f"{quoted(value)} is out of range; must be ≤ {format_si(maximum, unit)}")
    return result


def _names_unit(value: Any, unit: str) -> bool:
    """Whether ``value`` is text that ends in ``unit`` (after any SI prefix): ``"50 ms"``."""
    return isinstance(value, str) and value.strip().endswith(unit)


def _fraction(value: Any, key: str, allow_zero: bool) -> float:
    if isinstance(value, str) and "%" in value:
        result = parse_quantity(value, "%", what=key) / 100.0
    else:
        result = parse_quantity(value, "", what=key)
    if not (0.0 <= result <= 1.0) or (result == 0.0 and not allow_zero):
        low = "0" if allow_zero else "above 0"
        raise ValueError(
            f"{quoted(value)} is not a valid fraction; write a value {low} up to 1 (e.g. 0.8) or a "
            f"percentage up to 100 % (e.g. '80 %')"
        )
    return result


def _integer(value: Any, key: str, minimum: int, maximum: int | None = None) -> int:
    number = parse_quantity(value, "", what=key)
    if number != int(number) or number < minimum:
        raise ValueError(f"{quoted(value)} is not a whole number ≥ {minimum}")
    if maximum is not None and number > maximum:
        raise ValueError(f"{quoted(value)} is out of range; must be ≤ {maximum}")
    return int(number)


def _text(value: Any, choices: tuple[str, ...]) -> str:
    if not isinstance(value, str):
        raise ValueError(f"expected a string, got {describe_value(value)}")
    if choices and value.lower() not in choices:
        raise ValueError(f"{quoted(value)} is not valid; expected {_or_list(choices)}")
    return value.lower() if choices else value
