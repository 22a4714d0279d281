"""``labseq run SEQUENCE``: sweep a sequence's line × load grid and store every capture."""

from __future__ import annotations

import sys
from pathlib import Path

import click

from labseq.commands._options import trace_option, tracing
from labseq.commands._store import db_option
from labseq.progress import Progress
from labseq.runner import RunOutcome, bench_locks, execute, start_run
from labseq.sequence import load_sequence
from labseq.store import Store


def report_outcome(outcome: RunOutcome, db_path: Path, progress: Progress) -> None:
    """Say how the run ended and where its results are; exit with the run's status."""
    done = f"{outcome.points_done}/{outcome.points_total} points"
    click.echo(f"run {outcome.run_id} {outcome.status}: {done} in {db_path}")
    if outcome.status in ("interrupted", "aborted", "failed") or (
        outcome.points_done < outcome.points_total
    ):
        progress.message(f"finish it with: labseq resume {outcome.run_id} --db {db_path}")
    sys.exit(outcome.exit_code)


@click.command("run")
@click.argument("sequence_path", metavar="SEQUENCE", type=click.Path(path_type=Path))
@db_option()
@click.option("--label", default="", help="A note kept with the run (e.g. what changed).")
@click.option("--quiet", is_flag=True, help="No progress display; errors still go to stderr.")
@click.option(
    "--sim-faults",
    default="",
    metavar="SPEC",
    help="Simulated bench only: inject faults, e.g. 'scope:no-trigger@point=3' (see labseq sim).",
)
@trace_option
def command(
    sequence_path: Path,
    db_path: Path,
    label: str,
    quiet: bool,
    sim_faults: str,
    trace_path: Path | None,
) -> None:
    """Sweep SEQUENCE's grid on its bench (real or simulated) and store the run.

    The sequence file is validated completely before any instrument is opened. Every exit —
    finished, a point error with abort, Ctrl-C, SIGTERM or an error — leaves load and source off.
    """
    sequence = load_sequence(sequence_path)
    progress = Progress(quiet=quiet)
    with Store(db_path) as store, bench_locks(sequence, store), tracing(trace_path):
        run_id = start_run(sequence, store, label=label)
        progress.message(f"run {run_id}: {sequence.name} — {len(sequence.points())} points")
        outcome = execute(sequence, store, run_id, progress=progress, sim_faults=sim_faults)
    report_outcome(outcome, db_path, progress)
