"""Capture analysis speed against one ``numpy.fft.rfft`` of the same record, in the same run.

Run with ``python -m pytest -q -s tests/benchmarks/bench_analysis.py``. A 1 M-sample, 8-bit
switch-node record is analysed in full (levels, every edge's ring fit, settling, waveform snubber
loss) and timed against one real FFT of the same record. Two records of the same length: 8 edges
(20 GS/s, 50 µs) and 30 edges (5 GS/s, 200 µs), since each edge costs a ring fit.

The analysis and its yardstick run once each per repeat, back to back in a rotating order
(tests/benchmarks/paired.py), and each repeat gives one ratio: a burst of load from another
process slows both sides of a pair, or moves one ratio, not the median of ``REPEATS`` of them.
The median is printed with its spread. Target: the 8-edge record within 3× the FFT (its median
measures 1.4–2.4 on this two-core machine, shared with other work). The 30-edge record measures
2.9–3.4, around that target, and is guarded at 4.5× against a regression: an analysis about
40 % slower than today's fails it.
"""

from __future__ import annotations

import numpy as np
import pytest
from paired import interleaved_times, paired
from waveforms import flyback_node, quantise

from labseq.analysis import SnubberBranch, analyze_capture

RECORD_LENGTH = 1_000_000
REPEATS = 41
BRANCH = SnubberBranch(rs_ohm=47.0, cs_f=470e-12, fsw_hz=150e3)


def switch_node_record(sample_rate_hz: float) -> tuple[np.ndarray, float, float]:
    t = np.arange(RECORD_LENGTH) / sample_rate_hz - 1e-6
    noisy = flyback_node(t) + np.random.default_rng(5).normal(0, 1.0, t.size)
    return quantise(noisy), 1 / sample_rate_hz, float(t[0])


@pytest.mark.benchmark
@pytest.mark.parametrize(
    ("sample_rate_hz", "edges", "max_ratio", "why"),
    [(20e9, 8, 3.0, "target"), (5e9, 30, 4.5, "guard; target 3")],
)
def test_analysis_of_a_1m_sample_capture_against_one_fft(
    sample_rate_hz: float, edges: int, max_ratio: float, why: str
) -> None:
    volts, dt, t0 = switch_node_record(sample_rate_hz)
    assert len(analyze_capture(volts, dt, t0, snubber=BRANCH).edges) == edges
    times = interleaved_times(
        {
            "analysis": lambda: analyze_capture(volts, dt, t0, snubber=BRANCH),
            "rfft": lambda: np.fft.rfft(volts),
        },
        REPEATS,
    )
    ratios = paired(times, "analysis", "rfft")
    print(
        f"\n1 M samples, {edges} edges, analysis / rfft: {ratios.summary()} "
        f"(limit {max_ratio:g}, {why})"
    )
    assert ratios.median <= max_ratio
