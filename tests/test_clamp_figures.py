"""The RCD clamp's level and loss measured from a primary capture, against the simulated DUT's
own operating point (its integrated clamp-resistor energy and settled capacitor voltage).

Captures are made by the simulated scope's acquisition path (trigger, 1 GS/s sampling, front-end
bandwidth and noise, 8-bit quantisation over an 800 V screen) from the offline demo DUT's switch
node, at bus voltages covering DCM and CCM.

Tolerances: the level is the capacitor's voltage near the top of its ripple, read to one 8-bit
code (3.1 V on this screen) and corrected for the exponential discharge over the period; the
ripple's shape during conduction is not modelled, which leaves a few % of Vc. The sim's
``clamp_voltage_v`` is the rms-equivalent settled voltage above the bus (the voltage that
dissipates its integrated clamp energy in Rclamp), so Vc is checked within 3 % and the loss
(∝ Vc²) within 7 % — common practice for an RCD estimate, no published source.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from labseq.analysis import CaptureFigures, SnubberBranch, analyze_capture
from labseq.analysis.capture import ClampFigures, clamp_figures, clamp_level_v
from labseq_sim_instruments import scope
from labseq_sim_instruments.flyback import DEMO_DUTS, FlybackModel, load_dut

DESIGN = load_dut(DEMO_DUTS["offline_ac"])
MODEL = FlybackModel(DESIGN)
FSW_HZ = DESIGN.switching_frequency_hz

#: The demo sequence's primary channel: 80 V/div around 300 V, 20 µs at 1 GS/s, trigger 100 V.
SETTINGS = scope.AcquisitionSettings(
    timebase_s_per_div=2e-6,
    record_length=20_000,
    trigger_channel=1,
    trigger_level_v=100.0,
    trigger_rising=True,
    trigger_position=0.1,
).with_channel(1, display=True, scale_v_per_div=80.0, offset_v=300.0, probe_ratio=100.0)


def capture(bulk_v: float, load_a: float, seed: int) -> tuple[np.ndarray, float, float]:
    """Volts, sample interval and first sample time of one simulated primary capture."""
    op = MODEL.operating_point(bulk_v, load_a)
    taken = scope.acquire(
        {1: lambda t: MODEL.switch_node_v(op, t)},
        1.0 / FSW_HZ,
        SETTINGS,
        np.random.default_rng(seed),
    )
    assert taken is not None
    codes = np.frombuffer(taken.payload(1, "INT8", False), dtype="i1").astype(float)
    dt, t0, dv, v0 = scope.scaling(taken.settings, 1, "INT8")
    return codes * dv + v0, dt, t0


def analysed(
    bulk_v: float, load_a: float, seed: int = 1
) -> tuple[np.ndarray, float, float, CaptureFigures]:
    """A simulated primary capture and its analysis."""
    volts, dt, t0 = capture(bulk_v, load_a, seed)
    branch = SnubberBranch(DESIGN.snubber_resistance_ohm, DESIGN.snubber_capacitance_f, FSW_HZ)
    return volts, dt, t0, analyze_capture(volts, dt, t0, snubber=branch, rating_v=650.0)


def clamp(
    volts: np.ndarray,
    dt: float,
    t0: float,
    figures: CaptureFigures,
    line_v: float,
    line_is_ac: bool,
) -> ClampFigures | None:
    """The clamp figures of a capture with the demo DUT's clamp."""
    return clamp_figures(
        volts,
        dt,
        t0,
        figures,
        resistance_ohm=DESIGN.clamp_resistance_ohm,
        capacitance_f=DESIGN.clamp_capacitance_f,
        switching_frequency_hz=FSW_HZ,
        line_v=line_v,
        line_is_ac=line_is_ac,
    )


@pytest.mark.parametrize(
    ("bulk_v", "load_a"), [(125.0, 0.6), (125.0, 2.4), (250.0, 0.6), (370.0, 0.6), (370.0, 2.4)]
)
def test_clamp_loss_matches_the_simulated_dut(bulk_v: float, load_a: float) -> None:
    op = MODEL.operating_point(bulk_v, load_a)
    volts, dt, t0, figures = analysed(bulk_v, load_a)
    found = clamp(volts, dt, t0, figures, line_v=bulk_v, line_is_ac=False)
    assert found is not None and found.bus_method == "dc-line"
    # Clamp resistor loss Vc²/Rclamp (Fairchild AN-4147 RCD clamp relation, from memory) against
    # the sim's integrated clamp-resistor energy × fsw; tolerances in the module notes.
    assert found.clamp_loss_w == pytest.approx(op.clamp_loss_w, rel=0.07)
    assert found.clamp_voltage_v == pytest.approx(op.clamp_voltage_v - bulk_v, rel=0.03)
    # the flat top lies between the reflected plateau and the peak
    assert figures.worst.plateau_v < found.clamp_level_v <= figures.worst.peak_v


@pytest.mark.parametrize(("bulk_v", "load_a"), [(250.0, 0.6), (370.0, 0.6)])
def test_ac_bus_from_the_dcm_valley_ring(bulk_v: float, load_a: float) -> None:
    volts, dt, t0, figures = analysed(bulk_v, load_a)
    # An rms line whose √2·Vrms is 5 % above the bus: the valley ring must win over it.
    found = clamp(volts, dt, t0, figures, line_v=1.05 * bulk_v / math.sqrt(2), line_is_ac=True)
    assert found is not None and found.bus_method == "valley-ring"
    # In DCM the magnetising inductance rings around the bus once the secondary stops
    # conducting (volt-second balance on Lm; Erickson & Maksimović, DCM flyback), within 1 %.
    assert found.bus_v == pytest.approx(bulk_v, rel=0.01)


def test_ccm_ac_bus_falls_back_to_the_line_peak() -> None:
    volts, dt, t0, figures = analysed(370.0, 2.4)
    found = clamp(volts, dt, t0, figures, line_v=264.0, line_is_ac=True)
    assert found is not None and found.bus_method == "line-peak"
    assert found.bus_v == pytest.approx(264.0 * math.sqrt(2))


def test_no_clamp_level_without_a_spike_above_the_plateau() -> None:
    # A clipped top cannot be measured: the level is refused rather than guessed.
    volts, dt, t0, figures = analysed(370.0, 2.4)
    clipped = np.minimum(volts, figures.worst.plateau_v + 20.0)
    refigured = analyze_capture(
        clipped, dt, t0, full_scale_v=(-100.0, figures.worst.plateau_v + 20.0)
    )
    assert clamp_level_v(clipped, dt, t0, refigured.worst) is None
