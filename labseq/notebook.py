"""A store seen from Python — a notebook, a script — in three lines::

    import labseq
    store = labseq.open_store("labseq.sqlite")
    store.points("latest")          # one row per point: setpoints, readings, verdict

Tables (:meth:`StoreData.runs`, :meth:`~StoreData.points`, :meth:`~StoreData.figures`) are
pandas DataFrames when pandas is installed (``pip install 'labseq[notebook]'``) and lists of
plain dicts otherwise, with the same columns either way; ``open_store(path, records=True)``
asks for the lists even where pandas is installed. Captures come back as numpy arrays with their
time base (:class:`Capture`: ``time_s``, ``volts``, the clip mask, and the raw codes with the
scaling that gave the volts).

Everything here reads: nothing is written to the store, except that a store written by an older
labseq is upgraded when opened, as every labseq command does. A run is named by its id or by
``"latest"``. Figures are in SI units, named as :mod:`labseq.figures` names them (``peak_v``,
``damping_ratio``, ``snubber_loss_w``…). The store's layout itself, for reading it without
labseq, is in docs/store-format.md.
"""

from __future__ import annotations

import importlib
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import asdict, dataclass
from pathlib import Path
from types import ModuleType
from typing import Any

import numpy as np

from labseq.errors import InputError
from labseq.export import capture_name
from labseq.store import Store, StoredCapture

#: Columns of :meth:`StoreData.runs`, in order.
RUN_COLUMNS = (
    "run",
    "status",
    "started_at",
    "finished_at",
    "dut",
    "snubber",
    "bench_kind",
    "points_total",
    "points_done",
    "notes",
    "software_version",
)
#: Columns of :meth:`StoreData.points`, in order (those of the store's points table).
POINT_COLUMNS = (
    "point_index",
    "line_v",
    "line_is_ac",
    "line_frequency_hz",
    "load_a",
    "status",
    "source_voltage_v",
    "source_current_a",
    "load_voltage_v",
    "load_current_a",
    "meter_voltage_v",
    "meter_current_a",
    "meter_power_w",
    "meter_power_factor",
    "output_power_w",
    "efficiency",
    "verdict",
    "verdict_reasons",
    "started_at",
    "finished_at",
    "duration_s",
)
#: Columns of :meth:`StoreData.figures`, in order: one row per point, node and figure.
FIGURE_COLUMNS = (
    "point_index",
    "line_v",
    "load_a",
    "node",
    "figure",
    "worst",
    "mean",
    "spread",
    "n",
)

Table = Any  # a pandas.DataFrame, or a list of dicts without pandas


def _pandas() -> ModuleType | None:
    """pandas when it is installed, else None (it is an optional extra)."""
    try:
        return importlib.import_module("pandas")
    except ImportError:
        return None


@dataclass(frozen=True, eq=False)
class Capture:
    """One stored capture as arrays: ``volts`` at instants ``time_s`` (trigger at 0 s).

    ``clipped`` marks the samples at the bottom or top of the scope's screen, where the true
    voltage is unknown (None for a scope that sent volts). ``codes`` and ``scaling`` are what
    the scope sent; ``volts = (codes − y_reference) × y_increment_v + y_origin_v`` and
    ``time_s = x_origin_s + i × x_increment_s``. ``name`` is the one ``labseq export`` gives it.
    """

    name: str
    run: int
    point_index: int
    capture_index: int
    node: str
    channel: int
    captured_at: str
    time_s: np.ndarray
    volts: np.ndarray
    clipped: np.ndarray | None
    codes: np.ndarray
    scaling: Mapping[str, float | None]

    @property
    def sample_interval_s(self) -> float:
        """Time between samples."""
        return float(self.scaling["x_increment_s"])


def _capture(stored: StoredCapture, run_id: int, point_index: int, primary: str) -> Capture:
    node = None if stored.node == primary else stored.node
    return Capture(
        name=capture_name(point_index, stored.capture_index, node),
        run=run_id,
        point_index=point_index,
        capture_index=stored.capture_index,
        node=stored.node,
        channel=stored.channel,
        captured_at=stored.captured_at,
        time_s=stored.time_s(),
        volts=stored.volts(),
        clipped=stored.clip_mask(),
        codes=stored.codes,
        scaling={
            "x_increment_s": stored.x_increment_s,
            "x_origin_s": stored.x_origin_s,
            "y_increment_v": stored.y_increment_v,
            "y_origin_v": stored.y_origin_v,
            "y_reference": stored.y_reference,
            "code_min": stored.code_min,
            "code_max": stored.code_max,
        },
    )


