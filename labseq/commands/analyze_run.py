"""``labseq analyze-run RUN``: re-analyse a stored run and judge it again, without the bench."""

from __future__ import annotations

import json
from collections import Counter
from pathlib import Path

import click

from labseq.commands._options import option_quantity
from labseq.commands._store import db_option, resolve_run
from labseq.locks import store_lock
from labseq.pipeline import analyse_run, stored_sequence
from labseq.review import run_object
from labseq.sequence import load_sequence
from labseq.store import Store


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
    "--wait",
    "wait_text",
    default="60 s",
    show_default=True,
    metavar="DURATION",
    help="How long to wait for the store while another labseq process writes it (0: do not).",
)
@click.option("--json", "as_json", is_flag=True, help="Print one JSON object for scripts.")
def command(
    run: str, db_path: Path, sequence_path: Path | None, wait_text: str, as_json: bool
) -> None:
    """Analyse every stored capture of RUN again from its raw codes and re-judge its points.

    Use it after changing limits (give the new file with --sequence) or after an analysis
    update; nothing is re-captured. The store is locked meanwhile, as a run locks it: while a
    run is writing it, this waits (see --wait) rather than fail half-way.
    """
    wait_s = option_quantity(wait_text, "s", "--wait")
    with Store(db_path, create=False) as store, store_lock(db_path, wait_s=wait_s or 0.0):
        run_id = resolve_run(store, run)
        sequence = (
            load_sequence(sequence_path) if sequence_path else stored_sequence(store.run(run_id))
        )
        count = analyse_run(store, sequence, run_id, only_missing=False)
        verdicts = Counter(p.verdict or "not judged" for p in store.points(run_id))
        store.log_event(run_id, "info", f"re-analysed {count} captures", data=dict(verdicts))
        record = store.run(run_id)
    if as_json:
        click.echo(
            json.dumps(
                {"run": run_object(record), "captures_analysed": count, "points": dict(verdicts)},
                indent=2,
            )
        )
        return
    summary = ", ".join(f"{n} {v}" for v, n in sorted(verdicts.items()))
    click.echo(f"run {run_id}: re-analysed {count} captures; points: {summary}")
