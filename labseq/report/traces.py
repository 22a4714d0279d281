"""The few captures a report draws, read back and analysed again to redraw their fitted rings.

Only overlay plots come here; tables and maps use the figures the run stored, so a report of a
large run reads a handful of raw captures at most. Each capture is analysed as the run analysed
it (:mod:`labseq.pipeline`), so the ring drawn is the one the tables describe.
"""

from __future__ import annotations

from labseq.analysis import NoEdgeError
from labseq.pipeline import analyse_waveform
from labseq.report.plots import Trace
from labseq.sequence import Sequence
from labseq.store import StoredCapture
from labseq.store_api import RunStore

#: Captures drawn per point at most.
MAX_CAPTURES_DRAWN = 4


def trace_of(capture: StoredCapture, sequence: Sequence | None) -> Trace:
    """A stored capture in volts with its fitted rings (none, and the reason, when the analysis
    finds no edge), analysed as its node was."""
    volts = capture.volts()
    time_s = capture.time_s()
    label = f"capture {capture.capture_index + 1}"
    node = None if sequence is None else sequence.node(capture.node)
    try:
        figures = analyse_waveform(capture, sequence, node)
    except (NoEdgeError, ValueError) as exc:
        return Trace(label, time_s, volts, (), None, f"{label}: {exc}")
    fits = tuple(fit for fit in figures.ring_fits if fit is not None)
    problem = None if fits else f"{label}: no ring fitted"
    return Trace(label, time_s, volts, fits, figures.worst.edge_time_s, problem)


def point_traces(
    store: RunStore,
    point_id: int,
    sequence: Sequence | None,
    limit: int = MAX_CAPTURES_DRAWN,
    *,
    node: str,
) -> list[Trace]:
    """Up to ``limit`` captures of one node of a point as traces."""
    captures = store.captures(point_id, node=node)[:limit]
    return [trace_of(capture, sequence) for capture in captures]
