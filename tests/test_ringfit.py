"""Ring fit: matrix pencil start and least-squares refinement against known and reference rings."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import signal
from scipy.integrate import solve_ivp

from labseq.analysis import RingFit, RingFitError, fit_ring
from labseq.analysis.ringfit import NoRingError, matrix_pencil_poles


def damped_ring(
    t_s: np.ndarray, f_hz: float, zeta: float, amp_v: float, offset_v: float
) -> np.ndarray:
    """offset + amp·exp(−ζωn·t)·cos(ωd·t) with ωd = 2πf."""
    wd = 2 * math.pi * f_hz
    sigma = zeta * wd / math.sqrt(1 - zeta**2)
    return offset_v + amp_v * np.exp(-sigma * t_s) * np.cos(wd * t_s)


def test_matrix_pencil_recovers_exact_poles() -> None:
    n = np.arange(60)
    z_true = np.array([0.95 * np.exp(0.4j), 0.95 * np.exp(-0.4j), 0.8, 1.0])
    h_true = np.array([1.5 - 0.5j, 1.5 + 0.5j, -2.0, 0.7])
    y = (h_true[None, :] * z_true[None, :] ** n[:, None]).sum(axis=1).real
    z, h = matrix_pencil_poles(y, model_order=4)
    # Hua & Sarkar (1990): noise-free samples of M exponentials give the M poles exactly.
    order = np.argsort(np.angle(z) + 10 * np.abs(z))
    expected = np.argsort(np.angle(z_true) + 10 * np.abs(z_true))
    np.testing.assert_allclose(z[order], z_true[expected], atol=1e-9)
    np.testing.assert_allclose(h[order], h_true[expected], atol=1e-8)


def test_fit_of_a_clean_ring_is_exact() -> None:
    t = np.arange(300) * 1e-9
    fit = fit_ring(damped_ring(t, 17e6, 0.07, 60.0, 400.0), 1e-9)
    # Closed-form model: the fit must return its own parameters.
    assert fit.frequency_hz == pytest.approx(17e6, rel=1e-6)
    assert fit.damping_ratio == pytest.approx(0.07, rel=1e-5)
    assert fit.offset_v == pytest.approx(400.0, abs=1e-4)
    assert fit.amplitude_v == pytest.approx(60.0, rel=1e-5)
    assert fit.q_factor == pytest.approx(1 / (2 * 0.07), rel=1e-5)
    assert fit.fit_quality == pytest.approx(1.0, abs=1e-9)
    np.testing.assert_allclose(fit.evaluate(t), damped_ring(t, 17e6, 0.07, 60.0, 400.0), atol=1e-3)


def test_envelope_falls_below_a_level() -> None:
    fit = RingFit(1e-6, 50.0, 0.0, 2e7, 1e8, 100.0, 1.0, 20.0, 5e6)
    t = fit.time_envelope_below_s(1.0) - 1e-6
    # The closed form of the envelope, 50·exp(−σt) + 20·exp(−ρt), is at the level there.
    assert 50 * math.exp(-2e7 * t) + 20 * math.exp(-5e6 * t) == pytest.approx(1.0, rel=1e-9)
    # Already below the level (each term and their sum): from the start.
    assert RingFit(1e-6, 0.3, 0.0, 2e7, 1e8, 100.0, 1.0, 0.2).time_envelope_below_s(1.0) == 1e-6
    # A ring alone: ln(A/level)/σ.
    ring = RingFit(0.0, 50.0, 0.0, 2e7, 1e8, 100.0, 1.0)
    assert ring.time_envelope_below_s(1.0) == pytest.approx(math.log(50) / 2e7, rel=1e-12)


def test_no_oscillation_is_a_clear_error() -> None:
    t = np.arange(200) * 1e-9
    with pytest.raises(RingFitError):
        fit_ring(10 - 5 * np.exp(-t / 30e-9), 1e-9)


def test_weights_exclude_clipped_samples() -> None:
    t = np.arange(400) * 1e-9
    v = damped_ring(t, 12e6, 0.05, 100.0, 300.0)
    clipped = v > 370.0
    fit = fit_ring(np.minimum(v, 370.0), 1e-9, weights=(~clipped).astype(float))
    # The clipped samples carry no weight, so the unclipped model is recovered.
    assert fit.frequency_hz == pytest.approx(12e6, rel=1e-4)
    assert fit.damping_ratio == pytest.approx(0.05, rel=1e-3)


def rlc_state_matrix(l_h: float, c_f: float, r_ohm: float) -> np.ndarray:
    """Series R–L driving C: states (iL, vC)."""
    return np.array([[-r_ohm / l_h, -1 / l_h], [1 / c_f, 0.0]])


def rlc_snubber_state_matrix(l_h: float, cp_f: float, rs_ohm: float, cs_f: float) -> np.ndarray:
    """L driving the node (Cpar ∥ Rs–Cs), lossless L: states (iL, v, vCs)."""
    return np.array(
        [
            [0.0, -1 / l_h, 0.0],
            [1 / cp_f, -1 / (rs_ohm * cp_f), 1 / (rs_ohm * cp_f)],
            [0.0, 1 / (rs_ohm * cs_f), -1 / (rs_ohm * cs_f)],
        ]
    )


def dominant_pair(a: np.ndarray) -> tuple[float, float]:
    """(fd, ζ) of the slowest-decaying complex eigenvalue pair of ``a``."""
    eig = np.linalg.eigvals(a)
    pair = eig[eig.imag > 0]
    pole = pair[np.argmax(pair.real)]
    return pole.imag / (2 * math.pi), -pole.real / abs(pole)


def fit_after_peak(
    t_s: np.ndarray, v: np.ndarray, periods: float, fd_hz: float
) -> tuple[float, float]:
    peak = int(np.argmax(v))
    stop = peak + int(periods / fd_hz / (t_s[1] - t_s[0]))
    fit = fit_ring(v[peak:stop], t_s[1] - t_s[0], t_s[peak])
    return fit.frequency_hz, fit.damping_ratio


@pytest.mark.parametrize("r_ohm", [0.5, 2.0, 8.0])
def test_rlc_step_response_matches_state_matrix_eigenvalues(r_ohm: float) -> None:
    l_h, c_f = 250e-9, 180e-12
    a = rlc_state_matrix(l_h, c_f, r_ohm)
    system = signal.StateSpace(a, [[1 / l_h], [0.0]], [[0.0, 1.0]], [[0.0]])
    fd, zeta = dominant_pair(a)
    t = np.arange(6000) * 0.2e-9
    _, v = signal.step(system, T=t)
    fit_f, fit_zeta = fit_after_peak(t, 400 * v, 10, fd)
    # scipy.signal step response of the network vs its state-matrix eigenvalues (numpy).
    assert fit_f == pytest.approx(fd, rel=0.002)
    assert fit_zeta == pytest.approx(zeta, rel=0.01)


@pytest.mark.parametrize("rs_over_z0", [0.5, 1.0, 2.0, 4.0, 10.0])
@pytest.mark.parametrize("cs_over_c", [0.3, 1.0, 3.0, 5.0])
def test_rlc_with_rc_snubber_matches_the_network_eigenvalues(
    rs_over_z0: float, cs_over_c: float
) -> None:
    l_h, cp_f = 250e-9, 230e-12
    rs = rs_over_z0 * math.sqrt(l_h / cp_f)
    a = rlc_snubber_state_matrix(l_h, cp_f, rs, cs_over_c * cp_f)
    eig = np.linalg.eigvals(a)
    pair, real = eig[eig.imag > 0], eig[np.abs(eig.imag) < 1e-6 * np.abs(eig)]
    system = signal.StateSpace(a, [[1 / l_h], [0.0], [0.0]], [[0.0, 1.0, 0.0]], [[0.0]])
    pole = pair[0]
    periods = 2 * math.pi / pole.imag
    span = min(max(3 / -pole.real, 3 * periods), 20 * periods)
    t = np.arange(400) * span / 400
    _, v = signal.step(system, T=t)
    fit = fit_ring(400 * v, t[1] - t[0])
    # scipy.signal step response of the network from rest — the pair, the branch's real pole and
    # the plateau, nothing else — against the eigenvalues of its state matrix (numpy).
    assert fit.frequency_hz == pytest.approx(pole.imag / (2 * math.pi), rel=1e-5)
    assert fit.damping_ratio == pytest.approx(-pole.real / abs(pole), rel=1e-4)
    if fit.real_pole_decay_rate_per_s is not None:
        assert fit.real_pole_decay_rate_per_s == pytest.approx(-real[0].real, rel=1e-3)


def test_a_response_that_settles_without_ringing_is_no_ring() -> None:
    """Two real poles (an overdamped node): "no ring", with the slower pole's decay."""
    t = np.arange(400) * 1e-9
    v = 100 - 60 * np.exp(-t / 40e-9) - 40 * np.exp(-t / 8e-9)
    with pytest.raises(NoRingError) as caught:
        fit_ring(v, 1e-9)
    # The closed form's slower pole decays at 1/40 ns.
    assert caught.value.decay_rate_per_s == pytest.approx(1 / 40e-9, rel=1e-3)
    assert caught.value.offset_v == pytest.approx(100.0, abs=1e-3)


