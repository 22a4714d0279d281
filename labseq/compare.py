"""Regression compare of two reviewed runs: which points got worse, and by how much.

Compare rule
------------
Points of the two runs are matched by setpoints: same line kind, and line and load each within
``rel_tol`` (0.5 % by default) of the larger of the two values. For each matched point and
figure the worst values (those the limits judge) are compared. The change Δ = candidate −
baseline counts only when it exceeds the captures' own scatter,

    |Δ| > max(k·√(s_b² + s_c²), floor),

with s_b and s_c the sample standard deviations over each point's captures (0 for a single
capture), k = 2, and ``floor`` a small per-figure amount below which a change is taken as
quantisation (:data:`labseq.figures.NOISE_FLOORS`). A change beyond the threshold is "better"
or "worse" by the figure's direction: lower peak, overshoot, Q, settling time and snubber loss
are better; higher damping ratio, stress margin and efficiency are better. A point regressed
when any gated figure got worse or its verdict went from pass to fail.

Nodes
-----
A compare matches (point, node): each node's figures are compared at every matched point, and a
worse gated figure of any node makes the point regress. A falling node keeps its own sign: a
more negative peak is worse.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from labseq.errors import InputError
from labseq.figures import (
    FIGURE_DIRECTIONS,
    FIGURE_TITLES,
    NOISE_FLOORS,
    figure_direction,
    format_change,
    format_figure,
)
from labseq.review import (
    FigureStats,
    PointReview,
    RunReview,
    grid_cells,
    limit_rows,
    node_polarity,
    point_label,
    point_object,
    run_object,
    worst_points,
)
from labseq.units import format_si


@dataclass(frozen=True)
class FigureChange:
    """One figure at one matched point: baseline, candidate, change and what it means."""

    figure: str
    baseline: FigureStats | None
    candidate: FigureStats | None
    delta: float | None
    threshold: float | None
    flag: str  # better, worse, unchanged, missing in baseline, missing in candidate
    node: str | None = None  # None: the primary node

    @property
    def significance(self) -> float:
        """|Δ| in units of its threshold (0 when not comparable)."""
        if self.delta is None or not self.threshold:
            return 0.0
        return abs(self.delta) / self.threshold


@dataclass(frozen=True)
class PointChange:
    """A point of either run, matched or not, with its figure changes and verdicts."""

    baseline: PointReview | None
    candidate: PointReview | None
    changes: dict[str, FigureChange] = field(default_factory=dict)  # the primary node's
    gated: frozenset[str] = frozenset(FIGURE_DIRECTIONS)  # figures whose worsening counts
    nodes: dict[str, dict[str, FigureChange]] = field(default_factory=dict)  # the other nodes'

    @property
    def all_changes(self) -> list[FigureChange]:
        """Every figure change of every node, the primary's first."""
        return [*self.changes.values(), *(c for per in self.nodes.values() for c in per.values())]

    @property
    def matched(self) -> bool:
        return self.baseline is not None and self.candidate is not None

    @property
    def either(self) -> PointReview:
        """The candidate's point, else the baseline's (for its setpoints)."""
        point = self.candidate or self.baseline
        assert point is not None  # a change always has at least one side
        return point

    @property
    def verdict_went_to_fail(self) -> bool:
        return self.matched and self.baseline.verdict == "pass" and self.candidate.verdict == "fail"

    @property
    def flag(self) -> str:
        """worse (a gated figure, or the verdict pass → fail) / better / unchanged / missing in
        baseline / missing in candidate."""
        if self.candidate is None:
            return "missing in candidate"
        if self.baseline is None:
            return "missing in baseline"
        flags = {change.flag for change in self.all_changes}
        if self.verdict_went_to_fail or self.worse(self.gated):
            return "worse"
        return "better" if "better" in flags else "unchanged"

    def worse(self, gated: Iterable[str]) -> list[FigureChange]:
        """Gated figures (of any node) that got worse beyond their threshold, most significant
        first."""
        gated = set(gated)
        found = [c for c in self.all_changes if c.flag == "worse" and c.figure in gated]
        return sorted(found, key=lambda c: -c.significance)


