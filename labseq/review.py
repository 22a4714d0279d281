"""Corner review of a stored run: its verdict, its worst point for each figure, its grids.

Everything here works on the figures a run stored per point (worst, mean and spread over the
point's captures), never on the raw captures, so a review of a large run costs one read of its
point rows. The only input is a store of runs (:class:`labseq.store_api.RunStore`); nothing is
written. The regression compare of two reviewed runs is :mod:`labseq.compare`.

Nodes
-----
A run may capture several nodes per point (the primary switch node first, then e.g. a secondary
rectifier). ``PointReview.figures`` and the run's ``worst`` are the primary's, so a single-node
run reads as it always did; :meth:`RunReview.node_view` gives the same review for any node, with
that node's figures and verdicts. A falling node keeps its own sign: its peak is negative and a
more negative peak is worse.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np

from labseq.analysis.snubber import METHOD_LABELS
from labseq.analysis.verdict import LIMIT_FIGURES, worst_verdict
from labseq.errors import InputError
from labseq.figures import (
    FIGURE_DIRECTIONS,
    FIGURE_TITLES,
    VERDICTS_WORST_FIRST,
    figure_direction,
    format_figure,
)
from labseq.pipeline import stored_sequence
from labseq.sequence import DEFAULT_PRIMARY_NAME, NodeSpec
from labseq.sequence import Sequence as SequenceFile
from labseq.store import PointRecord, RunRecord
from labseq.store_api import RunStore
from labseq.units import format_si

# --------------------------------------------------------------------------- text helpers


def line_text(line_v: float, line_is_ac: bool) -> str:
    """``75 V`` for DC, ``230 V AC`` for AC."""
    return format_si(line_v, "V") + (" AC" if line_is_ac else "")


def point_label(point: PointRecord, rated_load_a: float | None = None) -> str:
    """``75 V / 2.2 A (100 %)``: line and load, with the load as a share of rated when known."""
    text = f"{line_text(point.line_v, point.line_is_ac)} / {format_si(point.load_a, 'A')}"
    if rated_load_a:
        text += f" ({100 * point.load_a / rated_load_a:.3g} %)"
    return text


# --------------------------------------------------------------------------- one run


@dataclass(frozen=True)
class FigureStats:
    """A figure of one point over its captures: worst, mean, sample standard deviation, count."""

    worst: float | None
    mean: float | None
    spread: float | None
    n: int

    @property
    def value(self) -> float | None:
        """The value limits judge and compares use: the worst, else the mean."""
        return self.worst if self.worst is not None else self.mean


@dataclass(frozen=True)
class PointReview:
    """One stored point with its per-point figures: ``figures`` of one node (the primary's
    unless ``node`` names another), ``nodes`` of every node, and each node's verdict."""

    point: PointRecord
    figures: dict[str, FigureStats]
    nodes: dict[str, dict[str, FigureStats]] = field(default_factory=dict)
    node_verdicts: dict[str, tuple[str, list[str]]] = field(default_factory=dict)
    node: str | None = None  # None: the point as a whole (its combined verdict)

    def value(self, figure: str) -> float | None:
        """The point's value of ``figure`` (None when not determined)."""
        stats = self.figures.get(figure)
        return None if stats is None else stats.value

    @property
    def verdict(self) -> str:
        """pass / fail / incomplete (of ``node`` when set, else the point's combined verdict);
        a point never judged (pending, skipped) is incomplete."""
        if self.node is not None and self.node in self.node_verdicts:
            return self.node_verdicts[self.node][0]
        return self.point.verdict or "incomplete"

    @property
    def reasons(self) -> list[str]:
        """Why the verdict is what it is (of ``node`` when set)."""
        if self.node is not None and self.node in self.node_verdicts:
            return self.node_verdicts[self.node][1]
        return self.point.verdict_reasons

    def of_node(self, node: str) -> PointReview:
        """The same point seen through one node's figures and verdict."""
        return replace(self, figures=self.nodes.get(node, {}), node=node)


