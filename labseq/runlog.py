"""A run's event log read back: what happened during the run, when, and at which point.

The runner records every event as it happens (:meth:`labseq.store.Store.log_event`): the bench
made safe before and after the sweep, the source switched on, instrument errors and retries,
skipped points, each point's time, signals and how the run ended. ``labseq log RUN`` prints
them and the run report lists them; both read them here. ``labseq analyze-run`` records each
judging of a run's captures as an "info" event (with :func:`judged_limits`); :func:`judgements`
reads them back, with the file and limits each used.
"""

from __future__ import annotations

import json
import re
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from labseq.review import point_label, point_object
from labseq.sequence import Sequence as SequenceFile
from labseq.store import EVENT_KINDS, PointRecord
from labseq.store_api import RunStore


@dataclass(frozen=True)
class LogEntry:
    """One event of a run, with the point it happened at (None: the run as a whole)."""

    time: str  # UTC, ISO 8601 to the millisecond
    kind: str  # one of labseq.store.EVENT_KINDS
    message: str
    point: PointRecord | None
    data: dict[str, Any] | None

    @property
    def time_text(self) -> str:
        """The time as read: ``2026-03-01 08:00:00.000`` (UTC)."""
        return self.time.replace("T", " ").removesuffix("+00:00")

    @property
    def point_text(self) -> str:
        """Where it happened: ``point 3 (48 V / 1.1 A)``, or "" for the run as a whole."""
        if self.point is None:
            return ""
        return f"point {self.point.point_index + 1} ({point_label(self.point)})"

    @property
    def data_text(self) -> str:
        """The event's data as ``name=value`` pairs (numbers to 3 significant digits)."""
        return ", ".join(
            f"{name}={_value_text(value)}" for name, value in (self.data or {}).items()
        )

    def as_dict(self) -> dict[str, Any]:
        """Plain data for JSON (SI numbers)."""
        point = self.point
        where = (
            dict.fromkeys(("point_index", "line_v", "line_is_ac", "load_a"))
            if point is None
            else point_object(point.point_index, point.line_v, point.line_is_ac, point.load_a)
        )
        return {
            "time": self.time,
            "kind": self.kind,
            "message": self.message,
            **where,
            "data": self.data,
        }


def _value_text(value: Any) -> str:
    if isinstance(value, float):
        return f"{value:.3g}"
    return value if isinstance(value, str) else json.dumps(value, separators=(",", ":"))


def run_log(store: RunStore, run_id: int, *, kinds: Iterable[str] = ()) -> list[LogEntry]:
    """The events of run ``run_id`` in the order they happened (only those of ``kinds`` when
    given)."""
    wanted = set(kinds)
    unknown = sorted(wanted - set(EVENT_KINDS))
    if unknown:
        raise ValueError(f"unknown event kind(s) {unknown}; known: {', '.join(EVENT_KINDS)}")
    points: Mapping[int, PointRecord] = {point.id: point for point in store.points(run_id)}
    return [
        LogEntry(
            row["time"],
            row["kind"],
            row["message"],
            None if row["point_id"] is None else points[row["point_id"]],
            row["data"],
        )
        for row in store.events(run_id)
        if not wanted or row["kind"] in wanted
    ]


def entry_line(entry: LogEntry) -> str:
    """One event as a line of text: time, kind, message, then its point and data."""
    extra = "; ".join(text for text in (entry.point_text, entry.data_text) if text)
    return f"{entry.time_text}  {entry.kind:<10} {entry.message}" + (
        f"  [{extra}]" if extra else ""
    )


#: The key of an event's data that records a judging of the run (``labseq analyze-run``).
JUDGEMENT_KEY = "judgement"


