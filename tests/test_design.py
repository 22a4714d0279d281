"""Snubber design equations against their published forms and the network's own eigenvalues."""

from __future__ import annotations

import math

import numpy as np
import pytest

from labseq.analysis import (
    DesignInputError,
    added_capacitance_method,
    capacitance_for_loss_f,
    characteristic_impedance_ohm,
    cheaper_tool,
    cv2f_loss_w,
    parasitic_capacitance_f,
    propose_clamp,
    propose_snubber,
    rcd_clamp_loss_w,
    snubber_damping_ratio,
)
from labseq.analysis.design import (
    best_damping_resistance_ohm,
    leakage_energy_loss_w,
    loaded_ring_network,
    propose_part_set,
)


def ring_frequency_hz(l_h: float, c_f: float) -> float:
    """f = 1/(2π√(LC)) (Severns, "Design of Snubbers for Power Circuits")."""
    return 1 / (2 * math.pi * math.sqrt(l_h * c_f))


def test_parasitic_capacitance_inverts_the_resonance_formula() -> None:
    # Severns: f = 1/(2π√(L·Cpar)) solved for Cpar.
    assert parasitic_capacitance_f(ring_frequency_hz(330e-9, 150e-12), 330e-9) == pytest.approx(
        150e-12
    )


def test_added_capacitance_method_recovers_l_and_cpar() -> None:
    l_h, c_par, c_add = 180e-9, 120e-12, 220e-12
    f1, f2 = ring_frequency_hz(l_h, c_par), ring_frequency_hz(l_h, c_par + c_add)
    # Added-capacitance method as application notes state it: Cpar = Cadd/((f1/f2)² − 1),
    # L = 1/((2πf1)²·Cpar); the rings come from f = 1/(2π√(LC)).
    c_found, l_found = added_capacitance_method(f1, f2, c_add)
    assert c_found == pytest.approx(c_par, rel=1e-12)
    assert l_found == pytest.approx(l_h, rel=1e-12)


def test_characteristic_impedance_trade_example() -> None:
    c_par = parasitic_capacitance_f(25e6, 200e-9)
    # R = √(L/C) = 2π·f·L: 25 MHz with 200 nH gives ≈ 31.4 Ω (common practice, no published source).
    assert characteristic_impedance_ohm(200e-9, c_par) == pytest.approx(31.4, abs=0.05)
    assert characteristic_impedance_ohm(200e-9, c_par) == pytest.approx(2 * math.pi * 25e6 * 200e-9)


def test_capacitance_for_a_loss_budget_and_its_loss() -> None:
    # Severns: P = Cs·V²·fsw, hence Cs = P/(V²·fsw).
    cs = capacitance_for_loss_f(0.5, 400.0, 100e3)
    assert cs == pytest.approx(0.5 / (400.0**2 * 100e3))
    assert cv2f_loss_w(cs, 400.0, 100e3) == pytest.approx(0.5)


def network_damping(l_h: float, cp_f: float, r_ohm: float, cs_f: float) -> float:
    """ζ of the dominant pair from the state matrix of L ∥ Cpar ∥ (R + Cs) (numpy eigvals)."""
    a = np.array(
        [
            [0.0, -1 / l_h, 0.0],
            [1 / cp_f, -1 / (r_ohm * cp_f), 1 / (r_ohm * cp_f)],
            [0.0, 1 / (r_ohm * cs_f), -1 / (r_ohm * cs_f)],
        ]
    )
    eig = np.linalg.eigvals(a)
    pair = eig[eig.imag > 0]
    return float(-pair[0].real / abs(pair[0]))


@pytest.mark.parametrize("ratio", [0.5, 1.0, 2.0, 3.0, 4.0])
def test_damping_from_the_polynomial_matches_the_state_matrix(ratio: float) -> None:
    l_h, cp = 200e-9, 200e-12
    r = math.sqrt(l_h / cp)
    # Independent route: eigenvalues of the network's state matrix (numpy) vs the roots of the
    # characteristic polynomial in the code.
    assert snubber_damping_ratio(l_h, cp, r, ratio * cp) == pytest.approx(
        network_damping(l_h, cp, r, ratio * cp), rel=1e-9
    )


