"""Two labseq processes on the same bench or store: the second is refused with a clear message
and the first finishes untouched."""

from __future__ import annotations

import os
import stat
import subprocess
import sys
import threading
import time

import pytest
from sweeps import LABSEQ, demo_sequence, run_cli
from test_runner_signals import _start_runner, _wait_for_captures

from labseq.locks import (
    LockError,
    bench_lock_path,
    exclusive,
    lock_dir,
    remove_stale_locks,
    store_lock,
)
from labseq.process import process_alive, process_start_time
from labseq.runner import RunStateError, claim_for_resume
from labseq.store import Store


def test_second_process_is_refused_on_same_store_and_same_bench(tmp_path, make_sim_bench):
    # Half a second of settling per point keeps the first run going while the others try.
    sim, db, first = _start_runner(tmp_path, make_sim_bench, settle="0.5 s")
    _wait_for_captures(db, first, 2)
    sequence = tmp_path / "sweep.toml"  # the first runner's own file (VISA resources of the sim)

    same_store = subprocess.run(
        [*LABSEQ, "run", str(sequence), "--db", str(db), "--quiet", "--yes"],
        capture_output=True,
        text=True,
    )
    other_store = subprocess.run(
        [*LABSEQ, "run", str(sequence), "--db", str(tmp_path / "other.sqlite"), "--quiet", "--yes"],
        capture_output=True,
        text=True,
    )
    _out, err = first.communicate(timeout=120)
    assert first.returncode == 0, err

    assert same_store.returncode == 3  # the store is busy: not a judgement
    assert "in use by another labseq process" in same_store.stderr
    assert str(db) in same_store.stderr
    assert other_store.returncode == 3
    assert "the instrument TCPIP::127.0.0.1::" in other_store.stderr
    assert "Traceback" not in same_store.stderr + other_store.stderr

    # The first run was not disturbed: one run, complete, sound.
    with Store(db, create=False) as store:
        assert [run.status for run in store.runs()] == ["finished"]
        assert store.run(1).points_done == 16
        assert store.integrity_check() == "ok"
    assert not sim.state.source_output_on


def test_lock_is_released_when_the_holder_dies(tmp_path):
    path = tmp_path / "x.lock"
    holder = subprocess.Popen(
        [
            sys.executable,
            "-c",
            "import sys, time; from pathlib import Path; from labseq.locks import exclusive\n"
            f"with exclusive(Path({str(path)!r}), 'x'):\n"
            "    print('held', flush=True); time.sleep(60)",
        ],
        stdout=subprocess.PIPE,
        text=True,
    )
    assert holder.stdout.readline().strip() == "held"
    try:
        with exclusive(path, "the thing"):
            raise AssertionError("the lock should be held by the other process")
    except LockError as error:
        assert f"pid {holder.pid}" in str(error) and "the thing" in str(error)
    holder.kill()
    holder.wait()
    with exclusive(path, "the thing"):
        pass  # taken at once: the kernel released the dead holder's lock


def test_resource_spelling_does_not_dodge_the_lock():
    assert bench_lock_path("TCPIP::10.0.0.5::5025::SOCKET") == bench_lock_path(
        "tcpip::10.0.0.5::5025::socket "
    )


def test_sim_kind_takes_no_instrument_locks(tmp_path):
    sequence = demo_sequence(tmp_path, lines=["48 V"], loads=["1 A"], captures=1)
    done = subprocess.run(
        [*LABSEQ, "run", str(sequence), "--db", str(tmp_path / "a.sqlite"), "--quiet"],
        capture_output=True,
        text=True,
    )
    assert done.returncode == 0, done.stderr


# --------------------------------------------------------------------------- keys and files


@pytest.fixture
def lock_home(tmp_path, monkeypatch):
    """A private lock directory of this test's own."""
    directory = tmp_path / "locks"
    monkeypatch.setenv("LABSEQ_LOCK_DIR", str(directory))
    return directory


def test_store_reached_through_a_link_shares_its_lock(tmp_path, lock_home):
    store = tmp_path / "real.sqlite"
    Store(store).close()
    link = tmp_path / "link.sqlite"
    link.symlink_to(store)
    hard = tmp_path / "hard.sqlite"
    os.link(store, hard)
    with store_lock(store):
        for other in (link, hard, tmp_path / "." / "real.sqlite"):
            with (
                pytest.raises(LockError, match="in use by another labseq process"),
                store_lock(other),
            ):
                pass


def test_lock_directory_is_private_and_checked(tmp_path, lock_home, monkeypatch):
    lock_dir()
    assert stat.S_IMODE(os.stat(lock_home).st_mode) == 0o700
    os.chmod(lock_home, 0o755)  # ours, readable by others: made private again
    lock_dir()
    assert stat.S_IMODE(os.stat(lock_home).st_mode) == 0o700
    os.chmod(lock_home, 0o777)
    with pytest.raises(LockError, match="mode 0777; other users may write"):
        lock_dir()
    os.chmod(lock_home, 0o700)
    linked = tmp_path / "linked"
    linked.symlink_to(lock_home)
    monkeypatch.setenv("LABSEQ_LOCK_DIR", str(linked))
    with pytest.raises(LockError, match="not a plain directory"):
        lock_dir()


