"""The drivers end to end through pyvisa-py over real TCP sockets.

Two kinds of peer: a tiny scripted SCPI server defined here (a made-up scope family, error-queue
and failure cases), and the simulated bench (sim_instruments), which shares one flyback model.
"""

from __future__ import annotations

import math
import socket
import threading
import time
from collections.abc import Callable, Iterator
from pathlib import Path

import numpy as np
import pytest

from labseq_instruments.block import encode_block
from labseq_instruments.command_map import load_command_map
from labseq_instruments.errors import (
    BlockFormatError,
    ConnectionLost,
    InstrumentError,
    InstrumentTimeout,
    LimitError,
    ReplyFormatError,
    ScpiError,
    UnsafeTextError,
)
from labseq_instruments.limits import LoadLimits, SourceLimits
from labseq_instruments.roles import ElectronicLoad, LineSource, Oscilloscope, PowerMeter
from labseq_instruments.scpi import Identity, ScpiInstrument

Reply = str | bytes | None
Handler = Callable[[str], Reply]


#: A handler's reply for a command that fails in a way that makes the instrument discard the
#: rest of its program message (IEEE 488.2 6.1.6.1.1): what was answered so far is sent.
DISCARD_REST = "DISCARD_REST"


class ScriptedServer:
    """A one-client SCPI peer on loopback: logs every command, answers from a handler.

    ``handler(command)`` returns the reply (text gets a newline, bytes are sent as they are),
    None for no reply, ``"CLOSE"`` to close the connection or :data:`DISCARD_REST`. The replies
    to several queries in one message go out as one response message, joined by ``;`` with one
    newline (IEEE 488.2 8.4.1). ``SYST:ERR?`` is answered from ``errors`` then ``0,"No error"``.
    """

    def __init__(self, handler: Handler, errors: list[str] | None = None) -> None:
        self.handler = handler
        self.errors = list(errors or [])
        self.log: list[str] = []
        self.listener = socket.create_server(("127.0.0.1", 0))
        self.port = self.listener.getsockname()[1]
        self.connection: socket.socket | None = None
        self.thread = threading.Thread(target=self._serve, daemon=True)
        self.thread.start()

    @property
    def resource_name(self) -> str:
        return f"TCPIP::127.0.0.1::{self.port}::SOCKET"

    def _serve(self) -> None:
        try:
            connection, _ = self.listener.accept()
        except OSError:  # closed at teardown before a client came
            return
        self.connection = connection
        with connection, connection.makefile("rb") as lines:
            for line in lines:
                replies: list[bytes] = []
                for command in line.decode().strip().split(";"):
                    self.log.append(command)
                    if command.upper() == "SYST:ERR?":
                        reply: Reply = self.errors.pop(0) if self.errors else '0,"No error"'
                    else:
                        reply = self.handler(command)
                    if reply == "CLOSE":
                        return
                    if reply == DISCARD_REST:
                        break
                    if reply is not None:
                        replies.append(reply if isinstance(reply, bytes) else
                                       reply.encode() + b"\n")
                if len(replies) > 1:  # one response message: each without its newline
                    replies = [b";".join(reply.removesuffix(b"\n") for reply in replies) + b"\n"]
                for reply in replies:
                    connection.sendall(reply)

    def close(self) -> None:
        self.listener.close()


@pytest.fixture
def scripted() -> Iterator[Callable[..., ScriptedServer]]:
    servers: list[ScriptedServer] = []

    def start(handler: Handler, errors: list[str] | None = None) -> ScriptedServer:
        server = ScriptedServer(handler, errors)
        servers.append(server)
        return server

    yield start
    for server in servers:
        server.close()


def idn_only(command: str) -> Reply:
    return "Invented Instruments,IV-1,SN0042,1.2.3" if command == "*IDN?" else None


# -- base class: identity, error queue, failures ------------------------------------------


def test_identity_fields():
    # IEEE 488.2 10.14: four comma-separated fields; "0" stands for an absent field.
    assert Identity.parse("ACME Corp , X-9,0,v2.1\n") == Identity("ACME Corp", "X-9", "0", "v2.1")
    with pytest.raises(ReplyFormatError, match="4"):
        Identity.parse("only,three,fields")


