"""Scope command maps: loading by family or path, and every validation error naming its key."""

from __future__ import annotations

from pathlib import Path

import pytest

from labseq_instruments.command_map import (
    MAPS_DIR,
    ROLE_COMMANDS,
    available_families,
    load_command_map,
)
from labseq_instruments.errors import CommandMapError

GENERIC_TEXT = (MAPS_DIR / "scope" / "generic.toml").read_text()


def write_map(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "family.toml"
    path.write_text(text)
    return path


def edited(old: str, new: str) -> str:
    assert old in GENERIC_TEXT, old
    return GENERIC_TEXT.replace(old, new, 1)


def test_generic_map_loads_by_family_name():
    command_map = load_command_map("generic")
    assert "generic" in available_families()
    assert command_map.family == "generic"
    assert command_map.data_format == "int8"
    assert command_map.scaling_fields[:3] == ("points", "x_increment", "x_origin")
    required = {key for key, d in ROLE_COMMANDS["scope"].items() if d.required}
    assert required <= set(command_map.commands)
    assert command_map.command("channel_scale", channel=2, value="0.5") == ":CHANnel2:SCALe 0.5"
    # The map's own rule: a setting's query is its header followed by "?".
    assert command_map.query("channel_scale", channel=3) == ":CHANnel3:SCALe?"
    assert command_map.query("trigger_source") == ":TRIGger:SOURce?"
    assert command_map.word("slope", "falling") == "NEGative"


def test_map_loads_by_path_with_overrides(tmp_path):
    text = edited('family = "generic"', 'family = "bench-b"')
    text += (
        '\n[words]\nslope = { rising = "RISE" }\n'
        "[limits]\nmax_volts_per_div = 50\nmax_record_length = 20000\n"
    )
    text = text.replace(
        'channel_probe = ":CHANnel{channel}:PROBe {value}"',
        'channel_probe = { command = ":CHANnel{channel}:PROBe {value}", '
        'query = ":CHANnel{channel}:PROBe:RATio?" }',
    )
    command_map = load_command_map(write_map(tmp_path, text))
    assert command_map.family == "bench-b"
    assert command_map.word("slope", "rising") == "RISE"
    assert command_map.word("slope", "falling") == "NEGative"  # default kept
    assert command_map.limits.max_volts_per_div == 50
    assert command_map.limits.max_record_length == 20000
    assert command_map.query("channel_probe", channel=1) == ":CHANnel1:PROBe:RATio?"


@pytest.mark.parametrize(
    ("old", "new", "fragment"),
    [
        ("channels = 4", "chanels = 4", "chanels: unknown key; did you mean 'channels'"),
        (
            'single = ":SINGle"',
            'singel = ":SINGle"',
            "commands.singel: unknown key; did you mean 'single'",
        ),
        (
            'stop = ":STOP"\n',
            "",
            "missing command commands.stop",
        ),
        (
            'timebase_scale = ":TIMebase:SCALe {value}"',
            'timebase_scale = ":TIMebase:SCALe {volts}"',
            r"unknown placeholder \{volts\}",
        ),
        (
            'channel_scale = ":CHANnel{channel}:SCALe {value}"',
            'channel_scale = ":CHANnel1:SCALe {value}"',
            r"lacks \{channel\}",
        ),
        (
            'single = ":SINGle"',
            'single = ":SINGle;*RST"',
            "contains ';'",
        ),
        ('data_format = "int8"', 'data_format = "int12"', "int8, uint8, int16, uint16, float32"),
        ('byte_order = "big"', 'byte_order = "network"', "big, little"),
        ("channels = 4", 'channels = "four"', "line 13, channels: must be int"),
        ("code_min = -128", "code_min = 200", "code_min .* must be below code_max"),
        (
            '"y_origin", "y_reference"]',
            '"y_reference"]',
            "scaling_fields lacks y_origin",
        ),
        (
            '"y_origin", "y_reference"]',
            '"y_origen", "y_reference"]',
            "unknown field 'y_origen'; did you mean 'y_origin'",
        ),
        (
            '"y_origin", "y_reference"]',
            '"y_origin", "y_origin"]',
            "lists 'y_origin' twice",
        ),
        ('description = "', 'family = "again"\ndescription = "', "not valid TOML"),
    ],
)
def test_invalid_maps_are_refused_naming_file_and_key(tmp_path, old, new, fragment):
    path = write_map(tmp_path, edited(old, new))
    with pytest.raises(CommandMapError, match=fragment) as caught:
        load_command_map(path)
    assert str(path) in str(caught.value)
    assert "line " in str(caught.value) or "not valid TOML" in str(caught.value)


def test_unknown_word_and_limit_keys_are_refused(tmp_path):
    path = write_map(tmp_path, GENERIC_TEXT + '\n[words]\nslope = { upward = "UP" }\n')
    unknown = r"words\.slope\.upward: unknown key; known keys: rising, falling"
    with pytest.raises(CommandMapError, match=unknown):
        load_command_map(path)
    path = write_map(tmp_path, GENERIC_TEXT + "\n[limits]\nmax_volt_per_div = 5\n")
    with pytest.raises(CommandMapError, match="did you mean 'max_volts_per_div'"):
        load_command_map(path)
    path = write_map(
        tmp_path, GENERIC_TEXT + "\n[limits]\nmin_volts_per_div = 5.0\nmax_volts_per_div = 1.0\n"
    )
    with pytest.raises(CommandMapError, match="min_volts_per_div .* exceeds"):
        load_command_map(path)


def test_ignored_scaling_fields_may_repeat(tmp_path):
    text = edited('"y_origin", "y_reference"]', '"_", "y_origin", "_"]')
    assert load_command_map(write_map(tmp_path, text)).scaling_fields.count("_") == 2


def test_unknown_family_lists_shipped_maps(tmp_path):
    with pytest.raises(CommandMapError, match="unknown scope family 'nosuch'.*generic"):
        load_command_map("nosuch")
    with pytest.raises(CommandMapError, match="not found"):
        load_command_map(tmp_path / "absent.toml")


def test_every_problem_is_reported_with_its_line(tmp_path):
    text = edited("channels = 4", 'channels = "four"')
    text = text.replace('stop = ":STOP"\n', "")
    text = text.replace('single = ":SINGle"', 'single = ":SINGle;*RST"')
    text = text.replace('byte_order = "big"', 'byte_order = "network"')
    path = write_map(tmp_path, text)
    with pytest.raises(CommandMapError) as caught:
        load_command_map(path)
    message = str(caught.value)
    assert "4 problems" in message
    channels_line = text.splitlines().index('channels = "four"') + 1
    assert f"line {channels_line}, channels" in message
    assert "commands.stop: missing command commands.stop (needed to stop an acquisition)" in message
    assert "byte_order = 'network' is not valid" in message and "contains ';'" in message


@pytest.mark.parametrize("role", ["source", "load", "meter", "scope"])
def test_shipped_maps_of_every_role_load(role):
    assert {"generic", "alt"} <= set(available_families(role))
    for family in ("generic", "alt"):
        command_map = load_command_map(family, role)
        assert command_map.role == role and command_map.family == family
    other = "meter" if role == "scope" else "scope"
    with pytest.raises(CommandMapError, match=f"is for the '{other}' role, not the '{role}'"):
        load_command_map(MAPS_DIR / other / "generic.toml", role)


def test_optional_commands_may_be_left_out_and_required_ones_not(tmp_path):
    # An 8-bit scope has no byte-order command, and one with a fixed format no format command.
    text = GENERIC_TEXT.replace('waveform_byte_order = ":WAVeform:BORDer {value}"', "")
    text = text.replace('waveform_format = ":WAVeform:FORMat {value}"', "")
    command_map = load_command_map(write_map(tmp_path, text))
    assert not command_map.has("waveform_byte_order") and not command_map.has("waveform_format")
    with pytest.raises(CommandMapError, match="no commands.waveform_format, which is needed to"):
        command_map.spec("waveform_format")


def test_conversions_tables_and_scaling_sources_are_checked(tmp_path):
    text = GENERIC_TEXT.replace('convert = "fraction"', 'convert = "furlongs"')
    text = text.replace(
        'channel_bandwidth_limit = ":CHANnel{channel}:BANDwidth {value}"',
        'channel_bandwidth_limit = { command = ":CHANnel{channel}:BANDwidth {value}", '
        'table = { "twenty" = "ON" } }',
    )
    text += "\n[scaling_values]\ny_origin = 0.0\n"
    with pytest.raises(CommandMapError) as caught:
        load_command_map(write_map(tmp_path, text))
    message = str(caught.value)
    assert "'furlongs' is not a conversion here; valid: fraction, percent" in message
    assert "each key must be a number" in message
    assert "y_origin is already given in scaling_fields" in message


def test_windows_line_endings_read_the_same(tmp_path):
    # A map saved on Windows (CR LF): same map, same line numbers in its problems.
    path = tmp_path / "crlf.toml"
    path.write_bytes(GENERIC_TEXT.replace("\n", "\r\n").encode("utf-8"))
    assert load_command_map(path).commands == load_command_map("generic").commands
    path.write_bytes(edited("channels = 4", "channels = 0").replace("\n", "\r\n").encode())
    line = GENERIC_TEXT.splitlines().index("channels = 4") + 1
    with pytest.raises(CommandMapError, match=f"line {line}, channels: channels = 0 must be"):
        load_command_map(path)
