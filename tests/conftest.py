"""Shared fixtures: a simulated bench on free loopback ports, and a raw-socket SCPI client."""

from __future__ import annotations

import socket
from collections.abc import Callable, Iterator
from typing import Any

import pytest

from labseq_sim_instruments.bench import SimBench
from labseq_sim_instruments.flyback import DEMO_DUTS, FlybackDesign, load_dut


@pytest.fixture
def telecom_design() -> FlybackDesign:
    """The telecom DC demo DUT."""
    return load_dut(DEMO_DUTS["telecom_dc"])


@pytest.fixture
def make_sim_bench(telecom_design: FlybackDesign) -> Iterator[Callable[..., SimBench]]:
    """Factory: ``make_sim_bench(design=None, faults=(), **kwargs)`` starts a bench in-process.

    Every bench made is stopped after the test.
    """
    benches: list[SimBench] = []

    def make(design: FlybackDesign | None = None, faults: Any = (), **kwargs: Any) -> SimBench:
        bench = SimBench(design or telecom_design, faults=faults, **kwargs)
        benches.append(bench)
        return bench.start()

    yield make
    for bench in benches:
        bench.stop()


@pytest.fixture
def sim_bench(make_sim_bench: Callable[..., SimBench]) -> SimBench:
    """A started simulated bench with the telecom DC demo DUT, stopped after the test."""
    return make_sim_bench()


class RawScpiClient:
    """A bare TCP SCPI client: what goes over the wire, with no VISA layer in between."""

    def __init__(self, port: int, timeout_s: float = 2.0) -> None:
        self.sock = socket.create_connection(("127.0.0.1", port), timeout=timeout_s)
        self.sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        self.stream = self.sock.makefile("rb")

    def write(self, text: str) -> None:
        self.sock.sendall(text.encode("ascii") + b"\n")

    def read_line(self) -> str:
        """One response line without its ``\\n``; raises TimeoutError if none comes."""
        line = self.stream.readline()
        if not line:
            raise ConnectionError("connection closed by the server")
        return line.decode("ascii").removesuffix("\n")

    def query(self, text: str) -> str:
        self.write(text)
        return self.read_line()

    def read_raw(self, size: int) -> bytes:
        data = self.stream.read(size)
        if data is None or len(data) < size:
            raise ConnectionError("connection closed mid-block")
        return data

    def errors(self) -> list[tuple[int, str]]:
        """Drain the error queue: every entry, oldest first, up to ``0,"No error"``."""
        entries = []
        while True:
            code, _, message = self.query("SYST:ERR?").partition(",")
            if int(code) == 0:
                return entries
            entries.append((int(code), message.strip('"')))

    def close(self) -> None:
        self.stream.close()
        self.sock.close()


@pytest.fixture
def raw_client() -> Iterator[Callable[..., RawScpiClient]]:
    """Factory: ``raw_client(port)`` opens a raw socket client, closed after the test."""
    clients: list[RawScpiClient] = []

    def connect(port: int, timeout_s: float = 2.0) -> RawScpiClient:
        client = RawScpiClient(port, timeout_s)
        clients.append(client)
        return client

    yield connect
    for client in clients:
        client.close()


# -- a PostgreSQL server for the lab database tests -------------------------------------------


@pytest.fixture(scope="session")
def pg_server() -> Iterator[Any]:
    """A throwaway PostgreSQL server (tests/pgserver.py) for the whole session; the tests that
    use it skip, saying why, where psycopg or the server is missing."""
    pytest.importorskip("psycopg", reason="psycopg is not installed: pip install 'labseq[lab]'")
    import pgserver

    try:
        server = pgserver.start()
    except pgserver.Unavailable as exc:
        pytest.skip(f"no PostgreSQL server for the lab database tests: {exc}")
    yield server
    server.stop()


@pytest.fixture
def lab_db(pg_server: Any) -> str:
    """The URL (password included) of a new, empty database on the test server."""
    import secrets

    import psycopg

    name = f"lab_{secrets.token_hex(6)}"
    with psycopg.connect(pg_server.url(), autocommit=True) as conn:
        conn.execute(f"CREATE DATABASE {name}")  # a name made here, not user text
    return pg_server.url(name)
