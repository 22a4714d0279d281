"""ngspice records of a flyback turn-off ring across the RC-damper design space, and their truth.

The ring netlist is a flyback switch node at turn-off: the magnetising inductance (1 mH, its
current nearly constant over the transient) drives the node through the leakage inductance once
the switch (a current source) stops conducting. When the node reaches the plateau the secondary
takes over, here a voltage-controlled switch with a wide hysteresis that ties the magnetising end
to the plateau source and stays closed (a secondary diode stays on as long as the ring's leakage
current is below the magnetising current, which holds here). From then on the leakage inductance
rings with the node capacitance and the Rs–Cs damper. A clamp diode in the switch's place makes
ngspice's step control stall on the junction node, and its incremental resistance would vary
with the current.

The node capacitance is either linear or a junction capacitance C0/√(1 + V/Vj) plus a fixed stray
capacitance (the usual abrupt-junction form: common practice, no published source), given to
ngspice as its charge Q(V) = 2·C0·Vj·(√(1 + V/Vj) − 1) (the capacitance form stalls ngspice's step
control). A known series resistance in the leakage path (the winding's loss, plus the switch's
on-resistance) is part of the reference network.

The truth is the dominant pole of the network linearised at the plateau: the eigenvalues of the
state matrix of L (with its series resistance) driving C_node ∥ (Rs + Cs), states (i_L, v, v_Cs).
Records are resampled uniformly, given Gaussian noise and quantised to 8 bits as a scope would,
the ring filling most of the screen. ngspice runs once per distinct netlist in a session
(``functools.cache``). :func:`loss_periods` is a whole DCM flyback over several switching periods,
for the snubber loss.
"""

from __future__ import annotations

import functools
import math
import shutil
import subprocess
import tempfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from waveforms import quantise

NGSPICE = shutil.which("ngspice")

LEAKAGE_H = 250e-9
NODE_F = 230e-12
SERIES_OHM = 0.05
SWITCH_ON_OHM = 0.001
MAGNETISING_H = 1e-3
PEAK_A = 2.0
PLATEAU_V = 100.0
#: Junction node: C0/√(1 + V/Vj) + stray, 231 pF small-signal at the 100 V plateau.
JUNCTION_C0_F, JUNCTION_VJ_V, JUNCTION_STRAY_F = 600e-12, 5.0, 100e-12
SAMPLE_RATE_HZ = 2e9
PRE_TRIGGER_S = 200e-9
SCOPE_RANGE_V = (-20.0, 180.0)  # 8 divisions of 25 V, 8 bits: 0.78 V per code
NOISE_V = 0.3


def z0_ohm() -> float:
    """Characteristic impedance √(L/C) of the bare node."""
    return math.sqrt(LEAKAGE_H / NODE_F)


@dataclass(frozen=True)
class RingCase:
    """One point of the grid: damper values relative to the node, and the node's kind."""

    rs_over_z0: float
    cs_over_c: float
    junction: bool = False

    @property
    def rs_ohm(self) -> float:
        return self.rs_over_z0 * z0_ohm()

    @property
    def cs_f(self) -> float:
        return self.cs_over_c * NODE_F

    def node_capacitance_f(self, volts: float) -> float:
        """Small-signal node capacitance dQ/dV at ``volts``."""
        if not self.junction:
            return NODE_F
        return JUNCTION_C0_F / math.sqrt(1 + volts / JUNCTION_VJ_V) + JUNCTION_STRAY_F

    def netlist(self, stop_s: float, step_s: float) -> str:
        node = (
            f"Cnode d 0 {NODE_F}"
            if not self.junction
            else f"Ccoss d 0 Q='{JUNCTION_C0_F}*2*{JUNCTION_VJ_V}*"
            f"(sqrt(1+V(d)/{JUNCTION_VJ_V})-1)'\n"
            f"Cstray d 0 {JUNCTION_STRAY_F}"
        )
        return f"""* flyback turn-off ring with an RC damper
Vbus b 0 DC {PLATEAU_V / 2}
Lm b m {MAGNETISING_H} IC={PEAK_A}
Ssec m p d 0 SECONDARY
.model SECONDARY SW(VT={PLATEAU_V / 2} VH={PLATEAU_V / 2 - 0.01} RON={SWITCH_ON_OHM} ROFF=1e9)
Vplateau p 0 DC {PLATEAU_V}
Rseries m x {SERIES_OHM}
Llk x d {LEAKAGE_H} IC={PEAK_A}
{node}
Rs d s {self.rs_ohm}
Cs s 0 {self.cs_f}
Iswitch d 0 PWL(0 {PEAK_A} 5n 0)
.ic V(d)=0 V(s)=0
.control
tran {step_s} {stop_s} 0 {step_s} uic
wrdata ring.txt v(d)
quit
.endc
.end
"""

    def network_pole(self, plateau_v: float) -> complex:
        """Dominant (slowest-decaying) eigenvalue of the network linearised at ``plateau_v``
        (numpy eigenvalues of the state matrix); a real number when the network has no
        complex pair."""
        capacitance_f = self.node_capacitance_f(plateau_v)
        series_ohm = SERIES_OHM + SWITCH_ON_OHM
        return dominant_pole(LEAKAGE_H, series_ohm, capacitance_f, self.rs_ohm, self.cs_f)


def state_matrix(l_h: float, r_series_ohm: float, c_f: float, rs_ohm: float, cs_f: float):
    """States (i_L, v_node, v_Cs) of L (series R) from a stiff source into C ∥ (Rs + Cs)."""
    return np.array(
        [
            [-r_series_ohm / l_h, -1 / l_h, 0.0],
            [1 / c_f, -1 / (rs_ohm * c_f), 1 / (rs_ohm * c_f)],
            [0.0, 1 / (rs_ohm * cs_f), -1 / (rs_ohm * cs_f)],
        ]
    )