def test_large_snubber_capacitor_gives_the_parallel_rlc_damping() -> None:
    l_h, cp = 200e-9, 200e-12
    r = math.sqrt(l_h / cp)
    # Parallel RLC: ζ = (1/2R)·√(L/C) = 0.5 at R = √(L/C), i.e. Q ≈ 1 (Severns, RC snubber).
    assert snubber_damping_ratio(l_h, cp, r, 1e4 * cp) == pytest.approx(0.5, abs=1e-3)
    # More Cs damps more, up to the conventional 3–4 × Cpar (common practice, no published source).
    assert snubber_damping_ratio(l_h, cp, r, cp) < snubber_damping_ratio(l_h, cp, r, 3 * cp)


def network_state_matrix(l_h: float, cp_f: float, r_ohm: float, cs_f: float) -> np.ndarray:
    """States (i_L, v, v_Cs) of L driving Cpar ∥ (R + Cs)."""
    return np.array(
        [
            [0.0, -1 / l_h, 0.0],
            [1 / cp_f, -1 / (r_ohm * cp_f), 1 / (r_ohm * cp_f)],
            [0.0, 1 / (r_ohm * cs_f), -1 / (r_ohm * cs_f)],
        ]
    )


@pytest.mark.parametrize("rs_over_z0", [0.5, 1.0, 2.0, 4.0, 10.0])
@pytest.mark.parametrize("cs_over_c", [0.3, 1.0, 3.0, 5.0])
def test_loaded_ring_gives_back_l_and_cpar(rs_over_z0: float, cs_over_c: float) -> None:
    l_h, cp_f = 250e-9, 230e-12
    rs, cs = rs_over_z0 * math.sqrt(l_h / cp_f), cs_over_c * cp_f
    eig = np.linalg.eigvals(network_state_matrix(l_h, cp_f, rs, cs))
    pair = eig[eig.imag > 0]
    if not pair.size:
        pytest.skip("no complex pair: this damper leaves no ring to measure")
    pole = pair[0]
    # Independent truth: the dominant eigenvalue of the network's state matrix (numpy), given as
    # the ring a scope would show (damped frequency and damping ratio); the characteristic
    # equation must return the network's own L and Cpar.
    found_l, found_c = loaded_ring_network(
        pole.imag / (2 * math.pi), -pole.real / abs(pole), rs, cs
    )
    assert found_l == pytest.approx(l_h, rel=1e-9)
    assert found_c == pytest.approx(cp_f, rel=1e-9)


def test_loaded_ring_that_no_network_gives_is_refused() -> None:
    # 20 MHz at ζ = 0.9 behind 33 Ω / 100 pF: no positive L and Cpar have that pole (the
    # branch cannot damp a 20 MHz ring that much).
    with pytest.raises(DesignInputError, match="no positive L and Cpar"):
        loaded_ring_network(20e6, 0.9, 33.0, 100e-12)
    with pytest.raises(DesignInputError, match="below 1"):
        loaded_ring_network(20e6, 1.0, 33.0, 1e-9)


@pytest.mark.parametrize("cs_over_c", [0.3, 0.5, 1.0, 2.0, 3.0, 5.0])
def test_best_resistor_for_a_chosen_capacitor_maximises_the_damping(cs_over_c: float) -> None:
    l_h, cp_f = 250e-9, 230e-12
    z0 = math.sqrt(l_h / cp_f)
    best = best_damping_resistance_ohm(l_h, cp_f, cs_over_c * cp_f)
    # Brute force on the state matrix's eigenvalues (numpy): the R with the largest ζ of the
    # dominant pair over a fine logarithmic scan.
    scan = z0 * np.geomspace(0.1, 10.0, 4001)
    zetas = []
    for r in scan:
        eig = np.linalg.eigvals(network_state_matrix(l_h, cp_f, r, cs_over_c * cp_f))
        pair = eig[eig.imag > 0]
        zetas.append(-pair[0].real / abs(pair[0]) if pair.size else 1.0)
    assert best == pytest.approx(scan[int(np.argmax(zetas))], rel=0.005)
    if cs_over_c < 1:
        # For Cs below Cpar the best R is well above √(L/Cpar) (the network's eigenvalues).
        assert best > 1.5 * z0


