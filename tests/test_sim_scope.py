"""The simulated bench through pyvisa + pyvisa-py, the path a real bench takes, and the scope's
acquisition functions on their own."""

from __future__ import annotations

import math
import time
from collections.abc import Callable, Iterator

import numpy as np
import pytest
import pyvisa

from labseq_sim_instruments import scope as acquisition
from labseq_sim_instruments.bench import SimBench
from labseq_sim_instruments.flyback import DEMO_DUTS, FlybackDesign, load_dut

LINE_V = 48.0
LOAD_A = 2.0

Instruments = dict[str, pyvisa.resources.MessageBasedResource]


@pytest.fixture
def open_bench() -> Iterator[Callable[[SimBench], Instruments]]:
    """Factory: open every role of a bench through pyvisa-py; closed after the test."""
    manager = pyvisa.ResourceManager("@py")

    def open_all(bench: SimBench) -> Instruments:
        return {
            role: manager.open_resource(
                resource, read_termination="\n", write_termination="\n", timeout=5000
            )
            for role, resource in bench.resources.items()
        }

    yield open_all
    manager.close()


@pytest.fixture
def running(sim_bench: SimBench, open_bench: Callable[[SimBench], Instruments]) -> Instruments:
    """The telecom demo DUT switching at 48 V in, 2 A out; scope probe 10:1."""
    bench = open_bench(sim_bench)
    # Each ends with *OPC? so that it is done before another instrument is asked (IEEE 488.2).
    bench["source"].query(f"SOUR:FUNC:SHAP DC;SOUR:VOLT {LINE_V};SOUR:CURR:LIM 3;OUTP ON;*OPC?")
    bench["load"].query(f"SOUR:FUNC CURR;SOUR:CURR {LOAD_A};INP ON;*OPC?")
    bench["scope"].write(":CHAN1:PROB 10;:CHAN1:DISP ON")
    return bench


def read_errors(instrument: pyvisa.resources.MessageBasedResource) -> list[int]:
    codes = []
    while (code := int(instrument.query("SYST:ERR?").split(",")[0])) != 0:
        codes.append(code)
    return codes


def capture(
    scope: pyvisa.resources.MessageBasedResource, setup: str, data_format: str = "INT8"
) -> tuple[np.ndarray, np.ndarray, np.ndarray, list[float]]:
    """Arm, wait, transfer channel 1: (times s, volts, raw values, scaling fields)."""
    scope.write(f"{setup};:WAV:SOUR CHAN1;:WAV:FORM {data_format};:SING")
    deadline = time.monotonic() + 10
    while scope.query(":ACQ:READ?") != "1":
        assert time.monotonic() < deadline, "acquisition never completed"
        time.sleep(0.005)
    return transfer(scope, data_format)


def transfer(
    scope: pyvisa.resources.MessageBasedResource, data_format: str = "INT8"
) -> tuple[np.ndarray, np.ndarray, np.ndarray, list[float]]:
    """Transfer the last capture's :WAV:SOUR channel: (times s, volts, raw values, scaling)."""
    scope.write(f":WAV:FORM {data_format}")
    scaling = [float(field) for field in scope.query(":WAV:SCAL?").split(",")]
    points, x_increment, x_origin, y_increment, y_origin, y_reference = scaling
    datatype = {"INT8": "b", "INT16": "h", "FLOAT32": "f"}[data_format]
    order = scope.query(":WAV:BORD?")
    # pyvisa parses the IEEE 488.2 §8.7.9 definite length block header itself.
    raw = scope.query_binary_values(
        ":WAV:DATA?", datatype=datatype, is_big_endian=order == "NORM", container=np.array
    )
    assert raw.size == points
    times = x_origin + np.arange(raw.size) * x_increment
    volts = (raw - y_reference) * y_increment + y_origin
    return times, volts, raw, scaling


def state_levels(volts: np.ndarray) -> tuple[float, float]:
    """Lower and upper state levels: the histogram mode in each half of the range (IEEE 181
    §5.2.1.2, histogram mode method)."""
    counts, edges = np.histogram(volts, bins=200)
    centres = (edges[:-1] + edges[1:]) / 2
    middle = 100
    return centres[np.argmax(counts[:middle])], centres[middle + np.argmax(counts[middle:])]


