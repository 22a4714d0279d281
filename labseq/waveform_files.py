"""Read a waveform (time and volts) from CSV, NPY or NPZ, checking it is a usable uniform record.

Accepted layouts:

* ``.csv``: two columns ``time_s,volts`` with that header, or the same two columns without one;
* ``.npy``: an N×2 array (time, volts) or a structured array with fields ``time_s`` and ``volts``;
* ``.npz``: arrays named ``time_s`` and ``volts``.

Every problem becomes an :class:`~labseq.errors.InputError` naming the file and what is wrong.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from labseq.analysis import MIN_RECORD_SAMPLES
from labseq.errors import InputError

#: Largest deviation of one time step from the mean step, as a fraction of it. Text files round
#: times to a few significant digits, so exact equality cannot be asked for; a missing sample
#: (a step of twice the interval) is far outside.
UNIFORM_TOLERANCE = 0.05
CSV_HEADER = ("time_s", "volts")


@dataclass(frozen=True)
class Waveform:
    """A uniformly sampled record: ``volts[k]`` at ``t0_s + k·sample_interval_s``."""

    volts: np.ndarray
    sample_interval_s: float
    t0_s: float


def _read_csv(path: Path) -> tuple[np.ndarray, np.ndarray]:
    with path.open(encoding="utf-8", errors="replace") as handle:
        first = handle.readline()
    if not first.strip():
        raise InputError(f"{path}: the file is empty; expected columns {','.join(CSV_HEADER)}")
    cells = [cell.strip() for cell in first.split(",")]
    try:
        [float(cell) for cell in cells]
        skip = 0
    except ValueError:
        if tuple(cells) != CSV_HEADER:
            raise InputError(
                f"{path}: header {','.join(cells)!r} is not {','.join(CSV_HEADER)!r}; write that "
                "header or two numeric columns (time in s, volts) without one"
            ) from None
        skip = 1
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", UserWarning)  # "input contained no data"
            table = np.loadtxt(path, delimiter=",", skiprows=skip, ndmin=2, dtype=float)
    except ValueError as exc:
        raise InputError(f"{path}: cannot read the numbers: {exc}") from None
    if table.size == 0:
        raise InputError(f"{path}: no data rows; expected columns {','.join(CSV_HEADER)}")
    if table.shape[1] != 2:
        raise InputError(f"{path}: {table.shape[1]} columns; expected 2 (time_s, volts)")
    return table[:, 0], table[:, 1]


def _real(path: Path, name: str, values: np.ndarray) -> np.ndarray:
    """``values`` as float64, refusing what is not real numbers (text, dates, complex)."""
    if values.dtype.kind not in "iuf":
        raise InputError(
            f"{path}: {name} holds {values.dtype} values; expected real numbers (int or float)"
        )
    return values.astype(float).ravel()


def _read_npy(path: Path) -> tuple[np.ndarray, np.ndarray]:
    array = np.load(path, allow_pickle=False)
    if array.dtype.names:
        missing = [name for name in CSV_HEADER if name not in array.dtype.names]
        if missing:
            raise InputError(
                f"{path}: structured array has fields {list(array.dtype.names)}; "
                f"expected {list(CSV_HEADER)}"
            )
        return _real(path, "time_s", array["time_s"]), _real(path, "volts", array["volts"])
    if array.ndim != 2 or array.shape[1] != 2:
        raise InputError(f"{path}: array of shape {array.shape}; expected N×2 (time_s, volts)")
    return _real(path, "time_s", array[:, 0]), _real(path, "volts", array[:, 1])


def _read_npz(path: Path) -> tuple[np.ndarray, np.ndarray]:
    with np.load(path, allow_pickle=False) as archive:
        missing = [name for name in CSV_HEADER if name not in archive.files]
        if missing:
            raise InputError(f"{path}: holds arrays {archive.files}; expected {list(CSV_HEADER)}")
        time_s = _real(path, "time_s", archive["time_s"])
        volts = _real(path, "volts", archive["volts"])
    if time_s.size != volts.size:
        raise InputError(f"{path}: time_s has {time_s.size} values but volts {volts.size}")
    return time_s, volts


#: Largest magnitude accepted in a volts column: a megavolt is far beyond any power-supply probe.
MAX_ABS_VOLTS = 1e6

READERS = {".csv": _read_csv, ".npy": _read_npy, ".npz": _read_npz}


def check_uniform(path: Path | str, time_s: np.ndarray, volts: np.ndarray) -> Waveform:
    """Check a (time, volts) pair is a finite, increasing, uniformly sampled record."""
    if volts.size < MIN_RECORD_SAMPLES:
        raise InputError(f"{path}: {volts.size} samples; at least {MIN_RECORD_SAMPLES} are needed")
    for name, column in (("time_s", time_s), ("volts", volts)):
        bad = np.flatnonzero(~np.isfinite(column))
        if bad.size:
            raise InputError(
                f"{path}: {name} has {bad.size} missing or non-finite value(s), first at row "
                f"{bad[0] + 1}"
            )
    largest = int(np.argmax(np.abs(volts)))
    if abs(volts[largest]) > MAX_ABS_VOLTS:
        raise InputError(
            f"{path}: volts reaches {volts[largest]:.3g} V at row {largest + 1}; values beyond "
            f"±{MAX_ABS_VOLTS:.0e} V are no measurement — check that the column is in volts"
        )
    steps = np.diff(time_s)
    backwards = np.flatnonzero(steps <= 0)
    if backwards.size:
        row = int(backwards[0]) + 2
        raise InputError(f"{path}: time_s does not increase at row {row}; sort the samples by time")
    interval = (time_s[-1] - time_s[0]) / (time_s.size - 1)
    deviation = np.abs(steps - interval)
    worst = int(np.argmax(deviation))
    if deviation[worst] > UNIFORM_TOLERANCE * interval:
        raise InputError(
            f"{path}: time_s is not uniformly sampled: the step at row {worst + 2} is "
            f"{steps[worst]:.6g} s, the mean step {interval:.6g} s (±{UNIFORM_TOLERANCE:.0%} "
            "allowed)"
        )
    return Waveform(volts=volts, sample_interval_s=float(interval), t0_s=float(time_s[0]))


def read_waveform(path: Path | str) -> Waveform:
    """Read and check a waveform file (see the module notes for the layouts)."""
    path = Path(path)
    reader = READERS.get(path.suffix.lower())
    if reader is None:
        raise InputError(
            f"{path}: unknown file type {path.suffix!r}; use one of {', '.join(READERS)}"
        )
    if not path.is_file():
        raise InputError(f"{path}: no such file")
    try:
        time_s, volts = reader(path)
    except InputError:
        raise
    except Exception as exc:  # noqa: BLE001 - numpy's parsers raise many types on a bad file
        # (ValueError, EOFError, BadZipFile, and tokenize or syntax errors from a mangled .npy
        # header): each one means the file is not readable data, which the user can act on
        raise InputError(
            f"{path}: cannot read it as {path.suffix} data: {type(exc).__name__}: {exc}"
        ) from None
    return check_uniform(path, np.asarray(time_s, dtype=float), np.asarray(volts, dtype=float))
