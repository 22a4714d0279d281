"""How messages are sent to a VISA resource and reply bytes read from it: a generic path for
any VISA library, and a fast path for pyvisa-py's raw sockets.

:class:`~labseq_instruments.scpi.ScpiInstrument` sends every message and reads every reply through
one
of these strategies, chosen once when the session is opened (:func:`choose_transport`):

* :class:`VisaTransport` uses only public VISA calls (``viRead`` in chunks, device clear), so it
  works with any VISA library: a vendor's, pyvisa-py's on any interface, or a simulated one;
* :class:`PyvisaPySocketTransport` reads pyvisa-py's TCPIP SOCKET sessions straight from their
  socket. pyvisa-py's ``viRead`` copies every byte four times in calls of at most 4096 bytes, each
  behind a ``select``, which caps a 10 M-sample transfer far below what the socket delivers; here
  the bytes pyvisa-py has read ahead are taken first, then the socket receives into the caller's
  buffer directly, taking what has arrived without waiting and waiting in ``poll`` otherwise
  (where the platform has both), and messages go out in one ``send``. It relies on pyvisa-py's
  session internals and is chosen only when they are all present.
"""

from __future__ import annotations

import math
import re
import select
import socket
import time
from collections.abc import Callable, Iterator
from contextlib import AbstractContextManager, contextmanager, nullcontext, suppress
from typing import Any, TypeVar

import pyvisa
from pyvisa import constants
from pyvisa.resources import MessageBasedResource

from labseq_instruments.errors import (
    BlockFormatError,
    ConnectionLost,
    InstrumentTimeout,
    ReplyFormatError,
)

#: Bytes asked of the VISA layer per read while receiving a block payload.
BLOCK_CHUNK_BYTES = 1 << 20
#: Bytes asked of the VISA layer per read of a text reply, and the longest text reply accepted
#: (far above any reply read as text; a peer streaming without a terminator is cut off here).
TEXT_CHUNK_BYTES = 1 << 14
MAX_TEXT_REPLY_BYTES = 1 << 20
#: Bytes asked of the socket per read of the short parts of a reply to several queries (its
#: first replies, a block's header and what ends it): a block's payload that comes with them
#: is copied twice, the rest is received straight into its buffer.
UNIT_CHUNK_BYTES = 1 << 10
#: Silence after which the rest of a broken reply on a socket is taken to have all arrived.
QUIET_S = 0.05

TIMEOUT_CODES = {constants.StatusCode.error_timeout}
#: The flag that makes one ``recv`` or ``send`` return at once rather than wait, where the
#: platform has it (not Windows): bytes already received are then taken at once, and a wait for
#: more is a ``poll``, without switching the socket's timeout on and off around each call.
_DONTWAIT = getattr(socket, "MSG_DONTWAIT", 0) if hasattr(select, "poll") else 0

T = TypeVar("T")

#: What ends a response message unit: the unit separator ``;`` or a newline (the terminator),
#: outside IEEE 488.2 string response data (8.7.8), which is double-quoted and may hold either.
_UNIT_END = re.compile(rb'"[^"]*"?|[;\n]')


def find_unit_end(data: bytes | bytearray) -> int:
    """The index of the ``;`` or newline that ends the response message unit at the start of
    ``data`` (IEEE 488.2 8.4: units are separated by ``;``, the message ends with a newline),
    or -1 if it has not all arrived. A ``;`` inside a quoted string does not end the unit."""
    for match in _UNIT_END.finditer(data):
        token = match.group()
        if not token.startswith(b'"'):
            return match.start()
        if len(token) == 1 or not token.endswith(b'"'):
            return -1  # a string still open
    return -1


