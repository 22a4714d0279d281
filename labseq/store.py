"""The SQLite store: runs, points, raw captures with their scaling, figures and events.

One file holds everything a run produced, so a run can be re-analysed, reviewed or compared long
after the bench is gone. Captures are stored as the scope sent them — raw integer codes (int8 or
int16; float32 only for a scope that sends floats) plus the scaling that turns them into volts —
never as float64 volts, which would cost eight times the space and add nothing.

The file is opened in WAL mode with foreign keys on and ``synchronous=NORMAL``: a commit that
returned survives the death of the process (SIGKILL included), and the file stays consistent
through a power cut, which may lose only the last few commits (SQLite's documented guarantee for
WAL with NORMAL; FULL would add a disk sync per capture). A capture is committed on its own, and a
point's readings and "done" state with its last capture, so a crash leaves every committed capture
intact and the point pending until it is complete. The schema version is checked on open; a file
written by a newer labseq is refused without being touched, and one written by an older labseq is
upgraded in place (:meth:`Store._upgrade`). A writer leaves the file at rest in rollback-journal
mode when it closes, so that it reads with nothing beside it; read-only opens write nothing.

Codes are stored compressed by default (``captures.codec`` says how each capture's are stored:
``"zstd"``, Zstandard at level 3, or ``"raw"``); reading them back fetches the ordered capture rows
first and then each capture's codes by id, so no query ever sorts the waveforms themselves.

Several nodes may be captured per acquisition (the primary switch node, a secondary rectifier…):
each capture names its node, its index counts the point's acquisitions (the captures of one
acquisition share it and are committed together), and the per-point figures and verdicts are
kept per node; ``points.verdict`` is the point's combined verdict, the worst of its nodes'.
"""

from __future__ import annotations

import hashlib
import json
import os
import socket
import sqlite3
import tempfile
import time
import uuid
from collections.abc import Iterable, Iterator, Mapping
from contextlib import AbstractContextManager
from dataclasses import dataclass, field, fields
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import sqlite_utils
import zstandard

from labseq import __version__
from labseq.errors import InputError, LabseqError
from labseq.figures import CAPTURE_FIGURES, CAPTURE_METHODS, VERDICTS
from labseq.process import process_alive, process_start_time
from labseq_instruments import Waveform
from labseq_instruments.files import not_regular
from labseq_instruments.text import quoted

#: Version of the schema; a file with a higher version is refused, a lower one upgraded.
SCHEMA_VERSION = 4
#: The node of every capture and figure of a version-1 file, which knew only one node (the
#: upgrade fills it in). Everything else names its node: the store has no default of its own.
_VERSION_1_NODE = "primary"
APPLICATION = "labseq"

#: Page size for new files (an existing file keeps its own). Every table and index costs at
#: least one page and each capture leaves part of a page unused, so small pages keep a store of
#: modest runs small; 1 KiB costs 0.4 % in overflow-page pointers on long records. 4 KiB pages
#: write and read 1 M-sample records 15-35 % faster, but with compressed codes (the default) at
#: 20-100 k samples they gain at most 6 %, and a compressed 20 k-sample capture then leaves most
#: of a page unused: the demo's store grows by a fifth (tests/benchmarks/bench_storage.py).
PAGE_SIZE = 1024

#: How a capture's codes may be stored (``captures.codec``): "raw" is their little-endian bytes,
#: "zstd" those bytes as one Zstandard frame (RFC 8878). New captures use :data:`DEFAULT_CODEC`
#: unless the store is opened with another.
CODECS = ("raw", "zstd")
DEFAULT_CODEC = "zstd"
#: Zstandard's own default level. On the demo's records it stores codes 4x smaller (2x with
#: 1.5 LSB rms of scope noise; tests/benchmarks/bench_storage.py) at 150-200 MB/s; level 9 saves
#: another 3-8 % at a fifth of that speed. A first difference of the codes before compressing
#: saves 6-10 % on noisy records but undoing it (a cumulative sum) costs more than decompressing.
ZSTD_LEVEL = 3

#: How a run ended; "unsafe-end": its shutdown could not confirm the bench safe (outputs not
#: read back off, or the bus not read below the ES1 limit), whatever else ended it.
RUN_STATUSES = ("running", "finished", "aborted", "interrupted", "failed", "unsafe-end")
POINT_STATUSES = ("pending", "done", "failed", "skipped")
EVENT_KINDS = ("info", "scpi-error", "retry", "skip", "fault", "timing", "safety")
CODE_DTYPES = ("int8", "int16", "float32")

#: A capture's figures are stored one column each, named and typed as the figure catalogue
#: (:mod:`labseq.figures`) says: :data:`CAPTURE_FIGURES` REAL, :data:`CAPTURE_METHODS` TEXT.
#: The columns a version-2 file has, as that version wrote them; later versions add theirs.
_CAPTURE_FIGURES_2 = (
    "base_v",
    "plateau_v",
    "peak_v",
    "overshoot_v",
    "overshoot_pct",
    "rise_time_s",
    "edge_time_s",
    "ring_frequency_hz",
    "decay_rate_per_s",
    "damping_ratio",
    "q_factor",
    "fit_quality",
    "settling_time_s",
    "snubber_loss_w",
    "stress_margin_v",
    "clamp_level_v",
    "clamp_loss_w",
)
_CAPTURE_METHODS_2 = ("snubber_loss_method", "clamp_loss_method")


def _sql_list(values: Iterable[str]) -> str:
    """Constant names as an SQL list for CHECK constraints (module constants, never user values)."""
    return ", ".join(f"'{value}'" for value in values)


#: Tables whose definition changed from version 1 to 2, as templates of their name (the upgrade
#: builds each under another name first).
_CAPTURES_TABLE = f"""
CREATE TABLE {{table}} (
    id INTEGER PRIMARY KEY,
    point_id INTEGER NOT NULL REFERENCES points(id),
    run_id INTEGER NOT NULL REFERENCES runs(id),
    capture_index INTEGER NOT NULL,
    node TEXT NOT NULL DEFAULT '{_VERSION_1_NODE}',
    channel INTEGER NOT NULL,
    dtype TEXT NOT NULL CHECK (dtype IN ({_sql_list(CODE_DTYPES)})),
    x_increment_s REAL NOT NULL,
    x_origin_s REAL NOT NULL,
    y_increment_v REAL NOT NULL,
    y_origin_v REAL NOT NULL,
    y_reference REAL NOT NULL,
    code_min REAL,
    code_max REAL,
    points INTEGER NOT NULL,
    captured_at TEXT NOT NULL,
    codes BLOB NOT NULL,
    UNIQUE (point_id, node, capture_index)
)"""
_POINT_FIGURES_TABLE = f"""
CREATE TABLE {{table}} (
    point_id INTEGER NOT NULL REFERENCES points(id),
    node TEXT NOT NULL DEFAULT '{_VERSION_1_NODE}',
    figure TEXT NOT NULL,
    worst REAL,
    mean REAL,
    spread REAL,
    n INTEGER NOT NULL,
    PRIMARY KEY (point_id, node, figure)
) WITHOUT ROWID"""
_NODE_VERDICTS_TABLE = f"""
CREATE TABLE {{table}} (
    point_id INTEGER NOT NULL REFERENCES points(id),
    node TEXT NOT NULL,
    verdict TEXT NOT NULL CHECK (verdict IN ({_sql_list(VERDICTS)})),
    verdict_reasons TEXT NOT NULL,
    PRIMARY KEY (point_id, node)
) WITHOUT ROWID"""

