"""Text waveform files as scopes and spreadsheets write them.

The layout is found from the head of the file (its first 64 KiB): the delimiter and decimal mark
from the rows of numbers at its end, then, above the first row of numbers, a units row, a header
and a preamble. The samples are then parsed by numpy's C reader in blocks of about 1 MiB of text,
each block's volts appended to one float array and its times checked as they pass
(:class:`~labseq.waveform_files.record.TimeAxis`) rather than kept: a 10-million-row file never
becomes Python strings and numbers, and reading it takes little more memory than its volts.

Shapes read:

* delimiter ``,`` ``;`` tab or runs of spaces; decimal commas with ``;``, tab or spaces; cells
  in double quotes; a UTF-8 or UTF-16 byte-order mark; Latin-1 text where it is not UTF-8;
* a preamble of key/value lines above the data (``Sample Interval,5e-10``, ``Model: X``; lines
  starting with ``#`` or ``%`` too) — where there is no time column, times come from its sample
  interval (or sample rate) and its start time (or x origin), and its horizontal and vertical
  units apply to columns that state none;
* a header naming the columns: the time column is ``time``, ``t``, ``x``, ``s``, ``sec`` in any
  case, or any column whose unit is a time unit; every other column holds volts. Units follow a
  name in brackets (``Time (s)``, ``CH1 [mV]``), after a slash (``Time/us``) or an underscore
  (``time_s``), or stand in a units row under the header (``s,V``);
* no header: the first column is time (where there are two or more) and the others volts.
"""

from __future__ import annotations

import codecs
import contextlib
import itertools
import operator
import re
import warnings
from collections.abc import Iterator
from dataclasses import dataclass, replace
from pathlib import Path
from typing import TextIO

import numpy as np

from labseq.errors import InputError
from labseq.export import SCREEN_KEYS
from labseq.waveform_files.record import (
    TIME_UNITS_HINT,
    Column,
    FileRecord,
    TimeAxis,
    Where,
    check_volts,
    listing,
    parse_unit,
    pick_channel,
    quoted,
    time_scale,
    volts_scale,
)

#: The header labseq writes (``labseq export --captures csv``): no note is needed for it.
CANONICAL_HEADER = ("time_s", "volts")
HEAD_BYTES = 64 * 1024
#: A sample interval this long (100 kSa/s) shows no turn-off ring: in a file that states no time
#: unit it most likely means times written in ms, µs or ns.
LONG_STEP_S = 1e-5
#: Rows parsed at a time (a table of 0.5 MiB per column).
BLOCK_ROWS = 1 << 16
_NUMBER = re.compile(r"[-+]?(?:(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?|inf(?:inity)?|nan)", re.I)
_TIME_WORDS = {"time", "t", "x", "s", "sec", "second", "seconds"}
#: First words of preamble lines (normalised: lower case, letters and digits only), so that a
#: key/value line right above headerless data is not taken for a header.
_PREAMBLE_WORDS = (
    "model",
    "serial",
    "firmware",
    "version",
    "date",
    "record",
    "sample",
    "sampling",
    "source",
    "probe",
    "trigger",
    "vertical",
    "horizontal",
    "start",
    "points",
    "label",
    "title",
    "instrument",
    "xinc",
    "xorigin",
    "screen",
)
#: Preamble keys (normalised) that give the time base where a file has no time column.
_INTERVAL_KEYS = {"sampleinterval", "samplinginterval", "sampleperiod", "xincrement", "dt"}
_RATE_KEYS = {"samplerate", "samplingrate", "samplingfrequency", "fs"}
_ORIGIN_KEYS = {"xorigin", "starttime", "timeorigin", "t0", "firstsampletime"}
_TIME_UNIT_KEYS = {"horizontalunits", "horizontalunit", "xunits", "xunit", "timeunit", "timeunits"}
_VOLT_UNIT_KEYS = {"verticalunits", "verticalunit", "yunits", "yunit"}


def _key(text: str) -> str:
    return re.sub(r"[^0-9a-z]", "", text.lower())


