"""The generic SCPI server against SCPI-1999 and IEEE 488.2, over a raw socket.

A tiny instrument declared here (a few table rows) also shows that a new role is a short class.
"""

from __future__ import annotations

import re
import signal
import subprocess
import sys
import threading
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import TYPE_CHECKING

import pytest

from labseq_sim_instruments.bench import SimBench
from labseq_sim_instruments.server import (
    ERROR_QUEUE_LENGTH,
    Block,
    Call,
    Command,
    HeaderPattern,
    ScpiServer,
    ServerConfigError,
    SimulatedInstrument,
    format_number,
)

if TYPE_CHECKING:
    from tests.conftest import RawScpiClient


class BenchSupply(SimulatedInstrument):
    """A minimal supply: voltage 0…100 V, an output switch, a per-channel scale, a data block."""

    identity = ("labseq-sim", "test-supply", "T0001", "0.1")

    def reset(self) -> None:
        self.voltage_v = 0.0
        self.output_on = False
        self.scales = {1: 1.0, 2: 1.0}

    def commands(self) -> list[Command]:
        def set_voltage(call: Call) -> None:
            self.voltage_v = call.number(0.0, 100.0, "V")

        def set_output(call: Call) -> None:
            self.output_on = call.boolean()

        def set_scale(call: Call) -> None:
            self.scales[call.suffix(1, 2)] = call.number(1e-3, 10.0, "V")

        return [
            Command(
                "SOURce:VOLTage[:LEVel]",
                setter=set_voltage,
                query=lambda _: format_number(self.voltage_v),
            ),
            Command("OUTPut[:STATe]", setter=set_output, query=lambda _: str(int(self.output_on))),
            Command(
                "CHANnel#:SCALe",
                setter=set_scale,
                query=lambda c: format_number(self.scales[c.suffix(1, 2)]),
            ),
            Command(
                "DATA:BLOCk",
                query=lambda c: Block(memoryview(bytes(range(c.integer(0, 255))))),
                query_params=(1, 1),
            ),
        ]


@pytest.fixture
def supply() -> Iterator[tuple[BenchSupply, ScpiServer]]:
    instrument = BenchSupply()
    instrument.reset()
    server = ScpiServer(instrument).start()
    yield instrument, server
    server.stop()


@pytest.fixture
def client(
    supply: tuple[BenchSupply, ScpiServer], raw_client: Callable[..., RawScpiClient]
) -> RawScpiClient:
    return raw_client(supply[1].port)


def volts(reply: str) -> float:
    return float(reply)


def test_short_and_long_forms_in_any_case(client: RawScpiClient) -> None:
    # SCPI-1999 vol. 1 §6.2.1: a header is its short form or its long form, case-insensitive.
    for header, value in [
        ("SOUR:VOLT", 1.0),
        ("SOURCE:VOLTAGE", 2.0),
        ("source:voltage", 3.0),
        ("Sour:Voltage", 4.0),
        (":SOUR:VOLT", 5.0),
    ]:
        client.write(f"{header} {value}")
        assert volts(client.query("sour:volt?")) == value
    assert client.errors() == []
    # Neither short nor long: an undefined header (SCPI-1999 vol. 2 §21.8.5, error -113).
    client.write("SOURC:VOLT 1")
    assert [code for code, _ in client.errors()] == [-113]


def test_optional_nodes_and_numeric_suffix(client: RawScpiClient) -> None:
    # SCPI-1999 vol. 1 §6.2.4 (optional nodes in brackets) and §6.2.5.2 (numeric suffixes).
    client.write("OUTP ON")
    assert client.query("OUTPut:STATe?") == "1"
    client.write("OUTPUT:STAT OFF")
    assert client.query("OUTP?") == "0"
    client.write("SOUR:VOLT:LEV 12")
    assert volts(client.query("SOURCE:VOLTAGE:LEVEL?")) == 12.0
    client.write("CHAN2:SCAL 0.5")
    assert volts(client.query("CHANNEL2:SCALE?")) == 0.5
    assert volts(client.query("CHAN:SCAL?")) == 1.0  # no suffix means 1 (SCPI-1999 §6.2.5.2)
    client.write("CHAN3:SCAL 1")
    assert [code for code, _ in client.errors()] == [-114]  # header suffix out of range


def test_numbers_with_exponents_suffixes_and_keywords(client: RawScpiClient) -> None:
    # IEEE 488.2 §7.7.2 (NRf decimal numeric data) and §7.7.3 (suffix units and multipliers,
    # "M" = milli, "MA" = mega).
    for text, expected in [
        ("1.5E+01", 15.0),
        ("+2.5e1", 25.0),
        (".5", 0.5),
        ("1500MV", 1.5),
        ("2500 mV", 2.5),
        ("0.04KV", 40.0),
        ("MAX", 100.0),
        ("MINimum", 0.0),
    ]:
        client.write(f"SOUR:VOLT {text}")
        assert volts(client.query("SOUR:VOLT?")) == pytest.approx(expected)
    assert client.errors() == []
    client.write("SOUR:VOLT 5 A")
    client.write("SOUR:VOLT five")
    assert [code for code, _ in client.errors()] == [-131, -104]  # invalid suffix, data type


