"""The waveform snubber loss against the simulator's integrated Rs energy and ngspice's
``meas … integ`` of the same branch, at three noise levels.

Run: ``.venv/bin/python tests/loss_comparison.py`` (the ngspice part needs ngspice). The tests
(`tests/test_snubber_loss.py`) assert 3 %; this prints every figure.
"""

from __future__ import annotations

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).parent))

import ngspice_rings  # noqa: E402
import numpy as np  # noqa: E402
from waveforms import quantise  # noqa: E402

from labseq.analysis import SnubberBranch, analyze_capture  # noqa: E402
from labseq_sim_instruments.flyback import DEMO_DUTS, FlybackModel, load_dut  # noqa: E402

NOISE_LEVELS_V = (0.0, 0.5, 2.0)
SAMPLE_RATE_HZ = 2e9
SCOPE_RANGE_V = (-20.0, 180.0)


def scope(volts: np.ndarray, noise_v: float, seed: int) -> np.ndarray:
    """Gaussian noise and 8-bit quantisation over the scope range."""
    noisy = volts + np.random.default_rng(seed).normal(0.0, noise_v, volts.size)
    return quantise(noisy, bits=8, low_v=SCOPE_RANGE_V[0], high_v=SCOPE_RANGE_V[1])


def against_the_simulator() -> None:
    design = load_dut(DEMO_DUTS["telecom_dc"])
    snubber = SnubberBranch(
        design.snubber_resistance_ohm, design.snubber_capacitance_f, design.switching_frequency_hz
    )
    print("simulator: telecom DUT, 100 Ω / 220 pF, 2 GS/s, 8 bits over -20..180 V, 1.5 periods")
    for noise_v in NOISE_LEVELS_V:
        for bus_v, load_a in ((36.0, 0.2), (48.0, 1.0), (75.0, 2.2), (36.0, 2.2)):
            model = FlybackModel(design)
            point = model.operating_point(bus_v, load_a)
            t_s = np.arange(int(1.5 * model.period_s * SAMPLE_RATE_HZ)) / SAMPLE_RATE_HZ - 0.1e-6
            volts = scope(model.switch_node_v(point, t_s), noise_v, seed=1)
            edge = analyze_capture(volts, 1 / SAMPLE_RATE_HZ, float(t_s[0]), snubber=snubber).worst
            error = 100 * (edge.snubber_loss_w / point.snubber_loss_w - 1)
            print(
                f"  noise {noise_v:3.1f} V, {bus_v:3.0f} V {load_a:3.1f} A: integrated "
                f"{point.snubber_loss_w * 1e3:7.2f} mW, measured {edge.snubber_loss_w * 1e3:7.2f} "
                f"mW ({edge.snubber_loss_method}), {error:+5.2f} %"
            )


def against_ngspice() -> None:
    if ngspice_rings.NGSPICE is None:
        print("ngspice is not installed")
        return
    t_s, volts, (seventh_j, eighth_j) = ngspice_rings.loss_periods()
    period_s = 1 / ngspice_rings.LOSS_FSW_HZ
    print(
        f"ngspice: DCM flyback, 47 Ω / 470 pF; meas integ {seventh_j * 1e6:.4f} µJ (period 7), "
        f"{eighth_j * 1e6:.4f} µJ (period 8), {eighth_j / period_s * 1e3:.1f} mW"
    )
    snubber = SnubberBranch(
        ngspice_rings.LOSS_RS_OHM, ngspice_rings.LOSS_CS_F, ngspice_rings.LOSS_FSW_HZ
    )
    start_s = (ngspice_rings.LOSS_PERIODS - 2) * period_s - 0.2e-6
    uniform_t = np.arange(start_s, t_s[-1], 1 / SAMPLE_RATE_HZ)
    for noise_v in NOISE_LEVELS_V:
        record = scope(np.interp(uniform_t, t_s, volts), noise_v, seed=2)
        edges = analyze_capture(record, 1 / SAMPLE_RATE_HZ, start_s, snubber=snubber).edges
        figures = [
            f"{e.snubber_loss_w * 1e3:.1f} mW "
            f"({100 * (e.snubber_loss_w * period_s / eighth_j - 1):+.2f} %)"
            for e in edges
        ]
        print(f"  noise {noise_v:3.1f} V: " + ", ".join(figures))


if __name__ == "__main__":
    against_the_simulator()
    against_ngspice()
