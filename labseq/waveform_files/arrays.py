"""NumPy waveform files: ``.npy`` arrays, ``.npz`` archives, and labseq's own NPZ export."""

from __future__ import annotations

import difflib
from pathlib import Path

import numpy as np

from labseq.errors import InputError
from labseq.export import SCALING_FIELDS, SCALING_KEY, codes_key
from labseq.waveform_files.record import (
    Column,
    FileRecord,
    check_uniform,
    check_volts,
    listing,
    pick_channel,
    quoted,
    time_scale,
)
from labseq_instruments import Waveform

CANONICAL_NAMES = ("time_s", "volts")
#: Fields of the scaling table of ``labseq export``'s ``captures.npz`` (:mod:`labseq.export`)
#: that reading a capture needs: its name and its scaling.
EXPORT_SCALING_FIELDS = ("name", *SCALING_FIELDS)


def _real(path: Path, name: str, values: np.ndarray) -> np.ndarray:
    """``values`` as float64, refusing what is not real numbers (text, dates, complex)."""
    if values.dtype.kind not in "iuf":
        raise InputError(
            f"{path}: {name} holds {values.dtype} values; expected real numbers (int or float)"
        )
    return values.astype(float).ravel()


def refuse(path: Path, option: str, value: str | None, why: str) -> None:
    """Refuse a file option given for a file where it has no meaning (``why`` says so)."""
    if value is not None:
        raise InputError(f"{path}: {option} does not apply: {why}")


def _seconds_only(path: Path, time_unit: str | None, where: str) -> None:
    """Refuse a ``--time-unit`` other than seconds for times the file states in seconds."""
    if time_unit is not None and time_scale(time_unit, f"{path}: --time-unit") != 1.0:
        raise InputError(
            f"{path}: {where} gives times in seconds; --time-unit {quoted(time_unit, 20)} "
            "disagrees (drop it)"
        )


def read_npy(
    path: Path, channel: str | None, time_unit: str | None, capture: str | None
) -> FileRecord:
    """An N×2 array (time, volts), an N×k one (time and k − 1 voltage columns), or a structured
    array with fields ``time_s`` and ``volts``."""
    refuse(path, "--capture", capture, "it picks a capture of labseq's NPZ export")
    array = np.load(path, allow_pickle=False)
    if array.dtype.names:
        missing = [name for name in CANONICAL_NAMES if name not in array.dtype.names]
        if missing:
            raise InputError(
                f"{path}: structured array has fields {listing(array.dtype.names)}; "
                f"expected {list(CANONICAL_NAMES)}"
            )
        refuse(path, "--channel", channel, "the array has one volts field")
        _seconds_only(path, time_unit, "the time_s field")
        return check_uniform(
            path, _real(path, "time_s", array["time_s"]), _real(path, "volts", array["volts"])
        )
    if array.ndim != 2 or array.shape[1] < 2:
        raise InputError(
            f"{path}: array of shape {array.shape}; expected N×2 (time_s, volts) or N×k (time "
            "and k − 1 voltage columns)"
        )
    channels = [Column(index, str(index)) for index in range(1, array.shape[1])]
    chosen = pick_channel(path, channels, channel)
    scale = 1.0 if time_unit is None else time_scale(time_unit, f"{path}: --time-unit")
    waveform = check_uniform(
        path,
        _real(path, "time_s", array[:, 0]) * scale,
        _real(path, "volts", array[:, chosen.index]),
        volts_name=f"volts (column {chosen.index})",
    )
    if len(channels) == 1 and scale == 1.0:
        return waveform
    note = f"volts from column {chosen.index}" + (
        f" (one of {len(channels)})" if len(channels) > 1 else ""
    )
    return waveform.noted(note + (f", times in {time_unit}" if scale != 1.0 else ""))


