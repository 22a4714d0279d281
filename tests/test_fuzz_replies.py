"""Malformed replies from instruments: every driver call ends within its timeout, with a result a
correct reply would give or an InstrumentError subclass — never a hang, never another exception.

The peer is a scripted SCPI server on a real loopback socket (no mock between driver and socket,
the drivers go through PyVISA and pyvisa-py as on a bench): it answers every query correctly but
one, the query under test, which gets the drawn reply — garbage numbers, text and binary junk,
truncated lines, IEEE 488.2 blocks (8.7.9) with bad headers, wrong lengths or too-short payloads,
a closed connection, or a stream that never ends. Several queries in one program message are
answered in one response message, the replies separated by ``;`` (IEEE 488.2 8.4.1), the
drawn reply among them.
"""

from __future__ import annotations

import re
import socket
import threading
import time
from collections import Counter
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from typing import Any

import pytest
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

from labseq_instruments.errors import InstrumentError
from labseq_instruments.limits import LoadLimits, SourceLimits
from labseq_instruments.roles import ElectronicLoad, LineSource, Oscilloscope, PowerMeter
from labseq_instruments.scpi import ScpiInstrument

TIMEOUT_S = 0.2
#: A call makes a few queries, each bounded by TIMEOUT_S; well past this it is hung.
HANG_S = 5.0
#: How long a never-ending reply streams at most (the driver must give up long before).
STREAM_LIMIT_S = 8.0

#: Correct replies of the generic scope map and generic SCPI roles (4-sample int8 capture).
GOOD: dict[str, bytes] = {
    "*IDN?": b"Invented Instruments,IV-9,SN1,1.0\n",
    "SYST:ERR?": b'0,"No error"\n',
    "OUTP?": b"0\n",
    "MEAS:VOLT?": b"48.0\n",
    "MEAS:CURR?": b"1.0\n",
    "MEAS:POW?": b"50.0\n",
    "MEAS:POW:PFAC?": b"1.0\n",
    ":ACQuire:READy?": b"1\n",
    ":WAVeform:SCALing?": b"4,1e-9,0,0.1,0,0\n",
    ":WAVeform:DATA?": b"#14\x00\x01\x02\x03\n",
    ":MEASure:DCLevel? CHANnel1": b"12.5\n",
}


@dataclass(frozen=True)
class Action:
    """What the peer does instead of the correct reply: send ``data``; then close the
    connection (``close``) or keep sending ``repeat`` until the client goes (``repeat``)."""

    data: bytes
    close: bool = False
    repeat: bytes = b""

    def __repr__(self) -> str:
        tail = " then close" if self.close else f" then {self.repeat[:8]!r}… for ever"
        return f"{self.data[:40]!r}{tail if self.close or self.repeat else ''}"


class ReplyServer:
    """One-client SCPI peer on loopback: correct replies, except ``action`` for ``victim``.

    ``victim`` is a query, or queries joined by ``;``: the last of them is the victim where it
    comes after the others in one program message (``:WAVeform:DATA?;SYST:ERR?``).
    """

    def __init__(self, victim: str, action: Action) -> None:
        self.victim, self.action = victim, action
        self.listener = socket.create_server(("127.0.0.1", 0))
        self.port = self.listener.getsockname()[1]
        self.stop = threading.Event()
        self.thread = threading.Thread(target=self._serve, daemon=True)
        self.thread.start()

    @property
    def resource(self) -> str:
        return f"TCPIP::127.0.0.1::{self.port}::SOCKET"

    def _serve(self) -> None:
        try:
            connection, _ = self.listener.accept()
        except OSError:
            return
        with connection, connection.makefile("rb") as lines:
            try:
                for line in lines:
                    units = line.decode("ascii", "replace").strip().split(";")
                    if not self._answer(connection, units):
                        return
            except OSError:
                return

    def _is_victim(self, units: list[str], index: int) -> bool:
        wanted = self.victim.split(";")
        start = index + 1 - len(wanted)
        return start >= 0 and units[start : index + 1] == wanted

    def _answer(self, connection: socket.socket, units: list[str]) -> bool:
        """Answer one program message; False once the connection is to be (or was) closed.

        The replies go out as one response message: each without its newline, joined by ``;``,
        then one newline. The drawn reply takes its query's place; a drawn reply that is not a
        whole line (or closes, or never ends) is the last thing sent."""
        sent = b""
        for index, unit in enumerate(units):
            separator = b";" if sent else b""
            if self._is_victim(units, index):
                data = self.action.data
                if data.endswith(b"\n") and not (self.action.close or self.action.repeat):
                    sent += separator + data[:-1]
                    continue
                connection.sendall(sent + separator)
                return self._act(connection)
            if unit in GOOD:
                sent += separator + GOOD[unit][:-1]
        if sent:
            connection.sendall(sent + b"\n")
        return True

    def _act(self, connection: socket.socket) -> bool:
        """Carry out the action; False once the connection is to be (or was) closed."""
        connection.sendall(self.action.data)
        if self.action.close:
            return False
        if self.action.repeat:
            until = time.monotonic() + STREAM_LIMIT_S
            while not self.stop.is_set() and time.monotonic() < until:
                connection.sendall(self.action.repeat)
                time.sleep(0.001)
            return False
        return True

    def close(self) -> None:
        self.stop.set()
        self.listener.close()
        self.thread.join(timeout=STREAM_LIMIT_S + 1)