#: The runs table as version 3 had it: a run may end "unsafe-end", and it records its owning
#: process's start time.
_RUNS_TABLE_3 = f"""
CREATE TABLE {{table}} (
    id INTEGER PRIMARY KEY,
    sequence_text TEXT NOT NULL,
    sequence_sha256 TEXT NOT NULL,
    sequence_path TEXT NOT NULL,
    dut_label TEXT NOT NULL,
    snubber_label TEXT NOT NULL,
    bench_kind TEXT NOT NULL,
    instruments TEXT NOT NULL DEFAULT '{{{{}}}}',
    software_version TEXT NOT NULL,
    status TEXT NOT NULL CHECK (status IN ({_sql_list(RUN_STATUSES)})),
    started_at TEXT NOT NULL,
    finished_at TEXT,
    notes TEXT NOT NULL DEFAULT '',
    pid INTEGER,
    host TEXT,
    process_started REAL
)"""
#: The columns of a version-2 runs table, kept when version 3 rebuilds it.
_RUN_COLUMNS_2 = (
    "id, sequence_text, sequence_sha256, sequence_path, dut_label, snubber_label, bench_kind, "
    "instruments, software_version, status, started_at, finished_at, notes, pid, host"
)
#: The runs table as version 4 has it: version 3's plus the run's UUID (the same in every store
#: the run is merged or published into) and the bench it ran on (:func:`bench_identity`).
_RUNS_TABLE_4 = f"""
CREATE TABLE {{table}} (
    id INTEGER PRIMARY KEY,
    sequence_text TEXT NOT NULL,
    sequence_sha256 TEXT NOT NULL,
    sequence_path TEXT NOT NULL,
    dut_label TEXT NOT NULL,
    snubber_label TEXT NOT NULL,
    bench_kind TEXT NOT NULL,
    instruments TEXT NOT NULL DEFAULT '{{{{}}}}',
    software_version TEXT NOT NULL,
    status TEXT NOT NULL CHECK (status IN ({_sql_list(RUN_STATUSES)})),
    started_at TEXT NOT NULL,
    finished_at TEXT,
    notes TEXT NOT NULL DEFAULT '',
    pid INTEGER,
    host TEXT,
    process_started REAL,
    uuid TEXT NOT NULL CHECK (length(uuid) = 36),
    bench_host TEXT NOT NULL DEFAULT '',
    bench_id TEXT NOT NULL DEFAULT ''
)"""
#: The columns of a version-3 runs table, kept when version 4 rebuilds it.
_RUN_COLUMNS_3 = _RUN_COLUMNS_2 + ", process_started"

#: The version-2 tables, frozen as that version wrote them; a new file gets these and then every
#: later upgrade step (as an older file does), so new and upgraded files have the same tables.
_SCHEMA_2 = f"""
CREATE TABLE schema_info (
    version INTEGER NOT NULL,
    application TEXT NOT NULL,
    created_by TEXT NOT NULL,
    created_at TEXT NOT NULL
);
CREATE TABLE runs (
    id INTEGER PRIMARY KEY,
    sequence_text TEXT NOT NULL,
    sequence_sha256 TEXT NOT NULL,
    sequence_path TEXT NOT NULL,
    dut_label TEXT NOT NULL,
    snubber_label TEXT NOT NULL,
    bench_kind TEXT NOT NULL,
    instruments TEXT NOT NULL DEFAULT '{{}}',
    software_version TEXT NOT NULL,
    status TEXT NOT NULL
        CHECK (status IN ('running', 'finished', 'aborted', 'interrupted', 'failed')),
    started_at TEXT NOT NULL,
    finished_at TEXT,
    notes TEXT NOT NULL DEFAULT '',
    pid INTEGER,
    host TEXT
);
CREATE TABLE points (
    id INTEGER PRIMARY KEY,
    run_id INTEGER NOT NULL REFERENCES runs(id),
    point_index INTEGER NOT NULL,
    line_v REAL NOT NULL,
    line_is_ac INTEGER NOT NULL,
    line_frequency_hz REAL NOT NULL,
    load_a REAL NOT NULL,
    status TEXT NOT NULL DEFAULT 'pending' CHECK (status IN ({_sql_list(POINT_STATUSES)})),
    source_voltage_v REAL,
    source_current_a REAL,
    load_voltage_v REAL,
    load_current_a REAL,
    meter_voltage_v REAL,
    meter_current_a REAL,
    meter_power_w REAL,
    meter_power_factor REAL,
    output_power_w REAL,
    efficiency REAL,
    verdict TEXT CHECK (verdict IS NULL OR verdict IN ({_sql_list(VERDICTS)})),
    verdict_reasons TEXT,
    started_at TEXT,
    finished_at TEXT,
    duration_s REAL,
    UNIQUE (run_id, point_index)
);
{_CAPTURES_TABLE.format(table="captures")};
CREATE TABLE capture_figures (
    capture_id INTEGER PRIMARY KEY REFERENCES captures(id),
    {", ".join(f"{name} REAL" for name in _CAPTURE_FIGURES_2)},
    {", ".join(f"{name} TEXT" for name in _CAPTURE_METHODS_2)},
    clipped INTEGER,
    edge_count INTEGER,
    error TEXT,
    edges_json TEXT
);
{_POINT_FIGURES_TABLE.format(table="point_figures")};
{_NODE_VERDICTS_TABLE.format(table="node_verdicts")};
CREATE TABLE events (
    id INTEGER PRIMARY KEY,
    run_id INTEGER NOT NULL REFERENCES runs(id),
    point_id INTEGER REFERENCES points(id),
    time TEXT NOT NULL,
    kind TEXT NOT NULL CHECK (kind IN ({_sql_list(EVENT_KINDS)})),
    message TEXT NOT NULL,
    data TEXT
);
"""


def _rebuilt(template: str, name: str, columns: str) -> list[str]:
    """Statements that rebuild table ``name`` to its present definition ``template``, keeping
    its rows (SQLite's documented procedure for a change ALTER TABLE cannot make)."""
    return [
        template.format(table=f"{name}_new"),
        f"INSERT INTO {name}_new ({columns}) SELECT {columns} FROM {name}",
        f"DROP TABLE {name}",
        f"ALTER TABLE {name}_new RENAME TO {name}",
    ]


_V1_CAPTURE_COLUMNS = (
    "id, point_id, run_id, capture_index, node, channel, dtype, x_increment_s, x_origin_s, "
    "y_increment_v, y_origin_v, y_reference, code_min, code_max, points, captured_at, codes"
)


def _upgrade_to_2() -> list[str]:
    """Statements that bring a version-1 file to version 2 (several nodes per acquisition):
    capture indices count per node, point figures carry their node (version-1 figures are the
    primary's), per-node verdicts, and the RCD clamp's capture figures."""
    return (
        _rebuilt(_CAPTURES_TABLE, "captures", _V1_CAPTURE_COLUMNS)
        + [
            "ALTER TABLE capture_figures ADD COLUMN clamp_level_v REAL",
            "ALTER TABLE capture_figures ADD COLUMN clamp_loss_w REAL",
            "ALTER TABLE capture_figures ADD COLUMN clamp_loss_method TEXT",
        ]
        + _rebuilt(
            _POINT_FIGURES_TABLE, "point_figures", "point_id, figure, worst, mean, spread, n"
        )
        + [_NODE_VERDICTS_TABLE.format(table="node_verdicts")]
    )


def _upgrade_to_3() -> list[str]:
    """Statements that bring a version-2 file to version 3: each capture says how its codes are
    stored (compressed codes), those stored so far being raw; the runs table is rebuilt so that a
    run may end "unsafe-end" and records its owning process's start time (so resume can tell a
    reused pid from a live owner); the capture figures gain the ring fit's natural frequency,
    the snubber branch's real pole and the model the fit chose. The captures table gets a
    column, not a rebuild, so the upgrade copies no waveform."""
    return (
        [
            "ALTER TABLE captures ADD COLUMN codec TEXT NOT NULL DEFAULT 'raw' "
            f"CHECK (codec IN ({_sql_list(CODECS)}))"
        ]
        + _rebuilt(_RUNS_TABLE_3, "runs", _RUN_COLUMNS_2)
        + [
            "ALTER TABLE capture_figures ADD COLUMN natural_frequency_hz REAL",
            "ALTER TABLE capture_figures ADD COLUMN real_pole_decay_rate_per_s REAL",
            "ALTER TABLE capture_figures ADD COLUMN ring_model TEXT",
        ]
    )


def _upgrade_to_4() -> list[str]:
    """Statements that bring a version-3 file to version 4 (runs gathered from many benches):
    every run gets a UUID (for a run stored so far, the connection's ``labseq_run_uuid()`` of
    what the run recorded, :func:`upgraded_run_uuid`) and the bench it ran on (its owner's host
    and ``labseq_bench_id()`` of that host and the recorded instruments); the foreign keys that
    reads follow get indexes (a run's captures and its events; a point's captures and a run's
    points already have theirs, the leading columns of their UNIQUE constraints)."""
    return [
        _RUNS_TABLE_4.format(table="runs_new"),
        f"INSERT INTO runs_new ({_RUN_COLUMNS_3}, uuid, bench_host, bench_id) "
        f"SELECT {_RUN_COLUMNS_3}, "
        "labseq_run_uuid(id, started_at, sequence_sha256, host, pid, process_started), "
        "COALESCE(host, ''), "
        "labseq_bench_id(COALESCE(host, ''), instruments) FROM runs",
        "DROP TABLE runs",
        "ALTER TABLE runs_new RENAME TO runs",
        "CREATE UNIQUE INDEX runs_uuid ON runs (uuid)",
        "CREATE INDEX captures_run ON captures (run_id, node)",
        "CREATE INDEX events_run ON events (run_id)",
    ]


