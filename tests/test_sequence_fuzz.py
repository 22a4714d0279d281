"""Fuzzing sequence files: whatever is done to a valid file, loading it either succeeds or raises
SequenceError, and the CLI answers with exit status 2, a message naming keys and no traceback."""

from __future__ import annotations

import contextlib
import io
import json
import math
import tomllib
from pathlib import Path
from typing import Any

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from labseq.cli import main
from labseq.sequence import Sequence, SequenceError, parse_sequence

SEQUENCES = Path(__file__).resolve().parent.parent / "labseq" / "examples"
BASES = {
    name: (SEQUENCES / name).read_text(encoding="utf-8")
    for name in ("demo_dc_flyback.toml", "demo_offline_flyback.toml", "template_real_bench.toml")
}


def toml_string(text: str) -> str:
    """A TOML basic string: JSON's escapes are TOML's, plus DEL, which TOML wants escaped."""
    return json.dumps(text, ensure_ascii=False).replace("\x7f", "\\u007f")


def toml_value(value: Any) -> str:
    """TOML text for a value (inline tables for tables)."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if math.isnan(value):
            return "nan"
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return repr(value)
    if isinstance(value, str):
        return toml_string(value)
    if isinstance(value, list):
        return "[" + ", ".join(toml_value(item) for item in value) + "]"
    if isinstance(value, dict):
        return (
            "{" + ", ".join(f"{toml_string(k)} = {toml_value(v)}" for k, v in value.items()) + "}"
        )
    raise TypeError(type(value))


def to_toml(data: dict[str, Any]) -> str:
    return "".join(f"{toml_string(key)} = {toml_value(value)}\n" for key, value in data.items())


def key_paths(data: dict[str, Any], prefix: tuple[str, ...] = ()) -> list[tuple[str, ...]]:
    paths = []
    for key, value in data.items():
        paths.append((*prefix, key))
        if isinstance(value, dict):
            paths += key_paths(value, (*prefix, key))
    return paths


text_values = st.text(
    alphabet=st.characters(blacklist_categories=("Cs",)), max_size=12
) | st.sampled_from(["75 V", "4.7n", "220pF", "50 %", "-1 A", "1e400", "0", "ac", "rising", ""])
scalars = (
    text_values
    | st.integers(min_value=-(2**63), max_value=2**63 - 1)
    | st.floats(allow_nan=True, allow_infinity=True)
    | st.booleans()
)
values = st.recursive(
    scalars,
    lambda children: (
        st.lists(children, max_size=4) | st.dictionaries(text_values, children, max_size=3)
    ),
    max_leaves=6,
)


@st.composite
def mutated_files(draw: st.DrawFn) -> tuple[str, str, tuple[str, ...]]:
    """(TOML text, operation, mutated key path) from one of the shipped files."""
    name = draw(st.sampled_from(sorted(BASES)))
    data = tomllib.loads(BASES[name])
    for _ in range(draw(st.integers(min_value=1, max_value=3))):
        path = draw(st.sampled_from(key_paths(data)))
        parent = data
        for key in path[:-1]:
            parent = parent[key]
        operation = draw(st.sampled_from(["drop", "rename", "replace"]))
        if operation == "drop":
            del parent[path[-1]]
        elif operation == "rename":
            new_name = "x_" + draw(st.text(alphabet="abcdefghij_", min_size=1, max_size=8))
            parent[new_name] = parent.pop(path[-1])
            path = (*path[:-1], new_name)
        else:
            parent[path[-1]] = draw(values)
    return to_toml(data), operation, path


def ancestors(path: tuple[str, ...]) -> list[str]:
    """Dotted key paths of ``path`` and of every table or value above it."""
    return [".".join(path[:end]) for end in range(1, len(path) + 1)]


def run_cli_check(path: Path) -> tuple[int, str]:
    err = io.StringIO()
    code = 0
    with contextlib.redirect_stdout(io.StringIO()), contextlib.redirect_stderr(err):
        try:
            main(["check", str(path)])
        except SystemExit as exc:
            code = int(exc.code or 0)
    return code, err.getvalue()


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(mutated_files())
def test_mutated_files_fail_only_with_sequence_error(
    case: tuple[str, str, tuple[str, ...]],
) -> None:
    text, operation, path = case
    try:
        result = parse_sequence(text, SEQUENCES / "fuzzed.toml")
    except SequenceError as error:
        assert error.problems
        for problem in error.problems:
            assert problem.key and problem.key in str(error)
        if operation == "rename":  # the renamed key, or the value holding it, must be named
            named = {problem.key for problem in error.problems}
            assert named & set(ancestors(path)), str(error)
    else:
        assert isinstance(result, Sequence)
        assert operation != "rename"


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(case=mutated_files())
def test_mutated_files_through_cli_exit_2(tmp_path_factory: Any, case: Any) -> None:
    text, operation, path = case
    file = tmp_path_factory.mktemp("fuzz") / "fuzzed.toml"
    file.write_text(text, encoding="utf-8")
    code, err = run_cli_check(file)
    assert "Traceback" not in err
    assert code in (0, 2), err
    if code == 2:
        assert str(file) in err and "labseq: error:" in err
    if operation == "rename":
        assert code == 2 and any(f"{key}: " in err for key in ancestors(path)), err


@settings(max_examples=150, deadline=None)
@given(
    name=st.sampled_from(sorted(BASES)),
    position=st.floats(min_value=0.0, max_value=1.0),
    cut=st.integers(min_value=0, max_value=20),
    insert=st.text(max_size=10),
)
def test_mangled_text_fails_only_with_sequence_error(
    name: str, position: float, cut: int, insert: str
) -> None:
    base = BASES[name]
    at = int(position * len(base))
    text = base[:at] + insert + base[at + cut :]
    try:
        parse_sequence(text, SEQUENCES / name)
    except SequenceError as error:
        assert error.problems and str(SEQUENCES / name) in str(error)
