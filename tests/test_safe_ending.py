"""The end of a run when the bench does not cooperate, and values that could not run.

Every case runs ``labseq`` as its own process against a simulated bench reached over VISA, and
reads the outputs back with a raw-socket SCPI client (``RawScpiClient`` in conftest.py):

* an off command refused (SCPI-1999's −300 "Device-specific error", vol. 2, ch. 21.8.10), or
  taken and ignored by an output stuck on, once (a glitch: retried, the run ends safe) or every
  time (the run ends ``unsafe-end``, exit status 3, named first by ``labseq runs`` and at the
  top of the report, and no wait for a bus the source still holds up);
* a scope that never answers the bus reading ("bus unknown", never "bus inf V");
* the discharge wait shown with its live reading, and a signal during it acknowledged;
* values ``check`` used to accept that could not run (a ramp of 10^13 steps, a 10^300 s reply
  timeout, 2^70 captures, a 30-year settle, a bare ``timeout = 5000``);
* the ES1 gate (IEC 62368-1: 60 V DC, 30 V AC rms, from memory): the caution and a question at
  a terminal before outputs go on above it; ``--yes`` for an unattended start, recorded.
"""

from __future__ import annotations

import json
import os
import pty
import queue
import re
import signal
import subprocess
import threading
import time
from collections.abc import Callable
from dataclasses import replace
from pathlib import Path

import pytest
from conftest import RawScpiClient
from sweeps import LABSEQ, _set, demo_sequence, run_cli
from test_runner_signals import PROCESS_TIMEOUT_S, demo_design, outputs, run_labseq

from labseq.bench import BUS_DISCHARGE_TIMEOUT_S, ROLES
from labseq.sequence import SequenceError, parse_sequence
from labseq.store import Store
from labseq_sim_instruments.bench import SimBench

#: The exit status of a run whose end could not be confirmed safe (labseq run --help).
UNSAFE_END_EXIT = 3


def sweep_file(tmp_path: Path, sim: SimBench, lines: list[str], name: str = "sweep.toml") -> Path:
    """One load, one capture per line value, on ``sim`` as a VISA bench."""
    return demo_sequence(
        tmp_path, lines=lines, loads=["1 A"], captures=1, resources=sim.resources, name=name
    )


def flat(text: str) -> str:
    """``text`` with every run of whitespace one space (the terminal library wraps lines)."""
    return " ".join(text.split())


def never_switched_on(sim: SimBench) -> bool:
    """Whether the source's output has never been on, by the bench's own record."""
    return not any(on for _, on in sim.state.line_history)


# --------------------------------------------------------------------------- the off command

#: (faults, exit status, run status, (source, load) read back, the shutdown's words).
#: ``point=2`` is the sweep's last point: the outputs' next off command is the shutdown's. The
#: first case is two glitches at once (each retried); the others are broken for good.
REFUSALS = [
    ("load:stuck-on@point=2,source:refuse-off@point=2", 0, "finished", ("0", "0"), "outputs off"),
    ("source:refuse-off@point=2+", 3, "unsafe-end", ("1", "0"), "source NOT confirmed off"),
    ("source:stuck-on@point=2+", 3, "unsafe-end", ("1", "0"), "source NOT confirmed off"),
    ("load:refuse-off@point=2+", 3, "unsafe-end", ("0", "1"), "load NOT confirmed off"),
    ("scope:no-reply@off=1+", 3, "unsafe-end", ("0", "0"), "bus unknown"),
]


@pytest.mark.parametrize(("fault", "code", "status", "read_back", "words"), REFUSALS)
def test_a_refused_off_command_is_retried_or_reported_unsafe(
    tmp_path: Path,
    make_sim_bench: Callable[..., SimBench],
    fault: str,
    code: int,
    status: str,
    read_back: tuple[str, str],
    words: str,
) -> None:
    sim = make_sim_bench(design=demo_design(tmp_path), faults=fault)
    db = tmp_path / "run.sqlite"
    started = time.monotonic()
    done = run_labseq(
        "run", str(sweep_file(tmp_path, sim, ["48 V", "75 V"])), "--db", str(db), "--yes"
    )
    elapsed_s = time.monotonic() - started
    err = flat(done.stderr)
    planned = {tuple(spec.split("@")[0].split(":")) for spec in fault.split(",")}
    assert {(fired.role, fired.kind) for fired in sim.fired_faults} == planned
    assert done.returncode == code, done.stderr
    assert "Traceback" not in err and "inf V" not in err
    assert outputs(sim) == read_back
    assert words in err
    # A source still on holds the bus up: no wait for it (the wait's own bound is 300 s).
    assert elapsed_s < BUS_DISCHARGE_TIMEOUT_S / 3
    with Store(db, create=False) as store:
        assert store.run(1).status == status
        assert words in store.last_safety_check(1)
    if code == 0:
        assert "verify with a meter before touching" in err
    else:
        assert "bench NOT confirmed safe" in err and f"resume 1 --db {db}" in err


