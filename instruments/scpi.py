"""The SCPI base class every role builds on: transport, identity, error queue, block transfer.

One base does the plumbing once (opening, terminations, error translation, the error queue,
fast binary blocks); each bench role is a small subclass that only knows its commands.
"""

from __future__ import annotations

import math
import re
import socket
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any, ClassVar, Self

import numpy as np
import pyvisa
from pyvisa import constants
from pyvisa.resources import MessageBasedResource

from instruments import block
from instruments.errors import (
    BlockFormatError,
    ConnectionLost,
    InstrumentError,
    InstrumentTimeout,
    ReplyFormatError,
    ScpiError,
)

DEFAULT_TIMEOUT_S = 5.0
#: Bytes asked of the VISA layer per read while receiving a block payload.
BLOCK_CHUNK_BYTES = 1 << 20
#: Silence that ends an indefinite (#0) block on a transport without END, such as a socket.
QUIET_AFTER_INDEFINITE_BLOCK_MS = 50.0
#: Bound on error-queue reads: an instrument that never answers "0,..." cannot hang us.
MAX_QUEUED_ERRORS = 64
#: Bytes asked of the VISA layer per read of a text reply, and the longest text reply accepted
#: (far above any reply read as text; a peer streaming without a terminator is cut off here).
TEXT_CHUNK_BYTES = 1 << 14
MAX_TEXT_REPLY_BYTES = 1 << 20

#: IEEE 488.2 decimal numeric data in its flexible form (NRf, 7.7.2: NR1, NR2 and NR3), and the
#: INFinity, NINFinity and NAN keywords of SCPI-1999 vol. 1, 7.2.1.5.
_NRF = re.compile(r"[+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?")
_NUMBER_KEYWORDS = {
    "INF": math.inf,
    "INFINITY": math.inf,
    "NINF": -math.inf,
    "NINFINITY": -math.inf,
    "NAN": math.nan,
}
#: IEEE 488.2 character response data (8.7.1): a mnemonic, letter first.
_MNEMONIC = re.compile(r"[A-Za-z][A-Za-z0-9_]*")
_ERROR_CODE = re.compile(r"[+-]?\d+")

_TIMEOUT_CODES = {constants.StatusCode.error_timeout}
_CONNECTION_CODES = {
    constants.StatusCode.error_connection_lost,
    constants.StatusCode.error_io,
    constants.StatusCode.error_invalid_object,
    constants.StatusCode.error_resource_not_found,
}


@dataclass(frozen=True)
class Identity:
    """The four fields of a ``*IDN?`` reply (IEEE Std 488.2-1992, 10.14)."""

    manufacturer: str
    model: str
    serial: str
    firmware: str

    @classmethod
    def parse(cls, reply: str) -> Identity:
        """Parse ``manufacturer,model,serial,firmware``; ``0`` stands for an absent field."""
        parts = [part.strip() for part in reply.strip().split(",")]
        if len(parts) != 4:
            raise ReplyFormatError(
                f"*IDN? reply {reply!r} has {len(parts)} fields; IEEE 488.2 10.14 defines 4"
            )
        return cls(*parts)


def open_resource(
    resource_name: str,
    *,
    visa_library: str = "@py",
    timeout_s: float = DEFAULT_TIMEOUT_S,
) -> MessageBasedResource:
    """Open a message-based VISA resource with ``\\n`` terminations and a timeout.

    ``visa_library`` selects the VISA implementation: ``"@py"`` (pyvisa-py, the default),
    ``"@ivi"`` or the path of a vendor VISA library.
    """
    try:
        manager = pyvisa.ResourceManager(visa_library)
        resource = manager.open_resource(resource_name)
    except Exception as error:  # pyvisa-py raises bare Exceptions as well as VisaIOError
        raise ConnectionLost(f"cannot open {resource_name!r}: {error}") from None
    if not isinstance(resource, MessageBasedResource):
        resource.close()
        raise InstrumentError(f"{resource_name!r} is not a message-based instrument")
    resource.read_termination = "\n"
    resource.write_termination = "\n"
    resource.timeout = timeout_s * 1000.0
    return resource