def test_each_role_identifies_itself(sim_bench: SimBench, open_bench: Callable) -> None:
    bench = open_bench(sim_bench)
    models = set()
    for instrument in bench.values():
        # IEEE 488.2 §10.14: four comma-separated fields.
        manufacturer, model, serial, firmware = instrument.query("*IDN?").split(",")
        assert manufacturer == "labseq-sim" and serial and firmware
        models.add(model)
    assert len(models) == 4


def test_settings_read_back(sim_bench: SimBench, open_bench: Callable) -> None:
    bench = open_bench(sim_bench)
    source, load, scope = bench["source"], bench["load"], bench["scope"]
    source.write("SOUR:FUNC:SHAP SIN;SOUR:VOLT 2.3E+02;SOUR:FREQ 60;SOUR:CURR:LIM 2.5")
    assert source.query("SOUR:FUNC:SHAP?") == "SIN"
    assert float(source.query("SOUR:VOLT?")) == 230.0
    assert float(source.query("SOUR:FREQ?")) == 60.0
    assert float(source.query("SOUR:CURR:LIM?")) == 2.5
    assert source.query("OUTP?") == "0"
    load.write("SOUR:FUNC CURR;SOUR:CURR 1.25;INP ON")
    assert (load.query("SOUR:FUNC?"), float(load.query("SOUR:CURR?"))) == ("CURR", 1.25)
    assert load.query("INP?") == "1" and sim_bench.state.load_input_on
    scope.write(":CHAN1:PROB 100;:CHAN1:SCAL 50;:CHAN1:OFFS 300;:CHAN1:BAND 20E6;:CHAN1:COUP AC")
    scope.write(":TIM:SCAL 200E-9;:ACQ:POIN 4000;:TRIG:SOUR CHAN1;:TRIG:LEV 150;:TRIG:SLOP NEG")
    scope.write(":TRIG:POS 0.25;:WAV:FORM INT16;:WAV:BORD SWAP")
    replies = scope.query(
        ":CHAN1:PROB?;:CHAN1:SCAL?;:CHAN1:OFFS?;:CHAN1:BAND?;:CHAN1:COUP?;:TIM:SCAL?;"
        ":ACQ:POIN?;:TRIG:SOUR?;:TRIG:LEV?;:TRIG:SLOP?;:TRIG:POS?;:WAV:FORM?;:WAV:BORD?"
    ).split(";")
    numbers = [float(value) for value in replies[:4]] + [float(replies[5]), float(replies[6])]
    assert numbers == [100.0, 50.0, 300.0, 20e6, 200e-9, 4000.0]
    assert replies[4] == "AC" and replies[7:] == [
        "CHAN1",
        "+1.500000E+02",
        "NEG",
        "+2.500000E-01",
        "INT16",
        "SWAP",
    ]
    assert read_errors(source) == read_errors(load) == read_errors(scope) == []


def test_every_setting_is_range_checked(sim_bench: SimBench, open_bench: Callable) -> None:
    bench = open_bench(sim_bench)
    for role, command in [
        ("source", "SOUR:VOLT 1000"),
        ("source", "SOUR:FREQ 5"),
        ("source", "SOUR:CURR:LIM -1"),
        ("load", "SOUR:CURR 100"),
        ("scope", ":ACQ:POIN 30E6"),
        ("scope", ":TIM:SCAL 100"),
        ("scope", ":TRIG:POS 1.5"),
        ("scope", ":CHAN1:PROB 10;:CHAN1:SCAL 500"),
    ]:
        bench[role].write(command)
        # SCPI-1999 vol. 2 §21.8.6: -222 data out of range.
        assert read_errors(bench[role]) == [-222], command
    assert float(bench["source"].query("SOUR:VOLT?")) == 0.0


