"""Analysis of switch-node captures: pure functions on numpy arrays, no I/O.

* :func:`analyze_capture` — per-edge figures of a record (IEEE 181 levels, ring fit, settling,
  snubber loss, stress margin).
* :func:`fit_ring` / :func:`fit_rings` — the free response after an edge (ring, snubber-branch
  real pole, plateau) fitted by matrix pencil and variable projection, one window or many at once.
* :func:`aggregate` and :func:`judge` — per-point summaries and verdicts.
* :func:`propose_snubber`, :func:`propose_clamp` and the design equations of
  :mod:`labseq.analysis.design`.
"""

from labseq.analysis.capture import (
    EDGE_FIGURE_NAMES,
    MIN_RECORD_SAMPLES,
    CaptureFigures,
    EdgeFigures,
    NoEdgeError,
    analyze_capture,
)
from labseq.analysis.design import (
    ClampProposal,
    DesignInputError,
    SnubberProposal,
    added_capacitance_method,
    capacitance_for_loss_f,
    characteristic_impedance_ohm,
    cheaper_tool,
    parasitic_capacitance_f,
    propose_clamp,
    propose_snubber,
    rcd_clamp_loss_w,
    snubber_damping_ratio,
)
from labseq.analysis.levels import histogram_state_levels
from labseq.analysis.ringfit import RingFit, RingFitError, RingWindow, fit_ring, fit_rings
from labseq.analysis.snubber import SnubberBranch, cv2f_loss_w
from labseq.analysis.verdict import Limits, PointFigures, Verdict, aggregate, judge
from labseq.figures import DEFAULT_DERATING, FIGURE_UNITS

__all__ = [
    "DEFAULT_DERATING",
    "EDGE_FIGURE_NAMES",
    "FIGURE_UNITS",
    "MIN_RECORD_SAMPLES",
    "CaptureFigures",
    "ClampProposal",
    "DesignInputError",
    "EdgeFigures",
    "Limits",
    "NoEdgeError",
    "PointFigures",
    "RingFit",
    "RingFitError",
    "RingWindow",
    "SnubberBranch",
    "SnubberProposal",
    "Verdict",
    "added_capacitance_method",
    "aggregate",
    "analyze_capture",
    "capacitance_for_loss_f",
    "characteristic_impedance_ohm",
    "cheaper_tool",
    "cv2f_loss_w",
    "fit_ring",
    "fit_rings",
    "histogram_state_levels",
    "judge",
    "parasitic_capacitance_f",
    "propose_clamp",
    "propose_snubber",
    "rcd_clamp_loss_w",
    "snubber_damping_ratio",
]
