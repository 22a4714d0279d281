"""A run's event log read back: what happened during the run, when, and at which point.

The runner records every event as it happens (:meth:`labseq.store.Store.log_event`): the bench
made safe before and after the sweep, the source switched on, instrument errors and retries,
skipped points, each point's time, signals and how the run ended. ``labseq log RUN`` prints
them and the run report lists them; both read them here.
"""

from __future__ import annotations

import json
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any

from labseq.review import point_label
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
        return {
            "time": self.time,
            "kind": self.kind,
            "message": self.message,
            "point_index": None if point is None else point.point_index,
            "line_v": None if point is None else point.line_v,
            "line_is_ac": None if point is None else point.line_is_ac,
            "load_a": None if point is None else point.load_a,
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