@dataclass(frozen=True)
class Comparison:
    """The compare of a candidate run against a baseline run."""

    baseline: RunReview
    candidate: RunReview
    points: list[PointChange]
    gated: tuple[str, ...]
    coverage: float
    rel_tol: float

    @property
    def regressions(self) -> list[PointChange]:
        """Matched points that got worse (gated figures) or went pass → fail, worst first."""
        found = [
            p for p in self.points if p.matched and (p.verdict_went_to_fail or p.worse(self.gated))
        ]

        def severity(change: PointChange) -> tuple[bool, float]:
            worse = change.worse(self.gated)
            return (change.verdict_went_to_fail, worse[0].significance if worse else 0.0)

        return sorted(found, key=severity, reverse=True)

    @property
    def regressed(self) -> bool:
        return bool(self.regressions)

    def label(self, change: PointChange) -> str:
        """The setpoints of a change as text (the candidate's when both runs have the point),
        the load as a share of each run's own rated load: "36 V / 550 mA (25 %)", or, when the
        two runs' rated loads differ, "36 V / 550 mA (22.9 % of the baseline's rated load, 25 %
        of the candidate's)"."""
        if change.candidate is None:
            return self.label_of(change.baseline, "baseline")
        if change.baseline is None or self._same_rated_load:
            return self.label_of(change.candidate, "candidate")
        point = change.candidate.point
        shares = [
            f"{100 * point.load_a / rated:.3g} % of the {side}'s rated load"
            for side, rated in (
                ("baseline", self.baseline.rated_load_a),
                ("candidate", self.candidate.rated_load_a),
            )
            if rated
        ]
        return point_label(point) + (f" ({', '.join(shares)})" if shares else "")

    def label_of(self, point: PointReview, side: str = "candidate") -> str:
        """The setpoints of a point of run ``side`` ("baseline" or "candidate") as text, the
        load as a share of that run's own rated load."""
        return point_label(point.point, getattr(self, side).rated_load_a)

    @property
    def _same_rated_load(self) -> bool:
        b, c = self.baseline.rated_load_a, self.candidate.rated_load_a
        return b == c or b is None or c is None or math.isclose(b, c, rel_tol=self.rel_tol)

    @property
    def outcome(self) -> str:
        """The compare's outcome with the candidate's own verdict, in words: "no regression —
        candidate still fails 5 points", "regressed at 2 points — candidate fails 7 points",
        "no regression — candidate passes every point"."""
        counts = self.candidate.verdict_counts
        total = len(self.candidate.points)
        if counts["fail"]:
            still = "still " if self.baseline.verdict_counts["fail"] else ""
            own = f"candidate {still}fails {counts['fail']} of {total} points"
        elif counts["incomplete"]:
            own = f"candidate incomplete at {counts['incomplete']} of {total} points"
        else:
            own = f"candidate passes every point ({total})"
        regressions = len(self.regressions)
        change = f"regressed at {regressions} point(s)" if regressions else "no regression"
        return f"{change} — {own}"

    def differences(self) -> list[str]:
        """What makes the two runs not like for like: another DUT, grid, limits or bench kind.
        Each is a warning in the report, the console and the JSON."""
        b, c = self.baseline, self.candidate
        found = []
        if b.run.dut_label != c.run.dut_label:
            found.append(f"different DUTs: {b.run.dut_label!r} → {c.run.dut_label!r}")
        if not self._same_rated_load:
            found.append(
                f"different rated loads: {format_si(b.rated_load_a, 'A')} → "
                f"{format_si(c.rated_load_a, 'A')} (each point's share is of its own run's)"
            )
        only_b = sum(1 for p in self.points if p.candidate is None)
        only_c = sum(1 for p in self.points if p.baseline is None)
        if only_b or only_c:
            found.append(
                f"different grids: {only_b} baseline point(s) have no match in the candidate, "
                f"{only_c} candidate point(s) none in the baseline"
            )
        limits_b, limits_c = dict(limit_rows(b)), dict(limit_rows(c))
        changed = [
            f"{what} {limits_b.get(what, '—')} → {limits_c.get(what, '—')}"
            for what in dict.fromkeys([*limits_b, *limits_c])
            if what not in ("snubber", "clamp") and limits_b.get(what) != limits_c.get(what)
        ]
        if changed:
            found.append("different limits: " + "; ".join(changed))
        if b.simulated != c.simulated:
            kinds = ["simulated" if r.simulated else "real" for r in (b, c)]
            found.append(f"different benches: {kinds[0]} → {kinds[1]}")
        return found

    @property
    def line_values_v(self) -> tuple[float, ...]:
        """Line values of the compare grid (the candidate's setpoint where both runs have one)."""
        return tuple(sorted({p.either.point.line_v for p in self.points}))

    @property
    def load_values_a(self) -> tuple[float, ...]:
        """Load values of the compare grid."""
        return tuple(sorted({p.either.point.load_a for p in self.points}))

    def grid(self, figure: str, side: str) -> np.ndarray:
        """Line × load map of ``figure`` for ``side``: "baseline", "candidate" or "change"."""
        reviews: list[PointReview] = [p.either for p in self.points]
        values = np.full((len(self.line_values_v), len(self.load_values_a)), np.nan)
        cells = grid_cells(reviews, self.line_values_v, self.load_values_a)
        for (row, column), change in zip(cells, self.points, strict=True):
            if side == "change":
                found = change.changes.get(figure)
                value = found.delta if found else None
            else:
                review = change.baseline if side == "baseline" else change.candidate
                value = review.value(figure) if review else None
            if value is not None:
                values[row, column] = value
        return values

    def flag_grid(self, figure: str) -> list[list[str | None]]:
        """Line × load map of the flag of ``figure`` (or the point's, when unmatched)."""
        reviews: list[PointReview] = [p.either for p in self.points]
        flags: list[list[str | None]] = [
            [None] * len(self.load_values_a) for _ in self.line_values_v
        ]
        cells = grid_cells(reviews, self.line_values_v, self.load_values_a)
        for (row, column), change in zip(cells, self.points, strict=True):
            found = change.changes.get(figure)
            flags[row][column] = found.flag if found else change.flag
        return flags

    def most_moved(self, count: int) -> list[PointChange]:
        """The matched points whose figures moved most, in units of their thresholds."""
        matched = [p for p in self.points if p.matched and p.all_changes]

        def moved(change: PointChange) -> float:
            return max(c.significance for c in change.all_changes)

        return sorted(matched, key=moved, reverse=True)[:count]

    def describe_regression(self, change: PointChange) -> str:
        """What got worse at one point, in one line."""
        parts = []
        if change.verdict_went_to_fail:
            parts.append("verdict pass → fail")
        worse = change.worse(self.gated)
        parts.extend(_change_text(figure_change) for figure_change in worse[:3])
        if len(worse) > 3:
            parts.append(f"and {len(worse) - 3} more figure(s)")
        return f"{self.label(change)}: " + ", ".join(parts)

    def describe_point(self, change: PointChange) -> str:
        """A point's outcome in one line: its flag and its most significant changes."""
        if not change.matched:
            return f"{change.flag:<20} {self.label(change)}"
        moved = [c for c in change.all_changes if c.flag in ("worse", "better")]
        moved.sort(
            key=lambda c: (not (c.flag == "worse" and c.figure in change.gated), -c.significance)
        )
        words = [_change_text(c) for c in moved[:3]]
        if change.verdict_went_to_fail:
            words.insert(0, "verdict pass → fail")
        return f"{change.flag:<20} {self.label(change)}: " + (", ".join(words) or "no change")

    def summary(self) -> str:
        """The change the way an engineer says it, e.g. "peak stress −38 V at the worst
        corner, damping ratio up from 0.06 to 0.31, snubber loss +41 mW at 75 V / 2.2 A"."""
        return summary_sentence(self)


