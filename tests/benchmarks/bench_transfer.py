"""Waveform fetch speed: the driver's whole fetch against a raw socket reading the same bytes.

Run with ``python -m pytest -q -s tests/benchmarks/bench_transfer.py``. The simulated bench runs
in its own process, as a real scope would, so its server threads do not share this process's
interpreter lock with the reader being timed. An int8 record of each length below is captured;
then, interleaved in every repeat (tests/benchmarks/paired.py), two readers of it are timed:

* raw (the yardstick): a plain Python socket sends ``:WAVeform:DATA?`` and reads the block into
  a preallocated buffer, the least any reader must do to get those bytes;
* fetch: the driver's whole ``fetch_waveform`` through pyvisa-py, everything a capture costs:
  the transfer settings (sent only when they changed), the scaling, the block, the error-queue
  check, decoding and the checks on the result.

Each repeat gives one ratio fetch time / raw time; the median of those ratios is the figure,
printed with its spread and whether it meets its target:

* 100 k samples, where the round trips and the driver's own work weigh: target fetch ≤ 2 × raw.
  This median moves with the machine's load: 2.0-2.2 in runs where the raw read takes about
  30 µs, 1.3-1.5 in runs where it takes about 90 µs, on a shared two-core machine. So it is
  printed against the target and asserted only against 3 ×: in a quiet run, sending the
  transfer settings with every fetch gave 4.5, separate scaling and data queries 3.2, both
  (the fetch before settings were remembered) 6.2. That a fetch is one message is asserted
  exactly in tests/test_waveform_fetch.py.
* 10 M samples, where the bytes weigh: target fetch throughput ≥ 0.9 × raw's (a time ratio
  ≤ 1 / 0.9), asserted: its median stays within 0.9-1.05 however loaded the machine.
"""

from __future__ import annotations

import multiprocessing
import socket
import statistics
from collections.abc import Iterator
from contextlib import contextmanager
from multiprocessing.connection import Connection

import pytest
from paired import interleaved_times, paired

from labseq_instruments.block import length_digit_count, parse_length
from labseq_instruments.limits import LoadLimits, SourceLimits
from labseq_instruments.roles import ElectronicLoad, LineSource, Oscilloscope
from labseq_sim_instruments.bench import SimBench
from labseq_sim_instruments.flyback import DEMO_DUTS, load_dut

#: Record length → (repeats, target for the median time ratio fetch / raw, the largest median
#: accepted).
RECORDS = {100_000: (401, 2.0, 3.0), 10_000_000: (101, 1 / 0.9, 1 / 0.9)}
DATA_QUERY = b":WAVeform:DATA?\n"


def _serve_bench(connection: Connection) -> None:
    """Child process: run the simulated bench until the parent sends anything."""
    with SimBench(load_dut(DEMO_DUTS["telecom_dc"]), seed=0) as bench:
        connection.send(bench.resources)
        connection.recv()


@contextmanager
def bench_in_child_process() -> Iterator[dict[str, str]]:
    """Start the simulated bench in a child process; yield its resources; stop it."""
    context = multiprocessing.get_context("spawn")
    parent_end, child_end = context.Pipe()
    process = context.Process(target=_serve_bench, args=(child_end,), daemon=True)
    process.start()
    try:
        if not parent_end.poll(60):
            raise RuntimeError("the simulated bench did not start within 60 s")
        yield parent_end.recv()
    finally:
        parent_end.send("stop")
        process.join(10)
        if process.is_alive():
            process.terminate()
            process.join()


def _host_port(resource_name: str) -> tuple[str, int]:
    """Split ``TCPIP::<host>::<port>::SOCKET``."""
    _, host, port, _ = resource_name.split("::")
    return host, int(port)


def _receive_exactly(sock: socket.socket, view: memoryview) -> None:
    received = 0
    while received < len(view):
        count = sock.recv_into(view[received:])
        if count == 0:
            raise ConnectionError("scope closed the connection mid-reply")
        received += count


def raw_socket_read(sock: socket.socket, samples: int) -> None:
    """One ``:WAVeform:DATA?`` over a plain socket into a preallocated buffer."""
    sock.sendall(DATA_QUERY)
    head = bytearray(2)
    _receive_exactly(sock, memoryview(head))
    digits = bytearray(length_digit_count(head))
    _receive_exactly(sock, memoryview(digits))
    body = bytearray(parse_length(digits) + 1)  # payload and its newline
    _receive_exactly(sock, memoryview(body))
    assert len(body) == samples + 1 and body[-1:] == b"\n"


def driver_fetch(scope: Oscilloscope, samples: int) -> None:
    """One whole ``fetch_waveform`` of channel 1."""
    assert scope.fetch_waveform(1).codes.size == samples


def capture(scope: Oscilloscope, samples: int) -> None:
    """One int8 capture of the running converter's switch node, ``samples`` long."""
    scope.configure_timebase(seconds_per_div=2e-6, record_length=samples)
    scope.single()
    scope.wait_acquisition(timeout_s=120.0, poll_interval_s=0.05)


@pytest.mark.benchmark
def test_whole_fetch_against_a_raw_socket():
    with (
        bench_in_child_process() as resources,
        LineSource.open(resources["source"], limits=SourceLimits(60.0, 5.0)) as source,
        ElectronicLoad.open(resources["load"], limits=LoadLimits(5.0)) as load,
        Oscilloscope.open(resources["scope"], timeout_s=60.0) as scope,
        socket.create_connection(_host_port(resources["scope"])) as raw,
    ):
        raw.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        source.set_current_limit(3.0)
        source.set_dc(48.0)
        load.set_current(1.0)
        source.set_output(True)
        load.set_input(True)
        scope.configure_channel(1, volts_per_div=20.0, offset_v=80.0, probe_ratio=10)
        scope.configure_trigger(1, level_v=60.0, slope="rising", position_fraction=0.1)
        results = {}
        for samples, (repeats, _, _) in RECORDS.items():
            capture(scope, samples)
            times = interleaved_times(
                {
                    "raw": lambda samples=samples: raw_socket_read(raw, samples),
                    "fetch": lambda samples=samples: driver_fetch(scope, samples),
                },
                repeats,
            )
            results[samples] = paired(times, "fetch", "raw")
    print("\nwhole fetch_waveform of an int8 record / raw socket reading its block (time ratio):")
    for samples, ratios in results.items():
        target = RECORDS[samples][1]
        verdict = "meets" if ratios.median <= target else "misses"
        fetch_us, raw_us = (
            1e6 * statistics.median(t) for t in (ratios.candidate_s, ratios.yardstick_s)
        )
        print(f"  {samples:>10,} samples: {ratios.summary()}")
        print(
            f"  {'':>10}  {fetch_us:.0f} µs vs {raw_us:.0f} µs; throughput {1 / ratios.median:.2f}"
            f" of raw's; {verdict} the target of at most {target:.2f} × raw's time"
        )
    for samples, ratios in results.items():
        assert ratios.median <= RECORDS[samples][2], (samples, ratios.summary())