def test_identify_and_clean_error_queue(scripted):
    server = scripted(idn_only)
    with ScpiInstrument.open(server.resource_name, name="box") as box:
        assert box.identify() == Identity("Invented Instruments", "IV-1", "SN0042", "1.2.3")
        box.configure("SOMETHING 1")
    # SCPI-1999 vol. 2 19.7 (SYSTem:ERRor): one read answering 0 means an empty queue.
    assert server.log == ["*IDN?", "SOMETHING 1", "SYST:ERR?"]


def test_error_queue_drained_and_first_error_raised(scripted):
    # SCPI-1999 vol. 2 19.7 and 21.8: <code>,"<message>", read until 0; -222 data out of range.
    server = scripted(idn_only, ['-222,"Data out of range"', '-113,"Undefined header"'])
    with ScpiInstrument.open(server.resource_name, name="box") as box:
        with pytest.raises(ScpiError) as caught:
            box.configure("VOLT 9E9")
        assert caught.value.code == -222
        assert caught.value.message == "Data out of range"
        assert caught.value.command == "VOLT 9E9"
        box.check_errors("next")  # queue left empty
    assert server.log.count("SYST:ERR?") == 4


def test_error_queue_loop_is_bounded(scripted):
    # A broken instrument whose queue never empties must not hang the driver.
    server = scripted(idn_only, ['-350,"Queue overflow"'] * 1000)
    with (
        ScpiInstrument.open(server.resource_name, name="box") as box,
        pytest.raises(InstrumentError, match="not empty after"),
    ):
        box.check_errors("X")


def test_timeout_names_instrument_resource_and_command(scripted):
    server = scripted(lambda command: None)
    with ScpiInstrument.open(server.resource_name, name="mute", timeout_s=0.2) as box:
        with pytest.raises(InstrumentTimeout) as caught:
            box.query("MEAS:VOLT?")
        text = str(caught.value)
        # pyvisa normalises the resource string (TCPIP -> TCPIP0); the label shows it so.
        assert "mute" in text and box.resource.resource_name in text and "MEAS:VOLT?" in text
        assert str(server.port) in text


def test_non_numeric_reply(scripted):
    server = scripted(lambda command: "OVERLOAD")
    with (
        ScpiInstrument.open(server.resource_name, name="meter") as box,
        pytest.raises(ReplyFormatError, match="'OVERLOAD'.*not a number"),
    ):
        box.query_float("MEAS:VOLT?")


def test_dropped_connection(scripted):
    server = scripted(lambda command: "CLOSE")
    box = ScpiInstrument.open(server.resource_name, name="gone", timeout_s=0.5)
    box.write("BYE")
    server.thread.join(timeout=2)
    with pytest.raises(ConnectionLost, match="gone"):
        for _ in range(50):  # the peer's reset arrives after the first write to a closed socket
            box.write("HELLO")
            time.sleep(0.01)
    box.close()


def test_open_refused_port():
    listener = socket.create_server(("127.0.0.1", 0))
    port = listener.getsockname()[1]
    listener.close()
    # pyvisa-py's non-blocking connect reports success; the first message finds the refusal.
    with (
        pytest.raises(ConnectionLost, match=f"{port}.*IDN"),
        ScpiInstrument.open(f"TCPIP::127.0.0.1::{port}::SOCKET", timeout_s=0.5) as box,
    ):
        box.identify()


# -- a made-up scope family: a new TOML map, no code change --------------------------------

