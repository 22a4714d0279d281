"""The four simulated instruments and the bench state they share.

One :class:`BenchState` holds the line source's and the load's settings and the physical flyback
model; each instrument reads what it would see on a real bench from it. The converter runs only
when the source output is on, the line lies inside the design's range and the load draws a
current; otherwise the switch node sits at the bus voltage, which decays through the bleed
resistance once the source is switched off.
"""

from __future__ import annotations

import math
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field, replace

import numpy as np

from labseq_sim_instruments import DIALECTS, PRIMARY_CHANNEL, SECONDARY_CHANNEL
from labseq_sim_instruments import scope as acquisition
from labseq_sim_instruments.flyback import FlybackModel, LineReading, OperatingPoint
from labseq_sim_instruments.server import (
    Block,
    Call,
    Command,
    CommandError,
    SimulatedInstrument,
    format_number,
)

MANUFACTURER = "labseq-sim"
FIRMWARE = "1.0"

GENERIC, ALT = DIALECTS
#: The alt scope's bandwidth-limit filter, switched ON or OFF.
ALT_FILTER_HZ = 20e6

#: Setting ranges of the simulated instruments (like a real one, it refuses beyond them: −222).
SOURCE_VOLTAGE_MAX_V = 400.0
SOURCE_FREQUENCY_RANGE_HZ = (40.0, 500.0)
SOURCE_CURRENT_LIMIT_MAX_A = 20.0
LOAD_CURRENT_MAX_A = 30.0
SCOPE_CHANNELS = 4
SCOPE_SCALE_RANGE_V_PER_DIV = (1e-3, 10.0)  # at the BNC; times the probe ratio at the tip
SCOPE_OFFSET_DIVS_MAX = 100.0  # offset range in divisions of the largest scale, at the BNC
SCOPE_PROBE_RANGE = (0.1, 10_000.0)
SCOPE_TIMEBASE_RANGE_S_PER_DIV = (1e-9, 10.0)
SCOPE_RECORD_RANGE = (100, acquisition.MAX_RECORD_LENGTH)
SCOPE_TRIGGER_LEVEL_MAX_V = 10_000.0
SCOPE_BANDWIDTH_LIMIT_MIN_HZ = 1e3

#: Input power drawn by a converter that is powered but not switching (its controller only).
STANDBY_POWER_W = 0.25
STANDBY_POWER_FACTOR_AC = 0.2
#: Relative and absolute (floor) standard deviation of every simulated reading.
READING_NOISE_RELATIVE = 3e-4
READING_NOISE_FLOOR = 1e-4
#: How often a pending acquisition looks again at whether its trigger can fire.
TRIGGER_POLL_S = 0.05
#: An AC acquisition falls at one of this many phases of the line cycle, so the model's cache of
#: solved operating points serves repeated acquisitions.
LINE_PHASE_STEPS = 64


#: Line source waveform shapes: SCPI mnemonic → what the shape query answers.
SHAPES = {"DC": "DC", "SINusoid": "SIN"}


def _flag(value: object) -> str:
    return "1" if value else "0"


