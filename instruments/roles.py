"""One small class per bench role: line source, electronic load, power meter, oscilloscope.

Every role takes its commands from a :class:`~labseq_instruments.command_map.CommandMap` of its role
(the generic maps by default): command strings, keywords, value conversions and reply forms.
Every setter validates all its arguments against the role's declared limits before the first
byte is sent.
"""

from __future__ import annotations

import math
import time
from abc import ABC, abstractmethod
from collections.abc import Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
from pyvisa.resources import MessageBasedResource

from labseq_instruments.block import (
    decode_items,
    decode_payload,
    parse_ascii_values,
    payload_dtype,
    signed_codes,
)
from labseq_instruments.command_map import (
    ROLE_COMMANDS,
    CommandMap,
    load_command_map,
)
from labseq_instruments.errors import CommandMapError, InstrumentTimeout, LimitError
from labseq_instruments.limits import (
    LoadLimits,
    SourceLimits,
    check_count,
    check_setpoint,
    check_word,
    format_number,
)
from labseq_instruments.scpi import ScpiInstrument, is_response_token, parse_number
from labseq_instruments.text import quoted

#: Relative tolerance under which a number matches an entry of a map's number table.
_TABLE_RTOL = 1e-9
#: Longest ASCII waveform reply read (about 15 M samples of 16 characters).
MAX_ASCII_WAVEFORM_BYTES = 1 << 28


class MappedInstrument(ScpiInstrument):
    """A role whose commands come from a command map: sending settings with the map's
    conversions, and reading replies back the way the map says they come."""

    def __init__(
        self,
        resource: MessageBasedResource,
        command_map: CommandMap | str = "generic",
        name: str | None = None,
    ) -> None:
        if not isinstance(command_map, CommandMap):
            command_map = load_command_map(command_map, self.role)
        if command_map.role != self.role:
            raise CommandMapError(
                f"{command_map.source}: a {command_map.role} map cannot drive the {self.role}"
            )
        self.map = command_map
        self.reply_headers = command_map.reply_headers
        super().__init__(resource, name)

    def start(self) -> None:
        """Put the instrument in its known state: ``*RST`` if the map asks for it (it does when
        it has set-up commands), then the map's set-up commands, checked together (so a set-up
        command that changes how replies look, such as headers off, comes before the first
        reply)."""
        commands = (*(["*RST"] if self.map.reset else []), *self.map.setup)
        if commands:
            self.configure(*commands)

    def has(self, key: str) -> bool:
        """Whether the map gives command ``key``."""
        return self.map.has(key)

    # -- values out

    def encode(self, key: str, value: Any) -> str:
        """``value`` in labseq's units or words as the instrument takes it for setting ``key``:
        a number scaled (or looked up in the map's number table), a word translated."""
        definition = ROLE_COMMANDS[self.role][key]
        spec = self.map.spec(key)
        if definition.value not in ("number", "integer"):
            return self._word(definition.value, value)
        number = float(value)
        if definition.value == "integer":
            return str(round(number * spec.scale))
        if spec.table:
            for entry, keyword in spec.table:
                if math.isclose(number, entry, rel_tol=_TABLE_RTOL, abs_tol=1e-12):
                    return keyword
            allowed = ", ".join(f"{entry:g}" for entry, _ in spec.table)
            raise LimitError(
                f"{self.label}: {key} = {number:g} is not offered by the {self.map.family!r} map; "
                f"choose one of: {allowed}"
            )
        if spec.scale != 1.0:  # 15 digits: no binary residue of the scaling in the command
            number = float(f"{number * spec.scale:.15g}")
        return format_number(number)

    def apply(self, key: str, value: Any = None, *, channel: int | None = None) -> None:
        """Send setting or action ``key`` with ``value`` (encoded as the map says), checked
        through the error queue.

        A setting drops the known settings (on some instruments one setting moves others: a
        new record length can reset a transfer range); an action (arm, stop, trigger) keeps
        them.
        """
        text = None if value is None else self.encode(key, value)
        command = self.map.command(key, channel=channel, value=text)
        if ROLE_COMMANDS[self.role][key].kind == "action":
            self._configure(command)
        else:
            self.configure(command)

    def _word(self, group: str, name: str) -> str:
        """Map one of our words (e.g. slope "rising") to this instrument's keyword, or refuse
        it."""
        words = self.map.words[group]
        return words[check_word(group.replace("_", " "), name, words)]

    # -- values in

    def read_back(self, key: str, *, channel: int | None = None) -> str:
        """The instrument's reply to setting ``key``'s read-back query, as it states it."""
        return self.query(self.map.query(key, channel=channel))

    def decode_number(self, key: str, reply: str, command: str) -> float:
        """A reply to ``key`` (a measurement or a numeric setting) in labseq's units: the map's
        number table read backwards, or the number divided by the map's scale."""
        spec = self.map.spec(key)
        for entry, keyword in spec.table:
            if reply.strip().upper() == keyword.upper():
                return entry
        value = parse_number(reply)
        if value is None:
            raise self.reply_error(f"reply {quoted(reply)} to {command!r} is not a number")
        return value / spec.scale

    def read_number(self, key: str, *, channel: int | None = None) -> float:
        """Send query ``key`` and read its number."""
        command = self.map.command(key, channel=channel)
        return self.decode_number(key, self.query(command), command)

    def read_flag(self, key: str) -> bool:
        """Read back an on/off setting: the map's on and off words, or 1, 0, ON, OFF."""
        command = self.map.query(key)
        reply = self.query(command).upper()
        words = self.map.words["on_off"]
        if reply in ("1", "ON", words["on"].upper()):
            return True
        if reply in ("0", "OFF", words["off"].upper()):
            return False
        raise self.reply_error(
            f"reply {quoted(reply)} to {command!r} is neither {words['on']!r} nor {words['off']!r} "
            "(nor 1 or 0)"
        )