def test_loss_budget_is_a_cap_not_a_target() -> None:
    # A 10 W budget at 100 V and 200 kHz would allow Cs = P/(V²·fsw) = 5 nF (Severns); the
    # proposal keeps the conventional 3 × Cpar (common practice, no published source) instead.
    proposal = propose_snubber(
        ring_freq_hz=20e6, leakage_h=250e-9, volts=100.0, fsw_hz=200e3, loss_budget_w=10.0
    )
    c_par = parasitic_capacitance_f(20e6, 250e-9)
    assert proposal.cs_f == pytest.approx(3 * c_par)
    assert proposal.loss_w == pytest.approx(cv2f_loss_w(3 * c_par, 100.0, 200e3))
    assert proposal.loss_w < 10.0 and "within the loss budget" in proposal.cs_source


def test_one_part_set_is_checked_at_the_worst_step_corner() -> None:
    # Three points: Coss falls with voltage, so Cpar is largest at the smallest step.
    networks = [(250e-9, 260e-12, 60.0), (250e-9, 215e-12, 85.0), (250e-9, 190e-12, 110.0)]
    part_set = propose_part_set(networks, 200e3, loss_budget_w=0.5)
    # Cs: 3 × the largest Cpar would burn 780 pF·(110 V)²·200 kHz = 1.9 W at the worst step, so
    # the budget caps it there: Cs = 0.5 W / ((110 V)²·200 kHz) (Severns, P = Cs·V²·fsw).
    assert part_set.cs_f == pytest.approx(0.5 / (110.0**2 * 200e3))
    assert part_set.worst_step_v == 110.0 and part_set.worst_step_loss_w == pytest.approx(0.5)
    # The damping it gives at each point, from the network's eigenvalues (numpy).
    for (l_h, c_f, _), zeta in zip(networks, part_set.damping_ratios, strict=True):
        eig = np.linalg.eigvals(network_state_matrix(l_h, c_f, part_set.r_ohm, part_set.cs_f))
        pair = eig[eig.imag > 0]
        assert zeta == pytest.approx(-pair[0].real / abs(pair[0]), rel=1e-9)
    assert part_set.min_damping_ratio == min(part_set.damping_ratios)


def test_leakage_energy_per_cycle() -> None:
    # ½·L·I² per cycle (the energy stored in an inductance), times fsw.
    assert leakage_energy_loss_w(250e-9, 2.0, 200e3) == pytest.approx(0.5 * 250e-9 * 4 * 200e3)


def test_a_small_resistor_budget_forces_cs_below_cpar_and_warns() -> None:
    # A 1206 snubber resistor is usually held to 50–100 mW (common practice, no published source):
    # at 400 V and 100 kHz that allows only Cs = 6.25 pF against ~200 pF of Cpar.
    proposal = propose_snubber(
        ring_freq_hz=25e6, leakage_h=200e-9, volts=400.0, fsw_hz=100e3, loss_budget_w=0.1
    )
    assert proposal.cs_f == pytest.approx(6.25e-12)
    assert proposal.loss_w == pytest.approx(0.1)
    assert any("clamp" in warning for warning in proposal.warnings)


def test_proposal_from_a_list_of_measured_frequencies() -> None:
    l_h, c_par, c_add = 150e-9, 100e-12, 100e-12
    f1, f2 = ring_frequency_hz(l_h, c_par), ring_frequency_hz(l_h, c_par + c_add)
    proposal = propose_snubber(
        ring_freq_hz=[f1 * 0.99, f1, f1 * 1.02], added_cap_f=c_add, ring_freq_added_hz=f2
    )
    assert proposal.ring_freq_hz == pytest.approx(f1)  # median of the measurements
    assert proposal.c_par_f == pytest.approx(c_par)
    assert proposal.l_leak_h == pytest.approx(l_h)
    assert proposal.cs_f == pytest.approx(3 * c_par)  # conventional 3 × Cpar (common practice)
    assert proposal.loss_w is None  # no volts / fsw given
    assert proposal.warnings == []


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"ring_freq_hz": 20e6, "added_cap_f": 1e-10, "ring_freq_added_hz": 25e6}, "must be below"),
        ({"ring_freq_hz": 20e6, "added_cap_f": 1e-10}, "go together"),
        ({"ring_freq_hz": -20e6, "leakage_h": 1e-7}, "positive"),
        ({"leakage_h": 1e-7}, "ring_freq_hz is needed"),
        ({"ring_freq_hz": 20e6, "leakage_h": 1e-7, "loss_budget_w": 0.1}, "need volts and fsw_hz"),
        ({"ring_freq_hz": 2e7, "leakage_h": 1e-7, "cs_f": 1e-10, "loss_budget_w": 0.1}, "either"),
    ],
)
def test_inconsistent_inputs_are_refused(kwargs: dict[str, float], message: str) -> None:
    with pytest.raises(DesignInputError, match=message):
        propose_snubber(**kwargs)