KESTREL_MAP = """
family = "kestrel"
description = "Made-up family: other strings, other words, other scaling order"
channels = 2
vertical_divisions = 8
horizontal_divisions = 12
data_format = "int16"
byte_order = "little"
code_min = -32768
code_max = 32767
scaling_fields = ["y_origin", "y_increment", "_", "x_origin", "x_increment", "points"]
acquisition_done_reply = "STOPPED"

[words]
on_off = { on = "1", off = "0" }
slope = { rising = "UP", falling = "DOWN" }
data_format = { int16 = "WORD" }
byte_order = { little = "LSBF" }

[limits]
max_volts_per_div = 20.0
max_record_length = 50000

[commands]
channel_enable = "C{channel}:TRACE {value}"
channel_scale = "C{channel}:VDIV {value}"
channel_offset = "C{channel}:OFST {value}"
channel_coupling = "C{channel}:CPL {value}"
channel_bandwidth_limit = "C{channel}:BWL {value}"
channel_probe = "C{channel}:ATTN {value}"
timebase_scale = "TDIV {value}"
record_length = "MSIZ {value}"
trigger_source = "TRIG:SRC C{channel}"
trigger_level = "TRIG:LVL {value}"
trigger_slope = "TRIG:EDGE {value}"
trigger_position = "TRIG:DELAY {value}"
single = "ACQ:RUN ONCE"
stop = "ACQ:HALT"
acquisition_done_query = "ACQ:STATE?"
waveform_source = "WAVE:SRC C{channel}"
waveform_format = "WAVE:WIDTH {value}"
waveform_byte_order = "WAVE:ORDER {value}"
waveform_scaling_query = "WAVE:PRE?"
waveform_data_query = "WAVE:FETCH?"
measure_mean_query = "C{channel}:MEAN?"
"""

# Codes chosen to contain 0x0A bytes (10 and 2560), which must not end the binary read.
KESTREL_CODES = np.array([-32768, 10, 2560, 0, 32767, -5], dtype="<i2")


class KestrelScope:
    """What a kestrel scope answers: RUNNING twice, then STOPPED; a fixed record."""

    def __init__(self, definite: bool = True, fires: bool = True) -> None:
        self.state_queries = 0
        self.definite = definite
        self.fires = fires

    def __call__(self, command: str) -> Reply:
        if command == "ACQ:STATE?":
            self.state_queries += 1
            return "STOPPED" if self.fires and self.state_queries > 2 else "RUNNING"
        if command == "WAVE:PRE?":
            # y_origin, y_increment, (ignored), x_origin, x_increment, points
            return f"-1.5,0.25,77,-2E-06,1E-06,{KESTREL_CODES.size}"
        if command == "WAVE:FETCH?":
            return encode_block(KESTREL_CODES, definite=self.definite) + (
                b"\n" if self.definite else b""
            )
        if command == "C2:MEAN?":
            return "3.25E+01"
        if command == "C1:VDIV?":
            return "2.0"
        return None


@pytest.fixture
def kestrel_map(tmp_path: Path):
    path = tmp_path / "kestrel.toml"
    path.write_text(KESTREL_MAP)
    return load_command_map(path)


@pytest.mark.parametrize("definite", [True, False], ids=["definite", "indefinite"])
def test_new_family_needs_only_a_map(scripted, kestrel_map, definite):
    server = scripted(KestrelScope(definite=definite))
    with Oscilloscope.open(server.resource_name, command_map=kestrel_map) as scope:
        scope.configure_channel(1, volts_per_div=2.0, offset_v=-1.0, coupling="ac",
                                bandwidth_limit_hz=20e6, probe_ratio=10)
        scope.configure_timebase(seconds_per_div=1e-6, record_length=1000)
        scope.configure_trigger(1, level_v=1.5, slope="rising", position_fraction=0.25)
        scope.single()
        scope.wait_acquisition(timeout_s=5, poll_interval_s=0.001)
        waveform = scope.fetch_waveform(1)
        assert scope.measure_mean_v(2) == 32.5
        assert scope.query_setting("channel_scale", channel=1) == "2.0"
    sent = [command for command in server.log if command != "SYST:ERR?"]
    assert sent[:7] == [
        "C1:TRACE 1", "C1:ATTN 10.0", "C1:VDIV 2.0", "C1:OFST -1.0", "C1:BWL 20000000.0",
        "C1:CPL AC", "TDIV 1e-06",
    ]
    assert "MSIZ 1000" in sent
    assert sent[sent.index("TRIG:SRC C1"):sent.index("TRIG:SRC C1") + 4] == [
        "TRIG:SRC C1", "TRIG:LVL 1.5", "TRIG:EDGE UP", "TRIG:DELAY 0.25",
    ]
    waveform_commands = [command for command in sent if command.startswith("WAVE")]
    assert waveform_commands == [
        "WAVE:SRC C1", "WAVE:WIDTH WORD", "WAVE:ORDER LSBF", "WAVE:PRE?", "WAVE:FETCH?",
    ]
    # Every configuration step is checked: the next query after it is an error-queue read
    # (SCPI-1999 vol. 2 19.7).
    log = server.log
    for index, command in enumerate(log):
        if not command.endswith("?"):
            assert next(later for later in log[index:] if later.endswith("?")) == "SYST:ERR?"
    np.testing.assert_array_equal(waveform.codes, KESTREL_CODES)
    # volts = (code - y_reference) * y_increment + y_origin, y_reference absent -> 0.
    np.testing.assert_allclose(waveform.volts(), KESTREL_CODES * 0.25 - 1.5)
    np.testing.assert_allclose(waveform.time_s(), -2e-6 + np.arange(6) * 1e-6)
    assert waveform.clipped  # -32768 and 32767 are the family's code limits


