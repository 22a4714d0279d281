"""The simulated oscilloscope's acquisition: trigger, timebase, bandwidth, noise, quantisation.

A capture is made the way a digital storage scope makes one: the trigger comparator fires where
the trigger channel's waveform crosses the trigger level with the chosen slope, every channel is
sampled at the same ``x_origin + i·x_increment`` around it (with a random sub-sample trigger
jitter), each channel's analog front end limits its bandwidth and adds noise, and an 8-bit ADC
quantises its screen into codes −128…127, clipping what lies beyond it. The physics (each probed
waveform) comes in as a function of time; an unprobed channel is a flat 0 V with noise.
"""

from __future__ import annotations

import threading
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field, replace

import numpy as np
from scipy import optimize, signal

#: Analog bandwidth of the simulated front end, and the record-length limit.
NATIVE_BANDWIDTH_HZ = 200e6
MAX_RECORD_LENGTH = 20_000_000
VERTICAL_DIVISIONS = 10
HORIZONTAL_DIVISIONS = 10
#: The ADC resolution behind the INT8 and FLOAT32 formats; INT16 re-quantises at 16 bits.
ADC_BITS = 8
#: Front-end noise: a fraction of one 8-bit LSB, plus a fixed input-referred part (V at the BNC).
NOISE_LSB_RMS = 0.4
NOISE_INPUT_V_RMS = 0.3e-3
#: Steps per switching period used to look for the trigger crossing before refining it.
TRIGGER_SEARCH_STEPS = 20_000
#: Formats of the waveform payload and the numpy dtype of each (big-endian form). The unsigned
#: ones carry the same codes as the signed ones, offset by half their range (0…255 around 128).
DATA_FORMATS = {
    "INT8": np.dtype("i1"),
    "UINT8": np.dtype("u1"),
    "INT16": np.dtype(">i2"),
    "UINT16": np.dtype(">u2"),
    "FLOAT32": np.dtype(">f4"),
}


def code_bits(data_format: str) -> int:
    """Bits of the codes sent in ``data_format`` (FLOAT32 carries 8-bit ADC codes as volts)."""
    return 16 if data_format in ("INT16", "UINT16") else ADC_BITS


def unsigned_offset(data_format: str) -> int:
    """What is added to a signed code to send it in ``data_format`` (0 for signed formats)."""
    return 1 << (code_bits(data_format) - 1) if data_format.startswith("U") else 0


#: What a probe sees: the node's voltage at given instants (volts from seconds).
NodeVoltage = Callable[[np.ndarray], np.ndarray]


@dataclass(frozen=True)
class ChannelSettings:
    """Vertical settings of one channel; volts are at the probe tip."""

    display: bool = False
    scale_v_per_div: float = 10.0
    offset_v: float = 0.0
    coupling: str = "DC"
    bandwidth_limit_hz: float = 0.0  # 0 = full native bandwidth
    probe_ratio: float = 10.0

    @property
    def bandwidth_hz(self) -> float:
        """Effective analog bandwidth: the native one, or the limit if lower."""
        limit = self.bandwidth_limit_hz
        return min(NATIVE_BANDWIDTH_HZ, limit) if limit > 0 else NATIVE_BANDWIDTH_HZ

    def y_increment_v(self, bits: int) -> float:
        """Volts per code when the screen spans ``2**bits`` codes."""
        return self.scale_v_per_div * VERTICAL_DIVISIONS / 2**bits

    def noise_v_rms(self) -> float:
        """Vertical noise at the probe tip: ~0.4 LSB plus a fixed part scaled by the probe."""
        return NOISE_LSB_RMS * self.y_increment_v(ADC_BITS) + NOISE_INPUT_V_RMS * self.probe_ratio


