"""Cost of one simulated switch-node capture against array work on the same number of samples.

Run with ``python -m pytest -q -s tests/benchmarks/bench_sim_capture.py``. A simulated scope asks
the flyback model for an operating point and then for the node voltage at each of its sample
times. Three cases are timed on the offline AC demo DUT (an RCD clamp and an RC damper, so the
full steady-state solve runs) with a 100 000-sample record:

* ``waveform``: ``switch_node_v`` at an operating point already solved (every capture after the
  first at a DC line point, and at an AC line phase seen before);
* ``new bus``: ``operating_point`` + ``switch_node_v`` at a bus voltage not seen before, at a load
  already solved (a capture on an AC line at a new ripple phase);
* ``first``: the same at a load never solved (the first capture of a grid point).

Baselines, measured in the same run on the same sample count: copying the float64 record (what a
transfer at least costs) and one ``numpy.fft.rfft`` of it. Best of several repetitions.
"""

from __future__ import annotations

import time
from collections.abc import Callable

import numpy as np
import pytest

from labseq_sim_instruments.flyback import DEMO_DUTS, FlybackModel, load_dut

SAMPLES = 100_000
REPEATS = 7
#: Bound on the waveform call against one rfft of the record (both vectorised passes).
MAX_WAVEFORM_TO_FFT = 20.0


def best_time_s(action: Callable[[], object], repeats: int = REPEATS) -> float:
    best = float("inf")
    for _ in range(repeats):
        start = time.perf_counter()
        action()
        best = min(best, time.perf_counter() - start)
    return best


@pytest.mark.benchmark
def test_switch_node_capture_cost() -> None:
    design = load_dut(DEMO_DUTS["offline_ac"])
    period_s = 1.0 / design.switching_frequency_hz
    t_s = np.arange(SAMPLES) * (4 * period_s / SAMPLES) - 0.5 * period_s
    target = np.empty_like(t_s)
    copy_s = best_time_s(lambda: np.copyto(target, t_s))
    fft_s = best_time_s(lambda: np.fft.rfft(t_s))

    model = FlybackModel(design)
    load_a = 0.8 * design.rated_load_a
    solved = model.operating_point(320.0, load_a)
    waveform_s = best_time_s(lambda: model.switch_node_v(solved, t_s))

    bus_v = iter(np.linspace(310.0, 330.0, 4 * REPEATS))

    def new_bus() -> None:
        model.switch_node_v(model.operating_point(float(next(bus_v)), load_a), t_s)

    new_bus_s = [best_time_s(new_bus, 1) for _ in range(REPEATS)]
    loads = iter(np.linspace(0.3, 0.7, 3) * design.rated_load_a)

    def first() -> None:
        model.switch_node_v(model.operating_point(320.0, float(next(loads))), t_s)

    first_s = [best_time_s(first, 1) for _ in range(3)]

    print()
    print(f"baseline copy of {SAMPLES} float64: {copy_s * 1e3:8.3f} ms")
    print(f"baseline rfft of {SAMPLES} float64: {fft_s * 1e3:8.3f} ms")
    for name, times in (
        ("waveform (solved point)", [waveform_s]),
        ("new bus voltage (median)", [float(np.median(new_bus_s))]),
        ("new bus voltage (worst)", [max(new_bus_s)]),
        ("first at a load (median)", [float(np.median(first_s))]),
    ):
        value_s = times[0]
        print(
            f"{name:26s}: {value_s * 1e3:8.3f} ms = {value_s / copy_s:8.1f} × copy "
            f"= {value_s / fft_s:6.1f} × rfft"
        )
    assert waveform_s / fft_s < MAX_WAVEFORM_TO_FFT