@dataclass(frozen=True)
class Dialect:
    """How a row splits into numbers: the delimiter (None: runs of spaces) and decimal mark."""

    delimiter: str | None
    decimal_comma: bool

    def cells(self, line: str) -> list[str]:
        """The cells of ``line``, unquoted and stripped, without a trailing empty cell."""
        raw = line.split() if self.delimiter is None else line.split(self.delimiter)
        cells = [cell.strip().strip('"').strip() for cell in raw]
        return cells[:-1] if self.delimiter and len(cells) > 1 and cells[-1] == "" else cells

    def width(self, line: str) -> int | None:
        """How many numbers ``line`` holds when every cell is one, else None."""
        cells = self.cells(line)
        if not cells or any(not _NUMBER.fullmatch(self.number(cell)) for cell in cells):
            return None
        return len(cells)

    def number(self, cell: str) -> str:
        return cell.replace(",", ".") if self.decimal_comma else cell

    def skipped(self, line: str) -> bool:
        """Whether numpy's parser skips ``line`` (an empty one) rather than reading a row."""
        return not line.strip() if self.delimiter is None else not line.rstrip("\n")

    def describe(self) -> str:
        name = {",": "','", ";": "';'", "\t": "tab", None: "space"}[self.delimiter]
        return f"{name} separated" + (", decimal commas" if self.decimal_comma else "")


#: In order of preference where two read the same rows.
DIALECTS = tuple(
    Dialect(delimiter, comma)
    for delimiter, comma in [
        (",", False),
        (";", False),
        (";", True),
        ("\t", False),
        ("\t", True),
        (None, False),
        (None, True),
    ]
)


@dataclass(frozen=True)
class Layout:
    """What the head of a text file says about the rest of it."""

    encoding: str
    dialect: Dialect
    width: int  # numbers per row
    data_line: int  # first row of numbers, counted from 1
    columns: tuple[Column, ...]
    time: Column | None  # None: times from the preamble
    header: tuple[str, ...]  # the header's cells as written; () without a header
    preamble: dict[str, tuple[str, int]]  # normalised key → (value, line)


# -- the head of the file -------------------------------------------------------------------


def _head(path: Path) -> tuple[str, list[str]]:
    """(encoding, complete lines) of the first 64 KiB of the file."""
    with path.open("rb") as handle:
        raw = handle.read(HEAD_BYTES)
    if not raw.strip():
        raise InputError(f"{path}: the file is empty; expected a header such as time_s,volts")
    if raw.startswith(codecs.BOM_UTF8):
        encoding = "utf-8-sig"
    elif raw.startswith((codecs.BOM_UTF16_LE, codecs.BOM_UTF16_BE)):
        encoding = "utf-16"
    elif b"\x00" in raw:
        raise InputError(f"{path}: binary data, not text; expected numbers one sample per line")
    else:
        encoding = "utf-8"
    try:
        text = codecs.getincrementaldecoder(encoding)().decode(raw, final=False)
    except UnicodeDecodeError:
        encoding, text = "latin-1", raw.decode("latin-1")
    lines = text.replace("\r\n", "\n").replace("\r", "\n").split("\n")
    if len(raw) == HEAD_BYTES:
        lines.pop()  # the last line may go on past the head
        if not lines:
            raise InputError(
                f"{path}: line 1 is longer than {HEAD_BYTES // 1024} KiB (it starts "
                f"{quoted(text)}); expected one sample per line"
            )
    return encoding, lines