def test_trigger_timeout_stops_the_scope(scripted, kestrel_map):
    server = scripted(KestrelScope(fires=False))
    with Oscilloscope.open(server.resource_name, command_map=kestrel_map) as scope:
        scope.single()
        with pytest.raises(InstrumentTimeout, match="trigger did not fire within 0.05 s"):
            scope.wait_acquisition(timeout_s=0.05, poll_interval_s=0.005)
    assert "ACQ:HALT" in server.log


def test_scope_limits_and_words_refused_before_sending(scripted, kestrel_map):
    server = scripted(KestrelScope())
    with Oscilloscope.open(server.resource_name, command_map=kestrel_map) as scope:
        with pytest.raises(LimitError, match=r"channel scale = 50 V/div .* 0.001 V/div to 20"):
            scope.configure_channel(1, volts_per_div=50.0)
        with pytest.raises(LimitError, match="record length = 100000 .* 100 to 50000"):
            scope.configure_timebase(1e-6, 100_000)
        with pytest.raises(LimitError, match="scope channel = 3"):
            scope.configure_trigger(3, level_v=1.0)
        with pytest.raises(LimitError, match="slope 'up' is not one of: rising, falling"):
            scope.configure_trigger(1, level_v=1.0, slope="up")
        with pytest.raises(UnsafeTextError, match="';'"):
            scope.configure_channel(1, volts_per_div=1.0, coupling="dc;*RST")
        with pytest.raises(UnsafeTextError):
            scope.configure_channel(1, volts_per_div=1.0, coupling="dc\n*RST")
        with pytest.raises(LimitError, match="not a finite number"):
            scope.configure_channel(1, volts_per_div=math.nan)
        with pytest.raises(LimitError, match="trigger position = 1.5"):
            scope.configure_trigger(1, level_v=0.0, position_fraction=1.5)
    assert server.log == []


def test_malformed_block_reply_is_refused(scripted, kestrel_map):
    def bad_block(command: str) -> Reply:
        if command == "WAVE:PRE?":
            return "0,1,0,0,1,3"
        return b"#9000000006\x00\x01\x00\x02\x00\x03XYZ\n" if command == "WAVE:FETCH?" else None

    server = scripted(bad_block)
    # IEEE 488.2 8.7.9: the block ends at its announced length; "XYZ" is not a terminator.
    with (
        Oscilloscope.open(server.resource_name, command_map=kestrel_map, timeout_s=1) as scope,
        pytest.raises(BlockFormatError, match="continues with b'X'"),
    ):
        scope.fetch_waveform(1)


# -- one round trip per fetch: scaling, data and error query in one program message ----------


@pytest.fixture
def kestrel_compound(tmp_path: Path):
    """The kestrel map for a kestrel that takes several queries in one program message."""
    path = tmp_path / "kestrel-compound.toml"
    path.write_text(KESTREL_MAP.replace("[words]", "compound_queries = true\n\n[words]"))
    return load_command_map(path)


class KestrelFetch(KestrelScope):
    """A kestrel whose data query can fail: queuing ``error`` (if given), and then discarding
    the rest of the message (``discard``) or answering with an empty block."""

    def __init__(self, error: str = "", discard: bool = False) -> None:
        super().__init__()
        self.error, self.discard = error, discard
        self.server: ScriptedServer | None = None

    def __call__(self, command: str) -> Reply:
        if command == "WAVE:FETCH?" and (self.error or self.discard):
            if self.error and self.server is not None:
                self.server.errors.append(self.error)
            return DISCARD_REST if self.discard else b"#10"
        return super().__call__(command)


