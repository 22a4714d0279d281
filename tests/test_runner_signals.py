"""Signals at the runner, as a user at the keyboard, ``timeout``, CI runners and service managers
send them: every one ends with load and source off; after SIGKILL, ``resume`` first puts the
bench safe, then completes exactly what is missing with nothing committed lost.

The runner runs as a separate ``labseq`` process against a simulated bench in this process,
reached over VISA the way a real bench is (hazardous voltage acknowledged, ``--yes`` for an
unattended start). What the outputs are at the end is read back by a raw-socket SCPI client
(``RawScpiClient`` in conftest.py), not by labseq's drivers. An exit status of 128 + the signal
number for a process that ends on a signal is the POSIX shells' convention (from memory: POSIX
"Shell Command Language", 2.8.2 Exit Status for Commands).
"""

from __future__ import annotations

import hashlib
import random
import signal
import sqlite3
import subprocess
import time
from collections.abc import Callable
from pathlib import Path

import pytest
from conftest import RawScpiClient
from sweeps import LABSEQ, demo_sequence

from labseq.sequence import load_sequence
from labseq.store import Store
from labseq_sim_instruments.bench import SimBench
from labseq_sim_instruments.flyback import DEMO_DUTS, FlybackDesign, load_dut

#: Generous bound on any one labseq process here (a busy 2-core machine is slow, never stuck).
PROCESS_TIMEOUT_S = 120.0


def demo_design(tmp_path: Path) -> FlybackDesign:
    """The DC demo DUT with the demo sequence's snubber fitted, as ``kind = "sim"`` builds it."""
    probe = load_sequence(demo_sequence(tmp_path, name="probe.toml"))
    return load_dut(DEMO_DUTS["telecom_dc"]).with_snubber(
        probe.snubber.resistance_ohm, probe.snubber.capacitance_f
    )


def start_labseq(*args: str) -> subprocess.Popen[str]:
    """``labseq ARGS`` as its own process, stdout and stderr captured."""
    return subprocess.Popen(
        [*LABSEQ, *args], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True
    )


def run_labseq(*args: str) -> subprocess.CompletedProcess[str]:
    """``labseq ARGS`` to its end, as its own process."""
    return subprocess.run(
        [*LABSEQ, *args], capture_output=True, text=True, timeout=PROCESS_TIMEOUT_S
    )


def outputs(sim: SimBench) -> tuple[str, str]:
    """The source's ``OUTP?`` and the load's ``INP?`` as a raw socket reads them ("0" = off)."""
    replies = []
    for role, query in (("source", "OUTP?"), ("load", "INP?")):
        client = RawScpiClient(sim.servers[role].port)
        try:
            replies.append(client.query(query))
        finally:
            client.close()
    return replies[0], replies[1]


def _start_runner(
    tmp_path: Path, make_sim_bench: Callable[..., SimBench], settle: str | None = None
) -> tuple[SimBench, Path, subprocess.Popen[str]]:
    sim = make_sim_bench(design=demo_design(tmp_path))
    path = demo_sequence(tmp_path, resources=sim.resources, settle=settle)
    db = tmp_path / "run.sqlite"
    return sim, db, start_labseq("run", str(path), "--db", str(db), "--quiet", "--yes")


def stored_captures(db: Path) -> int:
    """Captures in the store, read as another process would (0 before the schema exists)."""
    if not db.exists():
        return 0
    try:
        with sqlite3.connect(f"file:{db}?mode=ro", uri=True) as conn:
            return conn.execute("SELECT count(*) FROM captures").fetchone()[0]
    except sqlite3.OperationalError:
        return 0


def wait_for_captures(
    db: Path, process: subprocess.Popen[str], count: int, timeout_s: float = 60.0
) -> bool:
    """Poll the store until ``count`` captures are in; False if the process ended first."""
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if process.poll() is not None:
            return False
        if stored_captures(db) >= count:
            return True
        time.sleep(0.005)
    pytest.fail("the runner stored too few captures in time")


def _wait_for_captures(
    db: Path, process: subprocess.Popen[str], count: int, timeout_s: float = 60.0
) -> None:
    """:func:`wait_for_captures`, failing the test if the process ended first."""
    if not wait_for_captures(db, process, count, timeout_s):
        pytest.fail(f"the runner ended before {count} captures: {process.communicate()}")