def _choose_dialect(path: Path, lines: list[str]) -> tuple[Dialect, int]:
    """The dialect reading the longest run of equal rows of numbers at the end of the head, and
    the width of those rows. Where dialects read the run at different widths (``1,5`` is one
    number with a decimal comma or two), the width of a header above the run decides."""
    filled = [line for line in lines if line.strip()]
    runs: list[tuple[int, int, int, Dialect]] = []  # (run, width, order, dialect)
    for order, dialect in enumerate(DIALECTS):
        run, width = 0, 0
        for line in reversed(filled):
            count = dialect.width(line)
            if count is None or (width and count != width):
                break
            width, run = count, run + 1
        if run:
            runs.append((run, width, order, dialect))
    if not runs:
        first = next((line for line in filled), "")
        raise InputError(
            f"{path}: no data rows: no line of numbers in the first {len(lines)} line(s) (line 1: "
            f"{quoted(first)}); expected a header such as time_s,volts and one sample per line"
        )
    longest = max(run for run, *_ in runs)
    header = filled[-longest - 1] if longest < len(filled) else None
    fitting = {
        width
        for run, width, _, dialect in runs
        if run == longest
        and header is not None
        and len(_header_cells(header, dialect, width)) == width
    }
    _, width, _, dialect = max(runs, key=lambda r: (r[0], r[1] in fitting, -r[2]))
    return dialect, width


def _header_cells(line: str, dialect: Dialect, width: int) -> list[str]:
    """The names in a header line (a comment marker before them is no name; a tab may be)."""
    line = line.lstrip(" ")
    if line[:1] in ("#", "%"):
        line = line[1:].lstrip(" ")
    cells = dialect.cells(line)
    if dialect.delimiter is None and len(cells) != width:  # "Time (s)   CH1 (V)"
        cells = [cell.strip().strip('"') for cell in re.split(r"\t|\s{2,}", line.strip())]
    return cells


def _name_and_unit(cell: str) -> tuple[str, str | None]:
    """``Time (s)`` → (Time, s); ``time_s`` → (time, s); ``Time/us`` → (Time, us); ``s`` →
    (s, s); a name without a unit → (name, None)."""
    forms = [
        (r"(?P<name>.*?)\s*(?P<unit>[(\[][^)\]]*[)\]])", ("time", "volts", "other")),
        (r"(?P<name>[^/]+?)\s*/\s*(?P<unit>[^/]+)", ("time", "volts")),
        (r"(?P<name>.+?)_(?P<unit>[^_]+)", ("time", "volts")),
    ]
    for pattern, kinds in forms:
        match = re.fullmatch(pattern, cell)
        if match and (unit := parse_unit(match.group("unit"))) and unit[0] in kinds:
            return match.group("name") or cell, match.group("unit").strip("()[] ")
    unit = parse_unit(cell)
    return cell, (cell if unit and unit[0] in ("time", "volts") else None)


def _is_units_row(cells: list[str]) -> bool:
    return any(cells) and all(not cell or parse_unit(cell) for cell in cells)


def _find_time(columns: list[Column]) -> Column | None:
    for column in columns:
        unit = parse_unit(column.unit) if column.unit else None
        if column.name.strip().lower() in _TIME_WORDS or (unit and unit[0] == "time"):
            return column
    return None


def _preamble(lines: list[tuple[int, str]], dialect: Dialect) -> dict[str, tuple[str, int]]:
    """Key/value lines: ``key<delimiter>value``, ``key: value``, ``key = value``, ``key value``."""
    entries: dict[str, tuple[str, int]] = {}
    for number, line in lines:
        body = line.strip().lstrip("#%").strip()
        cells = [cell for cell in dialect.cells(body) if cell] if dialect.delimiter else []
        if len(cells) < 2:
            match = re.fullmatch(r"([^:=]+?)\s*[:=]\s*(.+)", body) or re.fullmatch(
                r"(.*?[A-Za-z)\]])\s+([-+]?\.?\d.*)", body
            )
            cells = [match.group(1), match.group(2).strip().strip('"')] if match else []
        if cells:
            entries.setdefault(_key(cells[0]), (" ".join(cells[1:]), number))
    return entries