def test_unsafe_end_heads_the_runs_list_and_the_report(
    tmp_path: Path, make_sim_bench: Callable[..., SimBench]
) -> None:
    sim = make_sim_bench(design=demo_design(tmp_path), faults="source:refuse-off@point=2+")
    db = tmp_path / "run.sqlite"
    path = sweep_file(tmp_path, sim, ["48 V", "75 V"])
    first = run_labseq("run", str(path), "--db", str(db), "--quiet", "--yes")
    assert first.returncode == UNSAFE_END_EXIT, first.stderr
    history = list(sim.state.line_history)
    second = run_labseq("run", str(path), "--db", str(db), "--quiet", "--yes")
    # Run 2 finds the source still refusing: it sweeps nothing and ends unsafe too.
    assert second.returncode == UNSAFE_END_EXIT
    assert "could not be confirmed safe before the sweep" in flat(second.stderr)
    assert sim.state.line_history == history and history[-1] == (75.0, True)

    code, listing, _ = run_cli("runs", "--db", str(db))
    assert code == 0
    heading = listing.splitlines()[:2]
    assert heading[0].startswith("!! run 1: bench NOT confirmed safe: "), listing
    assert heading[1].startswith("!! run 2: bench NOT confirmed safe: "), listing
    assert "source NOT confirmed off" in heading[0]
    assert re.search(r"^\s+1 .* unsafe-end ", listing, re.MULTILINE)

    code, text, _ = run_cli("report", "1", "--db", str(db), "--format", "json")
    assert code == 0
    summary = json.loads(text)
    assert summary["status"] == "unsafe-end"
    assert "source NOT confirmed off" in summary["end_safety"]
    out = tmp_path / "report"
    assert run_cli("report", "1", "--db", str(db), "--out", str(out))[0] == 0
    html = (out / "report.html").read_text(encoding="utf-8")
    assert html.index('id="unsafe-end"') < html.index('id="verdict"')
    assert "source NOT confirmed off" in html


