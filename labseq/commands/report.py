"""``labseq report RUN``: a run's review as a self-contained HTML folder, or as JSON."""

from __future__ import annotations

import json
import sys
from pathlib import Path

import click

from labseq.commands._gates import junit_option, strict_failure, strict_option, write_junit
from labseq.commands._store import db_option, default_folder, read_store, resolve_run
from labseq.errors import EXIT_JUDGED, InputError
from labseq.review import RunReview, review_run, run_summary
from labseq.runlog import point_problems, run_log
from labseq.store_api import RunStore


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
@junit_option
@strict_option
def command(
    run: str,
    db_path: Path,
    out_dir: Path | None,
    output_format: str,
    junit_path: Path | None,
    strict: bool,
) -> None:
    """Review run RUN (an id, or 'latest'): verdict, limits, grid, heat maps, worst points.

    The folder holds report.html (images embedded; opens offline), the PNGs and points.csv.
    """
    with read_store(db_path) as store:
        run_id = resolve_run(store, run)
        review = review_run(store, run_id)
        if junit_path is not None:
            from labseq.junit import run_junit

            write_junit(run_junit(review), junit_path)
        if output_format == "json":
            problems = point_problems(run_log(store, run_id))
            click.echo(json.dumps(run_summary(review, problems), indent=2, ensure_ascii=False))
        else:
            _write_html(store, review, out_dir or Path(default_folder("report", run_id)))
    if strict and strict_failure(run_id, review.verdict):
        sys.exit(EXIT_JUDGED)


def _write_html(store: RunStore, review: RunReview, out_dir: Path) -> None:
    """Write the report folder and say where it is."""
    from labseq.report import build_run_report

    try:
        files = build_run_report(store, review, out_dir)
    except OSError as exc:
        raise InputError(f"--out {out_dir}: cannot write the report: {exc}") from None
    click.echo(
        f"run {review.run.id}: {review.verdict} ({len(review.points)} points); report written to "
        f"{files.html}"
    )
