"""Soak: a multi-hour sweep compressed in simulated time, watched for leaks and slow-down.

A 25 line × 20 load grid of the DC demo flyback (500 points, 4 captures each: 2 000 captures)
with no settling and short records runs on a simulated bench in its own process (``labseq sim``),
reached through PyVISA as a real bench would be. The runner's resident memory (VmRSS) and the
wall time of every point are sampled as the sweep goes.

Targets (an unattended runner must not degrade with run length; common practice, no published
source): the last quarter's median RSS within 8 MB of the second quarter's (the first quarter
includes warm-up: imports, first connections, caches filling), and the last quarter's median
per-point time within 25 % of the first quarter's. Run with ``make soak``
(``pytest -s -m slow tests/benchmarks/soak.py``); it is not part of the default test run.
"""

from __future__ import annotations

import re
import signal
import statistics
import subprocess
import time
from pathlib import Path

import numpy as np
import pytest
from sweeps import LABSEQ, demo_sequence

from labseq.progress import Progress
from labseq.runner import execute, start_run
from labseq.sequence import load_sequence
from labseq.store import Store

LINES_V = np.linspace(36.0, 75.0, 25)
#: From 11 % of the rated load: near 5 % the simulated DUT's steady state does not converge.
LOADS_A = np.linspace(0.25, 2.2, 20)
CAPTURES = 4
RECORD_LENGTH = 4000
MAX_RSS_GROWTH_MB = 8.0
MAX_TIME_GROWTH = 0.25


def rss_mb() -> float:
    """Resident set size of this process (Linux /proc), MB."""
    status = Path("/proc/self/status").read_text()
    return int(re.search(r"VmRSS:\s+(\d+) kB", status).group(1)) / 1024  # type: ignore[union-attr]


class SampledProgress(Progress):
    """Quiet progress that records RSS and wall time at the end of every point."""

    def __init__(self) -> None:
        super().__init__(quiet=True)
        self.rss_mb: list[float] = []
        self.point_s: list[float] = []
        self._last = time.perf_counter()

    def advance(self) -> None:
        super().advance()
        now = time.perf_counter()
        self.point_s.append(now - self._last)
        self._last = now
        self.rss_mb.append(rss_mb())


def _start_sim() -> tuple[subprocess.Popen[str], dict[str, str]]:
    process = subprocess.Popen(
        [*LABSEQ, "sim", "--dut", "telecom_dc", "--seed", "7"],
        stdout=subprocess.PIPE,
        text=True,
    )
    assert process.stdout is not None
    resources: dict[str, str] = {}
    for line in process.stdout:
        found = re.fullmatch(r"\s*(source|load|meter|scope)\s+(TCPIP::\S+::SOCKET)", line.rstrip())
        if found:
            resources[found[1]] = found[2]
        if line.startswith("Press Ctrl-C"):
            return process, resources
    raise AssertionError("labseq sim ended before serving")


def _quarters(values: list[float]) -> list[list[float]]:
    size = len(values) // 4
    return [values[i * size : (i + 1) * size] for i in range(4)]


def _slope_per_100(values: list[float]) -> float:
    """Least-squares slope over the points, per 100 points."""
    x = np.arange(len(values))
    return float(np.polyfit(x, values, 1)[0] * 100)


@pytest.mark.slow
def test_soak(tmp_path: Path) -> None:
    sim, resources = _start_sim()
    try:
        path = demo_sequence(
            tmp_path,
            lines=[f"{v:.4f} V" for v in LINES_V],
            loads=[f"{a:.4f} A" for a in LOADS_A],
            captures=CAPTURES,
            resources=resources,
            settle="0 s",
        )
        text = path.read_text()
        text = text.replace("record_length = 20000", f"record_length = {RECORD_LENGTH}")
        path.write_text(text.replace('line_step_dwell = "20 ms"', 'line_step_dwell = "0 s"'))
        sequence = load_sequence(path)
        progress = SampledProgress()
        start = time.perf_counter()
        with Store(tmp_path / "soak.sqlite") as store:
            run_id = start_run(sequence, store)
            outcome = execute(sequence, store, run_id, progress=progress)
            captures = sum(1 for _ in store.iter_captures(run_id, with_codes=False))
            integrity = store.integrity_check()
        wall_s = time.perf_counter() - start
    finally:
        sim.send_signal(signal.SIGTERM)
        sim.wait(timeout=30)

    assert outcome.status == "finished" and outcome.points_done == len(LINES_V) * len(LOADS_A)
    assert captures == outcome.points_total * CAPTURES and integrity == "ok"
    rss, times = progress.rss_mb, progress.point_s
    rss_q = [statistics.median(q) for q in _quarters(rss)]
    time_q = [statistics.median(q) for q in _quarters(times)]
    print(
        f"\nsoak: {outcome.points_total} points, {captures} captures in {wall_s:.0f} s "
        f"({wall_s / outcome.points_total * 1e3:.0f} ms per point)\n"
        f"  RSS median by quarter (MB): {', '.join(f'{v:.1f}' for v in rss_q)}; "
        f"slope over the second half {_slope_per_100(rss[len(rss) // 2 :]):+.2f} MB/100 points\n"
        f"  point time median by quarter (ms): {', '.join(f'{v * 1e3:.0f}' for v in time_q)}; "
        f"last/first {time_q[3] / time_q[0]:.2f}, "
        f"slope {_slope_per_100(times) * 1e3:+.1f} ms/100 points"
    )
    assert rss_q[3] - rss_q[1] < MAX_RSS_GROWTH_MB
    assert time_q[3] < (1 + MAX_TIME_GROWTH) * time_q[0]
