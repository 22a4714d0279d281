"""Engineering notation at the edges, SI floats inside.

People write ``4.7n``, ``220pF``, ``75 V``, ``25MHz``; this module turns those into SI floats for
a given unit, and SI floats back into short text. Resistor codes such as ``2k2`` are not accepted:
they read differently to different people.
"""

from __future__ import annotations

import math
import re

#: SI prefixes (BIPM, The International System of Units, 9th edition, table 7).
PREFIXES: dict[str, float] = {
    "f": 1e-15,
    "p": 1e-12,
    "n": 1e-9,
    "u": 1e-6,
    "µ": 1e-6,
    "μ": 1e-6,
    "m": 1e-3,
    "": 1.0,
    "k": 1e3,
    "K": 1e3,
    "M": 1e6,
    "G": 1e9,
}

#: Unit spellings people use, mapped to the canonical symbol.
UNIT_ALIASES: dict[str, str] = {
    "V": "V",
    "Vdc": "V",
    "VDC": "V",
    "Vac": "V",
    "VAC": "V",
    "Vrms": "V",
    "A": "A",
    "W": "W",
    "F": "F",
    "H": "H",
    "Hz": "Hz",
    "s": "s",
    "Ω": "Ω",
    "ohm": "Ω",
    "Ohm": "Ω",
    "ohms": "Ω",
    "Ohms": "Ω",
    "R": "Ω",
    "%": "%",
}

_NUMBER = r"[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?"
_QUANTITY = re.compile(rf"^\s*(?P<number>{_NUMBER})\s*(?P<rest>[^\s\d].*?)?\s*$")


class UnitError(ValueError):
    """A value that cannot be read as a quantity in the expected unit."""


def _split_prefix_unit(rest: str) -> tuple[float, str]:
    """Split text such as ``MHz``, ``mV``, ``n`` or ``kohm`` into (multiplier, canonical unit)."""
    if rest in UNIT_ALIASES:
        # Whole text is a unit ("m" is not a unit, so "m" falls through to the prefix case).
        return 1.0, UNIT_ALIASES[rest]
    prefix, unit_text = rest[:1], rest[1:]
    if prefix in PREFIXES and (unit_text == "" or unit_text in UNIT_ALIASES):
        return PREFIXES[prefix], UNIT_ALIASES.get(unit_text, "")
    raise UnitError(f"cannot read {rest!r} as an SI prefix and unit")


def parse_quantity(value: object, unit: str, *, what: str = "value") -> float:
    """Return ``value`` in SI units of ``unit``.

    Accepts a number (taken as already SI) or text with an optional SI prefix and an optional unit
    symbol: ``"4.7n"``, ``"220pF"``, ``"75 V"``, ``"25MHz"``, ``"0.5"``. A unit that disagrees with
    ``unit`` is an error, so ``"25 V"`` is refused where a frequency is expected.
    """
    if isinstance(value, bool):
        raise UnitError(f"{what}: expected a number in {unit}, got a boolean {value!r}")
    if isinstance(value, int | float):
        result = float(value)
    elif isinstance(value, str):
        match = _QUANTITY.match(value)
        if not match:
            raise UnitError(
                f"{what}: cannot read {value!r}; write a number with an optional SI prefix and "
                f"unit, e.g. '4.7n{unit}', '220 m{unit}' or '1.5{unit}'"
            )
        number = float(match.group("number"))
        rest = (match.group("rest") or "").strip()
        try:
            multiplier, found_unit = _split_prefix_unit(rest) if rest else (1.0, "")
        except UnitError as exc:
            raise UnitError(
                f"{what}: {exc} in {value!r}; expected a quantity in {unit} such as '4.7n{unit}'"
            ) from None
        if found_unit and found_unit != unit:
            raise UnitError(f"{what}: {value!r} is in {found_unit}, expected {unit}")
        result = number * multiplier
    else:
        raise UnitError(f"{what}: expected a number or text in {unit}, got {type(value).__name__}")
    if not math.isfinite(result):
        raise UnitError(f"{what}: {value!r} is not a finite number")
    return result


def format_si(value: float | None, unit: str = "", digits: int = 3) -> str:
    """Format ``value`` with an SI prefix and ``digits`` significant figures: ``4.7 nF``."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "—"
    if value == 0 or not math.isfinite(value):
        return f"{value:g} {unit}".rstrip()
    exponent = int(math.floor(math.log10(abs(value)) / 3) * 3)
    exponent = max(-15, min(9, exponent))
    symbol = {-15: "f", -12: "p", -9: "n", -6: "µ", -3: "m", 0: "", 3: "k", 6: "M", 9: "G"}[
        exponent
    ]
    scaled = value / 10**exponent
    text = f"{scaled:.{digits}g}"
    return f"{text} {symbol}{unit}".rstrip()