#: Coverage factor k of the significance rule.
DEFAULT_COVERAGE = 2.0
#: Setpoints within this fraction of each other are the same point.
DEFAULT_MATCH_TOLERANCE = 0.005


def _change_text(change: FigureChange) -> str:
    b = change.baseline.value if change.baseline else None
    c = change.candidate.value if change.candidate else None
    node = f"{change.node}: " if change.node else ""
    return (
        f"{node}{FIGURE_TITLES[change.figure]} {format_change(change.figure, change.delta)} "
        f"({format_figure(change.figure, b)} → {format_figure(change.figure, c)})"
    )


def _same_setpoint(a: float, b: float, rel_tol: float) -> bool:
    return abs(a - b) <= rel_tol * max(abs(a), abs(b)) or a == b


def match_points(
    baseline: Sequence[PointReview],
    candidate: Sequence[PointReview],
    rel_tol: float = DEFAULT_MATCH_TOLERANCE,
) -> list[tuple[PointReview | None, PointReview | None]]:
    """Pair points with the same line kind and line and load within ``rel_tol``; each point
    pairs at most once, with its nearest partner. Unpaired points come back with None."""
    # Sorting by setpoint keeps the search near each point: O(n log n) for grids of any size.
    order = sorted(range(len(candidate)), key=lambda i: candidate[i].point.line_v)
    lines = np.array([candidate[i].point.line_v for i in order])
    free = set(range(len(candidate)))
    pairs: list[tuple[PointReview | None, PointReview | None]] = []
    for b in baseline:
        line_v, load_a = b.point.line_v, b.point.load_a
        reach = 2 * rel_tol * abs(line_v)  # a superset of the window; the exact test is below
        lo = np.searchsorted(lines, line_v - reach, side="left")
        hi = np.searchsorted(lines, line_v + reach, side="right")
        best, best_distance = None, math.inf
        for slot in range(int(lo), int(hi)):
            index = order[slot]
            c = candidate[index].point
            if index not in free or c.line_is_ac != b.point.line_is_ac:
                continue
            if _same_setpoint(c.line_v, line_v, rel_tol) and _same_setpoint(
                c.load_a, load_a, rel_tol
            ):
                distance = abs(c.line_v - line_v) / max(abs(line_v), 1e-12) + abs(
                    c.load_a - load_a
                ) / max(abs(load_a), 1e-12)
                if distance < best_distance:
                    best, best_distance = index, distance
        if best is None:
            pairs.append((b, None))
        else:
            free.discard(best)
            pairs.append((b, candidate[best]))
    pairs.extend((None, candidate[i]) for i in sorted(free))
    return pairs