def test_chained_commands_start_from_the_root(client: RawScpiClient) -> None:
    # IEEE 488.2 §7.1 program message units separated by ';' and §8.4.1 response units joined
    # by ';'. Path rule kept simple (documented in labseq_sim_instruments.server): each from the
    # root.
    reply = client.query("SOUR:VOLT 7;OUTP ON;*OPC?;SOUR:VOLT?;OUTP?")
    assert reply.split(";") == ["1", format_number(7.0), "1"]


def test_a_block_among_other_replies_of_one_message(client: RawScpiClient) -> None:
    # IEEE 488.2 §8.4.1: one response message for the queries of one program message, the
    # replies joined by ';'; a definite block (§8.7.9) is one of them like any other.
    client.write("SOUR:VOLT 7")
    client.write("SOUR:VOLT?;DATA:BLOC? 12;SYST:ERR?")
    expected = f"{format_number(7.0)};#212".encode() + bytes(range(12)) + b';0,"No error"\n'
    assert client.read_raw(len(expected)) == expected
    # A failed query ends the message (§6.1.6.1.1): the replies before it still come.
    client.write("SOUR:VOLT?;DATA:BLOC? 999;SYST:ERR?")
    assert client.read_line() == format_number(7.0)
    assert [code for code, _ in client.errors()] == [-222]


def test_a_message_repeated_is_executed_again_each_time(client: RawScpiClient) -> None:
    # Parsed messages are kept for reuse; each arrival still runs, and errors queue each time.
    for volts_v in (3.0, 4.0, 3.0):
        assert client.query(f"SOUR:VOLT {volts_v:g};SOUR:VOLT?") == format_number(volts_v)
    for _ in range(2):
        client.write("SOUR:VOLT 1;;OUTP ON")
    assert [code for code, _ in client.errors()] == [-102, -102]
    client.write("SOUR:VOLT 500")
    client.write("SOUR:VOLT 500")
    assert [code for code, _ in client.errors()] == [-222, -222]


def test_error_codes_and_nothing_changes_on_error(client: RawScpiClient) -> None:
    client.write("SOUR:VOLT 10")
    cases = [
        ("FOO:BAR 1", -113),  # undefined header, SCPI-1999 vol. 2 §21.8.5
        ("SOUR:VOLT 500", -222),  # data out of range, §21.8.6
        ("SOUR:VOLT", -109),  # missing parameter, §21.8.5
        ("OUTP ON,OFF", -108),  # parameter not allowed, §21.8.5
        ("OUTP MAYBE", -224),  # illegal parameter value, §21.8.6
        ("SOUR:VOLT 10;;OUTP ON", -102),  # syntax error, §21.8.5: OUTP ON is not reached
        ("SOUR:VOLT? 1", -108),
    ]
    for message, code in cases:
        client.write(message)
        assert [c for c, _ in client.errors()] == [code], message
    assert volts(client.query("SOUR:VOLT?")) == 10.0
    assert client.query("OUTP?") == "0"


def test_error_queue_is_fifo_and_reports_no_error_when_empty(client: RawScpiClient) -> None:
    # SCPI-1999 vol. 2 §21.8: SYST:ERR? returns the oldest entry first; 0,"No error" when empty.
    client.write("FOO")
    client.write("SOUR:VOLT 1000")
    client.write("SOUR:VOLT")
    assert client.query("SYST:ERR?").startswith('-113,"Undefined header')
    assert client.query("SYSTEM:ERROR:NEXT?").startswith('-222,"Data out of range')
    assert client.query("syst:err?").startswith('-109,"Missing parameter')
    assert client.query("SYST:ERR?") == '0,"No error"'


def test_error_queue_overflow_replaces_last_entry(client: RawScpiClient) -> None:
    # SCPI-1999 vol. 2 §21.8.1: on overflow the most recent entry is replaced by -350.
    for _ in range(ERROR_QUEUE_LENGTH + 5):
        client.write("FOO")
    entries = client.errors()
    assert len(entries) == ERROR_QUEUE_LENGTH
    assert [code for code, _ in entries[:-1]] == [-113] * (ERROR_QUEUE_LENGTH - 1)
    assert entries[-1] == (-350, "Queue overflow")


def test_cls_clears_queue_and_esr_reports_error_classes(client: RawScpiClient) -> None:
    client.write("FOO")  # command error
    client.write("SOUR:VOLT 1000")  # execution error
    # IEEE 488.2 §11.5.1.1: ESR bit 5 = command error (32), bit 4 = execution error (16);
    # reading *ESR? clears it (§10.12).
    assert int(client.query("*ESR?")) == 32 + 16
    assert int(client.query("*ESR?")) == 0
    client.write("FOO")
    client.write("*CLS")  # IEEE 488.2 §10.3: clears the status data, SCPI: and the error queue
    assert client.query("SYST:ERR?") == '0,"No error"'
    assert int(client.query("*ESR?")) == 0


