"""Paired timing for benchmarks on a busy machine.

A ratio between two timings taken minutes apart moves with whatever else the machine is doing.
Here every action of a comparison runs once per repeat, back to back (their order rotating, so
none always gets the warmer cache), each repeat gives one ratio of a candidate to its yardstick,
and the verdict is the median of those ratios: a burst of load that slows one repeat moves one
ratio, not the median. The spread is printed with it, so a reader sees how far a single repeat
can be trusted.
"""

from __future__ import annotations

import statistics
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass


@dataclass(frozen=True)
class PairedRatios:
    """Per-repeat times of a candidate and its yardstick, taken in the same repeats."""

    candidate_s: tuple[float, ...]
    yardstick_s: tuple[float, ...]

    @property
    def ratios(self) -> list[float]:
        return [c / y for c, y in zip(self.candidate_s, self.yardstick_s, strict=True)]

    @property
    def median(self) -> float:
        return statistics.median(self.ratios)

    def summary(self) -> str:
        """Median ratio, its spread over the repeats and the median times behind it."""
        ratios = sorted(self.ratios)
        low, _, high = statistics.quantiles(ratios, n=4, method="inclusive")
        return (
            f"median {self.median:.2f} over {len(ratios)} pairs (min {ratios[0]:.2f}, "
            f"quartiles {low:.2f}-{high:.2f}, max {ratios[-1]:.2f}); median times "
            f"{_ms(self.candidate_s)} vs {_ms(self.yardstick_s)}"
        )


def _ms(times_s: tuple[float, ...]) -> str:
    return f"{1e3 * statistics.median(times_s):.1f} ms"


def time_s(action: Callable[[], object]) -> float:
    """Wall time of one call."""
    start = time.perf_counter()
    action()
    return time.perf_counter() - start


def interleaved_times(
    actions: Mapping[str, Callable[[], object]], repeats: int, *, warmup: int = 1
) -> dict[str, tuple[float, ...]]:
    """Each action's time in each of ``repeats`` rounds, every action once per round in a
    rotating order, after ``warmup`` untimed rounds (file cache, first-call set-up)."""
    names = list(actions)
    for _ in range(warmup):
        for name in names:
            actions[name]()
    times: dict[str, list[float]] = {name: [] for name in names}
    for repeat in range(repeats):
        shift = repeat % len(names)
        for name in names[shift:] + names[:shift]:
            times[name].append(time_s(actions[name]))
    return {name: tuple(values) for name, values in times.items()}


def paired(times: Mapping[str, tuple[float, ...]], candidate: str, yardstick: str) -> PairedRatios:
    """The ratios of ``candidate`` to ``yardstick`` from :func:`interleaved_times`."""
    return PairedRatios(times[candidate], times[yardstick])
