"""Runs from many benches: every run has a UUID and a bench identity beside its per-file id, a
version-3 store gains them on upgrade without losing anything, and a RUN argument may name a
run by its UUID or a prefix of it."""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import socket
import sqlite3
import subprocess
import sys
import tempfile
import uuid
from collections import Counter
from collections.abc import Iterator
from pathlib import Path

import pytest
from sweeps import LABSEQ, demo_sequence, run_cli
from test_store import SCHEMA_V2, Capture, _le_bytes, _table_definitions, new_run, ringing_codes

from labseq import store as store_module
from labseq.store import (
    SCHEMA_VERSION,
    CaptureRecord,
    Store,
    bench_identity,
    upgraded_run_uuid,
)


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
        # a name-based UUID (version 5, RFC 4122 4.3) of what each run recorded
        assert all(uuid.UUID(run.uuid).version == 5 for run in runs.values())
        assert runs[1].uuid != runs[2].uuid
        assert runs[2].uuid == upgraded_run_uuid(2, "2025-04-01", "", "bench-7", 42, 1.5)
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


def test_copies_of_one_older_store_give_its_runs_the_same_uuids(tmp_path: Path) -> None:
    first, second = tmp_path / "bench.sqlite", tmp_path / "archive-copy.sqlite"
    _version_3_file(first)
    second.write_bytes(first.read_bytes())
    before = second.read_bytes()
    with Store(second, read_only=True) as store:  # read through an upgraded copy
        read = [(run.id, run.uuid) for run in store.runs()]
    assert second.read_bytes() == before  # the file itself is still version 3
    with Store(first) as store:
        assert [(run.id, run.uuid) for run in store.runs()] == read
    with Store(second) as store:
        assert [(run.id, run.uuid) for run in store.runs()] == read


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


# --------------------------------------------------------------------------- merge


def _sim_run(store: Store, tmp_path: Path, loads: list[str]) -> int:
    """One small sweep of the DC demo on the simulated bench, stored in ``store``."""
    from labseq.runner import run_sequence
    from labseq.sequence import load_sequence

    path = demo_sequence(tmp_path, lines=["48 V"], loads=loads, captures=2, settle="0 s")
    return run_sequence(load_sequence(path), store)


