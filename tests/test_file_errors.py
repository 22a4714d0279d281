"""Sequence files, command maps and DUT files say what is wrong in them the same way: the file,
then one line per problem with its line number, its key and what would be valid, a misspelt key
with the closest known one."""

from __future__ import annotations

import re
from pathlib import Path

import pytest
from sweeps import DEMO_DC

from labseq.sequence import SequenceError, load_sequence
from labseq_instruments.command_map import MAPS_DIR, load_command_map
from labseq_instruments.errors import CommandMapError
from labseq_sim_instruments.flyback import DEMO_DUTS, DutFileError, load_dut

#: (a shipped file, a key in it, its misspelling, how to read the file, the error it raises)
CASES = [
    (DEMO_DC, "settle =", "setle =", load_sequence, SequenceError, "grid.setle", "settle"),
    (
        MAPS_DIR / "scope" / "generic.toml",
        "channels =",
        "chanels =",
        load_command_map,
        CommandMapError,
        "chanels",
        "channels",
    ),
    (
        DEMO_DUTS["telecom_dc"],
        "turns_ratio =",
        "turns_raito =",
        load_dut,
        DutFileError,
        "transformer.turns_raito",
        "turns_ratio",
    ),
]


@pytest.mark.parametrize(
    ("source", "old", "new", "read", "error", "key", "meant"),
    CASES,
    ids=["sequence", "command map", "DUT file"],
)
def test_one_error_style_for_every_file(
    tmp_path: Path, source: Path, old: str, new: str, read, error, key: str, meant: str
) -> None:
    text = source.read_text(encoding="utf-8")
    assert old in text
    path = tmp_path / source.name
    path.write_text(text.replace(old, new, 1), encoding="utf-8")
    line = 1 + text.splitlines().index(next(row for row in text.splitlines() if old in row))
    with pytest.raises(error) as caught:
        read(path)
    message = str(caught.value)
    assert re.match(rf"{re.escape(str(path))}: \d+ problems?:\n", message)
    expected = f"  line {line}, {key}: unknown key; did you mean {meant!r}?"
    assert expected in message.splitlines()