Call = Callable[[Any], Any]


def _source(resource: str) -> LineSource:
    return LineSource.open(
        resource, timeout_s=TIMEOUT_S, limits=SourceLimits(max_voltage_v=80, max_current_a=3)
    )


def _load(resource: str) -> ElectronicLoad:
    return ElectronicLoad.open(resource, timeout_s=TIMEOUT_S, limits=LoadLimits(max_current_a=5))


def _meter(resource: str) -> PowerMeter:
    return PowerMeter.open(resource, timeout_s=TIMEOUT_S)


def _scope(resource: str) -> Oscilloscope:
    return Oscilloscope.open(resource, timeout_s=TIMEOUT_S)


#: name → (open the role, the call, the query whose reply is drawn, what a correct reply is)
TARGETS: dict[str, tuple[Callable[[str], ScpiInstrument], Call, str, str]] = {
    "identify": (_meter, lambda d: d.identify(), "*IDN?", "idn"),
    "source.set_dc error queue": (_source, lambda d: d.set_dc(48.0), "SYST:ERR?", "error"),
    "source.is_on": (_source, lambda d: d.is_on(), "OUTP?", "bool"),
    "load.measure_voltage_v": (_load, lambda d: d.measure_voltage_v(), "MEAS:VOLT?", "number"),
    "meter.measure": (_meter, lambda d: d.measure(), "MEAS:POW?", "number"),
    "scope.wait_acquisition": (
        _scope,
        lambda d: d.wait_acquisition(TIMEOUT_S, 0.01),
        ":ACQuire:READy?",
        "done",
    ),
    "scope.fetch_waveform scaling": (
        _scope,
        lambda d: d.fetch_waveform(1),
        ":WAVeform:SCALing?",
        "scaling",
    ),
    "scope.fetch_waveform block": (
        _scope,
        lambda d: d.fetch_waveform(1),
        ":WAVeform:DATA?",
        "block",
    ),
    "scope.fetch_waveform error": (
        _scope,
        lambda d: d.fetch_waveform(1),
        ":WAVeform:DATA?;SYST:ERR?",
        "error",
    ),
    "scope.measure_mean_v": (
        _scope,
        lambda d: d.measure_mean_v(1),
        ":MEASure:DCLevel? CHANnel1",
        "number",
    ),
}

# -- an independent oracle: which replies a correct driver may accept ----------------------

#: IEEE 488.2 7.7.2 decimal numeric data (NRf) and SCPI-1999 vol. 1 7.2.1.5 INF/NINF/NAN.
NRF = r"[+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?|(?i:inf|infinity|ninf|ninfinity|nan)"


def _finite_numbers(text: str) -> list[float] | None:
    items = [item.strip() for item in text.split(",")]
    if not all(re.fullmatch(NRF, item) for item in items):
        return None
    if any(re.fullmatch(r"(?i:inf|infinity|ninf|ninfinity|nan)", item) for item in items):
        return None  # a keyword for a value that is not finite
    values = [float(item) for item in items]
    return values if all(abs(v) < float("inf") for v in values) else None