@dataclass
class BenchState:
    """Settings of the source and load, and the flyback model, shared by the four instruments.

    ``load_setpoints`` counts load current setpoint commands: the bench's operating points.
    """

    model: FlybackModel
    source_shape: str = "DC"  # "DC" or "SIN"
    source_voltage_v: float = 0.0
    source_frequency_hz: float = 50.0
    source_current_limit_a: float = 1.0
    source_output_on: bool = False
    source_off_time_s: float | None = None  # time.monotonic() when the output went off
    bus_voltage_at_off_v: float = 0.0
    load_current_a: float = 0.0
    load_input_on: bool = False
    load_setpoints: int = 0
    #: (source voltage, output on) after every change of either: what the DUT saw, in order.
    line_history: list[tuple[float, bool]] = field(default_factory=list)
    lock: threading.RLock = field(default_factory=threading.RLock, repr=False)

    @property
    def line_is_ac(self) -> bool:
        return self.source_shape == "SIN"

    def converter_running(self) -> bool:
        """Switching needs line inside the design's range and a load drawing current."""
        design = self.model.design
        return (
            self.source_output_on
            and design.line_min_v <= self.source_voltage_v <= design.line_max_v
            and self.load_input_on
            and self.load_current_a > 0
        )

    def set_source_output(self, on: bool) -> None:
        """Switch the source; switching off starts the bus decay from its present voltage."""
        with self.lock:
            if self.source_output_on and not on:
                self.bus_voltage_at_off_v = self.bus_voltage_v()
                self.source_off_time_s = time.monotonic()
            self.source_output_on = on
            self.line_history.append((self.source_voltage_v, on))

    def set_load_current(self, current_a: float) -> None:
        with self.lock:
            self.load_current_a = current_a
            self.load_setpoints += 1

    def bus_voltage_v(self, line_phase_rad: float | None = None) -> float:
        """Bulk capacitor voltage: from the line while the source is on, else bleeding away.

        On an AC line the bus ripples; ``line_phase_rad`` picks a point of the line cycle, and
        None gives the mean over the cycle (what a free-running average reads).
        """
        with self.lock:
            if self.source_output_on:
                load_a = self.load_current_a if self.converter_running() else 0.0
                if line_phase_rad is not None or not self.line_is_ac:
                    phases_rad = [line_phase_rad or 0.0]
                else:
                    phases_rad = [
                        2 * math.pi * k / LINE_PHASE_STEPS for k in range(LINE_PHASE_STEPS)
                    ]
                values_v = [
                    self.model.bulk_voltage_v(
                        self.source_voltage_v,
                        self.line_is_ac,
                        self.source_frequency_hz,
                        load_a,
                        phase_rad,
                    )
                    for phase_rad in phases_rad
                ]
                return sum(values_v) / len(values_v)
            if self.source_off_time_s is None:
                return 0.0
            elapsed_s = time.monotonic() - self.source_off_time_s
            tau_s = self.model.design.bus_bleed_time_constant_s
            return self.bus_voltage_at_off_v * math.exp(-elapsed_s / tau_s)

    def operating_point(self, line_phase_rad: float | None = None) -> OperatingPoint | None:
        """The converter's operating point, or None when it is not switching."""
        with self.lock:
            if not self.converter_running():
                return None
            bus_v = self.bus_voltage_v(line_phase_rad)
            return self.model.operating_point(bus_v, self.load_current_a)

    def line_reading(self) -> LineReading:
        """What a power meter on the line input reads now."""
        with self.lock:
            if self.converter_running():
                return self.model.line_reading(
                    self.source_voltage_v,
                    self.line_is_ac,
                    self.source_frequency_hz,
                    self.load_current_a,
                )
            if self.source_output_on and self.source_voltage_v > 0:
                volts = self.source_voltage_v
                factor = STANDBY_POWER_FACTOR_AC if self.line_is_ac else 1.0
                return LineReading(
                    volts, STANDBY_POWER_W / (volts * factor), STANDBY_POWER_W, factor
                )
            # Source off: an AC input sits behind the bridge; a DC input shows the bus capacitor.
            volts = 0.0 if self.line_is_ac else self.bus_voltage_v()
            return LineReading(volts, 0.0, 0.0, 0.0)

    def probed_nodes(
        self, rng: np.random.Generator
    ) -> tuple[dict[int, acquisition.NodeVoltage], float] | None:
        """The waveforms the scope's probes see in one acquisition, and their period.

        Channel :data:`PRIMARY_CHANNEL` probes the switch node, :data:`SECONDARY_CHANNEL` the
        output rectifier if the DUT declares one; both at one operating point, so one trigger
        serves both. None when the converter is not switching. On an AC line each acquisition
        falls at a random phase of the line cycle.
        """
        step = int(rng.integers(LINE_PHASE_STEPS)) if self.line_is_ac else 0
        phase_rad = 2 * math.pi * step / LINE_PHASE_STEPS
        point = self.operating_point(phase_rad)
        if point is None:
            return None
        period_s = 1.0 / self.model.design.switching_frequency_hz

        def probe(
            node: Callable[[OperatingPoint, np.ndarray], np.ndarray],
        ) -> acquisition.NodeVoltage:
            def waveform(t_s: np.ndarray) -> np.ndarray:
                with self.lock:  # the model caches its solutions; one caller at a time
                    return node(point, t_s)

            return waveform

        probes = {PRIMARY_CHANNEL: probe(self.model.switch_node_v)}
        if self.model.has_secondary:
            probes[SECONDARY_CHANNEL] = probe(self.model.secondary_node_v)
        return probes, period_s


