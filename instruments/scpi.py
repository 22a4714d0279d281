"""The SCPI base class every role builds on: transport, identity, error queue, block transfer.

One base does the plumbing once (opening with the link's settings, error translation, the
error queue, binary blocks, the SCPI trace); how reply bytes are read is a transport strategy
(:mod:`labseq_instruments.transport`); each bench role is a small subclass that only knows its
commands, and takes them from a command map (:mod:`labseq_instruments.roles`).
"""

from __future__ import annotations

import logging
import math
import re
import time
from collections.abc import Sequence
from contextlib import suppress
from dataclasses import dataclass
from typing import Any, ClassVar, Self

import numpy as np
import pyvisa
from pyvisa import constants
from pyvisa.resources import MessageBasedResource

from labseq_instruments import block
from labseq_instruments.connection import Connection
from labseq_instruments.errors import (
    BlockFormatError,
    ConnectionLost,
    InstrumentError,
    InstrumentTimeout,
    ReplyFormatError,
    ScpiError,
)
from labseq_instruments.text import printable, quoted
from labseq_instruments.transport import (
    MAX_TEXT_REPLY_BYTES,
    TIMEOUT_CODES,
    VisaTransport,
    choose_transport,
)

DEFAULT_TIMEOUT_S = 5.0
#: Silence that ends an indefinite (#0) block on a transport without END, such as a socket.
QUIET_AFTER_INDEFINITE_BLOCK_MS = 50.0
#: Bound on error-queue reads: an instrument that never answers "0,..." cannot hang us.
MAX_QUEUED_ERRORS = 64
#: Longest header accepted before a block when the instrument sends headers with its replies.
MAX_BLOCK_HEADER_BYTES = 64
#: Room after a block's payload for what follows it (its newline, or ``;`` and an error-queue
#: reply), taken in the same receive where the transport can.
BLOCK_SPARE_BYTES = 64
#: The SCPI error-queue query (SCPI-1999 vol. 2, 19.7): the oldest error, ``0,...`` when none.
ERROR_QUERY = "SYST:ERR?"

#: Every SCPI exchange is logged here at DEBUG level: the command sent, the reply received and
#: how long it took. ``--trace FILE`` on a bench command writes this logger to FILE.
trace_log = logging.getLogger("labseq_instruments.trace")

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
#: A header echoed before a reply: mnemonics joined by colons, an optional leading colon.
_REPLY_HEADER = re.compile(r":?[A-Za-z][A-Za-z0-9_]*(?::[A-Za-z][A-Za-z0-9_]*)*\??")

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
        """Parse ``manufacturer,model,serial,firmware``; ``0`` stands for an absent field. Each
        field is kept :func:`~labseq_instruments.text.printable` (it is shown and stored for
        display)."""
        parts = [printable(part).strip() for part in reply.strip().split(",")]
        if len(parts) != 4:
            raise ReplyFormatError(
                f"*IDN? reply {quoted(reply)} has {len(parts)} fields; IEEE 488.2 10.14 defines 4"
            )
        return cls(*parts)


def describe_visa_library(visa_library: str) -> str:
    """How messages name a VISA library specification; "" is PyVISA's own choice."""
    if visa_library:
        return visa_library
    return "the default VISA library (PYVISA_LIBRARY, else .pyvisarc, else IVI, else pyvisa-py)"


def open_resource(
    resource_name: str,
    *,
    visa_library: str = "",
    timeout_s: float = DEFAULT_TIMEOUT_S,
    connection: Connection | None = None,
) -> MessageBasedResource:
    """Open a message-based VISA resource with its terminations, serial settings and timeout.

    ``resource_name`` is a VISA resource string or an alias the VISA library knows.
    ``visa_library`` selects the VISA implementation: ``"@py"`` (pyvisa-py), ``"@ivi"``, the
    path of a vendor VISA library, or ``""`` to let PyVISA choose as its documentation says:
    the ``PYVISA_LIBRARY`` environment variable, then the library named in ``~/.pyvisarc``, then
    an installed IVI VISA, then pyvisa-py. ``connection`` carries terminations (``\\n`` when
    not given) and, for a serial port, its line settings.
    """
    connection = connection or Connection()
    try:
        manager = pyvisa.ResourceManager(visa_library)
        resource = manager.open_resource(resource_name)
    except Exception as error:  # pyvisa-py raises bare Exceptions as well as VisaIOError
        library = describe_visa_library(visa_library)
        raise ConnectionLost(f"cannot open {resource_name!r} with {library}: {error}") from None
    if not isinstance(resource, MessageBasedResource):
        resource.close()
        raise InstrumentError(f"{resource_name!r} is not a message-based instrument")
    try:
        connection.apply(resource)
    except Exception as error:  # a library or interface that refuses a setting
        resource.close()
        raise InstrumentError(f"{resource_name!r}: cannot apply its settings: {error}") from None
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


