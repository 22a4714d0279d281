"""The bench of one run: the four role drivers, opened from a sequence file.

The sequence's bench kind (:mod:`labseq.bench_kinds`) gives the resource of every role: for
``kind = "visa"`` the sequence's resource strings, for ``kind = "sim"`` those of a simulated
bench started in this process (:mod:`labseq.sim_bench`), reached through PyVISA exactly like a
real one. Either way the runner sees the same four drivers.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from contextlib import suppress
from dataclasses import dataclass, field
from typing import Any

import pyvisa

from labseq.bench_kinds import Started, bench_kind
from labseq.safety import SAFE_BUS_V
from labseq.sequence import Sequence
from labseq_instruments import (
    ElectronicLoad,
    LineSource,
    LoadLimits,
    Oscilloscope,
    PowerMeter,
    SourceLimits,
    load_command_map,
)
from labseq_instruments.command_map import ROLES
from labseq_instruments.errors import InstrumentError, ReplyFormatError, ScpiError
from labseq_instruments.roles import MappedInstrument

#: How long the runner waits for a real bench's bus to fall below the safe limit.
BUS_DISCHARGE_TIMEOUT_S = 300.0


@dataclass
class Bench:
    """The opened drivers of a run, by role, and how to open each one again after a fault."""

    sequence: Sequence
    drivers: dict[str, MappedInstrument]
    resources: dict[str, str]
    stop: Callable[[], None] | None = None  # stops what was started for the bench (the sim)
    _openers: dict[str, Callable[[], MappedInstrument]] = field(default_factory=dict, repr=False)

    @property
    def source(self) -> LineSource:
        return self.drivers["source"]  # type: ignore[return-value]

    @property
    def load(self) -> ElectronicLoad:
        return self.drivers["load"]  # type: ignore[return-value]

    @property
    def meter(self) -> PowerMeter:
        return self.drivers["meter"]  # type: ignore[return-value]

    @property
    def scope(self) -> Oscilloscope:
        return self.drivers["scope"]  # type: ignore[return-value]

    @property
    def simulated(self) -> bool:
        """True when the run drives the simulated bench."""
        return self.sequence.bench.simulated

    def identities(self) -> dict[str, dict[str, str]]:
        """``*IDN?`` of every role, with its resource string, for the run record."""
        result = {}
        for role, driver in self.drivers.items():
            identity = driver.identify()
            result[role] = {"resource": self.resources[role], **vars(identity)}
        return result

    def reopen(self, role: str) -> MappedInstrument:
        """Close ``role``'s session without talking to it and open a fresh one (after a drop or a
        command that never answered); clears its error queue."""
        self.drivers[role].abandon()  # the old session is dead; we only let go of it
        driver = self._openers[role]()
        self.drivers[role] = driver
        driver.clear()
        return driver

    def close(self) -> None:
        """Close every session (without switching anything: :func:`make_safe` does that first),
        then stop what was started for the bench (a simulated bench)."""
        for driver in self.drivers.values():
            driver.abandon()  # make_safe has already switched off
        if self.stop is not None:
            self.stop()


def driver_options(sequence: Sequence) -> dict[str, dict[str, Any]]:
    """Each role's constructor arguments: its command map, and the limits the sequence declares
    (so no setpoint beyond them can be sent)."""
    spec = sequence.bench
    limits = spec.limits
    frequencies = (
        {
            "min_frequency_hz": limits.source_min_frequency_hz,
            "max_frequency_hz": limits.source_max_frequency_hz,
        }
        if limits.source_min_frequency_hz and limits.source_max_frequency_hz
        else {}
    )
    options: dict[str, dict[str, Any]] = {
        role: {"command_map": load_command_map(spec.maps[role], role)} for role in ROLES
    }
    options["source"]["limits"] = SourceLimits(
        max_voltage_v=limits.source_max_voltage_v,
        max_current_a=limits.source_max_current_a,
        **frequencies,
    )
    options["load"]["limits"] = LoadLimits(max_current_a=limits.load_max_current_a)
    return options


DRIVER_CLASSES: dict[str, type[MappedInstrument]] = {
    "source": LineSource,
    "load": ElectronicLoad,
    "meter": PowerMeter,
    "scope": Oscilloscope,
}


def start_resources(sequence: Sequence, *, sim_faults: str = "", sim_seed: int = 0) -> Started:
    """The resource of every role as the sequence's bench kind gives them, and how to stop
    what was started for them (the caller's to call)."""
    return bench_kind(sequence.bench.kind).start(sequence, faults=sim_faults, seed=sim_seed)


def lock_names(sequence: Sequence) -> list[str]:
    """What the instrument locks of a real bench are keyed by: each resource string, with an
    alias resolved by the VISA library to the resource it stands for (so an instrument named
    both ways is still one instrument); an alias the library cannot resolve is kept as it is,
    and opening it reports the problem. A simulated bench has no instruments to lock."""
    spec = sequence.bench
    if spec.simulated:
        return []
    names = []
    for resource in spec.resources.values():
        if "::" not in resource:
            with suppress(Exception):  # any failure of the library: keep the alias itself
                info = pyvisa.ResourceManager(spec.visa_library).resource_info(resource)
                resource = info.resource_name or resource
        names.append(resource)
    return names


def open_driver(
    sequence: Sequence,
    resources: dict[str, str],
    role: str,
    options: dict[str, dict[str, Any]] | None = None,
) -> MappedInstrument:
    """Open ``role``'s driver with its command map, connection settings, limits and the
    sequence's VISA library (nothing is sent to it)."""
    spec = sequence.bench
    options = options or driver_options(sequence)
    return DRIVER_CLASSES[role].open(
        resources[role],
        name=role,
        visa_library=spec.visa_library,
        timeout_s=spec.timeout_s,
        connection=spec.connections.get(role),
        **options[role],
    )


def open_bench(sequence: Sequence, *, sim_faults: str = "", sim_seed: int = 0) -> Bench:
    """Open the four drivers the sequence names (starting the simulated bench if it says so),
    then put each in its known state (``*RST`` and its map's set-up commands, where the map has
    them). A driver reopened after a fault is not reset: the run's settings stay.
    """
    started = start_resources(sequence, sim_faults=sim_faults, sim_seed=sim_seed)
    resources = started.resources
    options = driver_options(sequence)

    def opener(role: str) -> Callable[[], MappedInstrument]:
        return lambda: open_driver(sequence, resources, role, options)

    bench = Bench(sequence=sequence, drivers={}, resources=resources, stop=started.stop)
    try:
        for role in ROLES:
            bench._openers[role] = opener(role)
            driver = bench._openers[role]()
            bench.drivers[role] = driver
            driver.start()
    except BaseException:
        bench.close()
        raise
    return bench


#: How often an output is told to switch off, and read back, before it counts as refusing.
OFF_ATTEMPTS = 3
#: Pause between two attempts (a relay or a firmware busy with the last setting gets time).
OFF_RETRY_PAUSE_S = 0.2

#: SCPI's stand-in numbers (SCPI-1999 vol. 1, 7.2.1.5: 9.9E37 for infinity, 9.91E37 for "not
#: a number"), which a scope sends for a measurement it could not make: no bus reading.
SCPI_NOT_A_READING = 9.9e37

#: What is known of the bus (the bulk capacitor) when :func:`make_safe` returns.
BUS_BELOW = "below"  # read below SAFE_BUS_V
BUS_ABOVE = "above"  # still read above it when the wait ran out
BUS_UNKNOWN = "unknown"  # no reading could be had
BUS_HELD = "held"  # not watched: the source is not confirmed off and may hold it up
BUS_NOT_WATCHED = "not watched"  # simulated bench, or a start-up check: not asked for


@dataclass(frozen=True)
class SafeReport:
    """What :func:`make_safe` could confirm, and nothing more."""

    load_off: bool
    source_off: bool
    bus: str  # one of the BUS_* words above
    bus_v: float | None  # the last bus reading, None when there is none
    messages: list[str]
    bus_timeout_s: float = BUS_DISCHARGE_TIMEOUT_S
    bus_watched_s: float | None = None  # how long the bus was watched, as measured

    @property
    def outputs_off(self) -> bool:
        """Load and source both read back off."""
        return self.load_off and self.source_off

    @property
    def safe(self) -> bool:
        """Outputs read back off and, where the bus is watched, read below the ES1 DC limit."""
        return self.outputs_off and self.bus in (BUS_BELOW, BUS_NOT_WATCHED)

    def summary(self) -> str:
        """One line for the user and the run's log: what was confirmed, in plain words.

        A reading alone never makes a bench "safe": even a bus read below the limit is to be
        verified with a meter before anyone touches the DUT."""
        bus = self._bus_text()
        if self.safe:
            if self.bus == BUS_NOT_WATCHED:
                return "outputs off (load and source read back off); no bus watched"
            return (
                f"outputs off (load and source read back off); {bus} — verify with a meter "
                "before touching"
            )
        parts = [
            "load off" if self.load_off else "load NOT confirmed off",
            "source off" if self.source_off else "source NOT confirmed off",
        ] + ([bus] if bus else [])
        return (
            f"bench NOT confirmed safe: {'; '.join(parts)} — keep away from the DUT, switch the "
            "outputs off at the instruments and measure the bus with a meter"
        )

    def _bus_text(self) -> str:
        """What is known of the bus, in words ("" when it was not to be watched)."""
        if self.bus == BUS_BELOW:
            return f"bus {self.bus_v:.1f} V, below {SAFE_BUS_V:g} V (ES1)"
        if self.bus == BUS_ABOVE:
            watched = (
                f"{self.bus_watched_s:.0f} s" if self.bus_watched_s is not None else "the wait"
            )
            return f"bus still {self.bus_v:.1f} V after {watched} of watching"
        if self.bus == BUS_UNKNOWN:
            return "bus unknown (the scope gave no reading)"
        if self.bus == BUS_HELD:
            return "bus not watched: the source is not confirmed off and may hold it up"
        return ""


def _switch_off(bench: Bench, role: str, messages: list[str], fresh: bool) -> bool:
    """Switch ``role`` off and read back that it is off, up to :data:`OFF_ATTEMPTS` times; a
    session that failed otherwise than by a SCPI error (a timeout, a drop, a garbled reply) is
    opened afresh before the next attempt, and so is the first with ``fresh``."""
    reopen = fresh
    for attempt in range(1, OFF_ATTEMPTS + 1):
        try:
            driver = bench.reopen(role) if reopen else bench.drivers[role]
            reopen = False
            driver.switch_off()  # type: ignore[attr-defined]
            if not driver.is_on():  # type: ignore[attr-defined]
                return True
            messages.append(f"{role} still reads on after the off command (attempt {attempt})")
        except InstrumentError as error:
            messages.append(f"{role}: could not switch off (attempt {attempt}): {error}")
            reopen = not isinstance(error, ScpiError)
        if attempt < OFF_ATTEMPTS:
            time.sleep(OFF_RETRY_PAUSE_S)
    return False


def _watch_bus(
    bench: Bench,
    messages: list[str],
    fresh: bool,
    on_reading: Callable[[float], None] | None,
    timeout_s: float,
    poll_s: float,
) -> tuple[str, float | None, float]:
    """Read the bus (the primary switch node's mean with the converter stopped) until it is
    below the ES1 DC limit or ``timeout_s`` has passed; a failed reading is tried once more on a
    fresh session. Returns what is known of the bus, its last reading and how long it was
    watched (measured, never the timeout assumed)."""
    channel = bench.sequence.primary.channel
    start = time.monotonic()
    deadline = start + timeout_s
    reopen, failures = fresh, 0
    while True:
        try:
            scope = bench.reopen("scope") if reopen else bench.scope
            reopen = False
            bus_v = scope.measure_mean_v(channel)
            if not math.isfinite(bus_v) or abs(bus_v) >= SCPI_NOT_A_READING:
                raise ReplyFormatError(
                    f"{scope.label}: bus reading {bus_v!r} is no measurement (the scope's "
                    "value for none, or not finite)"
                )
        except InstrumentError as error:
            messages.append(f"cannot read the bus voltage: {error}")
            failures += 1
            if failures == 2:
                return BUS_UNKNOWN, None, time.monotonic() - start
            reopen = True
            continue
        if on_reading is not None:
            on_reading(bus_v)
        now = time.monotonic()
        if bus_v < SAFE_BUS_V:
            return BUS_BELOW, bus_v, now - start
        if now > deadline:
            messages.append(f"bus still at {bus_v:.1f} V after {now - start:.0f} s of watching")
            return BUS_ABOVE, bus_v, now - start
        time.sleep(poll_s)


def make_safe(
    bench: Bench,
    *,
    watch_bus: bool,
    fresh_sessions: bool = False,
    on_bus_reading: Callable[[float], None] | None = None,
    timeout_s: float = BUS_DISCHARGE_TIMEOUT_S,
    poll_s: float = 0.5,
) -> SafeReport:
    """Load off, then source off, each read back; then, with ``watch_bus``, watch the bus fall
    below the ES1 DC limit — but only once the source reads off: a source still on holds the
    bus up, and waiting for it would only delay the warning.

    ``fresh_sessions`` opens each session afresh just before it is used (after a signal or an
    error may have cut a reply in half, no stale reply can then be read as the answer to an off
    command). Nothing is written anywhere meanwhile: the report's messages are the caller's to
    log once the outputs are off. ``on_bus_reading`` sees every bus reading (for a live display).
    """
    messages: list[str] = []
    load_off = _switch_off(bench, "load", messages, fresh_sessions)
    source_off = _switch_off(bench, "source", messages, fresh_sessions)
    bus, bus_v, watched_s = BUS_NOT_WATCHED, None, None
    if watch_bus and not source_off:
        bus = BUS_HELD
    elif watch_bus:
        bus, bus_v, watched_s = _watch_bus(
            bench, messages, fresh_sessions, on_bus_reading, timeout_s, poll_s
        )
    return SafeReport(load_off, source_off, bus, bus_v, messages, timeout_s, watched_s)