def _kestrel_fetch(scripted, command_map, **behaviour) -> tuple[ScriptedServer, Oscilloscope]:
    kestrel = KestrelFetch(**behaviour)
    kestrel.server = server = scripted(kestrel)
    return server, Oscilloscope.open(server.resource_name, command_map=command_map, timeout_s=2)


SETTINGS = ["WAVE:SRC C1", "WAVE:WIDTH WORD", "WAVE:ORDER LSBF", "SYST:ERR?"]
# IEEE 488.2 7.4.1: the queries of one program message, separated by ';'; the error query
# (SCPI-1999 vol. 2 19.7) last, so it reports what the message itself queued.
FETCH = ["WAVE:PRE?", "WAVE:FETCH?", "SYST:ERR?"]


def test_compound_fetch_is_one_message_and_settings_go_once(scripted, kestrel_compound):
    server, scope = _kestrel_fetch(scripted, kestrel_compound)
    with scope:
        first, second = scope.fetch_waveform(1), scope.fetch_waveform(1)
    assert server.log == SETTINGS + FETCH + FETCH  # the settings once: nothing changed them
    for waveform in (first, second):
        np.testing.assert_array_equal(waveform.codes, KESTREL_CODES)
        np.testing.assert_allclose(waveform.volts(), KESTREL_CODES * 0.25 - 1.5)


def test_an_error_queued_by_the_fetch_is_raised_and_the_settings_resent(
    scripted, kestrel_compound
):
    server, scope = _kestrel_fetch(scripted, kestrel_compound, error='-230,"Data stale"')
    with scope:
        with pytest.raises(ScpiError) as caught:
            scope.fetch_waveform(1)
        # SCPI-1999 vol. 2 21.8.11: -230 "Data corrupt or stale"; named with the message.
        assert caught.value.code == -230
        assert caught.value.command == ";".join(FETCH)
        assert server.errors == []  # drained
        server.handler.error = ""
        scope.fetch_waveform(1)
    # After an error nothing is taken as known: the settings go again.
    assert server.log == SETTINGS + FETCH + ["SYST:ERR?"] + SETTINGS + FETCH


@pytest.mark.parametrize(
    ("error", "raised", "match"),
    [
        ('-230,"Data stale"', ScpiError, "-230"),
        ("", ReplyFormatError, "ended after 1 of 3 replies, and the error queue is empty"),
    ],
    ids=["error queued", "queue empty"],
)
def test_a_message_cut_short_by_a_failed_query_is_explained(
    scripted, kestrel_compound, error, raised, match
):
    # IEEE 488.2 6.1.6.1.1: after a failed command the instrument may discard the rest of the
    # message; here the data query fails and only the preamble is answered.
    server, scope = _kestrel_fetch(scripted, kestrel_compound, error=error, discard=True)
    with scope, pytest.raises(raised, match=match):
        scope.fetch_waveform(1)
    after = server.log[server.log.index("WAVE:FETCH?") + 1 :]
    assert after == ["SYST:ERR?"] * (2 if error else 1)  # the queue, read to explain it


def test_an_indefinite_block_cannot_share_a_response(scripted, kestrel_compound):
    server = scripted(KestrelScope(definite=False))
    with (
        Oscilloscope.open(server.resource_name, command_map=kestrel_compound, timeout_s=1) as scope,
        pytest.raises(BlockFormatError, match="set compound_queries = false"),
    ):
        scope.fetch_waveform(1)


# -- the simulated bench, end to end through pyvisa-py -------------------------------------

TELECOM_INPUT_V = 48.0
SOURCE_LIMITS = SourceLimits(max_voltage_v=264.0, max_current_a=5.0)
LOAD_LIMITS = LoadLimits(max_current_a=3.0)


@pytest.fixture
def bench_roles(sim_bench):
    """Source, load, meter and scope of a running simulated bench, closed after the test."""
    resources = sim_bench.resources
    roles = (
        LineSource.open(resources["source"], limits=SOURCE_LIMITS),
        ElectronicLoad.open(resources["load"], limits=LOAD_LIMITS),
        PowerMeter.open(resources["meter"]),
        Oscilloscope.open(resources["scope"]),
    )
    yield roles
    for role in roles:
        role.close()