class SimulatedRole(SimulatedInstrument):
    """One of the four roles of the simulated bench: a simulated instrument on the shared bench
    state, with its own seeded reading noise, speaking one of the :data:`DIALECTS`."""

    model_name = "instrument"

    def __init__(
        self, state: BenchState, rng: np.random.Generator, serial: str, dialect: str = GENERIC
    ) -> None:
        if dialect not in DIALECTS:
            raise ValueError(f"unknown dialect {dialect!r}; valid: {', '.join(DIALECTS)}")
        self.state = state
        self.rng = rng
        self.dialect = dialect
        model = self.model_name if dialect == GENERIC else f"{self.model_name}-{dialect}"
        self.identity = (MANUFACTURER, model, serial, FIRMWARE)
        self.reply_headers = dialect == ALT
        super().__init__()
        self.reset()

    def commands(self) -> list[Command]:
        return self.alt_commands() if self.dialect == ALT else self.generic_commands()

    def generic_commands(self) -> list[Command]:
        """The command table of the generic dialect."""
        return []

    def alt_commands(self) -> list[Command]:
        """The command table of the alt dialect."""
        return []

    def _common_commands(self) -> list[Command]:
        """The alt dialect adds ``SYSTem:HEADer`` (on after ``*RST``) to the common commands."""
        commands = super()._common_commands()
        if self.dialect != ALT:
            return commands

        def reset(_: Call) -> None:
            self.reply_headers = True
            self.reset()

        def set_headers(call: Call) -> None:
            self.reply_headers = call.boolean()

        return [
            Command("*RST", setter=reset, set_params=(0, 0)) if c.pattern == "*RST" else c
            for c in commands
        ] + [
            Command("SYSTem:HEADer", setter=set_headers, query=lambda _: _flag(self.reply_headers))
        ]

    def reading(self, value: float, ceiling: float = math.inf) -> str:
        """``value`` as a reading with small gaussian noise, never above ``ceiling``, in NR3."""
        sigma = abs(value) * READING_NOISE_RELATIVE + READING_NOISE_FLOOR
        return format_number(min(value + float(self.rng.normal(0.0, sigma)), ceiling))

    def readings(self, *pairs: tuple[str, Callable[[], float]]) -> list[Command]:
        """Query-only measurement commands: header pattern → function giving the true value."""
        return [
            Command(pattern, query=lambda _, value=value: self.reading(value()))
            for pattern, value in pairs
        ]


class SimSource(SimulatedRole):
    """Programmable AC/DC line source."""

    model_name = "line-source"

    def reset(self) -> None:
        self.state.set_source_output(False)
        with self.state.lock:
            self.state.source_shape = "DC"
            self.state.source_voltage_v = 0.0
            self.state.source_frequency_hz = 50.0
            self.state.source_current_limit_a = 1.0

    def _set(self, name: str, value: object) -> None:
        state = self.state
        with state.lock:
            setattr(state, name, value)
            if name == "source_voltage_v":
                state.line_history.append((state.source_voltage_v, state.source_output_on))

    def _output_current_a(self) -> float:
        reading = self.state.line_reading()
        return min(reading.current_a, self.state.source_current_limit_a)

    def alt_commands(self) -> list[Command]:
        """Line set-up under ``:LINE``, the current limit in milliamps, the output as a stage
        that RUNs or is IDLE."""
        state, set_value = self.state, self._set
        shapes = {"DC": "DC", "AC": "SIN"}
        return [
            Command(
                ":CONFigure:LINE",
                setter=lambda c: set_value("source_shape", shapes[c.choice(tuple(shapes))]),
                query=lambda _: "AC" if state.line_is_ac else "DC",
            ),
            Command(
                ":LINE:LEVel",
                setter=lambda c: set_value(
                    "source_voltage_v", c.number(0.0, SOURCE_VOLTAGE_MAX_V, "V")
                ),
                query=lambda _: format_number(state.source_voltage_v),
            ),
            Command(
                ":LINE:FREQuency",
                setter=lambda c: set_value(
                    "source_frequency_hz", c.number(*SOURCE_FREQUENCY_RANGE_HZ, "HZ")
                ),
                query=lambda _: format_number(state.source_frequency_hz),
            ),
            Command(
                ":LINE:ILIMit",
                setter=lambda c: set_value(
                    "source_current_limit_a", c.number(0.0, SOURCE_CURRENT_LIMIT_MAX_A * 1e3) / 1e3
                ),
                query=lambda _: format_number(state.source_current_limit_a * 1e3),
            ),
            Command(
                ":POWer:STAGe",
                setter=lambda c: state.set_source_output(c.choice(("RUN", "IDLE")) == "RUN"),
                query=lambda _: "RUN" if state.source_output_on else "IDLE",
            ),
            *self.readings(
                (":READ:VOLTage", lambda: state.line_reading().voltage_v),
                (":READ:CURRent", self._output_current_a),
            ),
        ]

    def generic_commands(self) -> list[Command]:
        state, set_value = self.state, self._set
        output_current_a = self._output_current_a
        return [
            Command(
                "SOURce:FUNCtion:SHAPe",
                setter=lambda c: set_value("source_shape", SHAPES[c.choice(tuple(SHAPES))]),
                query=lambda _: state.source_shape,
            ),
            Command(
                "SOURce:VOLTage",
                setter=lambda c: set_value(
                    "source_voltage_v", c.number(0.0, SOURCE_VOLTAGE_MAX_V, "V")
                ),
                query=lambda _: format_number(state.source_voltage_v),
            ),
            Command(
                "SOURce:FREQuency",
                setter=lambda c: set_value(
                    "source_frequency_hz", c.number(*SOURCE_FREQUENCY_RANGE_HZ, "HZ")
                ),
                query=lambda _: format_number(state.source_frequency_hz),
            ),
            Command(
                "SOURce:CURRent:LIMit",
                setter=lambda c: set_value(
                    "source_current_limit_a", c.number(0.0, SOURCE_CURRENT_LIMIT_MAX_A, "A")
                ),
                query=lambda _: format_number(state.source_current_limit_a),
            ),
            Command(
                "OUTPut[:STATe]",
                setter=lambda c: state.set_source_output(c.boolean()),
                query=lambda _: _flag(state.source_output_on),
            ),
            *self.readings(
                ("MEASure:VOLTage", lambda: state.line_reading().voltage_v),
                ("MEASure:CURRent", output_current_a),
            ),
        ]


