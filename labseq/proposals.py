"""Snubber proposals for every point of a stored run, and one part set for all of them.

Each measured point gives its own L and Cpar from its mean ring frequency and damping ratio,
measured with the run's own damper fitted (:func:`labseq.analysis.design.loaded_ring_network`),
and a proposal from them (:func:`labseq.analysis.propose_snubber`); one part set for every point
is checked at the point with the largest step. The figures are the primary node's, read by the
name the run's sequence gives it. ``labseq design --run`` prints what this returns.
"""

from __future__ import annotations

from dataclasses import dataclass

from labseq.analysis import DesignInputError, SnubberProposal, propose_snubber
from labseq.analysis.design import PartSet, propose_part_set
from labseq.errors import InputError
from labseq.pipeline import stored_sequence
from labseq.sequence import Snubber
from labseq.store import PointRecord
from labseq.store_api import RunStore
from labseq.units import format_si


@dataclass(frozen=True)
class PointProposal:
    """The proposal at one point, with what it was made from."""

    point: PointRecord
    peak_v: float | None  # the worst peak over the point's captures
    step_v: float  # plateau − base, the step the damper's capacitor is charged through
    clipped: bool  # a capture reached full scale: the peak is a lower bound
    measured_damping_ratio: float
    proposal: SnubberProposal


@dataclass(frozen=True)
class RunProposals:
    """Every point's proposal, worst peak first, and one part set for all of them."""

    run_id: int
    snubber: Snubber  # the damper fitted during the run
    fsw_hz: float
    loss_budget_w: float | None
    points: list[PointProposal]
    part_set: PartSet


def _clipped_points(store: RunStore, points: list[PointRecord], node: str) -> set[int]:
    """Ids of the points where any capture of ``node`` reached the scope's full scale."""
    clipped = set()
    for point in points:
        for capture in store.captures(point.id, with_codes=False, node=node):
            figures = store.capture_figures(capture.id)
            if figures and figures.get("clipped"):
                clipped.add(point.id)
                break
    return clipped


def propose_for_run(
    store: RunStore, run_id: int, *, loss_budget_w: float | None = None, cs_f: float | None = None
) -> RunProposals:
    """Propose Rs and Cs at every done point of run ``run_id`` that has a fitted ring, worst
    peak first, and one part set for all of them. With neither ``cs_f`` nor ``loss_budget_w``
    the fitted resistor's power budget caps Cs.

    :class:`labseq.errors.InputError` when no point has a fitted ring;
    :class:`labseq.analysis.DesignInputError` naming the point when its figures cannot be
    designed from."""
    sequence = stored_sequence(store.run(run_id), store.location)
    node = sequence.primary.name
    points = store.points(run_id, status="done")
    figures = store.point_figures(run_id, node=node)
    clipped = _clipped_points(store, points, node)
    snubber = sequence.snubber
    fsw_hz = sequence.dut.switching_frequency_hz
    budget_w = None if cs_f is not None else loss_budget_w or snubber.resistor_power_budget_w
    found = []
    for point in points:
        point_figures = figures.get(point.id, {})
        ring_hz, zeta, plateau_v, base_v = (
            point_figures.get(name, {}).get("mean")
            for name in ("ring_frequency_hz", "damping_ratio", "plateau_v", "base_v")
        )
        if ring_hz is None or zeta is None or plateau_v is None or base_v is None:
            continue  # no ring fitted at this point: nothing to size from
        try:
            proposal = propose_snubber(
                ring_freq_hz=ring_hz,
                damping_ratio=zeta,
                snubber_r_ohm=snubber.resistance_ohm,
                snubber_c_f=snubber.capacitance_f,
                volts=plateau_v - base_v,
                fsw_hz=fsw_hz,
                loss_budget_w=budget_w,
                cs_f=cs_f,
            )
        except DesignInputError as exc:
            raise DesignInputError(
                f"point {format_si(point.line_v, 'V')} / {format_si(point.load_a, 'A')}: {exc}"
            ) from None
        peak_v = point_figures.get("peak_v", {}).get("worst")
        step_v = plateau_v - base_v
        found.append(PointProposal(point, peak_v, step_v, point.id in clipped, zeta, proposal))
    if not found:
        raise InputError(f"run {run_id}: no point of the run has a fitted ring to design from")
    found.sort(key=lambda row: -(row.peak_v if row.peak_v is not None else float("-inf")))
    part_set = propose_part_set(
        [(row.proposal.l_leak_h, row.proposal.c_par_f, row.step_v) for row in found],
        fsw_hz,
        loss_budget_w=budget_w,
        cs_f=cs_f,
    )
    return RunProposals(run_id, snubber, fsw_hz, budget_w, found, part_set)
