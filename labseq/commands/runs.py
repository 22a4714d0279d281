"""``labseq runs``: list the runs in a store."""

from __future__ import annotations

import json
from pathlib import Path

import click

from labseq.commands._store import db_option, read_store
from labseq.review import run_object
from labseq.run_filter import RunFilter, parse_moment
from labseq.store import shown_status
from labseq_instruments.text import printable


@click.command("runs")
@db_option(lab=True)
@click.option("--json", "as_json", is_flag=True, help="Print one JSON array instead of a table.")
@click.option("--dut", default=None, help="Only runs whose DUT label contains this (any case).")
@click.option("--snubber", default=None, help="Only runs whose snubber label contains this.")
@click.option("--bench", default=None, help="Only runs of a bench: part of its host or identity.")
@click.option("--since", default=None, help="Only runs started on or after: YYYY-MM-DD[THH:MM].")
@click.option("--until", default=None, help="Only runs started before the end of this date.")
def command(
    db_path: Path | str,
    as_json: bool,
    dut: str | None,
    snubber: str | None,
    bench: str | None,
    since: str | None,
    until: str | None,
) -> None:
    """List the runs in the store: id, the first 8 hex digits of its UUID, start, status,
    points done/total, DUT and snubber, label, and the bench's host (--json: the whole UUID and
    the bench). --db postgresql://… lists a lab database's runs from every bench; the filters
    pick runs by DUT, snubber, bench and start date (UTC) in either.

    A run whose end could not be confirmed safe (status unsafe-end) is named first, above the
    table, with what its shutdown found. A run recorded as running whose process has died
    (killed, crashed) is shown as interrupted, and named below the table."""
    chosen = RunFilter(
        dut=dut,
        snubber=snubber,
        bench=bench,
        since=None if since is None else parse_moment(since, "--since"),
        until=None if until is None else parse_moment(until, "--until", end_of_day=True),
    )
    with read_store(db_path) as store:
        location = store.location
        runs = chosen.select(store.runs())
        unsafe = {
            run.id: store.last_safety_check(run.id) for run in runs if run.status == "unsafe-end"
        }
    statuses = {run.id: shown_status(run) for run in runs}
    if as_json:
        rows = [run_object(run, unsafe.get(run.id)) for run in runs]
        click.echo(json.dumps(rows, indent=2))
        return
    if not runs:
        click.echo(f"{location}: {'no runs match' if chosen.active else 'no runs yet'}")
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
            + (f"  @ {run.bench_host}" if run.bench_host else "")
        )
    for run in runs:
        if statuses[run.id] != run.status:
            click.echo(
                f"run {run.id}: recorded as running, but its process {run.pid} has ended "
                f"(killed, crashed or its store failed); `labseq resume {run.id}` makes the "
                "bench safe first and finishes it"
            )