class SimLoad(SimulatedRole):
    """Electronic load in constant-current mode on the converter's output."""

    model_name = "electronic-load"

    def reset(self) -> None:
        with self.state.lock:
            self.state.load_input_on = False
            self.state.load_current_a = 0.0

    def _set_input(self, call: Call) -> None:
        with self.state.lock:
            self.state.load_input_on = call.boolean()

    def _output_voltage_v(self) -> float:
        point = self.state.operating_point()
        return point.output_voltage_v if point is not None else 0.0

    def _current_a(self) -> float:
        return self.state.load_current_a if self.state.operating_point() is not None else 0.0

    def alt_commands(self) -> list[Command]:
        """Everything under ``:LOAD``, currents in milliamps, readings under ``:READ``."""
        state = self.state
        return [
            Command(":LOAD:MODE", setter=lambda c: c.choice(("CC",)), query=lambda _: "CC"),
            Command(
                ":LOAD:CC",
                setter=lambda c: state.set_load_current(
                    c.number(0.0, LOAD_CURRENT_MAX_A * 1e3) / 1e3
                ),
                query=lambda _: format_number(state.load_current_a * 1e3),
            ),
            Command(
                ":LOAD:STATe",
                setter=self._set_input,
                query=lambda _: "ON" if state.load_input_on else "OFF",
            ),
            *self.readings(
                (":READ:VOLTage", self._output_voltage_v),
                (":READ:CURRent", lambda: self._current_a() * 1e3),
                (":READ:POWer", lambda: self._output_voltage_v() * self._current_a()),
            ),
        ]

    def generic_commands(self) -> list[Command]:
        state, set_input = self.state, self._set_input
        output_voltage_v, current_a = self._output_voltage_v, self._current_a
        return [
            Command(
                "SOURce:FUNCtion", setter=lambda c: c.choice(("CURRent",)), query=lambda _: "CURR"
            ),
            Command(
                "SOURce:CURRent",
                setter=lambda c: state.set_load_current(c.number(0.0, LOAD_CURRENT_MAX_A, "A")),
                query=lambda _: format_number(state.load_current_a),
            ),
            Command("INPut[:STATe]", setter=set_input, query=lambda _: _flag(state.load_input_on)),
            *self.readings(
                ("MEASure:VOLTage", output_voltage_v),
                ("MEASure:CURRent", current_a),
                ("MEASure:POWer", lambda: output_voltage_v() * current_a()),
            ),
        ]


class SimMeter(SimulatedRole):
    """Power meter on the line input."""

    model_name = "power-meter"

    def alt_commands(self) -> list[Command]:
        """Readings under ``:READ`` with names of their own, the current in milliamps."""
        line = self.state.line_reading
        return self.readings(
            (":READ:VRMS", lambda: line().voltage_v),
            (":READ:IRMS", lambda: line().current_a * 1e3),
            (":READ:WATT", lambda: line().power_w),
        ) + [Command(":READ:PF", query=lambda _: self.reading(line().power_factor, ceiling=1.0))]

    def generic_commands(self) -> list[Command]:
        line = self.state.line_reading
        return self.readings(
            ("MEASure:VOLTage", lambda: line().voltage_v),
            ("MEASure:CURRent", lambda: line().current_a),
            ("MEASure:POWer", lambda: line().power_w),
        ) + [
            Command(
                "MEASure:POWer:PFACtor",
                query=lambda _: self.reading(line().power_factor, ceiling=1.0),
            )
        ]


