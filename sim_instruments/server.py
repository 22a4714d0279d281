"""A generic SCPI server on TCP: listener, message parser, command tree and error queue.

Each simulated instrument is a subclass of :class:`SimulatedInstrument` that declares its
commands in a small table of :class:`Command` entries (header pattern → handlers);
:class:`ScpiServer` puts it on one TCP port, one thread per client, the way a LAN instrument
answers on a raw socket (VISA resource ``TCPIP::<host>::<port>::SOCKET``). Nothing here knows
about flybacks.

Parsing follows SCPI-1999 volume 1 and IEEE 488.2 chapter 7, with these choices:

* Headers are case-insensitive; each node matches its short form (the capitals of the pattern)
  or its long form; nodes in brackets are optional; ``#`` after a node takes a numeric suffix
  (``CHANnel#`` matches ``CHAN2``, ``CHANNEL2``, and ``CHAN`` as channel 1).
* Path rule, kept simple: every command after a ``;`` starts again from the root (a leading ``:``
  is optional), so ``SOUR:VOLT 5;CURR:LIM 1`` means ``SOUR:VOLT 5`` then ``CURR:LIM 1``.
  Common commands (``*IDN?``) may appear anywhere in a chain.
* Once a command in a message fails, the rest of that message is not executed (IEEE 488.2
  §6.1.6.1.1 lets the parser discard it); replies to queries already executed are still sent.
* Replies to several queries in one message are joined by ``;`` (IEEE 488.2 §8.4.1) and the
  response ends with ``\\n``.
* The error queue holds :data:`ERROR_QUEUE_LENGTH` entries; when a new error arrives at a full
  queue the last entry becomes -350 "Queue overflow" (SCPI-1999 vol. 2 §21.8.1).
"""

from __future__ import annotations

import contextlib
import ipaddress
import re
import socket
import threading
from collections import deque
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field, replace

#: SCPI-1999 volume 2 chapter 21 standard error messages used by the simulated bench.
ERROR_MESSAGES: dict[int, str] = {
    0: "No error",
    -100: "Command error",
    -102: "Syntax error",
    -104: "Data type error",
    -108: "Parameter not allowed",
    -109: "Missing parameter",
    -113: "Undefined header",
    -114: "Header suffix out of range",
    -131: "Invalid suffix",
    -221: "Settings conflict",
    -222: "Data out of range",
    -224: "Illegal parameter value",
    -230: "Data corrupt or stale",
    -300: "Device-specific error",
    -350: "Queue overflow",
}

#: Entries the error queue holds before it overflows (SCPI-1999 requires at least two).
ERROR_QUEUE_LENGTH = 20

#: Standard Event Status Register bits (IEEE 488.2 §11.5.1.1).
ESR_OPERATION_COMPLETE = 1 << 0
ESR_QUERY_ERROR = 1 << 2
ESR_DEVICE_ERROR = 1 << 3
ESR_EXECUTION_ERROR = 1 << 4
ESR_COMMAND_ERROR = 1 << 5

#: Suffix multipliers (IEEE 488.2 §7.7.3.4, table 7-2); ``M`` is milli, ``MA`` is mega.
SUFFIX_MULTIPLIERS: dict[str, float] = {
    "EX": 1e18,
    "PE": 1e15,
    "T": 1e12,
    "G": 1e9,
    "MA": 1e6,
    "K": 1e3,
    "M": 1e-3,
    "U": 1e-6,
    "N": 1e-9,
    "P": 1e-12,
    "F": 1e-15,
    "A": 1e-18,
}
#: Units whose ``M`` prefix means mega by convention (IEEE 488.2 §7.7.3.4).
MEGA_SPECIAL_CASES: dict[str, str] = {"MHZ": "HZ", "MOHM": "OHM"}

LOOPBACK_HOSTS = ("127.0.0.1", "localhost", "::1")