def test_readings_follow_the_converter(running: Instruments, sim_bench: SimBench) -> None:
    meter, load = running["meter"], running["load"]
    input_w = float(meter.query("MEAS:POW?"))
    output_w = float(load.query("MEAS:POW?"))
    assert float(meter.query("MEAS:VOLT?")) == pytest.approx(LINE_V, rel=2e-3)
    assert float(load.query("MEAS:VOLT?")) == pytest.approx(
        sim_bench.design.output_voltage_v, rel=2e-3
    )
    assert float(load.query("MEAS:CURR?")) == pytest.approx(LOAD_A, rel=2e-3)
    assert 0.5 < output_w / input_w < 1.0  # conservation of energy: some input is lost
    assert float(meter.query("MEAS:POW:PFAC?")) <= 1.0
    # *OPC? makes the load finish before the meter is read (IEEE 488.2 §10.19).
    running["load"].query("INP OFF;*OPC?")  # converter stops: only the controller's standby
    assert float(meter.query("MEAS:POW?")) < 1.0


def test_capture_scaling_gives_volts_where_the_physics_says(
    running: Instruments, sim_bench: SimBench
) -> None:
    design = sim_bench.design
    setup = ":CHAN1:SCAL 20;:CHAN1:OFFS 60;:TIM:SCAL 500E-9;:ACQ:POIN 5000;:TRIG:LEV 30"
    _, volts, _, _ = capture(running["scope"], setup)
    base_v, plateau_v = state_levels(volts)
    # Switch on: Vds = Rds(on)·I, near 0 V (common practice, no published source).
    assert abs(base_v) < 2.0
    # Flyback off-state plateau Vds = Vin + n·(Vout + Vf) (textbook flyback relation, e.g.
    # Pressman, Switching Power Supply Design, flyback chapter; from memory).
    expected_v = LINE_V + design.turns_ratio * (design.output_voltage_v + design.rectifier_drop_v)
    assert plateau_v == pytest.approx(expected_v, rel=0.02)


def test_all_formats_and_byte_orders_give_the_same_volts(running: Instruments) -> None:
    scope = running["scope"]
    setup = ":CHAN1:SCAL 20;:CHAN1:OFFS 60;:TIM:SCAL 200E-9;:ACQ:POIN 1000;:TRIG:LEV 30"
    _, volts8, codes, scaling = capture(scope, setup, "INT8")
    lsb_v = scaling[3]
    assert codes.dtype == np.int8 and lsb_v == pytest.approx(20 * 10 / 256)
    for data_format, order in [("FLOAT32", "NORM"), ("INT16", "SWAP"), ("INT16", "NORM")]:
        scope.write(f":WAV:FORM {data_format};:WAV:BORD {order}")
        datatype = {"INT16": "h", "FLOAT32": "f"}[data_format]
        raw = scope.query_binary_values(
            ":WAV:DATA?", datatype=datatype, is_big_endian=order == "NORM", container=np.array
        )
        fields = [float(field) for field in scope.query(":WAV:SCAL?").split(",")]
        volts = (raw - fields[5]) * fields[3] + fields[4]
        # Same capture: 16-bit codes round the same analog value more finely than 8-bit ones.
        assert np.max(np.abs(volts - volts8)) <= 0.5 * lsb_v + 1e-3, data_format
    scope.write(":WAV:FORM INT16;:WAV:BORD NORM")
    assert float(scope.query(":WAV:SCAL?").split(",")[3]) == pytest.approx(20 * 10 / 65536)


def test_clipping_at_the_screen_edges(running: Instruments) -> None:
    scope = running["scope"]
    # Screen 0 V … 50 V: the 73 V plateau lies above it, so it clips to the top code.
    _, volts, codes, scaling = capture(
        scope, ":CHAN1:SCAL 5;:CHAN1:OFFS 25;:TIM:SCAL 500E-9;:ACQ:POIN 2000;:TRIG:LEV 20"
    )
    # Codes −128…127 span the screen, beyond it they stick at the ends (the command set of
    # instruments/command_maps/generic.toml; common practice, no published source).
    assert codes.max() == 127 and codes.min() >= -128
    assert np.count_nonzero(codes == 127) > 0.3 * codes.size
    assert volts.max() == pytest.approx(25 + 127 * scaling[3])
    # Screen 60 V … 110 V: the 0 V on-state lies below it and clips to the bottom code.
    _, _, codes, _ = capture(scope, ":CHAN1:OFFS 85;:TRIG:LEV 70")
    assert codes.min() == -128 and np.count_nonzero(codes == -128) > 0.2 * codes.size


