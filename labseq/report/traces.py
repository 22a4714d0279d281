"""The few captures a report draws, read back and analysed again to redraw their fitted rings.

Only overlay plots come here; tables and maps use the figures the run stored, so a report of a
large run reads a handful of raw captures at most.
"""

from __future__ import annotations

from labseq.analysis import NoEdgeError, analyze_capture
from labseq.report.plots import Trace
from labseq.sequence import Sequence
from labseq.store import PRIMARY_NODE, Store, StoredCapture

#: Captures drawn per point at most.
MAX_CAPTURES_DRAWN = 4


def _analysis_options(sequence: Sequence | None, node_name: str) -> dict[str, object]:
    """The settings the run analysed the node with; plain defaults when the sequence (or the
    node in it) is unknown."""
    node = None if sequence is None else sequence.node(node_name)
    if sequence is None or node is None:
        return {}
    return sequence.analysis_options(node)


def trace_of(capture: StoredCapture, sequence: Sequence | None) -> Trace:
    """A stored capture in volts with its fitted rings (none, and the reason, when the analysis
    finds no edge), analysed as its node was."""
    volts = capture.volts()
    time_s = capture.time_s()
    label = f"capture {capture.capture_index + 1}"
    try:
        figures = analyze_capture(
            volts,
            capture.x_increment_s,
            float(time_s[0]),
            clipped=capture.clipped,
            **_analysis_options(sequence, capture.node),  # type: ignore[arg-type]
        )
    except (NoEdgeError, ValueError) as exc:
        return Trace(label, time_s, volts, (), None, f"{label}: {exc}")
    fits = tuple(fit for fit in figures.ring_fits if fit is not None)
    problem = None if fits else f"{label}: no ring fitted"
    return Trace(label, time_s, volts, fits, figures.worst.edge_time_s, problem)


def point_traces(
    store: Store,
    point_id: int,
    sequence: Sequence | None,
    limit: int = MAX_CAPTURES_DRAWN,
    *,
    node: str = PRIMARY_NODE,
) -> list[Trace]:
    """Up to ``limit`` captures of one node of a point as traces."""
    captures = store.captures(point_id, node=node)[:limit]
    return [trace_of(capture, sequence) for capture in captures]