_NUMBER = re.compile(r"[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?")
_HEADER = re.compile(r"\*[A-Za-z]+\??|:?[A-Za-z][A-Za-z0-9_]*(?::[A-Za-z][A-Za-z0-9_]*)*\??")
_MNEMONIC = re.compile(r"([A-Z_]+?)(\d*)")


class CommandError(Exception):
    """A command refused with a SCPI error code; the server pushes it to the error queue."""

    def __init__(self, code: int, detail: str = "") -> None:
        self.code = code
        self.detail = detail
        super().__init__(f"{code}: {ERROR_MESSAGES.get(code, 'Error')} {detail}".strip())

    @property
    def text(self) -> str:
        """Message as the queue reports it: the standard text, then ``;detail`` if any."""
        base = ERROR_MESSAGES.get(self.code, "Error")
        return f"{base};{self.detail}" if self.detail else base


class ServerConfigError(ValueError):
    """A server set up in a way that is refused (for example a non-loopback host)."""


@dataclass(frozen=True)
class Block:
    """A binary reply sent as an IEEE 488.2 definite length arbitrary block (§8.7.9), after
    ``prefix`` (the reply header of an instrument whose headers are on)."""

    payload: memoryview
    prefix: str = ""

    def header(self) -> bytes:
        """``#<n><length>``: one digit giving the digit count of the byte length, then it."""
        length = str(self.payload.nbytes)
        return f"{self.prefix}#{len(length)}{length}".encode()


Reply = str | Block


# --------------------------------------------------------------------------- header patterns


@dataclass(frozen=True)
class _Node:
    short: str
    long: str
    optional: bool
    takes_suffix: bool

    def match(self, token: str) -> tuple[int, ...] | None:
        """Return () or (suffix,) when ``token`` names this node, else None."""
        token = token.upper()
        if not self.takes_suffix:
            return () if token in (self.short, self.long) else None
        parsed = _MNEMONIC.fullmatch(token)
        if parsed is None or parsed.group(1) not in (self.short, self.long):
            return None
        return (int(parsed.group(2)) if parsed.group(2) else 1,)


class HeaderPattern:
    """A command header pattern such as ``OUTPut[:STATe]`` or ``CHANnel#:SCALe``."""

    def __init__(self, pattern: str) -> None:
        self.pattern = pattern
        self.common = pattern.startswith("*")
        self.nodes: tuple[_Node, ...] = () if self.common else self._compile(pattern)

    @staticmethod
    def _compile(pattern: str) -> tuple[_Node, ...]:
        nodes = []
        for raw in re.findall(r"\[:?[^\]]+\]|[^:\[]+", pattern.lstrip(":")):
            optional = raw.startswith("[")
            name = raw.strip("[]").lstrip(":")
            takes_suffix = name.endswith("#")
            name = name.rstrip("#")
            short = "".join(ch for ch in name if ch.isupper() or ch.isdigit() or ch == "_")
            nodes.append(_Node(short.upper(), name.upper(), optional, takes_suffix))
        return tuple(nodes)

    def match(self, header: str) -> tuple[int, ...] | None:
        """Numeric suffixes if ``header`` (no ``?``) names this pattern, else None."""
        if self.common:
            return () if header.upper() == self.pattern.upper() else None
        if header.startswith("*"):
            return None
        return self._match(self.nodes, header.lstrip(":").split(":"))

    def _match(self, nodes: Sequence[_Node], tokens: Sequence[str]) -> tuple[int, ...] | None:
        if not nodes:
            return () if not tokens else None
        node = nodes[0]
        if tokens:
            found = node.match(tokens[0])
            if found is not None:
                rest = self._match(nodes[1:], tokens[1:])
                if rest is not None:
                    return found + rest
        return self._match(nodes[1:], tokens) if node.optional else None


# --------------------------------------------------------------------------- parameters