class _OutputRole(MappedInstrument, ABC):
    """A role with a power path that must be off whenever the driver lets go of it."""

    @abstractmethod
    def switch_off(self) -> None:
        """Turn the power path off."""

    @abstractmethod
    def is_on(self) -> bool:
        """Whether the power path is on, as the instrument reads it back."""

    def measure_voltage_v(self) -> float:
        """Voltage at the terminals (rms for AC)."""
        return self.read_number("measure_voltage")

    def measure_current_a(self) -> float:
        """Current through the terminals (rms for AC)."""
        return self.read_number("measure_current")

    def close(self) -> None:
        """Switch the power path off, then close the session, even if switching off fails."""
        if self.closed:
            return
        try:
            self.switch_off()
        finally:
            super().close()


class LineSource(_OutputRole):
    """AC or DC line source."""

    role = "source"

    def __init__(
        self,
        resource: MessageBasedResource,
        limits: SourceLimits,
        command_map: CommandMap | str = "generic",
        name: str | None = None,
    ) -> None:
        super().__init__(resource, command_map, name)
        self.limits = limits

    def _voltage(self, volts: float) -> float:
        return check_setpoint("source voltage", volts, 0.0, self.limits.max_voltage_v, "V")

    def set_dc(self, volts: float) -> None:
        """Select DC (where the map can) and set the output voltage."""
        volts = self._voltage(volts)
        if self.has("line_shape"):
            self.apply("line_shape", "dc")
        self.apply("voltage", volts)

    def set_ac(self, volts_rms: float, frequency_hz: float) -> None:
        """Select a sine line (where the map can) and set its rms voltage and frequency."""
        volts_rms = self._voltage(volts_rms)
        frequency_hz = check_setpoint(
            "source frequency",
            frequency_hz,
            self.limits.min_frequency_hz,
            self.limits.max_frequency_hz,
            "Hz",
        )
        self.map.spec("frequency")  # refused before anything is sent if the map lacks it
        if self.has("line_shape"):
            self.apply("line_shape", "ac")
        self.apply("frequency", frequency_hz)
        self.apply("voltage", volts_rms)

    def set_current_limit(self, amps: float) -> None:
        """Set the output current limit."""
        amps = check_setpoint("source current limit", amps, 0.0, self.limits.max_current_a, "A")
        self.apply("current_limit", amps)

    def set_output(self, on: bool) -> None:
        """Turn the output on or off."""
        self.apply("output", "on" if on else "off")

    def is_on(self) -> bool:
        """Whether the output is on."""
        return self.read_flag("output")

    def switch_off(self) -> None:
        """Turn the output off."""
        self.set_output(False)


