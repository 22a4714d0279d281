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

import math
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np

from labseq.analysis.snubber import METHOD_LABELS
from labseq.analysis.verdict import LIMIT_FIGURES, worst_verdict
from labseq.errors import InputError
from labseq.figures import (
    FIGURE,
    FIGURE_DIRECTIONS,
    FIGURE_TITLES,
    SIGNED_FIGURES,
    VERDICTS_WORST_FIRST,
    bound_relation,
    figure_direction,
    figure_title,
    format_change,
    format_figure,
)
from labseq.pipeline import stored_sequence
from labseq.sequence import DEFAULT_PRIMARY_NAME, NodeSpec
from labseq.sequence import Sequence as SequenceFile
from labseq.store import PointRecord, RunRecord, shown_status
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
    #: The (node, point id)s where at least one capture clipped: their clip-bounded figures are
    #: bounds, shown as "≥ 89.6 V".
    clipped: frozenset[tuple[str, int]] = frozenset()

    @property
    def simulated(self) -> bool:
        """Whether the run was made on the simulated bench (no hardware, modelled readings)."""
        return self.run.bench_kind == SIMULATED_BENCH_KIND

    def is_clipped(self, point: PointReview) -> bool:
        """Whether a capture of the viewed node clipped at ``point``."""
        return (self.node_name, point.point.id) in self.clipped

    def figure_text(self, figure: str, point: PointReview, value: float | None = None) -> str:
        """The point's value of ``figure`` in words, marked as a bound where a capture clipped
        and clipping bounds the figure: "≥ 89.6 V"."""
        value = point.value(figure) if value is None else value
        text = format_figure(figure, value)
        bound = bound_relation(figure, self.polarity) if self.is_clipped(point) else ""
        return f"{bound} {text}" if bound and value is not None else text

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

    def excesses(self, point: PointReview) -> list[LimitExcess]:
        """Every limited figure of every node at ``point`` with its distance to its limit
        (positive: beyond it), the farthest beyond first."""
        if self.sequence is None:
            return []
        found = []
        for spec in self.sequence.nodes:
            figures = point.nodes.get(spec.name, {})
            clipped = (spec.name, point.point.id) in self.clipped
            for limit_name, (figure, is_max) in LIMIT_FIGURES.items():
                limit = getattr(spec.limits, limit_name)
                if limit is None or (figure == "efficiency" and spec is not self.sequence.primary):
                    continue
                stats = point.figures.get(figure) if figure == "efficiency" else figures.get(figure)
                if stats is None or stats.value is None:
                    continue
                found.append(
                    LimitExcess(
                        node=spec.name,
                        figure=figure,
                        value=stats.value,
                        limit=limit,
                        is_max=is_max,
                        polarity=spec.polarity,
                        is_derated_rating=figure == "peak_v"
                        and math.isclose(limit, spec.derated_rating_v),
                        bounded=clipped and bound_relation(figure, spec.polarity) != "",
                        several_nodes=len(self.sequence.nodes) > 1,
                    )
                )
        return sorted(found, key=lambda e: -e.share)

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


#: The bench kind of the simulated bench (:mod:`labseq.sim_bench`).
SIMULATED_BENCH_KIND = "sim"


@dataclass(frozen=True)
class LimitExcess:
    """How far one figure of one node at a point is from its limit: ``excess`` is positive
    beyond the limit (the figure fails), negative inside it (the margin left)."""

    node: str
    figure: str
    value: float  # in the node's own sign
    limit: float
    is_max: bool
    polarity: int
    is_derated_rating: bool  # the peak limit is the node's rating × derating
    bounded: bool = False  # the value comes from a clipped capture: a bound
    several_nodes: bool = False

    @property
    def excess(self) -> float:
        """How far beyond the limit (negative: inside it), in the figure's unit."""
        magnitude = self.polarity < 0 and self.figure in SIGNED_FIGURES
        judged = abs(self.value) if magnitude else self.value
        return judged - self.limit if self.is_max else self.limit - judged

    @property
    def share(self) -> float:
        """The excess as a fraction of the limit, so figures of different units rank."""
        return self.excess / abs(self.limit) if self.limit else math.copysign(math.inf, self.excess)

    @property
    def beyond(self) -> bool:
        return self.excess > 0

    def words(self) -> str:
        """ "peak stress 147 V, 27 V over the derated rating"; "damping ratio 0.08, 0.02 under
        the 0.1 limit"; inside the limit: "…, 2 V under the derated rating"."""
        title = figure_title(self.figure, self.polarity)
        if self.several_nodes and self.figure != "efficiency":  # efficiency is the point's
            title = f"{self.node} {title}"
        value = format_figure(self.figure, self.value)
        if self.bounded:
            value = f"{bound_relation(self.figure, self.polarity)} {value}"
        distance = format_change(self.figure, abs(self.excess)).lstrip("+±")
        if self.beyond:
            side = "over" if self.is_max else "under"
        else:
            side = "under" if self.is_max else "above"
        limit = (
            "the derated rating"
            if self.is_derated_rating
            else f"the {format_figure(self.figure, self.limit)} limit"
        )
        return f"{title} {value}, {distance} {side} {limit}"


