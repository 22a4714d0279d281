"""The lab database, against a real PostgreSQL server (tests/pgserver.py: Debian's package,
started for the session on a Unix socket, as the unprivileged postgres user when we are root).

Runs swept on the simulated bench into two stores (two bench PCs) are published, published
again, published with the publisher killed or its connection dropped midway, and read back:
every figure, verdict, event and capture bit for bit as the bench's store holds it, and
``runs``, ``report`` and ``compare`` give what they give on the bench's store. What a reader can
see is checked from a connection of its own. Where PostgreSQL behaviour is relied on, the
PostgreSQL 15 documentation is cited (chapter and section).
"""

from __future__ import annotations

import json
import os
import signal
import sqlite3
import subprocess
import time
from collections.abc import Iterator
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np
import pytest
from sweeps import LABSEQ, ROOT, demo_sequence, run_cli, small_sequence

from labseq.store import RunRecord, Store
from labseq.store_pg import LabDatabase, redact

psycopg = pytest.importorskip(
    "psycopg", reason="psycopg is not installed: pip install 'labseq[lab]'"
)

#: Tables of a run, and how many rows of each a database holds in all.
TABLES = (
    "runs",
    "points",
    "captures",
    "capture_figures",
    "point_figures",
    "node_verdicts",
    "events",
)


@dataclass(frozen=True)
class Benches:
    """Two bench PCs' stores: A holds the baseline and a second DC demo run, B the candidate."""

    a: Path
    b: Path


@pytest.fixture(scope="module")
def benches(tmp_path_factory: pytest.TempPathFactory) -> Benches:
    from labseq.runner import run_sequence
    from labseq.sequence import load_sequence

    tmp_path = tmp_path_factory.mktemp("benches")
    a, b = tmp_path / "bench-a.sqlite", tmp_path / "bench-b.sqlite"
    with Store(a) as store:
        run_sequence(load_sequence(small_sequence(tmp_path, "baseline")), store)
        sweep = demo_sequence(
            tmp_path, lines=["48 V"], loads=["0.5 A", "1 A"], captures=2, settle="0 s"
        )
        run_sequence(load_sequence(sweep), store, label="second run")
    with Store(b) as store:
        run_sequence(load_sequence(small_sequence(tmp_path, "candidate")), store)
    # Bench B is another PC: its runs say so (both stores were written on this host here).
    with sqlite3.connect(b) as conn:
        conn.execute(
            "UPDATE runs SET bench_host = 'bench-b', "
            "bench_id = 'bench-b:' || substr(bench_id, instr(bench_id, ':') + 1)"
        )
    return Benches(a, b)


def counts(url: str) -> dict[str, int]:
    """Rows of every table, read over a connection of its own (what any other reader sees)."""
    with psycopg.connect(url) as conn:
        return {
            table: conn.execute(f"SELECT COUNT(*) FROM {table}").fetchone()[0] for table in TABLES
        }


def source_counts(*stores: Path) -> dict[str, int]:
    total = dict.fromkeys(TABLES, 0)
    for path in stores:
        with sqlite3.connect(path) as conn:
            total["runs"] += conn.execute("SELECT COUNT(*) FROM runs").fetchone()[0]
            for table in TABLES[1:]:
                total[table] += conn.execute(f"SELECT COUNT(*) FROM {table}").fetchone()[0]
    return total


def publish(url: str, store: Path, *args: str) -> tuple[int, str, str]:
    return run_cli("publish", *args, "--to", url, "--db", str(store))


# --------------------------------------------------------------------------- read back


def _without_ids(record: RunRecord) -> dict:
    values = asdict(record)
    values.pop("id")
    return values