@dataclass
class Call:
    """One parsed program message unit handed to a handler: parameters and header suffixes."""

    header: str
    params: Sequence[str]
    suffixes: tuple[int, ...] = ()

    def number(
        self, low: float, high: float, unit: str = "", index: int = 0, allow_zero: bool = False
    ) -> float:
        """Parameter ``index`` as a number in [low, high] (−222 outside, −104 if not a number).

        Accepts NRf forms (``150``, ``1.5E+02``), an optional suffix in ``unit`` with an IEEE 488.2
        multiplier (``100MV``, ``2.5 MHZ``), and the keywords ``MINimum``/``MAXimum``. With
        ``allow_zero``, exactly 0 is also accepted (an "off" value below ``low``).
        """
        text = self.params[index].strip()
        keyword = text.upper()
        if keyword in ("MIN", "MINIMUM"):
            return low
        if keyword in ("MAX", "MAXIMUM"):
            return high
        found = _NUMBER.match(text)
        if found is None:
            raise CommandError(-104, f"{self.header}: expected a number, got {text!r}")
        value = float(found.group(0)) * _suffix_multiplier(text[found.end() :], unit, self.header)
        if not (low <= value <= high or (allow_zero and value == 0)):
            zero = "0 or " if allow_zero else ""
            raise CommandError(
                -222, f"{self.header}: {value:g} {unit} outside {zero}{low:g} to {high:g}".strip()
            )
        return value

    def integer(self, low: int, high: int, index: int = 0) -> int:
        """Parameter ``index`` rounded to an integer in [low, high]."""
        return int(round(self.number(low, high, index=index)))

    def boolean(self, index: int = 0) -> bool:
        """``ON``/``OFF``/``1``/``0`` (SCPI-1999 vol. 1 §7.3), else −224."""
        text = self.params[index].strip().upper()
        if text in ("ON", "1"):
            return True
        if text in ("OFF", "0"):
            return False
        raise CommandError(-224, f"{self.header}: {text!r} is not ON, OFF, 1 or 0")

    def choice(self, options: Sequence[str], index: int = 0) -> str:
        """A character parameter naming one of ``options`` (SCPI mnemonics, short or long form).

        Returns the matching option as written in ``options``; −224 otherwise.
        """
        text = self.params[index].strip()
        for option in options:
            if HeaderPattern(option).match(text) is not None:
                return option
        raise CommandError(-224, f"{self.header}: {text!r} is not one of {', '.join(options)}")

    def suffixed(self, pattern: str, low: int, high: int, index: int = 0) -> int:
        """A parameter such as ``CHANnel2``: its numeric suffix, in [low, high] (−224 otherwise)."""
        text = self.params[index].strip()
        found = HeaderPattern(pattern + "#").match(text)
        if found is None or not low <= found[0] <= high:
            raise CommandError(-224, f"{self.header}: {text!r} is not {pattern}{low}..{high}")
        return found[0]

    def suffix(self, low: int, high: int, position: int = 0) -> int:
        """Header numeric suffix ``position`` in [low, high] (−114 otherwise)."""
        value = self.suffixes[position]
        if not low <= value <= high:
            raise CommandError(-114, f"{self.header}: suffix {value} outside {low} to {high}")
        return value


def _suffix_multiplier(suffix: str, unit: str, header: str) -> float:
    text = suffix.strip().upper()
    if not text:
        return 1.0
    unit = unit.upper()
    if unit and text == unit:
        return 1.0
    if unit and MEGA_SPECIAL_CASES.get(text) == unit:
        return 1e6
    if unit and text.endswith(unit) and text[: -len(unit)] in SUFFIX_MULTIPLIERS:
        return SUFFIX_MULTIPLIERS[text[: -len(unit)]]
    allowed = f"a suffix in {unit} such as M{unit} or K{unit}" if unit else "no suffix"
    raise CommandError(-131, f"{header}: suffix {suffix.strip()!r}; expected {allowed}")