def reason_words(reason: str) -> str:
    """A stored verdict reason in words: a reason stored by an older labseq named the figure by
    its key and a ratio in engineering notation ("damping_ratio 266 m breaks limit ≥ 100 m");
    this gives "damping ratio 0.266 breaks limit ≥ 0.1". Reasons in words pass unchanged."""
    node, separator, rest = reason.partition(": ")
    if separator and node not in FIGURE and _OLD_REASON.match(rest):
        prefix = f"{node}: "
    else:
        prefix, rest = "", reason
    found = _OLD_REASON.match(rest)
    if found is None or found["figure"] not in FIGURE:
        return reason
    figure = found["figure"]
    text = figure_title(figure) + rest[len(figure) :]
    if not FIGURE[figure].unit and not FIGURE[figure].fraction:
        text = _PREFIXED.sub(lambda m: f"{float(m[1]) * _PREFIX_SCALE[m[2]]:.3g}", text)
    return prefix + text


_OLD_REASON = re.compile(r"^(?P<figure>[a-z]+_[a-z_]+)(?=[ :])")
_PREFIXED = re.compile(r"(-?\d+(?:\.\d+)?) ([munpk])(?![A-Za-z])")
_PREFIX_SCALE = {"p": 1e-12, "n": 1e-9, "u": 1e-6, "m": 1e-3, "k": 1e3}


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
        sequence, problem = stored_sequence(run, store.location), None
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
        clipped=frozenset(store.clipped_points(run_id)),
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


# --------------------------------------------------------------------------- machine output

#: The fields of a stored run in every command's JSON (``runs``, ``report``, ``compare``,
#: ``run``, ``resume``, ``export``, ``analyze-run``): one shape for a run everywhere.
RUN_FIELDS = (
    "id",
    "uuid",
    "bench_id",
    "bench_host",
    "started_at",
    "finished_at",
    "status",
    "dut_label",
    "snubber_label",
    "bench_kind",
    "sequence_path",
    "sequence_sha256",
    "points_done",
    "points_total",
)


def run_object(run: RunRecord, end_safety: str | None = None) -> dict[str, Any]:
    """A run as every command's JSON gives it: :data:`RUN_FIELDS` with its true status (a run
    recorded as running whose process has died is "interrupted"; ``recorded_status`` keeps
    what the store says), its label (``run --label``), whether the bench was the simulated
    one, and (for a run that ended unsafe) what its shutdown found."""
    return {
        **{name: getattr(run, name) for name in RUN_FIELDS},
        "status": shown_status(run),
        "recorded_status": run.status,
        "label": run.notes,
        "simulated": run.bench_kind == SIMULATED_BENCH_KIND,
        "end_safety": end_safety,
    }


def point_object(point_index: int, line_v: float, line_is_ac: bool, load_a: float) -> dict:
    """A point's setpoints as every command's JSON gives them (SI numbers)."""
    return {
        "point_index": point_index,
        "line_v": line_v,
        "line_is_ac": line_is_ac,
        "load_a": load_a,
    }


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


