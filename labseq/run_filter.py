"""Which runs a question is about: by DUT label, snubber label, bench and start date.

``labseq runs`` takes these to answer the questions that cross benches in a lab database ("every
run of board rev C, on any bench", "this week's runs of the production-test bench"); the same
filter works on a bench's own store.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import UTC, datetime, time, timedelta

from labseq.errors import InputError
from labseq.store import RunRecord


def parse_moment(text: str, option: str, *, end_of_day: bool = False) -> datetime:
    """A date (``2026-12-01``) or date and time (``2026-12-01T14:30``, ``2026-12-01 14:30``)
    given as an option, in UTC unless it names its offset. A bare date is the start of that day,
    or its end with ``end_of_day`` (so ``--until 2026-12-01`` includes that day)."""
    given = text.strip()
    try:
        moment = datetime.fromisoformat(given)
    except ValueError:
        raise InputError(
            f"{option} {text!r}: give a date as YYYY-MM-DD, or a date and time as "
            "YYYY-MM-DDTHH:MM (UTC unless an offset is given)"
        ) from None
    if len(given) == 10 and end_of_day:
        moment = datetime.combine(moment.date(), time.min) + timedelta(days=1)
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=UTC)
    return moment


@dataclass(frozen=True)
class RunFilter:
    """Text filters match any part of the label, in any case; ``since`` and ``until`` bound the
    run's start (``since`` included, ``until`` excluded)."""

    dut: str | None = None
    snubber: str | None = None
    bench: str | None = None  # any part of the bench identity HOST:DIGEST
    since: datetime | None = None
    until: datetime | None = None

    def matches(self, run: RunRecord) -> bool:
        if not _contains(run.dut_label, self.dut) or not _contains(run.snubber_label, self.snubber):
            return False
        if not (_contains(run.bench_id, self.bench) or _contains(run.bench_host, self.bench)):
            return False
        started = datetime.fromisoformat(run.started_at)
        if started.tzinfo is None:
            started = started.replace(tzinfo=UTC)
        if self.since is not None and started < self.since:
            return False
        return self.until is None or started < self.until

    def select(self, runs: list[RunRecord]) -> list[RunRecord]:
        return [run for run in runs if self.matches(run)]

    @property
    def active(self) -> bool:
        return any(value is not None for value in vars(self).values())


def _contains(label: str, wanted: str | None) -> bool:
    return wanted is None or wanted.casefold() in label.casefold()
