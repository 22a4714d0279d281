"""``labseq check SEQUENCE``: validate a sequence file and say what a run of it would do: its
points, the limits that will judge them, how long it should take, and what looks implausible.
Nothing is opened."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import click

from labseq.bench_kinds import bench_kind
from labseq.preflight import (
    duration_text,
    estimate_duration,
    judging_limits,
    loss_method_warnings,
    plausibility_warnings,
    snubber_loss_estimates,
)
from labseq.review import point_object
from labseq.sequence import Sequence, load_sequence
from labseq.units import format_si
from labseq.visa_library import allow_option, sequence_visa_library


def check_summary(sequence: Sequence) -> dict[str, Any]:
    """What `check` found, as plain data for JSON (SI numbers)."""
    grid = sequence.grid
    return {
        "file": str(sequence.path),
        "ok": True,
        "name": sequence.name,
        "sha256": sequence.sha256,
        "bench": bench_kind(sequence.bench.kind).describe(sequence.bench),
        "simulated": sequence.bench.simulated,
        "dut": sequence.dut.label,
        "line_is_ac": grid.line_is_ac,
        "line_frequency_hz": grid.line_frequency_hz if grid.line_is_ac else None,
        "snubber": sequence.snubber.label,
        "nodes": [node.name for node in sequence.nodes],
        "captures_per_point": grid.captures_per_point,
        "settle_s": grid.settle_s,
        "limits": [limit.as_dict() for limit in judging_limits(sequence)],
        "estimate": estimate_duration(sequence).as_dict(),
        "snubber_loss_estimates": [
            {"node": node.name, "cv2f_w": loss_w, "budget_w": budget_w}
            for node, loss_w, budget_w in snubber_loss_estimates(sequence)
        ],
        "warnings": loss_method_warnings(sequence) + plausibility_warnings(sequence),
        "points": [
            point_object(index, point.line_v, grid.line_is_ac, point.load_a)
            for index, point in enumerate(sequence.points())
        ],
    }


@click.command("check")
@click.argument("sequence_file", metavar="SEQUENCE", type=click.Path(path_type=Path))
@allow_option()
@click.option("--json", "as_json", is_flag=True, help="Print one JSON object for scripts.")
def command(sequence_file: Path, allowed_libraries: tuple[Path, ...], as_json: bool) -> None:
    """Validate SEQUENCE (a sequence file) and print the points a run would walk, the limits
    that will judge them, an estimate of the run's length, any plausibility warnings, and the
    VISA library a run would load (one outside the usual places is refused without
    --allow-visa-library)."""
    sequence = load_sequence(sequence_file)
    library = sequence_visa_library(sequence, allowed_libraries)
    if as_json:
        summary = {**check_summary(sequence), "visa_library": library}
        click.echo(json.dumps(summary, indent=2, ensure_ascii=False))
        return
    grid, dut, snubber = sequence.grid, sequence.dut, sequence.snubber
    kind = "AC rms" if grid.line_is_ac else "DC"
    bench = bench_kind(sequence.bench.kind).describe(sequence.bench)
    click.echo(f"{sequence_file}: ok — {sequence.name} (sha256 {sequence.sha256[:12]})")
    click.echo(f"  bench:   {bench}")
    click.echo(f"  VISA library: {library}")
    click.echo(f"  DUT:     {dut.label}, switch {format_si(dut.switch_rating_v, 'V')}")
    click.echo(f"  snubber: {snubber.label}")
    if sequence.clamp is not None:
        click.echo(f"  clamp:   {sequence.clamp.label}")
    for node in sequence.nodes[1:]:
        edge = "rising" if node.polarity > 0 else "falling"
        click.echo(
            f"  node:    {node.name} on channel {node.channel} ({edge}), rating "
            f"{format_si(node.rating_v, 'V')} × {node.derating:g}"
        )
    settle = format_si(grid.settle_s, "s")
    click.echo(
        f"  grid:    {len(grid.line_values_v)} line × {len(grid.load_values_a)} load values, "
        f"{grid.captures_per_point} captures per point, settle {settle}"
    )
    click.echo("  limits that will judge each point:")
    several = len(sequence.nodes) > 1
    for limit in judging_limits(sequence):
        click.echo(f"    {(limit.node + ': ') if several else ''}{limit.what} {limit.text}")
    for node, loss_w, budget_w in snubber_loss_estimates(sequence):
        click.echo(
            f"  snubber loss estimate ({node.name}): Cs·V²·fsw ≈ {format_si(loss_w, 'W')} at the "
            f"highest input voltage (more with the reflected voltage), budget "
            f"{format_si(budget_w, 'W')}"
        )
    estimate = estimate_duration(sequence)
    click.echo(
        f"  estimated run time: about {duration_text(estimate.typical_s)} "
        f"(at most {duration_text(estimate.longest_s)})"
    )
    click.echo(f"    how: {estimate.how}")
    for warning in loss_method_warnings(sequence) + plausibility_warnings(sequence):
        click.echo(f"  warning: {warning}")
    points = sequence.points()
    click.echo(f"  {len(points)} points:")
    for index, point in enumerate(points, start=1):
        line = f"{format_si(point.line_v, 'V')} {kind}"
        if grid.line_is_ac:
            line += f" {format_si(grid.line_frequency_hz, 'Hz')}"
        click.echo(f"  {index:4d}  {line:>18}  {format_si(point.load_a, 'A'):>9}")
