"""Scope command maps: the per-family TOML files that say how a scope is driven.

SCPI-1999 leaves acquisition and waveform transfer to each vendor, so the oscilloscope driver
takes every command string, keyword, payload format and scaling-reply layout from a map. A new
scope family is a new TOML file under ``instruments/command_maps/`` (or anywhere, by path); no
code changes. ``generic.toml`` documents every key.
"""

from __future__ import annotations

import difflib
import math
import string
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, fields
from pathlib import Path
from types import MappingProxyType
from typing import Any

from instruments.block import BYTE_ORDERS, DATA_FORMATS
from instruments.errors import CommandMapError, UnsafeTextError
from instruments.limits import ScopeLimits, check_text

MAPS_DIR = Path(__file__).with_name("command_maps")

_CHANNEL_VALUE = frozenset({"channel", "value"})
_VALUE = frozenset({"value"})
_CHANNEL = frozenset({"channel"})
_NONE: frozenset[str] = frozenset()

#: Every command a map must give, with the placeholders its string must use.
COMMAND_PLACEHOLDERS: dict[str, frozenset[str]] = {
    "channel_enable": _CHANNEL_VALUE,
    "channel_scale": _CHANNEL_VALUE,
    "channel_offset": _CHANNEL_VALUE,
    "channel_coupling": _CHANNEL_VALUE,
    "channel_bandwidth_limit": _CHANNEL_VALUE,
    "channel_probe": _CHANNEL_VALUE,
    "timebase_scale": _VALUE,
    "record_length": _VALUE,
    "trigger_source": _CHANNEL,
    "trigger_level": _VALUE,
    "trigger_slope": _VALUE,
    "trigger_position": _VALUE,
    "single": _NONE,
    "stop": _NONE,
    "acquisition_done_query": _NONE,
    "waveform_source": _CHANNEL,
    "waveform_format": _VALUE,
    "waveform_byte_order": _VALUE,
    "waveform_scaling_query": _NONE,
    "waveform_data_query": _NONE,
    "measure_mean_query": _CHANNEL,
}
#: Setting commands whose read-back query may be overridden by ``<key>_query``.
SETTING_COMMANDS = tuple(key for key, names in COMMAND_PLACEHOLDERS.items() if "value" in names)

#: Keywords a map may rename, with the words of the generic SCPI-style scope as defaults.
DEFAULT_WORDS: dict[str, dict[str, str]] = {
    "on_off": {"on": "ON", "off": "OFF"},
    "coupling": {"dc": "DC", "ac": "AC"},
    "slope": {"rising": "POSitive", "falling": "NEGative"},
    "data_format": {"int8": "INT8", "int16": "INT16", "float32": "FLOAT32"},
    "byte_order": {"big": "NORMal", "little": "SWAPped"},
}

REQUIRED_SCALING_FIELDS = ("x_increment", "x_origin", "y_increment", "y_origin")
OPTIONAL_SCALING_FIELDS = ("points", "y_reference")
IGNORED_FIELD = "_"

_TOP_LEVEL_KEYS = (
    "family",
    "description",
    "channels",
    "vertical_divisions",
    "horizontal_divisions",
    "data_format",
    "byte_order",
    "code_min",
    "code_max",
    "scaling_fields",
    "acquisition_done_reply",
    "commands",
    "words",
    "limits",
)
_OPTIONAL_TOP_LEVEL = ("description", "words", "limits")


@dataclass(frozen=True)
class CommandMap:
    """A validated scope command map. Build one with :func:`load_command_map`."""

    family: str
    description: str
    channels: int
    vertical_divisions: float
    horizontal_divisions: float
    data_format: str
    byte_order: str
    code_min: float
    code_max: float
    scaling_fields: tuple[str, ...]
    acquisition_done_reply: str
    commands: Mapping[str, str]
    words: Mapping[str, Mapping[str, str]]
    limits: ScopeLimits
    source: Path

    def command(self, key: str, *, channel: int | None = None, value: str | None = None) -> str:
        """Render command ``key`` with its placeholders filled in."""
        return self.commands[key].format(channel=channel, value=value)

    def query(self, key: str, *, channel: int | None = None) -> str:
        """Render the read-back query of setting ``key``: ``<key>_query`` or header + ``?``."""
        override = self.commands.get(f"{key}_query")
        if override is not None:
            return override.format(channel=channel)
        header = self.commands[key].split(None, 1)[0]
        return header.format(channel=channel) + "?"

    def word(self, group: str, name: str) -> str:
        """Return this family's keyword for ``name`` in ``group`` (e.g. slope, rising)."""
        return self.words[group][name]


def available_families() -> list[str]:
    """Names of the maps shipped in ``instruments/command_maps/``."""
    return sorted(path.stem for path in MAPS_DIR.glob("*.toml"))


