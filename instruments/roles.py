"""One small class per bench role: line source, electronic load, power meter, oscilloscope.

Source, load and meter speak generic SCPI-1999; the oscilloscope takes its commands from a
:class:`~instruments.command_map.CommandMap`. Every setter validates all its arguments against
the role's declared limits before the first byte is sent.
"""

from __future__ import annotations

import math
import time
from abc import ABC, abstractmethod
from dataclasses import dataclass
from typing import Any

import numpy as np
from pyvisa.resources import MessageBasedResource

from instruments.block import decode_payload
from instruments.command_map import CommandMap, load_command_map
from instruments.errors import InstrumentTimeout, ReplyFormatError
from instruments.limits import (
    LoadLimits,
    SourceLimits,
    check_count,
    check_setpoint,
    check_word,
    format_number,
)
from instruments.scpi import ScpiInstrument, is_response_token


class _OutputRole(ScpiInstrument, ABC):
    """A role with a power path that must be off whenever the driver lets go of it."""

    @abstractmethod
    def switch_off(self) -> None:
        """Turn the power path off."""

    def measure_voltage_v(self) -> float:
        """Voltage at the terminals (rms for AC)."""
        return self.query_float("MEAS:VOLT?")

    def measure_current_a(self) -> float:
        """Current through the terminals (rms for AC)."""
        return self.query_float("MEAS:CURR?")

    def close(self) -> None:
        """Switch the power path off, then close the session, even if switching off fails."""
        if self.closed:
            return
        try:
            self.switch_off()
        finally:
            super().close()


def _on_off(on: bool) -> str:
    return "ON" if on else "OFF"


class LineSource(_OutputRole):
    """AC or DC line source (generic SCPI-1999 SOURce/OUTPut subsystems)."""

    role = "source"

    def __init__(
        self, resource: MessageBasedResource, limits: SourceLimits, name: str | None = None
    ) -> None:
        super().__init__(resource, name)
        self.limits = limits

    def _voltage(self, volts: float) -> float:
        return check_setpoint("source voltage", volts, 0.0, self.limits.max_voltage_v, "V")

    def set_dc(self, volts: float) -> None:
        """Select DC and set the output voltage."""
        volts = self._voltage(volts)
        self.configure("SOUR:FUNC:SHAP DC")
        self.configure(f"SOUR:VOLT {format_number(volts)}")

    def set_ac(self, volts_rms: float, frequency_hz: float) -> None:
        """Select a sine line and set its rms voltage and frequency."""
        volts_rms = self._voltage(volts_rms)
        frequency_hz = check_setpoint(
            "source frequency",
            frequency_hz,
            self.limits.min_frequency_hz,
            self.limits.max_frequency_hz,
            "Hz",
        )
        self.configure("SOUR:FUNC:SHAP SIN")
        self.configure(f"SOUR:FREQ {format_number(frequency_hz)}")
        self.configure(f"SOUR:VOLT {format_number(volts_rms)}")

    def set_current_limit(self, amps: float) -> None:
        """Set the output current limit."""
        amps = check_setpoint("source current limit", amps, 0.0, self.limits.max_current_a, "A")
        self.configure(f"SOUR:CURR:LIM {format_number(amps)}")

    def set_output(self, on: bool) -> None:
        """Turn the output on or off."""
        self.configure(f"OUTP {_on_off(on)}")

    def output_is_on(self) -> bool:
        """Whether the output is on."""
        return self.query_bool("OUTP?")

    def switch_off(self) -> None:
        """Turn the output off."""
        self.set_output(False)


class ElectronicLoad(_OutputRole):
    """Electronic load in constant-current mode (generic SCPI-1999 SOURce/INPut subsystems)."""

    role = "load"

    def __init__(
        self, resource: MessageBasedResource, limits: LoadLimits, name: str | None = None
    ) -> None:
        super().__init__(resource, name)
        self.limits = limits

    def set_current(self, amps: float) -> None:
        """Select constant current and set the current to sink."""
        amps = check_setpoint("load current", amps, 0.0, self.limits.max_current_a, "A")
        self.configure("SOUR:FUNC CURR")
        self.configure(f"SOUR:CURR {format_number(amps)}")

    def set_input(self, on: bool) -> None:
        """Turn the load's input on or off."""
        self.configure(f"INP {_on_off(on)}")

    def input_is_on(self) -> bool:
        """Whether the input is on."""
        return self.query_bool("INP?")

    def measure_power_w(self) -> float:
        """Power the load is sinking."""
        return self.query_float("MEAS:POW?")

    def switch_off(self) -> None:
        """Turn the input off."""
        self.set_input(False)


@dataclass(frozen=True)
class MeterReading:
    """One power-meter reading on the line input (rms volts and amps, real power)."""

    voltage_v: float
    current_a: float
    power_w: float
    power_factor: float


