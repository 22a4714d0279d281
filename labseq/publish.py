"""``labseq publish``: copy a bench's ended runs into the lab database.

Which runs: those named (any run that has ended; one still running is refused, since what is
published is not updated), or with ``--all`` every ended run of the store that the lab database
does not hold yet (as ``labseq merge`` gathers stores). A run published and then changed on the
bench (resumed) is kept as published, and the publish says so. Each run goes in one transaction
of its own (:meth:`labseq.store_pg.LabDatabase.publish_run`), so a publish cut short keeps the
runs it finished and shows nothing of the one it was copying; running it again copies what is
missing.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Iterable
from dataclasses import dataclass

from labseq.errors import InputError
from labseq.merge import ENDED_STATUSES, differs
from labseq.store import RunRecord, Store
from labseq.store_pg import LabDatabase, Published


@dataclass(frozen=True)
class PublishPlan:
    """The runs to publish; those ``--all`` left out as still running; and those already there
    whose bench copy has changed since they were published (a resumed run: kept as published)."""

    runs: list[RunRecord]
    running: list[RunRecord]
    changed: list[RunRecord]


def plan(
    source: Store,
    lab: LabDatabase,
    run_ids: Iterable[int],
    *,
    every_ended: bool,
    with_codes: bool,
) -> PublishPlan:
    """The runs of ``source`` to publish: ``run_ids`` (each must have ended), and with
    ``every_ended`` every ended run that ``lab`` does not hold yet (or holds without its codes
    when ``with_codes``)."""
    named = [source.run(run_id) for run_id in dict.fromkeys(run_ids)]
    for run in named:
        if run.status not in ENDED_STATUSES:
            raise InputError(
                f"{source.location}: run {run.id} is still running; publish it once it has "
                "ended (`labseq runs` shows its status; `labseq resume` finishes a dead one)"
            )
    everything = source.runs() if every_ended else named
    there = lab.published([run.uuid for run in everything])
    wanted = named + [
        run
        for run in everything
        if run.status in ENDED_STATUSES
        and (run.uuid not in there or (with_codes and not there[run.uuid]))
    ]
    chosen = sorted({run.id: run for run in wanted}.values(), key=lambda run: run.id)
    running = [run for run in everything if run.status not in ENDED_STATUSES]
    changed = [
        run
        for run in everything
        if run.uuid in there and differs(run, lab.runs_by_uuid(run.uuid)[0])
    ]
    return PublishPlan(chosen, running, changed)


@dataclass(frozen=True)
class PublishedRun:
    """One run's outcome and how long its transaction took."""

    run: RunRecord
    result: Published
    seconds: float


def publish(
    source: Store,
    lab: LabDatabase,
    runs: Iterable[RunRecord],
    *,
    with_codes: bool,
    on_run: Callable[[PublishedRun], None] = lambda _: None,
) -> list[PublishedRun]:
    """Publish ``runs`` one transaction each, in order; ``on_run`` hears of each as it ends."""
    done = []
    for run in runs:
        start = time.perf_counter()
        result = lab.publish_run(source, run.id, with_codes=with_codes)
        outcome = PublishedRun(run, result, time.perf_counter() - start)
        on_run(outcome)
        done.append(outcome)
    return done