def test_nonlinear_capacitance_ring_from_solve_ivp() -> None:
    """Coss(v) = C0/√(1 + v/Vj) + Cstray charged through L from a step; reference: solve_ivp."""
    l_h, c0, vj, c_stray, r_ohm, v_step = 300e-9, 600e-12, 5.0, 60e-12, 1.0, 400.0

    def coss(v: float) -> float:
        return c0 / math.sqrt(1 + max(v, 0.0) / vj) + c_stray

    def rhs(_t: float, y: np.ndarray) -> list[float]:
        i, v = y
        return [(v_step - v - r_ohm * i) / l_h, i / coss(v)]

    t = np.arange(12000) * 0.1e-9
    sol = solve_ivp(rhs, (0, t[-1]), [0.0, 0.0], t_eval=t, method="LSODA", rtol=1e-9, atol=1e-12)
    v = sol.y[1]
    # Small-signal reference at the final level: fd from L and C(v_step) with the same R.
    fd, _ = dominant_pair(rlc_state_matrix(l_h, coss(v_step), r_ohm))
    peak = int(np.argmax(v))
    late = peak + int(20 / fd / 0.1e-9)  # after the large swings have decayed
    fit = fit_ring(v[late : late + int(10 / fd / 0.1e-9)], 0.1e-9, t[late])
    # scipy.integrate.solve_ivp (LSODA) integration of the nonlinear network is the reference.
    assert fit.frequency_hz == pytest.approx(fd, rel=0.02)
    assert fit.offset_v == pytest.approx(v_step, abs=0.5)