def parse_number(text: str) -> float | None:
    """The value of one SCPI numeric reply (NRf or an INF/NINF/NAN keyword), else None.

    Stricter than :func:`float`, which also takes ``1_000`` or ``infinity`` spelled in any case
    and would let a garbled reply through as a number.
    """
    text = text.strip()
    if _NRF.fullmatch(text):
        return float(text)
    return _NUMBER_KEYWORDS.get(text.upper())


def is_response_token(text: str) -> bool:
    """Whether ``text`` is one SCPI response token: a number or a mnemonic (IEEE 488.2 8.7)."""
    return parse_number(text) is not None or _MNEMONIC.fullmatch(text.strip()) is not None


class ScpiInstrument:
    """An SCPI instrument over a PyVISA message-based resource.

    Every error leaving this class is an :class:`InstrumentError` naming the instrument (its
    name and resource) and the command: VISA timeouts become :class:`InstrumentTimeout`, a
    dropped connection :class:`ConnectionLost`, an unparsable reply :class:`ReplyFormatError`.
    """

    role: ClassVar[str] = "instrument"

    def __init__(self, resource: MessageBasedResource, name: str | None = None) -> None:
        self.resource = resource
        self.name = name or self.role
        self.resource_name: str = resource.resource_name  # kept for messages after close()
        self._closed = False
        self._tune_transport()

    @classmethod
    def open(
        cls,
        resource_name: str,
        *,
        name: str | None = None,
        visa_library: str = "@py",
        timeout_s: float = DEFAULT_TIMEOUT_S,
        **options: Any,
    ) -> Self:
        """Open ``resource_name`` (e.g. ``TCPIP::host::5025::SOCKET``) as this role.

        ``options`` are the role's own constructor arguments (its limits, a command map).
        """
        resource = open_resource(resource_name, visa_library=visa_library, timeout_s=timeout_s)
        try:
            return cls(resource, name=name, **options)
        except BaseException:
            resource.close()
            raise

    @property
    def label(self) -> str:
        """How messages name this instrument: its name and its resource string."""
        return f"{self.name} ({self.resource_name})"

    # -- plumbing -------------------------------------------------------------------------

    @contextmanager
    def _translated(self, command: str) -> Iterator[None]:
        """Turn VISA and socket failures during ``command`` into driver errors."""
        try:
            yield
        except pyvisa.errors.VisaIOError as error:
            if error.error_code in _TIMEOUT_CODES:
                raise InstrumentTimeout(
                    f"{self.label}: no reply within {self.resource.timeout / 1000:g} s "
                    f"to {command!r}"
                ) from None
            if error.error_code in _CONNECTION_CODES:
                raise ConnectionLost(f"{self.label}: connection lost during {command!r}") from None
            raise InstrumentError(f"{self.label}: {error} during {command!r}") from None
        except OSError as error:  # pyvisa-py lets socket errors through
            raise ConnectionLost(
                f"{self.label}: connection lost during {command!r} ({error})"
            ) from None
        except pyvisa.errors.InvalidSession:
            raise ConnectionLost(f"{self.label}: session closed before {command!r}") from None
        except UnicodeDecodeError as error:  # binary bytes where a text reply was expected
            raise ReplyFormatError(
                f"{self.label}: reply to {command!r} is not text ({error.reason} at byte "
                f"{error.start}); the session may hold the rest of an earlier reply"
            ) from None

    @property
    def is_socket(self) -> bool:
        """Whether the resource is a raw TCP socket, where no END marks the end of a reply."""
        return self.resource_name.upper().endswith("::SOCKET")

    def _timeout_s(self) -> float:
        return self.resource.timeout / 1000.0 if self.resource.timeout else math.inf

    def _tune_transport(self) -> None:
        """Turn off Nagle's algorithm on socket resources.

        Every configuration step is a write followed by ``SYST:ERR?``; with Nagle's algorithm
        on, that second small write waits for the peer's delayed ACK (about 40 ms on Linux)
        because the first one has no reply. VI_ATTR_TCPIP_NODELAY is the VISA attribute for it;
        pyvisa-py 0.8 registers no setter for it, so its session's own helper is used then.
        """
        resource = self.resource
        if not self.is_socket:
            return
        try:
            resource.set_visa_attribute(constants.ResourceAttribute.tcpip_nodelay, True)
        except Exception:  # pyvisa-py raises its own UnknownAttribute here
            session = self._pyvisa_py_socket_session()
            if session is not None:
                session._set_tcpip_nodelay(constants.ResourceAttribute.tcpip_nodelay, True)

    def _pyvisa_py_socket_session(self) -> Any | None:
        """The pyvisa-py TCPIP SOCKET session behind the resource, if that is what it is."""
        sessions = getattr(self.resource.visalib, "sessions", None)
        session = sessions.get(self.resource.session) if isinstance(sessions, dict) else None
        fields_present = all(
            hasattr(session, field)
            for field in ("interface", "_pending_buffer", "_set_tcpip_nodelay")
        )
        if fields_present and isinstance(session.interface, socket.socket):
            return session
        return None

    # -- messages -------------------------------------------------------------------------

    def write(self, command: str) -> None:
        """Send one program message, unchecked (see :meth:`configure`)."""
        with self._translated(command):
            self.resource.write(command)

    def query(self, command: str) -> str:
        """Send a query and return its reply without the line terminator."""
        with self._translated(command):
            self.resource.write(command)
            deadline = time.monotonic() + self._timeout_s()
            return self._read_message(command, deadline).decode("ascii").strip()

    def _read_message(self, command: str, deadline: float) -> bytes:
        """Read one response message, up to its terminator, by ``deadline`` (monotonic s).

        PyVISA's own read goes on for as long as bytes keep coming, so a peer that streams
        without a terminator would hold it for ever; here the deadline bounds the whole reply
        and its length is capped. On a socket, where no END marks the end, a reply that stops
        before its terminator is refused as truncated rather than read as a shorter value.
        """
        session = self._pyvisa_py_socket_session()
        if session is not None:
            return self._read_line_from_socket(session, command, deadline)
        resource = self.resource
        data = bytearray()
        with resource.ignore_warning(constants.StatusCode.success_max_count_read):
            while True:
                try:
                    chunk, status = resource.visalib.read(resource.session, TEXT_CHUNK_BYTES)
                except pyvisa.errors.VisaIOError as error:
                    if error.error_code in _TIMEOUT_CODES:
                        raise self._no_reply(command) from None
                    raise
                data += chunk
                if status != constants.StatusCode.success_max_count_read:
                    break
                self._check_growing_reply(command, data, deadline)
        if self.is_socket and not data.endswith(b"\n"):
            raise self._truncated(command, data)
        return bytes(data)

    def _read_line_from_socket(self, session: Any, command: str, deadline: float) -> bytes:
        """:meth:`_read_message` straight from a pyvisa-py socket session (bytes it has read
        ahead first), so that the deadline holds even while bytes trickle in."""
        pending: bytearray = session._pending_buffer
        terminator = (self.resource.read_termination or "\n").encode("ascii")
        sock: socket.socket = session.interface
        previous_timeout = sock.gettimeout()
        try:
            while (end := pending.find(terminator)) < 0:
                self._check_growing_reply(command, pending, deadline)
                sock.settimeout(max(deadline - time.monotonic(), 1e-3))
                try:
                    chunk = sock.recv(TEXT_CHUNK_BYTES)
                except TimeoutError:
                    continue  # the deadline check above raises
                if not chunk:
                    raise ConnectionLost(
                        f"{self.label}: connection closed during the reply to {command!r}"
                    )
                pending += chunk
        finally:
            sock.settimeout(previous_timeout)
        line = bytes(pending[: end + len(terminator)])
        del pending[: end + len(terminator)]
        return line

    def _check_growing_reply(self, command: str, data: bytearray, deadline: float) -> None:
        """Refuse a reply that is still incomplete at the deadline, or far too long."""
        if len(data) > MAX_TEXT_REPLY_BYTES:
            raise ReplyFormatError(
                f"{self.label}: reply to {command!r} runs past {MAX_TEXT_REPLY_BYTES} bytes "
                "without a terminator"
            )
        if time.monotonic() >= deadline:
            raise self._truncated(command, data) if data else self._no_reply(command)

    def _no_reply(self, command: str) -> InstrumentTimeout:
        return InstrumentTimeout(
            f"{self.label}: no reply within {self._timeout_s():g} s to {command!r}"
        )

    def _truncated(self, command: str, data: bytes | bytearray) -> ReplyFormatError:
        return ReplyFormatError(
            f"{self.label}: reply {bytes(data[:40])!r} to {command!r} has no line terminator "
            "(truncated, or still arriving when the timeout ran out)"
        )

    def query_float(self, command: str) -> float:
        """Send a query whose reply is one SCPI number (NR1/NR2/NR3 or NAN/INF forms)."""
        reply = self.query(command)
        value = parse_number(reply)
        if value is None:
            raise ReplyFormatError(f"{self.label}: reply {reply!r} to {command!r} is not a number")
        return value

    def query_bool(self, command: str) -> bool:
        """Send a query whose reply is a SCPI boolean, ``1``/``0`` (or ``ON``/``OFF``)."""
        reply = self.query(command)
        normal = reply.upper()
        if normal in ("1", "ON"):
            return True
        if normal in ("0", "OFF"):
            return False
        raise ReplyFormatError(f"{self.label}: reply {reply!r} to {command!r} is not 1 or 0")

    def query_floats(self, command: str) -> list[float]:
        """Send a query whose reply is comma-separated numbers."""
        reply = self.query(command)
        parsed = [parse_number(item) for item in reply.split(",")]
        values = [value for value in parsed if value is not None]
        if len(values) != len(parsed):
            raise ReplyFormatError(
                f"{self.label}: reply {reply!r} to {command!r} is not a list of numbers"
            )
        if not all(math.isfinite(value) for value in values):
            raise ReplyFormatError(f"{self.label}: reply {reply!r} to {command!r} is not finite")
        return values

    def check_errors(self, command: str) -> None:
        """Drain the error queue (``SYSTem:ERRor?``, SCPI-1999 vol. 2 ch. 19.7).

        Reads until ``0,...``; the first error found is raised as :class:`ScpiError` with its
        code, its message and ``command``, the command that caused it. The loop is bounded.
        """
        first: tuple[int, str] | None = None
        for _ in range(MAX_QUEUED_ERRORS):
            code, message = self._parse_error(self.query("SYST:ERR?"))
            if code == 0:
                if first is not None:
                    raise ScpiError(self.label, command, *first)
                return
            if first is None:
                first = (code, message)
        raise InstrumentError(
            f"{self.label}: error queue still not empty after {MAX_QUEUED_ERRORS} reads "
            f"following {command!r}"
        )

    def _parse_error(self, reply: str) -> tuple[int, str]:
        code_text, comma, message = reply.partition(",")
        if not comma or not _ERROR_CODE.fullmatch(code_text.strip()):
            raise ReplyFormatError(
                f"{self.label}: SYST:ERR? reply {reply!r} does not start with an error code"
            )
        return int(code_text), message.strip().strip('"')

    def configure(self, *commands: str) -> None:
        """Send configuration commands and raise any error they queued.

        Several commands are sent back to back and checked with one error-queue read; an error
        then names all of them, in the order sent.
        """
        for command in commands:
            self.write(command)
        self.check_errors(" ; ".join(commands))

    # -- IEEE 488.2 common commands -------------------------------------------------------

    def identify(self) -> Identity:
        """Ask ``*IDN?`` and parse it (IEEE 488.2 10.14)."""
        return Identity.parse(self.query("*IDN?"))

    def reset(self) -> None:
        """``*RST``: the instrument's reset state (IEEE 488.2 10.32)."""
        self.configure("*RST")

    def clear(self) -> None:
        """``*CLS``: clear status and the error queue (IEEE 488.2 10.3)."""
        self.write("*CLS")

    def wait_complete(self) -> None:
        """``*OPC?``: block until pending operations are done (IEEE 488.2 10.19)."""
        reply = self.query("*OPC?")
        if reply != "1":
            raise ReplyFormatError(f"{self.label}: *OPC? answered {reply!r}, expected '1'")

    # -- binary blocks --------------------------------------------------------------------

    def query_block(self, command: str) -> memoryview:
        """Send ``command`` and read its IEEE 488.2 block reply; return the payload bytes.

        Line termination is switched off while the block is read, so a ``0x0A`` byte inside the
        payload does not end a read; a definite block is read straight into a preallocated
        buffer in large chunks. An indefinite (``#0``) block is read up to the final newline.
        """
        resource = self.resource
        saved_termination = resource.read_termination
        with self._translated(command):
            resource.write(command)
            resource.read_termination = None
            try:
                digit_count = block.length_digit_count(resource.read_bytes(2))
                if digit_count == 0:
                    return self._read_indefinite_payload(command, saved_termination)
                length = block.parse_length(resource.read_bytes(digit_count))
                # np.empty maps pages only as bytes arrive: a garbled header announcing a
                # gigabyte costs no more memory than what is actually received
                payload = self._read_into(np.empty(length, dtype=np.uint8))
                self._read_trailer(command)
                return payload
            except BlockFormatError:
                self._discard_input()  # drop the rest of the malformed reply
                raise
            finally:
                resource.read_termination = saved_termination

    def _discard_input(self) -> None:
        """Throw away what is left of a broken reply, within the timeout.

        On a socket the bytes already sent are read and dropped until the peer goes quiet or
        closes (pyvisa-py's clear would spin for ever on a closed connection or an endless
        stream); on other interfaces this is the VISA device clear.
        """
        session = self._pyvisa_py_socket_session()
        if session is None:
            self.resource.clear()
            return
        session._pending_buffer.clear()
        sock: socket.socket = session.interface
        deadline = time.monotonic() + min(self._timeout_s(), 5.0)
        previous_timeout = sock.gettimeout()
        try:
            sock.settimeout(QUIET_AFTER_INDEFINITE_BLOCK_MS / 1000.0)
            while time.monotonic() < deadline:
                try:
                    if not sock.recv(BLOCK_CHUNK_BYTES):
                        return  # closed by the peer
                except (TimeoutError, OSError):
                    return  # quiet (or gone): nothing more to drop
        finally:
            sock.settimeout(previous_timeout)

    def _read_into(self, buffer: np.ndarray) -> memoryview:
        """Fill ``buffer`` with the next ``len(buffer)`` bytes of the reply."""
        view = memoryview(buffer)
        session = self._pyvisa_py_socket_session()
        if session is not None:
            self._receive_from_socket(session, view)
        else:
            self._read_visa_chunks(view)
        return view

    def _read_visa_chunks(self, view: memoryview) -> None:
        """Read through ``viRead`` in large chunks (any VISA library), one copy per chunk."""
        resource = self.resource
        received = 0
        # A full chunk is the normal case here, not a warning.
        with resource.ignore_warning(constants.StatusCode.success_max_count_read):
            while received < len(view):
                chunk, _ = resource.visalib.read(
                    resource.session, min(BLOCK_CHUNK_BYTES, len(view) - received)
                )
                if not chunk:
                    raise BlockFormatError(
                        f"{self.label}: block ended after {received} of {len(view)} bytes"
                    )
                view[received : received + len(chunk)] = chunk
                received += len(chunk)

    def _receive_from_socket(self, session: Any, view: memoryview) -> None:
        """Receive straight into ``view`` from a pyvisa-py socket session.

        pyvisa-py's ``viRead`` copies every byte four times (receive, read-ahead buffer, slice,
        bytes) in calls of at most 4096 bytes, each behind a ``select``, which caps a 10 M-sample
        transfer far below what the socket delivers. Here the bytes pyvisa-py has already read
        ahead are taken first, then the session's own socket receives into the buffer directly,
        within the resource's timeout. The session is left exactly as a ``viRead`` would.
        """
        pending: bytearray = session._pending_buffer
        received = min(len(pending), len(view))
        view[:received] = pending[:received]
        del pending[:received]
        sock: socket.socket = session.interface
        timeout_s = self.resource.timeout / 1000.0 if self.resource.timeout else math.inf
        deadline = time.monotonic() + timeout_s
        previous_timeout = sock.gettimeout()
        try:
            while received < len(view):
                remaining_s = deadline - time.monotonic()
                if remaining_s <= 0:
                    raise InstrumentTimeout(
                        f"{self.label}: block stalled after {received} of {len(view)} bytes"
                    )
                sock.settimeout(None if math.isinf(remaining_s) else remaining_s)
                try:
                    count = sock.recv_into(view[received:])
                except TimeoutError:
                    continue  # the deadline check above raises
                if count == 0:
                    raise ConnectionLost(
                        f"{self.label}: connection closed after {received} of {len(view)} bytes"
                    )
                received += count
        finally:
            sock.settimeout(previous_timeout)

    def _read_trailer(self, command: str) -> None:
        """Consume the newline that ends a block reply (a CR before it is tolerated)."""
        trailer = self.resource.read_bytes(1)
        if trailer == b"\r":
            trailer = self.resource.read_bytes(1)
        if trailer != b"\n":
            raise BlockFormatError(
                f"{self.label}: block reply to {command!r} continues with {trailer!r} "
                "after its announced length"
            )

    def _read_indefinite_payload(self, command: str, termination: str | None) -> memoryview:
        """Read a ``#0`` payload: messages up to each newline until the reply has no more.

        Over a socket there is no END signal, so the payload is everything up to the last
        newline the instrument sends before it goes quiet for
        :data:`QUIET_AFTER_INDEFINITE_BLOCK_MS`. The whole payload must arrive within the
        resource's timeout: a block that never ends is refused, not read for ever.
        """
        resource = self.resource
        resource.read_termination = termination or "\n"
        timeout_s = self._timeout_s()
        deadline = time.monotonic() + timeout_s
        received = bytearray(self._read_message(command, deadline))
        quiet_s = QUIET_AFTER_INDEFINITE_BLOCK_MS / 1000.0
        saved_timeout = resource.timeout
        resource.timeout = min(saved_timeout or math.inf, QUIET_AFTER_INDEFINITE_BLOCK_MS)
        try:
            while True:
                try:
                    received += self._read_message(
                        command, min(deadline, time.monotonic() + quiet_s)
                    )
                except InstrumentTimeout:
                    break  # quiet: the block is complete
                if time.monotonic() >= deadline:
                    raise InstrumentTimeout(
                        f"{self.label}: indefinite block reply to {command!r} still arriving "
                        f"after {timeout_s:g} s"
                    )
        finally:
            resource.timeout = saved_timeout
        return block.split_block(b"#0" + received)

    # -- lifetime -------------------------------------------------------------------------

    @property
    def closed(self) -> bool:
        """Whether :meth:`close` has run."""
        return self._closed

    def close(self) -> None:
        """Close the VISA session (once; closing again does nothing)."""
        if not self._closed:
            self._closed = True
            self.resource.close()

    def __enter__(self) -> Self:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    def __repr__(self) -> str:
        return f"{type(self).__name__}({self.label})"
