"""A run's points as CSV and its captures as NPZ or CSV files: the library side of ``labseq
export``, which the run report also uses for its ``points.csv``.

``points.csv`` has one row per point: the bench (real or simulated), setpoints, readbacks, meter
readings, efficiency, the combined verdict and the per-point figures (worst, mean, spread, n of
each) of the primary node, then for each further node its verdict and figures in columns prefixed by
its name (``secondary_verdict``, ``secondary_peak_v_worst``…). Captures go either into one
``captures.npz`` (per capture ``<name>_codes`` as stored, ``<name>_volts``, and a ``scaling`` table
with one row per capture) or into ``captures/<name>.csv`` files of ``time_s,volts``, where
``<name>`` is ``p<point index>_c<capture index>``, followed by ``_<node>`` for a node other than the
primary. Captures are read and written one at a time.

A capture CSV starts with a preamble of key/value lines: where it comes from (:data:`ORIGIN_KEY`)
and the volts at the bottom and top of the scope's screen (:data:`SCREEN_KEYS`), so that
``labseq analyze`` of the file knows which samples clipped. A run on the simulated bench says so
in the first column of ``points.csv`` (:data:`BENCH_COLUMN`, "SIMULATED" on every row), in each
capture CSV's origin line and in ``captures.npz``'s :data:`RUN_KEY` array. CSV cells write
booleans as ``true`` and ``false`` and an absent value as an empty cell.

The NPZ layout (:data:`SCALING_KEY`, :data:`SCALING_DTYPE`, :func:`codes_key`) is defined here
once; :mod:`labseq.waveform_files` reads a capture back by it (``labseq analyze --capture``).
"""

from __future__ import annotations

import csv
import json
import zipfile
from collections.abc import Iterator
from dataclasses import asdict, dataclass, fields
from pathlib import Path
from typing import Any

import numpy as np

from labseq.bench_kinds import is_simulated
from labseq.store import PointRecord, StoredCapture
from labseq.store_api import RunStore
from labseq_instruments import Waveform

POINTS_FILE = "points.csv"
SEQUENCE_FILE = "sequence.toml"
RUN_FILE = "run.json"
CAPTURES_NPZ = "captures.npz"
CAPTURES_DIR = "captures"
CAPTURE_FORMATS = ("npz", "csv")

#: The first column of ``points.csv``: the bench each point was measured on, on every row (so
#: the mark survives a spreadsheet's sorting and filtering and no CSV reader trips on it).
BENCH_COLUMN = "bench"
BENCH_WORDS = {True: "SIMULATED", False: "real"}
#: Preamble keys of a capture CSV: where it comes from, and the volts at the bottom and top of
#: the scope's screen (absent for a scope that sends volts, which clip at no known code).
ORIGIN_KEY = "Source"
SCREEN_KEYS = ("Screen Bottom V", "Screen Top V")
#: The array of ``captures.npz`` that holds the run's record as JSON text (id, bench kind,
#: whether simulated).
RUN_KEY = "run"

#: The scaling a capture's codes need to become volts and times, in the order of the scaling
#: table's columns: those of :class:`labseq_instruments.Waveform` (NaN code limits: a scope that
#: sends
#: volts, which clip at no known code).
SCALING_FIELDS: tuple[str, ...] = tuple(f.name for f in fields(Waveform) if f.name != "codes")
#: The name of the scaling table in ``captures.npz``, and its row: one per capture.
SCALING_KEY = "scaling"
SCALING_DTYPE = np.dtype(
    [
        ("name", "U48"),
        ("point_index", "i8"),
        ("capture_index", "i8"),
        ("channel", "i8"),
        ("node", "U32"),
        *((name, "f8") for name in SCALING_FIELDS),
    ]
)

_POINT_COLUMNS = [f.name for f in fields(PointRecord) if f.name not in ("id", "run_id")]
_FIGURE_STATS = ("worst", "mean", "spread", "n")


def capture_name(point_index: int, capture_index: int, node: str | None = None) -> str:
    """File-safe name of a capture: ``p003_c01``, or ``p003_c01_secondary`` for a node other than
    the primary (``node`` None)."""
    return f"p{point_index:03d}_c{capture_index:02d}" + (f"_{node}" if node else "")


def codes_key(name: str) -> str:
    """The array of ``captures.npz`` that holds capture ``name``'s codes as stored."""
    return f"{name}_codes"


def volts_key(name: str) -> str:
    """The array of ``captures.npz`` that holds capture ``name`` in volts."""
    return f"{name}_volts"


def csv_value(value: object) -> object:
    """A value as a CSV cell: booleans as ``true``/``false`` (as JSON and most readers spell
    them), nothing as an empty cell, anything else as itself."""
    if isinstance(value, bool | np.bool_):
        return "true" if value else "false"
    return "" if value is None else value


