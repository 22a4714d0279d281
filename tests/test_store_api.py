"""The store interface: every backend has each read method of :class:`RunStore` with the same
signature, and the readers (review, reports, export, run log, design --run) ask for no more."""

from __future__ import annotations

import ast
import inspect
from pathlib import Path

import pytest

from labseq.store import Store
from labseq.store_api import RunStore
from labseq.store_pg import LabDatabase

ROOT = Path(__file__).resolve().parent.parent
#: The store backends; a new one is added here.
BACKENDS = [Store, LabDatabase]
#: Modules that only read runs, and so type their store as RunStore.
READERS = [
    "labseq/review.py",
    "labseq/runlog.py",
    "labseq/export.py",
    "labseq/proposals.py",
    "labseq/report/run_report.py",
    "labseq/report/compare_report.py",
    "labseq/report/traces.py",
]


def _members() -> list[str]:
    return [
        name
        for name, value in vars(RunStore).items()
        if (callable(value) or isinstance(value, property))
        and (not name.startswith("_") or name in ("__enter__", "__exit__"))
    ]


def test_the_protocol_lists_the_read_methods() -> None:
    assert {"runs", "run", "points", "iter_captures", "events", "location"} <= set(_members())


@pytest.mark.parametrize("backend", BACKENDS, ids=lambda cls: cls.__name__)
@pytest.mark.parametrize("name", _members())
def test_backend_has_each_method_with_its_signature(backend: type, name: str) -> None:
    wanted = getattr(RunStore, name)
    have = getattr(backend, name, None)
    assert have is not None, f"{backend.__name__} lacks {name}"
    if isinstance(wanted, property):
        assert isinstance(have, property), f"{backend.__name__}.{name} is not a property"
        return
    wanted_signature = inspect.signature(wanted)
    have_signature = inspect.signature(have)
    assert list(have_signature.parameters) == list(wanted_signature.parameters), name
    for parameter, expected in wanted_signature.parameters.items():
        given = have_signature.parameters[parameter]
        assert (given.kind, given.default) == (expected.kind, expected.default), (name, parameter)
        if name not in ("__enter__", "__exit__"):
            assert given.annotation == expected.annotation, (name, parameter)
    if name not in ("__enter__",):
        assert have_signature.return_annotation == wanted_signature.return_annotation, name


def test_sqlite_store_is_a_run_store(tmp_path: Path) -> None:
    with Store(tmp_path / "s.sqlite") as store:
        assert isinstance(store, RunStore)


@pytest.mark.parametrize("module", READERS)
def test_readers_ask_only_for_the_protocol(module: str) -> None:
    """A reader's store parameters are typed RunStore, and every method it calls on them is the
    protocol's: a reader that needed more would not work on another backend."""
    tree = ast.parse((ROOT / module).read_text(encoding="utf-8"))
    store_names: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.arg) and node.annotation is not None:
            annotation = ast.unparse(node.annotation)
            if annotation in ("Store", "RunStore"):
                assert annotation == "RunStore", f"{module}: {node.arg}: {annotation}"
                store_names.add(node.arg)
    assert store_names, f"{module} takes no store"
    called = {
        node.attr
        for node in ast.walk(tree)
        if isinstance(node, ast.Attribute)
        and isinstance(node.value, ast.Name)
        and node.value.id in store_names
    }
    assert called <= set(_members()), f"{module} calls {sorted(called - set(_members()))}"


def test_lab_database_tables_hold_every_column_of_the_sqlite_store(tmp_path: Path) -> None:
    """Publishing copies a run's rows by column name: each table of the lab database has every
    column the bench's store has (a store schema change needs a lab schema change too)."""
    import sqlite3

    from labseq import store_pg

    specs = {
        "runs": store_pg._RUNS,
        "points": store_pg._POINTS,
        "captures": store_pg._CAPTURES,
        "capture_figures": store_pg._CAPTURE_FIGURES,
        "point_figures": store_pg._POINT_FIGURES,
        "node_verdicts": store_pg._NODE_VERDICTS,
        "events": store_pg._EVENTS,
    }
    Store(tmp_path / "s.sqlite").close()
    with sqlite3.connect(tmp_path / "s.sqlite") as conn:
        for table, spec in specs.items():
            columns = {row[1] for row in conn.execute(f"PRAGMA table_info({table})")}
            lab_columns = set(store_pg._names(spec))
            assert columns <= lab_columns, (table, columns - lab_columns)
            extra = lab_columns - columns
            assert extra == (
                {"nodes", "with_codes", "published_at", "published_by"}
                if table == "runs"
                else set()
            ), table
