"""Snubber resistor loss from the waveform: against the simulator's integrated resistor energy and
ngspice's ``meas … integ`` of the same branch, the noise it must not count, and the record length
it needs (``labseq check`` warns; the report names the method beside every loss)."""

from __future__ import annotations

import math

import ngspice_rings
import numpy as np
import pytest
from sweeps import demo_sequence, run_cli
from waveforms import quantise, record

from labseq.analysis import SnubberBranch, analyze_capture
from labseq.analysis.capture import record_noise_rms_v
from labseq.analysis.snubber import branch_resistor_power_w, period_means_w
from labseq.review import review_run
from labseq.runner import run_sequence
from labseq.sequence import load_sequence
from labseq.store import Store
from labseq_sim_instruments.flyback import DEMO_DUTS, FlybackModel, load_dut

SAMPLE_RATE_HZ = 2e9
SCOPE_RANGE_V = (-20.0, 180.0)
NOISE_V = 0.5


@pytest.fixture(scope="module")
def design():
    return load_dut(DEMO_DUTS["telecom_dc"])


def sim_record(design, bus_v: float, load_a: float, periods: float, noise_v: float = NOISE_V):
    """The simulator's switch node over ``periods`` switching periods from just before a
    turn-off, with noise and 8-bit quantisation, and the model's operating point."""
    model = FlybackModel(design)
    point = model.operating_point(bus_v, load_a)
    t_s = np.arange(int(periods * model.period_s * SAMPLE_RATE_HZ)) / SAMPLE_RATE_HZ - 0.1e-6
    volts = model.switch_node_v(point, t_s)
    noisy = volts + np.random.default_rng(11).normal(0.0, noise_v, volts.size)
    digitised = quantise(noisy, bits=8, low_v=SCOPE_RANGE_V[0], high_v=SCOPE_RANGE_V[1])
    return digitised, float(t_s[0]), point


def branch(design) -> SnubberBranch:
    return SnubberBranch(
        design.snubber_resistance_ohm, design.snubber_capacitance_f, design.switching_frequency_hz
    )


@pytest.mark.parametrize(("bus_v", "load_a"), [(36.0, 0.2), (48.0, 1.0), (75.0, 2.2), (36.0, 2.2)])
def test_waveform_loss_matches_the_simulators_resistor_energy(design, bus_v, load_a) -> None:
    volts, t0, point = sim_record(design, bus_v, load_a, periods=1.5)
    figures = analyze_capture(volts, 1 / SAMPLE_RATE_HZ, t0, snubber=branch(design))
    # Reference: the simulator's own Rs energy per period, integrated with the network's state
    # (scipy.integrate.solve_ivp), times fsw. Within 3 %.
    for edge in figures.edges:
        assert edge.snubber_loss_method == "waveform"
        assert edge.snubber_loss_w == pytest.approx(point.snubber_loss_w, rel=0.03)


def test_scope_noise_is_not_counted_as_loss(design) -> None:
    volts, t0, point = sim_record(design, 36.0, 0.2, periods=1.5)
    dt = 1 / SAMPLE_RATE_HZ
    figures = analyze_capture(volts, dt, t0, snubber=branch(design))
    # Without the noise measured in the record, 0.5 V rms (plus the 8-bit quantisation) across
    # 100 Ω would read as σ²/Rs ≈ 3 mW, 4 % of this light-load loss.
    power = branch_resistor_power_w(volts, dt, branch(design))
    period_s = 1 / design.switching_frequency_hz
    start = figures.edges[0].edge_time_s - t0 - 0.5 * period_s
    raw_w = float(period_means_w(power, dt, np.array([max(start, 1e-7)]), period_s)[0])
    assert raw_w > 1.03 * point.snubber_loss_w
    assert figures.edges[0].snubber_loss_w == pytest.approx(point.snubber_loss_w, rel=0.01)


@pytest.mark.parametrize("noise_v", [0.0, 0.5, 2.0])
def test_noise_level_is_measured_off_the_edges(noise_v: float) -> None:
    volts, _, _ = record(fs_hz=2e9, duration_s=12e-6)
    rng = np.random.default_rng(5)
    measured = record_noise_rms_v(volts + rng.normal(0.0, noise_v, volts.size))
    # Reference: the standard deviation of the noise added (numpy's Gaussian generator); the
    # edges and rings of the record must not count.
    assert measured == pytest.approx(noise_v, rel=0.03, abs=1e-6)


