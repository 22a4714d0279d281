"""Option helpers shared by the commands: engineering-notation quantities with clear errors, and
the SCPI trace of the bench commands."""

from __future__ import annotations

import logging
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import click

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


#: Format of a trace line: wall-clock time to the millisecond, then the exchange.
TRACE_FORMAT = "%(asctime)s.%(msecs)03d  %(message)s"


def trace_option(command: Callable[..., Any]) -> Callable[..., Any]:
    """The ``--trace FILE`` option of a bench command (see :func:`tracing`)."""
    return click.option(
        "--trace",
        "trace_path",
        type=click.Path(path_type=Path, dir_okay=False),
        default=None,
        help="Log every SCPI exchange (command, reply, time taken) to FILE.",
    )(command)


@contextmanager
def tracing(path: Path | None) -> Iterator[None]:
    """Within the block, write the instruments' SCPI trace (the ``instruments.trace`` logger,
    standard :mod:`logging`) to ``path``, appending; nothing when ``path`` is None."""
    if path is None:
        yield
        return
    try:
        handler = logging.FileHandler(path, encoding="utf-8")
    except OSError as error:
        raise InputError(f"--trace {path}: cannot write there ({error.strerror})") from None
    handler.setFormatter(logging.Formatter(TRACE_FORMAT, datefmt="%Y-%m-%d %H:%M:%S"))
    logger = logging.getLogger("labseq_instruments.trace")
    previous = logger.level, logger.propagate
    logger.addHandler(handler)
    logger.setLevel(logging.DEBUG)
    logger.propagate = False
    try:
        yield
    finally:
        logger.removeHandler(handler)
        logger.setLevel(previous[0])
        logger.propagate = previous[1]
        handler.close()
