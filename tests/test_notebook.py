"""The Python API for notebooks (labseq.notebook), the README's notebook example run as written,
docs/store-format.md followed with nothing but sqlite3, numpy and zstandard, and importing
labseq leaving a notebook's matplotlib alone."""

from __future__ import annotations

import os
import re
import shutil
import sqlite3
import subprocess
import sys
import textwrap
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest
from sweeps import demo_sequence, run_cli

import labseq
from labseq import notebook
from labseq.errors import InputError
from labseq.review import review_run
from labseq.store import Store

ROOT = Path(__file__).resolve().parent.parent


@pytest.fixture(scope="module")
def demo_store(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Path]:
    """``labseq.sqlite`` with one small sweep of the DC demo on the simulated bench (2 × 2
    points, 2 captures each)."""
    tmp_path = tmp_path_factory.mktemp("notebook")
    sequence = demo_sequence(tmp_path, lines=["36 V", "75 V"], loads=["25 %", "100 %"], captures=2)
    db = tmp_path / "labseq.sqlite"
    code, _, err = run_cli("run", str(sequence), "--db", str(db), "--quiet")
    assert code == 0, err
    yield db


def test_three_lines_from_a_store_to_data(demo_store: Path) -> None:
    pandas = pytest.importorskip("pandas")
    with labseq.open_store(demo_store) as store:
        runs, points, figures = store.runs(), store.points("latest"), store.figures(1)
        assert isinstance(points, pandas.DataFrame)
        assert list(runs.columns) == list(notebook.RUN_COLUMNS) and runs["run"].tolist() == [1]
        assert list(points.columns) == list(notebook.POINT_COLUMNS)
        with Store(demo_store, create=False) as raw:
            stored = raw.points(1)
            review = review_run(raw, 1)
        assert points["line_v"].tolist() == [p.line_v for p in stored]
        assert points["verdict"].tolist() == [p.verdict for p in stored]
        assert points["efficiency"].tolist() == [p.efficiency for p in stored]
        # the figures table holds what the review judges, point by point
        peaks = figures[figures["figure"] == "peak_v"].set_index("point_index")["worst"]
        for point in review.points:
            assert peaks[point.point.point_index] == point.figures["peak_v"].worst
        assert set(figures["node"]) == {"primary"} and set(figures["n"]) == {2}


