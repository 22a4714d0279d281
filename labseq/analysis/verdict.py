"""Per-point aggregation of capture figures and the pass / fail / incomplete verdict.

A point is captured several times. Each figure is summarised by its worst value (the one a limit
is judged on), its mean and its spread (sample standard deviation). A limit on a figure that no
capture determined (no capture analysed, a failed ring fit, a clipped peak that only bounds the
truth on the safe side) cannot pass: the point is then incomplete.

A node that falls at its edge of interest (polarity −1, a rectifier's reverse voltage) keeps its
own sign in the figures: its worst peak is the most negative one, and the peak limit is judged on
the magnitude.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, fields
from typing import Literal

import numpy as np

from labseq.figures import (
    BOUNDED_BY_CLIPPING,
    SIGNED_FIGURES,
    WORST_IS_MAX,
    WORST_IS_MIN,
    figure_title,
    format_figure,
)


@dataclass(frozen=True)
class FigureSummary:
    """Worst, mean and sample standard deviation of one figure over a point's captures."""

    worst: float | None
    mean: float
    spread: float | None
    count: int


@dataclass(frozen=True)
class PointFigures:
    """Summaries per figure over the captures of one point."""

    figures: dict[str, FigureSummary]
    n_captures: int
    n_clipped: int

    def worst(self, name: str) -> float | None:
        """Worst value of ``name`` (None when no capture determined it)."""
        summary = self.figures.get(name)
        return summary.worst if summary else None


def _worst_is_max(name: str, polarity: int) -> bool | None:
    """True when the worst of ``name`` is its largest value, False its smallest, None neither."""
    if name in WORST_IS_MAX:
        return polarity > 0 or name not in SIGNED_FIGURES
    return False if name in WORST_IS_MIN else None


def aggregate(captures: Sequence[Mapping[str, object]], *, polarity: int = 1) -> PointFigures:
    """Summarise the figures of a point's captures (one mapping per capture, e.g. ``as_dict()``).

    Numbers are summarised per key; None, booleans and text are skipped. ``worst`` is the maximum
    or minimum according to ``WORST_IS_MAX`` / ``WORST_IS_MIN`` (None for figures without a
    direction), turned round for ``SIGNED_FIGURES`` of a falling node (``polarity`` −1);
    ``spread`` is the sample standard deviation (ddof = 1), None for one capture. A capture
    counts as clipped when its ``clipped`` entry is true.
    """
    values: dict[str, list[float]] = {}
    for capture in captures:
        for name, value in capture.items():
            number = isinstance(value, int | float) and not isinstance(value, bool)
            if number and math.isfinite(value):
                values.setdefault(name, []).append(float(value))
    figures = {}
    for name, samples in values.items():
        x = np.asarray(samples)
        is_max = _worst_is_max(name, polarity)
        worst = None if is_max is None else x.max() if is_max else x.min()
        figures[name] = FigureSummary(
            worst=None if worst is None else float(worst),
            mean=float(x.mean()),
            spread=float(x.std(ddof=1)) if x.size > 1 else None,
            count=int(x.size),
        )
    n_clipped = sum(1 for capture in captures if capture.get("clipped"))
    return PointFigures(figures=figures, n_captures=len(captures), n_clipped=n_clipped)


@dataclass(frozen=True)
class Limits:
    """Limits of a point (or of one node of it); each is optional and checked only when set. A
    field's name is its figure's (:mod:`labseq.figures`) with ``max_`` or ``min_`` before it."""

    max_peak_v: float | None = None
    min_stress_margin_v: float | None = None
    min_damping_ratio: float | None = None
    max_q_factor: float | None = None
    max_settling_time_s: float | None = None
    max_snubber_loss_w: float | None = None
    min_efficiency: float | None = None


#: Limit field → (figure, True when the limit is a maximum).
LIMIT_FIGURES: dict[str, tuple[str, bool]] = {
    f.name: (f.name.removeprefix("max_").removeprefix("min_"), f.name.startswith("max_"))
    for f in fields(Limits)
}


@dataclass(frozen=True)
class Verdict:
    """Outcome of a point: ``status`` and one reason per failed or undetermined limit."""

    status: Literal["pass", "fail", "incomplete"]
    reasons: list[str]


def worst_verdict(verdicts: Iterable[str]) -> Literal["pass", "fail", "incomplete"]:
    """The verdict of several (a point's nodes): fail if any fails, else incomplete if any is
    incomplete (or there are none), else pass."""
    seen = set(verdicts)
    if "fail" in seen:
        return "fail"
    return "incomplete" if "incomplete" in seen or not seen else "pass"


def judge(
    point: PointFigures, limits: Limits, efficiency: float | None = None, *, polarity: int = 1
) -> Verdict:
    """Judge a point (or one node of it) against ``limits``.

    Fail when any worst value is beyond its limit; otherwise incomplete when a limited figure is
    missing, or is a clipped bound that could hide a failure; otherwise pass. Reasons name the
    figure in words (its catalogue title), its value and the limit with their units. On a
    falling node (``polarity`` −1) the peak limit applies to the magnitude of the peak.
    """
    failures: list[str] = []
    missing: list[str] = []
    for limit_name, (figure, is_max) in LIMIT_FIGURES.items():
        limit = getattr(limits, limit_name)
        if limit is None:
            continue
        value = efficiency if figure == "efficiency" else point.worst(figure)
        magnitude = polarity < 0 and figure in SIGNED_FIGURES
        relation = ("|peak| " if magnitude else "") + ("≤" if is_max else "≥")
        wanted = f"limit {relation} {format_figure(figure, limit)}"
        title = figure_title(figure, polarity)
        if value is None:
            why = "no captures analysed" if point.n_captures == 0 else "not determined"
            missing.append(f"{title}: {why}; {wanted}")
            continue
        judged = abs(value) if magnitude else value
        beyond = judged > limit if is_max else judged < limit
        clipped = point.n_clipped and figure in BOUNDED_BY_CLIPPING
        if beyond:
            bound = " (a bound: the capture clipped)" if clipped else ""
            failures.append(f"{title} {format_figure(figure, value)}{bound} breaks {wanted}")
        elif clipped:
            missing.append(
                f"{title} {format_figure(figure, value)} is only a bound ({point.n_clipped} "
                f"clipped capture(s)); {wanted} cannot be shown"
            )
    if failures:
        return Verdict("fail", failures + missing)
    if missing:
        return Verdict("incomplete", missing)
    return Verdict("pass", [])