@dataclass(frozen=True)
class AcquisitionSettings:
    """Horizontal, trigger and channel settings frozen when an acquisition is armed."""

    timebase_s_per_div: float = 100e-9
    record_length: int = 10_000
    trigger_channel: int = 1
    trigger_level_v: float = 0.0
    trigger_rising: bool = True
    trigger_position: float = 0.2  # fraction of the record before the trigger
    channels: tuple[ChannelSettings, ...] = field(
        default_factory=lambda: (ChannelSettings(display=True),) + (ChannelSettings(),) * 3
    )

    @property
    def duration_s(self) -> float:
        return self.timebase_s_per_div * HORIZONTAL_DIVISIONS

    @property
    def x_increment_s(self) -> float:
        return self.duration_s / self.record_length

    @property
    def x_origin_s(self) -> float:
        return -self.trigger_position * self.duration_s

    def with_channel(self, number: int, **changes: object) -> AcquisitionSettings:
        """A copy with channel ``number`` (1-based) changed."""
        channels = list(self.channels)
        channels[number - 1] = replace(channels[number - 1], **changes)
        return replace(self, channels=tuple(channels))


def find_trigger_time_s(
    waveform: NodeVoltage, period_s: float, level_v: float, rising: bool
) -> float | None:
    """First crossing of ``level_v`` with the given slope after the turn-off edge at t = 0.

    The waveform is searched over one period starting just before t = 0 on a fine grid, and the
    bracketed crossing refined with Brent's method (scipy.optimize.brentq). None if it never
    crosses: the trigger then cannot fire.
    """
    times = np.linspace(-0.02 * period_s, 0.98 * period_s, TRIGGER_SEARCH_STEPS + 1)
    volts = waveform(times) - level_v
    below, above = volts[:-1] < 0, volts[1:] >= 0
    crossings = np.flatnonzero(below & above if rising else ~below & ~above)
    if crossings.size == 0:
        return None
    index = int(crossings[0])

    def offset(t: float) -> float:
        return float(waveform(np.array([t]))[0] - level_v)

    if offset(times[index]) == 0:
        return float(times[index])
    return float(optimize.brentq(offset, times[index], times[index + 1], xtol=1e-13))


def limit_bandwidth(volts: np.ndarray, sample_rate_hz: float, bandwidth_hz: float) -> np.ndarray:
    """The front end's finite bandwidth: a zero-phase 2nd-order Butterworth pair.

    Filtering forwards and backwards (scipy.signal.sosfiltfilt) gives a 4th-order magnitude
    response with no delay, so the trigger stays at t = 0; the cutoff is set so the pair is −3 dB
    at ``bandwidth_hz``. When the bandwidth is above the sampling Nyquist band the record is
    returned as it is (the samples cannot carry it anyway).
    """
    cutoff_hz = bandwidth_hz / (np.sqrt(2) - 1) ** 0.25
    if cutoff_hz >= 0.45 * sample_rate_hz or volts.size < 16:
        return volts
    sos = signal.butter(2, cutoff_hz, fs=sample_rate_hz, output="sos")
    return signal.sosfiltfilt(sos, volts, padlen=min(volts.size - 1, 200))


def quantise(volts: np.ndarray, channel: ChannelSettings, bits: int) -> np.ndarray:
    """ADC codes over the screen, clipped at its edges: volts = code × y_increment + offset."""
    top = 2 ** (bits - 1) - 1
    codes = np.rint((volts - channel.offset_v) / channel.y_increment_v(bits))
    return np.clip(codes, -top - 1, top)


def front_end(
    volts: np.ndarray, channel: ChannelSettings, sample_rate_hz: float, rng: np.random.Generator
) -> np.ndarray:
    """What the analog path does to a trace: bandwidth, AC coupling, noise (float32 volts)."""
    shaped = limit_bandwidth(volts, sample_rate_hz, channel.bandwidth_hz)
    if channel.coupling == "AC":
        shaped = shaped - shaped.mean()
    noise = rng.standard_normal(shaped.size, dtype=np.float32) * np.float32(channel.noise_v_rms())
    return shaped.astype(np.float32) + noise


def scaling(
    settings: AcquisitionSettings, channel: int, data_format: str
) -> tuple[float, float, float, float]:
    """(x_increment, x_origin, y_increment, y_origin) of ``channel`` in ``data_format``.

    volts = (code − y_reference) × y_increment + y_origin, with y_reference the format's
    :func:`unsigned_offset`; FLOAT32 payloads are volts already.
    """
    if data_format == "FLOAT32":
        return settings.x_increment_s, settings.x_origin_s, 1.0, 0.0
    vertical = settings.channels[channel - 1]
    bits = code_bits(data_format)
    return (
        settings.x_increment_s,
        settings.x_origin_s,
        vertical.y_increment_v(bits),
        vertical.offset_v,
    )