def _upgrade_statements(version: int) -> list[str]:
    """Every statement that brings a file of ``version`` to :data:`SCHEMA_VERSION`: the steps
    from each version to the next, in order (a new step goes at the end)."""
    return (
        (_upgrade_to_2() if version < 2 else [])
        + (_upgrade_to_3() if version < 3 else [])
        + (_upgrade_to_4() if version < 4 else [])
    )


def new_run_uuid() -> str:
    """A new run's UUID: version 4 (random), as 36 characters of lower-case text."""
    return str(uuid.uuid4())


#: The namespace of the UUIDs given to runs stored before version 4 (a random UUID, fixed here).
_UPGRADED_RUN_NAMESPACE = uuid.UUID("5f0c1d2e-8b7a-4c39-9e61-2a4d3b8c7f10")


def upgraded_run_uuid(
    run_id: int,
    started_at: str,
    sequence_sha256: str,
    host: str | None,
    pid: int | None,
    process_started: float | None,
) -> str:
    """The UUID of a run stored before version 4: a name-based UUID (version 5, RFC 4122 4.3)
    of what the run recorded — its id, start time, sequence digest and owner. Two copies of the
    same older file, each upgraded, or one read several times through an upgraded copy
    (``Store(read_only=True)``), give each run the same UUID, so merging them keeps one."""
    name = json.dumps([run_id, started_at, sequence_sha256, host, pid, process_started])
    return str(uuid.uuid5(_UPGRADED_RUN_NAMESPACE, name))


#: The ``*IDN?`` fields that name an instrument (IEEE 488.2 10.14): its firmware may change
#: and its resource string (a port, an address) is how it is reached, not which one it is.
_IDENTITY_FIELDS = ("manufacturer", "model", "serial")


def bench_identity(host: str, instruments: Mapping[str, Any]) -> str:
    """The bench a run ran on, as ``HOST:DIGEST``: the host that drove it and the first 12 hex
    digits of the SHA-256 of its instruments' identities — one line ``role=manufacturer,model,
    serial`` per role, in role order, joined by newlines (UTF-8). The same instruments on the
    same host give the same identity whatever their firmware or address; a run that recorded no
    instruments yet has the digest of no lines."""
    lines = []
    for role in sorted(instruments):
        identity = instruments[role]
        if isinstance(identity, Mapping):
            values = [str(identity.get(name, "")) for name in _IDENTITY_FIELDS]
        else:  # an identity kept as the *IDN? reply itself
            values = [part.strip() for part in str(identity).split(",")][: len(_IDENTITY_FIELDS)]
        lines.append(f"{role}={','.join(values)}")
    digest = hashlib.sha256("\n".join(lines).encode("utf-8")).hexdigest()
    return f"{host}:{digest[:12]}"


def _bench_identity_sql(host: str | None, instruments: str | None) -> str:
    """:func:`bench_identity` for SQL (``labseq_bench_id``), of the stored instruments JSON."""
    try:
        recorded = json.loads(instruments or "{}")
    except ValueError:
        recorded = {}
    return bench_identity(host or "", recorded if isinstance(recorded, dict) else {})


_SQLITE_MAGIC = b"SQLite format 3\x00"


class StoreError(LabseqError):
    """The store cannot do what was asked: it is damaged, locked by another process, or its
    disk is full (exit status 3, a store failure)."""

    exit_code = 3


class StoreFileError(StoreError, InputError):
    """The file named by the user is missing, not a SQLite database, not ours, or too new."""

    exit_code = 2


class UnknownRunError(StoreError, InputError):
    """No run with that id in the store."""

    exit_code = 2


#: How long a write waits for another connection's write to end before the store counts as
#: locked (SQLite's busy timeout).
BUSY_TIMEOUT_S = 30.0


def store_failure(path: Path, error: sqlite3.Error) -> StoreError:
    """What a failure of SQLite means for the user of the store at ``path``, as one message."""
    text = str(error)
    if "locked" in text or "busy" in text:
        why = (
            "the store is locked by another process writing it (SQLite: "
            f"{text}); wait for that process to end, or use another --db"
        )
    elif "full" in text:
        why = (
            f"no room to write (SQLite: {text}): the disk, or a size limit set on the file, is "
            "full; free some space. Everything committed before is kept"
        )
    elif isinstance(error, sqlite3.DatabaseError) and not isinstance(
        error, sqlite3.OperationalError | sqlite3.IntegrityError | sqlite3.ProgrammingError
    ):
        why = (
            f"the file is damaged (SQLite: {text}); keep a copy, and recover what can be read "
            "with the sqlite3 shell's .recover command into a new file"
        )
    else:
        why = f"the store failed (SQLite: {type(error).__name__}: {text})"
    return StoreError(f"{path}: {why}")


def _json_field(text: str | None, where: str, path: Path) -> Any:
    """A JSON column read back; :class:`StoreError` naming the column and row when the text
    stored there is not JSON (the file was edited or damaged)."""
    if text is None:
        return None
    try:
        return json.loads(text)
    except (ValueError, RecursionError):
        raise StoreError(
            f"{path}: {where} is damaged (not JSON: {quoted(str(text), 40)}); the rest of the "
            "store can still be read"
        ) from None


# --------------------------------------------------------------------------- records


@dataclass(frozen=True)
class CaptureRecord:
    """A capture to store: the waveform plus which node it is, on which channel, and when."""

    waveform: Waveform
    node: str
    channel: int = 1
    captured_at: float = field(default_factory=time.time)  # Unix time, s


@dataclass(frozen=True)
class PointReadings:
    """Readbacks and meter readings of a point (None = not read)."""

    source_voltage_v: float | None = None
    source_current_a: float | None = None
    load_voltage_v: float | None = None
    load_current_a: float | None = None
    meter_voltage_v: float | None = None
    meter_current_a: float | None = None
    meter_power_w: float | None = None
    meter_power_factor: float | None = None
    output_power_w: float | None = None
    efficiency: float | None = None


@dataclass(frozen=True)
class RunRecord:
    """One run as stored, with its point counts. ``id`` numbers it in this store only; ``uuid``
    names it in every store it is merged or published into, ``bench_id`` is the bench it ran on
    (:func:`bench_identity` of ``bench_host`` and the instruments)."""

    id: int
    uuid: str
    bench_host: str
    bench_id: str
    status: str
    started_at: str
    finished_at: str | None
    dut_label: str
    snubber_label: str
    bench_kind: str
    sequence_path: str
    sequence_sha256: str
    sequence_text: str
    instruments: dict[str, Any]
    software_version: str
    notes: str
    pid: int | None
    host: str | None
    process_started: float | None  # the owning process's start time (s since the epoch)
    points_total: int
    points_done: int


@dataclass(frozen=True)
class PointRecord:
    """One point as stored."""

    id: int
    run_id: int
    point_index: int
    line_v: float
    line_is_ac: bool
    line_frequency_hz: float
    load_a: float
    status: str
    source_voltage_v: float | None
    source_current_a: float | None
    load_voltage_v: float | None
    load_current_a: float | None
    meter_voltage_v: float | None
    meter_current_a: float | None
    meter_power_w: float | None
    meter_power_factor: float | None
    output_power_w: float | None
    efficiency: float | None
    verdict: str | None
    verdict_reasons: list[str]
    started_at: str | None
    finished_at: str | None
    duration_s: float | None


@dataclass(frozen=True, eq=False)
class StoredCapture(Waveform):
    """A capture read back: the raw codes and scaling as the scope sent them (the IEEE 488.2
    block payload), and which point, node and channel it belongs to."""

    id: int
    point_id: int
    run_id: int
    capture_index: int
    node: str
    channel: int
    captured_at: str


#: The capture columns read besides the codes: those of :class:`StoredCapture`.
_CAPTURE_COLUMNS = [f.name for f in fields(StoredCapture) if f.name != "codes"]


#: Every stored column of a capture but its codes.
_STORED_CAPTURE_COLUMNS = _CAPTURE_COLUMNS + ["dtype", "points", "codec"]


