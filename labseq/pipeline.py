"""One way to analyse a capture and to judge a stored point, whoever asks.

The runner (while it sweeps, and on resume), ``labseq analyze-run``, the report's redrawn rings
and ``labseq design --run`` all see a capture the same way: its volts and time from the stored
codes and scaling, the scope's per-sample clip mask (so clipped samples stay out of the ring fit
and the figures they touch are bounds), and the node's own polarity, settling band, snubber and
rating from the sequence the run was made with (:func:`stored_sequence`). A point is judged from
its captures' stored figures, node by node, against each node's limits.

Pure with respect to the bench: nothing here opens an instrument.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from labseq.analysis import CaptureFigures, NoEdgeError, SnubberBranch, aggregate, analyze_capture
from labseq.analysis import judge as judge_point
from labseq.analysis.capture import ClampFigures, clamp_figures
from labseq.analysis.verdict import worst_verdict
from labseq.errors import InputError
from labseq.figures import CAPTURE_FIGURES
from labseq.sequence import NodeSpec, Sequence, SequenceError, parse_sequence
from labseq.store import PointRecord, RunRecord, Store, StoreError
from labseq_instruments import Waveform
from labseq_instruments.tomlkeys import report


@dataclass(frozen=True)
class NodeResult:
    """One capture's analysis: its edges and, on the primary with a clamp declared, the clamp."""

    figures: CaptureFigures
    clamp: ClampFigures | None = None


class StoredSequenceError(StoreError, InputError):
    """The sequence text stored with a run no longer validates (edited or damaged in the
    store, or a file it names has moved): a store failure, named against the store."""

    exit_code = 3


def stored_sequence(run: RunRecord, store_location: str | Path) -> Sequence:
    """The sequence ``run`` (of the store at ``store_location``) was made with, validated again
    from the text stored with it; :class:`StoredSequenceError` when it no longer validates. Its
    problems name the store and the run, not the file on disk it was once read from (which
    may have changed since, and is not what was checked)."""
    try:
        return parse_sequence(run.sequence_text, run.sequence_path, sha256=run.sequence_sha256)
    except SequenceError as error:
        problems = "\n".join(report(store_location, error.problems).splitlines()[1:])
        raise StoredSequenceError(
            f"{store_location}: the sequence stored with run {run.id} (read from "
            f"{run.sequence_path} when the run started) no longer validates; its lines:\n"
            f"{problems}"
        ) from None


def analysis_options(sequence: Sequence | None, node: NodeSpec | None) -> dict[str, Any]:
    """Keyword arguments of :func:`labseq.analysis.analyze_capture` for ``node``'s captures:
    its polarity, settling band, snubber (at the DUT's switching frequency) and rating; the
    analysis' own defaults when the sequence or the node is not known."""
    if sequence is None or node is None:
        return {}
    snubber = node.snubber
    return {
        "polarity": node.polarity,
        "settling_band": node.settling_band,
        "snubber": None
        if snubber is None
        else SnubberBranch(
            snubber.resistance_ohm, snubber.capacitance_f, sequence.dut.switching_frequency_hz
        ),
        "rating_v": node.rating_v,
        "derating": node.derating,
    }


def analyse_waveform(
    waveform: Waveform,
    sequence: Sequence | None = None,
    node: NodeSpec | None = None,
    volts: np.ndarray | None = None,
) -> CaptureFigures:
    """Figures of one capture of ``node`` as the sequence says to analyse it, with the scope's
    per-sample clip mask (plain analysis defaults when the node is not known). ``volts``: the
    capture's volts where the caller has them already (a long record is converted once)."""
    return analyze_capture(
        waveform.volts() if volts is None else volts,
        waveform.x_increment_s,
        waveform.x_origin_s,
        clipped=waveform.clip_mask(),
        **analysis_options(sequence, node),
    )