class Capture:
    """One completed acquisition: its analog traces and the settings it was taken with.

    The trigger channel's trace is made with the acquisition; every other channel's is made on
    first use, sampling its probed waveform at the same ``times_s`` (a flat 0 V if unprobed),
    with noise drawn from its own stream of ``seed``. Encoded payloads are cached per (channel,
    format, byte order), so a repeated transfer sends the same bytes without recomputing.
    """

    def __init__(
        self,
        settings: AcquisitionSettings,
        traces_v: dict[int, np.ndarray],
        seed: int,
        probes: Mapping[int, NodeVoltage] | None = None,
        times_s: np.ndarray | None = None,
    ) -> None:
        self.settings = settings
        self._traces_v = traces_v
        self._seed = seed
        self._probes = dict(probes or {})
        self._times_s = times_s
        self._payloads: dict[tuple[int, str, str], memoryview] = {}
        self._lock = threading.Lock()

    @property
    def points(self) -> int:
        return self.settings.record_length

    def trace_v(self, channel: int) -> np.ndarray:
        """Analog volts of ``channel`` before the ADC (made on first use but for the trigger's)."""
        if channel not in self._traces_v:
            rng = np.random.default_rng((self._seed, channel))
            probe = self._probes.get(channel)
            if probe is None or self._times_s is None:
                tip_v = np.zeros(self.points, dtype=np.float32)
            else:
                tip_v = probe(self._times_s)
            rate = 1 / self.settings.x_increment_s
            self._traces_v[channel] = front_end(
                tip_v, self.settings.channels[channel - 1], rate, rng
            )
        return self._traces_v[channel]

    def payload(self, channel: int, data_format: str, little_endian: bool) -> memoryview:
        """Waveform bytes of ``channel`` in ``data_format`` and byte order (cached)."""
        key = (channel, data_format, "little" if little_endian else "big")
        with self._lock:
            if key not in self._payloads:
                self._payloads[key] = self._encode(channel, data_format, little_endian)
            return self._payloads[key]

    def _encode(self, channel: int, data_format: str, little_endian: bool) -> memoryview:
        vertical = self.settings.channels[channel - 1]
        volts = self.trace_v(channel)
        codes = quantise(volts, vertical, code_bits(data_format))
        if data_format == "FLOAT32":
            values = codes * vertical.y_increment_v(ADC_BITS) + vertical.offset_v
        else:
            values = codes + unsigned_offset(data_format)
        dtype = DATA_FORMATS[data_format]
        if little_endian:
            dtype = dtype.newbyteorder("<")
        return memoryview(values.astype(dtype)).cast("B")


def acquire(
    probes: Mapping[int, NodeVoltage],
    period_s: float,
    settings: AcquisitionSettings,
    rng: np.random.Generator,
    *,
    forced: bool = False,
) -> Capture | None:
    """Trigger on the trigger channel's waveform and take one record; None if it cannot fire.

    ``probes`` maps channel numbers to the volts at their probe tips, at times relative to the
    primary's turn-off command, each repeating every ``period_s``. A trigger on an unprobed
    channel (a flat trace) never fires. A ``forced`` trigger fires at once, wherever the
    waveform is (an unprobed trigger channel is then a flat 0 V).
    """
    trigger_channel = settings.trigger_channel
    trigger_waveform = probes.get(trigger_channel)
    if forced:
        trigger_s = 0.0
        if trigger_waveform is None:
            trigger_waveform = np.zeros_like
    elif trigger_waveform is None:
        return None
    else:
        trigger_s = find_trigger_time_s(
            trigger_waveform, period_s, settings.trigger_level_v, settings.trigger_rising
        )
    if trigger_s is None:
        return None
    step_s = settings.x_increment_s
    jitter_s = rng.uniform(-0.5, 0.5) * step_s
    times = trigger_s + jitter_s + settings.x_origin_s + np.arange(settings.record_length) * step_s
    vertical = settings.channels[trigger_channel - 1]
    trace = front_end(trigger_waveform(times), vertical, 1 / step_s, rng)
    seed = int(rng.integers(2**31))
    return Capture(settings, {trigger_channel: trace}, seed, probes=probes, times_s=times)