def assert_same_run(source: Store, lab: LabDatabase, uuid: str) -> None:
    """Every stored fact of the run in ``lab`` equals the bench store's, bit for bit."""
    (mine,) = source.runs_by_uuid(uuid)
    (theirs,) = lab.runs_by_uuid(uuid)
    assert _without_ids(theirs) == _without_ids(mine)
    assert lab.node_names(theirs.id) == source.node_names(mine.id)
    src_points = source.points(mine.id)
    lab_points = lab.points(theirs.id)
    assert [asdict(p) | {"id": 0, "run_id": 0} for p in lab_points] == [
        asdict(p) | {"id": 0, "run_id": 0} for p in src_points
    ]
    index = {p.id: p.point_index for p in src_points}
    lab_index = {p.id: p.point_index for p in lab_points}
    by_index = lambda table, idx: {idx[k]: v for k, v in table.items()}  # noqa: E731
    assert by_index(lab.node_figures(theirs.id), lab_index) == by_index(
        source.node_figures(mine.id), index
    )
    assert by_index(lab.node_verdicts(theirs.id), lab_index) == by_index(
        source.node_verdicts(mine.id), index
    )
    for name in ("snubber_loss_method", "clamp_loss_method", "ring_model"):
        assert {
            (n, lab_index[p]): v for (n, p), v in lab.capture_methods(theirs.id, name).items()
        } == {(n, index[p]): v for (n, p), v in source.capture_methods(mine.id, name).items()}
    assert {(n, lab_index[p]) for n, p in lab.clipped_points(theirs.id)} == {
        (n, index[p]) for n, p in source.clipped_points(mine.id)
    }
    src_captures = list(source.iter_captures(mine.id))
    lab_captures = list(lab.iter_captures(theirs.id))
    assert len(lab_captures) == len(src_captures) > 0
    for got, want in zip(lab_captures, src_captures, strict=True):
        assert (lab_index[got.point_id], got.node, got.capture_index) == (
            index[want.point_id],
            want.node,
            want.capture_index,
        )
        assert got.codes.dtype == want.codes.dtype
        assert got.codes.tobytes() == want.codes.tobytes()
        for name in (
            "x_increment_s",
            "x_origin_s",
            "y_increment_v",
            "y_origin_v",
            "y_reference",
            "code_min",
            "code_max",
            "channel",
            "captured_at",
        ):
            assert getattr(got, name) == getattr(want, name), name
        mine_figures = source.capture_figures(want.id)
        their_figures = lab.capture_figures(got.id)
        assert mine_figures is not None and their_figures is not None
        assert their_figures | {"capture_id": 0} == mine_figures | {"capture_id": 0}
    strip = lambda events, idx: [  # noqa: E731
        {
            **e,
            "id": 0,
            "run_id": 0,
            "point_id": None if e["point_id"] is None else idx[e["point_id"]],
        }
        for e in events
    ]
    assert strip(lab.events(theirs.id), lab_index) == strip(source.events(mine.id), index)
    assert lab.last_safety_check(theirs.id) == source.last_safety_check(mine.id)


def test_publish_two_benches_read_back_bit_for_bit_and_again_duplicates_nothing(
    benches: Benches, lab_db: str
) -> None:
    code, out, err = publish(lab_db, benches.a, "--all")
    assert code == 0, err
    assert out.count(": published:") == 2 and "2 run(s) published" in out
    code, out, err = publish(lab_db, benches.b, "latest")
    assert code == 0, err
    assert counts(lab_db) == source_counts(benches.a, benches.b)
    with LabDatabase(lab_db) as lab:
        for path in (benches.a, benches.b):
            with Store(path, create=False) as source:
                for run in source.runs():
                    assert_same_run(source, lab, run.uuid)
        # the codes are the bench store's bytes as stored (compressed), not re-encoded
        with sqlite3.connect(benches.b) as conn:
            stored = conn.execute("SELECT codes, codec FROM captures ORDER BY id").fetchall()
        (run_b,) = lab.runs_by_uuid(Store(benches.b, create=False).runs()[0].uuid)
        rows = lab.conn.execute(
            "SELECT codes, codec FROM captures WHERE run_id = %s ORDER BY id", [run_b.id]
        ).fetchall()
        assert [(bytes(r["codes"]), r["codec"]) for r in rows] == stored
    # Again, from both benches: nothing is copied twice.
    before = counts(lab_db)
    for path in (benches.a, benches.b):
        code, out, err = publish(lab_db, path, "--all")
        assert code == 0, err
        assert "0 run(s) published" in out and "already there" in out
    code, out, _ = publish(lab_db, benches.a, "1")
    assert code == 0 and "already there" in out
    assert counts(lab_db) == before