def format_number(value: float) -> str:
    """A reply number in NR3 form (IEEE 488.2 §8.7.4): ``+1.500000E+02``."""
    return f"{value:+.6E}"


# --------------------------------------------------------------------------- command table

Handler = Callable[[Call], None]
QueryHandler = Callable[[Call], Reply]


@dataclass(frozen=True)
class Command:
    """One row of an instrument's command table.

    ``setter`` runs for the header without ``?``, ``query`` for the header with ``?``; a missing
    one makes that form an undefined header (−113). ``set_params`` and ``query_params`` give the
    (minimum, maximum) parameter counts (−109 below, −108 above).
    """

    pattern: str
    setter: Handler | None = None
    query: QueryHandler | None = None
    set_params: tuple[int, int] = (1, 1)
    query_params: tuple[int, int] = (0, 0)
    compiled: HeaderPattern = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "compiled", HeaderPattern(self.pattern))


@dataclass(frozen=True)
class ProgramUnit:
    """One command of a program message: header (without ``?``), query flag, parameters."""

    header: str
    is_query: bool
    params: tuple[str, ...]


@dataclass(frozen=True)
class ParsedMessage:
    """A program message split into units, or the syntax error that stopped the split."""

    text: str
    units: tuple[ProgramUnit, ...]
    syntax_error: CommandError | None = None

    @property
    def has_query(self) -> bool:
        return any(unit.is_query for unit in self.units)

    @property
    def has_setting(self) -> bool:
        return any(not unit.is_query for unit in self.units)

    def has_header(self, pattern: str) -> bool:
        """True if some unit's header matches ``pattern`` (e.g. ``SINGle``)."""
        compiled = HeaderPattern(pattern)
        return any(compiled.match(unit.header) is not None for unit in self.units)


def _split_outside_quotes(text: str, separator: str) -> list[str]:
    if '"' not in text and "'" not in text:
        return text.split(separator)
    parts, current, quote = [], [], ""
    for ch in text:
        if quote:
            quote = "" if ch == quote else quote
        elif ch in "\"'":
            quote = ch
        elif ch == separator:
            parts.append("".join(current))
            current = []
            continue
        current.append(ch)
    parts.append("".join(current))
    return parts


#: Program messages already parsed, by text: a bench sends the same few over and over.
_PARSED: dict[str, ParsedMessage] = {}
_PARSED_MAX = 4096


def parse_message(text: str) -> ParsedMessage:
    """Split one program message (a line, without its terminator) into program message units.

    A message that parses is kept (its units are immutable) and the next one of the same text
    is not parsed again; one with a syntax error is parsed each time it comes.
    """
    parsed = _PARSED.get(text)
    if parsed is None:
        parsed = _parse(text)
        if parsed.syntax_error is None and len(_PARSED) < _PARSED_MAX:
            _PARSED[text] = parsed
    return parsed


def _parse(text: str) -> ParsedMessage:
    units: list[ProgramUnit] = []
    pieces = _split_outside_quotes(text, ";")
    for position, raw in enumerate(pieces):
        unit_text = raw.strip()
        if not unit_text:
            if position == len(pieces) - 1:
                continue  # an empty line, or a trailing ';'
            error = CommandError(-102, "empty command between ';'")
            return ParsedMessage(text, tuple(units), error)
        header, *rest_list = unit_text.split(maxsplit=1)
        rest = rest_list[0] if rest_list else ""
        if not _HEADER.fullmatch(header):
            error = CommandError(-102, f"bad header {header!r}")
            return ParsedMessage(text, tuple(units), error)
        params = tuple(p.strip() for p in _split_outside_quotes(rest, ",")) if rest else ()
        if any(not p for p in params):
            error = CommandError(-102, f"empty parameter in {unit_text!r}")
            return ParsedMessage(text, tuple(units), error)
        is_query = header.endswith("?")
        units.append(ProgramUnit(header.rstrip("?"), is_query, params))
    return ParsedMessage(text, tuple(units))