class PowerMeter(ScpiInstrument):
    """Power meter on the line input (generic SCPI-1999 MEASure subsystem)."""

    role = "meter"

    def measure(self) -> MeterReading:
        """Read voltage, current, real power and power factor."""
        return MeterReading(
            voltage_v=self.query_float("MEAS:VOLT?"),
            current_a=self.query_float("MEAS:CURR?"),
            power_w=self.query_float("MEAS:POW?"),
            power_factor=self.query_float("MEAS:POW:PFAC?"),
        )


@dataclass(frozen=True, eq=False)
class Waveform:
    """One capture: raw codes and the scaling that turns them into volts and seconds.

    volts = (code - y_reference) * y_increment + y_origin; t = x_origin + i * x_increment,
    so the trigger is at t = 0. ``code_min``/``code_max`` are the codes at the bottom and top of
    the screen (None where the scope sends volts, which do not clip at a known code).
    """

    codes: np.ndarray
    x_increment_s: float
    x_origin_s: float
    y_increment_v: float
    y_origin_v: float
    y_reference: float
    code_min: float | None
    code_max: float | None

    def volts(self) -> np.ndarray:
        """Samples in volts (float64)."""
        return (self.codes.astype(np.float64) - self.y_reference) * self.y_increment_v + (
            self.y_origin_v
        )

    def time_s(self) -> np.ndarray:
        """Sample instants in seconds, trigger at zero."""
        return self.x_origin_s + np.arange(self.codes.size) * self.x_increment_s

    def clip_mask(self) -> np.ndarray | None:
        """Samples at the bottom or top code of the screen, where the true voltage is unknown."""
        if self.code_min is None or self.code_max is None:
            return None
        return (self.codes <= self.code_min) | (self.codes >= self.code_max)

    @property
    def clipped(self) -> bool:
        """Whether any sample sits at the bottom or top of the screen."""
        mask = self.clip_mask()
        return mask is not None and bool(mask.any())