def test_report_compare_and_export_read_the_lab_database_as_the_bench_store(
    benches: Benches, lab_db: str, tmp_path: Path
) -> None:
    for path in (benches.a, benches.b):
        assert publish(lab_db, path, "--all")[0] == 0
    with Store(benches.a, create=False) as a, Store(benches.b, create=False) as b:
        baseline, candidate = a.runs()[0].uuid, b.runs()[0].uuid
    # report: the same summary, read from the lab database or from the bench's store
    code, lab_json, err = run_cli("report", baseline, "--db", lab_db, "--format", "json")
    assert code == 0, err
    code, bench_json, _ = run_cli("report", baseline, "--db", str(benches.a), "--format", "json")
    lab_summary, bench_summary = json.loads(lab_json), json.loads(bench_json)
    lab_summary.pop("run"), bench_summary.pop("run")  # each database's own id
    assert lab_summary == bench_summary
    code, out, err = run_cli("report", baseline, "--db", lab_db, "--out", str(tmp_path / "r"))
    assert code == 0, err
    assert (tmp_path / "r" / "report.html").stat().st_size > 10_000
    # compare: both in the lab database, and the baseline there with the candidate local
    both_local = run_cli(
        "compare", "1", "1", "--db", str(benches.a), "--candidate-db", str(benches.b), "--json"
    )
    in_lab = run_cli("compare", baseline, candidate, "--db", lab_db, "--json")
    mixed = run_cli(
        "compare", baseline, "latest", "--db", lab_db, "--candidate-db", str(benches.b), "--json"
    )
    assert both_local[0] == in_lab[0] == mixed[0] == 0, (in_lab[2], mixed[2])
    strip_ids = lambda text: {  # noqa: E731
        k: v for k, v in json.loads(text).items() if k not in ("baseline", "candidate")
    }
    assert strip_ids(in_lab[1]) == strip_ids(both_local[1]) == strip_ids(mixed[1])
    # design --run and export
    code, lab_design, _ = run_cli("design", "--run", baseline, "--db", lab_db, "--json")
    assert code == 0
    assert lab_design == run_cli("design", "--run", "1", "--db", str(benches.a), "--json")[1]
    out = tmp_path / "exported"
    code, _, err = run_cli("export", baseline, "--db", lab_db, "--out", str(out))
    assert code == 0, err
    local = tmp_path / "local"
    assert run_cli("export", "1", "--db", str(benches.a), "--out", str(local))[0] == 0
    with np.load(out / "captures.npz") as got, np.load(local / "captures.npz") as want:
        assert sorted(got.files) == sorted(want.files)
        for name in want.files:
            assert got[name].tobytes() == want[name].tobytes(), name


def test_runs_filters_cross_benches(benches: Benches, lab_db: str) -> None:
    for path in (benches.a, benches.b):
        assert publish(lab_db, path, "--all")[0] == 0
    listed = lambda *args: json.loads(run_cli("runs", "--db", lab_db, "--json", *args)[1])  # noqa: E731
    everything = listed()
    assert len(everything) == 3
    assert {run["bench_host"] for run in everything} >= {"bench-b"}
    assert [run["bench_host"] for run in listed("--bench", "BENCH-B")] == ["bench-b"]
    assert len(listed("--bench", "bench-b:")) == 1  # the identity HOST:DIGEST, in part
    snubbers = {run["snubber_label"] for run in everything}
    one = sorted(snubbers)[0]
    assert {run["snubber_label"] for run in listed("--snubber", one.upper())} == {one}
    dut = everything[0]["dut_label"]
    assert len(listed("--dut", dut[:6].lower())) == sum(r["dut_label"] == dut for r in everything)
    today = everything[0]["started_at"][:10]
    assert len(listed("--since", today, "--until", today)) == 3
    assert listed("--until", "2000-01-01") == []
    assert listed("--since", "2999-01-01T00:00") == []
    code, out, err = run_cli("runs", "--db", lab_db, "--since", "last week")
    assert code == 2 and "--since 'last week'" in err and "YYYY-MM-DD" in err
    code, out, _ = run_cli("runs", "--db", lab_db, "--dut", "no such board")
    assert code == 0 and "no runs match" in out and "***" in out


