"""The ring analysis against ngspice: a leakage-inductance ring on a nonlinear switch capacitance,
and the ring across the RC-damper design space.

ngspice (the Debian package, run as ``ngspice -b``) integrates a flyback turn-off: the magnetising
current, held constant over the transient by a current source, charges the switch node through the
leakage inductance when the switch (a second current source) stops conducting; a clamp diode to
Vin + Vr stands for the secondary taking over, after which the leakage inductance rings with the
node. The node holds Coss(V) = C0/√(1 + V/Vj) (the usual abrupt-junction form: common practice, no
published source), a fixed stray capacitance and an Rs–Cs damper. The analysis, on the waveform
resampled uniformly, is checked against the ring frequency that ngspice's own points show (zero
crossings of v − plateau) and against the small-signal resonance at the plateau.

The clamp diode has 0.1 Ω of series resistance: without it ngspice's step control stalls where
the diode's current falls towards zero late in the ring.
"""

from __future__ import annotations

import math
import shutil
import subprocess
from pathlib import Path

import ngspice_rings as damper_grid
import numpy as np
import pytest

from labseq.analysis import EdgeFigures, analyze_capture
from labseq.analysis.design import loaded_ring_network

NGSPICE = shutil.which("ngspice")
pytestmark = pytest.mark.skipif(
    NGSPICE is None, reason="ngspice is not installed (`make test` installs the Debian package)"
)

C0_F, VJ_V, STRAY_F = 600e-12, 5.0, 40e-12
LEAKAGE_H, PEAK_A, PLATEAU_SOURCE_V = 1e-6, 0.5, 400.0
RS_OHM, CS_F = 470.0, 100e-12
STOP_S, MAX_STEP_S = 3e-6, 0.05e-9
SAMPLE_RATE_HZ, PRE_TRIGGER_S = 2e9, 200e-9

NETLIST = f"""* flyback turn-off: leakage inductance ringing with Coss(V), stray C and an RC damper
Im 0 m DC {PEAK_A}
Cm m 0 10p
Dclamp m p DCLAMP
.model DCLAMP D(IS=1e-14 N=1 RS=0.1)
Vplateau p 0 DC {PLATEAU_SOURCE_V}
Llk m d {LEAKAGE_H} IC={PEAK_A}
Ccoss d 0 c='{C0_F}/sqrt(1+max(V(d),0)/{VJ_V})'
Cstray d 0 {STRAY_F}
Rs d s {RS_OHM}
Cs s 0 {CS_F}
Iswitch d 0 PWL(0 {PEAK_A} 5n 0)
.ic V(d)=0 V(m)=0 V(s)=0
.control
tran {MAX_STEP_S} {STOP_S} 0 {MAX_STEP_S} uic
wrdata ring.txt v(d)
quit
.endc
.end
"""


@pytest.fixture(scope="module")
def ngspice_ring(tmp_path_factory: pytest.TempPathFactory) -> tuple[np.ndarray, np.ndarray]:
    """(time, node volts) at ngspice's own (non-uniform) time points."""
    folder: Path = tmp_path_factory.mktemp("ngspice")
    (folder / "ring.cir").write_text(NETLIST)
    result = subprocess.run(
        [str(NGSPICE), "-b", "ring.cir"],
        cwd=folder,
        capture_output=True,
        text=True,
        timeout=60,
        check=False,
    )
    assert result.returncode == 0 and (folder / "ring.txt").exists(), result.stderr[-2000:]
    data = np.loadtxt(folder / "ring.txt")
    return data[:, 0], data[:, 1]


@pytest.fixture(scope="module")
def analysed(ngspice_ring: tuple[np.ndarray, np.ndarray]) -> EdgeFigures:
    """The analysis of the ngspice node voltage resampled at 2 GS/s; before t = 0 the switch
    holds the node at 0 V."""
    t_s, volts = ngspice_ring
    uniform_t = np.arange(-PRE_TRIGGER_S, t_s[-1], 1 / SAMPLE_RATE_HZ)
    uniform_v = np.interp(uniform_t, t_s, volts, left=0.0)
    return analyze_capture(uniform_v, 1 / SAMPLE_RATE_HZ, float(uniform_t[0])).worst


def settled_level_v(t_s: np.ndarray, volts: np.ndarray) -> float:
    """The level the ring settles to: the mean of the last 200 ns of the transient."""
    return float(np.mean(volts[t_s > t_s[-1] - 200e-9]))


def zero_crossing_frequency_hz(t_s: np.ndarray, volts: np.ndarray, span_s: float) -> float:
    """Mean ring frequency from the crossings of v − plateau in the ``span_s`` after the peak.

    Each crossing instant is interpolated linearly between ngspice's own points.
    """
    x = volts - settled_level_v(t_s, volts)
    peak = int(np.argmax(volts))
    sign_change = np.flatnonzero(np.signbit(x[peak:-1]) != np.signbit(x[peak + 1 :])) + peak
    crossings = t_s[sign_change] - x[sign_change] * (
        (t_s[sign_change + 1] - t_s[sign_change]) / (x[sign_change + 1] - x[sign_change])
    )
    crossings = crossings[crossings <= t_s[peak] + span_s]
    assert crossings.size >= 6, "too few crossings to measure a frequency"
    return (crossings.size - 1) / (2 * (crossings[-1] - crossings[0]))