def write_points_csv(store: RunStore, run_id: int, path: Path) -> int:
    """Write the run's points with their figures (per node) to ``path``; return the row count."""
    points = store.points(run_id)
    figures = store.node_figures(run_id)
    verdicts = store.node_verdicts(run_id)
    # the nodes captured, the primary first, and any that holds figures but no capture
    nodes = list(
        dict.fromkeys([*store.node_names(run_id), *(n for f in figures.values() for n in f)])
    )
    names = {
        node: sorted({name for per_point in figures.values() for name in per_point.get(node, {})})
        for node in nodes
    }
    header = [BENCH_COLUMN, *_POINT_COLUMNS]
    for index, node in enumerate(nodes):
        prefix = f"{node}_" if index else ""
        header += [f"{node}_verdict"] if index else []
        header += [f"{prefix}{name}_{stat}" for name in names[node] for stat in _FIGURE_STATS]
    bench = BENCH_WORDS[is_simulated(store.run(run_id).bench_kind)]
    with path.open("w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle)
        writer.writerow(header)
        for point in points:
            row = asdict(point)
            row["verdict_reasons"] = "; ".join(point.verdict_reasons)
            values = [bench, *(row[column] for column in _POINT_COLUMNS)]
            for index, node in enumerate(nodes):
                if index:
                    values.append(verdicts.get(point.id, {}).get(node, (None,))[0])
                per_node = figures.get(point.id, {}).get(node, {})
                for name in names[node]:
                    values += [per_node.get(name, {}).get(stat) for stat in _FIGURE_STATS]
            writer.writerow([csv_value(value) for value in values])
    return len(points)


def _named_captures(store: RunStore, run_id: int) -> Iterator[tuple[str, StoredCapture, int]]:
    index_of_point = {point.id: point.point_index for point in store.points(run_id)}
    nodes = store.node_names(run_id)
    for capture in store.iter_captures(run_id):
        point_index = index_of_point[capture.point_id]
        node = None if capture.node == nodes[0] else capture.node
        yield capture_name(point_index, capture.capture_index, node), capture, point_index


def _run_facts(store: RunStore, run_id: int) -> dict[str, object]:
    """What an export says of the run its captures come from."""
    record = store.run(run_id)
    return {
        "run_id": run_id,
        "bench_kind": record.bench_kind,
        "simulated": is_simulated(record.bench_kind),
    }


def write_captures_npz(store: RunStore, run_id: int, path: Path) -> int:
    """Write every capture of the run into one ``.npz``, streaming; return the count."""
    scaling = []
    with zipfile.ZipFile(path, "w", compression=zipfile.ZIP_STORED, allowZip64=True) as archive:

        def put(key: str, array: np.ndarray) -> None:
            with archive.open(f"{key}.npy", "w", force_zip64=True) as member:
                np.lib.format.write_array(member, array, allow_pickle=False)

        put(RUN_KEY, np.array(json.dumps(_run_facts(store, run_id))))

        for name, capture, point_index in _named_captures(store, run_id):
            put(codes_key(name), capture.codes)
            put(volts_key(name), capture.volts())
            values = [getattr(capture, field) for field in SCALING_FIELDS]
            scaling.append(
                (
                    name,
                    point_index,
                    capture.capture_index,
                    capture.channel,
                    capture.node,
                    *(np.nan if value is None else value for value in values),
                )
            )
        put(SCALING_KEY, np.array(scaling, dtype=SCALING_DTYPE))
    return len(scaling)


def write_captures_csv(store: RunStore, run_id: int, directory: Path) -> int:
    """Write one ``time_s,volts`` CSV per capture into ``directory``; return the count."""
    directory.mkdir(parents=True, exist_ok=True)
    facts = _run_facts(store, run_id)
    bench = "the SIMULATED bench" if facts["simulated"] else "a real bench"
    count = 0
    for name, capture, _ in _named_captures(store, run_id):
        table = np.column_stack([capture.time_s(), capture.volts()])
        preamble = [f"{ORIGIN_KEY},labseq run {run_id} capture {name} on {bench}"]
        screen = capture.screen_volts()
        if screen is not None:
            preamble += [
                f"{key},{volts:.9g}" for key, volts in zip(SCREEN_KEYS, screen, strict=True)
            ]
        np.savetxt(
            directory / f"{name}.csv",
            table,
            fmt="%.9g",
            delimiter=",",
            header="\n".join([*preamble, "time_s,volts"]),
            comments="",
        )
        count += 1
    return count


@dataclass(frozen=True)
class Exported:
    """What :func:`export_run` wrote."""

    directory: Path
    points: int
    captures: int
    captures_format: str = "npz"

    def as_dict(self) -> dict[str, Any]:
        """Plain data for JSON: the folder and what it holds."""
        return {
            "directory": str(self.directory),
            "points": self.points,
            "captures": self.captures,
            "captures_format": self.captures_format,
            "files": sorted(p.name for p in self.directory.iterdir()),
        }


def export_run(store: RunStore, run_id: int, directory: Path, *, captures: str = "npz") -> Exported:
    """Write run ``run_id`` into ``directory``: ``points.csv``, the sequence file as run, the
    run's record as ``run.json``, and its captures as one NPZ or one CSV each (``captures``, one
    of :data:`CAPTURE_FORMATS`)."""
    if captures not in CAPTURE_FORMATS:
        raise ValueError(f"captures {captures!r}: give one of {', '.join(CAPTURE_FORMATS)}")
    record = store.run(run_id)
    directory.mkdir(parents=True, exist_ok=True)
    points = write_points_csv(store, run_id, directory / POINTS_FILE)
    (directory / SEQUENCE_FILE).write_text(record.sequence_text, encoding="utf-8")
    (directory / RUN_FILE).write_text(
        json.dumps({k: v for k, v in asdict(record).items() if k != "sequence_text"}, indent=2),
        encoding="utf-8",
    )
    if captures == "npz":
        count = write_captures_npz(store, run_id, directory / CAPTURES_NPZ)
    else:
        count = write_captures_csv(store, run_id, directory / CAPTURES_DIR)
    return Exported(directory, points, count, captures)