class VisaTransport:
    """Reads through public VISA calls only: works with any VISA library and interface."""

    def __init__(self, resource: MessageBasedResource, label: str) -> None:
        self.resource = resource
        self.label = label

    @property
    def is_socket(self) -> bool:
        """Whether the resource is a raw TCP socket, where no END marks the end of a reply."""
        return self.resource.resource_name.upper().endswith("::SOCKET")

    def timeout_s(self) -> float:
        """The resource's timeout in seconds (infinite when it has none)."""
        return self.resource.timeout / 1000.0 if self.resource.timeout else math.inf

    @contextmanager
    def binary_reads(self) -> Iterator[str | None]:
        """Line termination off while a block is read, so a ``0x0A`` byte inside its payload
        does not end a ``viRead``; yields the read termination in force before."""
        resource = self.resource
        saved_termination = resource.read_termination
        resource.read_termination = None
        try:
            yield saved_termination
        finally:
            resource.read_termination = saved_termination

    def tune(self) -> None:
        """Turn off Nagle's algorithm on a socket: every configuration step is a write followed
        by ``SYST:ERR?``, and with Nagle on the second small write waits for the peer's delayed
        ACK (about 40 ms on Linux). VI_ATTR_TCPIP_NODELAY is the VISA attribute for it."""
        if self.is_socket:
            # a library that does not support the attribute: Nagle stays on
            with suppress(Exception):
                self.resource.set_visa_attribute(constants.ResourceAttribute.tcpip_nodelay, True)

    def write(self, message: str) -> None:
        """Send one program message with the resource's write termination (``viWrite``)."""
        self.resource.write(message)

    def read_bytes(self, count: int, command: str) -> bytes:
        """The next ``count`` bytes of the reply to ``command``, within the resource's
        timeout."""
        return self.resource.read_bytes(count)

    def read_message(
        self, command: str, deadline: float, max_bytes: int = MAX_TEXT_REPLY_BYTES
    ) -> bytes:
        """Read one response message, up to its terminator, by ``deadline`` (monotonic s), of
        at most ``max_bytes``.

        PyVISA's own read goes on for as long as bytes keep coming, so a peer that streams
        without a terminator would hold it for ever; here the deadline bounds the whole reply
        and its length is capped. On a socket, where no END marks the end, a reply that stops
        before its terminator is refused as truncated rather than read as a shorter value.
        """
        resource = self.resource
        data = bytearray()
        with resource.ignore_warning(constants.StatusCode.success_max_count_read):
            while True:
                try:
                    chunk, status = resource.visalib.read(resource.session, TEXT_CHUNK_BYTES)
                except pyvisa.errors.VisaIOError as error:
                    if error.error_code in TIMEOUT_CODES:
                        raise self.no_reply(command) from None
                    raise
                data += chunk
                if status != constants.StatusCode.success_max_count_read:
                    break
                self.check_growing_reply(command, data, deadline, max_bytes)
        if self.is_socket and not data.endswith(b"\n"):
            raise self.truncated(command, data)
        return bytes(data)

    def read_unit(self, command: str, deadline: float, max_bytes: int) -> tuple[bytes, bytes]:
        """Read one response message unit of a reply to several queries, by ``deadline``:
        its bytes, and what ended it (``b";"``: more units follow; ``b"\\n"``: the message
        ended). Byte by byte through ``viRead``: units read this way are short."""
        data = bytearray()
        while (end := find_unit_end(data)) < 0:
            self.check_growing_reply(command, data, deadline, max_bytes)
            data += self.read_bytes(1, command)
        return bytes(data[:end]), bytes(data[end : end + 1])

    def read_into(self, view: memoryview, spare: int = 0) -> None:
        """Fill ``view`` but its last ``spare`` bytes with the next bytes of the reply,
        through ``viRead`` in large chunks (one copy per chunk). ``spare`` is room a transport
        may use to take what follows in the same read; this one never reads past what it
        needs."""
        resource = self.resource
        needed = len(view) - spare
        received = 0
        # A full chunk is the normal case here, not a warning.
        with resource.ignore_warning(constants.StatusCode.success_max_count_read):
            while received < needed:
                chunk, _ = resource.visalib.read(
                    resource.session, min(BLOCK_CHUNK_BYTES, needed - received)
                )
                if not chunk:
                    raise BlockFormatError(
                        f"{self.label}: block ended after {received} of {needed} bytes"
                    )
                view[received : received + len(chunk)] = chunk
                received += len(chunk)

    def discard_input(self) -> None:
        """Throw away what is left of a broken reply: the VISA device clear."""
        self.resource.clear()

    # -- messages shared by the strategies

    def check_growing_reply(
        self, command: str, data: bytearray, deadline: float, max_bytes: int
    ) -> None:
        """Refuse a reply that is still incomplete at the deadline, or far too long."""
        if len(data) > max_bytes:
            raise ReplyFormatError(
                f"{self.label}: reply to {command!r} runs past {max_bytes} bytes "
                "without a terminator"
            )
        if time.monotonic() >= deadline:
            raise self.truncated(command, data) if data else self.no_reply(command)

    def no_reply(self, command: str) -> InstrumentTimeout:
        return InstrumentTimeout(
            f"{self.label}: no reply within {self.timeout_s():g} s to {command!r}"
        )

    def truncated(self, command: str, data: bytes | bytearray) -> ReplyFormatError:
        return ReplyFormatError(
            f"{self.label}: reply {bytes(data[:40])!r} to {command!r} has no line terminator "
            "(truncated, or still arriving when the timeout ran out)"
        )