# --------------------------------------------------------------------------- cut short


def _wait_for(condition, what: str, process=None, timeout_s: float = 60.0) -> None:
    """Wait until ``condition()``; fail at once if ``process`` ends first (saying why)."""
    deadline = time.monotonic() + timeout_s
    while not condition():
        if process is not None and process.poll() is not None:
            raise AssertionError(f"the publisher ended first: {process.communicate()}")
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out waiting for {what}")
        time.sleep(0.05)


def _blocked_publisher(url: str) -> int | None:
    """The backend pid of a session waiting for a lock (the publisher), or None."""
    with psycopg.connect(url, autocommit=True) as conn:
        row = conn.execute(
            "SELECT pid FROM pg_stat_activity WHERE wait_event_type = 'Lock' "
            "AND datname = current_database()"
        ).fetchone()
    return None if row is None else row[0]


@pytest.fixture
def held_events(lab_db: str) -> Iterator[psycopg.Connection]:
    """A connection holding a SHARE lock on the events table: a publisher that reaches its
    events waits there with its run's points, captures and figures written but not committed.
    SHARE conflicts with the ROW EXCLUSIVE lock COPY FROM takes, and not with reads
    (PostgreSQL 15 documentation, 13.3.1, table-level lock modes)."""
    LabDatabase(lab_db, setup=True).close()  # the tables, empty
    conn = psycopg.connect(lab_db)
    conn.execute("LOCK TABLE events IN SHARE MODE")
    yield conn
    conn.close()


def _start_publish(url: str, store: Path, *args: str) -> subprocess.Popen[str]:
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    return subprocess.Popen(
        [*LABSEQ, "publish", *args, "--to", url, "--db", str(store)],
        cwd=ROOT,
        env=env,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )


def _uncommitted_bytes(url: str) -> int:
    """Bytes the captures table occupies, committed or not: a publisher's uncommitted rows
    take pages that a reader's COUNT(*) does not see (MVCC, documentation chapter 13)."""
    with psycopg.connect(url) as conn:
        return conn.execute("SELECT pg_total_relation_size('captures')").fetchone()[0]


def test_publish_killed_midway_shows_nothing_then_rerun_completes(
    benches: Benches, lab_db: str, held_events: psycopg.Connection
) -> None:
    # run 1 goes in first; the killed publish is of run 2 with it
    held_events.rollback()
    assert publish(lab_db, benches.a, "1")[0] == 0
    published_one = counts(lab_db)
    empty_size = _uncommitted_bytes(lab_db)
    held_events.execute("LOCK TABLE events IN SHARE MODE")
    process = _start_publish(lab_db, benches.a, "--all")
    try:
        _wait_for(lambda: _blocked_publisher(lab_db) is not None, "the publisher to block", process)
        # its captures are written (the table grew) and not one of them is visible
        assert _uncommitted_bytes(lab_db) > empty_size
        assert counts(lab_db) == published_one
        process.send_signal(signal.SIGKILL)
        process.wait(timeout=30)
    finally:
        if process.poll() is None:
            process.kill()
        process.communicate()
    assert process.returncode == -signal.SIGKILL
    held_events.rollback()  # the server now finds the client gone and rolls its work back
    _wait_for(lambda: _blocked_publisher(lab_db) is None, "the killed session to end")
    assert counts(lab_db) == published_one
    # Rerun: what is missing, and nothing twice.
    code, out, err = publish(lab_db, benches.a, "--all")
    assert code == 0, err
    assert "1 run(s) published" in out and "run 1 (" not in out  # --all: those not there
    assert counts(lab_db) == source_counts(benches.a)
    with LabDatabase(lab_db) as lab, Store(benches.a, create=False) as source:
        for run in source.runs():
            assert_same_run(source, lab, run.uuid)


