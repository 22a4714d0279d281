"""Signals at the runner: SIGINT and SIGTERM end the run safe; after SIGKILL, ``resume`` first
puts the bench safe, then completes exactly the missing points with nothing committed lost.

The runner runs as a separate ``labseq`` process against a simulated bench in this process, the
way it would drive a real bench (VISA resources, hazardous voltage acknowledged).
"""

from __future__ import annotations

import hashlib
import signal
import sqlite3
import subprocess
import time

import pytest
from sweeps import LABSEQ, demo_sequence

from labseq.sequence import load_sequence
from labseq.store import Store
from sim_instruments.flyback import DEMO_DUTS, load_dut


def _start_runner(tmp_path, make_sim_bench, settle: str | None = None):
    probe = load_sequence(demo_sequence(tmp_path, name="probe.toml"))
    design = load_dut(DEMO_DUTS["telecom_dc"]).with_snubber(
        probe.snubber.resistance_ohm, probe.snubber.capacitance_f
    )
    sim = make_sim_bench(design=design)
    path = demo_sequence(tmp_path, resources=sim.resources, settle=settle)
    db = tmp_path / "run.sqlite"
    process = subprocess.Popen(
        [*LABSEQ, "run", str(path), "--db", str(db), "--quiet"],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    return sim, db, process


def _wait_for_captures(db, process, count: int, timeout_s: float = 30.0) -> None:
    """Poll the store (read-only, as another process would) until ``count`` captures are in."""
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        assert process.poll() is None, process.communicate()
        if db.exists():
            try:
                with sqlite3.connect(f"file:{db}?mode=ro", uri=True) as conn:
                    if conn.execute("SELECT count(*) FROM captures").fetchone()[0] >= count:
                        return
            except sqlite3.OperationalError:
                pass  # the schema is not there yet
        time.sleep(0.02)
    pytest.fail("the runner stored too few captures in time")


def _digests(db) -> dict[int, str]:
    with Store(db, create=False) as store:
        return {c.id: hashlib.sha256(c.codes.tobytes()).hexdigest() for c in store.iter_captures(1)}


@pytest.mark.parametrize("signum", [signal.SIGINT, signal.SIGTERM])
def test_sigint_and_sigterm_end_safe_and_resume_completes(tmp_path, make_sim_bench, signum):
    sim, db, process = _start_runner(tmp_path, make_sim_bench)
    _wait_for_captures(db, process, 4)
    process.send_signal(signum)
    _out, err = process.communicate(timeout=60)
    assert process.returncode == 130, err
    assert "Traceback" not in err
    # Load and source off, confirmed; the bus watched below 60 V DC (ES1, IEC 62368-1, from
    # memory) because this is a VISA bench.
    assert not sim.state.source_output_on and not sim.state.load_input_on
    assert sim.state.bus_voltage_v() < 60.0
    with Store(db, create=False) as store:
        assert store.integrity_check() == "ok"
        assert store.run(1).status == "interrupted"
        assert any("SIG" in e["message"] for e in store.events(1))
    before = _digests(db)

    resumed = subprocess.run(
        [*LABSEQ, "resume", "1", "--db", str(db), "--quiet"], capture_output=True, text=True
    )
    assert resumed.returncode == 0, resumed.stderr
    after = _digests(db)
    assert {k: after[k] for k in before} == before
    assert len(after) == 48  # 16 points x 3 captures, none taken twice
    assert not sim.state.source_output_on and not sim.state.load_input_on


def test_sigkill_then_resume_puts_bench_safe_first_and_loses_nothing(tmp_path, make_sim_bench):
    sim, db, process = _start_runner(tmp_path, make_sim_bench)
    _wait_for_captures(db, process, 5)
    process.kill()
    process.wait(timeout=10)
    # Killed outright: nothing could switch off, the bench is still live.
    assert sim.state.source_output_on
    before = _digests(db)
    with Store(db, create=False) as store:
        assert store.integrity_check() == "ok"

    history_mark = len(sim.state.line_history)
    resumed = subprocess.run(
        [*LABSEQ, "resume", "1", "--db", str(db), "--quiet"], capture_output=True, text=True
    )
    assert resumed.returncode == 0, resumed.stderr
    # The first thing resume did at the source was switch it off.
    assert sim.state.line_history[history_mark][1] is False
    after = _digests(db)
    assert {k: after[k] for k in before} == before
    assert len(after) == 48
    with Store(db, create=False) as store:
        run = store.run(1)
        assert run.status == "finished" and run.points_done == 16
        assert all(p.verdict in ("pass", "fail") for p in store.points(1))
    assert not sim.state.source_output_on and not sim.state.load_input_on