def compare_figure(
    figure: str,
    baseline: FigureStats | None,
    candidate: FigureStats | None,
    *,
    coverage: float = DEFAULT_COVERAGE,
    floors: Mapping[str, float] = NOISE_FLOORS,
    polarity: int = 1,
    node: str | None = None,
) -> FigureChange:
    """Compare one figure of a matched point (of ``node``, None for the primary, whose
    ``polarity`` sets which way its peak is worse) by the rule in this module's notes."""
    b = baseline.value if baseline else None
    c = candidate.value if candidate else None
    if b is None or c is None:
        flag = "missing in baseline" if b is None else "missing in candidate"
        return FigureChange(figure, baseline, candidate, None, None, flag, node)
    spread_b = baseline.spread or 0.0
    spread_c = candidate.spread or 0.0
    threshold = max(coverage * math.hypot(spread_b, spread_c), floors.get(figure, 0.0))
    delta = c - b
    if abs(delta) <= threshold:
        flag = "unchanged"
    else:
        flag = "better" if delta * figure_direction(figure, polarity) > 0 else "worse"
    return FigureChange(figure, baseline, candidate, delta, threshold, flag, node)


def _compare_figures(
    b: PointReview, c: PointReview, coverage: float, polarity: int, node: str | None
) -> dict[str, FigureChange]:
    """Every figure either point has, compared."""
    return {
        figure: compare_figure(
            figure,
            b.figures.get(figure),
            c.figures.get(figure),
            coverage=coverage,
            polarity=polarity,
            node=node,
        )
        for figure in FIGURE_DIRECTIONS
        if figure in b.figures or figure in c.figures
    }