def test_dropped_connection_is_exit_3_nothing_half_visible_and_rerun_completes(
    benches: Benches, lab_db: str, held_events: psycopg.Connection, pg_server
) -> None:
    process = _start_publish(lab_db, benches.b, "--all")
    try:
        _wait_for(lambda: _blocked_publisher(lab_db) is not None, "the publisher to block", process)
        with psycopg.connect(lab_db, autocommit=True) as admin:
            # the server ends the publisher's session as a dropped network would
            admin.execute("SELECT pg_terminate_backend(%s)", [_blocked_publisher(lab_db)])
        out, err = process.communicate(timeout=60)
    finally:
        if process.poll() is None:
            process.kill()
    assert process.returncode == 3, err
    assert "cut short" in err and "publish again" in err and "Traceback" not in err
    assert pg_server.password not in out + err and "***" in err
    held_events.rollback()
    assert counts(lab_db)["runs"] == 0 and counts(lab_db)["captures"] == 0
    code, out, err = publish(lab_db, benches.b, "--all")
    assert code == 0, err
    assert counts(lab_db) == source_counts(benches.b)


# --------------------------------------------------------------------------- captures later


def test_no_captures_then_captures_added_in_one_go(
    benches: Benches, lab_db: str, tmp_path: Path
) -> None:
    code, out, err = publish(lab_db, benches.b, "--all", "--no-captures")
    assert code == 0, err
    assert "no codes" in out
    with LabDatabase(lab_db) as lab:
        (run,) = lab.runs()
        figures = lab.node_figures(run.id)
        assert figures and len(list(lab.iter_captures(run.id, with_codes=False))) > 0
    code, _, err = run_cli("export", "latest", "--db", lab_db, "--out", str(tmp_path / "x"))
    assert code == 2 and "without its raw captures" in err
    code, out, err = run_cli("report", "latest", "--db", lab_db, "--out", str(tmp_path / "r"))
    assert code == 0, err
    assert "No captures stored for this point." in (tmp_path / "r" / "report.html").read_text()
    code, out, err = publish(lab_db, benches.b, "--all")
    assert code == 0, err
    assert "captures added" in out
    assert counts(lab_db) == source_counts(benches.b)
    with LabDatabase(lab_db) as lab, Store(benches.b, create=False) as source:
        assert lab.runs()[0].id == run.id  # the same run, now whole
        assert_same_run(source, lab, run.uuid)


# --------------------------------------------------------------------------- credentials


