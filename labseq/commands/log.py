"""``labseq log RUN``: the event log of a stored run, as lines or JSON."""

from __future__ import annotations

import json
from pathlib import Path

import click

from labseq.commands._store import db_option, read_store, resolve_run
from labseq.store import EVENT_KINDS


@click.command("log")
@click.argument("run", metavar="RUN")
@db_option(lab=True)
@click.option(
    "--kind",
    "kinds",
    multiple=True,
    type=click.Choice(EVENT_KINDS),
    help="Only events of this kind (repeatable).",
)
@click.option("--json", "as_json", is_flag=True, help="Print one JSON array (SI numbers).")
def command(run: str, db_path: Path, kinds: tuple[str, ...], as_json: bool) -> None:
    """Print the event log of run RUN (an id, or 'latest'): the bench made safe, the source
    switched on, instrument errors and retries, skipped points, each point's time, signals
    and how the run ended — in the order they happened, times in UTC."""
    from labseq.runlog import entry_line, run_log

    with read_store(db_path) as store:
        run_id = resolve_run(store, run)
        entries = run_log(store, run_id, kinds=kinds)
    if as_json:
        click.echo(json.dumps([entry.as_dict() for entry in entries], indent=2))
        return
    click.echo(f"run {run_id}: {len(entries)} event(s), times in UTC")
    for entry in entries:
        click.echo(entry_line(entry))