def decode_codes(
    blob: bytes,
    codec: str,
    dtype: np.dtype,
    count: int,
    decompressor: zstandard.ZstdDecompressor | None = None,
) -> np.ndarray:
    """A capture's ``count`` codes of ``dtype`` from the bytes stored under ``codec``
    (read-only, little-endian); ValueError when they are damaged."""
    size = count * dtype.itemsize
    try:
        if codec == "zstd":
            # a damaged frame may claim any size: check it before decompressing
            if zstandard.frame_content_size(blob) != size:
                raise ValueError(f"its zstd frame does not hold {size} bytes")
            blob = (decompressor or zstandard.ZstdDecompressor()).decompress(blob)
        elif codec != "raw":
            raise ValueError(f"unknown codec {codec!r}")
        if len(blob) != size:
            raise ValueError(f"{len(blob)} bytes of codes where {count} {dtype.name} take {size}")
    except zstandard.ZstdError as exc:
        raise ValueError(str(exc)) from None
    return np.frombuffer(blob, dtype=dtype)


def _run_record_of(row: Mapping[str, Any], location: Any, **overrides: Any) -> RunRecord:
    """A run's record from its row (in either backend; ``location`` names the store)."""
    try:
        instruments = _json_field(row["instruments"], f"run {row['id']}'s instruments", location)
    except StoreError as damaged:  # the identities are shown, never computed with
        instruments = {"(damaged)": str(damaged)}
    if not isinstance(instruments, dict):
        instruments = {"(damaged)": f"run {row['id']}'s instruments are not a table"}
    return _record(RunRecord, row, instruments=instruments, **overrides)


def _edges_of(capture_id: int, text: str | None, location: Any) -> list[dict[str, Any]]:
    """A capture's per-edge figures from their JSON (inverse of :func:`_edges_json`)."""
    where = f"capture {capture_id}'s edge figures (capture_figures.edges_json)"
    table = _json_field(text, where, location)
    if not table:
        return []
    try:
        return [dict(zip(table["names"], row, strict=True)) for row in table["rows"]]
    except (KeyError, TypeError, ValueError):
        raise StoreError(f"{location}: {where} is damaged (not names and rows)") from None


def _point_record_of(row: Mapping[str, Any], location: Any) -> PointRecord:
    """A point's record from its row (in either backend; ``location`` names the store in the
    message about damaged verdict reasons)."""
    where = f"point {row['id']}'s verdict reasons"
    reasons = _json_field(row["verdict_reasons"] or None, where, location) or []
    return _record(PointRecord, row, line_is_ac=bool(row["line_is_ac"]), verdict_reasons=reasons)


def _now_iso(unix_s: float | None = None) -> str:
    """UTC time as ISO 8601 text with milliseconds."""
    moment = datetime.fromtimestamp(time.time() if unix_s is None else unix_s, UTC)
    return moment.isoformat(timespec="milliseconds")


def _codes_blob(codes: np.ndarray) -> tuple[bytes, str, int]:
    """Raw codes as little-endian bytes, their dtype name and their count."""
    array = np.asarray(codes)
    name = array.dtype.name
    if name not in CODE_DTYPES or array.ndim != 1:
        raise ValueError(
            f"capture codes must be a 1-D array of {', '.join(CODE_DTYPES)} as the scope sent "
            f"them, got {array.ndim}-D {name}"
        )
    little = array.astype(array.dtype.newbyteorder("<"), copy=False)
    return little.tobytes(), name, array.size


def _edges_json(edges: list[Mapping[str, Any]]) -> str:
    """Per-edge figures as compact JSON: the names once, then one row of values per edge."""
    names = list(dict.fromkeys(name for edge in edges for name in edge))
    rows = [[edge.get(name) for name in names] for edge in edges]
    return json.dumps({"names": names, "rows": rows}, separators=(",", ":"))


def _record(cls: type, row: Mapping[str, Any], **overrides: Any) -> Any:
    """Build dataclass ``cls`` from a row's columns of the same names."""
    values = {f.name: row[f.name] for f in fields(cls) if f.name not in overrides}
    return cls(**values, **overrides)


# --------------------------------------------------------------------------- opening


def _connect_read_only(path: Path) -> sqlite3.Connection:
    """A connection that reads ``path`` and writes nothing, to it or beside it.

    A store at rest is in the rollback-journal mode its last writer leaves it in
    (:meth:`Store.close`) and opens with ``mode=ro``, even where this user may not write (an
    archive share, another user's folder). A file left in WAL mode needs the ``-shm`` index
    beside it, which SQLite creates where it can; where it cannot and no write-ahead log with
    commits is beside the file, it is opened ``immutable`` (there is nothing to miss)."""
    uri = path.resolve().as_uri()
    conn = sqlite3.connect(f"{uri}?mode=ro", uri=True, timeout=30.0, isolation_level=None)
    try:
        conn.execute("SELECT COUNT(*) FROM sqlite_master").fetchone()
    except sqlite3.OperationalError:
        conn.close()
        wal = path.with_name(f"{path.name}-wal")
        if wal.is_file() and wal.stat().st_size > 0:
            raise StoreFileError(
                f"{path}: cannot be read here: its last commits are in {wal.name}, which SQLite "
                f"reads only where it may create {path.name}-shm; copy both files to a folder "
                "you may write, or open the store once with labseq where it was written"
            ) from None
        conn = sqlite3.connect(f"{uri}?immutable=1", uri=True, isolation_level=None)
    conn.execute("PRAGMA query_only = ON")
    return conn


def _inspect_existing(path: Path) -> int | None:
    """Check an existing file without changing it: its schema version, or None if it is empty.

    Raises :class:`StoreFileError` for a file that is not SQLite, not ours, or too new.
    """
    with path.open("rb") as handle:
        header = handle.read(len(_SQLITE_MAGIC))
    if header != _SQLITE_MAGIC:
        raise StoreFileError(f"{path}: not a SQLite database; give a labseq store (.sqlite)")
    try:
        conn = _connect_read_only(path)
        try:
            tables = [row[0] for row in conn.execute("SELECT name FROM sqlite_master")]
            if not tables:
                return None
            if "schema_info" not in tables:
                raise StoreFileError(
                    f"{path}: a SQLite database but not a labseq store (it holds "
                    f"{', '.join(sorted(tables)[:5])}); give another file name"
                )
            row = conn.execute("SELECT version, application FROM schema_info").fetchone()
        finally:
            conn.close()
    except sqlite3.DatabaseError as exc:  # a SQLite file (its header says so) that is damaged
        raise store_failure(path, exc) from None
    if row is None or row[1] != APPLICATION or not isinstance(row[0], int):
        raise StoreFileError(f"{path}: not a labseq store (its schema_info is not ours)")
    if row[0] > SCHEMA_VERSION:
        raise StoreFileError(
            f"{path}: written by a newer labseq (schema version {row[0]}; this labseq "
            f"{__version__} reads version {SCHEMA_VERSION}); upgrade labseq to open it. "
            "The file was not changed."
        )
    if row[0] < 1:
        raise StoreFileError(f"{path}: schema version {row[0]} is not a labseq version")
    return row[0]


def _add_functions(conn: sqlite3.Connection) -> None:
    """The SQL functions the upgrade steps use: ``labseq_run_uuid(...)``
    (:func:`upgraded_run_uuid`) and ``labseq_bench_id(host, instruments_json)``
    (:func:`bench_identity`)."""
    conn.create_function("labseq_run_uuid", 6, upgraded_run_uuid, deterministic=True)
    conn.create_function("labseq_bench_id", 2, _bench_identity_sql, deterministic=True)


