"""Options shared by the commands that read or write a store: ``--db`` and a RUN argument."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import Any

import click

from labseq.errors import InputError
from labseq.store import Store

DEFAULT_DB = "labseq.sqlite"


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
        return int(text)
    except ValueError:
        raise InputError(
            f"{what} {text!r}: give a run id (see `labseq runs`) or 'latest'"
        ) from None


def default_folder(what: str, run_id: int) -> str:
    """The folder a command writes run ``run_id`` into when given no --out: ``report-run3``,
    ``export-run3`` (one pattern for every command)."""
    return f"{what}-run{run_id}"
