"""``labseq report RUN``: a run's review as a self-contained HTML folder, or as JSON."""

from __future__ import annotations

import json
from pathlib import Path

import click

from labseq.commands._store import db_option, read_store, resolve_run
from labseq.errors import InputError
from labseq.review import review_run, run_summary


@click.command("report")
@click.argument("run", metavar="RUN")
@db_option(lab=True)
@click.option(
    "--out",
    "out_dir",
    type=click.Path(path_type=Path, file_okay=False),
    default=None,
    help="Folder to write into [default: report-run<ID>].",
)
@click.option(
    "--format",
    "output_format",
    type=click.Choice(["html", "json"]),
    default="html",
    show_default=True,
    help="html: write the report folder; json: print the summary for scripts.",
)
def command(run: str, db_path: Path, out_dir: Path | None, output_format: str) -> None:
    """Review run RUN (an id, or 'latest'): verdict, limits, grid, heat maps, worst points.

    The folder holds report.html (images embedded; opens offline), the PNGs and points.csv.
    """
    from labseq.report import build_run_report

    with read_store(db_path) as store:
        run_id = resolve_run(store, run)
        review = review_run(store, run_id)
        if output_format == "json":
            click.echo(json.dumps(run_summary(review), indent=2, ensure_ascii=False))
            return
        out_dir = out_dir or Path(f"report-run{run_id}")
        try:
            files = build_run_report(store, review, out_dir)
        except OSError as exc:
            raise InputError(f"--out {out_dir}: cannot write the report: {exc}") from None
    click.echo(
        f"run {run_id}: {review.verdict} ({len(review.points)} points); report written to "
        f"{files.html}"
    )
