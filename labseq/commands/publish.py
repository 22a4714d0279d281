"""``labseq publish RUN... --to postgresql://…``: copy ended runs into the lab database."""

from __future__ import annotations

from pathlib import Path

import click

from labseq.commands._store import db_option, resolve_run
from labseq.errors import InputError
from labseq.publish import PublishedRun, plan, publish
from labseq.store import Store
from labseq.store_pg import LabDatabase, is_lab_url, redact


@click.command("publish")
@click.argument("runs", metavar="RUN...", nargs=-1)
@click.option(
    "--to",
    "url",
    required=True,
    metavar="URL",
    help="The lab database: postgresql://USER@HOST[:PORT]/DB. The password comes from "
    "PGPASSWORD, ~/.pgpass (or PGPASSFILE) or the URL, and is never stored or printed.",
)
@db_option("The bench's store the runs are in.")
@click.option("--all", "every_ended", is_flag=True, help="Every ended run not yet there.")
@click.option(
    "--no-captures",
    "no_captures",
    is_flag=True,
    help="Leave the raw captures' codes on the bench (figures, verdicts and events go); a later "
    "publish without this adds them.",
)
def command(
    runs: tuple[str, ...], url: str, db_path: Path, every_ended: bool, no_captures: bool
) -> None:
    """Copy runs (ids, UUIDs or 'latest') of the bench's store into the lab database.

    Each run goes in one transaction: another reader sees all of it or none of it. A run already
    there (same UUID) is left as it is, so publishing again copies only what is missing, and a
    publish cut short (network, Ctrl-C) is finished by running it again. Exit status 3 when the
    database cannot be reached or the copy is cut short."""
    if not is_lab_url(url):
        raise InputError(f"--to {redact(url)}: give a lab database URL, postgresql://USER@HOST/DB")
    if not runs and not every_ended:
        raise InputError("give the runs to publish (ids, UUIDs or 'latest'), or --all")
    with Store(db_path, read_only=True) as source, LabDatabase(url, setup=True) as lab:
        run_ids = [resolve_run(source, text) for text in runs]
        chosen = plan(source, lab, run_ids, every_ended=every_ended, with_codes=not no_captures)
        for run in chosen.running:
            click.echo(f"run {run.id} ({run.uuid[:8]}) left out: still running")
        for run in chosen.changed:
            click.echo(
                f"run {run.id} ({run.uuid[:8]}) changed on the bench since it was published "
                "(resumed?): kept as published"
            )
        done = publish(source, lab, chosen.runs, with_codes=not no_captures, on_run=_say)
        where = lab.location
    copied = [item for item in done if item.result.outcome != "already there"]
    captures = sum(item.result.captures for item in copied)
    megabytes = sum(item.result.code_bytes for item in copied) / 1e6
    seconds = sum(item.seconds for item in copied)
    rate = (
        f" in {seconds:.2f} s ({captures / seconds:.0f} captures/s, {megabytes / seconds:.1f} MB/s)"
        if copied and seconds > 0
        else ""
    )
    click.echo(
        f"{len(copied)} run(s) published, {len(done) - len(copied)} already there, to {where}{rate}"
    )


def _say(item: PublishedRun) -> None:
    result = item.result
    if result.outcome == "already there":
        click.echo(f"run {item.run.id} ({result.uuid[:8]}): already there")
        return
    codes = f"{result.code_bytes / 1e6:.2f} MB of codes" if result.code_bytes else "no codes"
    click.echo(
        f"run {item.run.id} ({result.uuid[:8]}): {result.outcome}: {result.points} points, "
        f"{result.captures} captures, {codes}"
    )
