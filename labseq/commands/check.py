"""``labseq check SEQUENCE``: validate a sequence file and list its points; nothing is opened."""

from __future__ import annotations

from pathlib import Path

import click

from labseq.sequence import load_sequence
from labseq.units import format_si


@click.command("check")
@click.argument("sequence_file", metavar="SEQUENCE", type=click.Path(path_type=Path))
def command(sequence_file: Path) -> None:
    """Validate SEQUENCE (a sequence file) and print the points a run would walk."""
    sequence = load_sequence(sequence_file)
    grid, dut, snubber = sequence.grid, sequence.dut, sequence.snubber
    kind = "AC rms" if grid.line_is_ac else "DC"
    bench = (
        f"simulated ({sequence.bench.sim_dut_path.name})"
        if sequence.bench.is_sim
        else "VISA: " + ", ".join(f"{r}={a}" for r, a in sequence.bench.resources.items())
    )
    click.echo(f"{sequence_file}: ok — {sequence.name} (sha256 {sequence.sha256[:12]})")
    click.echo(f"  bench:   {bench}")
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
    points = sequence.points()
    click.echo(f"  {len(points)} points:")
    for index, point in enumerate(points, start=1):
        line = f"{format_si(point.line_v, 'V')} {kind}"
        if grid.line_is_ac:
            line += f" {format_si(grid.line_frequency_hz, 'Hz')}"
        click.echo(f"  {index:4d}  {line:>18}  {format_si(point.load_a, 'A'):>9}")
