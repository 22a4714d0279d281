"""Benches that do not speak labseq's generic commands: the simulator's second dialect, driven
only through command maps; the probe; the SCPI trace; and a VISA library other than pyvisa-py.

The second ("alt") dialect differs from the generic one in every way the maps must express:
other command trees, replies with headers, a full-scale range and a span in place of
per-division settings (scale factors), a trigger delay in seconds (a conversion), an ON/OFF
filter (a number table), unsigned codes, a preamble with text fields, separate scaling queries,
an ASCII transfer, a set-up command needed after *RST, and a source whose output is a stage.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pytest
from sweeps import DEMO_DC, demo_sequence, run_cli

from labseq.sequence import SequenceError, load_sequence
from labseq.store import Store
from labseq_instruments.command_map import MAPS_DIR, ROLE_COMMANDS, ROLES, load_command_map
from labseq_instruments.connection import Connection, SerialSettings
from labseq_instruments.errors import CommandMapError, LimitError, ScpiError
from labseq_instruments.limits import SourceLimits
from labseq_instruments.roles import LineSource, Oscilloscope
from labseq_instruments.transport import PyvisaPySocketTransport, VisaTransport
from labseq_sim_instruments.flyback import DEMO_DUTS, load_dut

HERE = Path(__file__).resolve().parent
ALT_MAPS = 'maps = { source = "alt", load = "alt", meter = "alt", scope = "alt" }'


def _alt_scope_map(tmp_path: Path, old: str, new: str) -> Path:
    """The alt scope map with one edit, written beside the test."""
    text = (MAPS_DIR / "scope" / "alt.toml").read_text(encoding="utf-8")
    assert old in text, old
    path = tmp_path / "scope-variant.toml"
    path.write_text(text.replace(old, new, 1), encoding="utf-8")
    return path


def _captured(scope: Oscilloscope, source: LineSource | None = None) -> None:
    """Set up the scope as the demo does and trigger one capture at once."""
    scope.start()
    scope.configure_channel(1, 20.0, 0.0, "dc", 0.0, 10.0)
    scope.configure_timebase(200e-9, 10_000)
    scope.configure_trigger(1, 60.0, "rising", 0.1)
    scope.single()
    scope.force_trigger()
    scope.wait_acquisition(30)


# --------------------------------------------------------------------------- the whole sweep


def _sweep(tmp_path: Path, make_sim_bench, dialect: str) -> Store:
    """The whole DC demo sweep on a simulated bench of ``dialect``; the sequence differs from
    the demo's only by the bench's resources and, for alt, by the maps it names."""
    probe = load_sequence(demo_sequence(tmp_path, name="probe.toml"))
    design = load_dut(DEMO_DUTS["telecom_dc"]).with_snubber(
        probe.snubber.resistance_ohm, probe.snubber.capacitance_f
    )
    sim = make_sim_bench(design=design, dialect=dialect)
    path = demo_sequence(tmp_path, resources=sim.resources, name=f"{dialect}.toml")
    if dialect == "alt":
        text = path.read_text(encoding="utf-8").replace('scope_map = "generic"', ALT_MAPS)
        path.write_text(text, encoding="utf-8")
    db = tmp_path / f"{dialect}.sqlite"
    trace = tmp_path / f"{dialect}.trace"
    code, _out, err = run_cli(
        "run", str(path), "--db", str(db), "--quiet", "--yes", "--trace", str(trace)
    )
    assert code == 0, err
    sent = [line.split(" > ", 1)[1] for line in trace.read_text().splitlines() if " > " in line]
    setpoints = [command for command in sent if command.startswith((":LOAD:CC ", "SOUR:CURR "))]
    assert len(setpoints) == 16  # one load setpoint per point of the grid, in the trace
    assert not sim.state.source_output_on and not sim.state.load_input_on
    return Store(db, create=False)


def test_whole_demo_sweep_runs_on_the_second_dialect_with_only_maps_changed(
    tmp_path, make_sim_bench
):
    with (
        _sweep(tmp_path, make_sim_bench, "alt") as alt,
        _sweep(tmp_path, make_sim_bench, "generic") as generic,
    ):
        [alt_run], [generic_run] = alt.runs(), generic.runs()
        assert alt_run.status == generic_run.status == "finished"
        assert alt_run.points_done == alt_run.points_total == 16
        assert "oscilloscope-alt" in alt_run.instruments["scope"]["model"]
        # Same physics behind both dialects, so the same verdicts and the same figures: the
        # captures differ only by the trigger delay's round trip through seconds (~1e-16).
        alt_points, generic_points = alt.points(1), generic.points(1)
        assert [p.verdict for p in alt_points] == [p.verdict for p in generic_points]
        for a, g in zip(alt_points, generic_points, strict=True):
            assert a.load_current_a == pytest.approx(g.load_current_a, rel=1e-3)
            assert a.meter_power_w == pytest.approx(g.meter_power_w, rel=1e-3)
        alt_codes = [c.codes for c in alt.iter_captures(1)]
        generic_codes = [c.codes for c in generic.iter_captures(1)]
        assert len(alt_codes) == len(generic_codes) == 16 * 3
        differing = [
            np.count_nonzero(a.astype(int) != g.astype(int))
            for a, g in zip(alt_codes, generic_codes, strict=True)
        ]
        assert max(differing) <= 0.001 * alt_codes[0].size


# --------------------------------------------------------------------------- map features


def test_unsigned_codes_preamble_queries_and_ascii_give_the_same_volts(tmp_path, make_sim_bench):
    bench = make_sim_bench(dialect="alt")
    per_field = _alt_scope_map(
        tmp_path,
        'scaling_fields = ["_", "_", "points", "x_increment", "x_reference", "y_increment", '
        '"y_origin",\n                  "y_reference", "_", "_"]',
        "[scaling_queries]\n"
        'x_increment = ":TRANsfer:XINCrement?"\nx_reference = ":TRANsfer:XREFerence?"\n'
        'y_increment = ":TRANsfer:YINCrement?"\ny_origin = ":TRANsfer:YORigin?"\n'
        'y_reference = ":TRANsfer:YREFerence?"\npoints = ":TRANsfer:POINts?"\n',
    )
    ascii_text = _alt_scope_map(tmp_path, 'data_format = "uint8"', 'data_format = "ascii"')
    with Oscilloscope.open(bench.resources["scope"], command_map="alt") as scope:
        _captured(scope)
        preamble = scope.fetch_waveform(1)
    waveforms = {}
    for name, map_path in (("queries", per_field), ("ascii", ascii_text)):
        with Oscilloscope.open(
            bench.resources["scope"], command_map=load_command_map(map_path, "scope")
        ) as scope:
            waveforms[name] = scope.fetch_waveform(1)  # the same capture, fetched again
    # 0..255 around 128 arrive as int8 codes with the reference moved to 0 (exact), and the
    # volts match the sim's channel: 10 divisions of 20 V over 256 codes.
    assert preamble.codes.dtype == np.int8 and preamble.y_reference == 0.0
    assert preamble.y_increment_v == pytest.approx(200.0 / 256)
    assert (preamble.code_min, preamble.code_max) == (-128, 127)
    # The trigger delay went out in seconds, (0.5 - 0.1) x 2 us, and came back as 10 % of the
    # record before the trigger: x_origin = -0.1 x 2 us.
    assert preamble.x_origin_s == pytest.approx(-0.2e-6, rel=1e-9)
    for other in waveforms.values():
        np.testing.assert_array_equal(other.volts(), preamble.volts())
        np.testing.assert_allclose(other.time_s(), preamble.time_s(), rtol=0, atol=1e-18)
    assert waveforms["ascii"].codes.dtype == np.float32


def test_set_up_commands_run_after_reset_and_headers_can_be_switched_off(tmp_path, make_sim_bench):
    bench = make_sim_bench(dialect="alt")
    without_setup = _alt_scope_map(tmp_path, 'setup = [":TRANsfer:SPAN FULL"]', "setup = []")
    with Oscilloscope.open(
        bench.resources["scope"], command_map=load_command_map(without_setup, "scope")
    ) as scope:
        scope.reset()
        _captured(scope)
        with pytest.raises(ScpiError, match="-221.*set :TRANsfer:SPAN FULL first"):
            scope.fetch_waveform(1)
    headers_off = tmp_path / "headers-off.toml"
    text = (MAPS_DIR / "scope" / "alt.toml").read_text(encoding="utf-8")
    text = text.replace("reply_headers = true", "reply_headers = false").replace(
        'setup = [":TRANsfer:SPAN FULL"]', 'setup = [":SYSTem:HEADer OFF", ":TRANsfer:SPAN FULL"]'
    )
    headers_off.write_text(text, encoding="utf-8")
    with Oscilloscope.open(
        bench.resources["scope"], command_map=load_command_map(headers_off, "scope")
    ) as scope:
        _captured(scope)
        assert scope.query(":ACQuire:STATus?") == "DONE"  # no header to strip
        assert scope.fetch_waveform(1).codes.size == 10_000


def test_number_tables_and_scales_refuse_before_sending(make_sim_bench):
    bench = make_sim_bench(dialect="alt")
    with Oscilloscope.open(bench.resources["scope"], command_map="alt") as scope:
        scope.start()
        with pytest.raises(LimitError, match="choose one of: 0, 2e\\+07"):
            scope.configure_channel(1, 20.0, probe_ratio=10.0, bandwidth_limit_hz=15e6)
        assert scope.query_setting("channel_scale", 1) == "+1.000000E+02"  # untouched
        scope.configure_channel(1, 20.0, probe_ratio=10.0, bandwidth_limit_hz=20e6)
        assert scope.query_setting("channel_bandwidth_limit", 1) == "ON"
        assert scope.query_setting("channel_scale", 1) == "+2.000000E+02"  # 10 div x 20 V
        with pytest.raises(LimitError, match="configure the timebase first"):
            scope.configure_trigger(1, 50.0)


def test_an_optional_command_left_out_refuses_only_what_needs_it(tmp_path, make_sim_bench):
    bench = make_sim_bench()
    text = (MAPS_DIR / "scope" / "generic.toml").read_text(encoding="utf-8")
    text = text.replace('channel_bandwidth_limit = ":CHANnel{channel}:BANDwidth {value}"', "")
    path = tmp_path / "no-filter.toml"
    path.write_text(text, encoding="utf-8")
    with Oscilloscope.open(bench.resources["scope"], command_map=str(path)) as scope:
        scope.configure_channel(1, 2.0)  # full bandwidth: nothing to send
        with pytest.raises(CommandMapError, match="no commands.channel_bandwidth_limit"):
            scope.configure_channel(1, 20.0, probe_ratio=10.0, bandwidth_limit_hz=20e6)


def test_second_dialect_source_switches_its_stage(make_sim_bench):
    bench = make_sim_bench(dialect="alt")
    limits = SourceLimits(max_voltage_v=60.0, max_current_a=3.0)
    with LineSource.open(bench.resources["source"], limits=limits, command_map="alt") as source:
        source.set_current_limit(2.5)
        assert source.read_back("current_limit") == "+2.500000E+03"  # milliamps on the wire
        source.set_dc(12.0)
        source.set_output(True)
        assert source.is_on() and bench.state.source_output_on
    assert not bench.state.source_output_on  # closing the driver switched it off


# --------------------------------------------------------------------------- probe and trace


@pytest.mark.parametrize("dialect", ["generic", "alt"])
def test_probe_reports_every_command_of_both_dialects(tmp_path, dialect):
    text = (HERE.parent / "labseq" / "examples" / "demo_dc_flyback.toml").read_text(
        encoding="utf-8"
    )
    if dialect == "alt":
        text = text.replace('scope_map = "generic"', f'sim_dialect = "alt"\n{ALT_MAPS}')
    sequence = tmp_path / "bench.toml"
    sequence.write_text(text, encoding="utf-8")
    trace = tmp_path / "trace.log"
    code, out, err = run_cli("probe", str(sequence), "--trace", str(trace))
    assert code == 0, out + err
    assert "only ever set OFF" in err
    sections = re.split(r"^(source|load|meter|scope) \(", out, flags=re.MULTILINE)[1:]
    reports = dict(zip(sections[::2], sections[1::2], strict=True))
    assert set(reports) == set(ROLES)
    for role, report in reports.items():
        keys = re.findall(r"^  (?:ok|failed|not mapped|skipped)\s+(\S+)", report, re.MULTILINE)
        assert set(ROLE_COMMANDS[role]) <= set(keys), (role, set(ROLE_COMMANDS[role]) - set(keys))
    assert " 0 failed" in out
    assert re.search(r"waveform_data_query .*\n.*-> 20000 points every 1e-09 s", out)
    # The trace: every exchange, with the wall-clock time and each reply's round trip.
    lines = trace.read_text(encoding="utf-8").splitlines()
    arm = ":ACQuire:ARM" if dialect == "alt" else ":SINGle"
    assert any(line.endswith(f"scope > {arm}") for line in lines)
    # The generic scope answers scaling, data and error query in one response message.
    block = r"block of 20000 bytes" + (';0,"No error"' if dialect == "generic" else "")
    assert any(re.search(rf"scope < .*{block}  \(\d+\.\d ms\)$", line) for line in lines)
    assert all(
        re.match(r"\d{4}-\d\d-\d\d \d\d:\d\d:\d\d\.\d{3}  (source|load|meter|scope) [<>] ", line)
        for line in lines
    )


def test_probe_says_which_commands_fail(tmp_path):
    # The generic maps against the alt bench: identification works, the rest fails by name.
    text = (HERE.parent / "labseq" / "examples" / "demo_dc_flyback.toml").read_text(
        encoding="utf-8"
    )
    sequence = tmp_path / "mismatch.toml"
    sequence.write_text(text.replace('scope_map = "generic"', 'sim_dialect = "alt"'))
    code, out, _err = run_cli("probe", str(sequence), "--role", "meter")
    assert code == 3  # instrument failures, not a judgement
    assert re.search(r"^  ok\s+\*IDN\?", out, re.MULTILINE)
    assert re.search(r"^  failed\s+measure_voltage\s+MEAS:VOLT\?", out, re.MULTILINE)
    assert "source (" not in out


# --------------------------------------------------------------------------- VISA libraries


def test_a_role_through_pyvisa_sim_takes_the_generic_transport():
    # pyvisa-sim (PyPI) is a VISA library of its own; the instrument is described in YAML.
    library = f"{HERE / 'visa_sim' / 'line_source.yaml'}@sim"
    connection = Connection(serial=SerialSettings(baud_rate=115200, parity="even"))
    limits = SourceLimits(max_voltage_v=60.0, max_current_a=3.0)
    with LineSource.open(
        "ASRL7::INSTR", visa_library=library, limits=limits, connection=connection
    ) as source:
        assert type(source.transport) is VisaTransport
        assert source.identify().model == "yaml-line-source"
        assert source.resource.baud_rate == 115200
        source.set_dc(24.5)
        source.set_current_limit(2.0)
        assert float(source.read_back("voltage")) == 24.5
        source.set_output(True)
        assert source.is_on()
        source.set_output(False)
        assert not source.is_on()
        assert source.measure_voltage_v() == 24.0
        with pytest.raises(LimitError):
            source.set_dc(61.0)  # the sequence's limit, checked before anything is sent


def test_generic_transport_reads_what_the_fast_socket_path_reads(make_sim_bench):
    bench = make_sim_bench()
    with Oscilloscope.open(bench.resources["scope"]) as scope:
        assert isinstance(scope.transport, PyvisaPySocketTransport)
        _captured(scope)
        fast = scope.fetch_waveform(1)
        scope.transport = VisaTransport(scope.resource, scope.label)  # public VISA calls only
        generic = scope.fetch_waveform(1)
        assert scope.identify().model == "oscilloscope"
    np.testing.assert_array_equal(generic.codes, fast.codes)
    assert generic.x_origin_s == fast.x_origin_s


# --------------------------------------------------------------------------- sequence keys


def _template_text() -> str:
    """The real-bench template, with its hazardous-voltage acknowledgement given (its 150 V
    switch is above ES1, so the file as shipped is refused until someone sets it)."""
    text = (HERE.parent / "labseq" / "examples" / "template_real_bench.toml").read_text(
        encoding="utf-8"
    )
    return text.replace(
        "hazardous_voltage_acknowledged = false", "hazardous_voltage_acknowledged = true"
    )


def test_bench_maps_aliases_and_connections_in_a_sequence(tmp_path):
    text = _template_text()
    text = text.replace('meter = "generic"', 'meter = "alt"').replace(
        'scope = "generic"', 'scope = "alt"'
    )
    text = text.replace('meter = "USB0::0x1234::0x5678::MTR0001::INSTR"', 'meter = "line_meter"')
    text = text.replace('source = "TCPIP0::192.168.1.21::inst0::INSTR"', 'source = "ASRL3::INSTR"')
    text = text.replace(
        "[bench.limits]",
        '[bench.connections.source]\nbaud_rate = 19200\nparity = "odd"\n'
        'read_termination = "crlf"\n\n[bench.limits]',
    )
    path = tmp_path / "bench.toml"
    path.write_text(text, encoding="utf-8")
    bench = load_sequence(path).bench
    assert bench.maps == {"source": "generic", "load": "generic", "meter": "alt", "scope": "alt"}
    assert bench.resources["meter"] == "line_meter"
    connection = bench.connections["source"]
    assert connection.read_termination == "\r\n" and connection.write_termination == "\n"
    assert connection.serial == SerialSettings(baud_rate=19200, parity="odd")

    bad = text.replace('scope = "alt"', 'scope = "nosuch"')
    bad = bad.replace(
        "[bench.connections.source]",
        "[bench.connections.scope]\nbaud_rate = 9600\n\n[bench.connections.source]",
    )
    bad = bad.replace('parity = "odd"', 'parity = "sideways"')
    path.write_text(bad, encoding="utf-8")
    with pytest.raises(SequenceError) as caught:
        load_sequence(path)
    message = str(caught.value)
    assert "bench.maps.scope: unknown scope family 'nosuch'; shipped: alt, generic" in message
    assert "not a serial port (ASRL...)" in message
    assert "parity" in message and "sideways" in message


def test_the_sequence_takes_the_simulator_dialects(tmp_path):
    from labseq_sim_instruments.instruments import DIALECTS

    text = DEMO_DC.read_text(encoding="utf-8")
    for dialect in DIALECTS:
        path = tmp_path / f"{dialect}.toml"
        path.write_text(text.replace('scope_map = "generic"', f'sim_dialect = "{dialect}"'))
        assert load_sequence(path).bench.settings.dialect == dialect
    path.write_text(text.replace('scope_map = "generic"', 'sim_dialect = "klingon"'))
    with pytest.raises(SequenceError, match=r"bench\.sim_dialect: 'klingon' is not valid; "):
        load_sequence(path)


def test_with_no_library_named_pyvisa_library_is_honoured(tmp_path, monkeypatch):
    # A sequence without visa_library leaves the choice to PyVISA, which reads PYVISA_LIBRARY
    # (then ~/.pyvisarc): here it names pyvisa-sim with our instrument description.
    text = _template_text()
    text = text.replace('source = "TCPIP0::192.168.1.21::inst0::INSTR"', 'source = "ASRL7::INSTR"')
    path = tmp_path / "bench.toml"
    path.write_text(text, encoding="utf-8")
    sequence = load_sequence(path)
    assert sequence.bench.visa_library == ""
    monkeypatch.setenv("PYVISA_LIBRARY", f"{HERE / 'visa_sim' / 'line_source.yaml'}@sim")
    from labseq.bench import open_driver

    with open_driver(sequence, dict(sequence.bench.resources), "source") as source:
        assert source.identify().model == "yaml-line-source"


def test_probe_of_an_instrument_that_cannot_be_reached(tmp_path, make_sim_bench):
    bench = make_sim_bench()
    resources = dict(bench.resources, meter="TCPIP::127.0.0.1::1::SOCKET")  # nothing listens
    path = demo_sequence(tmp_path, resources=resources)
    code, out, err = run_cli("probe", str(path), "--role", "meter", "--role", "load")
    assert code == 3 and "Traceback" not in out + err
    meter = out.split("load (")[0]
    assert re.search(r"^  failed\s+\*IDN\?", meter, re.MULTILINE)
    assert re.search(r"^  skipped\s+measure_voltage\s*\n.*did not identify itself", meter, re.M)
    assert meter.count("failed") == 1
    assert re.search(r"^  ok\s+measure_power\s+MEAS:POW\?", out, re.MULTILINE)  # the load's