class PyvisaPySocketTransport(VisaTransport):
    """Reads a pyvisa-py TCPIP SOCKET session straight from its socket (see the module notes).

    Every read leaves the session exactly as a ``viRead`` would: bytes read ahead stay in
    pyvisa-py's own pending buffer.
    """

    def __init__(self, resource: MessageBasedResource, label: str, session: Any) -> None:
        super().__init__(resource, label)
        self.session = session
        self.socket: socket.socket = session.interface
        self._readable: Any = None  # a poll on the socket, where the platform has one
        if _DONTWAIT:
            self._readable = select.poll()
            self._readable.register(self.socket, select.POLLIN)

    def tune(self) -> None:
        """Nagle off through pyvisa-py's own helper (0.8 registers no attribute setter)."""
        self.session._set_tcpip_nodelay(constants.ResourceAttribute.tcpip_nodelay, True)

    def timeout_s(self) -> float:
        """The session's timeout, as pyvisa-py keeps it (seconds, None for none)."""
        timeout = self.session.timeout
        return math.inf if timeout is None else timeout

    def binary_reads(self) -> AbstractContextManager[str | None]:
        """Nothing to switch: these reads never stop at a termination character."""
        return nullcontext(self.resource.read_termination)

    def write(self, message: str) -> None:
        """Send the message and the write termination, encoded as PyVISA would, within the
        resource's timeout."""
        resource = self.resource
        data = memoryview((message + (resource.write_termination or "")).encode(resource.encoding))
        deadline = time.monotonic() + self.timeout_s()
        while data:
            try:
                sent = self._waited(deadline, self.socket.send, data)
            except TimeoutError:
                raise InstrumentTimeout(
                    f"{self.label}: could not send {message!r} within {self.timeout_s():g} s "
                    "(the instrument is not reading)"
                ) from None
            data = data[sent:]

    def read_bytes(self, count: int, command: str) -> bytes:
        """The next ``count`` bytes: read-ahead bytes first, then from the socket in whole
        chunks (what follows stays read ahead), within the resource's timeout."""
        pending: bytearray = self.session._pending_buffer
        if len(pending) < count:
            deadline = time.monotonic() + self.timeout_s()
            while len(pending) < count:
                if time.monotonic() >= deadline:
                    raise InstrumentTimeout(
                        f"{self.label}: reply to {command!r} stalled after {bytes(pending)!r}, "
                        f"{count} bytes expected"
                    )
                self._receive(pending, deadline, command, UNIT_CHUNK_BYTES)
        taken = bytes(pending[:count])
        del pending[:count]
        return taken

    def read_message(
        self, command: str, deadline: float, max_bytes: int = MAX_TEXT_REPLY_BYTES
    ) -> bytes:
        """As :meth:`VisaTransport.read_message`, the deadline holding even while bytes trickle
        in."""
        terminator = (self.resource.read_termination or "\n").encode("ascii")
        pending: bytearray = self.session._pending_buffer
        while (end := pending.find(terminator)) < 0:
            self.check_growing_reply(command, pending, deadline, max_bytes)
            self._receive(pending, deadline, command, TEXT_CHUNK_BYTES)
        end += len(terminator)
        message = bytes(pending[:end])
        del pending[:end]
        return message

    def read_unit(self, command: str, deadline: float, max_bytes: int) -> tuple[bytes, bytes]:
        """As :meth:`VisaTransport.read_unit`, from the bytes received in whole chunks."""
        pending: bytearray = self.session._pending_buffer
        end = find_unit_end(pending) if pending else -1
        while end < 0:
            self.check_growing_reply(command, pending, deadline, max_bytes)
            self._receive(pending, deadline, command, UNIT_CHUNK_BYTES)
            end = find_unit_end(pending)
        unit = bytes(pending[:end])
        separator = bytes(pending[end : end + 1])
        del pending[: end + 1]
        return unit, separator

    def _waited(self, deadline: float, operation: Callable[..., T], *args: Any) -> T:
        """``operation(*args, flags)``, a socket call: at once where it need not wait, else
        waiting on the socket's timeout until ``deadline`` at most (TimeoutError then)."""
        if _DONTWAIT:
            try:
                return operation(*args, _DONTWAIT)
            except BlockingIOError:
                pass  # not at once: wait below
        sock = self.socket
        previous_timeout = sock.gettimeout()
        remaining_s = deadline - time.monotonic()
        sock.settimeout(None if math.isinf(remaining_s) else max(remaining_s, 1e-3))
        try:
            return operation(*args, 0)
        finally:
            sock.settimeout(previous_timeout)

    def _received(self, deadline: float, operation: Callable[..., T], *args: Any) -> T:
        """A receive, ``operation(*args, flags)``: what has arrived at once, else waiting for
        more in ``poll`` (where the platform has it) until ``deadline`` at most (TimeoutError
        then), the socket left as it is."""
        if self._readable is None:
            return self._waited(deadline, operation, *args)
        while True:
            try:
                return operation(*args, _DONTWAIT)
            except BlockingIOError:
                pass  # nothing yet
            remaining_s = deadline - time.monotonic()
            wait_ms = None if math.isinf(remaining_s) else math.ceil(remaining_s * 1e3)
            if remaining_s <= 0 or not self._readable.poll(wait_ms):
                raise TimeoutError

    def _receive(self, pending: bytearray, deadline: float, command: str, chunk_bytes: int) -> None:
        """Add what the socket has to ``pending`` (pyvisa-py's buffer), ``chunk_bytes`` at
        most, waiting for it until ``deadline`` at most: the caller checks the deadline."""
        try:
            chunk = self._received(deadline, self.socket.recv, chunk_bytes)
        except TimeoutError:
            return
        if not chunk:
            raise ConnectionLost(f"{self.label}: connection closed during the reply to {command!r}")
        pending += chunk

    def read_into(self, view: memoryview, spare: int = 0) -> None:
        """Receive straight into ``view``: read-ahead bytes first, then the socket, within the
        resource's timeout, until all but its last ``spare`` bytes are filled. The last
        receive may run into the spare room (what follows a block usually comes with its last
        bytes): what lands there goes back to the pending buffer, as read ahead."""
        pending: bytearray = self.session._pending_buffer
        needed = len(view) - spare
        received = min(len(pending), needed)
        view[:received] = pending[:received]
        del pending[:received]
        sock = self.socket
        deadline = time.monotonic() + self.timeout_s()
        while received < needed:
            if time.monotonic() >= deadline:
                raise InstrumentTimeout(
                    f"{self.label}: block stalled after {received} of {needed} bytes"
                )
            try:
                count = self._received(deadline, sock.recv_into, view[received:], 0)
            except TimeoutError:
                continue  # the deadline check above raises
            if count == 0:
                raise ConnectionLost(
                    f"{self.label}: connection closed after {received} of {needed} bytes"
                )
            received += count
        if received > needed:
            pending += view[needed:received]  # pending was emptied above

    def discard_input(self) -> None:
        """Read and drop what the peer has sent until it goes quiet or closes (pyvisa-py's
        device clear would spin for ever on a closed connection or an endless stream)."""
        self.session._pending_buffer.clear()
        sock = self.socket
        deadline = time.monotonic() + min(self.timeout_s(), 5.0)
        previous_timeout = sock.gettimeout()
        try:
            sock.settimeout(QUIET_S)
            while time.monotonic() < deadline:
                try:
                    if not sock.recv(BLOCK_CHUNK_BYTES):
                        return  # closed by the peer
                except (TimeoutError, OSError):
                    return  # quiet (or gone): nothing more to drop
        finally:
            sock.settimeout(previous_timeout)


def _pyvisa_py_socket_session(resource: MessageBasedResource) -> Any | None:
    """The pyvisa-py TCPIP SOCKET session behind ``resource``, if that is what it is."""
    sessions = getattr(resource.visalib, "sessions", None)
    session = sessions.get(resource.session) if isinstance(sessions, dict) else None
    fields_present = all(
        hasattr(session, field)
        for field in ("interface", "_pending_buffer", "_set_tcpip_nodelay", "timeout")
    )
    if fields_present and isinstance(session.interface, socket.socket):
        return session
    return None


def choose_transport(resource: MessageBasedResource, label: str) -> VisaTransport:
    """The fast socket path for a pyvisa-py socket session, else the generic VISA path."""
    session = _pyvisa_py_socket_session(resource)
    if session is not None:
        return PyvisaPySocketTransport(resource, label, session)
    return VisaTransport(resource, label)
