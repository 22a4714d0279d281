"""``labseq run SEQUENCE``: sweep a sequence's line × load grid and store every capture."""

from __future__ import annotations

import json
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

import click

from labseq.commands._gates import run_verdict, strict_failure, strict_option
from labseq.commands._options import trace_option, tracing
from labseq.commands._store import db_option
from labseq.errors import EXIT_FAILURE, EXIT_JUDGED, EXIT_OK, InputError
from labseq.progress import Progress
from labseq.review import run_object
from labseq.runner import UNSAFE_END_EXIT, RunOutcome, bench_locks, execute, start_run
from labseq.safety import CAUTIONS, SignalLatch, signal_exit_code
from labseq.sequence import Sequence, load_sequence
from labseq.store import Store
from labseq.visa_library import allow_option, sequence_visa_library


def yes_option() -> Callable[[Any], Any]:
    """``--yes``: start above ES1 without the question at the terminal (recorded in the run)."""
    return click.option(
        "--yes",
        is_flag=True,
        help="Unattended start: switch outputs on above ES1 without asking at the terminal "
        "(the sequence must still acknowledge hazardous voltage; recorded in the run).",
    )


def on_terminal() -> bool:
    """Whether someone at a terminal can answer the question before outputs go on."""
    return sys.stdin.isatty()


def confirm_hazard(sequence: Sequence, *, yes: bool, progress: Progress) -> str | None:
    """Before outputs go on above ES1 on a real bench: show the cautions and the value that
    trips ES1, then wait for a confirmation at the terminal; ``yes`` (an unattended start)
    skips the question. Returns what to record in the run (None: nothing above ES1 is driven).

    Without a terminal and without ``yes`` nothing is opened: an unattended start must say so.
    """
    hazard = None if sequence.bench.simulated else sequence.above_es1()
    if hazard is None:
        return None
    progress.message(f"{CAUTIONS}\n  This run: {hazard.describe()}.", error=True)
    if yes:
        return f"started above ES1 with --yes (unattended start): {hazard.describe()}"
    if not on_terminal():
        raise InputError(
            "this run switches outputs on above ES1 and there is no terminal to confirm it at; "
            "run it from a terminal, or add --yes for an unattended start (recorded in the run)"
        )
    if not click.confirm(
        "Switch the outputs on, above ES1, with the cautions above observed?",
        default=False,
        err=True,
    ):
        raise InputError("not confirmed: nothing was switched on")  # the answer was no
    return f"started above ES1, confirmed at the terminal: {hazard.describe()}"


def json_option() -> Callable[[Any], Any]:
    """``--json``: the outcome as one JSON object on stdout (progress still on stderr)."""
    return click.option(
        "--json", "as_json", is_flag=True, help="Print the outcome as one JSON object."
    )


def outcome_object(outcome: RunOutcome, store: Store, db_path: Path) -> dict[str, Any]:
    """How a run ended, for JSON: the run (as every command gives it) and the outcome."""
    record = store.run(outcome.run_id)
    end_safety = store.last_safety_check(outcome.run_id) if outcome.status == "unsafe-end" else None
    return {
        "run": run_object(record, end_safety),
        "outcome": {
            "status": outcome.status,
            "points_done": outcome.points_done,
            "points_total": outcome.points_total,
            "exit_code": outcome.exit_code,
            "signal": outcome.signal_name,
            "bench_safe": None if outcome.safe is None else outcome.safe.outputs_off,
            "wall_s": outcome.wall_s,
            "timings_s": dict(outcome.timings.seconds),
            "db": str(db_path),
        },
    }


def report_outcome(
    outcome: RunOutcome,
    db_path: Path,
    progress: Progress,
    latch: SignalLatch,
    verdict: str | None = None,
    as_json: dict[str, Any] | None = None,
) -> None:
    """Say how the run ended and where its results are (``as_json``: print that object
    instead of the line); exit with the run's status (or, for a signal that came once the run
    had ended, 128 + its number). ``verdict`` (``--strict``): a run that ended well but did
    not pass exits 1."""
    done = f"{outcome.points_done}/{outcome.points_total} points"
    if as_json is not None:
        click.echo(json.dumps(as_json, indent=2, ensure_ascii=False))
    else:
        click.echo(f"run {outcome.run_id} {outcome.status}: {done} in {db_path}")
    if outcome.status == "unsafe-end":
        progress.message(
            f"the bench is NOT confirmed safe (exit status {UNSAFE_END_EXIT}); once the fault is "
            f"cleared, `labseq resume {outcome.run_id} --db {db_path}` makes the bench safe "
            "first and reads it back",
            error=True,
        )
    elif outcome.status in ("interrupted", "aborted", "failed") or (
        outcome.points_done < outcome.points_total
    ):
        progress.message(f"finish it with: labseq resume {outcome.run_id} --db {db_path}")
    code = outcome.exit_code
    if latch.first is not None and code in (EXIT_OK, EXIT_FAILURE):
        code = signal_exit_code(latch.first)
    if code == EXIT_OK and verdict is not None and strict_failure(outcome.run_id, verdict):
        code = EXIT_JUDGED
    sys.exit(code)


@click.command("run")
@click.argument("sequence_path", metavar="SEQUENCE", type=click.Path(path_type=Path))
@db_option()
@click.option("--label", default="", help="A note kept with the run (e.g. what changed).")
@click.option("--quiet", is_flag=True, help="No progress display; errors still go to stderr.")
@yes_option()
@click.option(
    "--sim-faults",
    default="",
    metavar="SPEC",
    help="Simulated bench only: inject faults, e.g. 'scope:no-trigger@point=3' (see labseq sim).",
)
@trace_option
@allow_option()
@strict_option
@json_option()
def command(
    sequence_path: Path,
    db_path: Path,
    label: str,
    quiet: bool,
    yes: bool,
    sim_faults: str,
    trace_path: Path | None,
    allowed_libraries: tuple[Path, ...],
    strict: bool,
    as_json: bool,
) -> None:
    """Sweep SEQUENCE's grid on its bench (real or simulated) and store the run.

    The sequence file is validated completely before any instrument is opened. On a real bench
    above ES1 the cautions are shown and a confirmation is asked for at the terminal (--yes for
    an unattended start). Every exit — finished, a point error with abort, Ctrl-C, SIGTERM,
    SIGHUP or an error — switches load and source off and reads them back.

    Exit status: 0 every point done; 1 with --strict, the run's verdict is fail or incomplete;
    2 bad input; 3 points missing after a bench or instrument failure, or the bench could not
    be confirmed safe at the end; 128 + the signal number after SIGHUP (129), SIGINT (130) or
    SIGTERM (143).
    """
    sequence = load_sequence(sequence_path)
    sequence_visa_library(sequence, allowed_libraries)
    progress = Progress(quiet=quiet)
    latch = SignalLatch().install()
    with Store(db_path) as store, bench_locks(sequence, store), tracing(trace_path):
        start_note = confirm_hazard(sequence, yes=yes, progress=progress)
        run_id = start_run(sequence, store, label=label)
        if start_note:
            store.log_event(run_id, "safety", start_note)
        progress.message(f"run {run_id}: {sequence.name} — {len(sequence.points())} points")
        outcome = execute(
            sequence, store, run_id, progress=progress, sim_faults=sim_faults, latch=latch
        )
        verdict = run_verdict(store, run_id) if strict else None
        found = outcome_object(outcome, store, db_path) if as_json else None
        report_outcome(outcome, db_path, progress, latch, verdict, found)
