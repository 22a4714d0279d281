"""Read a waveform (time and volts) from a file, checking it is a usable uniform record.

Accepted files:

* text (``.csv``, ``.tsv``, ``.txt``, ``.dat``) as scopes and spreadsheets write it: any common
  delimiter and decimal mark, a preamble, header words and a units row, several voltage columns
  (see :mod:`labseq.waveform_files.text`); ``time_s,volts`` is labseq's own shape;
* ``.npy``: an N×2 array (time, volts), an N×k array (time and k − 1 voltage columns), or a
  structured array with fields ``time_s`` and ``volts``;
* ``.npz``: arrays ``time_s`` and ``volts``, or labseq's own export (``captures.npz`` of ``labseq
  export``), one capture of which is read from its raw codes with the stored scaling and screen
  limits, so the samples that clipped are known.

Every problem becomes an :class:`~labseq.errors.InputError` naming the file, and the line, column
or key where that applies, and what would be valid.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

from labseq.errors import InputError
from labseq.waveform_files.arrays import read_npy, read_npz, refuse
from labseq.waveform_files.record import (
    MAX_ABS_VOLTS,
    UNIFORM_TOLERANCE,
    FileRecord,
    check_uniform,
    quoted,
)
from labseq.waveform_files.text import read_text_waveform
from labseq_instruments.files import FileProblem, check_regular_file

__all__ = ["MAX_ABS_VOLTS", "UNIFORM_TOLERANCE", "FileRecord", "check_uniform", "read_waveform"]


def _read_text(
    path: Path, channel: str | None, time_unit: str | None, capture: str | None
) -> FileRecord:
    refuse(path, "--capture", capture, "it picks a capture of labseq's NPZ export")
    return read_text_waveform(path, channel=channel, time_unit=time_unit)


Reader = Callable[[Path, str | None, str | None, str | None], FileRecord]
READERS: dict[str, Reader] = {
    **dict.fromkeys((".csv", ".tsv", ".txt", ".dat"), _read_text),
    ".npy": read_npy,
    ".npz": read_npz,
}


def _check_regular_file(path: Path) -> None:
    """Refuse what is not a regular file, before opening it (opening a FIFO would block)."""
    try:
        check_regular_file(path)
    except FileProblem as problem:
        if problem.kind is None:
            raise InputError(f"{path}: {problem}") from None
        raise InputError(
            f"{path}: is {problem.kind}, not a waveform file; save the record to a file and give "
            "that (labseq reads a file twice: once for its layout, then the samples)"
        ) from None


def read_waveform(
    path: Path | str,
    *,
    channel: str | None = None,
    time_unit: str | None = None,
    capture: str | None = None,
) -> FileRecord:
    """Read and check a waveform file (see the module notes for the layouts).

    ``channel`` picks a voltage column by name or number where a file has several; ``time_unit``
    (``us``, ``ns``…) is the unit of a time column whose file states none; ``capture`` picks a
    capture of labseq's NPZ export by name (``p003_c01``).
    """
    path = Path(path)
    _check_regular_file(path)
    reader = READERS.get(path.suffix.lower())
    if reader is None:
        raise InputError(
            f"{path}: unknown file type {quoted(path.suffix, 20)}; use one of {', '.join(READERS)}"
        )
    try:
        return reader(path, channel, time_unit, capture)
    except InputError:
        raise
    except OSError as exc:
        raise InputError(f"{path}: cannot read it: {exc.strerror or exc}") from None
    except Exception as exc:  # noqa: BLE001 - numpy's parsers raise many types on a bad file
        # (ValueError, EOFError, BadZipFile, and tokenize or syntax errors from a mangled .npy
        # header): each one means the file is not readable data, which the user can act on
        raise InputError(
            f"{path}: cannot read it as {path.suffix} data: {type(exc).__name__}: "
            f"{quoted(str(exc), 200)}"
        ) from None