def load_command_map(family_or_path: str | Path) -> CommandMap:
    """Load and validate a command map by family name (a shipped map) or by file path.

    Raises
    ------
    CommandMapError
        Naming the file and the key, and what would be valid.
    """
    path = _resolve(family_or_path)
    try:
        with path.open("rb") as stream:
            document = tomllib.load(stream)
    except OSError as error:
        raise CommandMapError(f"{path}: cannot read command map ({error.strerror})") from None
    except tomllib.TOMLDecodeError as error:
        raise CommandMapError(f"{path}: not valid TOML: {error}") from None
    return _validate(document, path)


def _resolve(family_or_path: str | Path) -> Path:
    text = str(family_or_path)
    if isinstance(family_or_path, Path) or text.endswith(".toml") or "/" in text:
        path = Path(family_or_path)
        if not path.is_file():
            raise CommandMapError(f"{path}: command map file not found")
        return path
    path = MAPS_DIR / f"{text}.toml"
    if not path.is_file():
        raise CommandMapError(
            f"unknown scope family {text!r}; shipped maps: {', '.join(available_families())}"
            " (or give the path of a .toml map)"
        )
    return path


def _suggest(key: str, valid: tuple[str, ...] | list[str]) -> str:
    close = difflib.get_close_matches(key, valid, n=1)
    return f"did you mean {close[0]!r}?" if close else f"valid keys: {', '.join(valid)}"


def _check_keys(path: Path, where: str, table: Mapping[str, Any], valid: tuple[str, ...]) -> None:
    for key in table:
        if key not in valid:
            raise CommandMapError(f"{path}: unknown key {where}{key!r}; {_suggest(key, valid)}")


def _get(path: Path, table: Mapping[str, Any], key: str, kind: type | tuple[type, ...]) -> Any:
    value = table[key]
    if isinstance(value, bool) or not isinstance(value, kind):
        names = kind.__name__ if isinstance(kind, type) else " or ".join(k.__name__ for k in kind)
        raise CommandMapError(f"{path}: key {key!r} must be {names}, got {value!r}")
    if isinstance(value, float) and not math.isfinite(value):
        raise CommandMapError(f"{path}: key {key!r} must be a finite number, got {value!r}")
    return value


def _choice(path: Path, table: Mapping[str, Any], key: str, valid: Mapping[str, Any]) -> str:
    value = _get(path, table, key, str)
    if value not in valid:
        raise CommandMapError(
            f"{path}: {key} = {value!r} is not valid; choose one of: {', '.join(valid)}"
        )
    return value


def _safe(path: Path, key: str, text: str) -> str:
    try:
        return check_text(key, text)
    except UnsafeTextError as error:
        raise CommandMapError(f"{path}: {error}") from None


def _validate(document: dict[str, Any], path: Path) -> CommandMap:
    _check_keys(path, "", document, _TOP_LEVEL_KEYS)
    for key in _TOP_LEVEL_KEYS:
        if key not in document and key not in _OPTIONAL_TOP_LEVEL:
            raise CommandMapError(f"{path}: missing key {key!r}")
    number = (int, float)
    channels = _get(path, document, "channels", int)
    if channels < 1:
        raise CommandMapError(f"{path}: channels = {channels} must be at least 1")
    divisions = {}
    for key in ("vertical_divisions", "horizontal_divisions"):
        divisions[key] = float(_get(path, document, key, number))
        if divisions[key] <= 0:
            raise CommandMapError(f"{path}: {key} must be positive, got {divisions[key]:g}")
    code_min = float(_get(path, document, "code_min", number))
    code_max = float(_get(path, document, "code_max", number))
    if code_min >= code_max:
        raise CommandMapError(f"{path}: code_min ({code_min:g}) must be below code_max")
    return CommandMap(
        family=_safe(path, "family", _get(path, document, "family", str)),
        description=str(document.get("description", "")),
        channels=channels,
        vertical_divisions=divisions["vertical_divisions"],
        horizontal_divisions=divisions["horizontal_divisions"],
        data_format=_choice(path, document, "data_format", DATA_FORMATS),
        byte_order=_choice(path, document, "byte_order", BYTE_ORDERS),
        code_min=code_min,
        code_max=code_max,
        scaling_fields=_scaling_fields(path, document),
        acquisition_done_reply=_done_reply(path, document),
        commands=_commands(path, _get(path, document, "commands", dict)),
        words=_words(path, document.get("words", {})),
        limits=_limits(path, document.get("limits", {})),
        source=path,
    )


def _done_reply(path: Path, document: Mapping[str, Any]) -> str:
    """The reply that says a single acquisition is in: one non-empty token."""
    reply = _safe(
        path, "acquisition_done_reply", _get(path, document, "acquisition_done_reply", str)
    )
    if not reply.strip() or reply != reply.strip():
        raise CommandMapError(
            f"{path}: acquisition_done_reply = {reply!r} must be the scope's reply as sent, "
            'without surrounding spaces, e.g. "1"'
        )
    return reply