class Store:
    """A labseq SQLite store; use as a context manager.

    ``Store(path)`` opens the file, creating it when missing unless ``create=False`` (then a
    missing file is a :class:`StoreFileError`, exit status 2). ``codec`` is how the captures
    stored from now on keep their codes (one of :data:`CODECS`); every codec reads.

    ``read_only=True`` opens an existing store for reading and never writes to it or beside it
    (:func:`_connect_read_only`), so a store that this user may not write reads all the same; a
    file of an older schema version is read from an upgraded copy in a temporary file, deleted
    on close. A writer leaves the file at rest in rollback-journal mode when it closes, so that
    the plain ``sqlite3`` shell, or any reader, opens it read-only with nothing beside it.
    """

    def __init__(
        self,
        path: str | Path,
        *,
        create: bool = True,
        codec: str = DEFAULT_CODEC,
        read_only: bool = False,
    ) -> None:
        if codec not in CODECS:
            raise ValueError(f"codec {codec!r}: give one of {', '.join(CODECS)}")
        self.path = Path(path)
        self.codec = codec
        self.read_only = read_only
        self._copy: Path | None = None  # the upgraded copy an older file is read from
        self._compressor = zstandard.ZstdCompressor(level=ZSTD_LEVEL)
        self._decompressor = zstandard.ZstdDecompressor()
        try:
            kind = not_regular(self.path.stat().st_mode)
        except OSError:
            kind = None
        if kind is not None:
            raise StoreFileError(f"{self.path}: is {kind}, not a regular file; give a store file")
        exists = self.path.is_file() and self.path.stat().st_size > 0
        if not exists and (read_only or not create):
            raise StoreFileError(f"{self.path}: no such store; give --db the path of a run's file")
        version = _inspect_existing(self.path) if exists else None
        try:
            if read_only:
                self._open_for_reading(version)
            else:
                self._open(version)
        except sqlite3.Error as error:
            raise store_failure(self.path, error) from None

    def _open(self, version: int | None) -> None:
        """Connect, set the pragmas, and create or upgrade the tables."""
        conn = sqlite3.connect(self.path, timeout=BUSY_TIMEOUT_S, isolation_level=None)
        conn.row_factory = sqlite3.Row
        _add_functions(conn)
        self.db = sqlite_utils.Database(conn, execute_plugins=False)
        if version is None:
            conn.execute(f"PRAGMA page_size = {PAGE_SIZE}")
        conn.execute("PRAGMA journal_mode = WAL")
        conn.execute("PRAGMA synchronous = NORMAL")
        conn.execute("PRAGMA foreign_keys = ON")
        if version is None:
            with self.db.atomic():
                statements = [text for text in _SCHEMA_2.split(";") if text.strip()]
                for statement in statements + _upgrade_statements(2):
                    conn.execute(" ".join(statement.split()))  # stored text kept short
                self.db["schema_info"].insert(
                    {
                        "version": SCHEMA_VERSION,
                        "application": APPLICATION,
                        "created_by": __version__,
                        "created_at": _now_iso(),
                    }
                )
        elif version < SCHEMA_VERSION:
            self._upgrade(version)

    def _open_for_reading(self, version: int | None) -> None:
        """Open the file read-only; one of an older version through an upgraded copy."""
        if version is None:
            raise StoreFileError(f"{self.path}: an empty SQLite database, not a labseq store")
        conn = _connect_read_only(self.path)
        if version < SCHEMA_VERSION:
            handle, name = tempfile.mkstemp(prefix="labseq-read-", suffix=".sqlite")
            os.close(handle)
            self._copy = Path(name)
            copy = sqlite3.connect(self._copy, isolation_level=None)
            try:
                conn.backup(copy)
            finally:
                conn.close()
            conn = copy
        conn.row_factory = sqlite3.Row
        _add_functions(conn)
        self.db = sqlite_utils.Database(conn, execute_plugins=False)
        if version < SCHEMA_VERSION:
            try:
                self._upgrade(version)
            except BaseException:
                self.close()
                raise
        conn.execute("PRAGMA query_only = ON")

    def _upgrade(self, version: int) -> None:
        """Bring a file written by an older labseq to :data:`SCHEMA_VERSION`, in one transaction
        (a failure leaves it as it was). Foreign keys are off meanwhile, as SQLite requires for
        rebuilding a referenced table, and checked before the commit."""
        conn = self.db.conn
        conn.execute("PRAGMA foreign_keys = OFF")
        try:
            with self.db.atomic():
                for statement in _upgrade_statements(version):
                    conn.execute(" ".join(statement.split()))
                broken = conn.execute("PRAGMA foreign_key_check").fetchall()
                if broken:
                    raise StoreFileError(
                        f"{self.path}: cannot upgrade from schema version {version}: "
                        f"{len(broken)} broken references; the file was not changed"
                    )
                conn.execute("UPDATE schema_info SET version = ?", [SCHEMA_VERSION])
        finally:
            conn.execute("PRAGMA foreign_keys = ON")

    @property
    def location(self) -> str:
        """The file's path, for messages."""
        return str(self.path)

    def __enter__(self) -> Store:
        return self

    def __exit__(self, kind: object, error: BaseException | None, trace: object) -> None:
        """Close the file; a failure of SQLite inside the block becomes a :class:`StoreError`
        naming the file and what went wrong (damaged, locked, full)."""
        try:
            self.close()
        except sqlite3.Error:
            if error is None:
                raise
        if isinstance(error, sqlite3.Error):
            raise store_failure(self.path, error) from error

    def close(self) -> None:
        """Close the file. A writer first leaves it at rest: the write-ahead log folded into
        it and rollback-journal mode, so that it reads with nothing beside it (see the class).
        While another connection has the file open that cannot be done, and is left to the
        last writer that closes it."""
        conn = self.db.conn
        if not self.read_only and not conn.in_transaction:
            try:
                conn.execute("PRAGMA busy_timeout = 0")  # never wait for another connection
                conn.execute("PRAGMA journal_mode = DELETE")
            except sqlite3.OperationalError:
                pass
        self.db.close()
        if self._copy is not None:
            self._copy.unlink(missing_ok=True)

    # ------------------------------------------------------------------- runs

    def create_run(
        self,
        *,
        sequence_text: str,
        sequence_sha256: str,
        sequence_path: str,
        dut_label: str,
        snubber_label: str,
        bench_kind: str,
        instruments: Mapping[str, Any] | None = None,
        notes: str = "",
    ) -> int:
        """Record a new run in status "running" for this process; return its id."""
        with self.db.atomic():
            table = self.db["runs"].insert(
                {
                    "sequence_text": sequence_text,
                    "sequence_sha256": sequence_sha256,
                    "sequence_path": sequence_path,
                    "dut_label": dut_label,
                    "snubber_label": snubber_label,
                    "bench_kind": bench_kind,
                    "instruments": json.dumps(dict(instruments or {})),
                    "software_version": __version__,
                    "status": "running",
                    "started_at": _now_iso(),
                    "notes": notes,
                    **_owner(),
                    **_bench(instruments or {}),
                    "uuid": new_run_uuid(),
                }
            )
        return int(table.last_pk)

    def set_run_status(self, run_id: int, status: str, *, notes: str | None = None) -> None:
        """Set a run's status; any status but "running" also stamps its finish time."""
        self._require_run(run_id)
        updates: dict[str, Any] = {"status": status}
        updates["finished_at"] = None if status == "running" else _now_iso()
        if notes is not None:
            updates["notes"] = notes
        with self.db.atomic():
            self.db["runs"].update(run_id, updates)

    def rollback_unfinished(self) -> bool:
        """Roll back a transaction an exception left open; True if there was one.

        A signal raised from its handler can strike between a block's BEGIN and the start of its
        error handling, or just before its COMMIT: the transaction then stays open, every later
        write joins it, and all of them are lost when the process ends. The runner calls this
        once the sweep has ended, before it records anything more."""
        if not self.db.conn.in_transaction:
            return False
        self.db.conn.execute("ROLLBACK")
        return True

    def set_run_instruments(self, run_id: int, instruments: Mapping[str, Any]) -> None:
        """Record the identities of the instruments the run is using (on start and on resume),
        and so the bench it runs on: this host and those instruments."""
        self._require_run(run_id)
        with self.db.atomic():
            self.db["runs"].update(
                run_id, {"instruments": json.dumps(dict(instruments)), **_bench(instruments)}
            )

    def transaction(self) -> AbstractContextManager[Any]:
        """A block whose writes commit together (nested blocks become savepoints): one disk
        sync instead of one per write."""
        return self.db.atomic()

    def claim_run(self, run_id: int) -> None:
        """Mark a run "running" again, owned by this process (to resume it)."""
        self._require_run(run_id)
        with self.db.atomic():
            self.db["runs"].update(
                run_id,
                {
                    "status": "running",
                    "finished_at": None,
                    **_owner(),
                },
            )

    def runs(self) -> list[RunRecord]:
        """All runs, oldest first, with their point counts."""
        return [self._run_record(row) for row in self.db.query(_RUNS_QUERY + " ORDER BY r.id")]

    def run(self, run_id: int) -> RunRecord:
        """One run; :class:`UnknownRunError` if there is none with that id."""
        rows = list(self.db.query(_RUNS_QUERY + " WHERE r.id = ?", [run_id]))
        if not rows:
            raise self._unknown_run(run_id)
        return self._run_record(rows[0])

    def runs_by_uuid(self, prefix: str) -> list[RunRecord]:
        """The runs whose UUID starts with ``prefix`` (lower-case hex digits and dashes; the
        whole UUID finds one run), oldest first."""
        if not prefix or prefix.strip("0123456789abcdef-"):
            raise ValueError(f"UUID prefix {prefix!r}: lower-case hex digits and dashes only")
        # "~" sorts after every hex digit and dash: the range is the prefix's, on runs_uuid
        query = _RUNS_QUERY + " WHERE r.uuid >= ? AND r.uuid < ? ORDER BY r.id"
        return [self._run_record(row) for row in self.db.query(query, [prefix, prefix + "~"])]

    def import_run(self, source: Store, run_id: int) -> int:
        """Copy run ``run_id`` of the SQLite store ``source`` here with everything stored with
        it — its row (UUID and bench included), points, captures (their codes as stored, byte
        for byte), capture and point figures, node verdicts and events — in ONE transaction;
        return its id here (ids are this store's own). The caller makes sure the run's UUID is
        not here yet: the unique index refuses a second copy."""
        with self.db.atomic():
            new_run_id = self._copy_row("runs", source.run_row(run_id), id=None)
            points: dict[int, int] = {}
            for point in source.run_table_rows(run_id, "points"):
                points[point["id"]] = self._copy_row("points", point, id=None, run_id=new_run_id)
            captures: dict[int, int] = {}
            rows = source.run_table_rows(run_id, "captures")
            for capture in source.run_capture_codes(rows):
                captures[capture["id"]] = self._copy_row(
                    "captures",
                    capture,
                    id=None,
                    run_id=new_run_id,
                    point_id=points[capture["point_id"]],
                )
            for figures in source.run_table_rows(run_id, "capture_figures"):
                self._copy_row(
                    "capture_figures", figures, capture_id=captures[figures["capture_id"]]
                )
            for table in ("point_figures", "node_verdicts"):
                for row in source.run_table_rows(run_id, table):
                    self._copy_row(table, row, point_id=points[row["point_id"]])
            for event in source.run_table_rows(run_id, "events"):
                point_id = event["point_id"]
                self._copy_row(
                    "events",
                    event,
                    id=None,
                    run_id=new_run_id,
                    point_id=None if point_id is None else points[point_id],
                )
        return new_run_id

    def _copy_row(self, table: str, row: Mapping[str, Any], **changes: Any) -> int:
        """Insert ``row`` of another store into ``table`` (one of this module's names) with
        ``changes`` (an ``id`` of None: a new one here); return its rowid (where it has one)."""
        values = {**row, **changes}
        if values.get("id", 0) is None:
            del values["id"]
        return int(self.db[table].insert(values).last_rowid or 0)

    def mark_abandoned_runs(self) -> list[int]:
        """Mark "interrupted" the runs left "running" by a process of this host that is gone,
        and say so in each run's event log (a killed runner could not write it itself)."""
        host = socket.gethostname()
        abandoned = [run for run in self.runs() if run_abandoned(run)]
        for run in abandoned:
            self.set_run_status(run.id, "interrupted")
            self.log_event(
                run.id,
                "fault",
                f"run abandoned: its process {run.pid} on {host} ended without a clean exit "
                "(killed or crashed); the bench may have been left on",
            )
        return [run.id for run in abandoned]

    # ------------------------------------------------------------------- points

    def add_points(
        self,
        run_id: int,
        points: Iterable[tuple[float, float]],
        *,
        line_is_ac: bool,
        line_frequency_hz: float = 0.0,
    ) -> list[int]:
        """Add the run's grid, in order, as pending points; return their ids."""
        self._require_run(run_id)
        ids = []
        with self.db.atomic():
            start = self._next_index("points", "point_index", "run_id", run_id)
            for offset, (line_v, load_a) in enumerate(points):
                table = self.db["points"].insert(
                    {
                        "run_id": run_id,
                        "point_index": start + offset,
                        "line_v": float(line_v),
                        "line_is_ac": int(line_is_ac),
                        "line_frequency_hz": float(line_frequency_hz),
                        "load_a": float(load_a),
                        "status": "pending",
                    }
                )
                ids.append(int(table.last_pk))
        return ids

    def points(self, run_id: int, *, status: str | None = None) -> list[PointRecord]:
        """The run's points in grid order, optionally only those with ``status``."""
        self._require_run(run_id)
        where, params = "run_id = ?", [run_id]
        if status is not None:
            where, params = where + " AND status = ?", [run_id, status]
        rows = self.db["points"].rows_where(where, params, order_by="point_index")
        return [self._point_record(row) for row in rows]

    def pending_points(self, run_id: int) -> list[PointRecord]:
        """Points still to do (for a first pass or a resumed run)."""
        return self.points(run_id, status="pending")

    def point(self, point_id: int) -> PointRecord:
        """One point by id."""
        rows = list(self.db["points"].rows_where("id = ?", [point_id]))
        if not rows:
            raise StoreError(f"no point with id {point_id}")
        return self._point_record(rows[0])

    def commit_point(
        self,
        point_id: int,
        *,
        captures: Iterable[CaptureRecord] = (),
        readings: PointReadings | None = None,
        status: str | None = "done",
        started_at: float | None = None,
    ) -> list[int]:
        """Store a point's new captures and, unless ``status`` is None, its readings and status:
        the one way captures and a point's state are written, all in ONE transaction.

        The captures of one acquisition (one per node) go in together, so a point never holds
        part of an acquisition; the runner gives the point's state with its last acquisition.
        Either everything is stored or (on any error) nothing is. ``started_at`` (Unix time, s)
        is when the point began; the finish time is now. Returns the new capture ids.
        """
        if status is None and (readings is not None or started_at is not None):
            raise ValueError("readings and started_at are stored with a status")
        with self.db.atomic():
            ids = [self._insert_capture(point_id, capture) for capture in captures]
            if status is not None:
                self._update_point(point_id, status, readings, started_at)
        return ids

    def acquisitions(self, point_id: int) -> int:
        """How many acquisitions a point holds (distinct capture indices over its nodes)."""
        query = "SELECT COUNT(DISTINCT capture_index) FROM captures WHERE point_id = ?"
        return int(self.db.execute(query, [point_id]).fetchone()[0])

    def set_point_judgement(
        self,
        point_id: int,
        node_figures: Mapping[str, Mapping[str, Mapping[str, float | int | None]]],
        node_verdicts: Mapping[str, tuple[str, Iterable[str]]],
        verdict: str,
        reasons: Iterable[str],
    ) -> None:
        """Replace everything a point was judged on in one transaction — the one way a point's
        figures and verdicts are written: each node's figures (node → figure → {worst, mean,
        spread, n}) and verdict (node → (verdict, reasons)), and the point's combined verdict.
        Nodes not given lose their old figures and verdicts."""
        with self.db.atomic():
            self.db.execute("DELETE FROM point_figures WHERE point_id = ?", [point_id])
            self.db.execute("DELETE FROM node_verdicts WHERE point_id = ?", [point_id])
            for node, figures in node_figures.items():
                self._insert_point_figures(point_id, node, figures)
            self.db.conn.executemany(
                "INSERT INTO node_verdicts (point_id, node, verdict, verdict_reasons) "
                "VALUES (?, ?, ?, ?)",
                [
                    (point_id, node, node_verdict, json.dumps(list(node_reasons)))
                    for node, (node_verdict, node_reasons) in node_verdicts.items()
                ],
            )
            self.db.execute(
                "UPDATE points SET verdict = ?, verdict_reasons = ? WHERE id = ?",
                [verdict, json.dumps(list(reasons)), point_id],
            )

    def point_figures(self, run_id: int, *, node: str) -> dict[int, dict[str, dict[str, Any]]]:
        """One node's aggregated figures at every point of a run: point id → figure → {worst,
        mean, spread, n}."""
        return {
            point_id: nodes[node]
            for point_id, nodes in self.node_figures(run_id).items()
            if node in nodes
        }

    def node_figures(self, run_id: int) -> dict[int, dict[str, dict[str, dict[str, Any]]]]:
        """Aggregated figures of every node at every point: point id → node → figure → stats."""
        result: dict[int, dict[str, dict[str, dict[str, Any]]]] = {}
        query = (
            "SELECT f.* FROM point_figures f JOIN points p ON p.id = f.point_id "
            "WHERE p.run_id = ? ORDER BY p.point_index, f.node, f.figure"
        )
        for row in self.db.query(query, [run_id]):
            values = {key: row[key] for key in ("worst", "mean", "spread", "n")}
            nodes = result.setdefault(row["point_id"], {})
            nodes.setdefault(row["node"], {})[row["figure"]] = values
        return result

    def node_verdicts(self, run_id: int) -> dict[int, dict[str, tuple[str, list[str]]]]:
        """Each node's verdict at every judged point: point id → node → (verdict, reasons)."""
        query = (
            "SELECT v.* FROM node_verdicts v JOIN points p ON p.id = v.point_id "
            "WHERE p.run_id = ? ORDER BY p.point_index, v.node"
        )
        result: dict[int, dict[str, tuple[str, list[str]]]] = {}
        for row in self.db.query(query, [run_id]):
            where = f"point {row['point_id']}'s {row['node']} verdict reasons"
            reasons = _json_field(row["verdict_reasons"], where, self.path)
            result.setdefault(row["point_id"], {})[row["node"]] = (row["verdict"], reasons)
        return result

    def node_names(self, run_id: int) -> list[str]:
        """The nodes a run captured, in order of first capture (the primary first)."""
        query = "SELECT node, MIN(id) AS first FROM captures WHERE run_id = ? GROUP BY node"
        rows = sorted(self.db.query(query, [run_id]), key=lambda row: row["first"])
        return [row["node"] for row in rows]

    # ------------------------------------------------------------------- captures

    def captures(
        self, point_id: int, *, with_codes: bool = True, node: str | None = None
    ) -> list[StoredCapture]:
        """A point's captures in order (of one ``node``, or of all); ``with_codes=False`` leaves
        the BLOBs unread."""
        if node is None:
            return list(self._iter_captures("c.point_id = ?", [point_id], with_codes))
        where = "c.point_id = ? AND c.node = ?"
        return list(self._iter_captures(where, [point_id, node], with_codes))

    def iter_captures(
        self, run_id: int, *, with_codes: bool = True, only_unanalysed: bool = False
    ) -> Iterator[StoredCapture]:
        """A run's captures in point and capture order, their codes read one capture at a time;
        ``only_unanalysed`` keeps those that have no stored figures yet."""
        self._require_run(run_id)
        return self._iter_captures(
            "c.run_id = ?", [run_id], with_codes, only_unanalysed=only_unanalysed
        )

    def set_capture_figures(
        self,
        capture_id: int,
        figures: Mapping[str, Any],
        *,
        edges: Iterable[Mapping[str, Any]] = (),
        error: str | None = None,
    ) -> None:
        """Store one capture's figures (those of its worst edge), its edges and any analysis
        error. ``figures`` uses the analysis' names; unknown names are a programming error."""
        allowed = {*CAPTURE_FIGURES, *CAPTURE_METHODS, "clipped"}
        unknown = sorted(set(figures) - allowed)
        if unknown:
            raise ValueError(f"unknown capture figures {unknown}; known: {sorted(allowed)}")
        edges = list(edges)
        record: dict[str, Any] = {"capture_id": capture_id, **figures}
        if "clipped" in record and record["clipped"] is not None:
            record["clipped"] = int(bool(record["clipped"]))
        edges_json = _edges_json(edges) if edges else None
        record.update(edge_count=len(edges), error=error, edges_json=edges_json)
        with self.db.atomic():
            self.db["capture_figures"].insert(record, replace=True)

    def capture_methods(self, run_id: int, name: str) -> dict[tuple[str, int], tuple[str, ...]]:
        """The distinct values of the capture method ``name`` (one of ``CAPTURE_METHODS``, e.g.
        how the snubber loss was obtained) at each (node, point id) of a run."""
        if name not in CAPTURE_METHODS:
            raise ValueError(f"unknown capture method {name!r}; known: {CAPTURE_METHODS}")
        rows = self.db.execute(
            f"SELECT DISTINCT c.node, c.point_id, f.{name} FROM captures c "
            "JOIN capture_figures f ON f.capture_id = c.id "
            f"WHERE c.run_id = ? AND f.{name} IS NOT NULL ORDER BY f.{name}",
            [run_id],
        ).fetchall()
        methods: dict[tuple[str, int], tuple[str, ...]] = {}
        for node, point_id, value in rows:
            methods[(node, point_id)] = (*methods.get((node, point_id), ()), value)
        return methods

    def clipped_points(self, run_id: int) -> set[tuple[str, int]]:
        """The (node, point id)s of a run where at least one capture clipped."""
        rows = self.db.execute(
            "SELECT DISTINCT c.node, c.point_id FROM captures c "
            "JOIN capture_figures f ON f.capture_id = c.id "
            "WHERE c.run_id = ? AND f.clipped = 1",
            [run_id],
        ).fetchall()
        return {(node, point_id) for node, point_id in rows}

    def capture_figures(self, capture_id: int) -> dict[str, Any] | None:
        """The stored figures of one capture (edges decoded), or None before analysis."""
        rows = list(self.db["capture_figures"].rows_where("capture_id = ?", [capture_id]))
        if not rows:
            return None
        result = dict(rows[0])
        result["edges"] = self._edges(capture_id, result.pop("edges_json"))
        return result

    # ------------------------------------------------------------------- events

    def log_event(
        self,
        run_id: int,
        kind: str,
        message: str,
        *,
        point_id: int | None = None,
        data: Mapping[str, Any] | None = None,
    ) -> int:
        """Record something that happened during a run (its own transaction); return its id."""
        with self.db.atomic():
            table = self.db["events"].insert(
                {
                    "run_id": run_id,
                    "point_id": point_id,
                    "time": _now_iso(),
                    "kind": kind,
                    "message": message,
                    "data": None if data is None else json.dumps(dict(data), separators=(",", ":")),
                }
            )
        return int(table.last_pk)

    def events(self, run_id: int) -> list[dict[str, Any]]:
        """A run's events in order, ``data`` decoded."""
        rows = self.db["events"].rows_where("run_id = ?", [run_id], order_by="id")
        return [
            {**row, "data": _json_field(row["data"], f"event {row['id']}'s data", self.path)}
            for row in rows
        ]

    def last_safety_check(self, run_id: int) -> str | None:
        """What the latest making-safe of the run's bench confirmed: the one-line summary the
        runner logged (without its "end of run: " heading), or None if none is recorded."""
        rows = self.db.query(
            "SELECT message, json_extract(data, '$.when') AS heading FROM events "
            "WHERE run_id = ? AND kind = 'safety' AND json_extract(data, '$.safe') IS NOT NULL "
            "ORDER BY id DESC LIMIT 1",
            [run_id],
        )
        return next((row["message"].removeprefix(f"{row['heading']}: ") for row in rows), None)

    # ------------------------------------------------------------------- maintenance

    def integrity_check(self) -> str:
        """SQLite's own check of the file: "ok" when sound."""
        return "; ".join(row[0] for row in self.db.execute("PRAGMA integrity_check").fetchall())

    def checkpoint(self) -> None:
        """Fold the write-ahead log into the main file and empty it."""
        self.db.execute("PRAGMA wal_checkpoint(TRUNCATE)")

    # ------------------------------------------------------------------- internals

    def _insert_capture(self, point_id: int, capture: CaptureRecord) -> int:
        waveform = capture.waveform
        blob, dtype, count = _codes_blob(waveform.codes)
        codec = self.codec
        if codec == "zstd":
            packed = self._compressor.compress(blob)
            # codes that do not compress (float32 noise) are kept raw rather than grown
            blob, codec = (packed, codec) if len(packed) < len(blob) else (blob, "raw")
        rows = list(self.db.query("SELECT run_id FROM points WHERE id = ?", [point_id]))
        if not rows:
            raise StoreError(f"no point with id {point_id}")
        capture_index = self.db.execute(
            "SELECT COALESCE(MAX(capture_index) + 1, 0) FROM captures "
            "WHERE point_id = ? AND node = ?",
            [point_id, capture.node],
        ).fetchone()[0]
        # plain SQL on this hot path: sqlite-utils would read the schema again for every row
        cursor = self.db.execute(
            "INSERT INTO captures (point_id, run_id, capture_index, node, channel, dtype, "
            "x_increment_s, x_origin_s, y_increment_v, y_origin_v, y_reference, code_min, "
            "code_max, points, captured_at, codes, codec) "
            "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
            [
                point_id,
                rows[0]["run_id"],
                int(capture_index),
                capture.node,
                int(capture.channel),
                dtype,
                float(waveform.x_increment_s),
                float(waveform.x_origin_s),
                float(waveform.y_increment_v),
                float(waveform.y_origin_v),
                float(waveform.y_reference),
                waveform.code_min,
                waveform.code_max,
                count,
                _now_iso(capture.captured_at),
                blob,
                codec,
            ],
        )
        return int(cursor.lastrowid)

    def _update_point(
        self,
        point_id: int,
        status: str,
        readings: PointReadings | None,
        started_at: float | None,
    ) -> None:
        finished = time.time()
        updates: dict[str, Any] = {"status": status, "finished_at": _now_iso(finished)}
        if started_at is not None:
            updates.update(started_at=_now_iso(started_at), duration_s=finished - started_at)
        if readings is not None:
            updates.update({f.name: getattr(readings, f.name) for f in fields(PointReadings)})
        cursor = self.db.execute(
            "UPDATE points SET "
            + ", ".join(f"{name} = ?" for name in updates)  # names from this module only
            + " WHERE id = ?",
            [*updates.values(), point_id],
        )
        if cursor.rowcount != 1:
            raise StoreError(f"no point with id {point_id}")

    def _insert_point_figures(
        self, point_id: int, node: str, figures: Mapping[str, Mapping[str, float | int | None]]
    ) -> None:
        rows = [
            {
                "point_id": point_id,
                "node": node,
                "figure": name,
                "worst": values.get("worst"),
                "mean": values.get("mean"),
                "spread": values.get("spread"),
                "n": int(values.get("n") or 0),
            }
            for name, values in figures.items()
        ]
        if rows:
            self.db["point_figures"].insert_all(rows)

    def _next_index(self, table: str, column: str, parent: str, parent_id: int) -> int:
        # table and column names are this module's constants; the id is a parameter
        query = f"SELECT COALESCE(MAX({column}) + 1, 0) FROM {table} WHERE {parent} = ?"
        return int(self.db.execute(query, [parent_id]).fetchone()[0])

    def _iter_captures(
        self, where: str, params: list[Any], with_codes: bool, *, only_unanalysed: bool = False
    ) -> Iterator[StoredCapture]:
        """Captures matching ``where`` in point and capture order (``only_unanalysed``: those
        without stored figures). The rows are sorted without their codes, then each capture's
        codes are read by id: sorting rows that carry the codes would copy every waveform
        through a temporary B-tree, spilling to a temporary file as large as the run."""
        joins = " JOIN points p ON p.id = c.point_id"
        if only_unanalysed:
            joins += " LEFT JOIN capture_figures f ON f.capture_id = c.id"
            where += " AND f.capture_id IS NULL"
        query = (
            f"SELECT {', '.join('c.' + name for name in _CAPTURE_COLUMNS)}, c.dtype, c.points"
            f" FROM captures c{joins} WHERE {where}"
            " ORDER BY p.point_index, c.capture_index, c.id"
        )
        for row in self.db.execute(query, params).fetchall():
            dtype = np.dtype(row["dtype"]).newbyteorder("<")
            if with_codes:
                codes = self._codes(row["id"], dtype, row["points"])
            else:
                codes = np.empty(0, dtype)
            yield _record(StoredCapture, row, codes=codes)

    def _codes(self, capture_id: int, dtype: np.dtype, count: int) -> np.ndarray:
        """One capture's codes as stored (read-only, little-endian), decoded by its codec."""
        query = "SELECT codes, codec FROM captures WHERE id = ?"
        blob, codec = self.db.execute(query, [capture_id]).fetchone()
        try:
            return decode_codes(blob, codec, dtype, count, self._decompressor)
        except ValueError as exc:
            raise StoreError(f"{self.path}: capture {capture_id} is damaged: {exc}") from None

    def _edges(self, capture_id: int, text: str | None) -> list[dict[str, Any]]:
        return _edges_of(capture_id, text, self.path)

    def _require_run(self, run_id: int) -> None:
        if not list(self.db.query("SELECT 1 FROM runs WHERE id = ?", [run_id])):
            raise self._unknown_run(run_id)

    def _unknown_run(self, run_id: int) -> UnknownRunError:
        ids = [str(row["id"]) for row in self.db.query("SELECT id FROM runs ORDER BY id")]
        known = f"runs in this store: {', '.join(ids)}" if ids else "this store holds no runs"
        return UnknownRunError(f"{self.path}: no run {run_id}; {known}")

    def _run_record(self, row: Mapping[str, Any]) -> RunRecord:
        return _run_record_of(row, self.path)

    def _point_record(self, row: Mapping[str, Any]) -> PointRecord:
        return _point_record_of(row, self.path)

    # ------------------------------------------------------------------- copying a run out

    def run_row(self, run_id: int) -> dict[str, Any]:
        """A run's row as stored (columns by name), to copy it into another database."""
        self._require_run(run_id)
        return dict(self.db.execute("SELECT * FROM runs WHERE id = ?", [run_id]).fetchone())

    def run_table_rows(self, run_id: int, table: str) -> list[dict[str, Any]]:
        """A run's rows of ``table`` as stored, in id order (captures without their codes: see
        :meth:`run_capture_codes`), to copy them into another database."""
        if table == "points":
            return self._table_rows("SELECT * FROM points WHERE run_id = ? ORDER BY id", run_id)
        if table == "captures":
            return self._table_rows(
                f"SELECT {', '.join(_STORED_CAPTURE_COLUMNS)} FROM captures "
                "WHERE run_id = ? ORDER BY id",
                run_id,
            )
        if table == "capture_figures":
            return self._table_rows(
                "SELECT f.* FROM capture_figures f JOIN captures c ON c.id = f.capture_id "
                "WHERE c.run_id = ? ORDER BY f.capture_id",
                run_id,
            )
        if table == "point_figures":
            return self._table_rows(
                "SELECT f.* FROM point_figures f JOIN points p ON p.id = f.point_id "
                "WHERE p.run_id = ? ORDER BY f.point_id, f.node, f.figure",
                run_id,
            )
        if table == "node_verdicts":
            return self._table_rows(
                "SELECT v.* FROM node_verdicts v JOIN points p ON p.id = v.point_id "
                "WHERE p.run_id = ? ORDER BY v.point_id, v.node",
                run_id,
            )
        if table == "events":
            return self._table_rows("SELECT * FROM events WHERE run_id = ? ORDER BY id", run_id)
        raise ValueError(f"no table {table!r} of a run's rows")

    def run_capture_codes(self, capture_rows: Iterable[Mapping[str, Any]]) -> Iterator[dict]:
        """Each of these capture rows (from :meth:`run_table_rows`) with its codes as stored
        (compressed or not, as its codec says), read one capture at a time."""
        for row in capture_rows:
            codes = self.db.execute("SELECT codes FROM captures WHERE id = ?", [row["id"]])
            yield {**row, "codes": codes.fetchone()[0]}

    def _table_rows(self, query: str, run_id: int) -> list[dict[str, Any]]:
        return [dict(row) for row in self.db.execute(query, [run_id]).fetchall()]