class ElectronicLoad(_OutputRole):
    """Electronic load in constant-current mode."""

    role = "load"

    def __init__(
        self,
        resource: MessageBasedResource,
        limits: LoadLimits,
        command_map: CommandMap | str = "generic",
        name: str | None = None,
    ) -> None:
        super().__init__(resource, command_map, name)
        self.limits = limits

    def set_current(self, amps: float) -> None:
        """Select constant current (where the map can) and set the current to sink."""
        amps = check_setpoint("load current", amps, 0.0, self.limits.max_current_a, "A")
        if self.has("mode"):
            self.apply("mode", "current")
        self.apply("current", amps)

    def set_input(self, on: bool) -> None:
        """Turn the load's input on or off."""
        self.apply("input", "on" if on else "off")

    def is_on(self) -> bool:
        """Whether the input is on."""
        return self.read_flag("input")

    def measure_power_w(self) -> float:
        """Power the load is sinking (volts × amps where the map has no power query)."""
        if self.has("measure_power"):
            return self.read_number("measure_power")
        return self.measure_voltage_v() * self.measure_current_a()

    def switch_off(self) -> None:
        """Turn the input off."""
        self.set_input(False)


@dataclass(frozen=True)
class MeterReading:
    """One power-meter reading on the line input (rms volts and amps, real power)."""

    voltage_v: float
    current_a: float
    power_w: float
    power_factor: float  # NaN where the meter's map has no power-factor query