def test_idn_has_four_fields_and_opc_answers_one(client: RawScpiClient) -> None:
    # IEEE 488.2 §10.14: *IDN? answers manufacturer, model, serial number, firmware level.
    fields = client.query("*IDN?").split(",")
    assert fields == ["labseq-sim", "test-supply", "T0001", "0.1"]
    assert client.query("*OPC?") == "1"  # IEEE 488.2 §10.19: ASCII "1" when operations are done


def test_rst_restores_defaults(client: RawScpiClient) -> None:
    client.write("SOUR:VOLT 42;OUTP ON")
    client.write("*RST")  # IEEE 488.2 §10.32
    assert client.query("SOUR:VOLT?;OUTP?") == f"{format_number(0.0)};0"


def test_definite_length_block_header(client: RawScpiClient) -> None:
    # IEEE 488.2 §8.7.9: '#', one digit n, n digits giving the byte count, then the bytes.
    for size in (0, 7, 200):
        client.write(f"DATA:BLOC? {size}")
        assert client.read_raw(1) == b"#"
        digits = int(client.read_raw(1))
        assert digits == len(str(size))
        assert int(client.read_raw(digits)) == size
        assert client.read_raw(size) == bytes(range(size))
        assert client.read_raw(1) == b"\n"


def test_several_clients_at_once_do_not_interleave(
    supply: tuple[BenchSupply, ScpiServer], raw_client: Callable[..., RawScpiClient]
) -> None:
    # Each message runs whole before another client's (one lock per instrument): a set and a
    # read-back in one message always agree, however the clients' messages interleave.
    clients = [raw_client(supply[1].port) for _ in range(4)]
    mismatches: list[str] = []

    def hammer(index: int, client: RawScpiClient) -> None:
        for step in range(40):
            value = index * 10 + step % 10
            reply = client.query(f"SOUR:VOLT {value};SOUR:VOLT?;*IDN?")
            if reply.split(";")[0] != format_number(value) or "test-supply" not in reply:
                mismatches.append(reply)

    threads = [threading.Thread(target=hammer, args=item) for item in enumerate(clients)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join(timeout=20)
    assert mismatches == []
    assert clients[0].errors() == []


def test_header_pattern_matching() -> None:
    # SCPI-1999 vol. 1 §6.2: short form = the capitals, brackets = optional node.
    pattern = HeaderPattern("SYSTem:ERRor[:NEXT]")
    assert pattern.match("SYST:ERR") == ()
    assert pattern.match(":system:error:next") == ()
    assert pattern.match("SYSTE:ERR") is None
    assert HeaderPattern("CHANnel#:SCALe").match("chan12:scal") == (12,)
    assert HeaderPattern("*IDN").match("*idn") == ()


def test_non_loopback_host_is_refused_unless_allowed(telecom_design: object) -> None:
    with pytest.raises(ServerConfigError, match=r"'192\.0\.2\.7' is not a loopback.*allow"):
        ScpiServer(BenchSupply(), host="192.0.2.7")
    with pytest.raises(ServerConfigError, match="not a loopback"):
        SimBench(telecom_design, host="0.0.0.0")  # type: ignore[arg-type]
    server = ScpiServer(BenchSupply(), host="192.0.2.7", allow_remote=True)  # not started
    assert server.host == "192.0.2.7"
    ScpiServer(BenchSupply(), host="127.0.0.2")  # any 127/8 address is loopback (RFC 1122)


def test_resource_string_is_a_visa_tcpip_socket(supply: tuple[BenchSupply, ScpiServer]) -> None:
    # VISA resource grammar (IVI VPP-4.3): TCPIP[board]::host::port::SOCKET.
    assert re.fullmatch(r"TCPIP::127\.0\.0\.1::\d+::SOCKET", supply[1].resource)
    assert supply[1].port > 0


def test_sim_command_serves_until_sigterm(raw_client: Callable[..., RawScpiClient]) -> None:
    process = subprocess.Popen(
        [sys.executable, "-c", "from labseq.cli import main; main(['sim', '--seed', '3'])"],
        cwd=Path(__file__).resolve().parents[1],
        stdout=subprocess.PIPE,
        text=True,
    )
    try:
        assert process.stdout is not None
        lines = []
        while not lines or not lines[-1].startswith("Press Ctrl-C"):
            line = process.stdout.readline()
            assert line, f"sim exited early: {lines}"
            lines.append(line.strip())
        resources = dict(
            found.groups()
            for line in lines
            if (found := re.fullmatch(r"(source|load|meter|scope)\s+(TCPIP::\S+::SOCKET)", line))
        )
        assert set(resources) == {"source", "load", "meter", "scope"}
        assert any("simulated bench" in line for line in lines)
        scope = raw_client(int(resources["scope"].split("::")[2]))
        assert scope.query("*IDN?").split(",")[:2] == ["labseq-sim", "oscilloscope"]
        process.send_signal(signal.SIGTERM)
        assert process.wait(timeout=10) == 0
    finally:
        if process.poll() is None:
            process.kill()
            process.wait()
