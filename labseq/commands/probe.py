"""``labseq probe SEQUENCE``: exercise every mapped command of a bench, nothing switched on."""

from __future__ import annotations

import sys
from pathlib import Path

import click

from labseq.bench import ROLES, lock_names
from labseq.commands._options import trace_option, tracing
from labseq.errors import EXIT_FAILURE
from labseq.locks import instrument_locks
from labseq.probe import FAILED, probe_bench
from labseq.sequence import load_sequence
from labseq.visa_library import allow_option, sequence_visa_library

CAUTION = (
    "probe: each instrument is reset (*RST) and set up as the sequence says; the source's "
    "output and the load's input are only ever set OFF, no setpoint above zero is sent to "
    "them, and every value stays inside the sequence's limits. Check the bench is safe to "
    "reset before you probe it."
)


@click.command("probe")
@click.argument("sequence_path", metavar="SEQUENCE", type=click.Path(path_type=Path))
@click.option(
    "--role",
    "roles",
    type=click.Choice(ROLES),
    multiple=True,
    help="Probe only this role (repeat for several); default: all four.",
)
@trace_option
@allow_option()
def command(
    sequence_path: Path,
    roles: tuple[str, ...],
    trace_path: Path | None,
    allowed_libraries: tuple[Path, ...],
) -> None:
    """Connect to each instrument of SEQUENCE, identify it, and try every command of its map.

    Settings are read back, set to a harmless value and read back again; queries are asked; on
    the scope one acquisition is triggered at once (where its map can) and one waveform
    fetched. One line per command says what was sent, what came back and whether it worked:
    the first thing to run with a new instrument or a new map (see DEVELOPERS.md). Exits 3 if
    any command failed.
    """
    sequence = load_sequence(sequence_path)
    sequence_visa_library(sequence, allowed_libraries)
    roles = roles or ROLES
    click.echo(CAUTION, err=True)
    with instrument_locks(lock_names(sequence)), tracing(trace_path):
        lines = probe_bench(sequence, roles)
    width = max(len(line.key) for line in lines)
    for role in roles:
        click.echo(f"{role} ({sequence.bench.maps[role]} map):")
        for line in (line for line in lines if line.role == role):
            click.echo(f"  {line.outcome:<10} {line.key:<{width}}  {line.sent}")
            if line.detail:
                click.echo(f"  {'':<10} {'':<{width}}  -> {line.detail}")
    failed = [line for line in lines if line.outcome == FAILED]
    counts = {outcome: sum(line.outcome == outcome for line in lines) for outcome in _OUTCOMES}
    click.echo(", ".join(f"{count} {outcome}" for outcome, count in counts.items()))
    if failed:
        sys.exit(EXIT_FAILURE)  # an instrument failed a command: not a judgement


_OUTCOMES = ("ok", "failed", "not mapped", "skipped")
