"""Options shared by the commands that read or write a store: ``--db`` and a RUN argument."""

from __future__ import annotations

from pathlib import Path

import click

from labseq.errors import InputError
from labseq.store import Store

DEFAULT_DB = "labseq.sqlite"

db_option = click.option(
    "--db",
    "db_path",
    type=click.Path(path_type=Path, dir_okay=False),
    default=DEFAULT_DB,
    show_default=True,
    help="The SQLite store.",
)


def resolve_run(store: Store, run: str) -> int:
    """A RUN argument as a run id: a number, or ``latest`` for the newest run in the store."""
    if run == "latest":
        runs = store.runs()
        if not runs:
            raise InputError(f"{store.path}: no runs yet, so there is no latest run")
        return runs[-1].id
    try:
        return int(run)
    except ValueError:
        raise InputError(
            f"RUN must be a run id (see `labseq runs`) or 'latest', not {run!r}"
        ) from None
