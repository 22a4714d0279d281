"""What `labseq check` tells before a run: the limits that will judge it, how long it should
take, and what in the sequence looks implausible though it is valid.

Everything here reads a validated :class:`labseq.sequence.Sequence` and opens nothing. The
estimates are stated with how they are made, so a reader can weigh them.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

from labseq.analysis.snubber import SnubberBranch, waveform_method_record_s
from labseq.analysis.verdict import LIMIT_FIGURES
from labseq.figures import figure_title, format_figure
from labseq.sequence import NodeSpec, Sequence
from labseq.units import format_si

#: Horizontal divisions of a scope screen: the record spans ten times the time per division,
#: and the screen is ten divisions high about its offset (common practice, no published source).
SCREEN_DIVISIONS = 10
#: Time one capture takes besides the record itself: arming, the trigger, the transfer, the
#: analysis hand-off. Measured on the simulated bench (about 0.15 s a capture of 20 000 samples
#: over loopback); a real scope's transfer over USB or LAN is often slower.
CAPTURE_OVERHEAD_S = 0.15
#: Time one point takes besides settling and capturing: the load setpoint and the meter reading.
POINT_OVERHEAD_S = 0.05
#: √2: the peak of a sine from its rms value (the bulk voltage of an offline input).
PEAK_PER_RMS = math.sqrt(2.0)


@dataclass(frozen=True)
class Estimate:
    """How long a run should take: ``typical_s`` with the overheads above, ``longest_s`` if
    every capture waits its whole acquisition timeout (a trigger that never fires)."""

    points: int
    typical_s: float
    longest_s: float
    settle_s: float
    ramp_s: float
    how: str

    def as_dict(self) -> dict[str, Any]:
        """Plain data for JSON (seconds)."""
        return {
            "points": self.points,
            "typical_s": self.typical_s,
            "longest_s": self.longest_s,
            "settle_s": self.settle_s,
            "ramp_s": self.ramp_s,
            "how": self.how,
        }


def estimate_duration(sequence: Sequence) -> Estimate:
    """The run's expected length: per point its settle time, then each capture's record plus
    :data:`CAPTURE_OVERHEAD_S`, plus :data:`POINT_OVERHEAD_S`; plus the source's ramps between
    line values (steps × dwell)."""
    grid, acquisition = sequence.grid, sequence.acquisition
    limits = sequence.bench.limits
    points = len(sequence.points())
    record_s = SCREEN_DIVISIONS * acquisition.time_per_div_s
    capture_s = record_s + CAPTURE_OVERHEAD_S
    lines = sorted(grid.line_values_v)
    ramp_steps = sum(len(limits.ramp_v(a, b)) for a, b in zip(lines, lines[1:], strict=False))
    ramp_s = ramp_steps * limits.line_step_dwell_s
    per_point_s = grid.settle_s + grid.captures_per_point * capture_s + POINT_OVERHEAD_S
    worst_point_s = (
        grid.settle_s
        + grid.captures_per_point * (acquisition.acquisition_timeout_s + CAPTURE_OVERHEAD_S)
        + POINT_OVERHEAD_S
    )
    how = (
        f"each point: settle {format_si(grid.settle_s, 's')} + {grid.captures_per_point} × "
        f"(record {format_si(record_s, 's')} + about {format_si(CAPTURE_OVERHEAD_S, 's')} to arm, "
        f"trigger and transfer, as measured on the simulated bench) + about "
        f"{format_si(POINT_OVERHEAD_S, 's')} for the load and meter; plus {ramp_steps} ramp "
        f"step(s) × {format_si(limits.line_step_dwell_s, 's')} between line values. A real "
        "scope's transfer may be slower; the longest assumes every capture waits its "
        "acquisition timeout"
    )
    return Estimate(
        points,
        points * per_point_s + ramp_s,
        points * worst_point_s + ramp_s,
        grid.settle_s,
        ramp_s,
        how,
    )


def duration_text(seconds: float) -> str:
    """``42 s``, ``12 min 5 s``, ``3 h 20 min``."""
    if seconds < 60:
        return format_si(seconds, "s")
    minutes, secs = divmod(round(seconds), 60)
    if minutes < 60:
        return f"{minutes} min {secs} s"
    hours, minutes = divmod(minutes, 60)
    return f"{hours} h {minutes} min"


@dataclass(frozen=True)
class JudgingLimit:
    """One limit a node's points will be judged against: ``figure`` ``relation`` ``value``."""

    node: str
    figure: str  # the figure catalogue's name, or "settling_band"
    what: str  # in words: "peak stress ≤"
    value: float  # SI (a fraction for the settling band and efficiency)
    text: str  # in words with its unit: "120 V (rating 150 V × derating 0.8)"

    def as_dict(self) -> dict[str, Any]:
        """Plain data for JSON."""
        return {
            "node": self.node,
            "figure": self.figure,
            "limit": self.what,
            "value": self.value,
            "text": self.text,
        }


