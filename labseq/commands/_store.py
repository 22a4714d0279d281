"""Options shared by the commands that read or write a store: ``--db`` and a RUN argument."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import Any

import click

from instruments.text import quoted
from labseq.errors import InputError
from labseq.store import Store

DEFAULT_DB = "labseq.sqlite"
#: The largest run id a store can hold: SQLite's row ids are signed 64-bit integers.
MAX_RUN_ID = 2**63 - 1


def db_option(help_text: str = "The SQLite store.") -> Callable[[Any], Any]:
    """The ``--db PATH`` option (default ``labseq.sqlite`` in the working directory)."""
    return click.option(
        "--db",
        "db_path",
        type=click.Path(path_type=Path, dir_okay=False),
        default=DEFAULT_DB,
        show_default=True,
        help=help_text,
    )


def resolve_run(store: Store, text: str, *, what: str = "RUN") -> int:
    """A run named on the command line: its id, or ``latest`` for the newest run in the store."""
    if text.strip().lower() == "latest":
        runs = store.runs()
        if not runs:
            raise InputError(f"{store.path}: {what} latest: this store holds no runs")
        return runs[-1].id
    try:
        run_id = int(text)
    except ValueError:
        raise InputError(
            f"{what} {quoted(text)}: give a run id (see `labseq runs`) or 'latest'"
        ) from None
    if not 0 < run_id <= MAX_RUN_ID:
        raise InputError(
            f"{what} {quoted(text)}: a run id is a whole number from 1 to {MAX_RUN_ID} (SQLite's "
            "largest row id); see `labseq runs` for the ids in this store"
        )
    return run_id
