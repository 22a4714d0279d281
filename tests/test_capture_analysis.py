"""Per-capture figures: accuracy on known rings, several edges, DCM, clipping, polarity, loss."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import signal
from waveforms import BASE_V, PLATEAU_V, quantise, record, ring_sigma

from labseq.analysis import NoEdgeError, SnubberBranch, analyze_capture


def true_peak_v(ring_hz: float, zeta: float, amp_v: float) -> float:
    """Peak of the continuous ring (dense evaluation of the closed form)."""
    tr = np.linspace(0, 1 / ring_hz, 200_001)
    return PLATEAU_V + float(
        np.max(amp_v * np.exp(-ring_sigma(ring_hz, zeta) * tr) * np.sin(2 * math.pi * ring_hz * tr))
    )


ACCURACY_CASES = [
    (f, z, fs, noise)
    for f in (8e6, 25e6)
    for z in (0.03, 0.1, 0.3)
    for fs in (1e9, 5e9)
    for noise in (0.0, 1.0, 4.0)
]


def test_accuracy_across_noise_and_sample_rate_at_8_bits() -> None:
    """Known f, ζ and peak; 8-bit quantised over 800 V (3.1 V LSB); noise σ 0, 1 and 4 V rms."""
    rng = np.random.default_rng(7)
    rows = []
    for f, zeta, fs, noise in ACCURACY_CASES:
        v, dt, t0 = record(fs_hz=fs, duration_s=9e-6, ring_hz=f, zeta=zeta, demag_s=None)
        v = quantise(v + rng.normal(0, noise, v.size) if noise else v)
        edge = analyze_capture(v, dt, t0).worst
        f_err = 100 * (edge.ring_frequency_hz / f - 1)
        z_err = edge.damping_ratio - zeta
        peak_err = edge.peak_v - true_peak_v(f, zeta, 90.0)
        rows.append((f, zeta, fs, noise, f_err, z_err, peak_err))
    print("\n   f_MHz  zeta  fs_GS/s  noise_V   f_err_%   zeta_err   peak_err_V")
    for f, zeta, fs, noise, f_err, z_err, peak_err in rows:
        print(
            f"{f / 1e6:8.0f} {zeta:5.2f} {fs / 1e9:8.0f} {noise:8.1f} "
            f"{f_err:9.3f} {z_err:10.4f} {peak_err:11.2f}"
        )
    f_errs, z_errs, peak_errs = (np.array([r[k] for r in rows]) for k in (4, 5, 6))
    light = np.array([r[1] for r in rows]) <= 0.1
    # Closed-form decaying sinusoid through an ideal 8-bit digitiser (reference: the model itself).
    assert np.max(np.abs(f_errs[light])) < 1.0  # ζ ≤ 0.1: ring frequency within 1 %
    assert np.max(np.abs(f_errs)) < 2.5  # ζ = 0.3: few periods stand above the noise
    noisy = np.array([r[3] for r in rows]) > 1.0
    assert np.max(np.abs(z_errs[~noisy])) < 0.01
    # At 4 V rms on a 90 V ring of ζ = 0.3 (two visible periods) ζ is noise-limited: over 40 noise
    # seeds its rms error measures 0.012 at 25 MHz / 1 GS/s (0.017 with the former sinusoid-only
    # fit), so one seed is held to the ring-fit target instead: 10 % of ζ or 0.02.
    zetas = np.array([r[1] for r in rows])
    assert np.all(np.abs(z_errs[noisy]) <= np.maximum(0.10 * zetas[noisy], 0.02))
    # Peak: sampling at ≥ 1 GS/s, 3.1 V LSB and up to 4 V rms noise (≈ +3σ on the maximum).
    assert np.max(np.abs(peak_errs)) < 16.0


def test_several_edges_dcm_valley_ring_and_worst_edge() -> None:
    v, dt, t0 = record(ring_amps_v=(70.0, 110.0, 90.0))
    figures = analyze_capture(v, dt, t0, rating_v=650.0)
    period = 1 / 150e3
    assert len(figures.edges) == 3
    # Edge instants: 50 % of the linear ramp, 0.3 of a period plus half the 40 ns ramp.
    expected_times = [k * period + 0.3 * period + 20e-9 for k in range(3)]
    for edge, expected in zip(figures.edges, expected_times, strict=True):
        assert edge.edge_time_s == pytest.approx(expected, abs=dt)
        # The leakage ring (20 MHz), not the 600 kHz DCM valley ring (common practice, no
        # published source: the valley ring is the slower Lm–Coss resonance).
        assert edge.ring_frequency_hz == pytest.approx(20e6, rel=0.002)
        assert edge.damping_ratio == pytest.approx(0.08, rel=0.02)
        assert edge.plateau_v == pytest.approx(PLATEAU_V, abs=0.5)
        assert edge.base_v == pytest.approx(BASE_V, abs=0.05)
        assert edge.settling_time_s is not None and edge.settling_time_s < 1e-6
    assert figures.worst_index == 1  # the 110 V ring has the highest peak
    assert figures.worst.peak_v == pytest.approx(true_peak_v(20e6, 0.08, 110.0), abs=1.0)
    # Stress margin = rating × derating − peak; 0.8 from memory of derating guidelines.
    assert figures.worst.stress_margin_v == pytest.approx(650 * 0.8 - figures.worst.peak_v)


def test_clipping_marks_a_lower_bound_and_keeps_the_ring() -> None:
    v, dt, t0 = record(duration_s=6e-6, demag_s=None)
    clipped_v = quantise(v, low_v=-20.0, high_v=480.0)
    figures = analyze_capture(clipped_v, dt, t0, full_scale_v=(-20.0, 480.0 - 500 / 256))
    edge = figures.worst
    assert figures.clipped and edge.clipped
    assert edge.peak_v <= true_peak_v(20e6, 0.08, 90.0)  # a lower bound, never above the truth
    assert edge.ring_frequency_hz == pytest.approx(20e6, rel=0.01)
    unclipped = analyze_capture(quantise(v), dt, t0)
    assert not unclipped.clipped and not unclipped.worst.clipped


def test_caller_flag_marks_every_edge_clipped() -> None:
    v, dt, t0 = record(duration_s=6e-6, demag_s=None)
    assert analyze_capture(v, dt, t0, clipped=True).worst.clipped


def test_falling_polarity_is_the_mirror_image() -> None:
    v, dt, t0 = record(duration_s=6e-6, demag_s=None)
    rising = analyze_capture(v, dt, t0).worst
    falling = analyze_capture(-v, dt, t0, polarity=-1).worst
    for name in ("base_v", "plateau_v", "peak_v"):
        assert getattr(falling, name) == pytest.approx(-getattr(rising, name))
    for name in (
        "overshoot_v",
        "overshoot_pct",
        "ring_frequency_hz",
        "damping_ratio",
        "edge_time_s",
    ):
        assert getattr(falling, name) == pytest.approx(getattr(rising, name))


def test_no_edge_is_a_clear_error() -> None:
    with pytest.raises(NoEdgeError, match="flat"):
        analyze_capture(np.full(100, 3.0), 1e-9)
    falling_only = np.r_[np.full(100, 400.0), np.full(100, 0.0)]
    with pytest.raises(NoEdgeError, match="rising turn-off edge"):
        analyze_capture(falling_only, 1e-9)
    with pytest.raises(ValueError, match="at least"):
        analyze_capture(np.zeros(5), 1e-9)


def test_waveform_loss_matches_lsim_reference() -> None:
    v, dt, t0 = record(fs_hz=1e9, duration_s=1.6e-5)
    branch = SnubberBranch(rs_ohm=47.0, cs_f=470e-12, fsw_hz=150e3)
    edge = analyze_capture(v, dt, t0, snubber=branch).edges[1]
    assert edge.snubber_loss_method == "waveform"
    # Reference: scipy.signal.lsim of the Rs–Cs branch (state Vc) driven by the record with
    # linear interpolation between samples; power (v − Vc)²/Rs averaged over one period.
    tau = branch.rs_ohm * branch.cs_f
    branch_ss = signal.StateSpace([[-1 / tau]], [[1 / tau]], [[1.0]], [[0.0]])
    t = np.arange(v.size) * dt
    _, vc, _ = signal.lsim(branch_ss, v, t, X0=[v[0]], interp=True)
    power = (v - vc) ** 2 / branch.rs_ohm
    start = int(round((edge.edge_time_s - t0 - 0.5 / branch.fsw_hz) / dt))
    stop = start + int(round(1 / branch.fsw_hz / dt))
    reference = np.trapezoid(power[start : stop + 1], dx=dt) * branch.fsw_hz
    assert edge.snubber_loss_w == pytest.approx(reference, rel=0.005)


def test_square_wave_loss_is_cv2f_and_short_records_use_cv2f() -> None:
    fs, fsw = 1e9, 100e3
    t = np.arange(int(2.5 / fsw * fs)) / fs
    square = np.where(np.mod(t, 1 / fsw) < 0.5 / fsw, 0.0, 100.0)
    branch = SnubberBranch(rs_ohm=10.0, cs_f=1e-9, fsw_hz=fsw)
    edge = analyze_capture(square, 1 / fs, snubber=branch).edges[0]
    # Severns, "Design of Snubbers for Power Circuits": RC snubber loss is Cs·V²·fsw for
    # abrupt edges, independent of Rs.
    assert edge.snubber_loss_method == "waveform"
    assert edge.snubber_loss_w == pytest.approx(1e-9 * 100.0**2 * fsw, rel=0.01)
    short = analyze_capture(square[: int(0.8 / fsw * fs)], 1 / fs, snubber=branch).worst
    assert short.snubber_loss_method == "cv2f"
    assert short.snubber_loss_w == pytest.approx(1e-9 * (short.plateau_v - short.base_v) ** 2 * fsw)


# One noisy, quantised single-edge record shared by the property tests.
_V, _DT, _T0 = record(duration_s=5e-6, demag_s=None)
_V = quantise(_V + np.random.default_rng(11).normal(0, 1.0, _V.size))
VOLTAGE_FIGURES = ("base_v", "plateau_v", "peak_v", "overshoot_v")
INVARIANT_FIGURES = (
    "overshoot_pct",
    "ring_frequency_hz",
    "damping_ratio",
    "q_factor",
    "rise_time_s",
    "settling_time_s",
)


@settings(max_examples=15, deadline=None)
@given(shift_s=st.floats(-1e-3, 1e-3, allow_nan=False))
def test_time_shift_moves_only_the_edge_time(shift_s: float) -> None:
    a = analyze_capture(_V, _DT, _T0).worst
    b = analyze_capture(_V, _DT, _T0 + shift_s).worst
    assert b.edge_time_s == pytest.approx(a.edge_time_s + shift_s, abs=1e-15 + 1e-12 * abs(shift_s))
    for name in VOLTAGE_FIGURES + INVARIANT_FIGURES:
        assert getattr(b, name) == pytest.approx(getattr(a, name), rel=1e-9)


@settings(max_examples=15, deadline=None)
@given(k=st.floats(1e-3, 1e3, allow_nan=False))
def test_scaling_scales_voltages_only(k: float) -> None:
    a = analyze_capture(_V, _DT, _T0).worst
    b = analyze_capture(k * _V, _DT, _T0).worst
    for name in VOLTAGE_FIGURES:
        assert getattr(b, name) == pytest.approx(k * getattr(a, name), rel=1e-6, abs=1e-9 * k)
    for name in INVARIANT_FIGURES + ("edge_time_s",):
        assert getattr(b, name) == pytest.approx(getattr(a, name), rel=1e-6)


@settings(max_examples=15, deadline=None)
@given(offset=st.floats(-1e3, 1e3, allow_nan=False))
def test_offset_shifts_levels_and_peak_only(offset: float) -> None:
    a = analyze_capture(_V, _DT, _T0).worst
    b = analyze_capture(_V + offset, _DT, _T0).worst
    for name in ("base_v", "plateau_v", "peak_v"):
        assert getattr(b, name) == pytest.approx(getattr(a, name) + offset, abs=1e-6)
    assert b.overshoot_v == pytest.approx(a.overshoot_v, abs=1e-6)
    for name in ("ring_frequency_hz", "damping_ratio", "edge_time_s"):
        assert getattr(b, name) == pytest.approx(getattr(a, name), rel=1e-6)
