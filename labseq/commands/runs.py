"""``labseq runs``: list the runs in a store."""

from __future__ import annotations

import json
from pathlib import Path

import click

from instruments.text import printable
from labseq.commands._store import db_option, read_store
from labseq.review import run_object
from labseq.store import shown_status


@click.command("runs")
@db_option()
@click.option("--json", "as_json", is_flag=True, help="Print one JSON array instead of a table.")
def command(db_path: Path, as_json: bool) -> None:
    """List the runs in the store: id, the first 8 hex digits of its UUID, start, status,
    points done/total, DUT and snubber, label (--json: the whole UUID and the bench).

    A run whose end could not be confirmed safe (status unsafe-end) is named first, above the
    table, with what its shutdown found. A run recorded as running whose process has died
    (killed, crashed) is shown as interrupted, and named below the table."""
    with read_store(db_path) as store:
        runs = store.runs()
        unsafe = {
            run.id: store.last_safety_check(run.id) for run in runs if run.status == "unsafe-end"
        }
    statuses = {run.id: shown_status(run) for run in runs}
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
    click.echo(
        f"{'id':>4}  {'uuid':8}  {'started (UTC)':19}  {'status':11}  {'points':>9}  "
        "DUT / snubber  [label]"
    )
    for run in runs:
        points = f"{run.points_done}/{run.points_total}"
        label = f"  [{printable(run.notes)}]" if run.notes else ""
        click.echo(
            f"{run.id:>4}  {run.uuid[:8]}  {run.started_at[:19].replace('T', ' '):19}  "
            f"{statuses[run.id]:11}  {points:>9}  {run.dut_label} / {run.snubber_label}{label}"
        )
    for run in runs:
        if statuses[run.id] != run.status:
            click.echo(
                f"run {run.id}: recorded as running, but its process {run.pid} has ended "
                f"(killed, crashed or its store failed); `labseq resume {run.id}` makes the "
                "bench safe first and finishes it"
            )
