"""Command maps: the TOML files that say how one instrument of one role is driven.

SCPI-1999 fixes the grammar but leaves much of each command set to the maker, and benches mix
makers and generations, so every role driver (source, load, meter, scope) takes its command
strings, keywords, value conversions and reply forms from a map. A new instrument is a new map
file, under ``instruments/command_maps/<role>/`` or anywhere by path; no code changes.

What a role needs is declared here, once, in :data:`ROLE_COMMANDS`: each command's kind (a
setting with a value, a query, an action), its placeholders, the step that uses it, and whether
a map may leave it out. Validation checks a map against that declaration and reports every
problem at once, each with its key and line. DEVELOPERS.md documents the format key by key.
"""

from __future__ import annotations

import math
import string
from collections.abc import Mapping
from dataclasses import dataclass, field, fields
from pathlib import Path
from types import MappingProxyType
from typing import Any

from labseq_instruments.block import BYTE_ORDERS, DATA_FORMATS
from labseq_instruments.errors import CommandMapError, UnsafeTextError
from labseq_instruments.limits import ScopeLimits, check_text
from labseq_instruments.tomlkeys import Problems, did_you_mean

MAPS_DIR = Path(__file__).with_name("command_maps")
ROLES = ("source", "load", "meter", "scope")

_CHANNEL_VALUE = frozenset({"channel", "value"})
_VALUE = frozenset({"value"})
_CHANNEL = frozenset({"channel"})
_NONE: frozenset[str] = frozenset()


@dataclass(frozen=True)
class CommandDef:
    """What a role expects of one command key.

    ``kind``: ``"set"`` (a setting; ``{value}`` is what is set, if it has one; it can be read
    back), ``"query"`` (answers a value) or ``"action"`` (no value, no reply). ``value``: how a
    setting's value is written: ``"number"``, ``"integer"``, ``"channel"`` (in the command
    itself) or the name of a word group (``"on_off"``, ``"slope"``). ``step`` names what
    labseq is doing when it sends the command; ``required`` is False where a map may leave the
    command out (the step then does without it, or refuses what needs it with a message naming
    the command).
    """

    kind: str
    placeholders: frozenset[str]
    step: str
    required: bool = True
    value: str = "number"
    conversions: tuple[str, ...] = ()


def _setting(
    placeholders: frozenset[str], step: str, value: str = "number", **options: Any
) -> CommandDef:
    return CommandDef("set", placeholders, step, value=value, **options)


def _query(step: str, placeholders: frozenset[str] = _NONE, **options: Any) -> CommandDef:
    return CommandDef("query", placeholders, step, **options)


#: Named conversions of the trigger position, from labseq's fraction f of the record before
#: the trigger to what the instrument takes; D is the record's duration (s/div × divisions).
TRIGGER_POSITION_CONVERSIONS = {
    "fraction": "f itself (0 to 1)",
    "percent": "100 × f",
    "pretrigger_s": "f × D: seconds of record before the trigger",
    "delay_to_centre_s": "(0.5 − f) × D: seconds from the trigger to the record's centre",
}