@pytest.mark.parametrize("slope", ["POS", "NEG"])
def test_trigger_sits_at_time_zero(running: Instruments, slope: str) -> None:
    level_v = 40.0
    times, volts, _, scaling = capture(
        running["scope"],
        f":CHAN1:SCAL 20;:CHAN1:OFFS 60;:TIM:SCAL 200E-9;:ACQ:POIN 2000;:TRIG:POS 0.3;"
        f":TRIG:LEV {level_v};:TRIG:SLOP {slope}",
    )
    # The trigger point is at t = 0, x_origin = −position × duration (our command set;
    # common practice, no published source).
    assert scaling[2] == pytest.approx(-0.3 * 200e-9 * 10)
    zero = int(round(-scaling[2] / scaling[1]))
    assert times[zero] == pytest.approx(0.0, abs=1e-15)
    before, after = volts[zero - 3], volts[zero + 3]
    assert (before < level_v < after) if slope == "POS" else (before > level_v > after)


def test_trigger_that_cannot_fire_stays_pending_until_stop(
    running: Instruments, sim_bench: SimBench
) -> None:
    scope = running["scope"]
    scope.write(":CHAN1:SCAL 20;:ACQ:POIN 1000;:TRIG:SLOP POS;:TRIG:LEV 500;:SING")
    time.sleep(0.3)
    assert scope.query(":ACQ:READ?") == "0"  # the ring never reaches 500 V
    scope.write(":STOP")
    running["load"].query("INP OFF;*OPC?")  # converter stopped: the node sits at the bus
    scope.write(":TRIG:LEV 30;:SING")
    time.sleep(0.3)
    assert scope.query(":ACQ:READ?") == "0"
    running["load"].query("INP ON;*OPC?")  # the pending acquisition fires once edges return
    deadline = time.monotonic() + 5
    while scope.query(":ACQ:READ?") != "1":
        assert time.monotonic() < deadline
        time.sleep(0.01)
    assert read_errors(scope) == []


def test_repeated_transfer_answers_the_same_capture(running: Instruments) -> None:
    scope = running["scope"]
    capture(scope, ":CHAN1:SCAL 20;:CHAN1:OFFS 60;:ACQ:POIN 1000;:TRIG:LEV 30")
    first = scope.query_binary_values(":WAV:DATA?", datatype="b", container=np.array)
    second = scope.query_binary_values(":WAV:DATA?", datatype="b", container=np.array)
    assert np.array_equal(first, second)
    scope.write(":SING")  # a new acquisition draws new noise and jitter
    while scope.query(":ACQ:READ?") != "1":
        time.sleep(0.005)
    third = scope.query_binary_values(":WAV:DATA?", datatype="b", container=np.array)
    assert not np.array_equal(third, first)


def test_bus_mean_decays_after_the_source_is_off(running: Instruments) -> None:
    scope, source = running["scope"], running["source"]
    assert float(scope.query(":MEAS:DCL? CHAN1")) == pytest.approx(LINE_V, rel=2e-3)
    source.query("OUTP OFF;*OPC?")
    start_s, start_v = time.monotonic(), float(scope.query(":MEAS:DCL? CHAN1"))
    time.sleep(0.3)
    elapsed_s, end_v = time.monotonic() - start_s, float(scope.query(":MEAS:DCL? CHAN1"))
    tau_s = load_dut(DEMO_DUTS["telecom_dc"]).bus_bleed_time_constant_s
    # RC discharge v(t) = V0·exp(−t/τ) (any circuits textbook).
    assert end_v / start_v == pytest.approx(math.exp(-elapsed_s / tau_s), rel=0.01)
    assert end_v < start_v


