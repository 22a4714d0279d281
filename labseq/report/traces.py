"""The few captures a report draws, read back and analysed again to redraw their fitted rings.

Only overlay plots come here; tables and maps use the figures the run stored, so a report of a
large run reads a handful of raw captures at most.
"""

from __future__ import annotations

from labseq.analysis import NoEdgeError, SnubberBranch, analyze_capture
from labseq.report.plots import Trace
from labseq.sequence import Sequence
from labseq.store import Store, StoredCapture

#: Captures drawn per point at most.
MAX_CAPTURES_DRAWN = 4


def _analysis_options(sequence: Sequence | None) -> dict[str, object]:
    """The settings the run analysed with; plain defaults when the sequence is unknown."""
    if sequence is None:
        return {}
    return {
        "polarity": sequence.scope.polarity,
        "settling_band": sequence.limits.settling_band,
        "snubber": SnubberBranch(
            rs_ohm=sequence.snubber.resistance_ohm,
            cs_f=sequence.snubber.capacitance_f,
            fsw_hz=sequence.dut.switching_frequency_hz,
        ),
        "rating_v": sequence.dut.switch_rating_v,
        "derating": sequence.dut.derating,
    }


def trace_of(capture: StoredCapture, sequence: Sequence | None) -> Trace:
    """A stored capture in volts with its fitted rings (none, and the reason, when the analysis
    finds no edge)."""
    volts = capture.volts()
    time_s = capture.time_s()
    label = f"capture {capture.capture_index + 1}"
    try:
        figures = analyze_capture(
            volts,
            capture.x_increment_s,
            float(time_s[0]),
            clipped=capture.clipped,
            **_analysis_options(sequence),  # type: ignore[arg-type]
        )
    except (NoEdgeError, ValueError) as exc:
        return Trace(label, time_s, volts, (), None, f"{label}: {exc}")
    fits = tuple(fit for fit in figures.ring_fits if fit is not None)
    problem = None if fits else f"{label}: no ring fitted"
    return Trace(label, time_s, volts, fits, figures.worst.edge_time_s, problem)


def point_traces(
    store: Store, point_id: int, sequence: Sequence | None, limit: int = MAX_CAPTURES_DRAWN
) -> list[Trace]:
    """Up to ``limit`` captures of a point as traces."""
    return [trace_of(capture, sequence) for capture in store.captures(point_id)[:limit]]