#: Every role's commands: key → what the role expects of it.
ROLE_COMMANDS: dict[str, dict[str, CommandDef]] = {
    "source": {
        "line_shape": _setting(_VALUE, "set the line", "line_shape", required=False),
        "voltage": _setting(_VALUE, "set the line"),
        "frequency": _setting(_VALUE, "set an AC line", required=False),
        "current_limit": _setting(_VALUE, "prepare the run"),
        "output": _setting(_VALUE, "switch the output", "on_off"),
        "measure_voltage": _query("read a point"),
        "measure_current": _query("read a point"),
    },
    "load": {
        "mode": _setting(_VALUE, "set the load", "load_mode", required=False),
        "current": _setting(_VALUE, "set the load"),
        "input": _setting(_VALUE, "switch the input", "on_off"),
        "measure_voltage": _query("read a point"),
        "measure_current": _query("read a point"),
        "measure_power": _query("read a point", required=False),
    },
    "meter": {
        "measure_voltage": _query("read a point"),
        "measure_current": _query("read a point"),
        "measure_power": _query("read a point"),
        "measure_power_factor": _query("read a point", required=False),
    },
    "scope": {
        "channel_enable": _setting(_CHANNEL_VALUE, "configure a channel", "on_off", required=False),
        "channel_scale": _setting(_CHANNEL_VALUE, "configure a channel"),
        "channel_offset": _setting(_CHANNEL_VALUE, "configure a channel"),
        "channel_coupling": _setting(
            _CHANNEL_VALUE, "configure a channel", "coupling", required=False
        ),
        "channel_bandwidth_limit": _setting(_CHANNEL_VALUE, "configure a channel", required=False),
        "channel_probe": _setting(_CHANNEL_VALUE, "configure a channel"),
        "timebase_scale": _setting(_VALUE, "configure the timebase"),
        "record_length": _setting(_VALUE, "configure the timebase", "integer"),
        "trigger_source": _setting(_CHANNEL, "configure the trigger", value="channel"),
        "trigger_level": _setting(_VALUE, "configure the trigger"),
        "trigger_slope": _setting(_VALUE, "configure the trigger", "slope"),
        "trigger_position": _setting(
            _VALUE, "configure the trigger", conversions=tuple(TRIGGER_POSITION_CONVERSIONS)
        ),
        "single": CommandDef("action", _NONE, "arm an acquisition"),
        "force_trigger": CommandDef("action", _NONE, "probe the scope", required=False),
        "stop": CommandDef("action", _NONE, "stop an acquisition"),
        "acquisition_done_query": _query("wait for an acquisition"),
        "waveform_source": _setting(_CHANNEL, "fetch a waveform", value="channel"),
        "waveform_format": _setting(_VALUE, "fetch a waveform", "data_format", required=False),
        "waveform_byte_order": _setting(_VALUE, "fetch a waveform", "byte_order", required=False),
        "waveform_scaling_query": _query("fetch a waveform", required=False),
        "waveform_data_query": _query("fetch a waveform"),
        "measure_mean_query": _query("watch the bus discharge", _CHANNEL),
    },
}

#: Keywords a map may rename, with the generic instruments' words as defaults.
DEFAULT_WORDS: dict[str, dict[str, str]] = {
    "on_off": {"on": "ON", "off": "OFF"},
    "coupling": {"dc": "DC", "ac": "AC"},
    "slope": {"rising": "POSitive", "falling": "NEGative"},
    "data_format": {
        "int8": "INT8",
        "uint8": "UINT8",
        "int16": "INT16",
        "uint16": "UINT16",
        "float32": "FLOAT32",
        "ascii": "ASCii",
    },
    "byte_order": {"big": "NORMal", "little": "SWAPped"},
    "line_shape": {"dc": "DC", "ac": "SIN"},
    "load_mode": {"current": "CURR"},
}
#: The word groups each role's map may have in its [words] table.
ROLE_WORD_GROUPS = {
    role: tuple(sorted({d.value for d in commands.values() if d.value in DEFAULT_WORDS}))
    for role, commands in ROLE_COMMANDS.items()
}

#: Waveform payload formats: the binary ones of :mod:`labseq_instruments.block`, and comma-separated
#: ASCII numbers (the slow fallback every scope offers).
WAVEFORM_FORMATS = (*DATA_FORMATS, "ascii")
#: Scaling values of a capture: volts = (code − y_reference) × y_increment + y_origin,
#: t = x_origin + (i − x_reference) × x_increment.
SCALING_FIELDS = ("points", "x_increment", "x_origin", "x_reference", "y_increment")
SCALING_FIELDS += ("y_origin", "y_reference")
REQUIRED_SCALING_FIELDS = ("x_increment", "y_increment", "y_origin")
IGNORED_FIELD = "_"

