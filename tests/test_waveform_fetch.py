"""Fetching waveforms from the simulated scope: transfer settings sent only when they may have
changed, the scaling read with every capture, scaling, data and error query in one round trip
where the map says the scope takes them in one message, and the same volts either way.

The driver assumes it is the scope's only client (the bench locks make it so on a real bench):
the transfer settings it last set are taken as still in force until something it does could have
changed them. The scaling is never taken as known: it follows each capture, so a vertical scale
changed by anyone shows in the next fetch.
"""

from __future__ import annotations

import logging
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pytest

from labseq_instruments import transport
from labseq_instruments.command_map import MAPS_DIR, load_command_map
from labseq_instruments.errors import CommandMapError, ReplyFormatError, ScpiError
from labseq_instruments.roles import Oscilloscope
from labseq_sim_instruments.bench import SimBench

GENERIC_FETCH = ":WAVeform:SCALing?;:WAVeform:DATA?;SYST:ERR?"
GENERIC_SETTINGS = [":WAVeform:SOURce CHANnel{}", ":WAVeform:FORMat INT8", "SYST:ERR?"]


def _settings(channel: int) -> list[str]:
    return [command.format(channel) for command in GENERIC_SETTINGS]


def _capture(scope: Oscilloscope, volts_per_div: float = 20.0) -> None:
    """Channels 1 and 2 set up, one capture triggered at once."""
    scope.configure_channel(1, volts_per_div, probe_ratio=10.0)
    scope.configure_channel(2, 5.0, probe_ratio=10.0)
    scope.configure_timebase(200e-9, 10_000)
    scope.configure_trigger(1, 60.0, "rising", 0.1)
    scope.single()
    scope.force_trigger()
    scope.wait_acquisition(30)


@pytest.fixture
def sent(caplog: pytest.LogCaptureFixture) -> Callable[[], list[str]]:
    """What the drivers have sent since the last call, from the SCPI trace."""
    caplog.set_level(logging.DEBUG, logger="labseq_instruments.trace")

    def commands() -> list[str]:
        lines = [record.getMessage() for record in caplog.records]
        caplog.clear()
        return [line.split(" > ", 1)[1] for line in lines if " > " in line]

    return commands


def _map_variant(tmp_path: Path, family: str, old: str, new: str) -> Path:
    text = (MAPS_DIR / "scope" / f"{family}.toml").read_text(encoding="utf-8")
    assert old in text, old
    path = tmp_path / f"{family}-variant.toml"
    path.write_text(text.replace(old, new, 1), encoding="utf-8")
    return path


def test_transfer_settings_go_only_when_something_may_have_changed_them(sim_bench, sent):
    with Oscilloscope.open(sim_bench.resources["scope"]) as scope:
        _capture(scope)
        sent()
        scope.fetch_waveform(1)
        scope.fetch_waveform(1)
        assert sent() == [*_settings(1), GENERIC_FETCH, GENERIC_FETCH]
        # Another channel: all of them again (a scope may reset its format on a new source).
        scope.fetch_waveform(2)
        scope.fetch_waveform(1)
        assert sent() == [*_settings(2), GENERIC_FETCH, *_settings(1), GENERIC_FETCH]
        # Arming, triggering and polling change no setting.
        scope.single()
        scope.force_trigger()
        scope.wait_acquisition(30)
        scope.fetch_waveform(1)
        assert sent()[-1:] == [GENERIC_FETCH]
        # Anything else may: another setting, a raw command, *RST, an error.
        for step in (
            lambda: scope.configure_timebase(200e-9, 10_000),
            lambda: scope.write(":TRIGger:LEVel 60"),
            lambda: scope.configure(":TRIGger:LEVel 60"),
            lambda: pytest.raises(ReplyFormatError, scope.query_float, ":WAVeform:FORMat?"),
            lambda: (scope.reset(), _capture(scope)),
        ):
            step()
            sent()
            scope.fetch_waveform(1)
            assert sent() == [*_settings(1), GENERIC_FETCH]
    with Oscilloscope.open(sim_bench.resources["scope"]) as scope:
        scope.fetch_waveform(1)  # a new session knows nothing
        assert sent()[:3] == _settings(1)