def strip_reply_header(reply: str) -> str:
    """A reply without the header an instrument puts first when its headers are on: the first
    word, if it is a header (``:CHAN1:SCAL 5.0E-01`` gives ``5.0E-01``)."""
    head, space, rest = reply.partition(" ")
    if space and _REPLY_HEADER.fullmatch(head):
        return rest.strip()
    return reply


def is_response_token(text: str) -> bool:
    """Whether ``text`` is one SCPI response token: a number or a mnemonic (IEEE 488.2 8.7)."""
    return parse_number(text) is not None or _MNEMONIC.fullmatch(text.strip()) is not None


class _Translated:
    """The context of :meth:`ScpiInstrument._translated` (a class: it wraps every exchange,
    and a generator-based context manager costs several times as much)."""

    __slots__ = ("instrument", "command")

    def __init__(self, instrument: ScpiInstrument, command: str) -> None:
        self.instrument = instrument
        self.command = command

    def __enter__(self) -> None:
        return None

    def __exit__(self, kind: object, error: BaseException | None, traceback: object) -> bool:
        if error is None:
            return False
        self.instrument.forget_settings()
        translated = self.instrument._translate(error, self.command)
        if translated is None:
            return False  # raised as it is
        raise translated from None


class ScpiInstrument:
    """An SCPI instrument over a PyVISA message-based resource.

    Every error leaving this class is an :class:`InstrumentError` naming the instrument (its
    name and resource) and the command: VISA timeouts become :class:`InstrumentTimeout`, a
    dropped connection :class:`ConnectionLost`, an unparsable reply :class:`ReplyFormatError`.

    :attr:`known_settings` holds settings a role last set successfully on this session, so it
    can leave out sending them again (the scope's transfer settings). The driver assumes it is
    the instrument's only client, as the bench locks make it on a real bench; within that, the
    record is dropped whenever the driver can no longer vouch for it: on any error, on ``*RST``,
    on any command sent through :meth:`write` or :meth:`configure` (they may change anything),
    and when the session is closed or abandoned.
    """

    role: ClassVar[str] = "instrument"

    #: Whether the instrument puts its header before every reply (``:CHAN1:SCAL 5.0``); a
    #: command map sets it for its instrument.
    reply_headers: bool = False

    def __init__(self, resource: MessageBasedResource, name: str | None = None) -> None:
        self.resource = resource
        self.name = name or self.role
        self.resource_name: str = resource.resource_name  # kept for messages after close()
        self._closed = False
        #: Setting key → the command that set it, for settings known to be in effect.
        self.known_settings: dict[str, str] = {}
        self.transport: VisaTransport = choose_transport(resource, self.label)
        self.transport.tune()

    @classmethod
    def open(
        cls,
        resource_name: str,
        *,
        name: str | None = None,
        visa_library: str = "",
        timeout_s: float = DEFAULT_TIMEOUT_S,
        connection: Connection | None = None,
        **options: Any,
    ) -> Self:
        """Open ``resource_name`` (e.g. ``TCPIP::host::5025::SOCKET``) as this role.

        ``options`` are the role's own constructor arguments (its limits, a command map); the
        other arguments are those of :func:`open_resource`.
        """
        resource = open_resource(
            resource_name, visa_library=visa_library, timeout_s=timeout_s, connection=connection
        )
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

    def forget_settings(self) -> None:
        """Drop :attr:`known_settings`: whatever was set is sent again before it is relied on."""
        self.known_settings.clear()

    def reply_error(self, text: str) -> ReplyFormatError:
        """A :class:`ReplyFormatError` naming this instrument; a reply that does not parse is
        an error like any other, so the known settings are dropped."""
        self.forget_settings()
        return ReplyFormatError(f"{self.label}: {text}")

    def _translated(self, command: str) -> _Translated:
        """Turn VISA and socket failures during ``command`` into driver errors; after any
        failure the known settings are dropped (the session is in an unknown state)."""
        return _Translated(self, command)

    def _translate(self, error: BaseException, command: str) -> InstrumentError | None:
        """The driver error for a VISA or socket failure during ``command``, else None."""
        if isinstance(error, pyvisa.errors.VisaIOError):
            if error.error_code in TIMEOUT_CODES:
                return InstrumentTimeout(
                    f"{self.label}: no reply within {self.resource.timeout / 1000:g} s "
                    f"to {command!r}"
                )
            if error.error_code in _CONNECTION_CODES:
                return ConnectionLost(f"{self.label}: connection lost during {command!r}")
            return InstrumentError(f"{self.label}: {error} during {command!r}")
        if isinstance(error, OSError):  # pyvisa-py lets socket errors through
            return ConnectionLost(f"{self.label}: connection lost during {command!r} ({error})")
        if isinstance(error, pyvisa.errors.InvalidSession):
            return ConnectionLost(f"{self.label}: session closed before {command!r}")
        if isinstance(error, UnicodeDecodeError):  # binary bytes where text was expected
            return ReplyFormatError(
                f"{self.label}: reply to {command!r} is not text ({error.reason} at byte "
                f"{error.start}); the session may hold the rest of an earlier reply"
            )
        return None

    def _timeout_s(self) -> float:
        return self.transport.timeout_s()

    # -- messages -------------------------------------------------------------------------

    def write(self, command: str) -> None:
        """Send one program message, unchecked (see :meth:`configure`). It may change any
        setting, so the known settings are dropped."""
        self.forget_settings()
        self._send(command)

    def _send(self, command: str) -> None:
        trace_log.debug("%s > %s", self.name, command)
        with self._translated(command):
            self.transport.write(command)

    def query(self, command: str, *, max_bytes: int = MAX_TEXT_REPLY_BYTES) -> str:
        """Send a query and return its reply without the line terminator (nor the header an
        instrument with :attr:`reply_headers` puts first); a reply longer than ``max_bytes``
        is refused."""
        start = time.monotonic()
        trace_log.debug("%s > %s", self.name, command)
        with self._translated(command):
            self.transport.write(command)
            deadline = start + self._timeout_s()
            reply = self.transport.read_message(command, deadline, max_bytes).decode("ascii")
            reply = reply.strip()
        trace_log.debug("%s < %s  (%.1f ms)", self.name, reply, (time.monotonic() - start) * 1e3)
        return self._without_header(command, reply)

    def _without_header(self, query: str, reply: str) -> str:
        """``reply`` to ``query`` without the header an instrument with :attr:`reply_headers`
        puts first (replies to common queries such as ``*IDN?`` carry none)."""
        if self.reply_headers and not query.lstrip().startswith("*"):
            return strip_reply_header(reply)
        return reply

    def query_float(self, command: str) -> float:
        """Send a query whose reply is one SCPI number (NR1/NR2/NR3 or NAN/INF forms)."""
        reply = self.query(command)
        value = parse_number(reply)
        if value is None:
            raise self.reply_error(f"reply {quoted(reply)} to {command!r} is not a number")
        return value

    def query_bool(self, command: str) -> bool:
        """Send a query whose reply is a SCPI boolean, ``1``/``0`` (or ``ON``/``OFF``)."""
        reply = self.query(command)
        normal = reply.upper()
        if normal in ("1", "ON"):
            return True
        if normal in ("0", "OFF"):
            return False
        raise self.reply_error(f"reply {quoted(reply)} to {command!r} is not 1 or 0")

    def query_floats(self, command: str) -> list[float]:
        """Send a query whose reply is comma-separated numbers."""
        reply = self.query(command)
        parsed = [parse_number(item) for item in reply.split(",")]
        values = [value for value in parsed if value is not None]
        if len(values) != len(parsed):
            raise self.reply_error(f"reply {quoted(reply)} to {command!r} is not a list of numbers")
        if not all(math.isfinite(value) for value in values):
            raise self.reply_error(f"reply {quoted(reply)} to {command!r} is not finite")
        return values

    def check_errors(self, command: str, first_reply: str | None = None) -> None:
        """Drain the error queue (``SYSTem:ERRor?``, SCPI-1999 vol. 2 ch. 19.7).

        Reads until ``0,...``, starting from ``first_reply`` where the caller has already read
        one entry; the first error found is raised as :class:`ScpiError` with its code, its
        message and ``command``, the command that caused it. The loop is bounded.
        """
        if first_reply is not None and first_reply.startswith("0,"):
            return  # 0,"No error": the usual case, read at once
        first: tuple[int, str] | None = None
        reply = first_reply
        for _ in range(MAX_QUEUED_ERRORS):
            if reply is None:
                reply = self.query(ERROR_QUERY)
            code, message = self._parse_error(reply)
            reply = None
            if code == 0:
                if first is not None:
                    self.forget_settings()
                    raise ScpiError(self.label, command, *first)
                return
            if first is None:
                first = (code, message)
        self.forget_settings()
        raise InstrumentError(
            f"{self.label}: error queue still not empty after {MAX_QUEUED_ERRORS} reads "
            f"following {command!r}"
        )

    def _parse_error(self, reply: str) -> tuple[int, str]:
        # A header before the code is dropped even where the map does not expect headers:
        # an instrument whose *RST turned them on must still be able to report errors.
        code_text, comma, message = strip_reply_header(reply).partition(",")
        if not comma or not _ERROR_CODE.fullmatch(code_text.strip()):
            raise self.reply_error(
                f"{ERROR_QUERY} reply {quoted(reply)} does not start with an error code"
            )
        return int(code_text), printable(message.strip().strip('"'))

    def configure(self, *commands: str) -> None:
        """Send configuration commands and raise any error they queued.

        Several commands are sent back to back and checked with one error-queue read; an error
        then names all of them, in the order sent. They may change any setting, so the known
        settings are dropped.
        """
        self.forget_settings()
        self._configure(*commands)

    def _configure(self, *commands: str) -> None:
        """:meth:`configure` for commands whose effect the caller records itself."""
        for command in commands:
            self._send(command)
        self.check_errors(" ; ".join(commands))

    # -- IEEE 488.2 common commands -------------------------------------------------------

    def identify(self) -> Identity:
        """Ask ``*IDN?`` and parse it (IEEE 488.2 10.14)."""
        try:
            return Identity.parse(self.query("*IDN?"))
        except ReplyFormatError:
            self.forget_settings()
            raise

    def reset(self) -> None:
        """``*RST``: the instrument's reset state (IEEE 488.2 10.32)."""
        self.configure("*RST")

    def clear(self) -> None:
        """``*CLS``: clear status and the error queue (IEEE 488.2 10.3)."""
        self.write("*CLS")

    # -- binary blocks --------------------------------------------------------------------

    def query_block(self, command: str) -> memoryview:
        """Send ``command`` and read its IEEE 488.2 block reply; return the payload bytes.

        Line termination is switched off while the block is read, so a ``0x0A`` byte inside the
        payload does not end a read; a definite block is read straight into a preallocated
        buffer in large chunks. An indefinite (``#0``) block is read up to the final newline.
        """
        start = time.monotonic()
        trace_log.debug("%s > %s", self.name, command)
        with self._translated(command):
            self.transport.write(command)
            payload = self._read_block(command, last=True)
        trace_log.debug(
            "%s < block of %d bytes  (%.1f ms)",
            self.name,
            len(payload),
            (time.monotonic() - start) * 1e3,
        )
        return payload

    def query_with_block(
        self, queries: Sequence[str], block_query: str
    ) -> tuple[list[str], memoryview]:
        """Send ``queries``, then ``block_query``, then the error-queue query, as one program
        message, and read the one response message that answers them all: one round trip.

        IEEE 488.2 lets a program message carry several queries separated by ``;`` (7.4.1)
        and answers them in one response message, the replies separated by ``;`` (8.4.1),
        in the order asked; only an instrument whose map says it does so is sent one. Returns
        the replies to ``queries`` (without their headers) and the block's payload.

        The error query comes last, so it reports what the queries themselves queued (the
        queue is empty before, as every configuration step drains it); an error there is
        raised as :class:`ScpiError` naming the whole message, after the rest of the queue is
        drained. An instrument stops executing a message at a command that fails (IEEE 488.2
        6.1.6.1.1 lets it discard the rest): a response that ends before every query answered
        is explained from the error queue, or refused as incomplete.
        """
        message = ";".join((*queries, block_query, ERROR_QUERY))
        start = time.monotonic()
        tracing = trace_log.isEnabledFor(logging.DEBUG)
        if tracing:
            trace_log.debug("%s > %s", self.name, message)
        replies: list[str] = []
        payload: memoryview | None = None
        error_reply: str | None = None
        with self._translated(message):
            self.transport.write(message)
            deadline = start + self.transport.timeout_s()
            for _ in queries:
                unit, ended = self.transport.read_unit(message, deadline, MAX_TEXT_REPLY_BYTES)
                replies.append(unit.decode("ascii").strip())
                if ended != b";":
                    break  # the message ended early
            else:
                payload = self._read_block(message, last=False)
                # After the block: ";" and the error query's reply, or the message's end.
                rest = self.transport.read_message(message, deadline)
                if rest[:1] == b";":
                    error_reply = rest[1:].decode("ascii").strip()
                elif rest.strip():
                    self.transport.discard_input()
                    raise BlockFormatError(
                        f"{self.label}: block reply to {message!r} continues with {rest[:1]!r} "
                        "after its announced length"
                    )
        if self.reply_headers:
            replies = [self._without_header(q, r) for q, r in zip(queries, replies, strict=False)]
        if tracing:
            block_text = "no block" if payload is None else f"block of {len(payload)} bytes"
            shown = ";".join([*replies, block_text, error_reply or ""])
            elapsed_ms = (time.monotonic() - start) * 1e3
            trace_log.debug("%s < %s  (%.1f ms)", self.name, shown, elapsed_ms)
        if error_reply is None or payload is None:
            self.check_errors(message)
            answered = len(replies) + (payload is not None)
            raise self.reply_error(
                f"the response to {message!r} ended after {answered} of {len(queries) + 2} "
                "replies, and the error queue is empty"
            )
        self.check_errors(message, first_reply=error_reply)
        return replies, payload

    def _read_block(self, command: str, *, last: bool) -> memoryview:
        """Read one block reply unit and return its payload.

        ``last``: the block ends the response message, and the newline after it is consumed;
        an indefinite block is taken only then, as it always ends its message (IEEE 488.2
        8.7.9). Otherwise what follows the block is left for the caller. A definite block is
        read straight into a preallocated buffer.
        """
        try:
            with self.transport.binary_reads() as termination:
                digit_count = block.length_digit_count(self._read_block_start(command))
                if digit_count == 0:
                    if not last:
                        raise BlockFormatError(
                            f"{self.label}: an indefinite (#0) block in the reply to "
                            f"{command!r}: it ends the response message (IEEE 488.2 8.7.9), so "
                            "it cannot be asked with other queries; set compound_queries = "
                            "false in the map"
                        )
                    return self._read_indefinite_payload(command, termination)
                length = block.parse_length(self.transport.read_bytes(digit_count, command))
                # np.empty maps pages only as bytes arrive: a garbled header announcing a
                # gigabyte costs no more memory than what is actually received
                room = memoryview(np.empty(length + BLOCK_SPARE_BYTES, dtype=np.uint8))
                self.transport.read_into(room, spare=BLOCK_SPARE_BYTES)
                payload = room[:length]
                if last:
                    self._read_block_end(command)
                return payload
        except BlockFormatError:
            self.transport.discard_input()  # drop the rest of the malformed reply
            raise

    def _read_block_start(self, command: str) -> bytes:
        """The ``#`` and digit count that open a block. An instrument that sends headers with
        its replies puts the header and a space before them: that is skipped."""
        start = self.transport.read_bytes(2, command)
        if start[:1] == b"#" or not self.reply_headers:
            return start
        skipped = bytearray(start)
        while not skipped.endswith(b" #"):
            if len(skipped) > MAX_BLOCK_HEADER_BYTES:
                raise BlockFormatError(
                    f"{self.label}: no block after {bytes(skipped[:40])!r} in the reply to "
                    f"{command!r}"
                )
            skipped += self.transport.read_bytes(1, command)
        return b"#" + self.transport.read_bytes(1, command)

    def _read_block_end(self, command: str) -> None:
        """Consume the newline that ends a block reply (a CR before it is tolerated)."""
        trailer = self.transport.read_bytes(1, command)
        if trailer == b"\r":
            trailer = self.transport.read_bytes(1, command)
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
        received = bytearray(self.transport.read_message(command, deadline))
        quiet_s = QUIET_AFTER_INDEFINITE_BLOCK_MS / 1000.0
        saved_timeout = resource.timeout
        resource.timeout = min(saved_timeout or math.inf, QUIET_AFTER_INDEFINITE_BLOCK_MS)
        try:
            while True:
                try:
                    received += self.transport.read_message(
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
            self.forget_settings()
            self.resource.close()

    def abandon(self) -> None:
        """Let go of the session without sending anything, whatever state it is in (after a
        dropped connection or a command that never answered): no error escapes, and nothing is
        switched. Output roles override :meth:`close` to switch off; this never does."""
        self._closed = True
        self.forget_settings()
        with suppress(Exception):
            self.resource.close()

    def __enter__(self) -> Self:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    def __repr__(self) -> str:
        return f"{type(self).__name__}({self.label})"