@pytest.mark.skipif(os.geteuid() != 0, reason="making a directory another user owns needs root")
def test_lock_directory_of_another_user_is_refused(lock_home):
    lock_home.mkdir(mode=0o700)
    os.chown(lock_home, 65534, 65534)
    with pytest.raises(LockError, match="belongs to user id 65534, not to you"):
        lock_dir()


def test_a_planted_link_is_not_followed_and_nothing_is_truncated(tmp_path, lock_home):
    victim = tmp_path / "precious.txt"
    victim.write_text("keep me\n" * 100)
    path = bench_lock_path("TCPIP::10.0.0.5::5025::SOCKET")
    path.symlink_to(victim)
    with pytest.raises(LockError, match="cannot open the lock file"), exclusive(path, "x"):
        pass
    path.unlink()
    os.link(victim, path)  # a second name for the victim: refused as well
    with pytest.raises(LockError, match="single name"), exclusive(path, "x"):
        pass
    assert victim.read_text() == "keep me\n" * 100


def test_lock_files_are_removed_and_stale_ones_swept(tmp_path, lock_home):
    path = bench_lock_path("GPIB0::7::INSTR")
    with exclusive(path, "the instrument"):
        assert path.exists()
    assert not path.exists()  # let go: removed
    # Files left by killed processes (no holder) are swept once old enough; a held one is not.
    left = [bench_lock_path(f"GPIB0::{n}::INSTR") for n in range(3)]
    for stale in left:
        stale.write_text("12345\n")
        os.utime(stale, (0, 0))
    held = bench_lock_path("GPIB0::9::INSTR")
    with exclusive(held, "held"):
        os.utime(held, (0, 0))
        assert remove_stale_locks(lock_home) == 3
        assert held.exists()
    assert sorted(lock_home.iterdir()) == []


def test_a_waiting_lock_is_taken_when_the_holder_lets_go(lock_home):
    path = bench_lock_path("USB0::1::2::3::INSTR")
    ready = threading.Event()

    def hold() -> None:
        with exclusive(path, "x"):
            ready.set()
            time.sleep(0.5)

    holder = threading.Thread(target=hold)
    holder.start()
    ready.wait(10)
    with exclusive(path, "x", wait_s=60):
        assert path.exists()
    holder.join()


# --------------------------------------------------------------------------- owners of runs


def _running_run(db, **owner) -> None:
    with Store(db) as store:
        run_id = store.create_run(
            sequence_text="",
            sequence_sha256="",
            sequence_path="x",
            dut_label="d",
            snubber_label="s",
            bench_kind="sim",
        )
        store.db["runs"].update(run_id, owner)


def test_reused_pid_does_not_keep_a_dead_run_running(tmp_path):
    db = tmp_path / "s.sqlite"
    # Recorded by a process whose id is now ours but which started an hour before us.
    started = process_start_time(os.getpid())
    _running_run(db, pid=os.getpid(), process_started=started - 3600)
    with Store(db) as store:
        assert store.mark_abandoned_runs() == [1]
        assert store.run(1).status == "interrupted"
    assert process_alive(os.getpid(), started)
    assert not process_alive(os.getpid(), started - 3600)
    assert process_alive(os.getpid(), None)  # an older store: the id alone


def test_run_of_another_host_needs_an_explicit_take_over(tmp_path):
    db = tmp_path / "s.sqlite"
    _running_run(db, pid=1, host="bench-pc-7")
    with Store(db) as store:
        with pytest.raises(RunStateError) as refused:
            claim_for_resume(store, 1)
        message = str(refused.value)
        assert "bench-pc-7" in message and "--take-over" in message
        assert "two processes will command the same instruments" in message
        store.add_points(1, [(48.0, 1.0)], line_is_ac=False)
        claim_for_resume(store, 1, take_over=True)
        record = store.run(1)
        assert record.status == "running" and record.pid == os.getpid()
        assert any("taken over" in event["message"] for event in store.events(1))


def test_analyze_run_waits_for_the_store(tmp_path, lock_home):
    db = tmp_path / "run.sqlite"
    sequence = demo_sequence(tmp_path, lines=["48 V"], loads=["1 A"], captures=1)
    code, _out, err = run_cli("run", str(sequence), "--db", str(db), "--quiet")
    assert code == 0, err
    ready = threading.Event()

    def writer() -> None:
        with store_lock(db):
            ready.set()
            time.sleep(1.0)

    holder = threading.Thread(target=writer)
    holder.start()
    ready.wait(10)
    code, _out, err = run_cli("analyze-run", "1", "--db", str(db), "--wait", "0")
    assert code == 3 and f"the store {db} is in use by another labseq process" in err
    code, out, err = run_cli("analyze-run", "1", "--db", str(db), "--wait", "60 s")
    holder.join()
    assert code == 0, err
    assert "re-analysed 1 captures" in out