def acceptable(kind: str, action: Action) -> bool:
    """Whether a correct driver could take ``action`` as a valid reply of ``kind``."""
    if action.close or action.repeat or not action.data.endswith(b"\n"):
        return False
    try:
        text = action.data[:-1].decode("ascii").strip()
    except UnicodeDecodeError:
        return kind == "block"
    if "\n" in text:
        return False
    if kind == "number":
        return re.fullmatch(NRF, text) is not None
    if kind == "bool":
        return text.upper() in ("0", "1", "ON", "OFF")
    if kind == "idn":  # IEEE 488.2 10.14: four comma-separated fields
        return text.count(",") == 3
    if kind == "error":  # SCPI-1999 vol. 2 ch. 21: code 0 is "no error"
        return re.fullmatch(r"[+-]?0+,.*", text) is not None
    if kind == "done":
        return text == "1"
    if kind == "scaling":
        values = _finite_numbers(text)
        # points (must match the 4-sample block), x_increment > 0, x_origin, y_increment ≠ 0
        return (
            values is not None
            and len(values) == 6
            and values[0] == 4
            and values[1] > 0
            and values[3] != 0
        )
    return False  # blocks are drawn malformed only


# -- strategies ------------------------------------------------------------------------------

GARBLED_NUMBERS = [
    "9.9.9E+",
    "1e",
    "--1",
    "1_0",
    "0x1F",
    "1,2",
    "",
    " ",
    "NaN?",
    "1.0 V",
    "one",
    "1e5e5",
    "+",
    ".",
    "E5",
    "inf inity",
    "１２",
]
text_line = st.text(
    alphabet=st.characters(blacklist_characters="\n", blacklist_categories=("Cs",)), max_size=40
).map(lambda text: text.encode("utf-8") + b"\n")
garbled_numbers = st.sampled_from(GARBLED_NUMBERS).map(lambda text: text.encode("utf-8") + b"\n")
# one line only: a stale second line would be read as the next query's reply, which no driver
# can tell from a correct one
binary_junk = st.binary(min_size=1, max_size=64).map(lambda data: data.replace(b"\n", b"") + b"\n")
truncated = st.builds(
    lambda reply, cut: reply[: max(1, int(cut * (len(reply) - 1)))],
    st.sampled_from(sorted(GOOD.values())),
    st.floats(0.0, 1.0),
)
bad_blocks = st.sampled_from(
    [
        b"#Z" + bytes(16) + b"\n",  # digit count is not a digit (the simulated bench's garble)
        b"#\n",
        b"#-4\x00\x01\x02\x03\n",
        b"# 4\x00\x01\x02\x03\n",
        b"#2x4\x00\x01\x02\x03\n",  # length field not all digits
        b"#14\x00\x01\x02\x03\x04\x05\n",  # longer than announced
        b"#15\x00\x01\x02\x03",  # too short, then silence
        b"#19\x00\x01",
        b"#3004\x00\x01\x02\x03",  # no trailing newline, then silence
        b"#0\x00\x01\x02",  # indefinite block without its newline
        b"#13\x00\x01\x02\n",  # whole block, but 3 samples where the scaling says 4
        b"4,1e-9,0,0.1,0,0\n",  # text where a block is due
    ]
)
plain = st.one_of(text_line, garbled_numbers, binary_junk, bad_blocks).map(Action)
silence_after = truncated.map(Action)
closing = st.one_of(st.just(b""), truncated, bad_blocks).map(lambda data: Action(data, close=True))
endless = st.sampled_from(
    [
        Action(b"", repeat=b"1"),  # a number that never ends
        Action(b"4,1e-9", repeat=b",0"),  # a list that never ends
        Action(b"#0", repeat=b"\x01\x02\n"),  # an indefinite block that never ends
        Action(b"#9999999999", repeat=bytes(4096)),  # a definite block far longer than sent
        Action(b"#", repeat=b"9"),  # a header that never ends
    ]
)
replies = st.one_of(plain, silence_after, closing, endless)