def _scaling_fields(path: Path, document: Mapping[str, Any]) -> tuple[str, ...]:
    names = _get(path, document, "scaling_fields", list)
    valid = (*REQUIRED_SCALING_FIELDS, *OPTIONAL_SCALING_FIELDS, IGNORED_FIELD)
    seen: set[str] = set()
    for name in names:
        if not isinstance(name, str) or name not in valid:
            hint = _suggest(name, valid) if isinstance(name, str) else f"valid: {', '.join(valid)}"
            raise CommandMapError(f"{path}: scaling_fields has unknown field {name!r}; {hint}")
        if name in seen and name != IGNORED_FIELD:
            raise CommandMapError(f"{path}: scaling_fields lists {name!r} twice")
        seen.add(name)
    missing = [name for name in REQUIRED_SCALING_FIELDS if name not in seen]
    if missing:
        raise CommandMapError(f"{path}: scaling_fields lacks {', '.join(missing)}")
    return tuple(names)


def _commands(path: Path, table: Mapping[str, Any]) -> Mapping[str, str]:
    query_keys = tuple(f"{key}_query" for key in SETTING_COMMANDS)
    _check_keys(path, "commands.", table, (*COMMAND_PLACEHOLDERS, *query_keys))
    for key in COMMAND_PLACEHOLDERS:
        if key not in table:
            raise CommandMapError(f"{path}: missing command commands.{key}")
    commands: dict[str, str] = {}
    for key, template in table.items():
        if not isinstance(template, str) or not template.strip():
            raise CommandMapError(f"{path}: commands.{key} must be a non-empty string")
        _safe(path, f"commands.{key}", template)
        base = key.removesuffix("_query") if key in query_keys else key
        expected = COMMAND_PLACEHOLDERS[base] - ({"value"} if key in query_keys else set())
        _check_placeholders(path, key, template, expected)
        commands[key] = template
    return MappingProxyType(commands)


def _check_placeholders(path: Path, key: str, template: str, expected: frozenset[str]) -> None:
    try:
        fields_used = [
            (name, spec, conversion)
            for _, name, spec, conversion in string.Formatter().parse(template)
            if name is not None
        ]
    except ValueError as error:
        raise CommandMapError(f"{path}: commands.{key} = {template!r}: {error}") from None
    for name, spec, conversion in fields_used:
        if spec or conversion:
            raise CommandMapError(
                f"{path}: commands.{key} = {template!r}: placeholders take no format or "
                f"conversion; write {{{name}}} alone"
            )
    used = {name for name, _, _ in fields_used}
    unknown = used - expected
    if unknown:
        allowed = ", ".join(f"{{{name}}}" for name in sorted(expected)) or "none"
        raise CommandMapError(
            f"{path}: commands.{key} uses unknown placeholder "
            f"{', '.join(f'{{{name}}}' for name in sorted(unknown))}; allowed here: {allowed}"
        )
    missing = expected - used
    if missing:
        raise CommandMapError(
            f"{path}: commands.{key} = {template!r} lacks "
            f"{', '.join(f'{{{name}}}' for name in sorted(missing))}"
        )


def _words(path: Path, table: Any) -> Mapping[str, Mapping[str, str]]:
    if not isinstance(table, dict):
        raise CommandMapError(f"{path}: [words] must be a table")
    _check_keys(path, "words.", table, tuple(DEFAULT_WORDS))
    words: dict[str, Mapping[str, str]] = {}
    for group, defaults in DEFAULT_WORDS.items():
        given = table.get(group, {})
        if not isinstance(given, dict):
            raise CommandMapError(f"{path}: words.{group} must be a table")
        _check_keys(path, f"words.{group}.", given, tuple(defaults))
        merged = {**defaults, **given}
        for name, word in merged.items():
            if not isinstance(word, str) or not word or " " in word:
                raise CommandMapError(f"{path}: words.{group}.{name} must be one keyword")
            _safe(path, f"words.{group}.{name}", word)
        words[group] = MappingProxyType(merged)
    return MappingProxyType(words)


def _limits(path: Path, table: Any) -> ScopeLimits:
    if not isinstance(table, dict):
        raise CommandMapError(f"{path}: [limits] must be a table")
    names = tuple(field.name for field in fields(ScopeLimits))
    _check_keys(path, "limits.", table, names)
    values = {}
    for key in table:
        whole = key.endswith("record_length")
        values[key] = _get(path, table, key, int if whole else (int, float))
    limits = ScopeLimits(**values)
    for name in names:
        if name.startswith("min_"):
            low, high = getattr(limits, name), getattr(limits, "max_" + name[4:])
            if low > high:
                raise CommandMapError(f"{path}: limits.{name} ({low:g}) exceeds max_{name[4:]}")
    return limits