def judging_limits(sequence: Sequence) -> list[JudgingLimit]:
    """Every limit a point of the run will be judged against, node by node."""
    rows = []
    for node in sequence.nodes:
        limits = node.limits
        for name, (figure, is_max) in LIMIT_FIGURES.items():
            value = getattr(limits, name)
            if value is None or (figure == "efficiency" and node is not sequence.primary):
                continue
            relation = "≤" if is_max else "≥"
            title = figure_title(figure, node.polarity)
            if figure == "peak_v" and node.polarity < 0:
                title = f"|{title}|"
            shown = format_figure(figure, value)
            if figure == "peak_v" and math.isclose(value, node.derated_rating_v):
                shown += f" (rating {format_si(node.rating_v, 'V')} × derating {node.derating:g})"
            rows.append(JudgingLimit(node.name, figure, f"{title} {relation}", value, shown))
        band = f"±{100 * node.settling_band:.3g} % of the step"
        rows.append(
            JudgingLimit(node.name, "settling_band", "settling band", node.settling_band, band)
        )
    return rows


def highest_input_v(sequence: Sequence) -> float:
    """The highest DC voltage the input puts on the bus: the top line value (its peak, √2 × rms,
    for AC)."""
    top = max(sequence.grid.line_values_v)
    return top * PEAK_PER_RMS if sequence.grid.line_is_ac else top


def snubber_loss_estimates(sequence: Sequence) -> list[tuple[NodeSpec, float, float]]:
    """(node, Cs·V²·fsw at the highest input voltage, its resistor's budget) of the primary's RC
    damper (Severns' RC snubber loss). The primary's step also carries the reflected voltage, so
    this is a lower bound; a secondary node's step depends on the turns ratio, which the
    sequence does not give, so it has no estimate here."""
    node = sequence.primary
    if node.snubber is None:
        return []
    volts = highest_input_v(sequence)
    loss_w = node.snubber.capacitance_f * volts**2 * sequence.dut.switching_frequency_hz
    return [(node, loss_w, node.snubber.resistor_power_budget_w)]


def loss_method_warnings(sequence: Sequence) -> list[str]:
    """One warning per node with an RC damper whose record is too short for the waveform loss
    method: its snubber loss would be the Cs·V²·fsw estimate at every point."""
    record_s = SCREEN_DIVISIONS * sequence.acquisition.time_per_div_s
    warnings = []
    for node in sequence.nodes:
        if node.snubber is None:
            continue
        branch = SnubberBranch(
            node.snubber.resistance_ohm,
            node.snubber.capacitance_f,
            sequence.dut.switching_frequency_hz,
        )
        needed_s = waveform_method_record_s(branch)
        if record_s < needed_s:
            warnings.append(
                f"node {node.name}: the record spans {format_si(record_s, 's')} "
                f"({SCREEN_DIVISIONS} × scope.time_per_div); measuring the snubber loss from the "
                f"waveform needs one switching period plus 5·Rs·Cs, {format_si(needed_s, 's')}. "
                "Every point's snubber loss will be the Cs·V²·fsw estimate instead (marked so in "
                f"the report); set scope.time_per_div to at least "
                f"{format_si(needed_s / SCREEN_DIVISIONS, 's')} to measure it"
            )
    return warnings


def plausibility_warnings(sequence: Sequence) -> list[str]:
    """What is valid but unlikely to be meant: a snubber that would burn far more than its
    resistor's budget (a "330 nF" typed for "330 pF"), no probe rating to check the switch
    against, a scope screen that clips below the derated rating or wastes its range."""
    warnings = []
    volts = highest_input_v(sequence)
    for node, loss_w, budget_w in snubber_loss_estimates(sequence):
        if loss_w > budget_w:
            terms = (
                f"{format_si(node.snubber.capacitance_f, 'F')} × ({format_si(volts, 'V')})² × "
                f"{format_si(sequence.dut.switching_frequency_hz, 'Hz')}"
            )
            warnings.append(
                f"node {node.name}: the snubber's Cs·V²·fsw is about {format_si(loss_w, 'W')} "
                f"already at the highest input voltage ({terms}), above its resistor's budget "
                f"of {format_si(budget_w, 'W')}: check Cs (a unit prefix?) and the budget"
            )
    probe_v = sequence.bench.limits.probe_max_voltage_v
    if probe_v is None and not sequence.bench.simulated:
        rating = format_si(sequence.dut.switch_rating_v, "V")
        warnings.append(
            "no probe rating given (bench.limits.probe_max_voltage): labseq cannot check the "
            f"probe against the switch rating {rating}, which the node can reach"
        )
    for node in sequence.nodes:
        top_v, bottom_v = screen_range_v(node)
        expected_v = node.derated_rating_v
        reach_v = top_v if node.polarity > 0 else -bottom_v
        reach = format_si(node.polarity * reach_v, "V")
        if reach_v < expected_v:
            warnings.append(
                f"node {node.name}: the scope screen reaches {reach} "
                f"but the peak may reach the derated rating {format_si(expected_v, 'V')}: a peak "
                "near the limit would clip and read only as a bound (≥); raise the volts per "
                "division or move the offset"
            )
        elif reach_v > 4 * node.rating_v:
            warnings.append(
                f"node {node.name}: the scope screen reaches {reach}, over four times the "
                f"rating {format_si(node.rating_v, 'V')}: the peak would use "
                "little of the vertical resolution; lower the volts per division"
            )
    return warnings


def screen_range_v(node: NodeSpec) -> tuple[float, float]:
    """(top, bottom) of the node's scope screen in volts: the offset ± half the divisions."""
    half_v = SCREEN_DIVISIONS / 2 * node.volts_per_div_v
    return node.offset_v + half_v, node.offset_v - half_v