def _find_header(
    path: Path, above: list[tuple[int, str]], dialect: Dialect, width: int
) -> tuple[int, list[Column], Column | None] | None:
    """(how many lines it takes, the columns, the time column) of the header right above the
    data: a header with a units row under it, else a header alone; None where the line above the
    data belongs to the preamble (headerless data)."""
    has_time_base = _time_base_keys(_preamble(above, dialect))
    for rows_taken in (2, 1):
        rows = [_header_cells(line, dialect, width) for _, line in above[-rows_taken:]]
        if len(above) < rows_taken or any(len(row) != width for row in rows):
            continue
        if rows_taken == 2 and not _is_units_row(rows[1]):
            continue
        units_row = rows[1] if rows_taken == 2 else [""] * width
        columns = [
            Column(index, name or f"column {index + 1}", units_row[index] or unit)
            for index, (name, unit) in enumerate(_name_and_unit(cell) for cell in rows[0])
        ]
        time = _find_time(columns)
        # A key/value line ("Model,MX-2041") or an unnamed first column is no header of names.
        looks_like_preamble = not rows[0][0] or _key(rows[0][0]).startswith(_PREAMBLE_WORDS)
        if time is not None or (has_time_base and not looks_like_preamble):
            return rows_taken, columns, time
        if rows_taken == 1 and not looks_like_preamble:
            raise InputError(
                f"{path}: no time column among the names on line {above[-1][0]} "
                f"({', '.join(quoted(c.name, 30) for c in columns[:12])}); name it time, t, x or "
                "s (or give it a unit such as 's'), or give the sample interval in a preamble line "
                "such as 'Sample Interval,5e-10'"
            )
    return None


def read_layout(path: Path) -> Layout:
    """Find the dialect, the first row of numbers, the header, units row and preamble."""
    encoding, lines = _head(path)
    dialect, width = _choose_dialect(path, lines)
    data_index = next(i for i, line in enumerate(lines) if dialect.width(line) == width)
    above = [(i + 1, line) for i, line in enumerate(lines[:data_index]) if line.strip()]
    for number, line in above:
        if dialect.width(line) is not None:
            raise InputError(
                f"{path}: line {number} holds {dialect.width(line)} number(s) but the data from "
                f"line {data_index + 1} on holds {width} per row: {quoted(line)}"
            )
    found = _find_header(path, above, dialect, width)
    if found is None:
        columns = [Column(index, f"column {index + 1}") for index in range(width)]
        header, time, preamble = (), (columns[0] if width > 1 else None), above
    else:
        rows_taken, columns, time = found
        header = tuple(_header_cells(above[-rows_taken][1], dialect, width))
        preamble = above[:-rows_taken]
    return Layout(
        encoding,
        dialect,
        width,
        data_index + 1,
        tuple(columns),
        time,
        header,
        _preamble(preamble, dialect),
    )


def _time_base_keys(preamble: dict[str, tuple[str, int]]) -> bool:
    return any(key in preamble for key in _INTERVAL_KEYS | _RATE_KEYS)


# -- the samples ----------------------------------------------------------------------------


def _open_at_data(path: Path, layout: Layout) -> TextIO:
    """The file opened as text, at its first row of numbers."""
    handle = path.open(encoding=layout.encoding)
    for _ in range(layout.data_line - 1):
        handle.readline()
    return handle


def read_columns(path: Path, layout: Layout, wanted: tuple[Column, ...]) -> list[np.ndarray]:
    """The ``wanted`` columns of every data row, as float arrays (see :func:`read_blocks`)."""
    rows = _estimated_rows(path)
    columns = [_Column(rows) for _ in wanted]
    for table in read_blocks(path, layout):
        for column, want in zip(columns, wanted, strict=True):
            column.append(table[:, want.index])
    return [column.array() for column in columns]