# --------------------------------------------------------------------------- instrument base


class ErrorQueue:
    """SCPI error/event queue: FIFO, fixed length, last entry replaced by −350 on overflow."""

    def __init__(self, length: int = ERROR_QUEUE_LENGTH) -> None:
        self.length = length
        self._entries: deque[tuple[int, str]] = deque()

    def push(self, code: int, text: str) -> None:
        if len(self._entries) < self.length:
            self._entries.append((code, text))
        elif self._entries[-1][0] != -350:
            self._entries[-1] = (-350, ERROR_MESSAGES[-350])

    def pop(self) -> tuple[int, str]:
        return self._entries.popleft() if self._entries else (0, ERROR_MESSAGES[0])

    def clear(self) -> None:
        self._entries.clear()

    def __len__(self) -> int:
        return len(self._entries)


class SimulatedInstrument:
    """Base of a simulated instrument: IEEE 488.2 common commands, error queue, command lookup.

    Subclasses set :attr:`identity` (manufacturer, model, serial, firmware), return their command
    table from :meth:`commands` and restore their defaults in :meth:`reset`. ``lock`` serialises
    whole messages from different clients.
    """

    identity: tuple[str, str, str, str] = ("labseq-sim", "generic", "0", "1.0")
    #: Whether replies to queries (all but common commands) start with their header, as
    #: ``:SYSTem:HEADer ON`` asks of an instrument that has that command.
    reply_headers = False

    def __init__(self) -> None:
        self.lock = threading.RLock()
        self.errors = ErrorQueue()
        self.event_status = 0
        self._table: list[Command] = [*self._common_commands(), *self.commands()]
        self._lookup_cache: dict[str, tuple[Command, tuple[int, ...]] | None] = {}

    # -- to override
    def commands(self) -> list[Command]:
        """The instrument's own command table."""
        return []

    def reset(self) -> None:
        """``*RST``: restore defaults (outputs off)."""

    def apply_fault(self, kind: str) -> None:
        """Apply an injected fault that only the instrument itself can act out."""
        raise ValueError(f"{type(self).__name__} cannot act out fault {kind!r}")

    # -- common commands (IEEE 488.2 §10)
    def _common_commands(self) -> list[Command]:
        def clear_status(_: Call) -> None:
            self.errors.clear()
            self.event_status = 0

        def read_event_status(_: Call) -> str:
            value, self.event_status = self.event_status, 0
            return str(value)

        def next_error(_: Call) -> str:
            code, text = self.errors.pop()
            return f'{code},"{text}"'

        def operation_complete(_: Call) -> None:
            self.event_status |= ESR_OPERATION_COMPLETE

        return [
            Command("*IDN", query=lambda _: ",".join(self.identity)),
            Command("*RST", setter=lambda _: self.reset(), set_params=(0, 0)),
            Command("*CLS", setter=clear_status, set_params=(0, 0)),
            Command("*OPC", setter=operation_complete, query=lambda _: "1", set_params=(0, 0)),
            Command("*WAI", setter=lambda _: None, set_params=(0, 0)),
            Command("*ESR", query=read_event_status),
            Command("SYSTem:ERRor[:NEXT]", query=next_error),
        ]

    # -- execution
    def push_error(self, error: CommandError) -> None:
        """Queue ``error`` and set its class bit in the event status register."""
        self.errors.push(error.code, error.text)
        if -199 <= error.code <= -100:
            self.event_status |= ESR_COMMAND_ERROR
        elif -299 <= error.code <= -200:
            self.event_status |= ESR_EXECUTION_ERROR
        elif -399 <= error.code <= -300:
            self.event_status |= ESR_DEVICE_ERROR
        elif -499 <= error.code <= -400:
            self.event_status |= ESR_QUERY_ERROR

    def find(self, header: str) -> tuple[Command, tuple[int, ...]] | None:
        """The table row and numeric suffixes for ``header`` (without ``?``), or None."""
        key = header.upper()
        if key not in self._lookup_cache:
            found = None
            for command in self._table:
                suffixes = command.compiled.match(header)
                if suffixes is not None:
                    found = (command, suffixes)
                    break
            self._lookup_cache[key] = found
        return self._lookup_cache[key]

    def execute(self, message: ParsedMessage) -> list[Reply]:
        """Run every unit of ``message`` in order; errors go to the queue. Returns the replies."""
        replies: list[Reply] = []
        with self.lock:
            try:
                for unit in message.units:
                    reply = self._execute_unit(unit)
                    if reply is not None:
                        replies.append(reply)
                if message.syntax_error is not None:
                    raise message.syntax_error
            except CommandError as error:
                self.push_error(error)
        return replies

    def _execute_unit(self, unit: ProgramUnit) -> Reply | None:
        found = self.find(unit.header)
        form = "query" if unit.is_query else "command"
        if found is None:
            raise CommandError(-113, f"{unit.header}{'?' if unit.is_query else ''}")
        command, suffixes = found
        handler = command.query if unit.is_query else command.setter
        if handler is None:
            raise CommandError(-113, f"{unit.header} has no {form} form")
        low, high = command.query_params if unit.is_query else command.set_params
        if len(unit.params) < low:
            raise CommandError(-109, f"{unit.header} needs {low} parameter(s)")
        if len(unit.params) > high:
            raise CommandError(-108, f"{unit.header} takes at most {high} parameter(s)")
        reply = handler(Call(unit.header, unit.params, suffixes))
        if not unit.is_query:
            return None
        if self.reply_headers and not unit.header.startswith("*"):
            prefix = ":" + unit.header.lstrip(":").upper() + " "
            return replace(reply, prefix=prefix) if isinstance(reply, Block) else prefix + reply
        return reply


