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

from sim_instruments import scope as acquisition
from sim_instruments.flyback import FlybackModel, LineReading, OperatingPoint
from sim_instruments.server import Block, Call, Command, CommandError, ScpiInstrument, format_number

MANUFACTURER = "labseq-sim"
FIRMWARE = "1.0"

#: Setting ranges of the simulated instruments (like a real one, it refuses beyond them: −222).
SOURCE_VOLTAGE_MAX_V = 400.0
SOURCE_FREQUENCY_RANGE_HZ = (40.0, 500.0)
SOURCE_CURRENT_LIMIT_MAX_A = 20.0
LOAD_CURRENT_MAX_A = 30.0
SCOPE_CHANNELS = 4
#: What the scope's probes see: the primary switch node, and the output rectifier (anode to
#: cathode) when the DUT declares one; the other channels are unprobed.
PRIMARY_CHANNEL = 1
SECONDARY_CHANNEL = 2
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
    ) -> tuple[dict[int, acquisition.Waveform], float] | None:
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

        def probe(node: Callable[[OperatingPoint, np.ndarray], np.ndarray]) -> acquisition.Waveform:
            def waveform(t_s: np.ndarray) -> np.ndarray:
                with self.lock:  # the model caches its solutions; one caller at a time
                    return node(point, t_s)

            return waveform

        probes = {PRIMARY_CHANNEL: probe(self.model.switch_node_v)}
        if self.model.has_secondary:
            probes[SECONDARY_CHANNEL] = probe(self.model.secondary_node_v)
        return probes, period_s


class SimInstrument(ScpiInstrument):
    """A simulated instrument on the shared bench state, with its own seeded reading noise."""

    model_name = "instrument"

    def __init__(self, state: BenchState, rng: np.random.Generator, serial: str) -> None:
        self.state = state
        self.rng = rng
        self.identity = (MANUFACTURER, self.model_name, serial, FIRMWARE)
        super().__init__()
        self.reset()

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


class SimSource(SimInstrument):
    """Programmable AC/DC line source."""

    model_name = "line-source"

    def reset(self) -> None:
        self.state.set_source_output(False)
        with self.state.lock:
            self.state.source_shape = "DC"
            self.state.source_voltage_v = 0.0
            self.state.source_frequency_hz = 50.0
            self.state.source_current_limit_a = 1.0

    def commands(self) -> list[Command]:
        state = self.state

        def set_value(name: str, value: object) -> None:
            with state.lock:
                setattr(state, name, value)
                if name == "source_voltage_v":
                    state.line_history.append((state.source_voltage_v, state.source_output_on))

        def output_current_a() -> float:
            reading = state.line_reading()
            return min(reading.current_a, state.source_current_limit_a)

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


class SimLoad(SimInstrument):
    """Electronic load in constant-current mode on the converter's output."""

    model_name = "electronic-load"

    def reset(self) -> None:
        with self.state.lock:
            self.state.load_input_on = False
            self.state.load_current_a = 0.0

    def commands(self) -> list[Command]:
        state = self.state

        def set_input(call: Call) -> None:
            with state.lock:
                state.load_input_on = call.boolean()

        def output_voltage_v() -> float:
            point = state.operating_point()
            return point.output_voltage_v if point is not None else 0.0

        def current_a() -> float:
            return state.load_current_a if state.operating_point() is not None else 0.0

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


class SimMeter(SimInstrument):
    """Power meter on the line input."""

    model_name = "power-meter"

    def commands(self) -> list[Command]:
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


