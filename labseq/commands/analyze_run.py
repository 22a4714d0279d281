"""``labseq analyze-run RUN``: re-analyse a stored run and judge it again, without the bench."""

from __future__ import annotations

import json
import math
import sys
from collections import Counter
from pathlib import Path

import click

from labseq.commands._gates import run_verdict, strict_failure, strict_option
from labseq.commands._options import option_quantity
from labseq.commands._store import db_option, resolve_run
from labseq.errors import EXIT_JUDGED, InputError
from labseq.locks import store_lock
from labseq.pipeline import analyse_run, stored_sequence
from labseq.review import run_object
from labseq.runlog import JUDGEMENT_KEY, judged_limits
from labseq.sequence import Sequence, load_sequence
from labseq.store import Store
from labseq.units import format_si


@click.command("analyze-run")
@click.argument("run", metavar="RUN")
@db_option()
@click.option(
    "--sequence",
    "sequence_path",
    type=click.Path(path_type=Path),
    help="Judge against this sequence file's limits instead of those the run was made with.",
)
@click.option(
    "--allow-other-grid",
    is_flag=True,
    help="With --sequence: judge the run even though that file's line × load grid is not the "
    "run's (the run's own points are judged; the report says the grids differ).",
)
@click.option(
    "--wait",
    "wait_text",
    default="60 s",
    show_default=True,
    metavar="DURATION",
    help="How long to wait for the store while another labseq process writes it (0: do not).",
)
@strict_option
@click.option("--json", "as_json", is_flag=True, help="Print one JSON object for scripts.")
def command(
    run: str,
    db_path: Path,
    sequence_path: Path | None,
    allow_other_grid: bool,
    wait_text: str,
    strict: bool,
    as_json: bool,
) -> None:
    """Analyse every stored capture of RUN again from its raw codes and re-judge its points.

    Use it after changing limits (give the new file with --sequence) or after an analysis
    update; nothing is re-captured. The judging is recorded in the run's log (which file, its
    sha256 and limits, when) and the run report shows it. A --sequence whose grid is not the
    run's is refused unless --allow-other-grid. The store is locked meanwhile, as a run locks
    it: while a run is writing it, this waits (see --wait) rather than fail half-way.
    """
    wait_s = option_quantity(wait_text, "s", "--wait")
    sequence = load_sequence(sequence_path) if sequence_path else None
    with Store(db_path, create=False) as store, store_lock(db_path, wait_s=wait_s or 0.0):
        run_id = resolve_run(store, run)
        same_grid = True
        if sequence is None:
            sequence = stored_sequence(store.run(run_id), store.path)
        else:
            same_grid = _check_grid(store, run_id, sequence, allow_other=allow_other_grid)
        count = analyse_run(store, sequence, run_id, only_missing=False)
        verdicts = Counter(p.verdict or "not judged" for p in store.points(run_id))
        summary = ", ".join(f"{n} {v}" for v, n in sorted(verdicts.items()))
        _record_judgement(
            store,
            run_id,
            sequence,
            source="stored" if sequence_path is None else "file",
            same_grid=same_grid,
            summary=f"re-analysed {count} captures; points: {summary}",
        )
        verdict = run_verdict(store, run_id)
        record = store.run(run_id)
    if as_json:
        click.echo(
            json.dumps(
                {
                    "run": run_object(record),
                    "captures_analysed": count,
                    "points": dict(verdicts),
                    "sequence_path": None if sequence_path is None else str(sequence_path),
                    "same_grid": same_grid,
                },
                indent=2,
            )
        )
    else:
        against = f" against {sequence_path}" if sequence_path else ""
        click.echo(f"run {run_id}: re-analysed {count} captures{against}; points: {summary}")
        if not same_grid:
            click.echo(f"note: {sequence_path}'s grid is not the run's (--allow-other-grid)")
    if strict and strict_failure(run_id, verdict):
        sys.exit(EXIT_JUDGED)


def _grid_text(points: list[tuple[float, float]]) -> str:
    """A grid in a few words: its size, line values and load values (the first eight)."""
    lines = sorted({line for line, _ in points})
    loads = sorted({load for _, load in points})

    def few(values: list[float], unit: str) -> str:
        shown = ", ".join(format_si(value, unit) for value in values[:8])
        return shown + (" …" if len(values) > 8 else "")

    return f"{len(points)} points, line {few(lines, 'V')}; load {few(loads, 'A')}"


def _check_grid(store: Store, run_id: int, sequence: Sequence, *, allow_other: bool) -> bool:
    """Whether ``sequence``'s line × load grid (and line kind) is the run's; refused with
    :class:`InputError` when it is not, unless ``allow_other``."""
    stored = store.points(run_id)
    run_points = sorted((p.line_v, p.load_a) for p in stored)
    file_points = sorted((p.line_v, p.load_a) for p in sequence.points())
    same_kind = all(p.line_is_ac == sequence.grid.line_is_ac for p in stored)
    same = (
        same_kind
        and len(run_points) == len(file_points)
        and all(
            math.isclose(a, c, rel_tol=1e-9) and math.isclose(b, d, rel_tol=1e-9)
            for (a, b), (c, d) in zip(run_points, file_points, strict=True)
        )
    )
    if same or allow_other:
        return same
    kinds = "" if same_kind else " (and one is AC, the other DC)"
    raise InputError(
        f"{sequence.path}: its grid ({_grid_text(file_points)}) is not run {run_id}'s "
        f"({_grid_text(run_points)}){kinds}; judging the run against it would mix two tests. "
        "Give --allow-other-grid to judge the run's own points against this file's limits anyway"
    )


def _record_judgement(
    store: Store,
    run_id: int,
    sequence: Sequence,
    *,
    source: str,
    same_grid: bool,
    summary: str,
) -> None:
    """Record in the run's log that its captures were judged again against ``sequence``
    (``source``: "stored" or "file"), with that sequence's file, hash and limits."""
    where = "its own stored sequence" if source == "stored" else f"{sequence.path}"
    store.log_event(
        run_id,
        "info",
        f"re-judged against {where} (sha256 {sequence.sha256[:12]}): {summary}",
        data={
            JUDGEMENT_KEY: {
                "source": source,
                "sequence_path": str(Path(sequence.path).resolve()),
                "sequence_sha256": sequence.sha256,
                "same_grid": same_grid,
                "limits": judged_limits(sequence),
            }
        },
    )