# --------------------------------------------------------------------------- TCP server

#: A hook consulted before each message: returns an interference name or None.
#: The server acts out ``drop``, ``no-reply``, ``malformed``, ``scpi-error`` and ``swallow`` (the
#: message is read and does nothing, without an error) itself and hands any other name to
#: :meth:`SimulatedInstrument.apply_fault` before executing the message.
Interceptor = Callable[[ParsedMessage], str | None]

GARBLED_TEXT_REPLY = b"9.9.9E+\n"
GARBLED_BLOCK_REPLY = b"#Z" + bytes(16) + b"\n"


def check_host(host: str, allow_remote: bool) -> None:
    """Refuse any address but loopback unless ``allow_remote`` is given explicitly."""
    if host in LOOPBACK_HOSTS:
        return
    with contextlib.suppress(ValueError):
        if ipaddress.ip_address(host).is_loopback:
            return
    if not allow_remote:
        raise ServerConfigError(
            f"host {host!r} is not a loopback address; the simulated bench listens on 127.0.0.1 "
            "only, unless remote access is allowed explicitly (allow_remote=True, --allow-remote)"
        )


class ScpiServer:
    """Serve one :class:`SimulatedInstrument` on one TCP port, one thread per client connection."""

    def __init__(
        self,
        instrument: SimulatedInstrument,
        *,
        host: str = "127.0.0.1",
        port: int = 0,
        allow_remote: bool = False,
        interceptor: Interceptor | None = None,
    ) -> None:
        check_host(host, allow_remote)
        self.instrument = instrument
        self.host = host
        self.requested_port = port
        self.interceptor = interceptor
        self.port = 0
        self._listener: socket.socket | None = None
        self._clients: set[socket.socket] = set()
        self._clients_lock = threading.Lock()
        self._threads: list[threading.Thread] = []
        self._stopping = threading.Event()

    @property
    def resource(self) -> str:
        """VISA resource string of the raw socket (VISA TCPIP SOCKET resource form)."""
        return f"TCPIP::{self.host}::{self.port}::SOCKET"

    def start(self) -> ScpiServer:
        """Bind and start accepting clients (port 0 picks a free port)."""
        family = socket.AF_INET6 if ":" in self.host else socket.AF_INET
        listener = socket.socket(family, socket.SOCK_STREAM)
        listener.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        try:
            listener.bind((self.host, self.requested_port))
        except OSError as error:
            listener.close()
            raise ServerConfigError(
                f"cannot listen on {self.host}:{self.requested_port}: {error.strerror}"
            ) from None
        listener.listen(8)
        self._listener = listener
        self.port = listener.getsockname()[1]
        self._spawn(self._accept_loop, name=f"scpi-accept-{self.port}")
        return self

    def stop(self) -> None:
        """Close the listener and every client connection, and wait for the threads."""
        self._stopping.set()
        if self._listener is not None:
            with contextlib.suppress(OSError):
                self._listener.shutdown(socket.SHUT_RDWR)
            self._listener.close()
        with self._clients_lock:
            clients = list(self._clients)
        for client in clients:
            self._close(client)
        for thread in self._threads:
            thread.join(timeout=2.0)

    def _spawn(self, target: Callable[..., None], *args: object, name: str) -> None:
        thread = threading.Thread(target=target, args=args, name=name, daemon=True)
        self._threads = [t for t in self._threads if t.is_alive()]
        self._threads.append(thread)
        thread.start()

    def _accept_loop(self) -> None:
        assert self._listener is not None
        while not self._stopping.is_set():
            try:
                client, _ = self._listener.accept()
            except OSError:
                return
            client.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
            with self._clients_lock:
                self._clients.add(client)
            self._spawn(self._serve_client, client, name=f"scpi-client-{self.port}")

    def _close(self, client: socket.socket) -> None:
        with self._clients_lock:
            self._clients.discard(client)
        with contextlib.suppress(OSError):
            client.shutdown(socket.SHUT_RDWR)
        client.close()

    def _serve_client(self, client: socket.socket) -> None:
        buffer = b""
        try:
            while not self._stopping.is_set():
                chunk = client.recv(65536)
                if not chunk:
                    return
                buffer += chunk
                while b"\n" in buffer:
                    line, buffer = buffer.split(b"\n", 1)
                    if not self._handle_line(client, line.rstrip(b"\r")):
                        return
        except OSError:
            return
        finally:
            self._close(client)

    def _handle_line(self, client: socket.socket, line: bytes) -> bool:
        """Execute one program message and send its response; False closes the connection."""
        message = parse_message(line.decode("ascii", errors="replace"))
        if not message.units and message.syntax_error is None:
            return True
        interference = self.interceptor(message) if self.interceptor else None
        if interference == "drop":
            return False
        if interference == "swallow":
            return True
        if interference == "scpi-error":
            with self.instrument.lock:
                self.instrument.push_error(CommandError(-300, "simulated hardware fault"))
            return True
        if interference not in (None, "no-reply", "malformed"):
            with self.instrument.lock:
                self.instrument.apply_fault(interference)
        replies = self.instrument.execute(message)
        if not replies or interference == "no-reply":
            return True
        if interference == "malformed":
            block = any(isinstance(reply, Block) for reply in replies)
            client.sendall(GARBLED_BLOCK_REPLY if block else GARBLED_TEXT_REPLY)
            return True
        self._send_replies(client, replies)
        return True

    @staticmethod
    def _send_replies(client: socket.socket, replies: list[Reply]) -> None:
        """Send replies joined by ``;`` and ended by ``\\n``; blocks go out without a copy."""
        pending = b""
        for index, reply in enumerate(replies):
            if index:
                pending += b";"
            if isinstance(reply, Block):
                client.sendall(pending + reply.header())
                client.sendall(reply.payload)
                pending = b""
            else:
                pending += reply.encode("ascii")
        client.sendall(pending + b"\n")