def test_ac_line_acquisitions_fall_at_random_line_phases(
    make_sim_bench: Callable[..., SimBench], open_bench: Callable
) -> None:
    design: FlybackDesign = load_dut(DEMO_DUTS["offline_ac"])
    bench = open_bench(make_sim_bench(design))
    line_v = 100.0
    bench["source"].write(f"SOUR:FUNC:SHAP SIN;SOUR:FREQ 50;SOUR:VOLT {line_v};OUTP ON")
    bench["load"].write(f"SOUR:CURR {design.rated_load_a};INP ON")
    bench["scope"].write(":CHAN1:PROB 100")
    reflected_v = design.turns_ratio * (design.output_voltage_v + design.rectifier_drop_v)
    plateaus = []
    for _ in range(4):
        _, volts, _, _ = capture(
            bench["scope"],
            ":CHAN1:SCAL 50;:CHAN1:OFFS 150;:TIM:SCAL 1E-6;:ACQ:POIN 2000;:TRIG:LEV 100",
        )
        plateaus.append(state_levels(volts)[1])
    # Capacitor-input rectifier: the bus never exceeds the line peak √2·Vrms and sags between
    # peaks (textbook rectifier behaviour), so plateaus differ from capture to capture.
    assert max(plateaus) <= math.sqrt(2) * line_v + reflected_v + 5
    assert max(plateaus) - min(plateaus) > 2.0


# --------------------------------------------------------------------------- acquisition parts


def test_bandwidth_limit_is_minus_3_db_at_the_bandwidth() -> None:
    sample_rate_hz = 5e9
    times = np.arange(200_000) / sample_rate_hz
    for bandwidth_hz in (200e6, 20e6):
        for frequency_hz, gain in [(bandwidth_hz, 1 / math.sqrt(2)), (bandwidth_hz / 20, 1.0)]:
            tone = np.sin(2 * math.pi * frequency_hz * times)
            shaped = acquisition.limit_bandwidth(tone, sample_rate_hz, bandwidth_hz)
            amplitude = np.sqrt(2) * np.std(shaped[20_000:-20_000])
            # −3 dB (1/√2 in amplitude) at the bandwidth: the definition of analog bandwidth.
            assert amplitude == pytest.approx(gain, rel=0.01), (bandwidth_hz, frequency_hz)


def test_quantisation_and_noise_of_a_flat_channel() -> None:
    channel = acquisition.ChannelSettings(scale_v_per_div=1.0, offset_v=0.5, probe_ratio=1.0)
    rng = np.random.default_rng(1)
    trace = acquisition.front_end(np.zeros(100_000), channel, 1e9, rng)
    codes = acquisition.quantise(trace, channel, 8)
    lsb_v = channel.y_increment_v(8)
    assert lsb_v == 10 / 256
    # Flat 0 V sits at code −0.5/lsb = −12.8 → mean code ≈ −12.8 (volts = code·lsb + offset).
    assert codes.mean() * lsb_v + 0.5 == pytest.approx(0.0, abs=0.2 * lsb_v)
    # An 8-bit scope's noise floor is a fraction of an LSB rms (common practice, no published
    # source); quantising adds lsb/√12 (Widrow, quantisation noise model).
    assert 0.3 < np.std(codes) < 0.7
    clipped = acquisition.quantise(np.array([-100.0, 100.0]), channel, 8)
    assert clipped.tolist() == [-128, 127]


def test_trigger_search_finds_the_first_crossing_after_turn_off() -> None:
    period_s = 1e-6

    def ramp_and_ring(t_s: np.ndarray) -> np.ndarray:
        phase = np.mod(t_s, period_s)
        return np.where(phase < 0.5 * period_s, 100 * phase / (0.5 * period_s), 0.0)

    # Rising through 25 V: a quarter of the ramp; falling through 25 V: the drop at half period.
    assert acquisition.find_trigger_time_s(ramp_and_ring, period_s, 25.0, True) == pytest.approx(
        0.125 * period_s, rel=1e-6
    )
    falling = acquisition.find_trigger_time_s(ramp_and_ring, period_s, 25.0, False)
    assert falling == pytest.approx(0.5 * period_s, abs=period_s / acquisition.TRIGGER_SEARCH_STEPS)
    assert acquisition.find_trigger_time_s(ramp_and_ring, period_s, 150.0, True) is None
