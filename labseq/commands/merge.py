"""``labseq merge SOURCE... --into STORE``: gather the runs of several stores into one (the work
is :mod:`labseq.merge`'s)."""

from __future__ import annotations

from pathlib import Path

import click

from labseq.merge import SourceMerged, merge_stores


def _ids(ids: list[int]) -> str:
    return ", ".join(str(run_id) for run_id in ids)


def _say(result: SourceMerged) -> None:
    copied = result.copied
    line = f"{result.source}: {len(copied)} run(s) copied"
    if copied:
        line += " (" + ", ".join(f"{old} as {new}" for old, new in copied.items()) + ")"
    if result.already:
        line += f", {len(result.already)} already there"
    click.echo(line)
    if result.running:
        click.echo(
            f"  still running, not copied: run(s) {_ids(result.running)}; merge again once "
            "they have ended"
        )
    if result.changed:
        click.echo(
            f"  changed in the source since they were merged (kept as merged): run(s) "
            f"{_ids(result.changed)}"
        )


@click.command("merge")
@click.argument(
    "sources",
    metavar="SOURCE...",
    nargs=-1,
    required=True,
    type=click.Path(path_type=Path, dir_okay=False),
)
@click.option(
    "--into",
    "target",
    required=True,
    type=click.Path(path_type=Path, dir_okay=False),
    help="The store to gather the runs into (created if missing).",
)
def command(sources: tuple[Path, ...], target: Path) -> None:
    """Copy every ended run of the SOURCE stores into the store --into, with everything stored
    with it: sequence, points, raw captures, figures, verdicts and events.

    A run is known by its UUID: one the target already holds is not copied again, so merging
    twice copies nothing. Runs get new ids in the target (`labseq runs` lists both). The
    sources are only read. A run still running is left out until it has ended."""
    merge_stores(list(sources), target, on_source=_say)