@dataclass(frozen=True)
class WorstPoint:
    """The point with the worst value of one figure."""

    figure: str
    point: PointReview
    value: float


@dataclass(frozen=True)
class RunReview:
    """A stored run seen as a reviewer sees it."""

    run: RunRecord
    sequence: SequenceFile | None  # None when the stored sequence text no longer validates
    sequence_problem: str | None
    points: list[PointReview]
    verdict: str
    verdict_counts: dict[str, int]
    worst: dict[str, WorstPoint]
    line_values_v: tuple[float, ...]
    load_values_a: tuple[float, ...]
    node_names: tuple[str, ...]  # every node of the run, the primary first
    node_name: str  # the node whose figures ``points`` and ``worst`` hold
    #: What the shutdown confirmed when it could not confirm the bench safe (unsafe-end runs).
    end_safety: str | None = None
    #: How each (node, point id)'s snubber loss was obtained: "waveform" and/or "cv2f".
    loss_methods: dict[tuple[str, int], tuple[str, ...]] = field(default_factory=dict)

    def loss_method(self, point: PointReview) -> str | None:
        """How the viewed node's snubber loss at ``point`` was obtained, as shown beside it:
        "waveform", "Cs·V²·fsw" (the record was too short for the waveform), or both."""
        methods = self.loss_methods.get((self.node_name, point.point.id))
        return ", ".join(METHOD_LABELS.get(m, m) for m in methods) if methods else None

    @property
    def rated_load_a(self) -> float | None:
        """The DUT's rated load, when the sequence is known."""
        return self.sequence.dut.rated_load_a if self.sequence else None

    @property
    def node_spec(self) -> NodeSpec | None:
        """The sequence's description of the viewed node, when known."""
        return self.sequence.node(self.node_name) if self.sequence else None

    @property
    def polarity(self) -> int:
        """+1 for a node that rises at its edge, −1 for one that falls (by the sequence, else by
        the sign of the stored peaks)."""
        return node_polarity(self, self.node_name)

    @property
    def node_title(self) -> str:
        """The viewed node's label ("Primary switch", "Secondary rectifier")."""
        spec = self.node_spec
        return spec.label if spec else self.node_name.capitalize()

    @property
    def peak_word(self) -> str:
        """What the viewed node's peak is called: "peak stress" or "peak reverse voltage"."""
        return "peak stress" if self.polarity > 0 else "peak reverse voltage"

    @property
    def derated_rating_v(self) -> float | None:
        """The viewed node's rating × derating: what the magnitude of its peak may use."""
        spec = self.node_spec
        return spec.derated_rating_v if spec else None

    def node_view(self, node: str) -> RunReview:
        """The same review through ``node``'s figures, worst points and verdicts."""
        points = [point.of_node(node) for point in self.points]
        polarity = node_polarity(self, node)
        return replace(self, points=points, worst=worst_points(points, polarity), node_name=node)

    def label(self, point: PointReview) -> str:
        """The point's setpoints as text."""
        return point_label(point.point, self.rated_load_a)

    def grid(self, figure: str) -> np.ndarray:
        """Values of ``figure`` over line (rows) × load (columns); NaN where absent."""
        return grid_values(self.points, self.line_values_v, self.load_values_a, figure)

    def verdict_grid(self) -> list[list[str | None]]:
        """Verdict words over line (rows) × load (columns); None where the grid has no point."""
        cells: list[list[str | None]] = [
            [None] * len(self.load_values_a) for _ in self.line_values_v
        ]
        for (row, column), point in zip(self._cells(), self.points, strict=True):
            cells[row][column] = point.verdict
        return cells

    def _cells(self) -> list[tuple[int, int]]:
        return grid_cells(self.points, self.line_values_v, self.load_values_a)


def grid_cells(
    points: Sequence[PointReview], lines_v: Sequence[float], loads_a: Sequence[float]
) -> list[tuple[int, int]]:
    """(row, column) of each point in the line × load grid given by sorted axis values."""
    rows = np.searchsorted(np.asarray(lines_v), [p.point.line_v for p in points])
    columns = np.searchsorted(np.asarray(loads_a), [p.point.load_a for p in points])
    return list(zip(rows.tolist(), columns.tolist(), strict=True))


