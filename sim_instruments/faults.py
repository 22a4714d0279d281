"""Fault injection for the simulated bench, chosen when the bench starts.

A fault spec is ``ROLE:KIND@WHEN``; several are separated by commas, for example
``scope:no-trigger@point=3,meter:malformed@call=12``.

* ``ROLE``: ``source``, ``load``, ``meter`` or ``scope``.
* ``KIND``:

  - ``no-reply``: the next query from that moment on is executed but never answered;
  - ``drop``: the server closes that client's connection (new connections are still accepted);
  - ``scpi-error``: the next message carrying a setting command is refused and −300
    "Device-specific error" is queued, as a real instrument does when its hardware refuses;
  - ``no-trigger`` (scope only): the next acquisition armed (``:SINGle``, or ``:ACQuire:ARM``
    in the alt dialect) never completes;
  - ``malformed``: the next query reply is garbage (``9.9.9E+``, or a block whose header is not
    IEEE 488.2);
  - ``refuse-off``: the next command that switches an output off (``OUTP OFF``, ``INP 0``) is
    refused with −300 "Device-specific error" and the output stays as it was;
  - ``stuck-on``: the next such off command is taken without an error but does nothing, as a
    welded relay would: the output still reads back on.

* ``WHEN``: ``call=N``, the N-th message the role receives (1-based); ``point=N``, the first
  message to the role after the bench's N-th load current setpoint (the N-th operating point);
  or ``off=N``, the first message to the role after the source's output has gone from on to
  off N times (``off=1``: the first shutdown of a run).

Each fault fires once; with ``+`` after it (``source:refuse-off@point=4+``) it fires on every
message it can act on from its moment on — a broken instrument rather than a glitch. Every
firing is recorded with its time.
"""

from __future__ import annotations

import re
import threading
import time
from collections.abc import Callable, Iterable
from dataclasses import dataclass

from labseq_instruments.command_map import ROLES
from labseq_sim_instruments.server import HeaderPattern, Interceptor, ParsedMessage

KINDS = ("no-reply", "drop", "scpi-error", "no-trigger", "malformed", "refuse-off", "stuck-on")
MOMENTS = ("call", "point", "off")
_OUTPUT_STATES = (HeaderPattern("OUTPut[:STATe]"), HeaderPattern("INPut[:STATe]"))


def _switches_off(message: ParsedMessage) -> bool:
    """Whether a message turns a source's output or a load's input off."""
    return any(
        not unit.is_query
        and [param.strip().upper() for param in unit.params] in (["OFF"], ["0"])
        and any(pattern.match(unit.header) is not None for pattern in _OUTPUT_STATES)
        for unit in message.units
    )


#: Which messages each kind acts on once its moment has come.
_TARGETS: dict[str, Callable[[ParsedMessage], bool]] = {
    "no-reply": lambda message: message.has_query,
    "malformed": lambda message: message.has_query,
    "drop": lambda message: True,
    "scpi-error": lambda message: message.has_setting,
    "no-trigger": lambda message: message.has_header("SINGle") or message.has_header("ACQuire:ARM"),
    "refuse-off": _switches_off,
    "stuck-on": _switches_off,
}
#: The interference the server acts out for a kind that is a case of a more general one.
_ACTED_AS = {"refuse-off": "scpi-error", "stuck-on": "swallow"}

_SPEC = re.compile(
    r"(?P<role>[a-z]+):(?P<kind>[a-z-]+)@(?P<moment>[a-z]+)=(?P<count>\d+)(?P<repeat>\+?)"
)
_FORMS = (
    "ROLE:KIND@call=N or ROLE:KIND@point=N or ROLE:KIND@off=N (+ after N: repeat), comma-separated"
)


class FaultSpecError(ValueError):
    """A fault spec that cannot be read; the message names it and lists what is valid."""


@dataclass(frozen=True)
class FaultSpec:
    """One planned fault: ``role``, ``kind``, and its moment (``call`` or ``point``, ``count``)."""

    role: str
    kind: str
    moment: str
    count: int
    repeat: bool = False  # fires on every message it can act on from its moment on

    @property
    def when(self) -> str:
        return f"{self.moment}={self.count}{'+' if self.repeat else ''}"

    def __str__(self) -> str:
        return f"{self.role}:{self.kind}@{self.when}"


@dataclass(frozen=True)
class FiredFault:
    """A fault that fired: which, on which message number of its role, and when (epoch s)."""

    role: str
    kind: str
    when: str
    message_number: int
    time_s: float


def parse_fault_specs(spec: str | Iterable[str]) -> list[FaultSpec]:
    """Read fault specs from a comma-separated string or an iterable of single specs."""
    items = spec.split(",") if isinstance(spec, str) else list(spec)
    faults = []
    for item in items:
        text = item.strip()
        if not text:
            continue
        found = _SPEC.fullmatch(text.lower())
        if found is None:
            raise FaultSpecError(f"fault spec {text!r}: expected {_FORMS}")
        role, kind, moment = found["role"], found["kind"], found["moment"]
        count = int(found["count"])
        if role not in ROLES:
            raise FaultSpecError(f"fault spec {text!r}: role {role!r}; valid: {', '.join(ROLES)}")
        if kind not in KINDS:
            raise FaultSpecError(f"fault spec {text!r}: kind {kind!r}; valid: {', '.join(KINDS)}")
        if moment not in MOMENTS:
            raise FaultSpecError(f"fault spec {text!r}: moment {moment!r}; expected {_FORMS}")
        if count < 1:
            raise FaultSpecError(f"fault spec {text!r}: {moment} counts from 1")
        if kind == "no-trigger" and role != "scope":
            raise FaultSpecError(f"fault spec {text!r}: no-trigger applies to the scope only")
        faults.append(FaultSpec(role, kind, moment, count, repeat=bool(found["repeat"])))
    return faults


class FaultPlan:
    """The faults of one bench: counts messages per role and decides when each fault fires.

    ``point_count`` returns how many load current setpoints the bench has received so far,
    ``off_count`` how many times the source's output has gone from on to off.
    """

    def __init__(
        self,
        specs: Iterable[FaultSpec],
        point_count: Callable[[], int],
        off_count: Callable[[], int] = lambda: 0,
    ) -> None:
        self._pending = list(specs)
        self._point_count = point_count
        self._off_count = off_count
        self._message_counts = dict.fromkeys(ROLES, 0)
        self._lock = threading.Lock()
        self.fired: list[FiredFault] = []

    def interceptor(self, role: str) -> Interceptor:
        """The hook the server of ``role`` calls before each message."""
        return lambda message: self.on_message(role, message)

    def on_message(self, role: str, message: ParsedMessage) -> str | None:
        """Count the message; return the interference the server acts out for the fault that
        fires on it (its kind, or the general kind it is a case of), if one does."""
        with self._lock:
            self._message_counts[role] += 1
            number = self._message_counts[role]
            for spec in self._pending:
                if spec.role != role or not self._moment_reached(spec, number):
                    continue
                if not _TARGETS[spec.kind](message):
                    continue
                if not spec.repeat:
                    self._pending.remove(spec)
                self.fired.append(FiredFault(role, spec.kind, spec.when, number, time.time()))
                return _ACTED_AS.get(spec.kind, spec.kind)
        return None

    def _moment_reached(self, spec: FaultSpec, message_number: int) -> bool:
        if spec.moment == "call":
            return message_number >= spec.count
        if spec.moment == "off":
            return self._off_count() >= spec.count
        return self._point_count() >= spec.count