_COMMON_KEYS = ("role", "family", "description", "reply_headers", "reset", "setup")
_COMMON_KEYS += ("commands", "words")
_SCOPE_KEYS = ("channels", "vertical_divisions", "horizontal_divisions", "data_format")
_SCOPE_KEYS += ("byte_order", "code_min", "code_max", "acquisition_done_reply")
_SCOPE_KEYS += ("scaling_fields", "scaling_queries", "scaling_values", "limits")
_SCOPE_KEYS += ("compound_queries",)
_COMMAND_TABLE_KEYS = ("command", "query", "scale", "table", "convert")


@dataclass(frozen=True)
class CommandSpec:
    """One command as a map gives it.

    ``template`` is the command with its placeholders; ``read_back`` the query that reads a
    setting back (the header and ``?`` unless the map gives one). The instrument's number is
    labseq's × ``scale``; ``table`` maps numbers to keywords (a setting that takes ON/OFF or a
    list of filters for a number); ``convert`` names a conversion (trigger position).
    """

    key: str
    template: str
    read_back: str | None = None
    scale: float = 1.0
    table: tuple[tuple[float, str], ...] = ()
    convert: str | None = None

    def render(self, *, channel: int | None = None, value: str | None = None) -> str:
        return self.template.format(channel=channel, value=value)

    def render_read_back(self, *, channel: int | None = None) -> str:
        if self.read_back is not None:
            return self.read_back.format(channel=channel)
        return self.template.split(None, 1)[0].format(channel=channel) + "?"


@dataclass(frozen=True)
class CommandMap:
    """A validated command map of one role. Build one with :func:`load_command_map`.

    The scope-only fields keep their defaults in the maps of other roles. ``compound_queries``
    says the scope takes several queries in one program message and answers them in one
    response message (IEEE 488.2 7.4.1 and 8.4.1), so a waveform's scaling, data and error
    check cost one round trip.
    """

    role: str
    family: str
    description: str
    reply_headers: bool
    reset: bool
    setup: tuple[str, ...]
    specs: Mapping[str, CommandSpec]
    words: Mapping[str, Mapping[str, str]]
    source: Path
    channels: int = 0
    vertical_divisions: float = 10.0
    horizontal_divisions: float = 10.0
    data_format: str = "int8"
    byte_order: str = "big"
    code_min: float = -128
    code_max: float = 127
    acquisition_done_reply: str = "1"
    compound_queries: bool = False
    scaling_fields: tuple[str, ...] = ()
    scaling_queries: Mapping[str, str] = field(default_factory=dict)
    scaling_values: Mapping[str, float] = field(default_factory=dict)
    limits: ScopeLimits = ScopeLimits()

    @property
    def commands(self) -> Mapping[str, str]:
        """Command key → its template."""
        return {key: spec.template for key, spec in self.specs.items()}

    def has(self, key: str) -> bool:
        """Whether the map gives command ``key``."""
        return key in self.specs

    def spec(self, key: str) -> CommandSpec:
        """Command ``key``; :class:`CommandMapError` naming the map and the step if absent."""
        spec = self.specs.get(key)
        if spec is None:
            step = ROLE_COMMANDS[self.role][key].step
            raise CommandMapError(
                f"{self.source}: the {self.role} map {self.family!r} has no commands.{key}, "
                f"which is needed to {step}"
            )
        return spec

    def command(self, key: str, *, channel: int | None = None, value: str | None = None) -> str:
        """Render command ``key`` with its placeholders filled in."""
        return self.spec(key).render(channel=channel, value=value)

    def query(self, key: str, *, channel: int | None = None) -> str:
        """Render the read-back query of setting ``key``."""
        return self.spec(key).render_read_back(channel=channel)

    def word(self, group: str, name: str) -> str:
        """This instrument's keyword for ``name`` in ``group`` (e.g. slope, rising)."""
        return self.words[group][name]


def map_dir(role: str) -> Path:
    """Where the shipped maps of ``role`` live."""
    return MAPS_DIR / role


def available_families(role: str = "scope") -> list[str]:
    """Names of the maps shipped for ``role``."""
    return sorted(path.stem for path in map_dir(role).glob("*.toml"))


