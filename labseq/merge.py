"""Gathering runs from several benches' stores into one: ``labseq merge SOURCE... --into STORE``.

A run is the same run wherever it is stored: its UUID says so. Merging copies each run of each
source that the target does not hold yet, with everything stored with it
(:meth:`labseq.store.Store.import_run`, one transaction per run), so merging again copies nothing
and an interrupted merge is finished by running it again. The sources are opened read-only and
never written. A run still "running" in its source is left out (it is not whole yet: merge again
once it has ended); a run already in the target is not copied again, even when its source's copy
has changed since (a resumed run): the merge says so.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Sequence
from contextlib import ExitStack
from dataclasses import dataclass, field
from pathlib import Path

from labseq.errors import InputError
from labseq.store import RunRecord, Store

#: The run statuses a merge copies: every way a run ends ("running" runs are left out).
ENDED_STATUSES = ("finished", "aborted", "interrupted", "failed", "unsafe-end")


@dataclass
class SourceMerged:
    """What merging one source did: the runs copied (source id → id in the target), those the
    target already held (by UUID), those still running, and those whose source copy changed
    after they were merged (left as merged)."""

    source: Path
    copied: dict[int, int] = field(default_factory=dict)
    already: list[int] = field(default_factory=list)
    running: list[int] = field(default_factory=list)
    changed: list[int] = field(default_factory=list)


def _same_file(first: Path, second: Path) -> bool:
    try:
        return os.path.samefile(first, second)
    except OSError:
        return False


def differs(source: RunRecord, merged: RunRecord) -> bool:
    """True when a run's source copy no longer matches the one merged (resumed or re-judged
    since): its status, end or point counts."""
    return (source.status, source.finished_at, source.points_done, source.points_total) != (
        merged.status,
        merged.finished_at,
        merged.points_done,
        merged.points_total,
    )


def merge_stores(
    sources: Sequence[Path],
    target: Path,
    *,
    on_source: Callable[[SourceMerged], None] | None = None,
) -> list[SourceMerged]:
    """Copy into the store ``target`` (created if missing) every ended run of each store in
    ``sources`` that it does not hold yet. Every source is checked (it exists, is a labseq store
    this labseq reads, is not the target) before anything is copied; ``on_source`` is told of
    each source once it is merged."""
    if not sources:
        raise InputError("merge: give at least one SOURCE store")
    results = []
    with ExitStack() as stack:
        opened = []
        for source in sources:
            if not source.is_file():
                raise InputError(f"merge: SOURCE {source}: no such file; give labseq stores")
            if _same_file(source, target):
                raise InputError(f"merge: {source} is the --into store itself; give another")
            opened.append((source, stack.enter_context(Store(source, read_only=True))))
        into = stack.enter_context(Store(target))
        for source, store in opened:
            result = SourceMerged(source)
            for run in store.runs():
                if run.status not in ENDED_STATUSES:
                    result.running.append(run.id)
                    continue
                held = into.runs_by_uuid(run.uuid)
                if held:
                    result.already.append(run.id)
                    if differs(run, held[0]):
                        result.changed.append(run.id)
                    continue
                result.copied[run.id] = into.import_run(store, run.id)
            results.append(result)
            if on_source is not None:
                on_source(result)
    return results
