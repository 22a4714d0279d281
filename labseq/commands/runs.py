"""``labseq runs``: list the runs in a store."""

from __future__ import annotations

import json
from pathlib import Path

import click

from labseq.commands._store import db_option
from labseq.review import run_object
from labseq.store import Store


@click.command("runs")
@db_option()
@click.option("--json", "as_json", is_flag=True, help="Print one JSON array instead of a table.")
def command(db_path: Path, as_json: bool) -> None:
    """List the runs in the store: id, start, status, DUT and snubber, points done/total.

    A run whose end could not be confirmed safe (status unsafe-end) is named first, above the
    table, with what its shutdown found."""
    with Store(db_path, create=False) as store:
        runs = store.runs()
        unsafe = {
            run.id: store.last_safety_check(run.id) for run in runs if run.status == "unsafe-end"
        }
    if as_json:
        rows = [run_object(run, unsafe.get(run.id)) for run in runs]
        click.echo(json.dumps(rows, indent=2))
        return
    if not runs:
        click.echo(f"{db_path}: no runs yet")
        return
    for run_id, found in unsafe.items():
        click.echo(
            f"!! run {run_id}: {found or 'bench NOT confirmed safe at its end'}. "
            f"`labseq resume {run_id}` makes it safe first."
        )
    click.echo(f"{'id':>4}  {'started (UTC)':19}  {'status':11}  {'points':>9}  DUT / snubber")
    for run in runs:
        points = f"{run.points_done}/{run.points_total}"
        click.echo(
            f"{run.id:>4}  {run.started_at[:19].replace('T', ' '):19}  {run.status:11}  "
            f"{points:>9}  {run.dut_label} / {run.snubber_label}"
        )
