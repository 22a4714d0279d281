"""``labseq check SEQUENCE``: validate a sequence file and list its points; nothing is opened."""

from __future__ import annotations

from pathlib import Path

import click

from labseq.analysis.snubber import SnubberBranch, waveform_method_record_s
from labseq.bench_kinds import bench_kind
from labseq.sequence import Sequence, load_sequence
from labseq.units import format_si
from labseq.visa_library import allow_option, sequence_visa_library

#: Horizontal divisions of a scope screen: the record spans ten times the time per division
#: (common practice, no published source).
SCREEN_DIVISIONS = 10


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


@click.command("check")
@click.argument("sequence_file", metavar="SEQUENCE", type=click.Path(path_type=Path))
@allow_option()
def command(sequence_file: Path, allowed_libraries: tuple[Path, ...]) -> None:
    """Validate SEQUENCE (a sequence file) and print the points a run would walk, and the VISA
    library a run would load (one outside the usual places is refused without
    --allow-visa-library)."""
    sequence = load_sequence(sequence_file)
    library = sequence_visa_library(sequence, allowed_libraries)
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
    click.echo(
        f"  grid:    {len(grid.line_values_v)} line × {len(grid.load_values_a)} load values, "
        f"{grid.captures_per_point} captures per point, settle {format_si(grid.settle_s, 's')}"
    )
    for warning in loss_method_warnings(sequence):
        click.echo(f"  warning: {warning}")
    points = sequence.points()
    click.echo(f"  {len(points)} points:")
    for index, point in enumerate(points, start=1):
        line = f"{format_si(point.line_v, 'V')} {kind}"
        if grid.line_is_ac:
            line += f" {format_si(grid.line_frequency_hz, 'Hz')}"
        click.echo(f"  {index:4d}  {line:>18}  {format_si(point.load_a, 'A'):>9}")
