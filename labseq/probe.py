"""Probe a bench through its command maps, with nothing switched on: the first thing to run with
a new instrument or a new map.

For each role of a sequence the probe opens the instrument, identifies it, resets it and sends
its map's set-up commands, then exercises every command of the map one by one: a setting is
read back, set to a harmless value (outputs and inputs OFF, setpoints at zero, the scope as the
sequence sets it up) and read back again; a query is asked and its reply parsed. On the scope it
then arms one acquisition, triggers it at once where the map can, and fetches one waveform. Each
command gets one line of the report: what was sent, what came back, and whether it worked.

Nothing here turns a power path on: the source's output and the load's input are only ever set
OFF, and every value goes through the same limit checks as a run's.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any

from labseq.bench import ROLES, open_driver, start_resources
from labseq.sequence import Sequence
from labseq_instruments.command_map import ROLE_COMMANDS
from labseq_instruments.errors import InstrumentError
from labseq_instruments.roles import MappedInstrument, Oscilloscope
from labseq_instruments.text import quoted

#: Outcomes of one probe line.
OK, FAILED, NOT_MAPPED, SKIPPED = "ok", "failed", "not mapped", "skipped"
#: How often the probe looks whether its acquisition is in.
POLL_S = 0.02


@dataclass(frozen=True)
class ProbeLine:
    """One line of the probe report: a command of a role's map and how it went."""

    role: str
    key: str
    outcome: str
    sent: str
    detail: str


class _RoleProbe:
    """Exercises one opened driver, collecting one line per command."""

    def __init__(self, role: str, driver: MappedInstrument, lines: list[ProbeLine]) -> None:
        self.role = role
        self.driver = driver
        self.lines = lines
        self.done: set[str] = set()

    def record(self, key: str, outcome: str, sent: str, detail: str) -> None:
        self.lines.append(ProbeLine(self.role, key, outcome, sent, detail))
        self.done.add(key)

    @contextmanager
    def attempt(self, key: str, sent: str) -> Iterator[list[str]]:
        """Run the block as command ``key``; what it appends to the yielded list is the detail
        of an ``ok`` line, an instrument error makes a ``failed`` line."""
        detail: list[str] = []
        try:
            yield detail
        except InstrumentError as error:
            self.record(key, FAILED, sent, str(error).removeprefix(f"{self.driver.label}: "))
        else:
            self.record(key, OK, sent, "; ".join(detail))

    def setting(self, key: str, value: Any, channel: int | None = None) -> None:
        """Read back, set to ``value``, read back again."""
        driver, command_map = self.driver, self.driver.map
        if not command_map.has(key):
            self.not_mapped(key)
            return
        read_back = command_map.spec(key).render_read_back(channel=channel)
        if value is None:
            sent = command_map.command(key, channel=channel)
        else:
            sent = command_map.command(key, channel=channel, value=driver.encode(key, value))
        with self.attempt(key, f"{read_back} / {sent} / {read_back}") as detail:
            before = driver.read_back(key, channel=channel)
            driver.apply(key, value, channel=channel)
            after = driver.read_back(key, channel=channel)
            detail.append(f"read {quoted(before)}, set {_shown(value)}, reads back {quoted(after)}")

    def ask(self, key: str, channel: int | None = None) -> None:
        """Ask query ``key`` and parse its number."""
        if not self.driver.map.has(key):
            self.not_mapped(key)
            return
        sent = self.driver.map.command(key, channel=channel)
        with self.attempt(key, sent) as detail:
            detail.append(f"{self.driver.read_number(key, channel=channel):g}")

    def not_mapped(self, key: str) -> None:
        step = ROLE_COMMANDS[self.role][key].step
        self.record(key, NOT_MAPPED, "", f"optional: to {step} labseq does without it")

    def start(self) -> bool:
        """Identify, then ``*RST`` and each set-up command on its own; False (and nothing more
        sent) if the instrument does not identify itself."""
        driver = self.driver
        with self.attempt("*IDN?", "*IDN?") as detail:
            identity = driver.identify()
            detail.append(f"{identity.manufacturer} {identity.model}, serial {identity.serial}")
        if self.lines[-1].outcome != OK:
            return False
        if driver.map.reset:
            with self.attempt("*RST", "*RST"):
                driver.reset()
        for index, command in enumerate(driver.map.setup):
            with self.attempt(f"setup[{index}]", command):
                driver.configure(command)
        return True

    def remaining(self, reason: str = "not exercised by the probe") -> None:
        """A line for every command of the role not exercised, saying why."""
        for key in ROLE_COMMANDS[self.role]:
            if key not in self.done:
                if self.driver.map.has(key):
                    self.record(key, SKIPPED, "", reason)
                else:
                    self.not_mapped(key)


def _shown(value: Any) -> str:
    return "(no value)" if value is None else f"{value:g}" if isinstance(value, float) else value


def _probe_source(probe: _RoleProbe, sequence: Sequence) -> None:
    grid = sequence.grid
    probe.setting("output", "off")
    probe.setting("current_limit", sequence.bench.limits.source_max_current_a)
    probe.setting("line_shape", "ac" if grid.line_is_ac else "dc")
    probe.setting("voltage", 0.0)
    if grid.line_is_ac:
        probe.setting("frequency", grid.line_frequency_hz)
    elif probe.driver.map.has("frequency"):
        probe.record("frequency", SKIPPED, "", "a DC sequence sets no line frequency")
    probe.ask("measure_voltage")
    probe.ask("measure_current")


def _probe_load(probe: _RoleProbe, sequence: Sequence) -> None:
    probe.setting("input", "off")
    probe.setting("mode", "current")
    probe.setting("current", 0.0)
    for key in ("measure_voltage", "measure_current", "measure_power"):
        probe.ask(key)


