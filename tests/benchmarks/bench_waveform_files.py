"""Reading a long waveform file: time and peak memory of ``read_waveform`` against numpy.

A 1-million-row record (a ringing switch node at 2 GS/s) written in three shapes: labseq's own
``time_s,volts``; a scope's file with a preamble and a time column and two channels; a
spreadsheet's ``;`` with decimal commas. The baseline, measured in the same run on the same
file, is ``np.loadtxt`` of the bare table (the rows of numbers, told where they start and how
they are separated; for decimal commas, after rewriting the text in memory), which is the least
any reader of the text must do. Targets: at most 2× the
baseline's time where the file has decimal points (numpy's C reader streams the file itself)
and 3× with decimal commas (rewritten block by block); peak memory at most 3× the float64 table
the file holds — the file is never held as Python strings.
"""

from __future__ import annotations

import io
import statistics
import time
import tracemalloc
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest

from labseq.waveform_files import read_waveform

ROWS = 1_000_000
REPEATS = 3
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


def _seconds(action: Callable[[], object]) -> float:
    start = time.perf_counter()
    action()
    return time.perf_counter() - start


def _peak_bytes(action: Callable[[], object]) -> int:
    tracemalloc.start()
    try:
        action()
        return tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()


@pytest.mark.benchmark
def test_long_waveform_files(tmp_path: Path) -> None:
    print(f"\nreading a {ROWS:,}-row waveform file (median of {REPEATS} paired runs):")
    failures = []
    for name, shape in _shapes(tmp_path).items():

        def read(shape: Shape = shape) -> object:
            return read_waveform(shape.path, **shape.options)

        ratios = [_seconds(read) / _seconds(shape.baseline) for _ in range(REPEATS)]
        ratio = statistics.median(ratios)
        memory = _peak_bytes(read) / shape.table_bytes
        target = MAX_TIME_RATIO["decimal comma" if name.startswith(";") else "decimal point"]
        print(
            f"  {name:<28} time {ratio:4.2f}× np.loadtxt (target ≤ {target}×), "
            f"peak memory {memory:4.2f}× the table (target ≤ {MAX_MEMORY_RATIO}×)"
        )
        if ratio > target or memory > MAX_MEMORY_RATIO:
            failures.append(name)
    assert not failures, f"over target: {failures}"
