"""``labseq resume RUN``: make the bench safe, then finish a run with what it still lacks."""

from __future__ import annotations

from pathlib import Path

import click

from labseq.commands._gates import run_verdict, strict_option
from labseq.commands._options import trace_option, tracing
from labseq.commands._store import db_option, resolve_run
from labseq.commands.run import (
    confirm_hazard,
    json_option,
    outcome_object,
    report_outcome,
    yes_option,
)
from labseq.pipeline import stored_sequence
from labseq.progress import Progress
from labseq.runner import TAKE_OVER_RISK, bench_locks, check_resumable, execute
from labseq.safety import SignalLatch
from labseq.store import Store
from labseq.visa_library import allow_option, sequence_visa_library


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
@yes_option()
@allow_option()
@strict_option
@json_option()
def command(
    run: str,
    db_path: Path,
    quiet: bool,
    take_over: bool,
    trace_path: Path | None,
    yes: bool,
    allowed_libraries: tuple[Path, ...],
    strict: bool,
    as_json: bool,
) -> None:
    """Continue RUN (an id, or 'latest') where it stopped — even after the runner was killed.

    Whatever state the run is in, the bench is first made safe (load and source off, read back).
    Then only what is missing is done: the points not yet measured (captures already stored are
    kept and never taken again), the figures and verdicts of stored captures, and the shutdown
    with its bus watch. The run's own stored sequence is used. Exit status as for `labseq run`.
    """
    progress = Progress(quiet=quiet)
    latch = SignalLatch().install()
    with Store(db_path, create=False) as store:
        run_id = resolve_run(store, run)
        sequence = stored_sequence(store.run(run_id), store.path)
        sequence_visa_library(
            sequence, allowed_libraries, f"{db_path}: run {run_id}'s bench.visa_library"
        )
        with bench_locks(sequence, store), tracing(trace_path):
            before = check_resumable(store, run_id, take_over=take_over)
            pending = before.points_done < before.points_total
            start_note = confirm_hazard(sequence, yes=yes, progress=progress) if pending else None
            store.claim_run(run_id)
            store.log_event(run_id, "info", f"run resumed (it was {before.status})")
            if start_note:
                store.log_event(run_id, "safety", start_note)
            outcome = execute(sequence, store, run_id, progress=progress, latch=latch)
        verdict = run_verdict(store, run_id) if strict else None
        found = outcome_object(outcome, store, db_path) if as_json else None
        report_outcome(outcome, db_path, progress, latch, verdict, found)