def read_blocks(path: Path, layout: Layout) -> Iterator[np.ndarray]:
    """The data rows, a table (rows × columns) of at most ``BLOCK_ROWS`` rows at a time.

    numpy's C reader takes the rows from the open file line by line (quoted cells too), each line
    rewritten first where the file needs it (decimal commas, a trailing delimiter), so neither the
    file's text nor its numbers are ever held whole. Every row must hold every column: a row the
    reader refuses ends the reading with an error naming the first line that is not a row of
    numbers.
    """
    with _open_at_data(path, layout) as handle:
        try:
            first = handle.readline()
        except UnicodeDecodeError:
            raise _undecodable(path, layout) from None
        rows: Iterator[str] = itertools.chain([first], handle)
        delimiter = layout.dialect.delimiter
        if delimiter and first.rstrip("\r\n").endswith(delimiter):  # "1e-9,0.5,"
            rows = map(operator.methodcaller("rstrip", delimiter + "\r\n"), rows)
        if layout.dialect.decimal_comma:
            rows = map(operator.methodcaller("replace", ",", "."), rows)
        while True:
            try:
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore", UserWarning)  # "input contained no data"
                    table = np.loadtxt(
                        rows,
                        delimiter=layout.dialect.delimiter,
                        quotechar='"',
                        comments=None,
                        ndmin=2,
                        max_rows=BLOCK_ROWS,
                    )
            except UnicodeDecodeError:
                raise _undecodable(path, layout) from None
            except ValueError as exc:
                raise _bad_row(path, layout, str(exc)) from None
            if not table.size:
                return
            if table.shape[1] != layout.width:
                raise _bad_row(path, layout, f"{table.shape[1]} columns")
            yield table


def _estimated_rows(path: Path) -> int:
    """Rows the file holds, a little over: its size over the length of the rows at its end (the
    longest, as times grow), plus 2 %."""
    size = path.stat().st_size
    with path.open("rb") as handle:
        handle.seek(max(0, size - HEAD_BYTES))
        tail = handle.read(HEAD_BYTES)
    return size * max(1, tail.count(b"\n")) * 51 // (50 * max(1, len(tail))) + 1024