def test_plateau_is_the_clamp_level(
    ngspice_ring: tuple[np.ndarray, np.ndarray], analysed: EdgeFigures
) -> None:
    # ngspice's settled node voltage (the clamp source plus the diode's drop) is the reference.
    assert analysed.plateau_v == pytest.approx(settled_level_v(*ngspice_ring), abs=0.5)
    assert analysed.peak_v == pytest.approx(float(np.max(ngspice_ring[1])), abs=0.5)


def test_ring_frequency_matches_ngspice_zero_crossings(
    ngspice_ring: tuple[np.ndarray, np.ndarray], analysed: EdgeFigures
) -> None:
    # Reference: ngspice's own waveform, over the span the fit covers (about three decay time
    # constants from the peak). 0.5 %: the crossings are interpolated between points at most
    # 0.05 ns apart on a ~66 ns period, and the fit weighs the span's early, larger swings more.
    span_s = 3.0 / analysed.decay_rate_per_s
    reference_hz = zero_crossing_frequency_hz(*ngspice_ring, span_s)
    assert analysed.ring_frequency_hz == pytest.approx(reference_hz, rel=0.005)


def test_ring_frequency_matches_the_small_signal_resonance_at_the_plateau(
    ngspice_ring: tuple[np.ndarray, np.ndarray], analysed: EdgeFigures
) -> None:
    plateau_v = settled_level_v(*ngspice_ring)
    # Small-signal node capacitance at the plateau: dQ/dV of Coss, plus the stray C, plus the
    # Rs–Cs branch's equivalent parallel capacitance at the ring frequency, Cs/(1 + (ω·Rs·Cs)²)
    # (series-to-parallel conversion of an RC branch); solved with ω by fixed-point iteration.
    c_node_f = C0_F / math.sqrt(1 + plateau_v / VJ_V) + STRAY_F
    omega = 1 / math.sqrt(LEAKAGE_H * c_node_f)
    for _ in range(50):
        omega = 1 / math.sqrt(LEAKAGE_H * (c_node_f + CS_F / (1 + (omega * RS_OHM * CS_F) ** 2)))
    # f = 1/(2π√(Llk·C)) (Severns, "Design of Snubbers for Power Circuits"). 2 %: the ring swings
    # about ±25 V through the falling Coss(V) (±1.5 % in instantaneous frequency, a few tenths
    # of a percent on average) and a damping ratio near 0.1 lowers the damped frequency by
    # √(1 − ζ²), about 0.5 %.
    assert analysed.ring_frequency_hz == pytest.approx(omega / (2 * math.pi), rel=0.02)
    # The bare node (no damper branch) rings faster: the branch does add capacitance.
    assert analysed.ring_frequency_hz < 1 / (2 * math.pi * math.sqrt(LEAKAGE_H * c_node_f))


# --- the RC-damper design space, against the network's eigenvalues -------------------------------

GRID = [
    damper_grid.RingCase(rs, cs, junction)
    for junction in (False, True)
    for rs in (0.5, 1.0, 2.0, 4.0, 10.0)
    for cs in (0.3, 1.0, 3.0, 5.0)
]


@pytest.mark.parametrize(
    "case", GRID, ids=lambda c: f"{'j' if c.junction else 'lin'}-{c.rs_over_z0:g}-{c.cs_over_c:g}"
)
def test_ring_and_loaded_network_across_the_damper_grid(case: damper_grid.RingCase) -> None:
    """ngspice turn-off records (8 bits, noise) over Rs/Z0 0.5–10 and Cs/C 0.3–5, linear and
    junction-capacitance nodes (:mod:`ngspice_rings`); `tests/ring_grid.py` prints the full grid."""
    fd, fn, zeta = damper_grid.pole_figures(case.network_pole(damper_grid.PLATEAU_V))
    figures = analyze_capture(*damper_grid.scope_record(case))
    edge = figures.worst
    assert not figures.clipped and edge.ring_model in ("ring", "ring and real pole")
    # Reference: the dominant eigenvalue of the network's state matrix, linearised at the plateau
    # (numpy). Targets: ζ within 10 % (or 0.02) and the damped frequency within 2 % up to ζ 0.5;
    # ζ within 15 % and the natural frequency within 8 % up to ζ 0.7.
    if zeta <= 0.5:
        assert edge.damping_ratio == pytest.approx(zeta, rel=0.10, abs=0.02)
        assert edge.ring_frequency_hz == pytest.approx(fd, rel=0.02)
    else:
        assert edge.damping_ratio == pytest.approx(zeta, rel=0.15)
        assert edge.natural_frequency_hz == pytest.approx(fn, rel=0.08)
    # The network from the ring measured with the damper fitted (the characteristic equation,
    # labseq.analysis.design.loaded_ring_network): the leakage inductance and the node's
    # small-signal capacitance within 10 % where ζ is within its 10 % (the answer moves by about
    # 1.3 % per % of ζ).
    if zeta <= 0.5:
        l_h, c_f = loaded_ring_network(
            edge.ring_frequency_hz, edge.damping_ratio, case.rs_ohm, case.cs_f
        )
        assert l_h == pytest.approx(damper_grid.LEAKAGE_H, rel=0.10)
        assert c_f == pytest.approx(case.node_capacitance_f(damper_grid.PLATEAU_V), rel=0.10)