class PowerMeter(MappedInstrument):
    """Power meter on the line input."""

    role = "meter"

    def measure(self) -> MeterReading:
        """Read voltage, current, real power and power factor."""
        return MeterReading(
            voltage_v=self.read_number("measure_voltage"),
            current_a=self.read_number("measure_current"),
            power_w=self.read_number("measure_power"),
            power_factor=(
                self.read_number("measure_power_factor")
                if self.has("measure_power_factor")
                else math.nan
            ),
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

    def screen_volts(self) -> tuple[float, float] | None:
        """The volts at the bottom and top codes of the screen, computed as the samples' volts
        are (so a sample at an edge reads exactly that number); None for a scope that sends
        volts, which clip at no known code."""
        if self.code_min is None or self.code_max is None:
            return None
        edges = replace(self, codes=np.array([self.code_min, self.code_max], dtype=np.float64))
        bottom, top = edges.volts()
        return float(bottom), float(top)

    def clipped_edges(self) -> list[str]:
        """Which edges of the screen samples sit at: "bottom", "top", both or none."""
        if self.code_min is None or self.code_max is None:
            return []
        edges = [("bottom", self.codes <= self.code_min), ("top", self.codes >= self.code_max)]
        return [name for name, at in edges if bool(at.any())]


class Oscilloscope(MappedInstrument):
    """An oscilloscope driven entirely through a scope command map."""

    role = "scope"

    def __init__(
        self,
        resource: MessageBasedResource,
        command_map: CommandMap | str = "generic",
        name: str | None = None,
    ) -> None:
        super().__init__(resource, command_map, name)
        self.limits = self.map.limits
        #: The record's duration once the timebase is set (a trigger position in seconds
        #: needs it).
        self.record_duration_s: float | None = None
        # Rendered once: every fetch sends them.
        fields = self.map.scaling_fields
        fields_query = ["waveform_scaling_query"] if fields else []
        self._scaling_queries = tuple(
            [self.map.command(key) for key in fields_query] + [*self.map.scaling_queries.values()]
        )
        self._transfer_commands: dict[int, dict[str, str]] = {}
        self._numeric_fields = [(index, name) for index, name in enumerate(fields) if name != "_"]
        self._data_query = self.map.command("waveform_data_query")
        self._payload_dtype = (
            None
            if self.map.data_format == "ascii"
            else payload_dtype(self.map.data_format, self.map.byte_order)
        )

    def _channel(self, channel: int) -> int:
        return check_count("scope channel", channel, 1, self.map.channels)

    def query_setting(self, key: str, channel: int | None = None) -> str:
        """Read back setting ``key`` of the map (e.g. ``channel_scale``) as the scope states it."""
        return self.read_back(key, channel=channel)

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
        means full bandwidth; ``coupling`` is ``"dc"`` or ``"ac"``. A map without a coupling or
        bandwidth-limit command takes only DC and full bandwidth.
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
        check_word("coupling", coupling, self.map.words["coupling"])
        # Everything is checked before the first byte. Full bandwidth and DC coupling are what a
        # scope without those commands has; any other value needs the command (spec() refuses
        # it by name), and a number outside a map's table is refused by encode().
        if settings["channel_bandwidth_limit"] == 0 and not self.has("channel_bandwidth_limit"):
            del settings["channel_bandwidth_limit"]
        if coupling.lower() != "dc" or self.has("channel_coupling"):
            self.map.spec("channel_coupling")
        for key, value in settings.items():
            self.encode(key, value)
        if self.has("channel_enable"):
            self.apply("channel_enable", "on", channel=channel)
        for key, value in settings.items():
            self.apply(key, value, channel=channel)
        if self.has("channel_coupling"):
            self.apply("channel_coupling", coupling.lower(), channel=channel)

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
        self.apply("timebase_scale", seconds_per_div)
        self.apply("record_length", record_length)
        self.record_duration_s = seconds_per_div * self.map.horizontal_divisions

    def trigger_position_value(self, position_fraction: float) -> float:
        """The trigger position as this scope takes it (the map's ``convert``), from the
        fraction of the record before the trigger."""
        conversion = self.map.spec("trigger_position").convert or "fraction"
        if conversion == "fraction":
            return position_fraction
        if conversion == "percent":
            return 100.0 * position_fraction
        duration_s = self.record_duration_s
        if duration_s is None:
            raise LimitError(
                f"{self.label}: the {self.map.family!r} map sets the trigger position in "
                "seconds; configure the timebase first"
            )
        if conversion == "pretrigger_s":
            return position_fraction * duration_s
        return (0.5 - position_fraction) * duration_s  # delay_to_centre_s

    def configure_trigger(
        self, channel: int, level_v: float, slope: str = "rising", position_fraction: float = 0.1
    ) -> None:
        """Edge trigger on ``channel`` at ``level_v``; ``position_fraction`` of the record
        comes before the trigger."""
        channel = self._channel(channel)
        level_v = check_setpoint(
            "trigger level", level_v, -self.limits.max_offset_v, self.limits.max_offset_v, "V"
        )
        self._word("slope", slope)
        position_fraction = check_setpoint("trigger position", position_fraction, 0.0, 1.0)
        position = self.trigger_position_value(position_fraction)
        self.encode("trigger_position", position)
        self.apply("trigger_source", channel=channel)
        self.apply("trigger_level", level_v)
        self.apply("trigger_slope", slope)
        self.apply("trigger_position", position)

    def single(self) -> None:
        """Arm one acquisition."""
        self.apply("single")

    def stop(self) -> None:
        """Stop (abandon) an acquisition in progress."""
        self.apply("stop")

    def force_trigger(self) -> None:
        """Trigger now, whatever the trigger condition (used to probe a scope at rest)."""
        self.apply("force_trigger")

    def acquisition_done(self) -> bool:
        """Whether the armed acquisition is in.

        Raises
        ------
        ReplyFormatError
            A reply that is neither the done reply nor any one SCPI token (a number or a
            mnemonic, such as a "not yet" 0): a garbled link, not a trigger that is late.
        """
        query = self.map.command("acquisition_done_query")
        reply = self.query(query)
        if reply == self.map.acquisition_done_reply:
            return True
        if not is_response_token(reply):
            raise self.reply_error(
                f"reply {quoted(reply)} to {query!r} is neither "
                f"{self.map.acquisition_done_reply!r} nor a SCPI status value"
            )
        return False

    def wait_acquisition(self, timeout_s: float, poll_interval_s: float = 0.01) -> None:
        """Poll until the armed acquisition is in; on timeout stop the scope and raise.

        Raises
        ------
        InstrumentTimeout
            "trigger did not fire within ..." after sending the map's stop command.
        ReplyFormatError
            See :meth:`acquisition_done`.
        """
        timeout_s = check_setpoint("acquisition timeout", timeout_s, 0.0, math.inf, "s")
        poll_interval_s = check_setpoint("poll interval", poll_interval_s, 0.0, math.inf, "s")
        deadline = time.monotonic() + timeout_s
        while not self.acquisition_done():
            if time.monotonic() >= deadline:
                self.stop()
                self.forget_settings()
                raise InstrumentTimeout(
                    f"{self.label}: trigger did not fire within {timeout_s:g} s"
                )
            time.sleep(poll_interval_s)

    def transfer_settings(self, channel: int) -> dict[str, str]:
        """The commands that select ``channel`` for transfer in the map's format and byte order,
        by setting key (format and byte order where the map can set them)."""
        if channel in self._transfer_commands:
            return self._transfer_commands[channel]
        data_format, byte_order = self.map.data_format, self.map.byte_order
        commands = {"waveform_source": self.map.command("waveform_source", channel=channel)}
        if self.has("waveform_format"):
            word = self.map.word("data_format", data_format)
            commands["waveform_format"] = self.map.command("waveform_format", value=word)
        if self.has("waveform_byte_order") and data_format not in ("int8", "uint8", "ascii"):
            word = self.map.word("byte_order", byte_order)
            commands["waveform_byte_order"] = self.map.command("waveform_byte_order", value=word)
        self._transfer_commands[channel] = commands
        return commands

    def select_waveform(self, channel: int) -> None:
        """Select ``channel`` for transfer, with the map's format and byte order where it can
        set them (one error-queue read for all: each costs a round trip).

        Nothing is sent when this session last set exactly these and nothing since can have
        changed them (:attr:`~labseq_instruments.scpi.ScpiInstrument.known_settings`); when any one
        differs, all are sent again, in order, so a scope that resets its format on a new
        source still gets the right one.
        """
        self._select(self._channel(channel))

    def _select(self, channel: int) -> None:
        commands = self.transfer_settings(channel)
        if commands.items() <= self.known_settings.items():
            return
        self._configure(*commands.values())
        self.known_settings.update(commands)

    def fetch_waveform(self, channel: int) -> Waveform:
        """Transfer the last capture of ``channel`` with its scaling.

        The transfer settings are sent only when they changed (:meth:`select_waveform`); the
        scaling is read with every fetch, never remembered: it follows the capture. With
        ``compound_queries`` in the map (and a binary format) the scaling queries, the data
        query and the error-queue query go in one message, one round trip; otherwise each is
        a query of its own. Either way an error the instrument queued during the fetch is
        raised as :class:`~labseq_instruments.errors.ScpiError`.

        Unsigned codes are returned as the signed codes of the same width, with the reference
        and the code limits moved to match (:func:`~labseq_instruments.block.signed_codes`).
        """
        self._select(self._channel(channel))
        if self.map.compound_queries and self._payload_dtype is not None:
            replies, payload = self.query_with_block(self._scaling_queries, self._data_query)
            scaling = self.scaling_from(replies)
            raw_codes = decode_items(payload, self._payload_dtype)
        else:
            scaling = self.read_scaling()
            raw_codes = self.read_codes()
            self.check_errors(self._data_query)
        return self._waveform(scaling, raw_codes)

    def _waveform(self, scaling: dict[str, float], raw_codes: np.ndarray) -> Waveform:
        """A :class:`Waveform` from the codes as sent and their scaling, both checked."""
        codes, shift = signed_codes(raw_codes)
        points = scaling.get("points")
        if points is not None and points != codes.size:
            raise self.reply_error(
                f"scaling announces {points:g} points, the block held {codes.size}"
            )
        if scaling["x_increment"] <= 0 or scaling["y_increment"] == 0:
            raise self.reply_error(
                f"scaling gives a sample interval of {scaling['x_increment']:g} s and "
                f"{scaling['y_increment']:g} V per code; both must be non-zero, the interval "
                "positive"
            )
        x_origin_s = scaling.get("x_origin", 0.0)
        x_origin_s -= scaling.get("x_reference", 0.0) * scaling["x_increment"]
        return Waveform(
            codes=codes,
            x_increment_s=scaling["x_increment"],
            x_origin_s=x_origin_s,
            y_increment_v=scaling["y_increment"],
            y_origin_v=scaling["y_origin"],
            y_reference=scaling.get("y_reference", 0.0) - shift,
            code_min=self.map.code_min - shift,
            code_max=self.map.code_max - shift,
        )

    def read_codes(self) -> np.ndarray:
        """Query the waveform data of the selected source and decode it, as the scope sends it
        (an IEEE 488.2 block, or comma-separated ASCII numbers).

        The source, format and byte order must already be selected (:meth:`fetch_waveform`
        does that); this is the bulk transfer alone.
        """
        query = self.map.command("waveform_data_query")
        if self.map.data_format == "ascii":
            text = self.query(query, max_bytes=MAX_ASCII_WAVEFORM_BYTES)
            if not text:
                self.check_errors(query)
            return parse_ascii_values(text)
        payload = self.query_block(query)
        if not payload:  # a scope that refuses to send says why in its error queue
            self.check_errors(query)
        return decode_payload(payload, self.map.data_format, self.map.byte_order)

    def scaling_queries(self) -> tuple[str, ...]:
        """The queries that read the scaling, in order: the one whose reply holds the map's
        ``scaling_fields``, then one per field of ``[scaling_queries]``."""
        return self._scaling_queries

    def read_scaling(self) -> dict[str, float]:
        """The scaling values of the selected waveform, each query of
        :meth:`scaling_queries` asked on its own."""
        return self.scaling_from([self.query(query) for query in self.scaling_queries()])

    def scaling_from(self, replies: Sequence[str]) -> dict[str, float]:
        """The scaling values from the replies to :meth:`scaling_queries`, wherever the map
        says each comes from: fields of one reply (text fields skipped by name ``_``), replies
        of their own, or constants."""
        queries = self._scaling_queries
        first = 1 if self.map.scaling_fields else 0
        values = self._fields(queries[0], replies[0]) if first else {}
        values.update(self.map.scaling_values)  # each value comes from one place only
        if self.map.scaling_queries:
            own = zip(self.map.scaling_queries, queries[first:], replies[first:], strict=True)
            for name, query, reply in own:
                values[name] = self._scaling_number(query, name, reply)
        return values

    def _fields(self, query: str, reply: str) -> dict[str, float]:
        """The values in the reply to the fields query: all at once where every field is well
        formed, else field by field, to say which one is wrong."""
        names = self.map.scaling_fields
        parts = reply.split(",")
        # Python's float() of ASCII text without underscores takes exactly the NRf forms
        # (IEEE 488.2 7.7.2) with spaces around, and the INF and NAN keywords, refused below.
        if len(parts) == len(names) and reply.isascii() and "_" not in reply:
            try:
                values = {name: float(parts[index]) for index, name in self._numeric_fields}
            except ValueError:
                values = {}
            if values and all(map(math.isfinite, values.values())):
                return values
        if len(parts) != len(names):
            raise self.reply_error(
                f"{query!r} answered {len(parts)} fields, the {self.map.family!r} map "
                f"expects {len(names)} ({', '.join(names)})"
            )
        return {
            name: self._scaling_number(query, name, part)
            for name, part in zip(names, parts, strict=True)
            if name != "_"
        }

    def _scaling_number(self, query: str, name: str, text: str) -> float:
        value = parse_number(text)
        if value is None or not math.isfinite(value):
            raise self.reply_error(
                f"{name} in the reply to {query!r} is {quoted(text.strip())}, not a finite number"
            )
        return value

    def measure_mean_v(self, channel: int) -> float:
        """Free-running mean voltage of ``channel`` (watches the bus discharge)."""
        channel = self._channel(channel)
        return self.read_number("measure_mean_query", channel=channel)