def test_the_discharge_wait_is_shown_and_a_signal_during_it_is_acknowledged(
    tmp_path: Path, make_sim_bench: Callable[..., SimBench]
) -> None:
    # A slower bleed (12 s) keeps the bus above 60 V for 12·ln(75/60) ≈ 2.7 s after the source
    # goes off from 75 V: long enough to signal during the wait, even on a busy machine.
    sim = make_sim_bench(design=replace(demo_design(tmp_path), bus_bleed_time_constant_s=12.0))
    process = subprocess.Popen(
        [*LABSEQ, "run", str(sweep_file(tmp_path, sim, ["75 V"])), "--db", str(tmp_path / "r")]
        + ["--yes"],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    lines: queue.Queue[str] = queue.Queue()
    reader = threading.Thread(target=lambda: [lines.put(line) for line in process.stderr])
    reader.start()
    seen = []
    deadline = time.monotonic() + PROCESS_TIMEOUT_S
    while not any("waiting for the bus to fall below 60 V: now" in line for line in seen):
        assert time.monotonic() < deadline and process.poll() is None, "".join(seen)
        try:
            seen.append(lines.get(timeout=1.0))
        except queue.Empty:
            continue
    process.send_signal(signal.SIGINT)
    process.wait(timeout=PROCESS_TIMEOUT_S)
    reader.join(timeout=10)
    while not lines.empty():
        seen.append(lines.get())
    err = flat("".join(seen))
    reading = re.search(r"waiting for the bus to fall below 60 V: now (\d+\.\d) V", err)
    assert reading and float(reading.group(1)) > 60.0, err
    assert "SIGINT received: the shutdown goes on to its end" in err
    assert re.search(r"bus \d+\.\d V, below 60 V \(ES1\) — verify with a meter", err), err
    assert process.returncode == 130
    assert outputs(sim) == ("0", "0")
    client = RawScpiClient(sim.servers["scope"].port)
    try:
        assert float(client.query(":MEAS:DCL? CHAN1")) < 60.0  # the switch node's mean: the bus
    finally:
        client.close()


# --------------------------------------------------------------------------- values

#: Resources of a VISA bench for files that are only validated, never run.
VISA_RESOURCES = {role: f"TCPIP::127.0.0.1::{5025 + i}::SOCKET" for i, role in enumerate(ROLES)}
#: (key the error names, key in the file, value): each passed `check` and failed mid-run.
OUT_OF_BOUNDS = [
    ("bench.limits.line_step_max", "line_step_max", '"1e-12 V"'),  # 10^13 ramp steps
    ("bench.timeout", "timeout", '"1e300 s"'),
    ("grid.captures_per_point", "captures_per_point", str(2**70)),
    ("grid.settle", "settle", '"1e9 s"'),
    ("bench.timeout", "timeout", "5000"),  # seconds or milliseconds?
    ("bench.limits.line_step_dwell", "line_step_dwell", '"1e6 s"'),
    ("scope.acquisition_timeout", "acquisition_timeout", '"1e9 s"'),
    ("scope.record_length", "record_length", "1000000000"),  # beyond the scope map's limit
]


@pytest.mark.parametrize(("key", "name", "value"), OUT_OF_BOUNDS)
def test_each_value_that_could_not_run_is_refused_with_its_key(
    tmp_path: Path, key: str, name: str, value: str
) -> None:
    base = demo_sequence(tmp_path, resources=VISA_RESOURCES).read_text()
    with pytest.raises(SequenceError) as error:
        parse_sequence(_set(base, name, value), tmp_path / "bad.toml")
    assert [problem.key for problem in error.value.problems] == [key]
    if value == "5000":
        assert "no unit; a duration needs one, e.g. '5 s' or '5000 ms'" in str(error.value)


def test_a_run_with_such_values_opens_nothing(
    tmp_path: Path, make_sim_bench: Callable[..., SimBench]
) -> None:
    sim = make_sim_bench(design=demo_design(tmp_path))
    text = sweep_file(tmp_path, sim, ["48 V", "75 V"]).read_text()
    for _key, name, value in OUT_OF_BOUNDS:
        if name != "timeout" or value != "5000":  # one timeout per file; 1e300 s is the other
            text = _set(text, name, value)
    path = tmp_path / "bad.toml"
    path.write_text(text)
    done = run_labseq("run", str(path), "--db", str(tmp_path / "bad.sqlite"), "--yes")
    assert done.returncode == 2 and "Traceback" not in done.stderr
    # Checks across tables (the ramp, the scope map's limits) wait for a valid [bench].
    assert "bench.timeout: '1e300 s' is out of range; must be ≤ 600 s" in flat(done.stderr)
    assert never_switched_on(sim) and outputs(sim) == ("0", "0")


# --------------------------------------------------------------------------- the ES1 gate


def _run_at_a_terminal(path: Path, db: Path, answer: str) -> subprocess.CompletedProcess[str]:
    """``labseq run`` with a terminal on its stdin (a pseudo-terminal), answering ``answer``."""
    leader, follower = pty.openpty()
    try:
        process = subprocess.Popen(
            [*LABSEQ, "run", str(path), "--db", str(db), "--quiet"],
            stdin=follower,
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            text=True,
        )
        os.write(leader, f"{answer}\n".encode())
        out, err = process.communicate(timeout=PROCESS_TIMEOUT_S)
    finally:
        os.close(follower)
        os.close(leader)
    return subprocess.CompletedProcess(process.args, process.returncode, out, err)


def test_above_es1_outputs_go_on_only_once_confirmed(
    tmp_path: Path, make_sim_bench: Callable[..., SimBench]
) -> None:
    sim = make_sim_bench(design=demo_design(tmp_path))
    # The line stays below 60 V DC, but the switch node reaches up to its 150 V rating.
    path = sweep_file(tmp_path, sim, ["48 V"])

    unattended = subprocess.run(
        [*LABSEQ, "run", str(path), "--db", str(tmp_path / "a.sqlite"), "--quiet"],
        stdin=subprocess.DEVNULL,
        capture_output=True,
        text=True,
        timeout=PROCESS_TIMEOUT_S,
    )
    assert unattended.returncode == 2
    assert "no terminal to confirm it at" in flat(unattended.stderr)
    declined = _run_at_a_terminal(path, tmp_path / "b.sqlite", "n")
    assert declined.returncode == 2, declined.stderr  # the answer was no
    err = flat(declined.stderr)
    assert "CAUTION" in err and "150 V peak (dut.switch_rating)" in err
    assert "not confirmed: nothing was switched on" in err
    assert never_switched_on(sim)

    confirmed = _run_at_a_terminal(path, tmp_path / "c.sqlite", "y")
    assert confirmed.returncode == 0, confirmed.stderr
    with_yes = run_labseq("run", str(path), "--db", str(tmp_path / "d.sqlite"), "--yes")
    assert with_yes.returncode == 0, with_yes.stderr
    assert outputs(sim) == ("0", "0")
    for db, words in (("c", "confirmed at the terminal"), ("d", "with --yes (unattended start)")):
        with Store(tmp_path / f"{db}.sqlite", create=False) as store:
            assert any(words in event["message"] for event in store.events(1)), db