class Oscilloscope(ScpiInstrument):
    """An oscilloscope driven entirely through a scope command map."""

    role = "scope"

    def __init__(
        self,
        resource: MessageBasedResource,
        command_map: CommandMap | str = "generic",
        name: str | None = None,
    ) -> None:
        super().__init__(resource, name)
        self.map = (
            command_map if isinstance(command_map, CommandMap) else load_command_map(command_map)
        )
        self.limits = self.map.limits

    def _channel(self, channel: int) -> int:
        return check_count("scope channel", channel, 1, self.map.channels)

    def _send(self, key: str, *, channel: int | None = None, value: str | None = None) -> None:
        self.configure(self.map.command(key, channel=channel, value=value))

    def query_setting(self, key: str, channel: int | None = None) -> str:
        """Read back setting ``key`` of the map (e.g. ``channel_scale``) as the scope states it."""
        return self.query(self.map.query(key, channel=channel))

    def configure_channel(
        self,
        channel: int,
        volts_per_div: float,
        offset_v: float = 0.0,
        coupling: str = "dc",
        bandwidth_limit_hz: float = 0.0,
        probe_ratio: float = 1.0,
    ) -> None:
        """Enable a channel and set its probe, scale, offset, coupling and bandwidth limit.

        ``volts_per_div`` and ``offset_v`` are at the probe tip; ``bandwidth_limit_hz`` = 0
        means full bandwidth; ``coupling`` is ``"dc"`` or ``"ac"``.
        """
        limits = self.limits
        channel = self._channel(channel)
        settings = {
            "channel_probe": check_setpoint(
                "probe ratio", probe_ratio, limits.min_probe_ratio, limits.max_probe_ratio
            ),
            "channel_scale": check_setpoint(
                "channel scale",
                volts_per_div,
                limits.min_volts_per_div,
                limits.max_volts_per_div,
                "V/div",
            ),
            "channel_offset": check_setpoint(
                "channel offset", offset_v, -limits.max_offset_v, limits.max_offset_v, "V"
            ),
            "channel_bandwidth_limit": check_setpoint(
                "bandwidth limit", bandwidth_limit_hz, 0.0, limits.max_bandwidth_limit_hz, "Hz"
            ),
        }
        coupling_word = self._word("coupling", coupling)
        self._send("channel_enable", channel=channel, value=self.map.word("on_off", "on"))
        for key, number in settings.items():
            self._send(key, channel=channel, value=format_number(number))
        self._send("channel_coupling", channel=channel, value=coupling_word)

    def configure_timebase(self, seconds_per_div: float, record_length: int) -> None:
        """Set the horizontal scale and the number of samples per record."""
        limits = self.limits
        seconds_per_div = check_setpoint(
            "timebase scale",
            seconds_per_div,
            limits.min_seconds_per_div,
            limits.max_seconds_per_div,
            "s/div",
        )
        record_length = check_count(
            "record length", record_length, limits.min_record_length, limits.max_record_length
        )
        self._send("timebase_scale", value=format_number(seconds_per_div))
        self._send("record_length", value=str(record_length))

    def configure_trigger(
        self, channel: int, level_v: float, slope: str = "rising", position_fraction: float = 0.1
    ) -> None:
        """Edge trigger on ``channel`` at ``level_v``; ``position_fraction`` of the record
        comes before the trigger."""
        channel = self._channel(channel)
        level_v = check_setpoint(
            "trigger level", level_v, -self.limits.max_offset_v, self.limits.max_offset_v, "V"
        )
        slope_word = self._word("slope", slope)
        position_fraction = check_setpoint("trigger position", position_fraction, 0.0, 1.0)
        self._send("trigger_source", channel=channel)
        self._send("trigger_level", value=format_number(level_v))
        self._send("trigger_slope", value=slope_word)
        self._send("trigger_position", value=format_number(position_fraction))

    def _word(self, group: str, name: str) -> str:
        """Map one of our words (e.g. slope "rising") to this family's keyword, or refuse it."""
        words = self.map.words[group]
        return words[check_word(group.replace("_", " "), name, words)]

    def single(self) -> None:
        """Arm one acquisition."""
        self._send("single")

    def wait_acquisition(self, timeout_s: float, poll_interval_s: float = 0.01) -> None:
        """Poll until the armed acquisition is in; on timeout stop the scope and raise.

        Raises
        ------
        InstrumentTimeout
            "trigger did not fire within ..." after sending the map's stop command.
        ReplyFormatError
            A reply that is neither the done reply nor any one SCPI token (a number or a
            mnemonic, such as a "not yet" 0): a garbled link, not a trigger that is late.
        """
        timeout_s = check_setpoint("acquisition timeout", timeout_s, 0.0, math.inf, "s")
        poll_interval_s = check_setpoint("poll interval", poll_interval_s, 0.0, math.inf, "s")
        query = self.map.command("acquisition_done_query")
        deadline = time.monotonic() + timeout_s
        while (reply := self.query(query)) != self.map.acquisition_done_reply:
            if not is_response_token(reply):
                raise ReplyFormatError(
                    f"{self.label}: reply {reply!r} to {query!r} is neither "
                    f"{self.map.acquisition_done_reply!r} nor a SCPI status value"
                )
            if time.monotonic() >= deadline:
                self._send("stop")
                raise InstrumentTimeout(
                    f"{self.label}: trigger did not fire within {timeout_s:g} s"
                )
            time.sleep(poll_interval_s)

    def fetch_waveform(self, channel: int) -> Waveform:
        """Transfer the last capture of ``channel`` with its scaling."""
        channel = self._channel(channel)
        data_format, byte_order = self.map.data_format, self.map.byte_order
        command = self.map.command
        self.configure(  # one error-queue read for the three: each costs a round trip
            command("waveform_source", channel=channel),
            command("waveform_format", value=self.map.word("data_format", data_format)),
            command("waveform_byte_order", value=self.map.word("byte_order", byte_order)),
        )
        scaling = self._scaling()
        codes = self.read_codes()
        points = scaling.get("points")
        if points is not None and points != codes.size:
            raise ReplyFormatError(
                f"{self.label}: scaling announces {points:g} points, the block held {codes.size}"
            )
        if scaling["x_increment"] <= 0 or scaling["y_increment"] == 0:
            raise ReplyFormatError(
                f"{self.label}: scaling gives a sample interval of {scaling['x_increment']:g} s "
                f"and {scaling['y_increment']:g} V per code; both must be non-zero, the "
                "interval positive"
            )
        return Waveform(
            codes=codes,
            x_increment_s=scaling["x_increment"],
            x_origin_s=scaling["x_origin"],
            y_increment_v=scaling["y_increment"],
            y_origin_v=scaling["y_origin"],
            y_reference=scaling.get("y_reference", 0.0),
            code_min=self.map.code_min,
            code_max=self.map.code_max,
        )

    def read_codes(self) -> np.ndarray:
        """Query the waveform data block of the selected source and decode it.

        The source, format and byte order must already be selected (:meth:`fetch_waveform`
        does that); this is the bulk transfer alone.
        """
        payload = self.query_block(self.map.command("waveform_data_query"))
        return decode_payload(payload, self.map.data_format, self.map.byte_order)

    def _scaling(self) -> dict[str, Any]:
        """Read the scaling reply and name its fields as the map lists them."""
        query = self.map.command("waveform_scaling_query")
        values = self.query_floats(query)
        names = self.map.scaling_fields
        if len(values) != len(names):
            raise ReplyFormatError(
                f"{self.label}: {query!r} answered {len(values)} fields, the "
                f"{self.map.family!r} map expects {len(names)} ({', '.join(names)})"
            )
        return {name: value for name, value in zip(names, values, strict=True) if name != "_"}

    def measure_mean_v(self, channel: int) -> float:
        """Free-running mean voltage of ``channel`` (watches the bus discharge)."""
        channel = self._channel(channel)
        return self.query_float(self.map.command("measure_mean_query", channel=channel))
