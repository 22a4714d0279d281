"""Synthetic switch-node records shared by the analysis tests and benchmarks.

Closed-form waveforms whose ring frequency, damping and levels are known exactly, and an ideal
digitiser to put them through.
"""

from __future__ import annotations

import math

import numpy as np

BASE_V, PLATEAU_V, VIN_V = 1.0, 425.0, 325.0


def ring_sigma(f_hz: float, zeta: float) -> float:
    """Decay rate σ of a pole pair with damped frequency f and damping ratio ζ."""
    return zeta * 2 * math.pi * f_hz / math.sqrt(1 - zeta**2)


def flyback_node(
    t_s: np.ndarray,
    *,
    fsw_hz: float = 150e3,
    ring_hz: float = 20e6,
    zeta: float = 0.08,
    ring_amps_v: tuple[float, ...] = (90.0,),
    ramp_s: float = 40e-9,
    duty: float = 0.3,
    demag_s: float | None = 2.5e-6,
    valley_hz: float = 600e3,
) -> np.ndarray:
    """Idealised flyback drain voltage: on-state, linear turn-off ramp, leakage ring around the
    plateau, then (DCM) a slow valley ring towards the input voltage until the next turn-on.
    The ring amplitude of period k is ``ring_amps_v[k % len(ring_amps_v)]``."""
    period = 1 / fsw_hz
    cycle = np.floor(t_s / period).astype(int)
    after_off = np.mod(t_s, period) - duty * period
    v = np.full(t_s.shape, BASE_V)
    ramp = (after_off >= 0) & (after_off < ramp_s)
    v[ramp] = BASE_V + (PLATEAU_V - BASE_V) * after_off[ramp] / ramp_s
    tr = after_off - ramp_s
    ring = tr >= 0
    amps = np.asarray(ring_amps_v)[cycle % len(ring_amps_v)]
    w = 2 * math.pi * ring_hz
    v[ring] = PLATEAU_V + amps[ring] * np.exp(-ring_sigma(ring_hz, zeta) * tr[ring]) * np.sin(
        w * tr[ring]
    )
    if demag_s is not None:
        tv = tr - demag_s
        valley = tv >= 0
        w2 = 2 * math.pi * valley_hz
        v[valley] += (VIN_V - PLATEAU_V) * (
            1 - np.exp(-0.05 * w2 * tv[valley]) * np.cos(w2 * tv[valley])
        )
    return v


def quantise(
    v: np.ndarray, bits: int = 8, low_v: float = -50.0, high_v: float = 750.0
) -> np.ndarray:
    """An ideal digitiser: round to the LSB and clip to the full-scale range."""
    lsb = (high_v - low_v) / 2**bits
    return np.clip(np.round((v - low_v) / lsb) * lsb + low_v, low_v, high_v - lsb)


def record(
    fs_hz: float = 2e9, duration_s: float = 2.2e-5, pre_s: float = 1e-6, **shape: object
) -> tuple[np.ndarray, float, float]:
    """(volts, sample interval, time of the first sample) of :func:`flyback_node` sampled at
    ``fs_hz`` from ``-pre_s`` for ``duration_s``."""
    t = np.arange(int(duration_s * fs_hz)) / fs_hz - pre_s
    return flyback_node(t, **shape), 1 / fs_hz, float(t[0])
