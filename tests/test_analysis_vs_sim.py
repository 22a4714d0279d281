"""The analysis on the simulated bench's own switch-node waveforms, against the model's physics.

The flyback model (:mod:`labseq_sim_instruments.flyback`) is sampled directly, as a scope would see
it
(2 GS/s, 8 bits over 200 V, a little noise), and analysed. The references are the model's design
values and the eigenvalues of the switch-node network linearised at the plateau.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from waveforms import quantise

from labseq.analysis import EdgeFigures, analyze_capture
from labseq_sim_instruments.flyback import DEMO_DUTS, FlybackDesign, FlybackModel, load_dut

SAMPLE_RATE_HZ = 2e9
SCOPE_RANGE_V = (-20.0, 180.0)  # 8 divisions of 25 V
NOISE_V = 0.2


@pytest.fixture(scope="module")
def design() -> FlybackDesign:
    return load_dut(DEMO_DUTS["telecom_dc"])


def scope_capture(design: FlybackDesign, bus_v: float, load_a: float) -> EdgeFigures:
    """Two switching periods from just before a turn-off, digitised and analysed."""
    model = FlybackModel(design)
    point = model.operating_point(bus_v, load_a)
    t_s = np.arange(int(2.2 * model.period_s * SAMPLE_RATE_HZ)) / SAMPLE_RATE_HZ - 0.1e-6
    volts = model.switch_node_v(point, t_s)
    noisy = volts + np.random.default_rng(3).normal(0.0, NOISE_V, volts.size)
    digitised = quantise(noisy, bits=8, low_v=SCOPE_RANGE_V[0], high_v=SCOPE_RANGE_V[1])
    return analyze_capture(digitised, 1 / SAMPLE_RATE_HZ, float(t_s[0])).worst


def node_capacitance_f(design: FlybackDesign, volts: float) -> float:
    """Small-signal node capacitance: Coss(V) = C0/√(1 + V/Vj) plus the stray capacitance."""
    return design.coss_c0_f / math.sqrt(1 + volts / design.coss_vj_v) + design.stray_capacitance_f


def linearised_ring(design: FlybackDesign, plateau_v: float) -> tuple[float, float]:
    """(fd, ζ) of the dominant pole pair of the node network linearised at the plateau.

    While the secondary conducts, the leakage inductance (with its series damping resistance)
    connects the node to the stiff level Vin + Vr; the node holds Coss(V) + stray and the Rs–Cs
    branch. States (i_Llk, v_node, v_Cs); the eigenvalues of the state matrix (numpy) give the
    ring.
    """
    llk, rd = design.leakage_inductance_h, design.damping_resistance_ohm
    rs, cs = design.snubber_resistance_ohm, design.snubber_capacitance_f
    c_node = node_capacitance_f(design, plateau_v)
    state = np.array(
        [
            [-rd / llk, -1 / llk, 0.0],
            [1 / c_node, -1 / (rs * c_node), 1 / (rs * c_node)],
            [0.0, 1 / (rs * cs), -1 / (rs * cs)],
        ]
    )
    eigenvalues = np.linalg.eigvals(state)
    pair = eigenvalues[eigenvalues.imag > 0]
    pole = pair[np.argmax(pair.real)]
    return pole.imag / (2 * math.pi), -pole.real / abs(pole)


OPERATING_POINTS = [(36.0, 1.0), (48.0, 2.2), (75.0, 2.2)]


@pytest.mark.parametrize(("bus_v", "load_a"), OPERATING_POINTS)
@pytest.mark.parametrize("snubber", ["stock", "rs_near_z0", "matched_q"])
def test_plateau_and_ring_frequency_match_the_model(
    design: FlybackDesign, bus_v: float, load_a: float, snubber: str
) -> None:
    # stock 100 Ω / 220 pF (ζ ≈ 0.17); Rs near √(Llk/C) with a small Cs (ζ ≈ 0.17); 68 Ω / 470 pF,
    # a damper whose real pole reads as ring damping in a sinusoid-only fit (ζ ≈ 0.25).
    parts = {"stock": None, "rs_near_z0": (32.0, 220e-12), "matched_q": (68.0, 470e-12)}[snubber]
    if parts is not None:
        design = design.with_snubber(*parts)
    edge = scope_capture(design, bus_v, load_a)
    # Plateau = Vin + n·(Vout + Vf), the reflected voltage on the bus (flyback textbook relation,
    # e.g. Pressman, "Switching Power Supply Design"); the model's damped ring settles there.
    reflected_v = design.turns_ratio * (design.output_voltage_v + design.rectifier_drop_v)
    assert edge.plateau_v == pytest.approx(bus_v + reflected_v, rel=0.01)

    fd_hz, zeta = linearised_ring(design, edge.plateau_v)
    # Reference: eigenvalues of the linearised network (numpy). 1.5 %: the fit starts at the
    # peak, where the ring swings tens of volts through the falling Coss(V), so its frequency
    # differs from the small-signal value at the plateau by a few tenths of a percent.
    assert edge.ring_frequency_hz == pytest.approx(fd_hz, rel=0.015)
    # The damping ratio within 10 % (the ring fit's target): the fit models the damper's real pole,
    # so its slow decay is not read as ring damping; what is left is the amplitude-dependent
    # frequency through Coss(V), a few percent at full load.
    assert edge.damping_ratio == pytest.approx(zeta, rel=0.10)
    # f = 1/(2π√(Llk·C)) (Severns, "Design of Snubbers for Power Circuits") brackets the ring:
    # the Rs–Cs branch adds part of Cs to the node, so the ring lies between the bare node's
    # frequency and that of the node with all of Cs across it.
    c_node = node_capacitance_f(design, edge.plateau_v)
    llk = design.leakage_inductance_h
    bare_hz = 1 / (2 * math.pi * math.sqrt(llk * c_node))
    loaded_hz = 1 / (2 * math.pi * math.sqrt(llk * (c_node + design.snubber_capacitance_f)))
    assert loaded_hz < edge.ring_frequency_hz < bare_hz


def test_a_larger_damper_capacitor_with_rs_near_z0_damps_the_ring(design: FlybackDesign) -> None:
    """Rs ≈ √(Llk/C_node) ≈ 32 Ω; Cs from 220 pF up to 470 pF."""
    c_node = node_capacitance_f(design, 73.0)
    rs = math.sqrt(design.leakage_inductance_h / c_node)
    zetas = [
        scope_capture(design.with_snubber(rs, cs), 48.0, 2.2).damping_ratio
        for cs in (220e-12, 330e-12, 470e-12)
    ]
    # Severns, "Design of Snubbers for Power Circuits": with R near the characteristic impedance
    # the damping grows with Cs towards the parallel-RLC value of about 0.5 (Cs of 3-4 × Cpar).
    assert zetas[0] < zetas[1] < zetas[2]
    assert zetas[2] > 2 * zetas[0]


@pytest.mark.parametrize(("bus_v", "load_a"), [(36.0, 0.5), (75.0, 0.5)])
def test_a_heavily_damped_ring_matches_the_network(
    design: FlybackDesign, bus_v: float, load_a: float
) -> None:
    """33 Ω / 470 pF, Rs ≈ √(Llk/C) and Cs ≈ 2 × C: ζ ≈ 0.36–0.41, one visible overshoot."""
    design = design.with_snubber(33.0, 470e-12)
    edge = scope_capture(design, bus_v, load_a)
    fd_hz, zeta = linearised_ring(design, edge.plateau_v)
    # Reference: eigenvalues of the network linearised at the plateau (numpy); targets ζ within
    # 10 % and frequency within 2 %. At light load the ring swings about 12 V, where the
    # linearisation holds; at full load it swings 27 V through the falling Coss(V) and the
    # large-signal ring's frequency moves up to 2.5 % from the small-signal pole (measured with
    # this test at 2.2 A), which is the reference's limit, not the fit's.
    assert edge.ring_model in ("ring", "ring and real pole")
    assert edge.damping_ratio == pytest.approx(zeta, rel=0.10)
    assert edge.ring_frequency_hz == pytest.approx(fd_hz, rel=0.02)