# --- RCD clamp (Fairchild AN-4147, "Design Guidelines for RCD Snubber of Flyback Converters";
# its formulas are recalled from memory, so each one is checked here against a balance derived
# independently of it) ------------------------------------------------------------------------

LLK_H, IPK_A, FSW_HZ, VR_V = 250e-9, 2.0, 200e3, 25.0


def clamp_interval_energy_and_charge(
    leakage_h: float, peak_a: float, clamp_v: float, reflected_v: float
) -> tuple[float, float]:
    """Energy and charge the clamp absorbs in one cycle, by numerical integration.

    Derivation: while the clamp diode conducts, the drain sits at Vin + Vclamp and the secondary
    holds the magnetising side at Vin + Vr, so the leakage inductance sees Vclamp − Vr and its
    current falls linearly, di/dt = −(Vclamp − Vr)/Llk, from Ipk to zero. The clamp capacitor
    takes that current at Vclamp: energy ∫Vclamp·i dt, charge ∫i dt.
    """
    t_end_s = leakage_h * peak_a / (clamp_v - reflected_v)
    t = np.linspace(0.0, t_end_s, 20_001)
    current = peak_a - (clamp_v - reflected_v) / leakage_h * t
    return float(np.trapezoid(clamp_v * current, t)), float(np.trapezoid(current, t))


@pytest.mark.parametrize("clamp_v", [30.0, 50.0, 100.0])
def test_clamp_loss_resistor_and_capacitor_against_energy_and_charge_balance(
    clamp_v: float,
) -> None:
    ripple_v = 0.08 * clamp_v
    clamp = propose_clamp(
        leakage_h=LLK_H,
        peak_current_a=IPK_A,
        fsw_hz=FSW_HZ,
        reflected_voltage_v=VR_V,
        clamp_voltage_v=clamp_v,
        clamp_ripple_v=ripple_v,
    )
    energy_j, charge_c = clamp_interval_energy_and_charge(LLK_H, IPK_A, clamp_v, VR_V)
    # Energy balance: the clamp dissipates per second what it absorbs per cycle times fsw.
    assert clamp.clamp_loss_w == pytest.approx(energy_j * FSW_HZ, rel=1e-6)
    assert rcd_clamp_loss_w(LLK_H, IPK_A, FSW_HZ, clamp_v, VR_V) == pytest.approx(
        clamp.clamp_loss_w
    )
    # The resistor across the clamp capacitor burns that power at Vclamp: V²/R = P.
    assert clamp_v**2 / clamp.clamp_r_ohm == pytest.approx(energy_j * FSW_HZ, rel=1e-6)
    # Charge balance: the capacitor's ripple C·ΔV is the charge the diode delivers per cycle,
    # which the resistor removes over the period.
    assert clamp.clamp_c_f * ripple_v == pytest.approx(charge_c, rel=1e-6)
    # More than the bare leakage energy ½·Llk·Ipk²: the reflected voltage keeps delivering.
    assert clamp.clamp_loss_w > 0.5 * LLK_H * IPK_A**2 * FSW_HZ


def test_clamp_at_or_below_the_reflected_voltage_is_refused() -> None:
    with pytest.raises(DesignInputError, match="must be above reflected_voltage_v"):
        rcd_clamp_loss_w(LLK_H, IPK_A, FSW_HZ, VR_V, VR_V)
    with pytest.raises(DesignInputError, match="needs peak_current_a"):
        propose_clamp(
            leakage_h=LLK_H,
            peak_current_a=None,
            fsw_hz=FSW_HZ,
            reflected_voltage_v=VR_V,
            clamp_voltage_v=50.0,
            clamp_ripple_v=5.0,
        )


def test_cheaper_tool_compares_the_two_losses() -> None:
    assert cheaper_tool(rc_loss_w=1.0, clamp_loss_w=0.2) == "rcd clamp"
    assert cheaper_tool(rc_loss_w=0.2, clamp_loss_w=1.0) == "rc damper"