def grid_values(
    points: Sequence[PointReview],
    lines_v: Sequence[float],
    loads_a: Sequence[float],
    figure: str,
) -> np.ndarray:
    """Values of ``figure`` over line × load; NaN where no point or no value."""
    values = np.full((len(lines_v), len(loads_a)), np.nan)
    for (row, column), point in zip(grid_cells(points, lines_v, loads_a), points, strict=True):
        value = point.value(figure)
        if value is not None:
            values[row, column] = value
    return values


def node_polarity(review: RunReview, node: str) -> int:
    """A node's polarity: from the sequence, else −1 when its stored peaks are negative."""
    spec = review.sequence.node(node) if review.sequence else None
    if spec is not None:
        return spec.polarity
    peaks = [
        stats["peak_v"].value
        for point in review.points
        if "peak_v" in (stats := point.nodes.get(node, {}))
    ]
    return -1 if peaks and all(peak is not None and peak < 0 for peak in peaks) else 1


def worst_points(points: Sequence[PointReview], polarity: int = 1) -> dict[str, WorstPoint]:
    """For each figure of :data:`FIGURE_DIRECTIONS`, the point with the worst value (a falling
    node's worst peak is its most negative)."""
    result: dict[str, WorstPoint] = {}
    for figure in FIGURE_DIRECTIONS:
        direction = figure_direction(figure, polarity)
        candidates = [(p.value(figure), p) for p in points if p.value(figure) is not None]
        if not candidates:
            continue
        pick = min if direction > 0 else max
        value, point = pick(candidates, key=lambda pair: pair[0])
        result[figure] = WorstPoint(figure, point, value)
    return result


def _point_reviews(store: RunStore, run_id: int, primary: str) -> list[PointReview]:
    figures = store.node_figures(run_id)
    verdicts = store.node_verdicts(run_id)
    reviews = []
    for point in store.points(run_id):
        nodes = {
            node: {
                name: FigureStats(v["worst"], v["mean"], v["spread"], int(v["n"] or 0))
                for name, v in per_node.items()
            }
            for node, per_node in figures.get(point.id, {}).items()
        }
        stats = nodes.setdefault(primary, {})
        if "efficiency" not in stats and point.efficiency is not None:
            stats["efficiency"] = FigureStats(point.efficiency, point.efficiency, None, 1)
        reviews.append(PointReview(point, stats, nodes, verdicts.get(point.id, {})))
    return reviews


def review_run(store: RunStore, run_id: int) -> RunReview:
    """Read run ``run_id`` and its points and work out its verdict, grid and worst points."""
    run = store.run(run_id)
    try:
        sequence, problem = stored_sequence(run), None
    except InputError as exc:  # the stored text no longer validates (a DUT file has moved)
        sequence, problem = None, str(exc)
    stored_nodes = store.node_names(run_id)
    declared = [node.name for node in sequence.nodes] if sequence else []
    # a run with neither a valid sequence nor a capture has no node to name but the default
    node_names = tuple(dict.fromkeys([*declared, *stored_nodes])) or (DEFAULT_PRIMARY_NAME,)
    points = _point_reviews(store, run_id, node_names[0])
    counts = {word: 0 for word in VERDICTS_WORST_FIRST}
    for point in points:
        counts[point.verdict] += 1
    return RunReview(
        run=run,
        sequence=sequence,
        sequence_problem=problem,
        points=points,
        verdict=worst_verdict(p.verdict for p in points),
        verdict_counts=counts,
        worst=worst_points(points),
        line_values_v=tuple(sorted({p.point.line_v for p in points})),
        load_values_a=tuple(sorted({p.point.load_a for p in points})),
        node_names=node_names,
        node_name=node_names[0],
        end_safety=store.last_safety_check(run_id) if run.status == "unsafe-end" else None,
        loss_methods=store.capture_methods(run_id, "snubber_loss_method"),
    )