class SimScope(SimInstrument):
    """Four-channel digital storage scope; channel 1 probes the switch node, channel 2 the
    output rectifier (anode to cathode) when the DUT declares one.

    ``:SINGle`` computes the capture in a background thread, so ``:ACQuire:COMPlete?`` can be
    polled; a trigger that cannot fire keeps the acquisition pending until ``:STOP``, ``*RST`` or
    another ``:SINGle``.
    """

    model_name = "oscilloscope"
    DATA_FORMATS = ("INT8", "INT16", "FLOAT32")

    def __init__(self, state: BenchState, rng: np.random.Generator, serial: str) -> None:
        self._cancel: threading.Event | None = None
        super().__init__(state, rng, serial)

    def reset(self) -> None:
        self._abandon_acquisition()
        self.settings = acquisition.AcquisitionSettings()
        self.waveform_channel = 1
        self.data_format = "INT8"
        self.little_endian = False
        self.capture: acquisition.Capture | None = None
        self.complete = False
        self.fail_next_trigger = False

    def apply_fault(self, kind: str) -> None:
        """``no-trigger``: the next ``:SINGle`` acquisition never completes."""
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
        self.capture, self.complete = None, False
        self._cancel = threading.Event()
        args = (self.settings, self._cancel, int(self.rng.integers(2**63)), self.fail_next_trigger)
        self.fail_next_trigger = False
        threading.Thread(target=self._acquire, args=args, name="sim-scope-acq", daemon=True).start()

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
    def _scaling(self, _: Call) -> str:
        """Scaling of the last capture; with none, 0 points and the present settings."""
        points = self.capture.points if self.capture is not None else 0
        settings = self.capture.settings if self.capture is not None else self.settings
        fields = acquisition.scaling(settings, self.waveform_channel, self.data_format)
        return ",".join([str(points), *(format_number(value) for value in fields), "0"])

    def _data(self, _: Call) -> Block:
        if self.capture is None:
            self.push_error(CommandError(-230, "no completed acquisition"))
            return Block(memoryview(b""))
        return Block(
            self.capture.payload(self.waveform_channel, self.data_format, self.little_endian)
        )

    def _mean_v(self, call: Call) -> str:
        channel = call.suffixed("CHANnel", 1, SCOPE_CHANNELS)
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
        """``CHANnel<n>:<node>``: ``parse`` gives the changes, the query shows field ``name``."""

        def setter(call: Call) -> None:
            number = call.suffix(1, SCOPE_CHANNELS)
            changes = parse(call, self.settings.channels[number - 1])
            self.settings = self.settings.with_channel(number, **changes)

        def query(call: Call) -> str:
            number = call.suffix(1, SCOPE_CHANNELS)
            return show(getattr(self.settings.channels[number - 1], name))

        return Command(f"CHANnel#:{node}", setter=setter, query=query)

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
        self.waveform_channel = call.suffixed("CHANnel", 1, SCOPE_CHANNELS)

    def _set_data_format(self, call: Call) -> None:
        self.data_format = call.choice(self.DATA_FORMATS)

    def _set_byte_order(self, call: Call) -> None:
        self.little_endian = call.choice(("NORMal", "SWAPped")) == "SWAPped"

    def commands(self) -> list[Command]:
        low_scale, high_scale = SCOPE_SCALE_RANGE_V_PER_DIV
        level_max = SCOPE_TRIGGER_LEVEL_MAX_V
        bandwidth_range = (SCOPE_BANDWIDTH_LIMIT_MIN_HZ, acquisition.NATIVE_BANDWIDTH_HZ)

        def scale(call: Call, channel: acquisition.ChannelSettings) -> dict[str, object]:
            ratio = channel.probe_ratio
            return {"scale_v_per_div": call.number(low_scale * ratio, high_scale * ratio, "V")}

        def offset(call: Call, channel: acquisition.ChannelSettings) -> dict[str, object]:
            limit = SCOPE_OFFSET_DIVS_MAX * high_scale * channel.probe_ratio
            return {"offset_v": call.number(-limit, limit, "V")}

        def probe(call: Call, channel: acquisition.ChannelSettings) -> dict[str, object]:
            # A new probe ratio keeps the tip scale, brought inside the new range.
            ratio = call.number(*SCOPE_PROBE_RANGE)
            scale_v = min(max(channel.scale_v_per_div, low_scale * ratio), high_scale * ratio)
            return {"probe_ratio": ratio, "scale_v_per_div": scale_v}

        return [
            self._channel_setting(
                "DISPlay", lambda c, _: {"display": c.boolean()}, "display", _flag
            ),
            self._channel_setting("SCALe", scale, "scale_v_per_div"),
            self._channel_setting("OFFSet", offset, "offset_v"),
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
            self._channel_setting("PROBe", probe, "probe_ratio"),
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
            Command(":STOP", setter=self._stop, set_params=(0, 0)),
            Command(":ACQuire:COMPlete", query=lambda _: _flag(self.complete)),
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
            Command(":MEASure:VAVerage", query=self._mean_v, query_params=(1, 1)),
        ]
