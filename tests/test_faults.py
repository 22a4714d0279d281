"""Fault injection: each kind fires at its call or point, once, is recorded, and is survivable."""

from __future__ import annotations

import socket
import time
from collections.abc import Callable
from typing import TYPE_CHECKING

import pytest

from labseq.cli import main
from labseq_sim_instruments.bench import SimBench
from labseq_sim_instruments.faults import FaultSpec, FaultSpecError, parse_fault_specs

if TYPE_CHECKING:
    from tests.conftest import RawScpiClient

Connect = Callable[..., "RawScpiClient"]


def fired(bench: SimBench) -> list[tuple[str, str, str, int]]:
    return [(f.role, f.kind, f.when, f.message_number) for f in bench.fired_faults]


def test_specs_parse_into_role_kind_and_moment() -> None:
    specs = parse_fault_specs("scope:no-trigger@point=3, meter:malformed@call=12,load:drop@call=5")
    assert specs == [
        FaultSpec("scope", "no-trigger", "point", 3),
        FaultSpec("meter", "malformed", "call", 12),
        FaultSpec("load", "drop", "call", 5),
    ]
    assert str(specs[0]) == "scope:no-trigger@point=3"
    assert parse_fault_specs(["source:scpi-error@point=2"]) == [
        FaultSpec("source", "scpi-error", "point", 2)
    ]
    assert parse_fault_specs("") == []


@pytest.mark.parametrize(
    ("spec", "message"),
    [
        ("psu:drop@call=1", r"'psu:drop@call=1': role 'psu'; valid: source, load, meter, scope"),
        ("meter:explode@call=1", r"kind 'explode'; valid: no-reply, drop, scpi-error"),
        ("meter:drop@time=3", r"moment 'time'; expected ROLE:KIND@call=N or ROLE:KIND@point=N"),
        ("meter:drop", r"'meter:drop': expected ROLE:KIND@call=N or ROLE:KIND@point=N"),
        ("meter:drop@call=0", r"call counts from 1"),
        ("load:no-trigger@call=2", r"no-trigger applies to the scope only"),
    ],
)
def test_bad_specs_name_the_spec_and_what_is_valid(spec: str, message: str) -> None:
    with pytest.raises(FaultSpecError, match=message):
        parse_fault_specs(spec)