def test_a_vertical_scale_changed_behind_the_driver_shows_in_the_next_fetch(
    sim_bench: SimBench, raw_client, sent
):
    with Oscilloscope.open(sim_bench.resources["scope"]) as scope:
        _capture(scope, volts_per_div=20.0)
        before = scope.fetch_waveform(1)
        # Another client changes channel 1's scale and takes a new capture.
        raw = raw_client(int(sim_bench.resources["scope"].split("::")[2]))
        raw.write(":CHANnel1:SCALe 50;:SINGle;:TRIGger:IMMediate")
        assert raw.query(":ACQuire:READy?") == "1"
        sent()
        after = scope.fetch_waveform(1)
        assert sent() == [GENERIC_FETCH]  # no settings sent: the scaling came with the data
        # The scope's own answer, read over the raw socket: volts = (code - y_reference) ×
        # y_increment + y_origin, the generic map's scaling fields.
        points, _, _, y_increment, y_origin, y_reference = map(
            float, raw.query(":WAVeform:SCALing?").split(",")
        )
        raw.write(":WAVeform:DATA?")  # an IEEE 488.2 definite block, 8.7.9
        head = raw.read_raw(2)
        assert head[:1] == b"#" and int(raw.read_raw(int(head[1:]))) == points
        codes = np.frombuffer(raw.read_raw(int(points)), dtype=np.int8)
        assert raw.read_raw(1) == b"\n"
    assert before.y_increment_v == pytest.approx(200.0 / 256)
    assert after.y_increment_v == y_increment == pytest.approx(500.0 / 256)
    np.testing.assert_array_equal(after.codes, codes)
    np.testing.assert_array_equal(
        after.volts(), (codes.astype(np.float64) - y_reference) * y_increment + y_origin
    )


def test_an_error_in_the_one_message_fetch_is_reported(sim_bench, raw_client):
    with Oscilloscope.open(sim_bench.resources["scope"]) as scope:
        scope.reset()  # no capture to send
        with pytest.raises(ScpiError) as caught:
            scope.fetch_waveform(1)
        # SCPI-1999 vol. 2 21.8.11: -230 "Data corrupt or stale", with the message that
        # queued it; the rest of the queue was read, so nothing is left for the next step.
        assert caught.value.code == -230 and caught.value.command == GENERIC_FETCH
        scope.check_errors("after")
        _capture(scope)
        assert scope.fetch_waveform(1).codes.size == 10_000


@pytest.mark.parametrize("dialect", ["generic", "alt"])
def test_one_message_and_separate_queries_give_the_same_volts(
    tmp_path, make_sim_bench, dialect, sent
):
    bench = make_sim_bench(dialect=dialect)
    if dialect == "generic":
        other = _map_variant(tmp_path, "generic", "compound_queries = true", "")
    else:  # the alt scope answers a message of several queries too, with headers on each
        other = _map_variant(tmp_path, "alt", "[commands]", "compound_queries = true\n[commands]")
    other_map = load_command_map(other, "scope")
    assert other_map.compound_queries != load_command_map(dialect, "scope").compound_queries
    with Oscilloscope.open(bench.resources["scope"], command_map=dialect) as scope:
        scope.start()
        _capture(scope)
        shipped = scope.fetch_waveform(1)
    with Oscilloscope.open(bench.resources["scope"], command_map=other_map) as scope:
        sent()
        variant = scope.fetch_waveform(1)  # the same capture
        queries = [*scope.scaling_queries(), other_map.command("waveform_data_query")]
        last = sent()
    queries.append("SYST:ERR?")
    expected = [";".join(queries)] if other_map.compound_queries else queries
    assert last[-len(expected) :] == expected
    np.testing.assert_array_equal(variant.volts(), shipped.volts())
    np.testing.assert_array_equal(variant.time_s(), shipped.time_s())
    assert variant.codes.dtype == shipped.codes.dtype


def test_the_socket_path_without_non_blocking_receives_reads_the_same(sim_bench, monkeypatch):
    # Windows has neither MSG_DONTWAIT nor poll: every wait is then on the socket's timeout.
    with Oscilloscope.open(sim_bench.resources["scope"]) as scope:
        _capture(scope)
        usual = scope.fetch_waveform(1)
    monkeypatch.setattr(transport, "_DONTWAIT", 0)
    with Oscilloscope.open(sim_bench.resources["scope"]) as scope:
        assert isinstance(scope.transport, transport.PyvisaPySocketTransport)
        assert scope.transport._readable is None
        fallback = scope.fetch_waveform(1)
        assert scope.transport.socket.gettimeout() is None  # left blocking, as pyvisa-py has it
    np.testing.assert_array_equal(fallback.codes, usual.codes)


def test_the_map_key_is_checked(tmp_path):
    path = _map_variant(tmp_path, "generic", "compound_queries = true", 'compound_queries = "yes"')
    with pytest.raises(CommandMapError, match=r"line \d+, compound_queries: must be bool"):
        load_command_map(path, "scope")
    assert load_command_map("generic", "scope").compound_queries
    assert not load_command_map("alt", "scope").compound_queries  # keeps separate queries
