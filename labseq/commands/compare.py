"""``labseq compare BASELINE CANDIDATE``: did a change make any point worse?

Exit status: 0 when no point got worse beyond its thresholds and no verdict went pass → fail,
1 when one did (the worst such point is named), 2 on bad input (unknown run, missing store),
3 when a store cannot be read (and on any unexpected failure: never 1).
"""

from __future__ import annotations

import contextlib
import json
import sys
from collections import Counter
from pathlib import Path

import click

from labseq.commands._gates import junit_option, write_junit
from labseq.commands._store import StoreLocation, db_option, read_store, resolve_run
from labseq.compare import (
    DEFAULT_COVERAGE,
    DEFAULT_MATCH_TOLERANCE,
    Comparison,
    compare_runs,
    comparison_summary,
)
from labseq.errors import EXIT_JUDGED, InputError
from labseq.figures import FIGURE_DIRECTIONS
from labseq.review import review_run

#: Exit status when the candidate regressed (what a CI job acts on).
EXIT_REGRESSED = EXIT_JUDGED
#: Points printed at most; --json and --report have them all.
MAX_PRINTED_POINTS = 40


@click.command("compare")
@click.argument("baseline", metavar="BASELINE")
@click.argument("candidate", metavar="CANDIDATE")
@db_option("The store holding the baseline (and the candidate, unless --candidate-db).", lab=True)
@click.option(
    "--candidate-db",
    "candidate_db_path",
    type=StoreLocation(lab=True),
    default=None,
    help="The store holding the candidate [default: --db]: a SQLite file or a lab database.",
)
@click.option(
    "--report",
    "report_dir",
    type=click.Path(path_type=Path, file_okay=False),
    default=None,
    help="Also write an HTML report into this folder.",
)
@click.option("--json", "as_json", is_flag=True, help="Print one JSON object for scripts.")
@click.option(
    "--tolerance",
    default=100 * DEFAULT_MATCH_TOLERANCE,
    show_default=True,
    type=float,
    help="Setpoints within this many percent are the same point.",
)
@click.option(
    "--k",
    "coverage",
    default=DEFAULT_COVERAGE,
    show_default=True,
    type=float,
    help="A change counts beyond k × the captures' combined spread.",
)
@click.option(
    "--ignore",
    "ignored",
    multiple=True,
    type=click.Choice(list(FIGURE_DIRECTIONS)),
    help="A figure whose worsening is reported but does not fail the compare (repeatable).",
)
@junit_option
def command(
    baseline: str,
    candidate: str,
    db_path: Path,
    candidate_db_path: Path | None,
    report_dir: Path | None,
    as_json: bool,
    tolerance: float,
    coverage: float,
    ignored: tuple[str, ...],
    junit_path: Path | None,
) -> None:
    """Compare run CANDIDATE against run BASELINE (ids, or 'latest') point by point.

    Exits 1 when any point got worse beyond the captures' own spread or went pass → fail.
    """
    with contextlib.ExitStack() as stack:
        baseline_store = stack.enter_context(read_store(db_path))
        candidate_store = (
            stack.enter_context(read_store(candidate_db_path))
            if candidate_db_path is not None
            else baseline_store
        )
        base = review_run(baseline_store, resolve_run(baseline_store, baseline, what="BASELINE"))
        cand = review_run(
            candidate_store, resolve_run(candidate_store, candidate, what="CANDIDATE")
        )
        gated = [name for name in FIGURE_DIRECTIONS if name not in ignored]
        comparison = compare_runs(
            base, cand, rel_tol=tolerance / 100, coverage=coverage, gated=gated
        )
        if report_dir is not None:
            from labseq.report import build_compare_report

            try:
                files = build_compare_report(
                    comparison, baseline_store, candidate_store, report_dir
                )
            except OSError as exc:
                raise InputError(f"--report {report_dir}: cannot write the report: {exc}") from None
    if junit_path is not None:
        from labseq.junit import compare_junit

        write_junit(compare_junit(comparison), junit_path)
    if as_json:
        click.echo(json.dumps(comparison_summary(comparison), indent=2, ensure_ascii=False))
    else:
        _print_changes(comparison)
    if report_dir is not None:
        click.echo(f"report written to {files.html}", err=as_json)
    regressions = comparison.regressions
    if regressions:
        worst = comparison.describe_regression(regressions[0])
        click.echo(
            f"labseq: regression: {len(regressions)} point(s) got worse; worst at {worst}",
            err=True,
        )
        sys.exit(EXIT_REGRESSED)


def _print_changes(comparison: Comparison) -> None:
    """The summary, the counts and one line per point that moved (worst first)."""
    b, c = comparison.baseline, comparison.candidate
    click.echo(
        f"baseline run {b.run.id} ({b.run.snubber_label}) → candidate run {c.run.id} "
        f"({c.run.snubber_label})"
    )
    click.echo(comparison.outcome)
    for warning in comparison.differences():
        click.echo(f"warning: not like for like: {warning}")
    click.echo(comparison.summary())
    flags = Counter(change.flag for change in comparison.points)
    click.echo(", ".join(f"{count} {flag}" for flag, count in sorted(flags.items())))
    order = {"worse": 0, "missing in candidate": 1, "missing in baseline": 2, "better": 3}
    moved = sorted(
        (p for p in comparison.points if p.flag != "unchanged"), key=lambda p: order[p.flag]
    )
    for change in moved[:MAX_PRINTED_POINTS]:
        click.echo("  " + comparison.describe_point(change))
    if len(moved) > MAX_PRINTED_POINTS:
        click.echo(f"  … and {len(moved) - MAX_PRINTED_POINTS} more (see --json or --report)")
