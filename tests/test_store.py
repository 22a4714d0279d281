"""The SQLite store: raw codes round-trip byte for byte (compressed or not), a point commits in
one transaction, files that are not ours or too new are refused untouched, older files are
upgraded without losing anything, and exports hold what was stored."""

from __future__ import annotations

import csv
import json
import sqlite3
import subprocess
import sys
import textwrap
from collections import Counter
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest
import zstandard
from sweeps import run_cli

from labseq.store import (
    CODECS,
    PAGE_SIZE,
    SCHEMA_VERSION,
    CaptureRecord,
    PointReadings,
    Store,
    StoreError,
    StoreFileError,
    UnknownRunError,
)

ROOT = Path(__file__).resolve().parent.parent


@dataclass
class Capture:
    """A scope record as a driver hands it over: raw codes plus scaling."""

    codes: np.ndarray
    x_increment_s: float = 1e-9
    x_origin_s: float = -2e-6
    y_increment_v: float = 250.0 / 256
    y_origin_v: float = 100.0
    y_reference: float = 0.0
    code_min: float | None = -128
    code_max: float | None = 127


def ringing_codes(samples: int = 2000, seed: int = 0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    t_s = np.arange(samples) * 1e-9
    volts = 60.0 * np.exp(-t_s / 200e-9) * np.sin(2 * np.pi * 20e6 * t_s) + rng.normal(
        0, 1, samples
    )
    return np.clip(np.round(volts / (250.0 / 256)), -128, 127).astype(np.int8)


def new_run(store: Store, points: int = 4) -> tuple[int, list[int]]:
    run_id = store.create_run(
        sequence_text='name = "t"\n',
        sequence_sha256="ab" * 32,
        sequence_path="t.toml",
        dut_label="DUT",
        snubber_label="RC",
        bench_kind="sim",
        instruments={"scope": "SIM,SCOPE,0,1"},
    )
    grid = [(36.0 + 12 * (i // 2), 0.5 * (1 + i % 2)) for i in range(points)]
    return run_id, store.add_points(run_id, grid, line_is_ac=False)


@pytest.fixture
def db(tmp_path: Path) -> Path:
    return tmp_path / "store.sqlite"


# --------------------------------------------------------------------------- captures


@pytest.mark.parametrize(
    "codes",
    [
        ringing_codes(),
        (ringing_codes().astype(np.int16) * 256 + 17).astype(">i2"),  # big-endian as sent
        np.linspace(-1, 1, 500, dtype=np.float32),
    ],
    ids=["int8", "int16-big-endian", "float32"],
)
@pytest.mark.parametrize("codec", CODECS)
def test_capture_round_trip(db: Path, codes: np.ndarray, codec: str) -> None:
    with Store(db, codec=codec) as store:
        run_id, points = new_run(store)
        [capture_id] = store.commit_point(
            points[0], captures=[CaptureRecord(Capture(codes), node="primary", channel=2)]
        )
    with Store(db, create=False) as store:
        [stored] = store.captures(points[0])
        [(stored_codec, blob)] = store.db.execute("SELECT codec, codes FROM captures").fetchall()
    assert stored_codec == codec
    if codec == "zstd":  # one standard Zstandard frame (RFC 8878) any zstd tool can read
        assert zstandard.ZstdDecompressor().decompress(blob) == stored.codes.tobytes()
        assert len(blob) < stored.codes.nbytes
    assert stored.id == capture_id and stored.channel == 2 and stored.node == "primary"
    assert stored.codes.dtype.name == codes.dtype.name  # the dtype as sent, never float64
    assert stored.codes.tobytes() == codes.astype(codes.dtype.newbyteorder("<")).tobytes()
    assert np.array_equal(stored.codes, codes)
    # Scaling convention of the scope's waveform preamble: volts = (code − ref) × inc + origin,
    # t = origin + i × increment (common practice, no published source).
    expected_v = (codes.astype(float) - 0.0) * (250.0 / 256) + 100.0
    assert np.array_equal(stored.volts(), expected_v)
    assert stored.time_s()[0] == -2e-6 and stored.time_s()[1] == pytest.approx(-2e-6 + 1e-9)


def test_codes_that_do_not_compress_are_stored_raw(db: Path) -> None:
    noise = np.random.default_rng(3).integers(-128, 128, 5000).astype(np.int8)
    with Store(db) as store:
        _, points = new_run(store)
        store.commit_point(points[0], captures=[CaptureRecord(Capture(noise), node="primary")])
        row = store.db.execute("SELECT codec, length(codes) FROM captures").fetchone()
        assert tuple(row) == ("raw", 5000)
        assert np.array_equal(store.captures(points[0])[0].codes, noise)
    with pytest.raises(ValueError, match="codec 'lz4': give one of raw, zstd"):
        Store(db, codec="lz4")


@pytest.mark.parametrize("codec", CODECS)
def test_damaged_codes_are_a_clear_error(db: Path, codec: str) -> None:
    with Store(db, codec=codec) as store:
        run_id, points = new_run(store)
        [capture_id] = store.commit_point(
            points[0], captures=[CaptureRecord(Capture(ringing_codes()), node="primary")]
        )
        store.db.execute("UPDATE captures SET codes = substr(codes, 1, 100)")
        with pytest.raises(StoreError, match=f"capture {capture_id} is damaged"):
            store.captures(points[0])
        assert len(store.captures(points[0], with_codes=False)) == 1
    code, _, err = run_cli("export", str(run_id), "--db", str(db), "--out", str(db.parent / "x"))
    assert code == 3 and "is damaged" in err and str(db) in err and "Traceback" not in err


def test_float64_codes_refused(db: Path) -> None:
    with Store(db) as store:
        _, points = new_run(store)
        with pytest.raises(ValueError, match="float64"):
            store.commit_point(
                points[0], captures=[CaptureRecord(Capture(np.zeros(10)), node="primary")]
            )
        assert store.captures(points[0]) == []


def test_clipped_capture_flagged(db: Path) -> None:
    codes = ringing_codes()
    codes[100] = 127
    with Store(db) as store:
        _, points = new_run(store)
        store.commit_point(points[0], captures=[CaptureRecord(Capture(codes), node="primary")])
        assert store.captures(points[0])[0].clipped
        codes[100] = 0
        codes[codes == -128] = -127
        store.commit_point(points[1], captures=[CaptureRecord(Capture(codes), node="primary")])
        assert not store.captures(points[1])[0].clipped


# --------------------------------------------------------------------------- transactions


def test_commit_point_is_one_transaction(db: Path) -> None:
    good = CaptureRecord(Capture(ringing_codes()), node="primary")
    bad = CaptureRecord(
        Capture(np.zeros(10)), node="primary"
    )  # float64: refused after the first is written
    with Store(db) as store:
        _, points = new_run(store)
        with pytest.raises(ValueError):
            store.commit_point(points[0], captures=[good, bad], readings=PointReadings(1.0))
        # A point state the schema refuses, after both captures went in.
        with pytest.raises(sqlite3.IntegrityError):
            store.commit_point(points[0], captures=[good, good], status="half-done")
        assert store.captures(points[0]) == []
        point = store.point(points[0])
        assert point.status == "pending" and point.source_voltage_v is None
        assert store.integrity_check() == "ok"


def test_process_killed_mid_commit_leaves_nothing_half_written(db: Path) -> None:
    with Store(db) as store:
        _, points = new_run(store)
    script = textwrap.dedent(
        f"""
        import os, numpy as np
        from labseq.store import Store, CaptureRecord
        from labseq_instruments import Waveform
        codes = np.arange(-128, 128, dtype=np.int8)
        wf = Waveform(codes, 1e-9, 0.0, 1.0, 0.0, 0.0, -128, 127)
        store = Store({str(db)!r})
        Store._update_point = lambda *args: os._exit(3)  # dies after the captures are written
        record = CaptureRecord(wf, node="primary")
        store.commit_point({points[0]}, captures=[record, record])
        """
    )
    result = subprocess.run([sys.executable, "-c", script], cwd=ROOT, timeout=60)
    assert result.returncode == 3
    with Store(db) as store:
        assert store.captures(points[0]) == []
        assert [p.id for p in store.pending_points(store.runs()[0].id)] == points
        assert store.integrity_check() == "ok"


def test_captures_set_point_state_with_the_last(db: Path) -> None:
    with Store(db) as store:
        run_id, points = new_run(store)
        record = CaptureRecord(Capture(ringing_codes()), node="primary")
        store.commit_point(points[0], captures=[record], status=None)
        assert store.point(points[0]).status == "pending"
        with pytest.raises(ValueError, match="stored with a status"):
            store.commit_point(points[0], readings=PointReadings(), status=None)
        readings = PointReadings(meter_power_w=31.5, efficiency=0.87)
        store.commit_point(points[0], captures=[record], readings=readings)
        point = store.point(points[0])
        assert point.status == "done" and point.meter_power_w == 31.5
        assert [c.capture_index for c in store.captures(points[0])] == [0, 1]
        assert [p.id for p in store.pending_points(run_id)] == points[1:]
        assert store.run(run_id).points_done == 1


def test_references_checked(db: Path) -> None:
    with Store(db) as store:
        with pytest.raises(UnknownRunError):
            store.add_points(99, [(1.0, 1.0)], line_is_ac=False)
        with pytest.raises(StoreError):
            store.commit_point(
                12345, captures=[CaptureRecord(Capture(ringing_codes()), node="primary")]
            )
        with pytest.raises(sqlite3.IntegrityError):  # foreign keys are on
            store.log_event(77, "info", "no such run")


# --------------------------------------------------------------------------- figures, events


def test_figures_and_events_round_trip(db: Path) -> None:
    with Store(db) as store:
        run_id, points = new_run(store)
        [capture_id] = store.commit_point(
            points[0], captures=[CaptureRecord(Capture(ringing_codes()), node="primary")]
        )
        edges = [{"peak_v": 151.2, "edge_time_s": 1e-7}, {"peak_v": 149.0, "edge_time_s": 5.1e-6}]
        figures = {"peak_v": 151.2, "damping_ratio": 0.12, "snubber_loss_method": "waveform"}
        store.set_capture_figures(capture_id, {**figures, "clipped": False}, edges=edges)
        stored = store.capture_figures(capture_id)
        assert {k: stored[k] for k in figures} == figures
        assert stored["edges"] == edges and stored["edge_count"] == 2 and stored["clipped"] == 0
        with pytest.raises(ValueError, match="peak"):
            store.set_capture_figures(capture_id, {"peak": 1.0})
        reasons = ["peak 151 V > 120 V"]
        store.set_point_judgement(
            points[0],
            {"primary": {"peak_v": {"worst": 151.2, "mean": 150.0, "spread": 0.8, "n": 3}}},
            {"primary": ("fail", reasons)},
            "fail",
            reasons,
        )
        assert store.point_figures(run_id, node="primary")[points[0]]["peak_v"]["worst"] == 151.2
        assert store.point(points[0]).verdict_reasons == ["peak 151 V > 120 V"]
        assert store.node_verdicts(run_id)[points[0]] == {"primary": ("fail", reasons)}
        store.log_event(run_id, "retry", "scope timeout", point_id=points[0], data={"try": 2})
        [event] = store.events(run_id)
        assert event["kind"] == "retry" and event["data"] == {"try": 2}
        with pytest.raises(sqlite3.IntegrityError):
            store.log_event(run_id, "gossip", "not a known kind")


def test_runs_status_and_abandoned(db: Path) -> None:
    script = textwrap.dedent(
        f"""
        from labseq.store import Store
        with Store({str(db)!r}) as store:
            store.create_run(sequence_text="", sequence_sha256="", sequence_path="x",
                             dut_label="d", snubber_label="s", bench_kind="sim")
        """
    )
    subprocess.run([sys.executable, "-c", script], cwd=ROOT, timeout=60, check=True)
    with Store(db) as store:
        mine, _ = new_run(store)
        assert store.mark_abandoned_runs() == [1]  # its process has exited
        assert store.run(1).status == "interrupted" and store.run(1).finished_at
        assert store.run(mine).status == "running"  # this process is alive
        store.set_run_status(mine, "finished")
        assert [run.status for run in store.runs()] == ["interrupted", "finished"]


def test_iter_captures_reads_one_at_a_time(db: Path) -> None:
    with Store(db) as store:
        run_id, points = new_run(store)
        for point_id in points:
            store.commit_point(
                point_id,
                captures=[CaptureRecord(Capture(ringing_codes(seed=point_id)), node="primary")] * 2,
            )
        iterator = store.iter_captures(run_id)
        first = next(iterator)
        assert first.point_id == points[0] and first.capture_index == 0
        assert len(list(iterator)) == 2 * len(points) - 1
        headers = store.captures(points[1], with_codes=False)
        assert [h.codes.size for h in headers] == [0, 0]


def test_captures_read_in_grid_order_whatever_order_they_were_stored(db: Path) -> None:
    with Store(db) as store:
        run_id, points = new_run(store)
        for point_id in reversed(points):  # e.g. a resumed run filling points in any order
            records = [
                CaptureRecord(Capture(ringing_codes(seed=10 * point_id + k)), node="primary")
                for k in (0, 1)
            ]
            store.commit_point(point_id, captures=records)
        order = [(c.point_id, c.capture_index) for c in store.iter_captures(run_id)]
        assert order == [(point_id, k) for point_id in points for k in (0, 1)]
        for capture in store.iter_captures(run_id):
            expected = ringing_codes(seed=10 * capture.point_id + capture.capture_index)
            assert np.array_equal(capture.codes, expected)


def test_only_unanalysed_captures(db: Path) -> None:
    with Store(db) as store:
        run_id, points = new_run(store, points=2)
        ids = [
            capture_id
            for point_id in points
            for capture_id in store.commit_point(
                point_id, captures=[CaptureRecord(Capture(ringing_codes()), node="primary")] * 2
            )
        ]
        store.set_capture_figures(ids[0], {"peak_v": 150.0})
        store.set_capture_figures(ids[2], {}, error="no edge found")  # analysed, with an error
        missing = list(store.iter_captures(run_id, only_unanalysed=True))
        assert [c.id for c in missing] == [ids[1], ids[3]]
        assert all(np.array_equal(c.codes, ringing_codes()) for c in missing)


# --------------------------------------------------------------------------- opening files


def test_newer_schema_refused_and_file_unchanged(db: Path) -> None:
    with Store(db) as store:
        new_run(store)
    conn = sqlite3.connect(db)
    conn.execute("UPDATE schema_info SET version = ?", [SCHEMA_VERSION + 1])
    conn.commit()
    conn.close()
    before = db.read_bytes()
    with pytest.raises(StoreFileError, match="newer labseq") as info:
        Store(db)
    assert "not changed" in str(info.value)
    assert db.read_bytes() == before
    code, _, err = run_cli("runs", "--db", str(db))
    assert code == 2 and "newer labseq" in err
    assert db.read_bytes() == before


#: The version-2 tables as labseq wrote them (codes always raw, no codec column).
SCHEMA_V2 = """
CREATE TABLE schema_info ( version INTEGER NOT NULL, application TEXT NOT NULL, created_by TEXT NOT
    NULL, created_at TEXT NOT NULL );
CREATE TABLE runs ( id INTEGER PRIMARY KEY, sequence_text TEXT NOT NULL, sequence_sha256 TEXT NOT
    NULL, sequence_path TEXT NOT NULL, dut_label TEXT NOT NULL, snubber_label TEXT NOT NULL,
    bench_kind TEXT NOT NULL, instruments TEXT NOT NULL DEFAULT '{}', software_version TEXT NOT
    NULL, status TEXT NOT NULL CHECK (status IN ('running', 'finished', 'aborted', 'interrupted',
    'failed')), started_at TEXT NOT NULL, finished_at TEXT, notes TEXT NOT NULL DEFAULT '', pid
    INTEGER, host TEXT );
CREATE TABLE points ( id INTEGER PRIMARY KEY, run_id INTEGER NOT NULL REFERENCES runs(id),
    point_index INTEGER NOT NULL, line_v REAL NOT NULL, line_is_ac INTEGER NOT NULL,
    line_frequency_hz REAL NOT NULL, load_a REAL NOT NULL, status TEXT NOT NULL DEFAULT 'pending'
    CHECK (status IN ('pending', 'done', 'failed', 'skipped')), source_voltage_v REAL,
    source_current_a REAL, load_voltage_v REAL, load_current_a REAL, meter_voltage_v REAL,
    meter_current_a REAL, meter_power_w REAL, meter_power_factor REAL, output_power_w REAL,
    efficiency REAL, verdict TEXT CHECK (verdict IS NULL OR verdict IN ('pass', 'fail',
    'incomplete')), verdict_reasons TEXT, started_at TEXT, finished_at TEXT, duration_s REAL,
    UNIQUE (run_id, point_index) );
CREATE TABLE captures ( id INTEGER PRIMARY KEY, point_id INTEGER NOT NULL REFERENCES points(id),
    run_id INTEGER NOT NULL REFERENCES runs(id), capture_index INTEGER NOT NULL, node TEXT NOT NULL
    DEFAULT 'primary', channel INTEGER NOT NULL, dtype TEXT NOT NULL CHECK (dtype IN ('int8',
    'int16', 'float32')), x_increment_s REAL NOT NULL, x_origin_s REAL NOT NULL, y_increment_v
    REAL NOT NULL, y_origin_v REAL NOT NULL, y_reference REAL NOT NULL, code_min REAL, code_max
    REAL, points INTEGER NOT NULL, captured_at TEXT NOT NULL, codes BLOB NOT NULL, UNIQUE
    (point_id, node, capture_index) );
CREATE TABLE capture_figures ( capture_id INTEGER PRIMARY KEY REFERENCES captures(id), base_v REAL,
    plateau_v REAL, peak_v REAL, overshoot_v REAL, overshoot_pct REAL, rise_time_s REAL,
    edge_time_s REAL, ring_frequency_hz REAL, decay_rate_per_s REAL, damping_ratio REAL, q_factor
    REAL, fit_quality REAL, settling_time_s REAL, snubber_loss_w REAL, stress_margin_v REAL,
    clamp_level_v REAL, clamp_loss_w REAL, snubber_loss_method TEXT, clamp_loss_method TEXT,
    clipped INTEGER, edge_count INTEGER, error TEXT, edges_json TEXT );
CREATE TABLE point_figures ( point_id INTEGER NOT NULL REFERENCES points(id), node TEXT NOT NULL
    DEFAULT 'primary', figure TEXT NOT NULL, worst REAL, mean REAL, spread REAL, n INTEGER NOT
    NULL, PRIMARY KEY (point_id, node, figure) ) WITHOUT ROWID;
CREATE TABLE node_verdicts ( point_id INTEGER NOT NULL REFERENCES points(id), node TEXT NOT NULL,
    verdict TEXT NOT NULL CHECK (verdict IN ('pass', 'fail', 'incomplete')), verdict_reasons TEXT
    NOT NULL, PRIMARY KEY (point_id, node) ) WITHOUT ROWID;
CREATE TABLE events ( id INTEGER PRIMARY KEY, run_id INTEGER NOT NULL REFERENCES runs(id), point_id
    INTEGER REFERENCES points(id), time TEXT NOT NULL, kind TEXT NOT NULL CHECK (kind IN ('info',
    'scpi-error', 'retry', 'skip', 'fault', 'timing', 'safety')), message TEXT NOT NULL, data TEXT
    );
INSERT INTO schema_info VALUES (2, 'labseq', '0.1.0', '2025-03-01T08:00:00.000+00:00');
INSERT INTO runs (id, sequence_text, sequence_sha256, sequence_path, dut_label, snubber_label,
    bench_kind, software_version, status, started_at, finished_at) VALUES (1, 'name = "t"', '',
    't.toml', 'dut', 'rc', 'sim', '0.1.0', 'finished', '2025-03-01', '2025-03-01');
INSERT INTO points (id, run_id, point_index, line_v, line_is_ac, line_frequency_hz, load_a, status,
    verdict, verdict_reasons) VALUES (1, 1, 0, 48.0, 0, 0.0, 1.1, 'done', 'pass', '[]'),
    (2, 1, 1, 60.0, 0, 0.0, 1.1, 'done', 'fail', '["secondary: peak"]');
INSERT INTO capture_figures (capture_id, peak_v, edge_count, edges_json) VALUES
    (1, 101.0, 1, '{"names":["peak_v"],"rows":[[101.0]]}'), (3, 140.5, 0, NULL);
INSERT INTO point_figures VALUES (1, 'primary', 'peak_v', 101.0, 100.0, 0.5, 3),
    (2, 'secondary', 'peak_v', -88.0, -87.0, 0.2, 1);
INSERT INTO node_verdicts VALUES (1, 'primary', 'pass', '[]'), (2, 'secondary', 'fail', '["peak"]');
INSERT INTO events (run_id, point_id, time, kind, message, data) VALUES
    (1, 1, '2025-03-01', 'retry', 'scope timeout', '{"try":2}');
"""


def _le_bytes(codes: np.ndarray) -> bytes:
    return codes.astype(codes.dtype.newbyteorder("<")).tobytes()


def _table_definitions(store: Store) -> list[str]:
    rows = store.db.execute("SELECT sql FROM sqlite_master WHERE sql IS NOT NULL ORDER BY name")
    return [" ".join(row[0].split()) for row in rows]


def _table_rows(
    conn: sqlite3.Connection, columns: dict[str, list[str]] | None = None
) -> dict[str, Counter]:
    """Every row of every table as it stands, restricted to ``columns`` per table (the columns a
    version-2 file had) where given."""
    names = [row[0] for row in conn.execute("SELECT name FROM sqlite_master WHERE type='table'")]
    rows = {}
    for name in set(names) - {"schema_info"}:
        selected = ", ".join(columns[name]) if columns else "*"
        rows[name] = Counter(tuple(row) for row in conn.execute(f"SELECT {selected} FROM {name}"))
    return rows


def _table_columns(conn: sqlite3.Connection) -> dict[str, list[str]]:
    """Column names per table."""
    names = [row[0] for row in conn.execute("SELECT name FROM sqlite_master WHERE type='table'")]
    return {name: [row[1] for row in conn.execute(f"PRAGMA table_info({name})")] for name in names}


def test_schema_2_store_is_upgraded_without_loss(tmp_path: Path) -> None:
    path = tmp_path / "v2.sqlite"
    # capture id: (point id, capture index, node, codes as the scope sent them)
    captures = {
        1: (1, 0, "primary", ringing_codes(seed=1)),
        2: (1, 0, "secondary", ringing_codes(seed=2).astype(">i2") * 200),
        3: (2, 0, "primary", np.linspace(-1, 1, 700, dtype=np.float32)),
    }
    conn = sqlite3.connect(path)
    conn.execute("PRAGMA page_size = 4096")  # not labseq's: an upgrade keeps a file's page size
    conn.executescript(SCHEMA_V2)
    conn.executemany(
        "INSERT INTO captures VALUES (?, ?, 1, ?, ?, 1, ?, 1e-9, -2e-6, 0.98, 100.0, 0.0, -128, "
        "127, ?, '2025-03-01', ?)",
        [
            (capture_id, point_id, index, node, codes.dtype.name, codes.size, _le_bytes(codes))
            for capture_id, (point_id, index, node, codes) in captures.items()
        ],
    )
    conn.commit()
    before, v2_columns = _table_rows(conn), _table_columns(conn)
    conn.close()

    with Store(path) as store:
        assert store.db.execute("SELECT version FROM schema_info").fetchone()[0] == SCHEMA_VERSION
        assert store.db.execute("PRAGMA page_size").fetchone()[0] == 4096
        assert (
            _table_rows(store.db.conn, v2_columns) == before
        )  # every row of every table, codes included
        codecs = store.db.execute("SELECT codec FROM captures ORDER BY id").fetchall()
        assert [row[0] for row in codecs] == ["raw"] * 3
        for capture in store.iter_captures(1):
            assert np.array_equal(capture.codes, captures[capture.id][3])
        assert store.capture_figures(1)["edges"] == [{"peak_v": 101.0}]
        assert store.node_verdicts(1)[2] == {"secondary": ("fail", ["peak"])}
        # new captures are compressed beside the old raw ones, and all of them read
        new_codes = captures[1][3]
        [new_id] = store.commit_point(
            2, captures=[CaptureRecord(Capture(new_codes), node="primary")]
        )
        assert (
            store.db.execute("SELECT codec FROM captures WHERE id = ?", [new_id]).fetchone()[0]
            == "zstd"
        )
        assert np.array_equal(store.captures(2, node="primary")[-1].codes, new_codes)
        assert store.integrity_check() == "ok"
        assert store.db.execute("PRAGMA foreign_key_check").fetchall() == []
        upgraded = _table_definitions(store)
    with Store(tmp_path / "new.sqlite") as store:
        assert _table_definitions(store) == upgraded  # a new file has the same tables


def test_foreign_files_refused_unchanged(tmp_path: Path) -> None:
    text_file = tmp_path / "notes.sqlite"
    text_file.write_text("hello, not a database\n")
    with pytest.raises(StoreFileError, match="not a SQLite database"):
        Store(text_file)
    assert text_file.read_text() == "hello, not a database\n"

    other = tmp_path / "other.sqlite"
    conn = sqlite3.connect(other)
    conn.execute("CREATE TABLE recipes (name TEXT)")
    conn.commit()
    conn.close()
    before = other.read_bytes()
    with pytest.raises(StoreFileError, match="not a labseq store"):
        Store(other)
    assert other.read_bytes() == before


def test_missing_store_not_created_when_reading(db: Path) -> None:
    with pytest.raises(StoreFileError, match="no such store"):
        Store(db, create=False)
    assert not db.exists()


def test_file_settings(db: Path) -> None:
    with Store(db) as store:
        new_run(store)
        assert store.db.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
        assert store.db.execute("PRAGMA foreign_keys").fetchone()[0] == 1
        assert store.db.execute("PRAGMA page_size").fetchone()[0] == PAGE_SIZE
        assert store.integrity_check() == "ok"


# --------------------------------------------------------------------------- CLI


@pytest.fixture
def filled_db(db: Path) -> tuple[Path, int, list[int]]:
    with Store(db) as store:
        run_id, points = new_run(store, points=3)
        for index, point_id in enumerate(points[:2]):
            records = [
                CaptureRecord(Capture(ringing_codes(seed=10 * index + k)), node="primary")
                for k in range(2)
            ]
            readings = PointReadings(source_voltage_v=36.1, meter_power_w=20.0 + index)
            store.commit_point(point_id, captures=records, readings=readings)
            peak = {"peak_v": {"worst": 140.0 + index, "mean": 139.0, "spread": 0.5, "n": 2}}
            store.set_point_judgement(
                point_id, {"primary": peak}, {"primary": ("pass", [])}, "pass", []
            )
        store.commit_point(points[2], status="skipped")
    return db, run_id, points


def test_cli_runs(filled_db: tuple[Path, int, list[int]]) -> None:
    db, run_id, _ = filled_db
    code, out, err = run_cli("runs", "--db", str(db), "--json")
    assert code == 0, err
    [row] = json.loads(out)
    assert row["id"] == run_id and row["points_done"] == 2 and row["points_total"] == 3
    assert row["status"] == "running" and row["dut_label"] == "DUT"
    code, out, _ = run_cli("runs", "--db", str(db))
    assert code == 0 and "2/3" in out and "DUT / RC" in out


def test_cli_export_npz(filled_db: tuple[Path, int, list[int]], tmp_path: Path) -> None:
    db, run_id, points = filled_db
    out_dir = tmp_path / "out"
    code, _, err = run_cli("export", str(run_id), "--db", str(db), "--out", str(out_dir))
    assert code == 0, err
    with (out_dir / "points.csv").open(newline="") as handle:
        rows = list(csv.DictReader(handle))
    assert [row["status"] for row in rows] == ["done", "done", "skipped"]
    assert float(rows[1]["meter_power_w"]) == 21.0 and rows[0]["source_voltage_v"] == "36.1"
    assert float(rows[1]["peak_v_worst"]) == 141.0 and rows[2]["peak_v_worst"] == ""
    assert rows[0]["verdict"] == "pass"
    with Store(db) as store, np.load(out_dir / "captures.npz") as archive:
        stored = store.captures(points[1])
        assert len(archive["scaling"]) == 4
        assert archive["p001_c01_codes"].tobytes() == stored[1].codes.tobytes()
        assert archive["p001_c01_codes"].dtype == np.int8
        assert np.array_equal(archive["p001_c01_volts"], stored[1].volts())
        row = archive["scaling"][3]
        assert row["name"] == "p001_c01" and row["y_increment_v"] == stored[1].y_increment_v
    assert (out_dir / "sequence.toml").read_text() == 'name = "t"\n'


def test_cli_export_csv(filled_db: tuple[Path, int, list[int]], tmp_path: Path) -> None:
    db, run_id, points = filled_db
    out_dir = tmp_path / "out"
    code, _, err = run_cli(
        "export", str(run_id), "--db", str(db), "--out", str(out_dir), "--captures", "csv"
    )
    assert code == 0, err
    files = sorted((out_dir / "captures").glob("*.csv"))
    assert [f.name for f in files] == [
        "p000_c00.csv",
        "p000_c01.csv",
        "p001_c00.csv",
        "p001_c01.csv",
    ]
    lines = files[0].read_text().splitlines()
    header = lines.index("time_s,volts")  # below the preamble: origin and screen limits
    assert lines[0].startswith("Source,labseq run 1 capture p000_c00 on ")
    table = np.loadtxt(files[0], delimiter=",", skiprows=header + 1)
    with Store(db) as store:
        stored = store.captures(points[0])[0]
    screen = dict(line.split(",") for line in lines[1:header])
    if stored.code_min is not None:  # the screen's edges in volts, as the samples are computed
        bottom, top = (float(screen[key]) for key in ("Screen Bottom V", "Screen Top V"))
        edges = np.array([stored.code_min, stored.code_max], dtype=np.float64)
        expected = (edges - stored.y_reference) * stored.y_increment_v + stored.y_origin_v
        np.testing.assert_allclose([bottom, top], expected, rtol=1e-8)
    np.testing.assert_allclose(table[:, 0], stored.time_s(), rtol=1e-8)
    np.testing.assert_allclose(table[:, 1], stored.volts(), rtol=1e-8)


def test_cli_unknown_run_and_missing_db(
    filled_db: tuple[Path, int, list[int]], tmp_path: Path
) -> None:
    db, _, _ = filled_db
    code, _, err = run_cli("export", "42", "--db", str(db), "--out", str(tmp_path / "x"))
    assert code == 2 and "no run 42" in err and "runs in this store: 1" in err
    assert not (tmp_path / "x").exists()
    code, _, err = run_cli("runs", "--db", str(tmp_path / "absent.sqlite"))
    assert code == 2 and "no such store" in err and "Traceback" not in err