def _digests(db: Path) -> dict[int, str]:
    with Store(db, create=False) as store:
        return {c.id: hashlib.sha256(c.codes.tobytes()).hexdigest() for c in store.iter_captures(1)}


@pytest.mark.parametrize("signum", [signal.SIGINT, signal.SIGTERM])
def test_sigint_and_sigterm_end_safe_and_resume_completes(tmp_path, make_sim_bench, signum):
    sim, db, process = _start_runner(tmp_path, make_sim_bench)
    _wait_for_captures(db, process, 4)
    process.send_signal(signum)
    _out, err = process.communicate(timeout=PROCESS_TIMEOUT_S)
    assert process.returncode == 128 + signum, err
    assert "Traceback" not in err
    # Load and source off, read back; the bus watched below 60 V DC (ES1, IEC 62368-1, from
    # memory) because this is a VISA bench.
    assert outputs(sim) == ("0", "0")
    assert sim.state.bus_voltage_v() < 60.0
    assert "verify with a meter before touching" in err
    with Store(db, create=False) as store:
        assert store.integrity_check() == "ok"
        assert store.run(1).status == "interrupted"
        assert any(signal.Signals(signum).name in e["message"] for e in store.events(1))
    before = _digests(db)

    resumed = run_labseq("resume", "1", "--db", str(db), "--quiet", "--yes")
    assert resumed.returncode == 0, resumed.stderr
    after = _digests(db)
    assert {k: after[k] for k in before} == before
    assert len(after) == 48  # 16 points x 3 captures, none taken twice
    assert outputs(sim) == ("0", "0")


def test_sigkill_then_resume_puts_bench_safe_first_and_loses_nothing(tmp_path, make_sim_bench):
    sim, db, process = _start_runner(tmp_path, make_sim_bench)
    _wait_for_captures(db, process, 5)
    process.kill()
    process.wait(timeout=10)
    # Killed outright: nothing could switch off, the bench is still live.
    assert outputs(sim)[0] == "1"
    before = _digests(db)
    with Store(db, create=False) as store:
        assert store.integrity_check() == "ok"

    history_mark = len(sim.state.line_history)
    resumed = run_labseq("resume", "1", "--db", str(db), "--quiet", "--yes")
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
    assert outputs(sim) == ("0", "0")


#: The double signal: one signal, then the same one again a random 0-10 ms later (what
#: ``timeout``, CI runners and service managers send), at random moments of a small sweep up to
#: its very end. Mostly SIGTERM, the case reported; SIGINT and SIGHUP as well.
DOUBLE_SIGNAL_TRIES = 20
DOUBLE_SIGNAL_ORDER = (signal.SIGTERM, signal.SIGTERM, signal.SIGINT, signal.SIGTERM, signal.SIGHUP)
DOUBLE_SIGNAL_BUDGET_S = 400.0