def _probe_meter(probe: _RoleProbe, sequence: Sequence) -> None:
    for key in ROLE_COMMANDS["meter"]:
        probe.ask(key)


def _probe_scope(probe: _RoleProbe, sequence: Sequence) -> None:
    scope = probe.driver
    assert isinstance(scope, Oscilloscope)
    node, settings = sequence.primary, sequence.acquisition
    channel = node.channel
    for key, value in (
        ("channel_enable", "on"),
        ("channel_probe", node.probe_ratio),
        ("channel_scale", node.volts_per_div_v),
        ("channel_offset", node.offset_v),
        ("channel_bandwidth_limit", node.bandwidth_limit_hz),
        ("channel_coupling", node.coupling),
    ):
        probe.setting(key, value, channel)
    probe.setting("timebase_scale", settings.time_per_div_s)
    probe.setting("record_length", settings.record_length)
    scope.record_duration_s = settings.time_per_div_s * scope.map.horizontal_divisions
    probe.setting("trigger_source", None, channel)
    probe.setting("trigger_level", settings.trigger_level_v)
    probe.setting("trigger_slope", settings.trigger_slope)
    probe.setting("trigger_position", scope.trigger_position_value(settings.trigger_position))
    _probe_acquisition(probe, scope, channel, settings.acquisition_timeout_s)
    probe.ask("measure_mean_query", channel)


def _probe_acquisition(
    probe: _RoleProbe, scope: Oscilloscope, channel: int, timeout_s: float
) -> None:
    """Arm, trigger at once (where the map can; else wait for a real trigger), fetch."""
    command_map = scope.map
    with probe.attempt("single", command_map.command("single")):
        scope.single()
    if command_map.has("force_trigger"):
        with probe.attempt("force_trigger", command_map.command("force_trigger")):
            scope.force_trigger()
    else:
        probe.not_mapped("force_trigger")
    done_query = command_map.command("acquisition_done_query")
    with probe.attempt("acquisition_done_query", done_query) as detail:
        deadline = time.monotonic() + timeout_s
        while not scope.acquisition_done():
            if time.monotonic() >= deadline:
                raise InstrumentError(
                    f"no acquisition within {timeout_s:g} s (nothing is switched on: without "
                    "force_trigger in the map, the trigger has nothing to fire on)"
                )
            time.sleep(POLL_S)
        detail.append(f"answered {command_map.acquisition_done_reply!r}")
    _probe_fetch(probe, scope, channel)
    with probe.attempt("stop", command_map.command("stop")):
        scope.stop()


def _probe_fetch(probe: _RoleProbe, scope: Oscilloscope, channel: int) -> None:
    """Each step of one waveform transfer on its own line."""
    command_map = scope.map
    selection = [
        ("waveform_source", command_map.command("waveform_source", channel=channel)),
        ("waveform_format", "format"),
        ("waveform_byte_order", "byte order"),
    ]
    with probe.attempt("waveform_source", selection[0][1]):
        scope.select_waveform(channel)
    for key, _ in selection[1:]:
        if not command_map.has(key):
            probe.not_mapped(key)
        elif key == "waveform_byte_order" and command_map.data_format in ("int8", "uint8", "ascii"):
            probe.record(key, SKIPPED, "", f"{command_map.data_format} codes have no byte order")
        else:
            word_group = "data_format" if key == "waveform_format" else "byte_order"
            value = command_map.data_format if key == "waveform_format" else command_map.byte_order
            sent = command_map.command(key, value=command_map.word(word_group, value))
            probe.record(key, OK, sent, "sent with waveform_source, checked together")
    scaling_sent = (
        command_map.command("waveform_scaling_query") if command_map.scaling_fields else ""
    )
    scaling_sent = " ".join([scaling_sent, *command_map.scaling_queries.values()]).strip()
    with probe.attempt("waveform_scaling_query", scaling_sent) as detail:
        scaling = scope.read_scaling()
        detail.append(", ".join(f"{name} {value:g}" for name, value in scaling.items()))
    with probe.attempt("waveform_data_query", command_map.command("waveform_data_query")) as detail:
        waveform = scope.fetch_waveform(channel)
        volts = waveform.volts()
        detail.append(
            f"{waveform.codes.size} points every {waveform.x_increment_s:g} s, "
            f"{float(volts.min()):g} V to {float(volts.max()):g} V"
        )


PROBES: dict[str, Callable[[_RoleProbe, Sequence], None]] = {
    "source": _probe_source,
    "load": _probe_load,
    "meter": _probe_meter,
    "scope": _probe_scope,
}


def probe_bench(sequence: Sequence, roles: tuple[str, ...] = ROLES) -> list[ProbeLine]:
    """Probe ``roles`` of the sequence's bench (see the module notes); one line per command.

    Each role's driver is opened on its own, so one that cannot be reached does not stop the
    others; every driver is closed at the end, which switches the output roles off once more.
    """
    lines: list[ProbeLine] = []
    started = start_resources(sequence)
    resources = started.resources
    try:
        for role in roles:
            try:
                driver = open_driver(sequence, resources, role)
            except InstrumentError as error:
                lines.append(ProbeLine(role, "open", FAILED, resources[role], str(error)))
                continue
            try:
                probe = _RoleProbe(role, driver, lines)
                if probe.start():
                    PROBES[role](probe, sequence)
                    probe.remaining()
                else:
                    probe.remaining("the instrument did not identify itself")
            finally:
                try:
                    driver.close()
                except InstrumentError as error:
                    lines.append(ProbeLine(role, "close", FAILED, "", str(error)))
                    driver.abandon()
    finally:
        if started.stop is not None:
            started.stop()
    return lines