def read_npz(
    path: Path, channel: str | None, time_unit: str | None, capture: str | None
) -> FileRecord:
    """Arrays ``time_s`` and ``volts``, or one capture of labseq's export."""
    with np.load(path, allow_pickle=False) as archive:
        if all(name in archive.files for name in CANONICAL_NAMES):
            refuse(path, "--capture", capture, "the file holds one record (time_s, volts)")
            refuse(path, "--channel", channel, "the file holds one volts array")
            _seconds_only(path, time_unit, "its time_s array")
            time_s = _real(path, "time_s", archive["time_s"])
            volts = _real(path, "volts", archive["volts"])
            if time_s.size != volts.size:
                raise InputError(f"{path}: time_s has {time_s.size} values but volts {volts.size}")
            return check_uniform(path, time_s, volts)
        if SCALING_KEY in archive.files:
            refuse(path, "--channel", channel, "choose a capture of the export with --capture")
            _seconds_only(path, time_unit, "labseq's export")
            return _read_export(path, archive, capture)
        raise InputError(
            f"{path}: holds arrays {listing(archive.files)}; expected {list(CANONICAL_NAMES)}, "
            f"or labseq export's {SCALING_KEY!r} table with its {codes_key('<name>')!r} arrays"
        )


def _choose_capture(path: Path, names: list[str], capture: str | None) -> int:
    """Index of the capture named by ``--capture``, or of the only one."""
    if capture is None:
        if len(names) == 1:
            return 0
        raise InputError(
            f"{path}: {len(names)} captures ({listing(names)}); choose one with --capture NAME"
            if names
            else f"{path}: the export holds no capture"
        )
    if capture not in names:
        close = difflib.get_close_matches(capture, names, n=1)
        hint = f" (did you mean {quoted(close[0])}?)" if close else ""
        raise InputError(
            f"{path}: no capture {quoted(capture, 48)}{hint}; the export holds {listing(names)}"
        )
    return names.index(capture)


def _read_export(path: Path, archive: np.lib.npyio.NpzFile, capture: str | None) -> FileRecord:
    """One capture of ``labseq export``'s ``captures.npz`` as the store holds it: raw codes,
    their scaling and the screen's limits, so the samples that clipped are known."""
    scaling = np.atleast_1d(archive[SCALING_KEY])
    fields = scaling.dtype.names or ()
    missing = [name for name in EXPORT_SCALING_FIELDS if name not in fields]
    if missing:
        raise InputError(
            f"{path}: the scaling table lacks {listing(missing)}; labseq export writes "
            f"{listing(EXPORT_SCALING_FIELDS)}"
        )
    names = [str(name) for name in scaling["name"]]
    row = scaling[_choose_capture(path, names, capture)]
    name = str(row["name"])
    numbers: dict[str, float] = {}
    for field in EXPORT_SCALING_FIELDS[1:]:
        try:
            numbers[field] = float(row[field])
        except (TypeError, ValueError):
            numbers[field] = float("nan")
        # code_min/code_max are NaN where the scope sent volts, which clip at no known code.
        if not np.isfinite(numbers[field]) and not field.startswith("code_"):
            raise InputError(
                f"{path}: scaling of {quoted(name)}: {field} is {quoted(str(row[field]), 20)}; "
                "expected a finite number"
            )
    if numbers["x_increment_s"] <= 0:
        raise InputError(
            f"{path}: scaling of {quoted(name)}: x_increment_s is {numbers['x_increment_s']:g}; "
            "a sample interval must be positive"
        )
    key = codes_key(name)
    if key not in archive.files:
        raise InputError(f"{path}: the scaling table names {quoted(name)} but {key} is missing")
    codes = archive[key]
    if codes.dtype.kind not in "iuf" or codes.ndim != 1:
        raise InputError(
            f"{path}: {key} holds {codes.dtype} values of shape {codes.shape}; expected one row "
            "of integer or float codes"
        )
    code_min, code_max = (numbers.pop(k) for k in ("code_min", "code_max"))
    record = Waveform(
        codes=codes,
        **numbers,
        code_min=None if np.isnan(code_min) else code_min,
        code_max=None if np.isnan(code_max) else code_max,
    )
    volts = record.volts()
    check_volts(path, volts, volts_name=f"{name} (codes with their scaling)")
    node = f" (node {row['node']})" if "node" in fields and str(row["node"]) else ""
    return FileRecord(
        volts=volts,
        sample_interval_s=numbers["x_increment_s"],
        t0_s=numbers["x_origin_s"],
        clipped=record.clip_mask(),
        note=f"capture {name}{node} of {len(names)}, volts from its codes and stored scaling",
    )
