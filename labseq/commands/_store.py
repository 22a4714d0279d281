"""Options shared by the commands that read or write a store: ``--db`` and a RUN argument."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import Any

import click

from labseq.errors import InputError
from labseq.store import Store, UnknownRunError
from labseq.store_api import RunStore
from labseq.store_pg import LabDatabase, is_lab_url, redact
from labseq_instruments.text import quoted

DEFAULT_DB = "labseq.sqlite"
#: The largest run id a store can hold: SQLite's row ids are signed 64-bit integers.
MAX_RUN_ID = 2**63 - 1


class StoreLocation(click.ParamType):
    """A store on the command line: a SQLite file's path, or (where ``lab`` is allowed) a lab
    database's ``postgresql://`` URL, kept as text."""

    name = "store"

    def __init__(self, *, lab: bool) -> None:
        self.lab = lab

    def convert(self, value: Any, param: Any, ctx: Any) -> Path | str:
        if isinstance(value, Path):
            return value
        if is_lab_url(str(value)):
            if self.lab:
                return str(value)
            self.fail(
                f"{redact(str(value))}: a lab database is written by `labseq publish` and read "
                "by runs, report, compare, design --run, export and log; give the bench's SQLite "
                "file",
                param,
                ctx,
            )
        if str(value).endswith(("/", "\\")) or Path(value).is_dir():
            self.fail(f"{value}: a directory; give a store file", param, ctx)
        return Path(value)


def db_option(help_text: str = "The SQLite store.", *, lab: bool = False) -> Callable[[Any], Any]:
    """The ``--db`` option (default ``labseq.sqlite`` in the working directory); with ``lab``
    it may also name a lab database (``postgresql://…``)."""
    if lab:
        help_text += (
            " Or a lab database: postgresql://USER@HOST/DB (password from PGPASSWORD or ~/.pgpass)."
        )
    return click.option(
        "--db",
        "db_path",
        type=StoreLocation(lab=lab),
        default=DEFAULT_DB,
        show_default=True,
        help=help_text,
    )


def read_store(db_path: Path | str) -> RunStore:
    """The store ``--db`` names, opened for reading only (the read commands' one way in): a
    SQLite file, or a lab database by its URL."""
    if isinstance(db_path, str) and is_lab_url(db_path):
        return LabDatabase(db_path)
    return Store(db_path, read_only=True)


#: The fewest hex digits of a UUID that name a run on the command line.
UUID_PREFIX_MIN = 8


def resolve_run(store: RunStore, text: str, *, what: str = "RUN") -> int:
    """A run named on the command line: its id in this store, its UUID or the first
    :data:`UUID_PREFIX_MIN` or more hex digits of it, or ``latest`` for the newest run in the
    store. Digits alone are an id when the store has a run of that id."""
    given = text.strip().lower()
    if given == "latest":
        runs = store.runs()
        if not runs:
            raise InputError(f"{store.location}: {what} latest: this store holds no runs")
        return runs[-1].id
    hint = (
        f"give a run id, a run's UUID or its first {UUID_PREFIX_MIN}+ hex digits (see "
        "`labseq runs`), or 'latest'"
    )
    if given.isdigit():
        run_id = int(given)
        in_range = 0 < run_id <= MAX_RUN_ID
        if in_range and (len(given) < UUID_PREFIX_MIN or _has_run(store, run_id)):
            return run_id
        if not in_range and len(given) < UUID_PREFIX_MIN:
            raise InputError(
                f"{what} {quoted(text)}: a run id is a whole number from 1 to {MAX_RUN_ID} "
                "(SQLite's largest row id); see `labseq runs` for the ids in this store"
            )
    digits = given.replace("-", "")
    if len(digits) < UUID_PREFIX_MIN or given.strip("0123456789abcdef-"):
        raise InputError(f"{what} {quoted(text)}: {hint}")
    found = store.runs_by_uuid(given)
    if len(found) == 1:
        return found[0].id
    if not found:
        raise InputError(
            f"{store.location}: {what} {quoted(text)}: no run has that id, and no run's UUID "
            f"starts so; {hint}"
        )
    names = ", ".join(f"{run.id} ({run.uuid})" for run in found[:5])
    raise InputError(
        f"{store.location}: {what} {quoted(text)} starts the UUID of {len(found)} runs: {names}; "
        "give more of its digits"
    )


def _has_run(store: RunStore, run_id: int) -> bool:
    try:
        store.run(run_id)
    except UnknownRunError:
        return False
    return True


def default_folder(what: str, run_id: int) -> str:
    """The folder a command writes run ``run_id`` into when given no --out: ``report-run3``,
    ``export-run3`` (one pattern for every command)."""
    return f"{what}-run{run_id}"
