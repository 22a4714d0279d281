"""Two labseq processes on the same bench or store: the second is refused with a clear message
and the first finishes untouched."""

from __future__ import annotations

import subprocess
import sys

from sweeps import LABSEQ, demo_sequence
from test_runner_signals import _start_runner, _wait_for_captures

from labseq.locks import LockError, bench_lock_path, exclusive
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

    assert same_store.returncode == 1
    assert "in use by another labseq process" in same_store.stderr
    assert str(db) in same_store.stderr
    assert other_store.returncode == 1
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