def compare_runs(
    baseline: RunReview,
    candidate: RunReview,
    *,
    rel_tol: float = DEFAULT_MATCH_TOLERANCE,
    coverage: float = DEFAULT_COVERAGE,
    gated: Iterable[str] = tuple(FIGURE_DIRECTIONS),
) -> Comparison:
    """Match the points of two reviewed runs and compare every figure of every matched point.

    ``gated`` names the figures whose worsening counts as a regression (all by default); the
    others are still compared and reported.
    """
    gated = tuple(gated)
    unknown = sorted(set(gated) - set(FIGURE_DIRECTIONS))
    if unknown:
        raise InputError(
            f"unknown figure(s) {', '.join(unknown)}; known: {', '.join(FIGURE_DIRECTIONS)}"
        )
    if not (0 < rel_tol < 0.5):
        raise InputError(f"match tolerance {rel_tol!r}: give a fraction between 0 and 0.5")
    if not (coverage > 0 and math.isfinite(coverage)):
        raise InputError(f"coverage factor {coverage!r}: give a positive number such as 2")
    changes = []
    extra_nodes = shared_nodes(baseline, candidate)
    for b, c in match_points(baseline.points, candidate.points, rel_tol):
        figures: dict[str, FigureChange] = {}
        nodes: dict[str, dict[str, FigureChange]] = {}
        if b is not None and c is not None:
            figures = _compare_figures(b, c, coverage, baseline.polarity, None)
            for node in extra_nodes:
                polarity = node_polarity(candidate, node)
                nodes[node] = _compare_figures(
                    b.of_node(node), c.of_node(node), coverage, polarity, node
                )
        changes.append(PointChange(b, c, figures, frozenset(gated), nodes))
    return Comparison(baseline, candidate, changes, gated, coverage, rel_tol)


def shared_nodes(baseline: RunReview, candidate: RunReview) -> list[str]:
    """The nodes other than the primary that both runs captured, in the candidate's order."""
    return [node for node in candidate.node_names[1:] if node in baseline.node_names[1:]]


def _run_level(
    comparison: Comparison, figure: str, node: str | None = None
) -> tuple[FigureChange, PointReview] | None:
    """The run-level change of a figure (of ``node``; None: the primary): worst over matched
    points in each run, judged with the spreads of the two points that hold those worst
    values; with the candidate's worst point."""
    matched = [p for p in comparison.points if p.matched]
    polarity = 1 if node is None else node_polarity(comparison.candidate, node)

    def side(review: PointReview) -> PointReview:
        return review if node is None else review.of_node(node)

    b = worst_points([side(p.baseline) for p in matched], polarity).get(figure)
    c = worst_points([side(p.candidate) for p in matched], polarity).get(figure)
    if b is None or c is None:
        return None
    change = compare_figure(
        figure,
        b.point.figures[figure],
        c.point.figures[figure],
        coverage=comparison.coverage,
        polarity=polarity,
        node=node,
    )
    return change, c.point


def summary_sentence(comparison: Comparison) -> str:
    """One sentence on what changed, most important first."""
    parts: list[str] = []
    found = _run_level(comparison, "peak_v")
    peak = found[0] if found else None
    if peak is not None:
        if peak.flag == "unchanged":
            parts.append(f"peak stress unchanged at the worst corner ({_values_text(peak)})")
        else:
            parts.append(
                f"peak stress {format_change('peak_v', peak.delta)} at the worst corner "
                f"({_values_text(peak)})"
            )
    for figure in ("damping_ratio", "settling_time_s"):
        found = _run_level(comparison, figure)
        if found is None:
            continue
        level = found[0]
        b, c = level.baseline.value, level.candidate.value
        title = FIGURE_TITLES[figure]
        if level.flag == "unchanged":
            parts.append(f"{title} unchanged ({format_figure(figure, c)} at worst)")
        else:
            word = "up" if level.delta > 0 else "down"
            parts.append(
                f"{title} {word} from {format_figure(figure, b)} to {format_figure(figure, c)}"
            )
    loss = _largest_change(comparison, "snubber_loss_w")
    if loss is not None:
        point, change = loss
        if change.flag == "unchanged":
            parts.append("snubber loss unchanged")
        else:
            delta = format_change("snubber_loss_w", change.delta)
            parts.append(f"snubber loss {delta} at {comparison.label(point)}")
    parts += _node_peak_parts(comparison)
    efficiency = [
        p.changes["efficiency"].delta
        for p in comparison.points
        if "efficiency" in p.changes and p.changes["efficiency"].delta is not None
    ]
    if efficiency:
        mean_delta = float(np.mean(efficiency))
        if abs(mean_delta) < NOISE_FLOORS["efficiency"]:
            parts.append("efficiency unchanged")
        else:
            parts.append(f"efficiency {format_change('efficiency', mean_delta)} on average")
    before = comparison.baseline.verdict_counts
    after = comparison.candidate.verdict_counts
    parts.append(
        f"failing points {before['fail']} → {after['fail']}, "
        f"run verdict {comparison.baseline.verdict} → {comparison.candidate.verdict}"
    )
    missing_b = sum(1 for p in comparison.points if p.baseline is None)
    missing_c = sum(1 for p in comparison.points if p.candidate is None)
    if missing_c:
        parts.append(f"{missing_c} baseline point(s) missing in the candidate")
    if missing_b:
        parts.append(f"{missing_b} candidate point(s) not in the baseline")
    return ", ".join(parts)


