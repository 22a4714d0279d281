"""Runs from many benches: every run has a UUID and a bench identity beside its per-file id, a
version-3 store gains them on upgrade without losing anything, and a RUN argument may name a
run by its UUID or a prefix of it."""

from __future__ import annotations

import json
import socket
import sqlite3
import uuid
from collections import Counter
from pathlib import Path

import pytest
from sweeps import run_cli
from test_store import SCHEMA_V2, Capture, _le_bytes, _table_definitions, new_run, ringing_codes

from labseq import store as store_module
from labseq.store import SCHEMA_VERSION, CaptureRecord, Store, bench_identity


@pytest.fixture
def db(tmp_path: Path) -> Path:
    return tmp_path / "store.sqlite"


def _is_uuid4(text: str) -> bool:
    """Text as RFC 4122 writes a version-4 (random) UUID, lower case."""
    parsed = uuid.UUID(text)
    return str(parsed) == text and parsed.version == 4 and parsed.variant == uuid.RFC_4122


# --------------------------------------------------------------------------- identity


def test_new_runs_get_a_uuid_and_their_bench(db: Path) -> None:
    scope = {"manufacturer": "ACME", "model": "SC4", "serial": "A1", "firmware": "1.0"}
    with Store(db) as store:
        first, _ = new_run(store)
        second, _ = new_run(store)
        runs = {run.id: run for run in store.runs()}
        assert _is_uuid4(runs[first].uuid) and _is_uuid4(runs[second].uuid)
        assert runs[first].uuid != runs[second].uuid
        host = socket.gethostname()
        assert runs[first].bench_host == host
        store.set_run_instruments(first, {"scope": {**scope, "resource": "TCPIP::10.0.0.5"}})
        identity = store.run(first).bench_id
        assert identity == bench_identity(host, {"scope": scope})
        # the same instruments on the same host: the same bench, whatever the firmware or address
        other = {"scope": {**scope, "firmware": "2.0", "resource": "USB0::1::2::A1"}}
        assert bench_identity(host, other) == identity
        assert bench_identity(host, {"scope": {**scope, "serial": "A2"}}) != identity
        assert bench_identity("other-pc", {"scope": scope}) != identity
        # UUIDs are unique in a store
        with pytest.raises(sqlite3.IntegrityError, match="UNIQUE"):
            store.db.execute("UPDATE runs SET uuid = ? WHERE id = ?", [runs[first].uuid, second])


def test_bench_identity_is_host_and_a_digest_of_the_identities() -> None:
    # worked by hand: SHA-256 (FIPS 180-4) of the documented lines, through hashlib
    import hashlib

    lines = "load=ACME,EL3,L7\nscope=ACME,SC4,A1"
    digest = hashlib.sha256(lines.encode()).hexdigest()[:12]
    instruments = {
        "scope": {"manufacturer": "ACME", "model": "SC4", "serial": "A1", "firmware": "1"},
        "load": "ACME,EL3,L7,0.9",  # an identity kept as the *IDN? reply itself
    }
    assert bench_identity("bench-3", instruments) == f"bench-3:{digest}"


# --------------------------------------------------------------------------- upgrade