def test_two_signals_a_few_ms_apart_leave_the_outputs_off(tmp_path, make_sim_bench, capsys):
    rng = random.Random(11)  # seeded: the same moments and gaps every run
    sim = make_sim_bench(design=demo_design(tmp_path))
    lines, loads, captures = ["36 V", "48 V"], ["1 A", "2 A"], 2
    total = len(lines) * len(loads) * captures
    deadline = time.monotonic() + DOUBLE_SIGNAL_BUDGET_S
    rows: list[tuple[str, int, float, float, int, tuple[str, str], str]] = []
    attempt = late = 0
    while len(rows) < DOUBLE_SIGNAL_TRIES:
        assert time.monotonic() < deadline, f"only {len(rows)} tries in the time budget"
        attempt += 1
        assert attempt <= 2 * DOUBLE_SIGNAL_TRIES, "too many runs ended before the signal"
        signum = DOUBLE_SIGNAL_ORDER[len(rows) % len(DOUBLE_SIGNAL_ORDER)]
        path = demo_sequence(
            tmp_path,
            lines=lines,
            loads=loads,
            captures=captures,
            resources=sim.resources,
            settle="20 ms",
            name=f"double{attempt}.toml",
        )
        db = tmp_path / f"double{attempt}.sqlite"
        wait_for, delay_s, gap_s = rng.randint(1, total), rng.uniform(0, 0.02), rng.uniform(0, 0.01)
        process = start_labseq("run", str(path), "--db", str(db), "--quiet", "--yes")
        if not wait_for_captures(db, process, wait_for):
            process.communicate(timeout=PROCESS_TIMEOUT_S)
            late += 1
            continue
        time.sleep(delay_s)
        if process.poll() is not None:  # it finished first: no signal reached a live run
            process.communicate(timeout=PROCESS_TIMEOUT_S)
            late += 1
            continue
        process.send_signal(signum)
        time.sleep(gap_s)
        process.send_signal(signum)
        _out, err = process.communicate(timeout=PROCESS_TIMEOUT_S)
        with Store(db, create=False) as store:
            status = store.run(1).status
        assert "Traceback" not in err, err
        if status == "finished":  # the run had ended, bench safe, before the first signal
            assert process.returncode == 0 and outputs(sim) == ("0", "0"), err
            late += 1
            continue
        rows.append(
            (
                signal.Signals(signum).name,
                wait_for,
                delay_s,
                gap_s,
                process.returncode,
                outputs(sim),
                status,
            )
        )
    held = [row for row in rows if row[5] == ("0", "0") and row[4] == 128 + signal.Signals[row[0]]]
    with capsys.disabled():
        print(
            f"\ndouble signal: {len(rows)} tries in {attempt} runs ({late} ended before the "
            f"first signal), outputs off and exit status "
            f"128+n in {len(held)}; gaps {min(r[3] for r in rows) * 1e3:.1f}-"
            f"{max(r[3] for r in rows) * 1e3:.1f} ms; signals after "
            f"{min(r[1] for r in rows)}-{max(r[1] for r in rows)} of {total} captures"
        )
    for name, wait_for, delay_s, gap_s, code, read_back, status in rows:
        where = (
            f"{name} after {wait_for} captures + {delay_s * 1e3:.0f} ms, gap {gap_s * 1e3:.1f} ms"
        )
        assert read_back == ("0", "0"), f"{where}: outputs {read_back} after exit {code}"
        assert code == 128 + signal.Signals[name], f"{where}: exit status {code}"
        assert status == "interrupted", f"{where}: run {status}"


END_WINDOW_TRIES = 2


def test_sigkill_in_the_end_window_then_resume_finishes_figures_and_shutdown(
    tmp_path, make_sim_bench, capsys
):
    """Killed between the last capture and the end of the shutdown, a run is complete but its
    bench may be live and its last captures unanalysed: ``resume`` puts the bench safe, fills
    in the figures and verdicts, and watches the bus."""
    rng = random.Random(5)
    sim = make_sim_bench(design=demo_design(tmp_path))
    lines, loads, captures = ["48 V", "75 V"], ["2 A"], 3
    total = len(lines) * len(loads) * captures
    live_at_kill = unanalysed = 0
    for attempt in range(END_WINDOW_TRIES):
        path = demo_sequence(
            tmp_path,
            lines=lines,
            loads=loads,
            captures=captures,
            resources=sim.resources,
            name=f"end{attempt}.toml",
        )
        # Long records: the analysis of the last captures lags behind the sweep's end.
        path.write_text(path.read_text().replace("record_length = 20000", "record_length = 400000"))
        db = tmp_path / f"end{attempt}.sqlite"
        process = start_labseq("run", str(path), "--db", str(db), "--quiet", "--yes")
        _wait_for_captures(db, process, total)
        time.sleep(rng.uniform(0, 0.01))
        process.kill()
        process.wait(timeout=10)
        live_at_kill += outputs(sim) != ("0", "0")
        with Store(db, create=False) as store:
            unanalysed += sum(store.capture_figures(c.id) is None for c in store.iter_captures(1))

        resumed = run_labseq("resume", "1", "--db", str(db), "--quiet", "--yes")
        assert resumed.returncode == 0, resumed.stderr
        assert outputs(sim) == ("0", "0")
        with Store(db, create=False) as store:
            run = store.run(1)
            assert run.status == "finished" and run.points_done == run.points_total
            assert all(store.capture_figures(c.id) for c in store.iter_captures(1))
            assert all(p.verdict in ("pass", "fail") for p in store.points(1))
            assert store.last_safety_check(1).startswith("outputs off (load and source read back")
    with capsys.disabled():
        print(
            f"\nSIGKILL in the end window: {END_WINDOW_TRIES} tries, bench live at the kill in "
            f"{live_at_kill}, "
            f"{unanalysed} captures left without figures, all filled in by resume"
        )
