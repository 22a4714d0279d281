"""``labseq export RUN``: a run's points as CSV and its captures as NPZ or CSV files (the layout
is :mod:`labseq.export`'s)."""

from __future__ import annotations

import json
from pathlib import Path

import click

from labseq.commands._store import db_option, default_folder, resolve_run
from labseq.export import CAPTURE_FORMATS, export_run
from labseq.review import run_object
from labseq.store import Store


@click.command("export")
@click.argument("run", metavar="RUN")
@db_option()
@click.option(
    "--out",
    "out_dir",
    type=click.Path(path_type=Path),
    default=None,
    help="Folder to write into [default: export-run<ID>].",
)
@click.option(
    "--captures",
    "captures_format",
    type=click.Choice(CAPTURE_FORMATS),
    default="npz",
    show_default=True,
    help="One .npz with all captures, or one CSV per capture.",
)
@click.option("--json", "as_json", is_flag=True, help="Print one JSON object for scripts.")
def command(
    run: str, db_path: Path, out_dir: Path | None, captures_format: str, as_json: bool
) -> None:
    """Export run RUN (an id, or 'latest'): points.csv plus the captures (as NPZ or CSV).

    points.csv writes booleans as true/false and an absent value as an empty cell."""
    with Store(db_path, create=False) as store:
        run_id = resolve_run(store, run)
        written = export_run(
            store,
            run_id,
            out_dir or Path(default_folder("export", run_id)),
            captures=captures_format,
        )
        record = store.run(run_id)
    if as_json:
        click.echo(json.dumps({"run": run_object(record), **written.as_dict()}, indent=2))
        return
    click.echo(
        f"run {run_id}: {written.points} points and {written.captures} captures written to "
        f"{written.directory}"
    )
