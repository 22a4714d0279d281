"""The bench of one run: the four role drivers, opened from a sequence file.

For ``kind = "sim"`` the simulated bench is started in this process (its SCPI servers on
loopback) and reached through PyVISA exactly like a real one; for ``kind = "visa"`` the
sequence's resource strings are opened. Either way the runner sees the same four drivers.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from contextlib import suppress
from dataclasses import dataclass, field, replace
from typing import Any

import pyvisa

from instruments import (
    ElectronicLoad,
    LineSource,
    LoadLimits,
    Oscilloscope,
    PowerMeter,
    SourceLimits,
    load_command_map,
)
from instruments.errors import InstrumentError
from instruments.roles import MappedInstrument
from labseq.errors import InputError
from labseq.safety import SAFE_BUS_V
from labseq.sequence import Sequence

ROLES = ("source", "load", "meter", "scope")

#: How long the runner waits for a real bench's bus to fall below the safe limit.
BUS_DISCHARGE_TIMEOUT_S = 300.0


@dataclass
class Bench:
    """The opened drivers of a run, by role, and how to open each one again after a fault."""

    sequence: Sequence
    drivers: dict[str, MappedInstrument]
    resources: dict[str, str]
    sim: Any = None  # the in-process SimBench for kind = "sim"
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
        return self.sequence.bench.is_sim

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
        then stop the simulated bench if there is one."""
        for driver in self.drivers.values():
            driver.abandon()  # make_safe has already switched off
        if self.sim is not None:
            self.sim.stop()


def sim_design(sequence: Sequence) -> Any:
    """The simulated DUT with the sequence's parts fitted: its snubber across the switch, its
    clamp's R and C in place of the DUT file's (whose nominal clamp voltage stays the solver's
    start), and a node's snubber across the output rectifier it probes (channel 2). A node
    without a snubber leaves the DUT file's rectifier damper as it is."""
    from sim_instruments.flyback import load_dut
    from sim_instruments.instruments import SECONDARY_CHANNEL

    design = load_dut(sequence.bench.sim_dut_path).with_snubber(
        sequence.snubber.resistance_ohm, sequence.snubber.capacitance_f
    )
    clamp = sequence.clamp
    if clamp is not None and design.has_clamp:
        design = replace(
            design,
            clamp_resistance_ohm=clamp.resistance_ohm,
            clamp_capacitance_f=clamp.capacitance_f,
        )
    for node in sequence.nodes[1:]:
        snubber = node.snubber
        if node.channel == SECONDARY_CHANNEL and design.secondary and snubber is not None:
            rectifier = replace(
                design.secondary,
                snubber_resistance_ohm=snubber.resistance_ohm,
                snubber_capacitance_f=snubber.capacitance_f,
            )
            design = replace(design, secondary=rectifier)
    return design


def _sim_resources(sequence: Sequence, faults: str, seed: int) -> tuple[Any, dict[str, str]]:
    """Start the simulated bench for ``sequence`` with its parts fitted (:func:`sim_design`);
    return it and its resources."""
    from sim_instruments.bench import SimBench
    from sim_instruments.faults import FaultSpecError

    design = sim_design(sequence)
    try:
        sim = SimBench(design, faults=faults, seed=seed, dialect=sequence.bench.sim_dialect).start()
    except FaultSpecError as error:
        raise InputError(str(error)) from None
    return sim, dict(sim.resources)


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


def start_resources(
    sequence: Sequence, *, sim_faults: str = "", sim_seed: int = 0
) -> tuple[Any, dict[str, str]]:
    """The resource of every role: the sequence's, or those of the simulated bench started
    here (returned with them, to be stopped by the caller; None for a real bench)."""
    if sequence.bench.is_sim:
        return _sim_resources(sequence, sim_faults, sim_seed)
    if sim_faults:
        raise InputError('fault injection needs the simulated bench (bench.kind = "sim")')
    return None, dict(sequence.bench.resources)


def lock_names(sequence: Sequence) -> list[str]:
    """What the instrument locks of a real bench are keyed by: each resource string, with an
    alias resolved by the VISA library to the resource it stands for (so an instrument named
    both ways is still one instrument); an alias the library cannot resolve is kept as it is,
    and opening it reports the problem. A simulated bench has no instruments to lock."""
    spec = sequence.bench
    if spec.is_sim:
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
    sim, resources = start_resources(sequence, sim_faults=sim_faults, sim_seed=sim_seed)
    options = driver_options(sequence)

    def opener(role: str) -> Callable[[], MappedInstrument]:
        return lambda: open_driver(sequence, resources, role, options)

    bench = Bench(sequence=sequence, drivers={}, resources=resources, sim=sim)
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


@dataclass(frozen=True)
class SafeReport:
    """What :func:`make_safe` could confirm."""

    load_off: bool
    source_off: bool
    bus_v: float | None  # last bus reading (real bench), None when not measured
    messages: list[str]

    @property
    def safe(self) -> bool:
        """Load and source confirmed off and, where measured, the bus below the safe limit."""
        bus_ok = self.bus_v is None or self.bus_v < SAFE_BUS_V
        return self.load_off and self.source_off and bus_ok


def _switch_off(bench: Bench, role: str, log: Callable[[str], None]) -> bool:
    """Switch ``role`` off and read back that it is off; on a dead session reopen once."""
    for attempt in (1, 2):
        try:
            driver = bench.drivers[role]
            driver.switch_off()  # type: ignore[attr-defined]
            is_on = driver.output_is_on() if role == "source" else driver.input_is_on()  # type: ignore[attr-defined]
            if not is_on:
                return True
            log(f"{role} still reports on after the off command")
        except InstrumentError as error:
            log(f"{role}: could not switch off (attempt {attempt}): {error}")
            if attempt == 1:
                try:
                    bench.reopen(role)
                except InstrumentError as reopen_error:
                    log(f"{role}: could not reconnect: {reopen_error}")
                    return False
    return False


def make_safe(
    bench: Bench,
    log: Callable[[str], None],
    *,
    wait_for_bus: bool,
    timeout_s: float = BUS_DISCHARGE_TIMEOUT_S,
    poll_s: float = 0.5,
) -> SafeReport:
    """Load off, then source off, each read back; then, on a real bench, watch the bus (the
    switch node's mean voltage with the converter stopped) fall below the ES1 DC limit."""
    messages: list[str] = []

    def note(message: str) -> None:
        messages.append(message)
        log(message)

    load_off = _switch_off(bench, "load", note)
    source_off = _switch_off(bench, "source", note)
    bus_v = None
    if wait_for_bus:
        deadline = time.monotonic() + timeout_s
        channel = bench.sequence.scope.channel
        while True:
            try:
                bus_v = bench.scope.measure_mean_v(channel)
            except InstrumentError as error:
                note(f"cannot read the bus voltage: {error}")
                bus_v = float("inf")
                break
            if bus_v < SAFE_BUS_V or time.monotonic() > deadline:
                break
            time.sleep(poll_s)
        if bus_v >= SAFE_BUS_V:
            note(f"bus still at {bus_v:.1f} V after {timeout_s:.0f} s: NOT confirmed safe")
    return SafeReport(load_off, source_off, bus_v, messages)