def test_bad_spec_on_the_command_line_exits_2(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as exit_info:
        main(["sim", "--faults", "meter:explode@call=2"])
    assert exit_info.value.code == 2
    assert "kind 'explode'" in capsys.readouterr().err


def test_drop_closes_the_connection_once_and_reconnect_works(
    make_sim_bench: Callable[..., SimBench], raw_client: Connect
) -> None:
    bench = make_sim_bench(faults="load:drop@call=3")
    port = bench.servers["load"].port
    client = raw_client(port)
    assert client.query("*IDN?").startswith("labseq-sim")  # message 1
    client.write("SOUR:CURR 1")  # message 2
    with pytest.raises(ConnectionError):
        client.query("SOUR:CURR?")  # message 3: dropped
    assert fired(bench) == [("load", "drop", "call=3", 3)]
    again = raw_client(port)  # a driver reconnects to make the bench safe
    assert float(again.query("SOUR:CURR?")) == 1.0
    again.write("INP OFF")
    assert again.query("INP?") == "0"
    assert len(bench.fired_faults) == 1


def test_no_reply_withholds_the_next_query_only(
    make_sim_bench: Callable[..., SimBench], raw_client: Connect
) -> None:
    bench = make_sim_bench(faults="meter:no-reply@call=2")
    client = raw_client(bench.servers["meter"].port, timeout_s=0.3)
    client.query("MEAS:VOLT?")  # message 1
    client.write("MEAS:POW?")  # message 2: executed, never answered
    with pytest.raises(TimeoutError):
        client.read_line()
    assert fired(bench) == [("meter", "no-reply", "call=2", 2)]
    fresh = raw_client(bench.servers["meter"].port)
    assert fresh.query("*IDN?").startswith("labseq-sim")
    assert fresh.query("*OPC?") == "1"
    assert len(bench.fired_faults) == 1


def test_no_reply_waits_for_a_query(
    make_sim_bench: Callable[..., SimBench], raw_client: Connect
) -> None:
    bench = make_sim_bench(faults="source:no-reply@call=1")
    client = raw_client(bench.servers["source"].port, timeout_s=0.3)
    client.write("SOUR:VOLT 48")  # message 1: a setting, nothing to withhold
    client.write("SOUR:VOLT?")  # message 2: the first query from then on
    with pytest.raises(TimeoutError):
        client.read_line()
    assert fired(bench) == [("source", "no-reply", "call=1", 2)]


def test_malformed_reply_is_garbage_then_replies_are_normal(
    make_sim_bench: Callable[..., SimBench], raw_client: Connect
) -> None:
    bench = make_sim_bench(faults="meter:malformed@call=2,scope:malformed@call=1")
    meter = raw_client(bench.servers["meter"].port)
    float(meter.query("MEAS:VOLT?"))
    with pytest.raises(ValueError):
        float(meter.query("MEAS:VOLT?"))  # "9.9.9E+" is not a number
    float(meter.query("MEAS:VOLT?"))
    scope = raw_client(bench.servers["scope"].port)
    scope.write(":WAV:DATA?")  # no capture yet: normally an empty block "#10"
    assert not scope.read_line().startswith("#1")  # IEEE 488.2 §8.7.9 header is broken
    assert fired(bench) == [
        ("meter", "malformed", "call=2", 2),
        ("scope", "malformed", "call=1", 1),
    ]


def test_scpi_error_refuses_the_setting_at_the_chosen_point(
    make_sim_bench: Callable[..., SimBench], raw_client: Connect
) -> None:
    bench = make_sim_bench(faults="source:scpi-error@point=2")
    source = raw_client(bench.servers["source"].port)
    load = raw_client(bench.servers["load"].port)
    for point, volts in enumerate([36.0, 48.0, 60.0], start=1):
        load.query(f"SOUR:CURR {point * 0.5};*OPC?")  # the bench's point-th operating point
        source.write(f"SOUR:VOLT {volts}")
        errors = source.errors()
        if point == 2:
            assert errors == [(-300, "Device-specific error;simulated hardware fault")]
            assert float(source.query("SOUR:VOLT?")) == 36.0  # refused: unchanged
        else:
            assert errors == []
            assert float(source.query("SOUR:VOLT?")) == volts
    assert [(f.role, f.kind, f.when) for f in bench.fired_faults] == [
        ("source", "scpi-error", "point=2")
    ]


def test_no_trigger_leaves_that_acquisition_pending(
    make_sim_bench: Callable[..., SimBench], raw_client: Connect
) -> None:
    bench = make_sim_bench(faults="scope:no-trigger@point=1")
    source = raw_client(bench.servers["source"].port)
    load = raw_client(bench.servers["load"].port)
    scope = raw_client(bench.servers["scope"].port)
    source.query("SOUR:VOLT 48;OUTP ON;*OPC?")
    load.query("SOUR:CURR 1;INP ON;*OPC?")
    scope.write(":CHAN1:SCAL 20;:CHAN1:OFFS 60;:ACQ:POIN 500;:TRIG:LEV 30;:SING")
    time.sleep(0.3)
    assert scope.query(":ACQ:READ?") == "0"
    assert fired(bench) == [("scope", "no-trigger", "point=1", 1)]  # its first message
    scope.write(":SING")  # the next acquisition is normal
    deadline = time.monotonic() + 5
    while scope.query(":ACQ:READ?") != "1":
        assert time.monotonic() < deadline
        time.sleep(0.01)
    assert len(bench.fired_faults) == 1


def test_fired_faults_carry_a_timestamp(
    make_sim_bench: Callable[..., SimBench], raw_client: Connect
) -> None:
    before = time.time()
    bench = make_sim_bench(faults="meter:drop@call=1")
    client = raw_client(bench.servers["meter"].port)
    with pytest.raises((ConnectionError, socket.timeout)):
        client.query("*IDN?")
    (record,) = bench.fired_faults
    assert before <= record.time_s <= time.time()


def test_bad_faults_for_a_bench_are_refused(make_sim_bench: Callable[..., SimBench]) -> None:
    with pytest.raises(FaultSpecError, match="valid: source, load, meter, scope"):
        make_sim_bench(faults=["dmm:drop@call=1"])