def _version_3_file(path: Path) -> None:
    """A store as version 3 wrote it: the version-2 tables (as labseq wrote them) and the
    version-3 step, with two runs, a capture and an event."""
    conn = sqlite3.connect(path)
    conn.executescript(SCHEMA_V2)
    codes = ringing_codes(seed=3)
    conn.executemany(
        "INSERT INTO captures VALUES (?, ?, 1, 0, 'primary', 1, 'int8', 1e-9, -2e-6, 0.98, 100.0, "
        "0.0, -128, 127, ?, '2025-03-01', ?)",
        [(capture_id, capture_id // 2 + 1, codes.size, _le_bytes(codes)) for capture_id in (1, 3)],
    )
    for statement in store_module._upgrade_to_3():
        conn.execute(statement)
    conn.execute(
        "INSERT INTO runs (id, sequence_text, sequence_sha256, sequence_path, dut_label, "
        "snubber_label, bench_kind, instruments, software_version, status, started_at, pid, host, "
        "process_started) VALUES (2, 'x', '', 'y.toml', 'dut', 'rc', 'visa', ?, '0.2.0', "
        "'unsafe-end', '2025-04-01', 42, 'bench-7', 1.5)",
        [json.dumps({"scope": {"manufacturer": "ACME", "model": "SC4", "serial": "9"}})],
    )
    conn.execute("UPDATE schema_info SET version = 3")
    conn.commit()
    conn.close()


def test_schema_3_store_is_upgraded_to_4(tmp_path: Path) -> None:
    path = tmp_path / "v3.sqlite"
    _version_3_file(path)
    conn = sqlite3.connect(path)
    v3_columns = [row[1] for row in conn.execute("PRAGMA table_info(runs)")]
    before = {
        name: Counter(conn.execute(f"SELECT * FROM {name}").fetchall())
        for name in ("points", "captures", "capture_figures", "point_figures", "events")
    }
    runs_before = Counter(conn.execute("SELECT * FROM runs").fetchall())
    conn.close()

    with Store(path) as store:
        assert store.db.execute("SELECT version FROM schema_info").fetchone()[0] == SCHEMA_VERSION
        for name, rows in before.items():  # nothing else changed, codes included
            assert Counter(map(tuple, store.db.execute(f"SELECT * FROM {name}"))) == rows, name
        kept = store.db.execute(f"SELECT {', '.join(v3_columns)} FROM runs").fetchall()
        assert Counter(map(tuple, kept)) == runs_before
        runs = {run.id: run for run in store.runs()}
        assert all(_is_uuid4(run.uuid) for run in runs.values())
        assert runs[1].uuid != runs[2].uuid
        # the bench: the owner's host (none recorded in run 1) and its recorded instruments
        assert runs[2].bench_host == "bench-7"
        assert runs[2].bench_id == bench_identity(
            "bench-7", {"scope": {"manufacturer": "ACME", "model": "SC4", "serial": "9"}}
        )
        assert runs[1].bench_host == "" and runs[1].bench_id == bench_identity("", {})
        indexes = {
            row[0]: row[1]
            for row in store.db.execute("SELECT name, sql FROM sqlite_master WHERE type='index'")
        }
        assert {"runs_uuid", "captures_run", "events_run"} <= set(indexes)
        assert "UNIQUE" in indexes["runs_uuid"]
        assert store.integrity_check() == "ok"
        assert store.db.execute("PRAGMA foreign_key_check").fetchall() == []
        upgraded = _table_definitions(store)
    with Store(tmp_path / "new.sqlite") as store:
        assert _table_definitions(store) == upgraded  # a new file has the same tables
    with Store(path) as store:  # opened again: the same UUIDs (the upgrade ran once)
        assert {run.id: run.uuid for run in store.runs()} == {i: r.uuid for i, r in runs.items()}


def test_reads_of_a_runs_captures_and_events_use_the_indexes(db: Path) -> None:
    with Store(db) as store:
        new_run(store)
        plans = {
            query: " ".join(row[3] for row in store.db.execute(f"EXPLAIN QUERY PLAN {query}", [1]))
            for query in (
                "SELECT id FROM events WHERE run_id = ?",
                "SELECT node, MIN(id) FROM captures WHERE run_id = ? GROUP BY node",
                "SELECT id FROM points WHERE run_id = ?",
                "SELECT id FROM captures WHERE point_id = ?",
            )
        }
    # SQLite's EXPLAIN QUERY PLAN says SEARCH ... USING INDEX for an indexed lookup, SCAN for a
    # read of the whole table (sqlite.org/eqp.html)
    for query, plan in plans.items():
        assert "USING" in plan and "INDEX" in plan and not plan.startswith("SCAN"), (query, plan)


# --------------------------------------------------------------------------- RUN by UUID


@pytest.fixture
def two_runs(db: Path) -> tuple[Path, list[tuple[int, str]]]:
    with Store(db) as store:
        for _ in range(2):
            run_id, points = new_run(store, points=1)
            capture = CaptureRecord(Capture(ringing_codes()), node="primary")
            store.commit_point(points[0], captures=[capture])
            store.log_event(run_id, "info", f"run {run_id} began")
        return db, [(run.id, run.uuid) for run in store.runs()]


def test_runs_lists_the_uuid(two_runs: tuple[Path, list[tuple[int, str]]]) -> None:
    db, runs = two_runs
    code, out, err = run_cli("runs", "--db", str(db), "--json")
    assert code == 0, err
    rows = json.loads(out)
    assert [(row["id"], row["uuid"]) for row in rows] == runs
    assert all(row["bench_id"].startswith(f"{row['bench_host']}:") for row in rows)
    code, out, _ = run_cli("runs", "--db", str(db))
    assert code == 0
    for _, run_uuid in runs:
        assert f"{run_uuid[:8]}  " in out and run_uuid not in out


def test_run_named_by_uuid_or_prefix(two_runs: tuple[Path, list[tuple[int, str]]]) -> None:
    db, runs = two_runs
    _, (second_id, second) = runs
    for name in (second, second[:8], second[:13].upper(), f" {second[:10]} "):
        code, out, err = run_cli("log", name, "--db", str(db), "--json")
        assert code == 0, (name, err)
        assert [entry["message"] for entry in json.loads(out)] == [f"run {second_id} began"]
    code, _, err = run_cli("log", "abcdef1", "--db", str(db))  # 7 hex digits: too few
    assert code == 2 and "first 8+ hex digits" in err
    absent = "0" * 8 if not any(u.startswith("0" * 8) for _, u in runs) else "f" * 8
    code, _, err = run_cli("log", absent, "--db", str(db))
    assert code == 2 and "no run's UUID starts so" in err and "Traceback" not in err
    code, _, err = run_cli("log", "not-a-run", "--db", str(db))
    assert code == 2 and "give a run id" in err


def test_ambiguous_uuid_prefix_and_digits(two_runs: tuple[Path, list[tuple[int, str]]]) -> None:
    db, runs = two_runs
    (first_id, _), (second_id, _) = runs
    shared = "12345678-aaaa-4aaa-8aaa-"
    with Store(db) as store:
        store.db.execute("UPDATE runs SET uuid = ? WHERE id = ?", [shared + "a" * 12, first_id])
        store.db.execute("UPDATE runs SET uuid = ? WHERE id = ?", [shared + "b" * 12, second_id])
    code, _, err = run_cli("log", "12345678", "--db", str(db))
    assert code == 2 and "2 runs" in err and shared + "a" * 12 in err
    code, out, err = run_cli("log", shared + "b", "--db", str(db), "--json")
    assert code == 0, err
    assert json.loads(out)[0]["message"] == f"run {second_id} began"
    # digits alone are an id when the store has that run
    code, out, err = run_cli("log", str(first_id), "--db", str(db), "--json")
    assert code == 0 and json.loads(out)[0]["message"] == f"run {first_id} began"
