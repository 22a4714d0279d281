"""``labseq resume RUN``: finish an interrupted run with the points it still lacks."""

from __future__ import annotations

from pathlib import Path

import click

from labseq.commands._options import trace_option, tracing
from labseq.commands._store import db_option, resolve_run
from labseq.commands.run import report_outcome
from labseq.progress import Progress
from labseq.runner import (
    TAKE_OVER_RISK,
    bench_locks,
    claim_for_resume,
    execute,
    stored_sequence,
)
from labseq.store import Store


@click.command("resume")
@click.argument("run", metavar="RUN")
@db_option()
@click.option("--quiet", is_flag=True, help="No progress display; errors still go to stderr.")
@click.option(
    "--take-over",
    is_flag=True,
    help="Resume a run still recorded as running (its process on another host, or known "
    f"gone). Risk: {TAKE_OVER_RISK}.",
)
@trace_option
def command(run: str, db_path: Path, quiet: bool, take_over: bool, trace_path: Path | None) -> None:
    """Continue RUN (an id, or 'latest') where it stopped — even after the runner was killed.

    The bench is first made safe, then only the points not yet done are measured; captures
    already stored are kept and never taken again. The run's own stored sequence is used.
    """
    progress = Progress(quiet=quiet)
    with Store(db_path, create=False) as store:
        run_id = resolve_run(store, run)
        sequence = stored_sequence(store, run_id)
        with bench_locks(sequence, store), tracing(trace_path):
            claim_for_resume(store, run_id, take_over=take_over)
            store.log_event(run_id, "info", "run resumed")
            outcome = execute(sequence, store, run_id, progress=progress)
    report_outcome(outcome, db_path, progress)