class _Column:
    """A float column appended to a block at a time. Its array starts at the rows the file is
    expected to hold and grows in place by an eighth (``ndarray.resize`` reallocates), so the
    samples are never held twice and the array is never much larger than they are."""

    def __init__(self, rows: int) -> None:
        self.data = np.empty(rows)
        self.size = 0

    def append(self, values: np.ndarray) -> None:
        end = self.size + values.size
        if end > self.data.size:
            self.data.resize(end + self.data.size // 8 + BLOCK_ROWS, refcheck=False)
        self.data[self.size : end] = values
        self.size = end

    def array(self) -> np.ndarray:
        """The column, its array cut to the rows appended."""
        self.data.resize(self.size, refcheck=False)
        return self.data


def _bad_row(path: Path, layout: Layout, why: str) -> InputError:
    """An error naming the first line of the data that is not a row of numbers (found by reading
    the file again)."""
    names = listing([column.name for column in layout.columns])
    with _open_at_data(path, layout) as handle:
        for number, line in enumerate(handle, layout.data_line):
            if layout.dialect.skipped(line):
                continue
            cells = layout.dialect.cells(line.rstrip("\r\n"))
            if len(cells) != layout.width:
                return InputError(
                    f"{path}: line {number} has {len(cells)} value(s); the data has "
                    f"{layout.width} per row ({names}): {quoted(line.rstrip())}"
                )
            for column, cell in zip(layout.columns, cells, strict=True):
                if not _NUMBER.fullmatch(layout.dialect.number(cell)):
                    return InputError(
                        f"{path}: line {number}, column {quoted(column.name, 30)}: "
                        f"{quoted(cell)} is not a number"
                    )
    return InputError(
        f"{path}: cannot read the numbers from line {layout.data_line} on: {quoted(why)}"
    )


def _undecodable(path: Path, layout: Layout) -> InputError:
    """An error naming the last line that could be read before bytes that are not text."""
    read = 0
    with _open_at_data(path, layout) as handle, contextlib.suppress(UnicodeDecodeError):
        for _ in handle:
            read += 1
    last = layout.data_line - 1 + read
    return InputError(f"{path}: bytes that are not {layout.encoding} text after line {last}")


def _locator(path: Path, layout: Layout) -> Where:
    """Sample index → "line N" of the file (found by reading it again: for error messages)."""

    def where(sample: int) -> str:
        row = -1
        with _open_at_data(path, layout) as handle:
            for number, line in enumerate(handle, layout.data_line):
                if not layout.dialect.skipped(line):
                    row += 1
                    if row == sample:
                        return f"line {number}"
        return f"row {sample + 1} of the data"

    return where


# -- units and the time base ----------------------------------------------------------------


def _stated_time_scale(path: Path, layout: Layout, time_unit: str | None) -> tuple[float, str]:
    """Seconds per unit of the file's times, and that unit as stated ("" where neither the file
    nor ``--time-unit`` states one: seconds are taken)."""
    given = None if time_unit is None else time_scale(time_unit, f"{path}: --time-unit")
    if layout.time is not None and layout.time.unit:
        stated, place = layout.time.unit, f"column {quoted(layout.time.name, 30)}"
    elif key := next((key for key in layout.preamble if key in _TIME_UNIT_KEYS), None):
        stated, place = layout.preamble[key][0], f"line {layout.preamble[key][1]}"
    else:
        return (1.0, "") if given is None else (given, time_unit or "")
    unit = parse_unit(stated)
    if unit is None or unit[0] != "time":
        raise InputError(
            f"{path}: {place} gives the time unit {quoted(stated, 20)}; expected {TIME_UNITS_HINT}"
        )
    if given is not None and given != unit[1]:
        raise InputError(
            f"{path}: {place} gives times in {quoted(stated, 20)}; --time-unit "
            f"{quoted(time_unit or '', 20)} disagrees (drop it)"
        )
    return unit[1], stated


def _preamble_time(path: Path, layout: Layout, keys: set[str], scale: float) -> float | None:
    """A time from the preamble (``5e-10``, ``500 ps``); a bare number is in the file's unit."""
    key = next((key for key in layout.preamble if key in keys), None)
    if key is None:
        return None
    value, number = layout.preamble[key]
    text = layout.dialect.number(value)
    match = re.fullmatch(r"\s*(" + _NUMBER.pattern + r")\s*(.*?)\s*", text, re.I)
    unit = parse_unit(match.group(2)) if match and match.group(2) else None
    if not match or (match.group(2) and (unit is None or unit[0] != "time")):
        raise InputError(
            f"{path}: line {number}: {quoted(value, 30)} is not a time; expected a number of "
            f"seconds or a time with its unit ({TIME_UNITS_HINT}), e.g. '500 ps'"
        )
    return float(match.group(1)) * (unit[1] if unit else scale)


def _preamble_rate(path: Path, layout: Layout) -> float | None:
    key = next((key for key in layout.preamble if key in _RATE_KEYS), None)
    if key is None:
        return None
    value, number = layout.preamble[key]
    text = layout.dialect.number(value)
    match = re.fullmatch(
        rf"\s*((?i:{_NUMBER.pattern}))\s*([kMG]?)(?i:hz|sa/s|s/s|sps|samples/s)?\s*", text
    )
    prefix = {"": 1.0, "k": 1e3, "M": 1e6, "G": 1e9}
    rate = float(match.group(1)) * prefix[match.group(2)] if match else 0.0
    if not 0 < rate < float("inf"):
        raise InputError(
            f"{path}: line {number}: sample rate {quoted(value, 30)} is not a positive rate; "
            "expected e.g. '2e9', '2 GSa/s' or '2 GHz'"
        )
    return rate


def _time_base(path: Path, layout: Layout, scale: float) -> tuple[float, float]:
    """(sample interval, time of the first sample) from the preamble of a file without times."""
    interval = _preamble_time(path, layout, _INTERVAL_KEYS, scale)
    if interval is None and (rate := _preamble_rate(path, layout)) is not None:
        interval = 1.0 / rate
    if interval is None:
        raise InputError(
            f"{path}: no time column and no sample interval; add a time column (time_s) or a "
            "preamble line such as 'Sample Interval,5e-10' or 'Sample Rate,2e9'"
        )
    if not 0 < interval < float("inf"):
        raise InputError(f"{path}: the preamble's sample interval {interval:g} s is not positive")
    return interval, _preamble_time(path, layout, _ORIGIN_KEYS, scale) or 0.0


def _with_screen(path: Path, layout: Layout, waveform: FileRecord) -> FileRecord:
    """The record with its clipped samples marked, where the preamble gives the volts at the
    bottom and top of the scope's screen (as ``labseq export`` writes them): a sample at or
    beyond either edge is where the true voltage is unknown."""
    keys = [_key(name) for name in SCREEN_KEYS]
    if not all(key in layout.preamble for key in keys):
        return waveform
    edges = []
    for key, name in zip(keys, SCREEN_KEYS, strict=True):
        value, number = layout.preamble[key]
        try:
            edges.append(float(value))
        except ValueError:
            raise InputError(
                f"{path}: line {number}, {name}: {quoted(value, 30)} is not a number of volts"
            ) from None
    bottom, top = edges
    if not bottom < top:
        raise InputError(f"{path}: the screen's bottom {bottom:g} V is not below its top {top:g} V")
    volts = waveform.volts
    return replace(waveform, clipped=(volts <= bottom) | (volts >= top))


def read_text_waveform(path: Path, *, channel: str | None, time_unit: str | None) -> FileRecord:
    """Read one voltage column of a text file with its times (see the module notes)."""
    layout = read_layout(path)
    vertical = next((layout.preamble[k][0] for k in layout.preamble if k in _VOLT_UNIT_KEYS), None)
    channels = [
        Column(c.index, c.name, c.unit or vertical) for c in layout.columns if c != layout.time
    ]
    chosen = pick_channel(path, channels, channel)
    volts_per_unit = volts_scale(path, chosen)
    scale, unit_source = _stated_time_scale(path, layout, time_unit)
    where = _locator(path, layout)
    volts_name = f"column {quoted(chosen.name, 40)}"
    if layout.time is None:
        interval, origin = _time_base(path, layout, scale)
        [volts] = read_columns(path, layout, (chosen,))
        if volts_per_unit != 1.0:
            volts *= volts_per_unit
        check_volts(path, volts, volts_name=volts_name, where=where)
        waveform = FileRecord(volts, interval, origin)
        times = f"times from the preamble ({interval:.6g} s per sample)"
    else:
        time_name = f"time (column {quoted(layout.time.name, 40)})"
        axis, column = TimeAxis(), _Column(_estimated_rows(path))
        for table in read_blocks(path, layout):
            time_s = table[:, layout.time.index]
            axis.add(time_s * scale if scale != 1.0 else time_s)
            column.append(table[:, chosen.index])
        volts = column.array()
        if volts_per_unit != 1.0:
            volts *= volts_per_unit
        check_volts(path, volts, volts_name=volts_name, where=where)
        interval, origin = axis.check(path, time_name=time_name, where=where)
        waveform = FileRecord(volts, interval, origin)
        times = f"times from column {quoted(layout.time.name, 40)}"
        times += f" in {unit_source}" if scale != 1.0 else ""
    waveform = _with_screen(path, layout, waveform)
    hint = None
    if not unit_source and waveform.sample_interval_s >= LONG_STEP_S:
        hint = (
            f"the file states no time unit and a step of {waveform.sample_interval_s:.3g} s is "
            "long for a switch-node record: give --time-unit if the times are in ms, µs or ns"
        )
    plain = layout.header in ((), CANONICAL_HEADER) and layout.width == 2 and scale == 1.0
    if plain and layout.dialect == DIALECTS[0] and layout.data_line <= 2:
        return waveform.noted(hint)
    read = f"volts from {volts_name}" + (f" in {chosen.unit}" if volts_per_unit != 1 else "")
    read += f" (one of {len(channels)})" if len(channels) > 1 else ""
    note = f"{read}, {times}; {layout.dialect.describe()}, data from line {layout.data_line}"
    return waveform.noted(f"{note}; {hint}" if hint else note)