@pytest.mark.skipif(ngspice_rings.NGSPICE is None, reason="ngspice is not installed")
@pytest.mark.parametrize("noise_v", [0.0, 0.5, 2.0])
def test_waveform_loss_matches_ngspice_meas_integ(noise_v: float) -> None:
    t_s, volts, (seventh_j, eighth_j) = ngspice_rings.loss_periods()
    # The converter has reached its periodic state: two periods dissipate the same energy.
    assert seventh_j == pytest.approx(eighth_j, rel=1e-4)
    period_s = 1 / ngspice_rings.LOSS_FSW_HZ
    uniform_t = np.arange((ngspice_rings.LOSS_PERIODS - 2) * period_s - 0.2e-6, t_s[-1], 0.5e-9)
    uniform_v = np.interp(uniform_t, t_s, volts)
    noisy = uniform_v + np.random.default_rng(2).normal(0.0, noise_v, uniform_v.size)
    digitised = quantise(noisy, bits=8, low_v=SCOPE_RANGE_V[0], high_v=SCOPE_RANGE_V[1])
    snubber = SnubberBranch(
        ngspice_rings.LOSS_RS_OHM, ngspice_rings.LOSS_CS_F, ngspice_rings.LOSS_FSW_HZ
    )
    figures = analyze_capture(digitised, 0.5e-9, float(uniform_t[0]), snubber=snubber)
    # Reference: ngspice's `meas tran … integ` of (v(d) − v(s))²/Rs over the last period, times
    # fsw. Within 3 %.
    for edge in figures.edges:
        assert edge.snubber_loss_method == "waveform"
        assert edge.snubber_loss_w == pytest.approx(eighth_j / period_s, rel=0.03)


def test_a_short_record_gets_cv2f_and_says_so(design) -> None:
    # 5 µs at 200 kHz: one period, and no room for the branch's start-up.
    volts, t0, point = sim_record(design, 48.0, 1.0, periods=1.0)
    figures = analyze_capture(volts, 1 / SAMPLE_RATE_HZ, t0, snubber=branch(design))
    assert {edge.snubber_loss_method for edge in figures.edges} == {"cv2f"}
    edge = figures.worst
    # Severns: P = Cs·V²·fsw with V the edge's step.
    assert edge.snubber_loss_w == pytest.approx(
        design.snubber_capacitance_f * (edge.plateau_v - edge.base_v) ** 2 * 200e3
    )


def short_record_sequence(tmp_path):
    path = demo_sequence(tmp_path, lines=["48 V"], loads=["1.1 A"], captures=1)
    text = path.read_text()
    assert 'time_per_div = "2 us"' in text
    path.write_text(text.replace('time_per_div = "2 us"', 'time_per_div = "500 ns"'))
    return path


def test_check_warns_before_a_run_whose_record_is_too_short(tmp_path) -> None:
    code, out, err = run_cli("check", str(short_record_sequence(tmp_path)))
    assert code == 0, err
    text = " ".join(out.split())
    # 10 divisions of 500 ns = 5 µs < 1/200 kHz + 5·100 Ω·220 pF = 5.11 µs.
    assert "warning: node primary: the record spans 5 µs" in text
    assert "5.11 µs" in text and "Cs·V²·fsw" in text
    code, out, _ = run_cli("check", str(demo_sequence(tmp_path, name="ok.toml")))
    assert code == 0 and "warning" not in out


def test_report_names_the_method_beside_every_loss(tmp_path) -> None:
    db = tmp_path / "runs.sqlite"
    with Store(db) as store:
        run_sequence(load_sequence(short_record_sequence(tmp_path)), store)
        run_sequence(load_sequence(demo_sequence(tmp_path, lines=["48 V"], loads=["1.1 A"],
                                                 captures=1, name="long.toml")), store)  # fmt: skip
        short, long = review_run(store, 1), review_run(store, 2)
    assert short.loss_method(short.points[0]) == "Cs·V²·fsw"
    assert long.loss_method(long.points[0]) == "waveform"
    code, _, err = run_cli("report", "1", "--db", str(db), "--out", str(tmp_path / "r1"))
    assert code == 0, err
    html = (tmp_path / "r1" / "report.html").read_text()
    assert "(Cs·V²·fsw)" in html and "probe sits across the whole branch" in html
    assert not math.isnan(short.points[0].value("snubber_loss_w"))
    code, _, err = run_cli("compare", "1", "2", "--db", str(db), "--report", str(tmp_path / "c"))
    assert "Traceback" not in err
    compare_html = " ".join((tmp_path / "c" / "report.html").read_text().split())
    assert "Each cell names its method" in compare_html