class StoreData:
    """A labseq store's runs, points, figures and captures as tables and arrays; see
    :func:`open_store`. Use it as a context manager, or call :meth:`close`."""

    def __init__(self, store: Store, *, records: bool = False) -> None:
        self._store = store
        self._records = records
        self.path = store.path

    def __enter__(self) -> StoreData:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        """Close the store file."""
        self._store.close()

    def __repr__(self) -> str:
        return f"<labseq store {self.path}>"

    # ------------------------------------------------------------------ tables

    def runs(self) -> Table:
        """Every run, oldest first (columns :data:`RUN_COLUMNS`)."""
        rows = [
            {
                "run": run.id,
                "status": run.status,
                "started_at": run.started_at,
                "finished_at": run.finished_at,
                "dut": run.dut_label,
                "snubber": run.snubber_label,
                "bench_kind": run.bench_kind,
                "points_total": run.points_total,
                "points_done": run.points_done,
                "notes": run.notes,
                "software_version": run.software_version,
            }
            for run in self._store.runs()
        ]
        return self._table(rows, RUN_COLUMNS)

    def points(self, run: int | str = "latest") -> Table:
        """A run's points in grid order (columns :data:`POINT_COLUMNS`): setpoints, read-backs,
        meter readings, efficiency, the combined verdict and its reasons (a list of text)."""
        points = self._store.points(self.run_id(run))
        rows = [{name: asdict(point)[name] for name in POINT_COLUMNS} for point in points]
        return self._table(rows, POINT_COLUMNS)

    def figures(self, run: int | str = "latest", *, node: str | None = None) -> Table:
        """A run's per-point figures, one row per point, node and figure (columns
        :data:`FIGURE_COLUMNS`): the worst over the point's captures, their mean, sample
        standard deviation and count; of one ``node`` or of all. With pandas, one column per
        figure is a pivot away: ``figures.pivot_table(index="point_index", columns="figure",
        values="worst")``."""
        run_id = self.run_id(run)
        points = {point.id: point for point in self._store.points(run_id)}
        rows = []
        for point_id, nodes in self._store.node_figures(run_id).items():
            point = points[point_id]
            for node_name, figures in nodes.items():
                if node is not None and node_name != node:
                    continue
                rows += [
                    {
                        "point_index": point.point_index,
                        "line_v": point.line_v,
                        "load_a": point.load_a,
                        "node": node_name,
                        "figure": figure,
                        **{key: stats[key] for key in ("worst", "mean", "spread", "n")},
                    }
                    for figure, stats in figures.items()
                ]
        return self._table(rows, FIGURE_COLUMNS)

    # ------------------------------------------------------------------ captures

    def iter_captures(
        self, run: int | str = "latest", *, point: int | None = None, node: str | None = None
    ) -> Iterator[Capture]:
        """A run's captures in point and capture order, read one at a time (of the point with
        index ``point`` and of ``node`` when given)."""
        run_id = self.run_id(run)
        points = self._store.points(run_id)
        nodes = self._store.node_names(run_id)
        primary = nodes[0] if nodes else ""
        if point is None:
            stored: Iterator[StoredCapture] = self._store.iter_captures(run_id)
        else:
            found = [p for p in points if p.point_index == point]
            if not found:
                raise InputError(
                    f"{self.path}: run {run_id} has no point {point} "
                    f"(its points are 0 to {len(points) - 1})"
                )
            stored = iter(self._store.captures(found[0].id))
        index_of = {p.id: p.point_index for p in points}
        for capture in stored:
            if node is None or capture.node == node:
                yield _capture(capture, run_id, index_of[capture.point_id], primary)

    def captures(
        self, run: int | str = "latest", *, point: int | None = None, node: str | None = None
    ) -> list[Capture]:
        """:meth:`iter_captures` as a list (every capture of a long run can be a lot of
        memory: give ``point``, or iterate)."""
        return list(self.iter_captures(run, point=point, node=node))

    # ------------------------------------------------------------------ helpers

    def run_id(self, run: int | str) -> int:
        """The id of ``run``: an id, or ``"latest"`` for the newest run in the store."""
        if isinstance(run, str) and run.strip().lower() == "latest":
            runs = self._store.runs()
            if not runs:
                raise InputError(f"{self.path}: this store holds no runs")
            return runs[-1].id
        try:
            run_id = int(run)
        except (TypeError, ValueError):
            raise InputError(f"run {run!r}: give a run id or 'latest'") from None
        self._store.run(run_id)  # an unknown id names the runs there are
        return run_id

    def _table(self, rows: list[dict[str, Any]], columns: Sequence[str]) -> Table:
        pandas = None if self._records else _pandas()
        if pandas is None:
            return rows
        return pandas.DataFrame(rows, columns=list(columns))


def open_store(path: str | Path, *, records: bool = False) -> StoreData:
    """Open the labseq store at ``path`` for reading its runs, points, figures and captures.

    Tables are pandas DataFrames where pandas is installed, else (or with ``records=True``)
    lists of dicts. A missing file is an error; nothing is created."""
    return StoreData(Store(path, create=False), records=records)