_RUNS_QUERY = """
SELECT r.*,
    (SELECT COUNT(*) FROM points p WHERE p.run_id = r.id) AS points_total,
    (SELECT COUNT(*) FROM points p WHERE p.run_id = r.id AND p.status = 'done') AS points_done
FROM runs r"""


def _bench(instruments: Mapping[str, Any]) -> dict[str, str]:
    """The columns that name the bench a run is on: this host and ``instruments``."""
    host = socket.gethostname()
    return {"bench_host": host, "bench_id": bench_identity(host, instruments)}


def run_abandoned(run: RunRecord) -> bool:
    """Whether ``run`` is recorded as running by a process of this host that is gone (killed,
    crashed, or its store failed under it): it is in truth interrupted."""
    return (
        run.status == "running"
        and run.host == socket.gethostname()
        and not process_alive(run.pid, run.process_started)
    )


def shown_status(run: RunRecord) -> str:
    """The run's status as it truly is: "interrupted" for a run recorded as running whose
    process has died, else the recorded status (read-only: nothing is written)."""
    return "interrupted" if run_abandoned(run) else run.status


def _owner() -> dict[str, Any]:
    """The columns that name this process as a run's owner: id, host and start time (the id
    alone could be another process's after the owner died)."""
    return {
        "pid": os.getpid(),
        "host": socket.gethostname(),
        "process_started": process_start_time(os.getpid()),
    }