class SimScope(SimulatedRole):
    """Four-channel digital storage scope; channel 1 probes the switch node, channel 2 the
    output rectifier (anode to cathode) when the DUT declares one.

    Arming computes the capture in a background thread, so the acquisition state can be polled;
    a trigger that cannot fire keeps the acquisition pending until it is stopped, ``*RST`` or
    another arm. The two dialects drive the same acquisition: ``generic`` in the generic map's
    terms, ``alt`` with a full-scale range and a span in place of per-division scales, a trigger
    delay in seconds to the record's centre, an ON/OFF filter, unsigned codes and a preamble
    with text fields, and a transfer span that must be set to FULL before data can be read.
    """

    model_name = "oscilloscope"
    DATA_FORMATS = ("INT8", "UINT8", "INT16", "UINT16", "FLOAT32")
    #: The alt dialect's encodings: unsigned bytes, unsigned words, or ASCII numbers.
    ALT_ENCODINGS = {"BYTE": "UINT8", "WORD": "UINT16", "TEXT": "UINT8"}

    def __init__(
        self, state: BenchState, rng: np.random.Generator, serial: str, dialect: str = GENERIC
    ) -> None:
        self._cancel: threading.Event | None = None
        super().__init__(state, rng, serial, dialect)

    def reset(self) -> None:
        self._abandon_acquisition()
        self.settings = acquisition.AcquisitionSettings()
        self.waveform_channel = 1
        self.data_format = "INT8" if self.dialect == GENERIC else "UINT8"
        self.alt_encoding = "BYTE"
        self.little_endian = self.dialect == ALT
        self.transfer_full = False  # alt: the transfer span starts at SCREEN
        self.delay_s = 0.0  # alt: trigger delay from the trigger to the record's centre
        self.capture: acquisition.Capture | None = None
        self.complete = False
        self.fail_next_trigger = False

    def apply_fault(self, kind: str) -> None:
        """``no-trigger``: the next acquisition never completes."""
        if kind == "no-trigger":
            self.fail_next_trigger = True
        else:
            super().apply_fault(kind)

    def stop_acquisition(self) -> None:
        """Abandon any pending acquisition (used when the bench stops)."""
        with self.lock:
            self._abandon_acquisition()

    # -- acquisition
    def _abandon_acquisition(self) -> None:
        if self._cancel is not None:
            self._cancel.set()
        self._cancel = None

    def _single(self, _: Call) -> None:
        self._abandon_acquisition()
        if self.dialect == ALT:
            position = 0.5 - self.delay_s / self.settings.duration_s
            if not 0.0 <= position <= 1.0:
                raise CommandError(
                    -221, f"trigger delay {self.delay_s:g} s lies outside the record"
                )
            self.settings = replace(self.settings, trigger_position=position)
        self.capture, self.complete = None, False
        self._cancel = threading.Event()
        args = (self.settings, self._cancel, int(self.rng.integers(2**63)), self.fail_next_trigger)
        self.fail_next_trigger = False
        threading.Thread(target=self._acquire, args=args, name="sim-scope-acq", daemon=True).start()

    def _force(self, _: Call) -> None:
        """Trigger now: whatever the probes see at this instant, the converter running or not."""
        if self._cancel is None or self.complete:
            raise CommandError(-221, "no acquisition armed to trigger")
        self._abandon_acquisition()
        rng = np.random.default_rng(int(self.rng.integers(2**63)))
        source = self.state.probed_nodes(rng) or ({}, 1.0)
        self.capture = acquisition.acquire(*source, self.settings, rng, forced=True)
        self.complete = True

    def _acquire(
        self,
        settings: acquisition.AcquisitionSettings,
        cancel: threading.Event,
        seed: int,
        never_trigger: bool,
    ) -> None:
        rng = np.random.default_rng(seed)
        while not never_trigger and not cancel.is_set():
            try:
                source = self.state.probed_nodes(rng)
                capture = None if source is None else acquisition.acquire(*source, settings, rng)
            except (ValueError, ArithmeticError, MemoryError, RuntimeError) as error:
                with self.lock:
                    self.push_error(CommandError(-300, f"acquisition failed: {error}"))
                return
            if capture is not None:
                with self.lock:
                    if not cancel.is_set():
                        self.capture, self.complete = capture, True
                return
            cancel.wait(TRIGGER_POLL_S)

    def _stop(self, _: Call) -> None:
        if not self.complete:
            self._abandon_acquisition()

    # -- waveform transfer
    def _scaling_fields(self) -> tuple[int, tuple[float, float, float, float], int]:
        """Points, (x_increment, x_origin, y_increment, y_origin) and y_reference of the last
        capture in the present format; with none, 0 points and the present settings."""
        points = self.capture.points if self.capture is not None else 0
        settings = self.capture.settings if self.capture is not None else self.settings
        fields = acquisition.scaling(settings, self.waveform_channel, self.data_format)
        return points, fields, acquisition.unsigned_offset(self.data_format)

    def _scaling(self, _: Call) -> str:
        points, fields, reference = self._scaling_fields()
        return ",".join([str(points), *(format_number(value) for value in fields), str(reference)])

    def _preamble(self, _: Call) -> str:
        """The alt preamble: encoding, source, points, x increment, x reference (the trigger's
        sample), y increment, y origin, y reference, then the y and x units."""
        points, (x_increment, x_origin, y_increment, y_origin), reference = self._scaling_fields()
        numbers = (x_increment, -x_origin / x_increment, y_increment, y_origin)
        return ",".join(
            [self.alt_encoding, f"INP{self.waveform_channel}", str(points)]
            + [format_number(value) for value in numbers]
            + [str(reference), "VOLT", "SEC"]
        )

    def _payload(self) -> memoryview:
        if self.capture is None:
            raise CommandError(-230, "no completed acquisition")
        return self.capture.payload(self.waveform_channel, self.data_format, self.little_endian)

    def _data(self, _: Call) -> Block:
        try:
            return Block(self._payload())
        except CommandError as error:
            self.push_error(error)
            return Block(memoryview(b""))

    def _alt_data(self, call: Call) -> Block | str:
        if not self.transfer_full:
            self.push_error(
                CommandError(-221, "transfer span is SCREEN; set :TRANsfer:SPAN FULL first")
            )
            return Block(memoryview(b""))
        if self.alt_encoding != "TEXT":
            return self._data(call)
        try:
            payload = self._payload()
        except CommandError as error:
            self.push_error(error)
            return ""
        return ",".join(map(str, np.frombuffer(payload, dtype=np.uint8).tolist()))

    def _mean_v(self, call: Call) -> str:
        prefix = "CHANnel" if self.dialect == GENERIC else "INPut"
        channel = call.suffixed(prefix, 1, SCOPE_CHANNELS)
        if self.settings.channels[channel - 1].coupling != "DC":
            return self.reading(0.0)
        if channel == PRIMARY_CHANNEL:
            # Volt-second balance on the primary: the switch node's mean is the bus voltage.
            return self.reading(self.state.bus_voltage_v())
        if channel == SECONDARY_CHANNEL and self.state.model.has_secondary:
            # Volt-second balance on the secondary winding: the diode's mean is −Vout.
            point = self.state.operating_point()
            return self.reading(-point.output_voltage_v if point is not None else 0.0)
        return self.reading(0.0)

    # -- settings
    def _channel_setting(
        self,
        node: str,
        parse: Callable[[Call, acquisition.ChannelSettings], dict[str, object]],
        name: str,
        show: Callable[[object], str] = format_number,
    ) -> Command:
        """``<channel node><n>:<node>``: ``parse`` gives the changes, the query shows field
        ``name``."""

        def setter(call: Call) -> None:
            number = call.suffix(1, SCOPE_CHANNELS)
            changes = parse(call, self.settings.channels[number - 1])
            self.settings = self.settings.with_channel(number, **changes)

        def query(call: Call) -> str:
            number = call.suffix(1, SCOPE_CHANNELS)
            return show(getattr(self.settings.channels[number - 1], name))

        prefix = "CHANnel" if self.dialect == GENERIC else "INPut"
        return Command(f"{prefix}#:{node}", setter=setter, query=query)

    def _setting(
        self,
        pattern: str,
        parse: Callable[[Call], object],
        name: str,
        show: Callable[[object], str] = format_number,
    ) -> Command:
        """A horizontal or trigger setting stored in field ``name`` of the settings."""

        def setter(call: Call) -> None:
            self.settings = replace(self.settings, **{name: parse(call)})

        return Command(pattern, setter=setter, query=lambda _: show(getattr(self.settings, name)))

    def _set_waveform_source(self, call: Call) -> None:
        prefix = "CHANnel" if self.dialect == GENERIC else "INPut"
        self.waveform_channel = call.suffixed(prefix, 1, SCOPE_CHANNELS)

    def _set_data_format(self, call: Call) -> None:
        self.data_format = call.choice(self.DATA_FORMATS)

    def _set_byte_order(self, call: Call) -> None:
        self.little_endian = call.choice(("NORMal", "SWAPped")) == "SWAPped"

    def _vertical(self) -> dict[str, Callable[..., dict[str, object]]]:
        """Parsers of the vertical settings both dialects share (volts at the probe tip)."""
        low_scale, high_scale = SCOPE_SCALE_RANGE_V_PER_DIV

        def offset(call: Call, channel: acquisition.ChannelSettings) -> dict[str, object]:
            limit = SCOPE_OFFSET_DIVS_MAX * high_scale * channel.probe_ratio
            return {"offset_v": call.number(-limit, limit, "V")}

        def probe(call: Call, channel: acquisition.ChannelSettings) -> dict[str, object]:
            # A new probe ratio keeps the tip scale, brought inside the new range.
            ratio = call.number(*SCOPE_PROBE_RANGE)
            scale_v = min(max(channel.scale_v_per_div, low_scale * ratio), high_scale * ratio)
            return {"probe_ratio": ratio, "scale_v_per_div": scale_v}

        def scale(divisions: float) -> Callable[..., dict[str, object]]:
            def parse(call: Call, channel: acquisition.ChannelSettings) -> dict[str, object]:
                ratio = channel.probe_ratio * divisions
                return {
                    "scale_v_per_div": call.number(low_scale * ratio, high_scale * ratio, "V")
                    / divisions
                }

            return parse

        return {
            "offset": offset,
            "probe": probe,
            "scale": scale(1.0),
            "range": scale(acquisition.VERTICAL_DIVISIONS),
        }

    def generic_commands(self) -> list[Command]:
        level_max = SCOPE_TRIGGER_LEVEL_MAX_V
        bandwidth_range = (SCOPE_BANDWIDTH_LIMIT_MIN_HZ, acquisition.NATIVE_BANDWIDTH_HZ)
        vertical = self._vertical()
        return [
            self._channel_setting(
                "DISPlay", lambda c, _: {"display": c.boolean()}, "display", _flag
            ),
            self._channel_setting("SCALe", vertical["scale"], "scale_v_per_div"),
            self._channel_setting("OFFSet", vertical["offset"], "offset_v"),
            self._channel_setting(
                "COUPling", lambda c, _: {"coupling": c.choice(("DC", "AC"))}, "coupling", str
            ),
            self._channel_setting(
                "BANDwidth",
                lambda c, _: {
                    "bandwidth_limit_hz": c.number(*bandwidth_range, "HZ", allow_zero=True)
                },
                "bandwidth_limit_hz",
            ),
            self._channel_setting("PROBe", vertical["probe"], "probe_ratio"),
            self._setting(
                ":TIMebase:SCALe",
                lambda c: c.number(*SCOPE_TIMEBASE_RANGE_S_PER_DIV, "S"),
                "timebase_s_per_div",
            ),
            self._setting(
                ":ACQuire:POINts", lambda c: c.integer(*SCOPE_RECORD_RANGE), "record_length", str
            ),
            self._setting(
                ":TRIGger:SOURce",
                lambda c: c.suffixed("CHANnel", 1, SCOPE_CHANNELS),
                "trigger_channel",
                lambda v: f"CHAN{v}",
            ),
            self._setting(
                ":TRIGger:LEVel", lambda c: c.number(-level_max, level_max, "V"), "trigger_level_v"
            ),
            self._setting(
                ":TRIGger:SLOPe",
                lambda c: c.choice(("POSitive", "NEGative")) == "POSitive",
                "trigger_rising",
                lambda v: "POS" if v else "NEG",
            ),
            self._setting(":TRIGger:POSition", lambda c: c.number(0.0, 1.0), "trigger_position"),
            Command(":SINGle", setter=self._single, set_params=(0, 0)),
            Command(":TRIGger:IMMediate", setter=self._force, set_params=(0, 0)),
            Command(":STOP", setter=self._stop, set_params=(0, 0)),
            Command(":ACQuire:READy", query=lambda _: _flag(self.complete)),
            Command(
                ":WAVeform:SOURce",
                setter=self._set_waveform_source,
                query=lambda _: f"CHAN{self.waveform_channel}",
            ),
            Command(
                ":WAVeform:FORMat", setter=self._set_data_format, query=lambda _: self.data_format
            ),
            Command(
                ":WAVeform:BORDer",
                setter=self._set_byte_order,
                query=lambda _: "SWAP" if self.little_endian else "NORM",
            ),
            Command(":WAVeform:SCALing", query=self._scaling),
            Command(":WAVeform:DATA", query=self._data),
            Command(":MEASure:DCLevel", query=self._mean_v, query_params=(1, 1)),
        ]

    def alt_commands(self) -> list[Command]:
        level_max = SCOPE_TRIGGER_LEVEL_MAX_V
        low_span, high_span = (
            limit * acquisition.HORIZONTAL_DIVISIONS for limit in SCOPE_TIMEBASE_RANGE_S_PER_DIV
        )
        vertical = self._vertical()

        def filter_on(call: Call, _: acquisition.ChannelSettings) -> dict[str, object]:
            return {"bandwidth_limit_hz": ALT_FILTER_HZ if call.boolean() else 0.0}

        def set_delay(call: Call) -> None:
            self.delay_s = call.number(-1e3, 1e3, "S")

        def set_encoding(call: Call) -> None:
            self.alt_encoding = call.choice(tuple(self.ALT_ENCODINGS))
            self.data_format = self.ALT_ENCODINGS[self.alt_encoding]

        def set_order(call: Call) -> None:
            self.little_endian = call.choice(("LSBFirst", "MSBFirst")) == "LSBFirst"

        def set_span(call: Call) -> None:
            self.transfer_full = call.choice(("FULL", "SCReen")) == "FULL"

        def state(_: Call) -> str:
            if self.complete:
                return "DONE"
            return "ARMED" if self._cancel is not None else "IDLE"

        def scaling_query(index: int) -> Callable[[Call], str]:
            return lambda call: self._preamble(call).split(",")[index]

        return [
            self._channel_setting("STATe", lambda c, _: {"display": c.boolean()}, "display", _flag),
            self._channel_setting(
                "RANGe",
                vertical["range"],
                "scale_v_per_div",
                lambda v: format_number(v * acquisition.VERTICAL_DIVISIONS),
            ),
            self._channel_setting("OFFSet", vertical["offset"], "offset_v"),
            self._channel_setting(
                "COUPling",
                lambda c, _: {"coupling": c.choice(("DCLimit", "ACLimit"))[:2]},
                "coupling",
                lambda v: f"{v}L",
            ),
            self._channel_setting(
                "FILTer", filter_on, "bandwidth_limit_hz", lambda v: "ON" if v else "OFF"
            ),
            self._channel_setting("ATTenuation", vertical["probe"], "probe_ratio"),
            self._setting(
                ":HORizontal:SPAN",
                lambda c: c.number(low_span, high_span, "S") / acquisition.HORIZONTAL_DIVISIONS,
                "timebase_s_per_div",
                lambda v: format_number(v * acquisition.HORIZONTAL_DIVISIONS),
            ),
            self._setting(
                ":HORizontal:SAMPles",
                lambda c: c.integer(*SCOPE_RECORD_RANGE),
                "record_length",
                str,
            ),
            Command(
                ":HORizontal:DELay", setter=set_delay, query=lambda _: format_number(self.delay_s)
            ),
            self._setting(
                ":TRIGger:EDGE:SOURce",
                lambda c: c.suffixed("INPut", 1, SCOPE_CHANNELS),
                "trigger_channel",
                lambda v: f"INP{v}",
            ),
            self._setting(
                ":TRIGger:EDGE:LEVel",
                lambda c: c.number(-level_max, level_max, "V"),
                "trigger_level_v",
            ),
            self._setting(
                ":TRIGger:EDGE:DIRection",
                lambda c: c.choice(("UP", "DOWN")) == "UP",
                "trigger_rising",
                lambda v: "UP" if v else "DOWN",
            ),
            Command(":ACQuire:ARM", setter=self._single, set_params=(0, 0)),
            Command(":TRIGger:NOW", setter=self._force, set_params=(0, 0)),
            Command(":ACQuire:HALT", setter=self._stop, set_params=(0, 0)),
            Command(":ACQuire:STATus", query=state),
            Command(
                ":TRANsfer:SOURce",
                setter=self._set_waveform_source,
                query=lambda _: f"INP{self.waveform_channel}",
            ),
            Command(":TRANsfer:ENCoding", setter=set_encoding, query=lambda _: self.alt_encoding),
            Command(
                ":TRANsfer:ORDer",
                setter=set_order,
                query=lambda _: "LSBF" if self.little_endian else "MSBF",
            ),
            Command(
                ":TRANsfer:SPAN",
                setter=set_span,
                query=lambda _: "FULL" if self.transfer_full else "SCR",
            ),
            Command(":TRANsfer:PREamble", query=self._preamble),
            Command(":TRANsfer:POINts", query=scaling_query(2)),
            Command(":TRANsfer:XINCrement", query=scaling_query(3)),
            Command(":TRANsfer:XREFerence", query=scaling_query(4)),
            Command(":TRANsfer:YINCrement", query=scaling_query(5)),
            Command(":TRANsfer:YORigin", query=scaling_query(6)),
            Command(":TRANsfer:YREFerence", query=scaling_query(7)),
            Command(":TRANsfer:DATA", query=self._alt_data),
            Command(":MEASure:AVERage", query=self._mean_v, query_params=(1, 1)),
        ]