def is_map_path(text: str) -> bool:
    """Whether a map reference is a file path rather than a shipped family name."""
    return text.endswith(".toml") or "/" in text or "\\" in text


def load_command_map(family_or_path: str | Path, role: str = "scope") -> CommandMap:
    """Load and validate a ``role`` map by family name (a shipped map) or by file path.

    Raises
    ------
    CommandMapError
        Listing every problem found, each with its key and line, and what would be valid.
    """
    problems = Problems(_resolve(family_or_path, role))
    document = problems.load()
    if document is None:
        raise CommandMapError(problems.report())
    return _Validator(problems, role).validate(document)


def _resolve(family_or_path: str | Path, role: str) -> Path:
    if role not in ROLES:
        raise CommandMapError(f"unknown role {role!r}; valid: {', '.join(ROLES)}")
    text = str(family_or_path)
    if isinstance(family_or_path, Path) or is_map_path(text):
        path = Path(family_or_path)
        if not path.is_file():
            raise CommandMapError(f"{path}: command map file not found")
        return path
    path = map_dir(role) / f"{text}.toml"
    if not path.is_file():
        raise CommandMapError(
            f"unknown {role} family {text!r}; shipped maps: "
            f"{', '.join(available_families(role))} (or give the path of a .toml map)"
        )
    return path


def _number_key(text: str) -> float | None:
    try:
        value = float(text)
    except ValueError:
        return None
    return value if math.isfinite(value) else None