def test_credentials_from_the_standard_places_and_never_printed(
    benches: Benches, pg_server, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    url = pg_server.url()
    bare = pg_server.url(password=False)
    secret = pg_server.password
    assert redact(url) == bare.replace("lab@", "lab:***@")
    assert redact("postgresql://u@h/db?password=hunter2&sslmode=require") == (
        "postgresql://u@h/db?password=***&sslmode=require"
    )
    # no password anywhere: refused by the server, exit 3, the URL shown without it
    monkeypatch.delenv("PGPASSWORD", raising=False)
    monkeypatch.setenv("PGPASSFILE", str(tmp_path / "none"))
    code, out, err = run_cli("runs", "--db", bare)
    assert code == 3 and "cannot connect" in err
    # a wrong password in the URL: refused, and the message does not carry it
    wrong = url.replace("lab:", "lab:Wr0ng-")
    code, out, err = run_cli("publish", "--all", "--to", wrong, "--db", str(benches.a))
    assert code == 3 and "Wr0ng" not in out + err and "lab:***@" in err
    # PGPASSWORD (libpq's environment variable; PostgreSQL 15 documentation, 34.15)
    monkeypatch.setenv("PGPASSWORD", secret)
    code, out, err = run_cli("publish", "1", "--to", bare, "--db", str(benches.a))
    assert code == 0, err
    monkeypatch.delenv("PGPASSWORD")
    # the password file (34.16): hostname:port:database:username:password, mode 0600
    passfile = tmp_path / "pgpass"
    escaped = secret.replace("\\", "\\\\").replace(":", "\\:")
    passfile.write_text(f"*:*:*:lab:{escaped}\n")
    passfile.chmod(0o600)
    monkeypatch.setenv("PGPASSFILE", str(passfile))
    code, out, err = run_cli("runs", "--db", bare)
    assert code == 0, err
    # with the password in the URL: used, never printed, never stored
    code, out, err = run_cli("publish", "--all", "--to", url, "--db", str(benches.a))
    assert code == 0, err
    for args in (("runs", "--db", url), ("runs", "--db", url, "--json")):
        code, out, err = run_cli(*args)
        assert secret not in out + err
    code, out, err = run_cli("publish", "--all", "--to", url, "--db", str(benches.a))
    assert secret not in out + err and "lab:***@" in out
    with psycopg.connect(url) as conn:
        for table in TABLES:
            found = conn.execute(
                f"SELECT COUNT(*) FROM {table} t WHERE t::text LIKE %s", [f"%{secret}%"]
            ).fetchone()[0]
            assert found == 0, table


# --------------------------------------------------------------------------- schema


def test_schema_version_checked_and_foreign_databases_refused(
    benches: Benches, lab_db: str, pg_server
) -> None:
    # an empty database is not one to read from; publishing sets it up
    code, _, err = run_cli("runs", "--db", lab_db)
    assert code == 2 and "not a labseq lab database" in err
    assert publish(lab_db, benches.a, "1")[0] == 0
    with psycopg.connect(lab_db, autocommit=True) as conn:
        conn.execute("UPDATE schema_info SET version = version + 1")
    before = counts(lab_db)
    for args in (
        ("runs", "--db", lab_db),
        ("publish", "--all", "--to", lab_db, "--db", str(benches.a)),
    ):
        code, _, err = run_cli(*args)
        assert code == 2 and "newer labseq" in err and "Nothing was changed" in err
    assert counts(lab_db) == before
    with psycopg.connect(lab_db, autocommit=True) as conn:
        conn.execute("UPDATE schema_info SET version = version - 1, application = 'other'")
    code, _, err = run_cli("runs", "--db", lab_db)
    assert code == 2 and "not labseq's" in err
    # a server that is not there: a store failure, exit 3
    gone = pg_server.url("x").replace(str(pg_server.root), "/nonexistent")
    code, _, err = run_cli("report", "1", "--db", gone)
    assert code == 3 and "cannot connect" in err


def test_writing_commands_refuse_a_lab_database(lab_db: str, tmp_path: Path) -> None:
    sequence = demo_sequence(tmp_path)
    for args in (("run", str(sequence)), ("resume", "1"), ("analyze-run", "1")):
        code, _, err = run_cli(*args, "--db", lab_db)
        assert code == 2 and "labseq publish" in err and "***" in err, args


def test_running_run_refused_and_all_leaves_unfinished_out(lab_db: str, tmp_path: Path) -> None:
    db = tmp_path / "s.sqlite"
    with Store(db) as store:
        for status in ("running", "aborted", "finished"):
            run_id = store.create_run(
                sequence_text="",
                sequence_sha256="0" * 64,
                sequence_path="s.toml",
                dut_label="D",
                snubber_label="S",
                bench_kind="sim",
            )
            if status != "running":
                store.set_run_status(run_id, status)
    code, _, err = publish(lab_db, db, "1")
    assert code == 2 and "still running" in err
    code, out, err = publish(lab_db, db, "--all")
    assert code == 0, err
    assert "run 1 (" in out and "left out: still running" in out
    assert "2 run(s) published" in out and counts(lab_db)["runs"] == 2  # aborted and finished
    # a run changed on the bench since (resumed, then ended again) is kept as published
    with Store(db) as store:
        store.claim_run(2)
        store.set_run_status(2, "finished")
    code, out, err = publish(lab_db, db, "--all")
    assert code == 0 and "run 2 (" in out and "kept as published" in out
    assert counts(lab_db)["runs"] == 2
