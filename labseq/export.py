"""A run's points as CSV and its captures as NPZ or CSV files: the library side of ``labseq
export``, which the run report also uses for its ``points.csv``.

``points.csv`` has one row per point: setpoints, readbacks, meter readings, efficiency, the
combined verdict and the per-point figures (worst, mean, spread, n of each) of the primary node,
then for each further node its verdict and figures in columns prefixed by its name
(``secondary_verdict``, ``secondary_peak_v_worst``…). Captures go either into one
``captures.npz`` (per capture ``<name>_codes`` as stored, ``<name>_volts``, and a ``scaling``
table with one row per capture) or into ``captures/<name>.csv`` files of ``time_s,volts``, where
``<name>`` is ``p<point index>_c<capture index>``, followed by ``_<node>`` for a node other than
the primary. Captures are read and written one at a time.

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

import numpy as np

from instruments import Waveform
from labseq.store import PointRecord, StoredCapture
from labseq.store_api import RunStore

POINTS_FILE = "points.csv"
SEQUENCE_FILE = "sequence.toml"
RUN_FILE = "run.json"
CAPTURES_NPZ = "captures.npz"
CAPTURES_DIR = "captures"
CAPTURE_FORMATS = ("npz", "csv")

#: The scaling a capture's codes need to become volts and times, in the order of the scaling
#: table's columns: those of :class:`instruments.Waveform` (NaN code limits: a scope that sends
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
    header = list(_POINT_COLUMNS)
    for index, node in enumerate(nodes):
        prefix = f"{node}_" if index else ""
        header += [f"{node}_verdict"] if index else []
        header += [f"{prefix}{name}_{stat}" for name in names[node] for stat in _FIGURE_STATS]
    with path.open("w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle)
        writer.writerow(header)
        for point in points:
            row = asdict(point)
            row["verdict_reasons"] = "; ".join(point.verdict_reasons)
            values = [row[column] for column in _POINT_COLUMNS]
            for index, node in enumerate(nodes):
                if index:
                    values.append(verdicts.get(point.id, {}).get(node, (None,))[0])
                per_node = figures.get(point.id, {}).get(node, {})
                for name in names[node]:
                    values += [per_node.get(name, {}).get(stat) for stat in _FIGURE_STATS]
            writer.writerow(["" if value is None else value for value in values])
    return len(points)


def _named_captures(store: RunStore, run_id: int) -> Iterator[tuple[str, StoredCapture, int]]:
    index_of_point = {point.id: point.point_index for point in store.points(run_id)}
    nodes = store.node_names(run_id)
    for capture in store.iter_captures(run_id):
        point_index = index_of_point[capture.point_id]
        node = None if capture.node == nodes[0] else capture.node
        yield capture_name(point_index, capture.capture_index, node), capture, point_index


def write_captures_npz(store: RunStore, run_id: int, path: Path) -> int:
    """Write every capture of the run into one ``.npz``, streaming; return the count."""
    scaling = []
    with zipfile.ZipFile(path, "w", compression=zipfile.ZIP_STORED, allowZip64=True) as archive:

        def put(key: str, array: np.ndarray) -> None:
            with archive.open(f"{key}.npy", "w", force_zip64=True) as member:
                np.lib.format.write_array(member, array, allow_pickle=False)

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
    count = 0
    for name, capture, _ in _named_captures(store, run_id):
        table = np.column_stack([capture.time_s(), capture.volts()])
        np.savetxt(
            directory / f"{name}.csv",
            table,
            fmt="%.9g",
            delimiter=",",
            header="time_s,volts",
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
    return Exported(directory, points, count)
