"""Errors raised by the drivers. Each names the instrument and, where there is one, the command."""

from __future__ import annotations


class InstrumentError(Exception):
    """Base of every driver error."""


class ScpiError(InstrumentError):
    """The instrument's error queue reported an error (SCPI-1999 volume 2, chapter 21)."""

    def __init__(self, instrument: str, command: str, code: int, message: str) -> None:
        self.instrument = instrument
        self.command = command
        self.code = code
        self.message = message
        super().__init__(f"{instrument}: SCPI error {code}, {message!r} after {command!r}")


class InstrumentTimeout(InstrumentError):
    """An instrument did not answer within its timeout."""


class ConnectionLost(InstrumentError):
    """The connection to an instrument dropped."""


class BlockFormatError(InstrumentError):
    """An IEEE 488.2 arbitrary block with a malformed header or the wrong length."""


class ReplyFormatError(InstrumentError):
    """A reply that does not parse as what the command returns (a number, a list, ...)."""


class LimitError(InstrumentError):
    """A setpoint outside the role's declared limits; nothing was sent."""


class UnsafeTextError(InstrumentError):
    """User text carrying a command separator or line terminator; nothing was sent."""


class CommandMapError(InstrumentError):
    """A scope command map file that is missing, unreadable or invalid; names file and key."""