def run_converter(source: LineSource, load: ElectronicLoad, load_a: float = 1.0) -> None:
    source.set_current_limit(3.0)
    source.set_dc(TELECOM_INPUT_V)
    load.set_current(load_a)
    source.set_output(True)
    load.set_input(True)


def test_every_role_identifies(bench_roles):
    for role in bench_roles:
        identity = role.identify()
        # IEEE 488.2 10.14 fields; the simulated bench's manufacturer field is labseq-sim.
        assert identity.manufacturer == "labseq-sim"
        assert identity.model and identity.serial and identity.firmware


def test_source_setpoints_read_back(bench_roles, sim_bench):
    source = bench_roles[0]
    source.set_dc(TELECOM_INPUT_V)
    assert source.query("SOUR:FUNC:SHAP?") == "DC"
    assert source.query_float("SOUR:VOLT?") == TELECOM_INPUT_V
    source.set_current_limit(2.5)
    assert source.query_float("SOUR:CURR:LIM?") == 2.5
    source.set_ac(230.0, 60.0)
    assert source.query("SOUR:FUNC:SHAP?") == "SIN"
    assert source.query_float("SOUR:VOLT?") == 230.0
    assert source.query_float("SOUR:FREQ?") == 60.0
    source.set_dc(TELECOM_INPUT_V)
    assert not source.is_on()
    source.set_output(True)
    assert source.is_on()
    # The readback is the programmed voltage within the reading noise (a 1 % bound).
    assert source.measure_voltage_v() == pytest.approx(TELECOM_INPUT_V, rel=0.01)
    source.close()
    assert not sim_bench.state.source_output_on  # closing switched the output off


def test_load_and_meter_readings_follow_the_converter(bench_roles, sim_bench):
    source, load, meter, _ = bench_roles
    run_converter(source, load, load_a=1.0)
    assert load.query("SOUR:FUNC?") == "CURR"
    assert load.query_float("SOUR:CURR?") == 1.0
    assert load.is_on()
    output_v = sim_bench.design.output_voltage_v
    # The load sees the DUT's regulated output and sinks its setpoint (1 % reading bounds).
    assert load.measure_voltage_v() == pytest.approx(output_v, rel=0.01)
    assert load.measure_current_a() == pytest.approx(1.0, rel=0.01)
    assert load.measure_power_w() == pytest.approx(output_v * 1.0, rel=0.02)
    reading = meter.measure()
    assert reading.voltage_v == pytest.approx(TELECOM_INPUT_V, rel=0.01)
    # Conservation of energy: input power exceeds output power; on DC, P = V * I and PF = 1.
    assert output_v < reading.power_w < 2 * output_v
    assert reading.power_w == pytest.approx(reading.voltage_v * reading.current_a, rel=0.02)
    assert reading.power_factor == pytest.approx(1.0, abs=0.01)
    load.close()
    assert not sim_bench.state.load_input_on  # closing switched the input off


def test_limits_refused_before_anything_is_sent(bench_roles, sim_bench):
    source, load, _, scope = bench_roles
    state = sim_bench.state
    with pytest.raises(LimitError, match=r"source voltage = 300 V .* 0 V to 264 V"):
        source.set_dc(300.0)
    # Both arguments are checked before the first command: the voltage did not change either.
    with pytest.raises(LimitError, match=r"source frequency = 400 Hz .* 45 Hz to 65 Hz"):
        source.set_ac(115.0, 400.0)
    with pytest.raises(LimitError, match="not a finite number"):
        source.set_current_limit(math.inf)
    with pytest.raises(LimitError, match=r"load current = 4 A .* 0 A to 3 A"):
        load.set_current(4.0)
    with pytest.raises(LimitError, match="load current = -1 A"):
        load.set_current(-1.0)
    assert (state.source_voltage_v, state.source_shape, state.source_current_limit_a) == (
        0.0, "DC", 1.0,
    )
    assert state.load_current_a == 0.0 and state.load_setpoints == 0
    coupling_before = scope.query_setting("channel_coupling", channel=1)
    with pytest.raises(UnsafeTextError):
        scope.configure_channel(1, volts_per_div=1.0, coupling="ac;*RST")
    with pytest.raises(LimitError, match="coupling 'gnd' is not one of: dc, ac"):
        scope.configure_channel(1, volts_per_div=1.0, coupling="gnd")
    assert scope.query_setting("channel_coupling", channel=1) == coupling_before