def _node_peak_parts(comparison: Comparison) -> list[str]:
    """Each node but the primary: its peak's run-level change, where the candidate's worst is,
    e.g. "secondary: peak −12 V at 264 V AC / 2.4 A (−107 V → −119 V)"."""
    parts = []
    for node in shared_nodes(comparison.baseline, comparison.candidate):
        found = _run_level(comparison, "peak_v", node)
        if found is None:
            continue
        change, where = found
        moved = "unchanged" if change.flag == "unchanged" else format_change("peak_v", change.delta)
        parts.append(
            f"{node}: peak {moved} at {comparison.label_of(where)} ({_values_text(change)})"
        )
    return parts


def _values_text(change: FigureChange) -> str:
    b = change.baseline.value if change.baseline else None
    c = change.candidate.value if change.candidate else None
    return f"{format_figure(change.figure, b)} → {format_figure(change.figure, c)}"


def _largest_change(comparison: Comparison, figure: str) -> tuple[PointChange, FigureChange] | None:
    found = [
        (p, p.changes[figure])
        for p in comparison.points
        if figure in p.changes and p.changes[figure].delta is not None
    ]
    if not found:
        return None
    return max(found, key=lambda pair: abs(pair[1].delta))


def comparison_summary(comparison: Comparison) -> dict[str, Any]:
    """The compare as plain data for JSON."""
    worst = comparison.regressions[0] if comparison.regressions else None

    def side(review: PointReview | None) -> dict[str, Any] | None:
        if review is None:
            return None
        return {"point_index": review.point.point_index, "verdict": review.verdict}

    return {
        "baseline": run_object(comparison.baseline.run, comparison.baseline.end_safety),
        "candidate": run_object(comparison.candidate.run, comparison.candidate.end_safety),
        "regressed": comparison.regressed,
        "nodes": [
            comparison.candidate.node_names[0],
            *shared_nodes(comparison.baseline, comparison.candidate),
        ],
        "outcome": comparison.outcome,
        "summary": comparison.summary(),
        "warnings": comparison.differences(),
        "baseline_verdict": comparison.baseline.verdict,
        "candidate_verdict": comparison.candidate.verdict,
        "candidate_verdict_counts": comparison.candidate.verdict_counts,
        "rule": {
            "coverage_k": comparison.coverage,
            "match_tolerance": comparison.rel_tol,
            "noise_floors": NOISE_FLOORS,
            "gated_figures": list(comparison.gated),
        },
        "worst_regression": None if worst is None else comparison.describe_regression(worst),
        "points": [
            {
                **point_object(
                    p.either.point.point_index,
                    p.either.point.line_v,
                    p.either.point.line_is_ac,
                    p.either.point.load_a,
                ),
                "flag": p.flag,
                "baseline": side(p.baseline),
                "candidate": side(p.candidate),
                "figures": _changes_summary(p.changes),
                "nodes": {node: _changes_summary(changes) for node, changes in p.nodes.items()},
            }
            for p in comparison.points
        ],
    }


def _changes_summary(changes: Mapping[str, FigureChange]) -> dict[str, Any]:
    return {
        name: {
            "baseline": change.baseline.value if change.baseline else None,
            "candidate": change.candidate.value if change.candidate else None,
            "change": change.delta,
            "threshold": change.threshold,
            "flag": change.flag,
        }
        for name, change in changes.items()
    }
