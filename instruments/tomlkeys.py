"""Reading a TOML file key by key, with one way of saying what is wrong in it.

Sequence files, command maps and DUT files are all read this way: every problem of a file is
collected (:class:`Problems`) with its key (a dotted path such as ``nodes[1].channel``), the
line where that key is written (:func:`find_key_line`) and what would be valid, and all of them
are reported together in one message::

    path/to/file.toml: 2 problems:
      line 12, scope.volts_per_div: '25 A' is in A, expected V
      line 30, limits.max_qq: unknown key; did you mean 'max_q'?

Each reader raises its own error with that message (:class:`labseq.sequence.SequenceError`,
:class:`labseq_instruments.errors.CommandMapError`, ``sim_instruments``' ``DutFileError``). This
module knows TOML, not what the files mean; it imports nothing of labseq.
"""

from __future__ import annotations

import difflib
import re
import tomllib
from collections.abc import Iterable, Mapping, Sequence
from pathlib import Path
from typing import Any, NamedTuple

from labseq_instruments.files import FileProblem, read_regular_file
from labseq_instruments.text import quoted


class Problem(NamedTuple):
    """One thing wrong in a file: where (its key and line) and what."""

    key: str
    message: str
    line: int | None


def describe_value(value: Any) -> str:
    """How a TOML value reads in a message: 'the string 'x'', 'an array', ..."""
    if isinstance(value, bool):
        return "a boolean"
    if isinstance(value, str):
        return f"the string {quoted(value)}"
    if isinstance(value, int | float):
        return f"the number {value!r}"
    if isinstance(value, list):
        return "an array"
    if isinstance(value, dict):
        return "a table"
    return f"a {type(value).__name__}"


def did_you_mean(name: str, known: Sequence[str]) -> str:
    """The closest known name as a suggestion, or the known names when none is close."""
    close = difflib.get_close_matches(name, list(known), n=1, cutoff=0.6)
    return f"did you mean {close[0]!r}?" if close else f"known keys: {', '.join(known)}"


class Problems:
    """Every problem found in one file, each with its key and line, to be reported together."""

    def __init__(self, path: Path | str, text: str = "") -> None:
        self.path = Path(path)
        self.text = text
        self.found: list[Problem] = []

    def __bool__(self) -> bool:
        return bool(self.found)

    def fail(self, key: str, message: str) -> None:
        """Record that ``key`` is wrong: ``message`` says how and what would be valid."""
        self.found.append(Problem(key, message, find_key_line(self.text, key)))

    def unknown_keys(
        self, table: Mapping[str, Any], known: Sequence[str], prefix: str = ""
    ) -> None:
        """Record every key of ``table`` that is not ``known``, with the closest known name."""
        for name in table:
            if name not in known:
                key = f"{prefix}.{name}" if prefix else name
                self.fail(key, f"unknown key; {did_you_mean(name, known)}")

    def sorted(self) -> list[Problem]:
        """The problems in the order of their lines (those without a line first)."""
        return sorted(self.found, key=lambda problem: problem.line or 0)

    def report(self) -> str:
        """The problems as one message (see the module notes)."""
        return report(self.path, self.sorted())

    def load(self, data: bytes | None = None) -> dict[str, Any] | None:
        """The file's TOML document (read from the file unless its ``data`` is given); None,
        with the problem recorded, when it is not a regular file, cannot be read, is not UTF-8
        text or not TOML. A UTF-8 byte-order mark (as some Windows editors write) is skipped."""
        try:
            raw = read_regular_file(self.path) if data is None else data
        except FileProblem as problem:
            self.fail("(file)", str(problem))
            return None
        try:
            self.text = raw.decode("utf-8").removeprefix("\ufeff")
        except UnicodeDecodeError as exc:
            line = raw[: exc.start].count(b"\n") + 1
            self.found.append(Problem("(file)", "not UTF-8 text", line))
            return None
        return self.parse(self.text)

    def parse(self, text: str) -> dict[str, Any] | None:
        """The TOML document ``text``; None, with the problem and its line recorded, when it is
        not TOML."""
        self.text = text
        try:
            return tomllib.loads(text)
        except RecursionError:
            self.fail(
                "(syntax)",
                "arrays or tables nested too deeply to read; a labseq file "
                "nests a few levels at most",
            )
            return None
        except tomllib.TOMLDecodeError as exc:
            match = re.search(r"line (\d+)", str(exc))
            line = int(match.group(1)) if match else None
            self.found.append(Problem("(syntax)", f"not valid TOML: {exc}", line))
            return None


def report(path: Path | str, problems: Iterable[Problem]) -> str:
    """``path: N problems:`` and one line per problem: ``line L, key: message``."""
    problems = list(problems)
    count = f"{len(problems)} problems" if len(problems) > 1 else "1 problem"
    lines = [f"{path}: {count}:"]
    for problem in problems:
        where = f"line {problem.line}, " if problem.line else ""
        lines.append(f"  {where}{problem.key}: {problem.message}")
    return "\n".join(lines)


def find_key_line(text: str, key: str) -> int | None:
    """Line number (1-based) where ``key`` (a dotted path such as ``nodes[1].channel``) is
    written in ``text``.

    A simple scan of table headers and ``name =`` lines; the n-th ``[[name]]`` header is
    ``name[n]`` (and so are the ``[name.sub]`` tables under it). Falls back to the nearest parent
    that is found, then to the same path without indices.
    """
    section = ""
    counts: dict[str, int] = {}
    found: dict[str, int] = {}
    for number, raw in enumerate(text.splitlines(), start=1):
        line = raw.strip()
        header = re.match(r"^(\[\[?)\s*([^\]]+?)\s*\]\]?", line)
        if header:
            name = re.sub(r"\s*\.\s*", ".", header.group(2)).replace('"', "")
            head, dot, rest = name.partition(".")
            if header.group(1) == "[[":
                counts[name] = counts.get(name, -1) + 1
                found.setdefault(name, number)
                name = f"{name}[{counts[name]}]"
            elif head in counts:
                name = f"{head}[{counts[head]}]{dot}{rest}"
            section = name
            found.setdefault(section, number)
            continue
        assignment = re.match(r'^([A-Za-z0-9_\-."\' ]+?)\s*=', line)
        if assignment:
            name = re.sub(r"\s*\.\s*", ".", assignment.group(1)).replace('"', "").replace("'", "")
            found.setdefault(f"{section}.{name}" if section else name, number)
    for target in (key, re.sub(r"\[\d+\]", "", key)):
        while target:
            if target in found:
                return found[target]
            shorter = re.sub(r"(\[\d+\]|\.?[^.\[]*)$", "", target, count=1)
            # a key ending in "[" (not an index) would not get shorter: drop its last character
            target = shorter if shorter != target else target[:-1]
    return None