def dominant_pole(l_h: float, r_series_ohm: float, c_f: float, rs_ohm: float, cs_f: float):
    """The complex eigenvalue with positive imaginary part, or the slowest real one if none."""
    eig = np.linalg.eigvals(state_matrix(l_h, r_series_ohm, c_f, rs_ohm, cs_f))
    pair = eig[eig.imag > 1e-9 * np.abs(eig)]
    if pair.size:
        return complex(pair[0])
    return complex(eig.real[np.argmax(eig.real)])


def pole_figures(pole: complex) -> tuple[float, float, float]:
    """(damped frequency fd, natural frequency fn, ζ) of a complex pole s = −σ + jωd."""
    return pole.imag / (2 * math.pi), abs(pole) / (2 * math.pi), -pole.real / abs(pole)


@functools.cache
def _work_folder() -> Path:
    return Path(tempfile.mkdtemp(prefix="labseq-ngspice-"))


@functools.cache
def ngspice_transient(netlist: str) -> tuple[np.ndarray, np.ndarray]:
    """(time, node volts) at ngspice's own time points; one run per distinct netlist."""
    folder = _work_folder() / f"run{abs(hash(netlist)):x}"
    folder.mkdir(exist_ok=True)
    (folder / "ring.cir").write_text(netlist)
    result = subprocess.run(
        [str(NGSPICE), "-b", "ring.cir"],
        cwd=folder,
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )
    if not (folder / "ring.txt").exists():
        raise RuntimeError(f"ngspice wrote no data: {result.stderr[-2000:]}")
    data = np.loadtxt(folder / "ring.txt")
    return data[:, 0], data[:, 1]


def scope_record(case: RingCase, seed: int = 1) -> tuple[np.ndarray, float, float]:
    """(volts, sample interval, t0) of the case's ngspice transient as an 8-bit scope sees it."""
    pole = case.network_pole(PLATEAU_V)
    slowest = min(abs(pole.real), 1 / (case.rs_ohm * case.cs_f))
    stop_s = min(max(12 / slowest, 1.5e-6), 6e-6)
    t_s, volts = ngspice_transient(case.netlist(stop_s, 0.1e-9))
    uniform_t = np.arange(-PRE_TRIGGER_S, t_s[-1], 1 / SAMPLE_RATE_HZ)
    uniform_v = np.interp(uniform_t, t_s, volts, left=0.0)
    noisy = uniform_v + np.random.default_rng(seed).normal(0.0, NOISE_V, uniform_v.size)
    digitised = quantise(noisy, bits=8, low_v=SCOPE_RANGE_V[0], high_v=SCOPE_RANGE_V[1])
    return digitised, 1 / SAMPLE_RATE_HZ, float(uniform_t[0])


#: A DCM flyback over eight switching periods, for the snubber loss: 48 V bus, 60 µH magnetising
#: and 250 nH leakage inductance, 1.5 µs on-time at 150 kHz, 50 V reflected (a stiff source behind
#: the secondary diode), a linear 230 pF node and a 47 Ω / 470 pF damper.
LOSS_FSW_HZ, LOSS_RS_OHM, LOSS_CS_F = 150e3, 47.0, 470e-12
LOSS_NETLIST = """* flyback switching periods with an RC damper on the switch node
Vbus b 0 DC 48
Lm b m 60u IC=0
Cm m 0 10p
Llk m d 250n IC=0
Dsec m p DSEC
.model DSEC D(IS=1e-9 N=1 RS=0.05)
Vp p 0 DC 98
Ssw d 0 g 0 SWITCH
.model SWITCH SW(VT=0.5 VH=0.1 RON=0.05 ROFF=1e7)
Vg g 0 PULSE(1 0 1.5u 2n 2n {off_s} {period_s})
Cnode d 0 230p
Rs d s {rs}
Cs s 0 {cs}
.ic V(d)=0 V(s)=0 V(m)=0
.control
tran 0.5n {stop_s} 0 0.5n uic
let pr = (v(d)-v(s))*(v(d)-v(s))/{rs}
meas tran seventh integ pr from={six_periods_s} to={seven_periods_s}
meas tran eighth integ pr from={seven_periods_s} to={stop_s}
echo "ENERGY $&seventh $&eighth" > energy.txt
wrdata ring.txt v(d)
quit
.endc
.end
"""


LOSS_PERIODS = 8


def loss_periods() -> tuple[np.ndarray, np.ndarray, tuple[float, float]]:
    """(time, node volts, (Rs energy of period 7, of period 8)) from ngspice's transient and its
    ``meas tran … integ`` of the resistor's power (v(d) − v(s))²/Rs. The converter starts from
    rest; by the seventh period the DCM valley ring's state at turn-on repeats (the two energies
    agree to a few parts per million), which the tests check."""
    period_s = 1 / LOSS_FSW_HZ
    netlist = LOSS_NETLIST.format(
        off_s=period_s - 1.5e-6,
        period_s=period_s,
        six_periods_s=(LOSS_PERIODS - 2) * period_s,
        seven_periods_s=(LOSS_PERIODS - 1) * period_s,
        stop_s=LOSS_PERIODS * period_s,
        rs=LOSS_RS_OHM,
        cs=LOSS_CS_F,
    )
    t_s, volts = ngspice_transient(netlist)
    folder = _work_folder() / f"run{abs(hash(netlist)):x}"
    words = (folder / "energy.txt").read_text().split()
    return t_s, volts, (float(words[1]), float(words[2]))
