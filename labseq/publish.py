"""``labseq publish``: copy a bench's ended runs into the lab database.

Which runs: those named (any run that has ended; one still running is refused, since what is
published is never updated), or with ``--all`` every finished run of the store that the lab
database does not hold yet. Each run goes in one transaction of its own
(:meth:`labseq.store_pg.LabDatabase.publish_run`), so a publish cut short keeps the runs it
finished and shows nothing of the one it was copying; running it again copies what is missing.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Iterable
from dataclasses import dataclass

from labseq.errors import InputError
from labseq.store import RunRecord, Store
from labseq.store_pg import LabDatabase, Published


@dataclass(frozen=True)
class PublishPlan:
    """The runs to publish, and those ``--all`` left out (not finished) with their status."""

    runs: list[RunRecord]
    not_finished: list[RunRecord]


def plan(
    source: Store,
    lab: LabDatabase,
    run_ids: Iterable[int],
    *,
    every_finished: bool,
    with_codes: bool,
) -> PublishPlan:
    """The runs of ``source`` to publish: ``run_ids`` (each must have ended), and with
    ``every_finished`` every finished run not yet in ``lab`` (or there without its codes when
    ``with_codes``)."""
    named = [source.run(run_id) for run_id in dict.fromkeys(run_ids)]
    for run in named:
        if run.status == "running":
            raise InputError(
                f"{source.location}: run {run.id} is still running; publish it once it has "
                "ended (`labseq runs` shows its status; `labseq resume` finishes a dead one)"
            )
    if not every_finished:
        return PublishPlan(named, [])
    everything = source.runs()
    there = lab.published([run.uuid for run in everything])
    missing = [
        run
        for run in everything
        if run.status == "finished"
        and (run.uuid not in there or (with_codes and not there[run.uuid]))
    ]
    chosen = {run.id: run for run in [*named, *missing]}
    left_out = [run for run in everything if run.status != "finished" and run.id not in chosen]
    return PublishPlan(sorted(chosen.values(), key=lambda run: run.id), left_out)


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