def test_scpi_error_when_our_limits_are_bypassed(bench_roles):
    source = bench_roles[0]
    source.write("SOUR:VOLT 1000")  # write() bypasses the limits; the instrument refuses it
    with pytest.raises(ScpiError) as caught:
        source.check_errors("SOUR:VOLT 1000")
    # SCPI-1999 vol. 2 21.8.9: -222 "Data out of range".
    assert caught.value.code == -222
    assert caught.value.command == "SOUR:VOLT 1000"
    assert "SOUR:VOLT 1000" in str(caught.value)
    with pytest.raises(ScpiError) as caught:
        source.configure("SOUR:WOBBLE 1")
    # SCPI-1999 vol. 2 21.8.4: -113 "Undefined header".
    assert caught.value.code == -113
    source.check_errors("after")  # the queue was drained


def test_capture_scaling_and_physics(bench_roles, sim_bench):
    source, load, _, scope = bench_roles
    run_converter(source, load, load_a=1.0)
    volts_per_div, offset_v, divisions = 20.0, 80.0, scope.map.vertical_divisions
    seconds_per_div, record_length, position = 1e-6, 10_000, 0.2
    trigger_v = 60.0
    scope.configure_channel(1, volts_per_div, offset_v=offset_v, probe_ratio=10.0)
    scope.configure_timebase(seconds_per_div, record_length)
    scope.configure_trigger(1, level_v=trigger_v, slope="rising", position_fraction=position)
    assert float(scope.query_setting("channel_scale", channel=1)) == volts_per_div
    scope.single()
    scope.wait_acquisition(timeout_s=30.0)
    waveform = scope.fetch_waveform(1)
    duration_s = seconds_per_div * scope.map.horizontal_divisions
    # Scaling as the shared SCPI command list defines it for int8 codes.
    assert waveform.codes.dtype == np.int8 and waveform.codes.size == record_length
    assert waveform.y_increment_v == pytest.approx(volts_per_div * divisions / 256)
    assert waveform.y_origin_v == pytest.approx(offset_v)
    assert waveform.x_increment_s == pytest.approx(duration_s / record_length)
    assert waveform.x_origin_s == pytest.approx(-position * duration_s)
    volts, time_s = waveform.volts(), waveform.time_s()
    # t = 0 is the trigger: the rising crossing of the trigger level nearest t = 0 lies within
    # two samples of it (a few samples allow for noise and trigger interpolation).
    rising = np.flatnonzero((volts[:-1] < trigger_v) & (volts[1:] >= trigger_v))
    nearest_s = time_s[rising[np.argmin(np.abs(time_s[rising]))]]
    assert abs(nearest_s) <= 2 * waveform.x_increment_s
    # Flyback off-state plateau = Vin + n * (Vout + Vf), the reflected voltage (from memory:
    # the standard flyback relation in power-supply design handbooks).
    design = sim_bench.design
    plateau_v = TELECOM_INPUT_V + design.turns_ratio * (
        design.output_voltage_v + design.rectifier_drop_v
    )
    high = volts[volts > (TELECOM_INPUT_V + plateau_v) / 2]
    counts, edges = np.histogram(high, bins=np.arange(high.min(), high.max() + 1.0, 1.0))
    mode_v = edges[np.argmax(counts)] + 0.5
    assert mode_v == pytest.approx(plateau_v, abs=3.0)
    assert not waveform.clipped
    # Inductor volt-second balance: the switch node's mean is the bus voltage (from memory:
    # the steady-state inductor relation of any power-electronics text).
    assert scope.measure_mean_v(1) == pytest.approx(TELECOM_INPUT_V, rel=0.03)


def test_no_trigger_times_out_and_stops(bench_roles):
    scope = bench_roles[3]  # converter off: the switch node never crosses the level
    scope.configure_trigger(1, level_v=50.0)
    scope.single()
    with pytest.raises(InstrumentTimeout, match="trigger did not fire within 0.2 s"):
        scope.wait_acquisition(timeout_s=0.2, poll_interval_s=0.02)
    assert scope.query(scope.map.command("acquisition_done_query")) == "0"