class _Validator:
    """Checks one map document, collecting every problem with its key and line."""

    def __init__(self, problems: Problems, role: str) -> None:
        self.path = problems.path
        self.role = role
        self.problems = problems

    def fail(self, key: str, message: str) -> None:
        self.problems.fail(key, message)

    def get(self, table: Mapping[str, Any], key: str, kind: Any, where: str = "") -> Any:
        """``table[key]`` if it is of ``kind`` (and finite), else None with a problem."""
        value = table[key]
        if isinstance(value, bool) != (kind is bool) or not isinstance(value, kind):
            names = (
                kind.__name__ if isinstance(kind, type) else " or ".join(k.__name__ for k in kind)
            )
            self.fail(f"{where}{key}", f"must be {names}, got {value!r}")
            return None
        if isinstance(value, float) and not math.isfinite(value):
            self.fail(f"{where}{key}", f"must be a finite number, got {value!r}")
            return None
        return value

    def unknown_keys(self, table: Mapping[str, Any], valid: tuple[str, ...], where: str) -> None:
        self.problems.unknown_keys(table, valid, where.rstrip("."))

    def safe(self, key: str, text: str) -> str:
        try:
            return check_text(key, text)
        except UnsafeTextError as error:
            self.fail(key, str(error))
            return text

    def validate(self, document: dict[str, Any]) -> CommandMap:
        role = document.get("role", "scope")
        if role != self.role:
            self.fail("role", f"this map is for the {role!r} role, not the {self.role!r} role")
            self.raise_problems()
        valid = _COMMON_KEYS + (_SCOPE_KEYS if role == "scope" else ())
        self.unknown_keys(document, valid, "")
        family = ""
        if "family" not in document:
            self.missing("family", "", 'the map\'s name, e.g. "generic"')
        elif self.get(document, "family", str) is not None:
            family = self.safe("family", document["family"])
        options = {
            "description": str(document.get("description", "")),
            "reply_headers": self.flag(document, "reply_headers", False),
            "setup": self.setup(document.get("setup", [])),
        }
        options["reset"] = self.flag(document, "reset", bool(options["setup"]))
        commands = document.get("commands")
        specs = (
            self.commands(commands)
            if isinstance(commands, dict)
            else self.missing("commands", {}, "a [commands] table")
        )
        words = self.words(document.get("words", {}))
        scope_fields = self.scope(document, specs) if role == "scope" else {}
        self.raise_problems()
        return CommandMap(
            role=role,
            family=family,
            specs=MappingProxyType(specs),
            words=words,
            source=self.path,
            **options,
            **scope_fields,
        )

    def raise_problems(self) -> None:
        if self.problems:
            raise CommandMapError(self.problems.report())

    def missing(self, key: str, default: Any, what: str = "") -> Any:
        self.fail(key, f"missing key {key!r}" + (f"; expected {what}" if what else ""))
        return default

    def flag(self, document: Mapping[str, Any], key: str, default: bool) -> bool:
        if key not in document:
            return default
        value = self.get(document, key, bool)
        return default if value is None else value

    def setup(self, value: Any) -> tuple[str, ...]:
        if not isinstance(value, list) or not all(isinstance(item, str) for item in value):
            self.fail("setup", f"must be a list of command strings, got {value!r}")
            return ()
        for index, command in enumerate(value):
            if not command.strip():
                self.fail(f"setup[{index}]", "an empty command")
            self.safe(f"setup[{index}]", command)
        return tuple(value)

    # -- commands

    def commands(self, table: Mapping[str, Any]) -> dict[str, CommandSpec]:
        declared = ROLE_COMMANDS[self.role]
        self.unknown_keys(table, tuple(declared), "commands.")
        for key, definition in declared.items():
            if definition.required and key not in table:
                self.fail(
                    f"commands.{key}",
                    f"missing command commands.{key} (needed to {definition.step})",
                )
        specs = {}
        for key, value in table.items():
            if key in declared:
                spec = self.command(key, value, declared[key])
                if spec is not None:
                    specs[key] = spec
        return specs

    def command(self, key: str, value: Any, definition: CommandDef) -> CommandSpec | None:
        where = f"commands.{key}"
        if isinstance(value, str):
            value = {"command": value}
        if not isinstance(value, dict):
            self.fail(where, "must be a command string or a table with 'command'")
            return None
        self.unknown_keys(value, _COMMAND_TABLE_KEYS, f"{where}.")
        template = value.get("command")
        if not isinstance(template, str) or not template.strip():
            self.fail(where, "must be a non-empty string (the command)")
            return None
        self.safe(where, template)
        self.placeholders(where, template, definition.placeholders)
        read_back = value.get("query")
        if read_back is not None:
            if definition.kind != "set" or not isinstance(read_back, str):
                self.fail(f"{where}.query", "a read-back query string, for settings only")
                read_back = None
            else:
                self.safe(f"{where}.query", read_back)
                self.placeholders(f"{where}.query", read_back, definition.placeholders - _VALUE)
        scale = 1.0
        if "scale" in value:
            scale = self.get(value, "scale", (int, float), f"{where}.") or 1.0
            if definition.value not in ("number", "integer") or scale == 0:
                self.fail(f"{where}.scale", "a non-zero factor, for numeric values only")
        table = self.number_table(where, value.get("table"), definition)
        convert = value.get("convert")
        if convert is not None and convert not in definition.conversions:
            allowed = ", ".join(definition.conversions) or "none for this command"
            self.fail(f"{where}.convert", f"{convert!r} is not a conversion here; valid: {allowed}")
            convert = None
        return CommandSpec(key, template, read_back, float(scale), table, convert)

    def number_table(
        self, where: str, table: Any, definition: CommandDef
    ) -> tuple[tuple[float, str], ...]:
        if table is None:
            return ()
        if definition.value != "number" or not isinstance(table, dict) or not table:
            self.fail(f"{where}.table", "a table of number = keyword, for numeric values only")
            return ()
        pairs = []
        for number_text, word in table.items():
            number = _number_key(number_text)
            if number is None or not isinstance(word, str) or not word or " " in word:
                self.fail(
                    f"{where}.table",
                    f"{number_text!r} = {word!r}: each key must be a number (in quotes, e.g. "
                    '"20e6") and each value one keyword',
                )
                continue
            self.safe(f"{where}.table", word)
            pairs.append((number, word))
        return tuple(sorted(pairs))

    def placeholders(self, key: str, template: str, expected: frozenset[str]) -> None:
        try:
            used_fields = [
                (name, spec, conversion)
                for _, name, spec, conversion in string.Formatter().parse(template)
                if name is not None
            ]
        except ValueError as error:
            self.fail(key, f"{template!r}: {error}")
            return
        if any(spec or conversion for _, spec, conversion in used_fields):
            self.fail(key, f"{template!r}: placeholders take no format or conversion")
        used = {name for name, _, _ in used_fields}
        unknown, absent = used - expected, expected - used
        if unknown:
            allowed = ", ".join(f"{{{name}}}" for name in sorted(expected)) or "none"
            named = ", ".join(f"{{{name}}}" for name in sorted(unknown))
            self.fail(key, f"uses unknown placeholder {named}; allowed here: {allowed}")
        if absent:
            named = ", ".join(f"{{{name}}}" for name in sorted(absent))
            self.fail(key, f"{template!r} lacks {named}")

    def words(self, table: Any) -> Mapping[str, Mapping[str, str]]:
        groups = ROLE_WORD_GROUPS[self.role]
        if not isinstance(table, dict):
            self.fail("words", "[words] must be a table")
            table = {}
        self.unknown_keys(table, groups, "words.")
        words: dict[str, Mapping[str, str]] = {}
        for group in groups:
            defaults = DEFAULT_WORDS[group]
            given = table.get(group, {})
            if not isinstance(given, dict):
                self.fail(f"words.{group}", "must be a table")
                given = {}
            self.unknown_keys(given, tuple(defaults), f"words.{group}.")
            merged = {**defaults, **{k: v for k, v in given.items() if k in defaults}}
            for name, word in merged.items():
                if not isinstance(word, str) or not word or " " in word:
                    self.fail(f"words.{group}.{name}", "must be one keyword")
                else:
                    self.safe(f"words.{group}.{name}", word)
            words[group] = MappingProxyType(merged)
        return MappingProxyType(words)

    # -- the scope's own keys

    def scope(self, document: Mapping[str, Any], specs: Mapping[str, CommandSpec]) -> dict:
        values: dict[str, Any] = {}
        number = (int, float)
        for key, kind in (
            ("channels", int),
            ("vertical_divisions", number),
            ("horizontal_divisions", number),
            ("code_min", number),
            ("code_max", number),
        ):
            if key not in document:
                self.missing(key, None)
                continue
            value = self.get(document, key, kind)
            if value is not None and key != "code_min" and key != "code_max" and value <= 0:
                self.fail(key, f"{key} = {value} must be positive")
            elif value is not None:
                values[key] = value
        if (
            "code_min" in values
            and "code_max" in values
            and values["code_min"] >= values["code_max"]
        ):
            self.fail("code_min", f"code_min ({values['code_min']:g}) must be below code_max")
        values["data_format"] = self.choice(document, "data_format", WAVEFORM_FORMATS)
        values["byte_order"] = self.choice(document, "byte_order", tuple(BYTE_ORDERS), "big")
        values["acquisition_done_reply"] = self.done_reply(document)
        values["compound_queries"] = self.flag(document, "compound_queries", False)
        values.update(self.scaling(document, specs))
        values["limits"] = self.limits(document.get("limits", {}))
        return {key: value for key, value in values.items() if value is not None}

    def choice(
        self, document: Mapping[str, Any], key: str, valid: tuple[str, ...], default: Any = None
    ) -> str | None:
        if key not in document:
            return default if default is not None else self.missing(key, None)
        value = self.get(document, key, str)
        if value is not None and value not in valid:
            self.fail(key, f"{key} = {value!r} is not valid; choose one of: {', '.join(valid)}")
            return None
        return value

    def done_reply(self, document: Mapping[str, Any]) -> str | None:
        if "acquisition_done_reply" not in document:
            return self.missing(
                "acquisition_done_reply", None, 'the reply once a capture is in, e.g. "1"'
            )
        reply = self.get(document, "acquisition_done_reply", str)
        if reply is not None and (not reply.strip() or reply != reply.strip()):
            self.fail(
                "acquisition_done_reply",
                f"{reply!r} must be the scope's reply as sent, without surrounding spaces, "
                'e.g. "1"',
            )
        return reply

    def scaling(self, document: Mapping[str, Any], specs: Mapping[str, CommandSpec]) -> dict:
        """Where each scaling value comes from: a field of one reply (``scaling_fields``, with
        ``waveform_scaling_query``), a query of its own (``scaling_queries``) or a constant
        (``scaling_values``). Each value from one place; the required ones from some place."""
        sources: dict[str, str] = {}
        valid = (*SCALING_FIELDS, IGNORED_FIELD)
        names = document.get("scaling_fields", [])
        fields_given: list[str] = []
        if not isinstance(names, list):
            self.fail("scaling_fields", "must be a list of field names")
            names = []
        for name in names:
            if not isinstance(name, str) or name not in valid:
                hint = (
                    did_you_mean(name, valid)
                    if isinstance(name, str)
                    else f"valid: {', '.join(valid)}"
                )
                self.fail("scaling_fields", f"scaling_fields has unknown field {name!r}; {hint}")
                continue
            if name != IGNORED_FIELD and name in sources:
                self.fail("scaling_fields", f"scaling_fields lists {name!r} twice")
            sources.setdefault(name, "scaling_fields")
            fields_given.append(name)
        if fields_given and "waveform_scaling_query" not in specs:
            self.fail(
                "commands.waveform_scaling_query",
                "missing command commands.waveform_scaling_query (scaling_fields name its fields)",
            )
        queries = self.scaling_table(document, "scaling_queries", str, sources)
        for field_name, query in queries.items():
            self.safe(f"scaling_queries.{field_name}", query)
        constants = self.scaling_table(document, "scaling_values", (int, float), sources)
        absent = [name for name in REQUIRED_SCALING_FIELDS if name not in sources]
        if "x_origin" not in sources and "x_reference" not in sources:
            absent.append("x_origin (or x_reference)")
        if absent:
            self.fail(
                "scaling_fields",
                f"scaling_fields lacks {', '.join(absent)}: give each in scaling_fields, "
                "scaling_queries or scaling_values",
            )
        return {
            "scaling_fields": tuple(fields_given),
            "scaling_queries": MappingProxyType(queries),
            "scaling_values": MappingProxyType({k: float(v) for k, v in constants.items()}),
        }

    def scaling_table(
        self, document: Mapping[str, Any], key: str, kind: Any, sources: dict[str, str]
    ) -> dict[str, Any]:
        table = document.get(key, {})
        if not isinstance(table, dict):
            self.fail(key, f"[{key}] must be a table")
            return {}
        self.unknown_keys(table, SCALING_FIELDS, f"{key}.")
        result = {}
        for name in table:
            if name not in SCALING_FIELDS:
                continue
            value = self.get(table, name, kind, f"{key}.")
            if name in sources:
                self.fail(f"{key}.{name}", f"{name} is already given in {sources[name]}")
            elif value is not None:
                sources[name] = key
                result[name] = value
        return result

    def limits(self, table: Any) -> ScopeLimits:
        if not isinstance(table, dict):
            self.fail("limits", "[limits] must be a table")
            return ScopeLimits()
        names = tuple(limit.name for limit in fields(ScopeLimits))
        self.unknown_keys(table, names, "limits.")
        values = {}
        for key in table:
            if key in names:
                kind = int if key.endswith("record_length") else (int, float)
                value = self.get(table, key, kind, "limits.")
                if value is not None:
                    values[key] = value
        limits = ScopeLimits(**values)
        for name in names:
            if name.startswith("min_"):
                low, high = getattr(limits, name), getattr(limits, "max_" + name[4:])
                if low > high:
                    self.fail(f"limits.{name}", f"limits.{name} ({low:g}) exceeds max_{name[4:]}")
        return limits