@pytest.fixture(scope="module")
def bench_stores(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    """Two benches' stores, at rest: the first with two ended runs, the second with one."""
    tmp_path = tmp_path_factory.mktemp("benches")
    first, second = tmp_path / "bench-a.sqlite", tmp_path / "bench-b.sqlite"
    with Store(first) as store:
        _sim_run(store, tmp_path, ["1 A", "2 A"])
        _sim_run(store, tmp_path, ["1.5 A"])
    with Store(second) as store:
        _sim_run(store, tmp_path, ["2 A"])
    return first, second


def _fingerprint(path: Path) -> tuple[str, int, list[str]]:
    """A file's SHA-256, its modification time (ns) and the files beside it named after it."""
    digest = hashlib.sha256(path.read_bytes()).hexdigest()
    beside = sorted(p.name for p in path.parent.iterdir() if p.name.startswith(path.name + "-"))
    return digest, path.stat().st_mtime_ns, beside


def _run_contents(store: Store, run_id: int) -> dict[str, list[tuple]]:
    """Every row stored for a run, with the store's own ids replaced by the run's grid and
    capture order (point index, node, capture index): the same run in two stores gives the same
    contents, byte for byte (codes as stored, REAL figures compared exactly)."""
    db = store.db
    run = db.execute("SELECT * FROM runs WHERE id = ?", [run_id]).fetchone()
    point_index = {
        row["id"]: row["point_index"]
        for row in db.execute("SELECT id, point_index FROM points WHERE run_id = ?", [run_id])
    }

    def rows(query: str, drop: tuple[str, ...], point_key: str | None = "point_id") -> list[tuple]:
        result = []
        for row in db.execute(query, [run_id]).fetchall():
            values = {key: row[key] for key in row.keys() if key not in drop}  # noqa: SIM118
            if point_key is not None and row[point_key] is not None:
                values[point_key] = point_index[row[point_key]]
            result.append(tuple(sorted(values.items())))
        return sorted(result, key=repr)

    capture_of = (
        "SELECT c.point_id, c.node, c.capture_index, {} FROM captures c {} WHERE c.run_id = ?"
    )
    return {
        "run": [tuple(sorted((k, run[k]) for k in run.keys() if k != "id"))],  # noqa: SIM118
        "points": rows("SELECT * FROM points WHERE run_id = ?", ("id", "run_id"), None),
        "captures": rows(capture_of.format("c.*", ""), ("id", "run_id")),
        "capture_figures": rows(
            capture_of.format("f.*", "JOIN capture_figures f ON f.capture_id = c.id"),
            ("capture_id",),
        ),
        "point_figures": rows(
            "SELECT f.* FROM point_figures f JOIN points p ON p.id = f.point_id WHERE p.run_id = ?",
            (),
        ),
        "node_verdicts": rows(
            "SELECT v.* FROM node_verdicts v JOIN points p ON p.id = v.point_id WHERE p.run_id = ?",
            (),
        ),
        "events": rows("SELECT * FROM events WHERE run_id = ? ORDER BY id", ("id", "run_id")),
    }


def test_merge_gathers_every_run_bit_for_bit(
    bench_stores: tuple[Path, Path], tmp_path: Path
) -> None:
    first, second = bench_stores
    before = {path: _fingerprint(path) for path in bench_stores}
    target = tmp_path / "lab.sqlite"
    code, out, err = run_cli("merge", str(first), str(second), "--into", str(target))
    assert code == 0, err
    assert f"{first}: 2 run(s) copied (1 as 1, 2 as 2)" in out
    assert f"{second}: 1 run(s) copied (1 as 3)" in out
    assert {path: _fingerprint(path) for path in bench_stores} == before  # sources untouched

    with Store(target) as into, Store(first) as a, Store(second) as b:
        merged = {run.uuid: run.id for run in into.runs()}
        sources = [(a, run) for run in a.runs()] + [(b, run) for run in b.runs()]
        assert len(merged) == len(sources) == 3
        for source, run in sources:
            copy_id = merged[run.uuid]
            contents = _run_contents(source, run.id)
            assert contents["captures"] and contents["capture_figures"] and contents["events"]
            assert _run_contents(into, copy_id) == contents
            # and through the readers' own methods: the same codes and figures
            for stored, copied in zip(
                source.iter_captures(run.id), into.iter_captures(copy_id), strict=True
            ):
                assert stored.codes.dtype == copied.codes.dtype
                assert stored.codes.tobytes() == copied.codes.tobytes()
                figures = source.capture_figures(stored.id)
                assert figures is not None and figures.pop("capture_id") == stored.id
                assert into.capture_figures(copied.id) == {**figures, "capture_id": copied.id}
            assert list(source.node_figures(run.id).values()) == list(
                into.node_figures(copy_id).values()
            )
        assert into.integrity_check() == "ok"
        assert into.db.execute("PRAGMA foreign_key_check").fetchall() == []

    # a second merge copies nothing; a run reads the same from the merged store
    code, out, err = run_cli("merge", str(second), str(first), "--into", str(target))
    assert code == 0, err
    assert f"{first}: 0 run(s) copied, 2 already there" in out
    with Store(target, read_only=True) as into:
        assert len(into.runs()) == 3
    with Store(second, read_only=True) as b:
        run_uuid = b.runs()[0].uuid
    outputs = []
    for db, name in ((second, "1"), (target, run_uuid[:8])):
        code, out, err = run_cli("report", name, "--db", str(db), "--format", "json")
        assert code == 0, err
        outputs.append({k: v for k, v in json.loads(out).items() if k not in ("run", "id")})
    assert outputs[0] == outputs[1]


def test_merge_leaves_running_runs_and_says_so(
    bench_stores: tuple[Path, Path], tmp_path: Path
) -> None:
    source = tmp_path / "live.sqlite"
    with Store(source) as store:
        ended, _ = new_run(store, points=1)
        store.set_run_status(ended, "unsafe-end")
        new_run(store, points=1)  # still running
    target = tmp_path / "lab.sqlite"
    code, out, err = run_cli("merge", str(source), "--into", str(target))
    assert code == 0, err
    assert "1 run(s) copied" in out and "still running, not copied: run(s) 2" in out
    with Store(target) as into:
        assert [run.status for run in into.runs()] == ["unsafe-end"]
    # once it has ended it is merged; the first is not copied again
    with Store(source) as store:
        store.set_run_status(2, "interrupted")
    code, out, _ = run_cli("merge", str(source), "--into", str(target))
    assert code == 0 and "1 run(s) copied (2 as 2), 1 already there" in out


def test_merge_refuses_bad_sources_before_copying_anything(
    bench_stores: tuple[Path, Path], tmp_path: Path
) -> None:
    first, _ = bench_stores
    target = tmp_path / "lab.sqlite"
    text = tmp_path / "notes.sqlite"
    text.write_text("not a store\n")
    newer = tmp_path / "newer.sqlite"
    newer.write_bytes(first.read_bytes())
    with sqlite3.connect(newer) as conn:
        conn.execute("UPDATE schema_info SET version = ?", [SCHEMA_VERSION + 1])
    conn.close()
    for bad, message in (
        (tmp_path / "absent.sqlite", "absent.sqlite: no such file"),
        (text, "not a SQLite database"),
        (newer, "newer labseq"),
    ):
        code, out, err = run_cli("merge", str(first), str(bad), "--into", str(target))
        assert code == 2 and message in err and "Traceback" not in err, err
        assert not target.exists()  # nothing copied from the good source either
    code, _, err = run_cli("merge", str(first), "--into", str(first))
    assert code == 2 and "the --into store itself" in err
    code, _, err = run_cli("merge", "--into", str(target))
    assert code == 2 and "SOURCE" in err


# --------------------------------------------------------------------------- reading only


def test_read_commands_write_nothing(bench_stores: tuple[Path, Path], tmp_path: Path) -> None:
    first, _ = bench_stores
    before = _fingerprint(first)
    db = ["--db", str(first)]
    commands = [
        ["runs", *db],
        ["runs", "--json", *db],
        ["log", "latest", *db],
        ["report", "1", "--out", str(tmp_path / "report"), *db],
        ["report", "latest", "--format", "json", *db],
        ["export", "1", "--out", str(tmp_path / "export"), *db],
        ["compare", "1", "2", "--json", *db],
        ["design", "--run", "1", *db],
    ]
    for args in commands:
        code, _, err = run_cli(*args)
        assert code in (0, 1), (args, err)  # compare: 1 = regressed
        assert _fingerprint(first) == before, args  # not a byte, not a file beside it


def test_a_store_at_rest_reads_with_the_plain_sqlite3_shell(
    bench_stores: tuple[Path, Path],
) -> None:
    first, _ = bench_stores
    header = first.read_bytes()[:20]
    # SQLite file format (sqlite.org/fileformat2.html, 1.3.4): bytes 18 and 19 are 1 for the
    # rollback journal, 2 for WAL; a WAL file needs its -shm index beside it to be read
    assert header[18:20] == b"\x01\x01"
    assert _fingerprint(first)[2] == []
    conn = sqlite3.connect(f"{first.as_uri()}?mode=ro", uri=True)
    assert conn.execute("SELECT COUNT(*) FROM runs").fetchone()[0] == 2
    conn.close()
    shell = shutil.which("sqlite3")
    if shell is None:
        pytest.skip("the sqlite3 shell is not installed")
    done = subprocess.run(
        [shell, "-readonly", str(first), "SELECT COUNT(*) FROM captures"],
        capture_output=True,
        text=True,
        check=False,
    )
    assert done.returncode == 0 and int(done.stdout) == 6, done.stderr


def _as_other_user() -> list[str]:
    """The command prefix that runs a process as a user who may not write the store: nothing
    for an ordinary user (the modes do it), user ``nobody`` for root (whom modes do not stop)."""
    if os.geteuid() != 0:
        return []
    setpriv = shutil.which("setpriv")
    if setpriv is None:
        pytest.skip("running as root without setpriv: file modes do not stop root from writing")
    return [setpriv, "--reuid=65534", "--regid=65534", "--clear-groups"]


@pytest.fixture
def unwritable_folder(bench_stores: tuple[Path, Path]) -> Iterator[Path]:
    """A folder (mode 0555) holding stores (mode 0444) in each state a store may be found in:
    at rest, left in WAL mode by an older labseq, and of schema version 3."""
    folder = Path(tempfile.mkdtemp(prefix="labseq-archive-"))
    folder.chmod(0o755)
    shutil.copy(bench_stores[0], folder / "at-rest.sqlite")
    shutil.copy(bench_stores[0], folder / "wal.sqlite")
    with sqlite3.connect(folder / "wal.sqlite") as conn:
        conn.execute("PRAGMA journal_mode = WAL")
    conn.close()
    assert (folder / "wal.sqlite").read_bytes()[18:20] == b"\x02\x02"  # WAL mode, at rest
    _version_3_file(folder / "v3.sqlite")
    for path in folder.iterdir():
        path.chmod(0o444)
    folder.chmod(0o555)
    yield folder
    folder.chmod(0o755)
    shutil.rmtree(folder)


def test_a_store_others_may_not_write_reads(unwritable_folder: Path) -> None:
    prefix = _as_other_user()
    before = {path.name: _fingerprint(path) for path in unwritable_folder.iterdir()}
    env = {**os.environ, "PYTHONDONTWRITEBYTECODE": "1"}
    for name, runs in (("at-rest", 2), ("wal", 2), ("v3", 2)):
        done = subprocess.run(
            [*prefix, *LABSEQ, "runs", "--json", "--db", str(unwritable_folder / f"{name}.sqlite")],
            capture_output=True,
            text=True,
            check=False,
            env=env,
            cwd=unwritable_folder,
        )
        assert done.returncode == 0, (name, done.stderr)
        assert len(json.loads(done.stdout)) == runs, name
    probe = subprocess.run(
        [*prefix, sys.executable, "-c", f"open({str(unwritable_folder / 'x')!r}, 'w')"],
        capture_output=True,
        check=False,
    )
    assert probe.returncode != 0  # the folder really is closed to this user
    assert {path.name: _fingerprint(path) for path in unwritable_folder.iterdir()} == before
    shell = shutil.which("sqlite3")
    if shell is not None:
        done = subprocess.run(
            [*prefix, shell, "-readonly", str(unwritable_folder / "at-rest.sqlite"),
             "SELECT COUNT(*) FROM runs"],
            capture_output=True,
            text=True,
            check=False,
        )  # fmt: skip
        assert done.returncode == 0 and done.stdout.strip() == "2", done.stderr