def analyse_or_error(
    sequence: Sequence,
    waveform: Waveform,
    node: NodeSpec,
    point: PointRecord | None = None,
) -> NodeResult | Exception:
    """:func:`analyse_waveform`, plus the clamp's figures on the primary when the sequence
    declares a clamp and the ``point`` (its line, for the bus) is known; a record it cannot
    analyse (no edge, too short) is returned as the error to store beside the capture."""
    volts = waveform.volts()  # converted once, for the edges and the clamp
    try:
        figures = analyse_waveform(waveform, sequence, node, volts)
    except (NoEdgeError, ValueError) as error:
        return error
    clamp = sequence.clamp
    if clamp is None or point is None or node is not sequence.primary or figures.polarity < 0:
        return NodeResult(figures)
    return NodeResult(
        figures,
        clamp_figures(
            volts,
            waveform.x_increment_s,
            waveform.x_origin_s,
            figures,
            resistance_ohm=clamp.resistance_ohm,
            capacitance_f=clamp.capacitance_f,
            switching_frequency_hz=sequence.dut.switching_frequency_hz,
            line_v=point.line_v,
            line_is_ac=point.line_is_ac,
        ),
    )


def store_figures(store: Store, capture_id: int, result: NodeResult | Exception) -> None:
    """Store one capture's analysis: its worst edge's figures (and the clamp's) and every edge,
    or why it failed."""
    if isinstance(result, Exception):
        store.set_capture_figures(capture_id, {}, error=str(result))
        return
    figures = result.figures
    worst = figures.worst.as_dict()
    worst["clipped"] = figures.clipped
    if result.clamp is not None:
        worst.update(result.clamp.as_dict())
    store.set_capture_figures(capture_id, worst, edges=[edge.as_dict() for edge in figures.edges])


def judge_stored_point(store: Store, sequence: Sequence, point: PointRecord) -> str:
    """Aggregate a point's stored capture figures per node, judge each node against its own
    limits (efficiency with the primary), store them, and store the worst of the nodes'
    verdicts as the point's; return that verdict."""
    rows: dict[str, list[dict[str, object]]] = {node.name: [] for node in sequence.nodes}
    for capture in store.captures(point.id, with_codes=False):
        stored = store.capture_figures(capture.id)
        if capture.node in rows and stored and not stored.get("error"):
            row: dict[str, object] = {name: stored[name] for name in CAPTURE_FIGURES}
            row["clipped"] = bool(stored.get("clipped"))
            rows[capture.node].append(row)
    node_figures, node_verdicts, reasons = {}, {}, []
    several = len(sequence.nodes) > 1
    for node in sequence.nodes:
        summary = aggregate(rows[node.name], polarity=node.polarity)
        node_figures[node.name] = {
            name: {"worst": s.worst, "mean": s.mean, "spread": s.spread, "n": s.count}
            for name, s in summary.figures.items()
        }
        efficiency = point.efficiency if node is sequence.primary else None
        verdict = judge_point(summary, node.limits, efficiency, polarity=node.polarity)
        node_verdicts[node.name] = (verdict.status, verdict.reasons)
        reasons += [f"{node.name}: {r}" if several else r for r in verdict.reasons]
    status = worst_verdict(status for status, _ in node_verdicts.values())
    store.set_point_judgement(point.id, node_figures, node_verdicts, status, reasons)
    return status


def analyse_run(store: Store, sequence: Sequence, run_id: int, *, only_missing: bool) -> int:
    """(Re-)analyse a run's stored captures from their raw codes and judge its done points
    against ``sequence``'s limits, without touching the bench; return the captures analysed.

    ``only_missing`` limits the work to captures that have no figures yet (after a run was
    killed between storing a capture and storing its figures). A capture of a node the
    sequence does not declare gets that as its error."""
    analysed = 0
    points = {point.id: point for point in store.points(run_id)}
    for capture in store.iter_captures(run_id, only_unanalysed=only_missing):
        node = sequence.node(capture.node)
        result: NodeResult | Exception = (
            LookupError(f"node {capture.node!r} is not declared in the sequence")
            if node is None
            else analyse_or_error(sequence, capture, node, points[capture.point_id])
        )
        store_figures(store, capture.id, result)
        analysed += 1
    for point in store.points(run_id, status="done"):
        if not only_missing or point.verdict is None:
            judge_stored_point(store, sequence, point)
    return analysed
