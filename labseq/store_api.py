"""What a store of runs offers its readers, whatever holds it: :class:`RunStore`.

The review, the reports, compare, export, the run log and ``design --run`` read runs only
through these methods, so any backend that has them serves them: the bench's SQLite file
(:class:`labseq.store.Store`, which also has the write methods a run needs) or a lab-wide
database. The records they return (:class:`~labseq.store.RunRecord`,
:class:`~labseq.store.PointRecord`, :class:`~labseq.store.StoredCapture`) and the errors they
raise (:class:`~labseq.store.StoreError`, :class:`~labseq.store.UnknownRunError` for a run id
the store does not hold, an input error: exit status 2) are defined in :mod:`labseq.store`;
every backend returns the same records with the same values for the same run (a run's
integer ids are its own store's; its UUID is the same everywhere).

``tests/test_store_api.py`` checks that the SQLite store has every method here with the same
signature; a new backend adds itself to that test.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any, Protocol, runtime_checkable

from labseq.store import PointRecord, RunRecord, StoredCapture


@runtime_checkable
class RunStore(Protocol):
    """The read side of a store of runs (use as a context manager; nothing here writes)."""

    @property
    def location(self) -> str:
        """Where the store is, for messages: a file path, or a database address without any
        password."""
        ...

    def __enter__(self) -> RunStore: ...

    def __exit__(self, kind: object, error: BaseException | None, trace: object) -> None: ...

    def close(self) -> None:
        """Let go of the store (its file or connection)."""
        ...

    # ------------------------------------------------------------------- runs

    def runs(self) -> list[RunRecord]:
        """All runs, oldest first (by id), with their point counts."""
        ...

    def run(self, run_id: int) -> RunRecord:
        """One run; :class:`~labseq.store.UnknownRunError` if there is none with that id."""
        ...

    def runs_by_uuid(self, prefix: str) -> list[RunRecord]:
        """The runs whose UUID starts with ``prefix`` (lower-case hex digits and dashes),
        oldest first."""
        ...

    def last_safety_check(self, run_id: int) -> str | None:
        """The one-line summary of the latest making-safe of the run's bench, or None."""
        ...

    def events(self, run_id: int) -> list[dict[str, Any]]:
        """A run's events in order: id, run_id, point_id, time, kind, message, data (decoded)."""
        ...

    # ------------------------------------------------------------------- points

    def points(self, run_id: int, *, status: str | None = None) -> list[PointRecord]:
        """The run's points in grid order (only those with ``status`` when given);
        :class:`~labseq.store.UnknownRunError` for an unknown run."""
        ...

    def node_names(self, run_id: int) -> list[str]:
        """The nodes a run captured, in order of first capture (the primary first)."""
        ...

    def clipped_points(self, run_id: int) -> set[tuple[str, int]]:
        """The (node, point id)s of a run where at least one capture clipped."""
        ...

    def node_figures(self, run_id: int) -> dict[int, dict[str, dict[str, dict[str, Any]]]]:
        """Aggregated figures of every node at every point: point id → node → figure →
        {worst, mean, spread, n}."""
        ...

    def point_figures(self, run_id: int, *, node: str) -> dict[int, dict[str, dict[str, Any]]]:
        """One node's aggregated figures at every point: point id → figure → stats."""
        ...

    def node_verdicts(self, run_id: int) -> dict[int, dict[str, tuple[str, list[str]]]]:
        """Each node's verdict at every judged point: point id → node → (verdict, reasons)."""
        ...

    # ------------------------------------------------------------------- captures

    def captures(
        self, point_id: int, *, with_codes: bool = True, node: str | None = None
    ) -> list[StoredCapture]:
        """A point's captures in order (of one ``node``, or of all); ``with_codes=False``
        leaves the codes unread (an empty array)."""
        ...

    def iter_captures(
        self, run_id: int, *, with_codes: bool = True, only_unanalysed: bool = False
    ) -> Iterator[StoredCapture]:
        """A run's captures in point and capture order, their codes read one capture at a
        time (``only_unanalysed``: those without stored figures)."""
        ...

    def capture_figures(self, capture_id: int) -> dict[str, Any] | None:
        """One capture's stored figures (with ``edges``: the figures of every edge), or None
        before analysis."""
        ...

    def capture_methods(self, run_id: int, name: str) -> dict[tuple[str, int], tuple[str, ...]]:
        """The distinct values of the capture method ``name`` at each (node, point id)."""
        ...
