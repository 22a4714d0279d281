"""Reading a long waveform file: time and peak memory of ``read_waveform`` against numpy.

A 1-million-row record (a ringing switch node at 2 GS/s) written in three shapes: labseq's own
``time_s,volts``; a scope's file with a preamble and a time column and two channels; a
spreadsheet's ``;`` with decimal commas. The baseline, measured in the same run on the same
file, is ``np.loadtxt`` of the bare table (the rows of numbers, told where they start and how
they are separated; for decimal commas, after rewriting the text in memory), which is the least
any reader of the text must do. The reader and its baseline run back to back in every repeat, in
a rotating order, and the median of the per-repeat ratios is compared (tests/benchmarks/
paired.py). Targets: at most 2× the baseline's time where the file has decimal points and 3×
with decimal commas (each line rewritten before numpy's C reader parses it); peak memory at most
3× the float64 table the file holds (the resident-set high-water the read adds to a fresh
process, or tracemalloc's peak where the system does not tell it: tests/benchmarks/
peak_memory.py). The reader parses a
block of rows at a time and keeps only the volts, so its peak is about the volts' 8 B/row: half
the table of a two-column file.
"""

from __future__ import annotations

import io
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest
from paired import interleaved_times, paired
from peak_memory import fresh_resident_peak_bytes, traced_peak_bytes

from labseq.waveform_files import read_waveform

ROWS = 1_000_000
REPEATS = 5
MAX_TIME_RATIO = {"decimal point": 2.0, "decimal comma": 3.0}
MAX_MEMORY_RATIO = 3.0


def _record() -> tuple[np.ndarray, np.ndarray]:
    t_s = (np.arange(ROWS) - 2000) * 5e-10
    phase_s = np.mod(t_s, 6.6e-6)
    ring_v = 90 * np.exp(-phase_s / 150e-9) * np.sin(2 * np.pi * 18e6 * phase_s)
    return t_s, np.where(phase_s < 3.3e-6, 425 + ring_v, 1.0)


@dataclass(frozen=True)
class Shape:
    """A file of the record, how ``read_waveform`` is asked to read it, and the baseline."""

    path: Path
    options: dict[str, str]
    baseline: Callable[[], np.ndarray]
    table_bytes: int  # the float64 table the file holds


def _shapes(directory: Path) -> dict[str, Shape]:
    t_s, volts = _record()
    plain = directory / "plain.csv"
    np.savetxt(
        plain, np.c_[t_s, volts], fmt="%.10g", delimiter=",", header="time_s,volts", comments=""
    )
    scope = directory / "scope.csv"
    with scope.open("w", encoding="utf-8") as handle:
        handle.write("Model,MX-2041\nRecord Length,1000000\nSample Interval,5e-10\n\n")
        handle.write("TIME,CH1,CH2\n")
        np.savetxt(handle, np.c_[t_s, volts, volts / 10], fmt="%.10g", delimiter=",")
    sheet = directory / "sheet.csv"
    text = plain.read_text(encoding="utf-8")
    sheet.write_text(text.replace(",", ";").replace(".", ","), encoding="utf-8")

    def sheet_baseline() -> np.ndarray:
        # numpy has no decimal-comma option: the least is to rewrite the text, then parse it.
        rewritten = sheet.read_text(encoding="utf-8").replace(",", ".")
        return np.loadtxt(io.StringIO(rewritten), delimiter=";", skiprows=1)

    table = ROWS * 8
    return {
        "time_s,volts": Shape(
            plain, {}, lambda: np.loadtxt(plain, delimiter=",", skiprows=1), 2 * table
        ),
        "scope preamble, 2 channels": Shape(
            scope,
            {"channel": "CH1"},
            lambda: np.loadtxt(scope, delimiter=",", skiprows=5),
            3 * table,
        ),
        "; and decimal commas": Shape(sheet, {}, sheet_baseline, 2 * table),
    }


@pytest.mark.benchmark
def test_long_waveform_files(tmp_path: Path) -> None:
    print(f"\nreading a {ROWS:,}-row waveform file against np.loadtxt of its table:")
    failures = []
    for name, shape in _shapes(tmp_path).items():

        def read(shape: Shape = shape) -> object:
            return read_waveform(shape.path, **shape.options)

        times = interleaved_times({"read": read, "loadtxt": shape.baseline}, REPEATS)
        ratios = paired(times, "read", "loadtxt")
        resident = fresh_resident_peak_bytes(
            "from pathlib import Path\nfrom labseq.waveform_files import read_waveform",
            f"read_waveform(Path({str(shape.path)!r}), **{shape.options!r})",
        )
        memory = (traced_peak_bytes(read) if resident is None else resident) / shape.table_bytes
        target = MAX_TIME_RATIO["decimal comma" if name.startswith(";") else "decimal point"]
        print(
            f"  {name}: time {ratios.summary()} (target ≤ {target}×); peak memory "
            f"{memory:4.2f}× the table (target ≤ {MAX_MEMORY_RATIO}×)"
        )
        if ratios.median > target or memory > MAX_MEMORY_RATIO:
            failures.append(name)
    assert not failures, f"over target: {failures}"