def limit_rows(review: RunReview) -> list[tuple[str, str]]:
    """The limits the viewed node was judged against as (what, value) rows, in reading order."""
    spec = review.node_spec
    if review.sequence is None or spec is None:
        return []
    limits = spec.limits
    primary = spec is review.sequence.primary
    rows = []
    if limits.max_peak_v is not None:
        what = review.peak_word if spec.polarity > 0 else f"|{review.peak_word}|"
        rows.append((f"{what} ≤", format_si(limits.max_peak_v, "V")))
    rows.append(
        (
            ("switch rating" if primary else "rating") + " × derating",
            f"{format_si(spec.rating_v, 'V')} × {spec.derating:g} = "
            f"{format_si(spec.derated_rating_v, 'V')}",
        )
    )
    for name, (figure, is_max) in LIMIT_FIGURES.items():
        value = getattr(limits, name)
        if value is not None and figure != "peak_v":
            relation = "≤" if is_max else "≥"
            rows.append((f"{FIGURE_TITLES[figure]} {relation}", format_figure(figure, value)))
    rows.append(("settling band", f"±{100 * spec.settling_band:.3g} % of the step"))
    if spec.snubber is not None:
        rows.append(("snubber", spec.snubber.label))
    clamp = review.sequence.clamp
    if primary and clamp is not None:
        rows.append(("clamp", clamp.label))
    return rows


def _node_limits(spec: NodeSpec) -> dict[str, Any]:
    return {
        **vars(spec.limits),
        "settling_band": spec.settling_band,
        "rating_v": spec.rating_v,
        "derating": spec.derating,
        "polarity": "rising" if spec.polarity > 0 else "falling",
        "channel": spec.channel,
    }


def _worst_summary(worst: Mapping[str, WorstPoint]) -> dict[str, Any]:
    return {
        figure: {
            "point_index": found.point.point.point_index,
            "line_v": found.point.point.line_v,
            "load_a": found.point.point.load_a,
            "value": found.value,
        }
        for figure, found in worst.items()
    }


def run_summary(review: RunReview) -> dict[str, Any]:
    """The review as plain data for JSON: verdict, limits, one row per point, worst points."""
    sequence = review.sequence
    views = {name: review.node_view(name) for name in review.node_names}
    return {
        "run": review.run.id,
        "status": review.run.status,
        "end_safety": review.end_safety,
        "verdict": review.verdict,
        "verdict_counts": review.verdict_counts,
        "dut": review.run.dut_label,
        "snubber": review.run.snubber_label,
        "software_version": review.run.software_version,
        "limits": (
            None
            if sequence is None
            else {
                **vars(sequence.primary.limits),
                "settling_band": sequence.primary.settling_band,
                "switch_rating_v": sequence.dut.switch_rating_v,
                "derating": sequence.dut.derating,
                "nodes": {node.name: _node_limits(node) for node in sequence.nodes},
                "clamp": None if sequence.clamp is None else vars(sequence.clamp),
            }
        ),
        "nodes": list(review.node_names),
        "sequence_problem": review.sequence_problem,
        "points": [
            {
                "point_index": p.point.point_index,
                "line_v": p.point.line_v,
                "line_is_ac": p.point.line_is_ac,
                "load_a": p.point.load_a,
                "status": p.point.status,
                "verdict": p.verdict,
                "verdict_reasons": p.point.verdict_reasons,
                "figures": {name: vars(stats) for name, stats in p.figures.items()},
                "nodes": {
                    name: {
                        "verdict": p.of_node(name).verdict,
                        "verdict_reasons": p.of_node(name).reasons,
                        "figures": {
                            figure: vars(stats) for figure, stats in p.nodes.get(name, {}).items()
                        },
                    }
                    for name in review.node_names
                },
            }
            for p in review.points
        ],
        "worst": _worst_summary(review.worst),
        "worst_by_node": {name: _worst_summary(view.worst) for name, view in views.items()},
    }
