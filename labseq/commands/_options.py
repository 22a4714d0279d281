"""Option helpers shared by the commands: engineering-notation quantities with clear errors."""

from __future__ import annotations

from labseq.errors import InputError
from labseq.units import UnitError, parse_quantity


def option_quantity(value: str | None, unit: str, option: str) -> float | None:
    """Read an option given in engineering notation (``25MHz``, ``470p``); InputError if not.

    None (the option was not given) stays None.
    """
    if value is None:
        return None
    try:
        return parse_quantity(value, unit, what=option)
    except UnitError as exc:
        raise InputError(str(exc)) from None


def option_fraction_or_quantity(
    value: str, unit: str, option: str, whole: float | None = None
) -> float:
    """Read ``value`` as a quantity in ``unit``, or as a percentage (``10%``) of ``whole``.

    With ``whole`` None a percentage is returned as a fraction (``5%`` → 0.05).
    """
    text = value.strip()
    if text.endswith("%"):
        fraction = option_quantity(text, "%", option) / 100.0
        return fraction if whole is None else fraction * whole
    return option_quantity(text, unit, option)