@dataclass(frozen=True)
class Judgement:
    """One judging of a run's stored captures by ``labseq analyze-run``: when, against which
    sequence (the run's own, or another file) and its limits per node."""

    time: str  # UTC, ISO 8601
    source: str  # "stored" (the sequence the run was made with) or "file"
    sequence_path: str
    sequence_sha256: str
    same_grid: bool
    limits: dict[str, dict[str, Any]]  # node → limit name → value (SI), rating and derating

    @property
    def rejudged(self) -> bool:
        """Judged against another file than the sequence the run was made with."""
        return self.source == "file"


def judged_limits(sequence: SequenceFile) -> dict[str, dict[str, Any]]:
    """What each node of ``sequence`` is judged against: its limits (SI, None when not set),
    its rating, derating and settling band."""
    return {
        node.name: {
            **vars(node.limits),
            "rating_v": node.rating_v,
            "derating": node.derating,
            "settling_band": node.settling_band,
        }
        for node in sequence.nodes
    }


def judgements(store: RunStore, run_id: int) -> list[Judgement]:
    """Every judging of run ``run_id`` recorded by ``labseq analyze-run``, oldest first; the
    last one decides the verdicts the store holds."""
    found = []
    for row in store.events(run_id):
        record = (row["data"] or {}).get(JUDGEMENT_KEY)
        if row["kind"] == "info" and isinstance(record, dict):
            found.append(
                Judgement(
                    time=row["time"],
                    source=str(record.get("source", "")),
                    sequence_path=str(record.get("sequence_path", "")),
                    sequence_sha256=str(record.get("sequence_sha256", "")),
                    same_grid=bool(record.get("same_grid", True)),
                    limits=dict(record.get("limits") or {}),
                )
            )
    return found
#: Event kinds that say why a point could not be measured.
POINT_PROBLEM_KINDS = ("fault", "scpi-error", "skip")


def point_problems(entries: Iterable[LogEntry]) -> dict[int, str]:
    """Why each point that failed to measure did: its last instrument error, with "skipped"
    when the run went on without it (point id → text)."""
    errors: dict[int, str] = {}
    skipped: set[int] = set()
    for entry in entries:
        if entry.point is None or entry.kind not in POINT_PROBLEM_KINDS:
            continue
        if entry.kind == "skip":
            skipped.add(entry.point.id)
        else:
            # the runner names the setpoints first ("75 V / 2.2 A: …"); the point says them
            errors[entry.point.id] = entry.message.split(": ", 1)[-1]
    return {
        point_id: (
            errors.get(point_id, "an instrument error")
            + (" — skipped" if point_id in skipped else "")
        )
        for point_id in errors.keys() | skipped
    }


@dataclass(frozen=True)
class FoldedTimings:
    """The per-point timing events of a run, folded into one line of the run log."""

    count: int
    seconds: list[float]
    first: LogEntry

    @property
    def message(self) -> str:
        """ "16 points timed: 0.41 s to 0.62 s each, median 0.50 s"."""
        if not self.seconds:
            return f"{self.count} timing events"
        ordered = sorted(self.seconds)
        median = ordered[len(ordered) // 2]
        return (
            f"{self.count} points timed: {ordered[0]:.2f} s to {ordered[-1]:.2f} s each, "
            f"median {median:.2f} s (labseq log shows each)"
        )


_POINT_SECONDS = re.compile(r"([0-9.]+) s$")


def folded_log(entries: Sequence[LogEntry]) -> list[LogEntry | FoldedTimings]:
    """The run log as a reader wants it: every event in order, except that the timing events of
    single points are folded into one entry where the first of them was."""
    timed = [e for e in entries if e.kind == "timing" and e.point is not None]
    if len(timed) < 2:
        return list(entries)
    seconds = [float(m[1]) for e in timed if (m := _POINT_SECONDS.search(e.message))]
    folded: list[LogEntry | FoldedTimings] = []
    for entry in entries:
        if entry is timed[0]:
            folded.append(FoldedTimings(len(timed), seconds, entry))
        elif not (entry.kind == "timing" and entry.point is not None):
            folded.append(entry)
    return folded
