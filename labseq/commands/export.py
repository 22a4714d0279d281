"""``labseq export RUN``: a run's points as CSV and its captures as NPZ or CSV files (the layout
is :mod:`labseq.export`'s)."""

from __future__ import annotations

from pathlib import Path

import click

from labseq.commands._store import db_option, read_store, resolve_run
from labseq.export import CAPTURE_FORMATS, export_run


@click.command("export")
@click.argument("run", metavar="RUN")
@db_option(lab=True)
@click.option(
    "--out",
    "out_dir",
    type=click.Path(path_type=Path),
    default=None,
    help="Directory to write into [default: run-<RUN>].",
)
@click.option(
    "--captures",
    "captures_format",
    type=click.Choice(CAPTURE_FORMATS),
    default="npz",
    show_default=True,
    help="One .npz with all captures, or one CSV per capture.",
)
def command(run: str, db_path: Path, out_dir: Path | None, captures_format: str) -> None:
    """Export run RUN (an id, or 'latest'): points.csv plus the captures (as NPZ or CSV)."""
    with read_store(db_path) as store:
        run_id = resolve_run(store, run)
        written = export_run(
            store, run_id, out_dir or Path(f"run-{run_id}"), captures=captures_format
        )
    click.echo(
        f"run {run_id}: {written.points} points and {written.captures} captures written to "
        f"{written.directory}"
    )
