"""``labseq export RUN``: a run's points as CSV and its captures as NPZ or CSV files (the layout
is :mod:`labseq.export`'s)."""

from __future__ import annotations

import json
from pathlib import Path

import click

from labseq.commands._store import db_option, default_folder, read_store, resolve_run
from labseq.errors import InputError
from labseq.export import CAPTURE_FORMATS, export_run
from labseq.review import run_object


@click.command("export")
@click.argument("run", metavar="RUN")
@db_option(lab=True)
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
    with read_store(db_path) as store:
        run_id = resolve_run(store, run)
        directory = out_dir or Path(default_folder("export", run_id))
        if directory.exists() and not directory.is_dir():
            raise InputError(
                f"--out {directory}: is a file, not a directory; give a directory to write the "
                "export into (it is made if missing; files of an earlier export are replaced)"
            )
        try:
            written = export_run(store, run_id, directory, captures=captures_format)
        except OSError as exc:
            raise InputError(
                f"--out {directory}: cannot write the export there: {exc.strerror or exc}"
                + (f" ({exc.filename})" if exc.filename else "")
            ) from None
        record = store.run(run_id)
    if as_json:
        click.echo(json.dumps({"run": run_object(record), **written.as_dict()}, indent=2))
        return
    click.echo(
        f"run {run_id}: {written.points} points and {written.captures} captures written to "
        f"{written.directory}"
    )