def test_plain_records_without_pandas(demo_store: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(notebook, "_pandas", lambda: None)  # as where pandas is not installed
    with labseq.open_store(demo_store) as store:
        points, figures, runs = store.points(), store.figures(), store.runs()
    assert isinstance(points, list) and all(isinstance(row, dict) for row in points)
    assert len(points) == 4 and list(points[0]) == list(notebook.POINT_COLUMNS)
    assert list(figures[0]) == list(notebook.FIGURE_COLUMNS) and runs[0]["run"] == 1
    with labseq.open_store(demo_store, records=True) as store:  # asked for, with pandas or not
        assert store.points(1) == points


def test_captures_as_arrays_with_their_time_base(demo_store: Path) -> None:
    with labseq.open_store(demo_store) as store:
        captures = store.captures(1, point=3)
        every = list(store.iter_captures("latest"))
    with Store(demo_store, create=False) as raw:
        point = raw.points(1)[3]
        stored = raw.captures(point.id)
    assert [c.name for c in captures] == ["p003_c00", "p003_c01"] and len(every) == 8
    for capture, waveform in zip(captures, stored, strict=True):
        assert capture.point_index == 3 and capture.node == "primary" and capture.run == 1
        assert capture.volts.dtype == np.float64 and capture.volts.shape == capture.time_s.shape
        np.testing.assert_array_equal(capture.volts, waveform.volts())
        # the time base: a sample every x_increment, the trigger at t = 0 inside the record
        assert np.allclose(np.diff(capture.time_s), capture.sample_interval_s)
        assert capture.time_s[0] < 0 < capture.time_s[-1]
        assert capture.clipped is not None and capture.clipped.shape == capture.volts.shape
    assert [c.name for c in every[6:]] == ["p003_c00", "p003_c01"]


def test_bad_names_are_clear(demo_store: Path, tmp_path: Path) -> None:
    with labseq.open_store(demo_store) as store:
        with pytest.raises(InputError, match="no run 9; runs in this store: 1"):
            store.points(9)
        with pytest.raises(InputError, match="no point 7"):
            store.captures(1, point=7)
        with pytest.raises(InputError, match="give a run id or 'latest'"):
            store.points("first")
    with pytest.raises(InputError, match="no such store"):
        labseq.open_store(tmp_path / "none.sqlite")
    assert not (tmp_path / "none.sqlite").exists()


def test_reading_writes_nothing(demo_store: Path, tmp_path: Path) -> None:
    # a store on an archive share: read through the API, the file and its folder stay as they were
    folder = tmp_path / "archive"
    folder.mkdir()
    db = folder / "labseq.sqlite"
    shutil.copyfile(demo_store, db)
    before = db.read_bytes()
    with labseq.open_store(db, records=True) as store:
        assert len(store.points(1)) == 4 and len(store.captures(1)) == 8 and store.figures(1)
    assert db.read_bytes() == before
    assert sorted(p.name for p in folder.iterdir()) == ["labseq.sqlite"]


def readme_python() -> str:
    """The README's notebook example: its one ``python`` block."""
    blocks = re.findall(
        r"```python\n(.*?)```", (ROOT / "README.md").read_text(encoding="utf-8"), re.S
    )
    assert len(blocks) == 1, "the README has one Python example"
    return blocks[0]


def test_readme_example_runs_as_written(demo_store: Path) -> None:
    pytest.importorskip("pandas")
    code = readme_python()
    assert 'labseq.open_store("labseq.sqlite")' in code
    done = subprocess.run(
        [sys.executable, "-c", code],
        cwd=demo_store.parent,  # the example opens labseq.sqlite in the working directory
        capture_output=True,
        text=True,
        timeout=120,
        env={**os.environ, "MPLBACKEND": "Agg"},
    )
    assert done.returncode == 0, done.stderr
    name, interval, worst_peak, ring_max = done.stdout.split()
    with Store(demo_store, create=False) as raw:
        review = review_run(raw, 1)
        first = raw.captures(raw.points(1)[0].id)[0]
    assert name == "p000_c00" and float(interval) == first.x_increment_s
    assert float(worst_peak) == review.worst["peak_v"].value
    assert float(ring_max) == first.volts()[first.time_s() >= 0].max()


# --------------------------------------------------------------------------- the store's layout


def test_store_format_doc_decodes_a_capture_bit_for_bit(demo_store: Path) -> None:
    # docs/store-format.md's recipe, run as the doc gives it, with only sqlite3, numpy and
    # zstandard; the recipe reads the capture with id 1.
    doc = (ROOT / "docs" / "store-format.md").read_text(encoding="utf-8")
    recipe = re.search(r"```python\n(.*?)```", doc, re.S).group(1)
    assert re.findall(r"^(?:import|from) (\S+)", recipe, re.M) == ["sqlite3", "numpy", "zstandard"]
    assert "volts = (codes.astype(np.float64) - yref) * dy + y0" in recipe
    here = os.getcwd()
    os.chdir(demo_store.parent)
    try:
        scope: dict[str, object] = {}
        exec(compile(recipe, "store-format.md", "exec"), scope)
    finally:
        os.chdir(here)
    with sqlite3.connect(demo_store) as db:
        assert db.execute("SELECT codec FROM captures WHERE id = 1").fetchone()[0] == "zstd"
    with labseq.open_store(demo_store) as store:
        api = store.captures(1, point=0)[0]
    assert api.name == "p000_c00"
    assert scope["volts"].dtype == api.volts.dtype
    assert scope["volts"].tobytes() == api.volts.tobytes()  # bit for bit
    assert scope["time_s"].tobytes() == api.time_s.tobytes()


def test_store_format_doc_names_every_table_and_column(demo_store: Path) -> None:
    doc = (ROOT / "docs" / "store-format.md").read_text(encoding="utf-8")
    version = re.search(r"describes schema version (\d+)", doc)
    with sqlite3.connect(f"file:{demo_store}?mode=ro", uri=True) as db:
        assert int(version.group(1)) == db.execute("SELECT version FROM schema_info").fetchone()[0]
        tables = [row[0] for row in db.execute("SELECT name FROM sqlite_master WHERE type='table'")]
        for table in tables:
            assert f"`{table}`" in doc, table
            for column in db.execute(f"SELECT name FROM pragma_table_info('{table}')"):
                assert f"`{column[0]}`" in doc, (table, column[0])


# --------------------------------------------------------------------------- matplotlib


def test_importing_labseq_leaves_matplotlib_alone() -> None:
    # A notebook chooses its backend; importing every labseq module must not change it nor
    # load pyplot (which picks a backend of its own when first imported).
    script = textwrap.dedent(
        """
        import importlib, pkgutil, sys
        import matplotlib
        matplotlib.use("svg")
        import labseq, labseq_instruments, labseq_sim_instruments
        names = []
        for package in (labseq, labseq_instruments, labseq_sim_instruments):
            for module in pkgutil.walk_packages(package.__path__, package.__name__ + "."):
                if not module.name.endswith("__main__"):
                    importlib.import_module(module.name)
                    names.append(module.name)
        labseq.open_store
        assert "labseq.report.plots" in names and "labseq.notebook" in names, names
        print(len(names), matplotlib.get_backend(), "matplotlib.pyplot" in sys.modules)
        """
    )
    done = subprocess.run(
        [sys.executable, "-c", script],
        capture_output=True,
        text=True,
        timeout=120,
        env={k: v for k, v in os.environ.items() if k != "MPLBACKEND"},
    )
    assert done.returncode == 0, done.stderr
    count, backend, pyplot = done.stdout.split()
    assert int(count) > 50 and backend == "svg" and pyplot == "False"


def test_report_draws_without_pyplot(tmp_path: Path) -> None:
    from test_report import make_run

    db = tmp_path / "store.sqlite"
    with Store(db) as store:
        make_run(store)
    script = textwrap.dedent(
        f"""
        import sys
        from labseq.cli import main
        try:
            main(["report", "1", "--db", {str(db)!r}, "--out", {str(tmp_path / "r")!r}])
        except SystemExit as exc:
            assert not exc.code, exc.code
        print("matplotlib.pyplot" in sys.modules)
        """
    )
    done = subprocess.run(
        [sys.executable, "-c", script], capture_output=True, text=True, timeout=120
    )
    assert done.returncode == 0, done.stderr
    assert done.stdout.splitlines()[-1] == "False"
    assert len(list((tmp_path / "r").glob("*.png"))) >= 4


def test_no_module_imports_pyplot_or_chooses_a_backend() -> None:
    # Also inside functions, where importing every module would not find it (a plot drawn on
    # demand must not switch the notebook's backend either).
    from test_layering import _imported_modules

    offenders = []
    for package in ("labseq", "instruments", "sim_instruments"):
        for path in sorted((ROOT / package).rglob("*.py")):
            text = path.read_text(encoding="utf-8")
            if "matplotlib.pyplot" in _imported_modules(path) or re.search(
                r"from matplotlib import [^\n]*\bpyplot\b", text
            ):
                offenders.append(f"{path.relative_to(ROOT)} imports pyplot")
            if re.search(r"matplotlib\.use\(|\.switch_backend\(", text):
                offenders.append(f"{path.relative_to(ROOT)} chooses a backend")
    assert offenders == []