def run_summary(review: RunReview, problems: Mapping[int, str] | None = None) -> dict[str, Any]:
    """The review as plain data for JSON: the run, its headline, verdict, limits, one row per
    point (with why it did not pass), worst points. ``problems``: as for :func:`not_passed`."""
    why = {item.point.point.id: item.why for item in not_passed(review, problems)}
    sequence = review.sequence
    views = {name: review.node_view(name) for name in review.node_names}
    return {
        "run": run_object(review.run, review.end_safety),
        "status": review.run.status,  # (also in "run": kept here for scripts that read it)
        "end_safety": review.end_safety,
        "headline": headline(review, problems),
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
                **point_object(
                    p.point.point_index, p.point.line_v, p.point.line_is_ac, p.point.load_a
                ),
                "status": p.point.status,
                "verdict": p.verdict,
                "why": why.get(p.point.id),
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


# --------------------------------------------------------------------------- in words


@dataclass(frozen=True)
class NotPassed:
    """A point that did not pass, with why: the limits it is beyond (farthest first) and, for a
    point that could not be judged, what stopped it."""

    point: PointReview
    beyond: list[LimitExcess]
    why: str

    @property
    def severity(self) -> tuple[int, float]:
        """Sort key, worst first: failing points by how far beyond a limit (as a share of the
        limit), then failing points with nothing to measure it by, then incomplete ones."""
        if self.point.verdict == "fail":
            return (0, -self.beyond[0].share) if self.beyond else (1, 0.0)
        return (2, 0.0)


def not_passed(review: RunReview, problems: Mapping[int, str] | None = None) -> list[NotPassed]:
    """The points that did not pass, worst first, each with its reason in words.

    ``problems`` maps a point id to what stopped it being measured (read from the run's log,
    :func:`labseq.runlog.point_problems`)."""
    problems = problems or {}
    found = []
    for point in review.points:
        if point.verdict == "pass":
            continue
        beyond = [e for e in review.excesses(point) if e.beyond]
        found.append(NotPassed(point, beyond, _why(point, beyond, problems.get(point.point.id))))
    return sorted(found, key=lambda item: item.severity)


def _why(point: PointReview, beyond: Sequence[LimitExcess], problem: str | None) -> str:
    if problem is not None:
        return problem
    if point.point.status == "pending":
        return "not measured: the run ended before this point"
    if point.point.status == "failed":
        return "not measured: the point failed (no reason recorded)"
    stored = [reason_words(reason) for reason in point.reasons]
    if beyond:
        # the distances for failed limits, and what else kept the point from passing
        undetermined = [reason for reason in stored if "breaks limit" not in reason]
        return "; ".join([e.words() for e in beyond] + undetermined)
    return "; ".join(stored) or point.point.status


def headline(review: RunReview, problems: Mapping[int, str] | None = None) -> str:
    """The run's outcome in one sentence a manager can read, e.g. "fails at 6 of 16 points;
    worst: peak stress 147 V at 75 V / 2.2 A, 27 V over the derated rating"."""
    total = len(review.points)
    if total == 0:
        return "no points recorded"
    counts = review.verdict_counts
    listed = not_passed(review, problems)
    if counts["fail"]:
        incomplete = counts["incomplete"]
        more = f" ({incomplete} more could not be judged)" if incomplete else ""
        worst = listed[0]
        where = review.label(worst.point)
        start = f"fails at {counts['fail']} of {total} points{more}; worst: "
        if worst.beyond:
            title, _, rest = worst.beyond[0].words().partition(", ")
            return f"{start}{title} at {where}, {rest}"
        return f"{start}{where}: {worst.why}"
    if counts["incomplete"]:
        first = listed[0]
        example = reason_words(first.point.reasons[0]) if first.point.reasons else first.why
        passing = f"; the other {counts['pass']} pass" if counts["pass"] else ""
        return (
            f"incomplete: {counts['incomplete']} of {total} points could not be judged "
            f"(e.g. {review.label(first.point)}: {example}){passing}"
        )
    closest = [(excess, point) for point in review.points for excess in review.excesses(point)[:1]]
    sentence = f"passes at all {total} points"
    if closest:
        excess, point = max(closest, key=lambda pair: pair[0].share)
        title, _, rest = excess.words().partition(", ")
        sentence += f"; closest to a limit: {title} at {review.label(point)}, {rest}"
    return sentence