def _run_with_watchdog(call: Callable[[], Any]) -> tuple[Any, BaseException | None, float]:
    """Run ``call`` on a thread; fail the test if it is still running after HANG_S."""
    outcome: dict[str, Any] = {}

    def target() -> None:
        try:
            outcome["value"] = call()
        except BaseException as error:  # noqa: BLE001 - handed to the test to judge
            outcome["error"] = error

    start = time.monotonic()
    worker = threading.Thread(target=target, daemon=True)
    worker.start()
    worker.join(HANG_S)
    elapsed = time.monotonic() - start
    if worker.is_alive():
        pytest.fail(f"the driver call hung (still running after {HANG_S} s)")
    return outcome.get("value"), outcome.get("error"), elapsed


@pytest.fixture
def counts(capsys: pytest.CaptureFixture[str]) -> Iterator[Counter[str]]:
    """Cases tried per target, printed after the test."""
    tried: Counter[str] = Counter()
    yield tried
    with capsys.disabled():
        print(f"\nmalformed replies tried per driver call ({sum(tried.values())} in all):")
        for name in TARGETS:
            print(f"  {name:<30} {tried[name]}")


def _exercise(name: str, action: Action) -> tuple[Any, BaseException | None, float]:
    opener, call, victim, _kind = TARGETS[name]
    server = ReplyServer(victim, action)
    try:

        def attempt() -> Any:
            with opener(server.resource) as driver:
                return call(driver)

        return _run_with_watchdog(attempt)
    finally:
        server.close()


def test_malformed_replies_raise_instrument_errors_in_time(counts: Counter[str]) -> None:
    slowest = [0.0]

    @settings(
        max_examples=150,
        deadline=None,
        suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture],
    )
    @given(name=st.sampled_from(sorted(TARGETS)), action=replies)
    def check(name: str, action: Action) -> None:
        assume(not acceptable(TARGETS[name][3], action))
        counts[name] += 1
        value, error, elapsed = _exercise(name, action)
        slowest[0] = max(slowest[0], elapsed)
        assert error is not None, f"{name} accepted {action!r} and returned {value!r}"
        assert isinstance(error, InstrumentError), f"{name}: {type(error).__name__}: {error}"

    check()
    assert set(counts) == set(TARGETS)
    print(f"slowest call: {slowest[0]:.2f} s")


@pytest.mark.parametrize(
    ("name", "reply", "expected"),
    [
        ("load.measure_voltage_v", b"+4.80000E+01\n", 48.0),  # NR3, IEEE 488.2 8.7.4
        ("load.measure_voltage_v", b"48\r\n", 48.0),  # NR1 with CR LF
        ("load.measure_voltage_v", b"9.9E37\n", 9.9e37),  # SCPI-1999 overflow value
        ("source.is_on", b"ON\n", True),
        ("scope.measure_mean_v", b".5\n", 0.5),  # NRf, IEEE 488.2 7.7.2
    ],
)
def test_correct_replies_in_other_legal_forms_are_read(
    name: str, reply: bytes, expected: object
) -> None:
    value, error, _ = _exercise(name, Action(reply))
    assert error is None, error
    assert value == expected


def test_a_fetch_reads_scaling_block_and_error_query_from_one_response() -> None:
    # The peer answers the fetch's three queries in one response message; the scaling in
    # another legal form (spaces around fields, NRf without leading digit: IEEE 488.2 7.7.2).
    waveform, error, _ = _exercise(
        "scope.fetch_waveform scaling", Action(b"4, 1.0E-09 ,0,+.1,0,0\n")
    )
    assert error is None, error
    assert waveform.codes.tolist() == [0, 1, 2, 3]
    assert waveform.x_increment_s == 1e-9 and waveform.y_increment_v == 0.1


def test_a_garbled_acquisition_poll_is_not_mistaken_for_a_late_trigger() -> None:
    _, error, elapsed = _exercise("scope.wait_acquisition", Action(b"9.9.9E+\n"))
    assert type(error).__name__ == "ReplyFormatError" and "9.9.9E+" in str(error)
    assert elapsed < TIMEOUT_S * 10
