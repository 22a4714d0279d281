"""Run integrity and bad input: every error names its file and what is wrong, exits with the
documented status (2 bad input, 3 bench, instrument or store failure), and leaves a true run
status (never "running" once the process is gone); what the user must see reaches the console,
the store and the report.

The cases are those a reliability pass found ending in the catch-all "unexpected error" or in a
misleading message; each is a test here (``CASES`` counts them for the summary at the end).
"""

from __future__ import annotations

import json
import os
import shutil
import sqlite3
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from sweeps import demo_sequence, run_cli

import labseq.store as store_module
from labseq.bench import SafeReport, make_safe
from labseq.runlog import judgements
from labseq.store import Store, shown_status
from labseq_instruments.scpi import Identity
from labseq_instruments.text import printable

#: The store of one small finished run on the simulated bench, made once for the module.


@pytest.fixture(scope="module")
def base_run(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    """(sequence file, store) of a two-point run with two captures per point."""
    folder = tmp_path_factory.mktemp("base")
    sequence = demo_sequence(folder, lines=["36 V", "48 V"], loads=["0.5 A"], captures=2)
    db = folder / "base.sqlite"
    code, _, err = run_cli("run", str(sequence), "--db", str(db), "--quiet", "--label", "base")
    assert code == 0, err
    return sequence, db


@pytest.fixture
def db(base_run: tuple[Path, Path], tmp_path: Path) -> Path:
    """A copy of the base run's store for one test to change."""
    copy = tmp_path / "store.sqlite"
    shutil.copyfile(base_run[1], copy)
    return copy


def no_traceback(err: str) -> bool:
    return "Traceback" not in err and "unexpected error" not in err


# ------------------------------------------------------------------ files named by the user


def test_deeply_nested_toml_is_a_clear_error(tmp_path: Path) -> None:
    path = tmp_path / "deep.toml"
    path.write_text("a = " + "[" * 50_000 + "]" * 50_000 + "\n")
    code, _, err = run_cli("check", str(path))
    assert code == 2 and str(path) in err and "nested too deeply" in err and no_traceback(err)


def test_byte_order_mark_in_a_sequence_is_accepted(base_run, tmp_path: Path) -> None:
    path = tmp_path / "bom.toml"
    path.write_bytes(b"\xef\xbb\xbf" + base_run[0].read_bytes())
    code, out, err = run_cli("check", str(path))
    assert code == 0 and f"{path}: ok" in out, err


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="named pipes are POSIX")
def test_fifo_sequence_is_not_a_regular_file(tmp_path: Path) -> None:
    path = tmp_path / "pipe.toml"
    os.mkfifo(path)  # nobody writes to it: opening it to read would block for ever
    code, _, err = run_cli("check", str(path))
    assert code == 2 and str(path) in err and "is a named pipe (FIFO), not a regular file" in err
    assert "no such file" not in err


@pytest.mark.skipif(not Path("/dev/zero").exists(), reason="needs /dev/zero")
def test_link_to_dev_zero_is_not_a_regular_file(tmp_path: Path) -> None:
    link = tmp_path / "zero.toml"
    link.symlink_to("/dev/zero")  # reading it would never end
    code, _, err = run_cli("check", str(link))
    assert code == 2 and "is a character device, not a regular file" in err
    store_link = tmp_path / "zero.sqlite"
    store_link.symlink_to("/dev/zero")
    code, _, err = run_cli("runs", "--db", str(store_link))
    assert code == 2 and "is a character device, not a regular file" in err


def test_huge_one_line_csv_is_not_echoed(tmp_path: Path) -> None:
    path = tmp_path / "one_line.csv"
    with path.open("w") as handle:
        handle.write("1," * 25_000_000 + "\n")  # 50 MB on one line
    code, _, err = run_cli("analyze", str(path))
    assert code == 2 and str(path) in err and len(err) < 600 and no_traceback(err)


def test_huge_value_in_a_sequence_is_not_echoed(base_run, tmp_path: Path) -> None:
    path = tmp_path / "huge.toml"
    text = base_run[0].read_text()
    path.write_text(text.replace('kind = "sim"', f'kind = "{"x" * 1_000_000}"', 1))
    code, _, err = run_cli("check", str(path))
    assert code == 2 and "bench.kind" in err and len(err) < 2000


# ------------------------------------------------------------------ run ids and export targets


@pytest.mark.parametrize("command", ["report", "export", "log", "analyze-run"])
def test_run_id_beyond_64_bits_is_bad_input(db: Path, command: str) -> None:
    code, _, err = run_cli(command, "99999999999999999999999", "--db", str(db))
    assert code == 2 and no_traceback(err), err
    assert f"{db}: RUN '9999" in err and "no run has that id" in err


def test_export_onto_an_existing_file_or_unwritable_place(db: Path, tmp_path: Path) -> None:
    existing = tmp_path / "points.txt"
    existing.write_text("keep me")
    code, _, err = run_cli("export", "1", "--db", str(db), "--out", str(existing))
    assert code == 2 and f"--out {existing}: is a file, not a directory" in err
    assert existing.read_text() == "keep me"
    below_a_file = existing / "export"  # a directory cannot be made under a file, even by root
    code, _, err = run_cli("export", "1", "--db", str(db), "--out", str(below_a_file))
    assert code == 2 and f"--out {below_a_file}: cannot write the export there" in err
    assert no_traceback(err)


# ------------------------------------------------------------------ damaged stores


def _damage_pages(path: Path, first_fraction: float) -> None:
    """Overwrite the file from ``first_fraction`` of its pages on with garbage, keeping the
    last page (the captures, stored last, are where the damage lands)."""
    with sqlite3.connect(path) as conn:
        conn.execute("PRAGMA wal_checkpoint(TRUNCATE)")
        page_size = conn.execute("PRAGMA page_size").fetchone()[0]
        pages = conn.execute("PRAGMA page_count").fetchone()[0]
    conn.close()
    start = max(2, int(pages * first_fraction))
    rng = np.random.default_rng(7)
    with path.open("r+b") as handle:
        handle.seek(start * page_size)
        handle.write(rng.integers(0, 256, (pages - start - 1) * page_size, np.uint8).tobytes())


@pytest.mark.parametrize(
    "args",
    [
        ["report", "1", "--out", "{tmp}/report"],
        ["export", "1", "--out", "{tmp}/x"],
        ["analyze-run", "1"],
    ],
    ids=["report", "export", "analyze-run"],
)
def test_store_with_damaged_pages(db: Path, tmp_path: Path, args: list[str]) -> None:
    _damage_pages(db, 0.3)
    code, _, err = run_cli(*(a.format(tmp=tmp_path) for a in args), "--db", str(db))
    assert code == 3, err
    assert str(db) in err and ("damaged" in err) and no_traceback(err)


def test_int16_capture_with_an_odd_length_blob(db: Path, tmp_path: Path) -> None:
    with sqlite3.connect(db) as conn:
        capture_id, count = conn.execute("SELECT id, points FROM captures LIMIT 1").fetchone()
        blob = np.arange(count, dtype="<i2").tobytes() + b"\x01"  # one byte too many
        conn.execute(
            "UPDATE captures SET dtype = 'int16', codec = 'raw', codes = ? WHERE id = ?",
            [blob, capture_id],
        )
    conn.close()
    code, _, err = run_cli("export", "1", "--db", str(db), "--out", str(tmp_path / "x"))
    assert code == 3 and f"capture {capture_id} is damaged" in err and str(db) in err
    assert no_traceback(err)


def test_invalid_json_in_run_instruments_does_not_break_runs(db: Path) -> None:
    with sqlite3.connect(db) as conn:
        conn.execute("UPDATE runs SET instruments = '{not json'")
    conn.close()
    code, out, err = run_cli("runs", "--db", str(db))
    assert code == 0 and "finished" in out, err
    code, out, _ = run_cli("runs", "--db", str(db), "--json")
    assert code == 0 and json.loads(out)[0]["status"] == "finished"
    with Store(db) as store:
        assert "(damaged)" in store.run(1).instruments


def test_invalid_json_in_a_figures_column(db: Path, tmp_path: Path) -> None:
    with sqlite3.connect(db) as conn:
        point_id = conn.execute("SELECT id FROM points ORDER BY id LIMIT 1").fetchone()[0]
        conn.execute("UPDATE points SET verdict_reasons = '[oops' WHERE id = ?", [point_id])
        conn.execute("UPDATE capture_figures SET edges_json = '{\"names\": ['")
    conn.close()
    code, _, err = run_cli("report", "1", "--db", str(db), "--out", str(tmp_path / "r"))
    assert code == 3 and str(db) in err and no_traceback(err)
    assert f"point {point_id}'s verdict reasons is damaged (not JSON" in err
    with Store(db) as store, pytest.raises(store_module.StoreError, match="edge figures"):
        store.capture_figures(1)


def test_damaged_sequence_text_is_reported_against_the_store(db: Path, base_run) -> None:
    with sqlite3.connect(db) as conn:
        conn.execute("UPDATE runs SET sequence_text = 'name = [unclosed'")
    conn.close()
    code, _, err = run_cli("analyze-run", "1", "--db", str(db))
    assert code == 3 and no_traceback(err)
    first = err.splitlines()[0]
    assert first.startswith(f"labseq: error: {db}: the sequence stored with run 1 (read from ")
    assert "no longer validates" in first and "not valid TOML" in err
    assert f"\n{base_run[0]}:" not in err  # not blamed on the file on disk, which is fine


# ------------------------------------------------------------------ a store that fails


def test_store_held_by_another_writer_at_start(db: Path, base_run, monkeypatch) -> None:
    monkeypatch.setattr(store_module, "BUSY_TIMEOUT_S", 0.2)
    other = sqlite3.connect(db, isolation_level=None)
    other.execute("BEGIN IMMEDIATE")  # another program writing the store
    try:
        code, _, err = run_cli("run", str(base_run[0]), "--db", str(db), "--quiet")
    finally:
        other.execute("ROLLBACK")
        other.close()
    assert code == 3 and str(db) in err and "locked by another process" in err, err
    assert no_traceback(err)
    with Store(db) as store:
        assert [run.status for run in store.runs()] == ["finished"]  # no run left running


@pytest.mark.parametrize("reason", ["database is locked", "database or disk is full"])
def test_store_failing_mid_run_makes_the_bench_safe_and_fails_the_run(
    db: Path, base_run, monkeypatch, reason: str
) -> None:
    commits = []
    original = Store.commit_point

    def failing(self, *args, **kwargs):
        commits.append(1)
        if len(commits) == 2:
            raise sqlite3.OperationalError(reason)
        return original(self, *args, **kwargs)

    monkeypatch.setattr(Store, "commit_point", failing)
    code, _, err = run_cli("run", str(base_run[0]), "--db", str(db), "--quiet")
    assert code == 3 and str(db) in err and reason in err and no_traceback(err), err
    assert "outputs off" in err and "run 2 is marked failed" in err
    with Store(db) as store:
        run = store.run(2)
        assert run.status == "failed" and run.points_done == 0
        safety = [e for e in store.events(2) if e["kind"] == "safety" and e["data"]]
        assert safety[-1]["data"] == {"safe": True, "when": "end of run"}
        assert len(list(store.iter_captures(2, with_codes=False))) == 1  # the first is kept


#: A labseq process whose store gets a size cap (PRAGMA max_page_count) as soon as its run is
#: recorded, so that the first capture meets a real SQLITE_FULL.
FULL_DISK_RUN = """
import sys
import labseq.commands.run as run_command
from labseq.cli import main

original = run_command.start_run

def capped(sequence, store, **kwargs):
    run_id = original(sequence, store, **kwargs)
    pages = store.db.execute("PRAGMA page_count").fetchone()[0]
    store.db.execute(f"PRAGMA max_page_count = {pages + 1}")
    return run_id

run_command.start_run = capped
main(sys.argv[1:])
"""


def test_full_disk_mid_run(db: Path, base_run) -> None:
    """A real SQLITE_FULL in a process of its own: the bench is made safe, the error names the
    store, and once the process is gone the run is failed or, where even its status could not
    be written, shown as interrupted — never running."""
    done = subprocess.run(
        [sys.executable, "-c", FULL_DISK_RUN, "run", str(base_run[0]), "--db", str(db), "--quiet"],
        capture_output=True,
        text=True,
        timeout=120,
    )
    err = done.stderr
    assert done.returncode == 3 and "no room to write" in err and no_traceback(err), err
    assert str(db) in err and "outputs off" in err
    with Store(db) as store:
        run = store.run(2)
        assert shown_status(run) in ("failed", "interrupted")
        assert run.status == "failed" or "status could not be written either" in err
        assert run.points_done == 0
    code, out, _ = run_cli("runs", "--db", str(db), "--json")
    assert code == 0 and json.loads(out)[1]["status"] in ("failed", "interrupted")


def test_bus_message_says_how_long_it_was_watched() -> None:
    class Scope:
        label = "scope"

        def __init__(self, reading: float) -> None:
            self.reading = reading

        def measure_mean_v(self, channel: int) -> float:
            return self.reading

    class Output:
        def switch_off(self) -> None: ...

        def is_on(self) -> bool:
            return False

    class Bench:
        def __init__(self, reading: float) -> None:
            self.scope = Scope(reading)
            self.drivers = {"load": Output(), "source": Output()}
            self.sequence = type("S", (), {"primary": type("P", (), {"channel": 1})})()

        def reopen(self, role: str):
            return self.scope if role == "scope" else self.drivers[role]

    report = make_safe(Bench(90.0), watch_bus=True, timeout_s=0.0, poll_s=0.0)
    assert report.bus == "above" and report.bus_watched_s is not None
    assert report.bus_watched_s < 5.0
    assert f"after {report.bus_watched_s:.0f} s of watching" in report.summary()
    assert "300" not in report.summary() and "after 300 s" not in " ".join(report.messages)
    # 9.9E37 is SCPI's number for infinity (SCPI-1999 vol. 1, 7.2.1.5): no reading at all
    unread = make_safe(Bench(9.9e37), watch_bus=True, timeout_s=300.0, poll_s=0.0)
    assert unread.bus == "unknown" and "inf" not in unread.summary()
    assert isinstance(unread, SafeReport) and "no measurement" in unread.messages[0]


# ------------------------------------------------------------------ true statuses and runs


def test_runs_shows_a_dead_run_as_interrupted_with_its_label(db: Path) -> None:
    with Store(db) as store:
        run_id = store.create_run(
            sequence_text="",
            sequence_sha256="0" * 64,
            sequence_path="gone.toml",
            dut_label="DUT",
            snubber_label="RC",
            bench_kind="sim",
            notes="night run",
        )
        dead = subprocess.run(
            [sys.executable, "-c", "import os; print(os.getpid())"],
            capture_output=True,
            text=True,
            check=True,
        )
        store.db.execute("UPDATE runs SET pid = ? WHERE id = ?", [int(dead.stdout), run_id])
    code, out, err = run_cli("runs", "--db", str(db))
    assert code == 0, err
    row = next(line for line in out.splitlines() if line.strip().startswith(str(run_id)))
    assert "interrupted" in row and "running" not in row and "[night run]" in row
    assert f"run {run_id}: recorded as running, but its process" in out
    assert "[base]" in out  # the label of the finished run
    code, out, _ = run_cli("runs", "--db", str(db), "--json")
    shown = json.loads(out)[-1]
    assert shown["status"] == "interrupted" and shown["recorded_status"] == "running"
    assert shown["label"] == "night run"


# ------------------------------------------------------------------ trust boundaries


def test_visa_library_outside_the_usual_places_needs_an_option(
    base_run, tmp_path: Path, monkeypatch
) -> None:
    library = tmp_path / "libvisa_test.so"
    library.write_bytes(b"\x7fELF")
    path = tmp_path / "lib.toml"
    text = base_run[0].read_text()
    text = text.replace("[bench]\n", f'[bench]\nvisa_library = "{library}"\n', 1)
    path.write_text(text)
    loaded = []
    import pyvisa

    monkeypatch.setattr(pyvisa, "ResourceManager", lambda *a: loaded.append(a))
    line = 1 + text.splitlines().index(f'visa_library = "{library}"')
    for command in (["check"], ["run", "--db", str(tmp_path / "s.sqlite")], ["probe"]):
        code, _, err = run_cli(*command[:1], str(path), *command[1:])
        assert code == 2 and no_traceback(err), err
        assert f"{path}: line {line}, bench.visa_library: '{library}' is a shared library " in err
        assert f"--allow-visa-library {library.resolve()}" in err
    assert loaded == [] and not (tmp_path / "s.sqlite").exists()
    code, out, err = run_cli("check", str(path), "--allow-visa-library", str(library))
    assert code == 0 and f"VISA library: {library} (allowed by --allow-visa-library)" in out


@pytest.mark.parametrize(
    ("spec", "shown"),
    [
        ("@py", "backend @py"),
        ("@sim", "backend @sim"),
        ("@ivi", "backend @ivi"),
        ("libvisa.so", "found by the system's library loader"),
        ("/usr/lib/x86_64-linux-gnu/libvisa.so", "installed in /usr/lib"),
        ("/opt/vendor/lib/libvisa.so@ivi", "installed in /opt/vendor/lib"),
    ],
)
def test_visa_library_in_the_usual_places_is_listed(spec: str, shown: str) -> None:
    from labseq.visa_library import check_visa_library

    assert shown in check_visa_library(spec, where="f.toml: bench.visa_library")


def test_a_link_from_a_usual_place_to_elsewhere_is_refused(tmp_path: Path) -> None:
    from labseq.errors import InputError
    from labseq.visa_library import check_visa_library

    target = tmp_path / "libvisa.so"
    target.write_bytes(b"")
    with pytest.raises(InputError, match="outside the places VISA libraries are installed"):
        check_visa_library(f"{tmp_path}/../{tmp_path.name}/libvisa.so", where="f.toml")


@pytest.mark.parametrize(
    ("raw", "clean"),
    [
        ("ACME\x1b[31mRED\x1b[0m", "ACMERED"),  # ECMA-48 CSI (colour)
        ("A\x1b]0;title\x07B", "AB"),  # OSC up to BEL (window title)
        ("A\x9b2JB", "AB"),  # CSI as its C1 code (clear screen)
        ("line\rover", "line over"),  # a carriage return would overwrite the line
        ("bell\x07 nul\x00 del\x7f esc\x1b", "bell nul del esc"),
        ("plain text, 1.2 V ±5 %", "plain text, 1.2 V ±5 %"),
    ],
)
def test_instrument_text_is_printable(raw: str, clean: str) -> None:
    assert printable(raw) == clean


def test_identity_and_error_texts_are_stripped() -> None:
    identity = Identity.parse("ACME\x1b[31m,Model 7\x1b[0m,SN\r42,1.0\x9b2J")
    assert identity == Identity("ACME", "Model 7", "SN 42", "1.0")
    from labseq_instruments.scpi import ScpiInstrument

    parsed = ScpiInstrument._parse_error(
        type("I", (), {"reply_error": None})(), '-113,"Undefined header\x1b[2J"'
    )
    assert parsed == (-113, "Undefined header")


# ------------------------------------------------------------------ what the user sees


def test_a_failed_point_says_why_on_the_console_and_in_the_store(tmp_path: Path) -> None:
    sequence = demo_sequence(tmp_path, lines=["36 V", "48 V"], loads=["0.5 A"], captures=1)
    db = tmp_path / "s.sqlite"
    code, _, err = run_cli(
        "run",
        str(sequence),
        "--db",
        str(db),
        "--quiet",
        "--sim-faults",
        "scope:no-trigger@point=2",
    )
    assert code == 3  # a point missing after an instrument failure
    assert "point 2: " in err and "trigger did not fire within 2 s - skipped" in err
    with Store(db) as store:
        failed = store.points(1, status="failed")
        assert [p.point_index for p in failed] == [1]
        why = [e for e in store.events(1) if e["point_id"] == failed[0].id]
        assert any("trigger did not fire within 2 s" in e["message"] for e in why)


@pytest.fixture(scope="module")
def clipped_run(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, str]:
    """A run whose scope screen (5 V/div around 100 V: 75 V to 125 V) cuts every capture."""
    folder = tmp_path_factory.mktemp("clipped")
    sequence = demo_sequence(folder, lines=["36 V", "48 V"], loads=["0.5 A"], captures=2)
    sequence.write_text(
        sequence.read_text().replace('volts_per_div = "25 V"', 'volts_per_div = "5 V"', 1)
    )
    db = folder / "clipped.sqlite"
    code, _, err = run_cli("run", str(sequence), "--db", str(db))
    assert code == 0, err
    return db, err


def test_a_clipped_capture_warns_once_per_point(clipped_run) -> None:
    _, err = clipped_run
    text = " ".join(err.split())
    for point in (1, 2):
        assert text.count(f"point {point}: capture ") == 1
    assert "primary clipped at the bottom (75 V) of the screen" in text


def test_exported_capture_csv_carries_the_screen_limits(clipped_run, tmp_path: Path) -> None:
    db, _ = clipped_run
    out = tmp_path / "export"
    code, _, err = run_cli("export", "1", "--db", str(db), "--out", str(out), "--captures", "csv")
    assert code == 0, err
    capture = out / "captures" / "p000_c00.csv"
    head = capture.read_text().splitlines()[:4]
    assert head[0] == "Source,labseq run 1 capture p000_c00 on the SIMULATED bench"
    assert head[1].startswith("Screen Bottom V,") and head[2].startswith("Screen Top V,")
    assert head[3] == "time_s,volts"
    from labseq.waveform_files import read_waveform

    record = read_waveform(capture)
    with Store(db) as store:
        stored = next(store.iter_captures(1))
    # the screen's edges: the bottom and top codes through the stored scaling (IEEE 488.2
    # preamble: volts = (code - y_reference) * y_increment + y_origin)
    edges = np.array([stored.code_min, stored.code_max], dtype=np.float64)
    expected = (edges - stored.y_reference) * stored.y_increment_v + stored.y_origin_v
    written = [float(line.split(",")[1]) for line in head[1:3]]
    np.testing.assert_allclose(written, expected, rtol=1e-8)
    assert written[0] == pytest.approx(75.0, abs=0.5)  # 100 V - 5 divisions of 5 V
    assert record.clipped is not None
    np.testing.assert_array_equal(record.clipped, stored.clip_mask())
    assert record.clipped.any()


def test_exports_of_a_simulated_run_are_marked(db: Path, tmp_path: Path) -> None:
    out = tmp_path / "export"
    code, _, err = run_cli("export", "1", "--db", str(db), "--out", str(out))
    assert code == 0, err
    import csv

    with (out / "points.csv").open(newline="") as handle:
        rows = list(csv.DictReader(handle))
    assert rows and all(row["bench"] == "SIMULATED" for row in rows)
    with np.load(out / "captures.npz") as archive:
        facts = json.loads(str(archive["run"]))
    assert facts == {"run_id": 1, "bench_kind": "sim", "simulated": True}


def test_analyze_run_with_another_sequence_records_and_reports_the_rejudging(
    db: Path, base_run, tmp_path: Path
) -> None:
    tight = tmp_path / "tight.toml"
    tight.write_text(base_run[0].read_text().replace("[limits]", '[limits]\nmax_peak = "70 V"', 1))
    code, out, err = run_cli("analyze-run", "1", "--db", str(db), "--sequence", str(tight))
    assert code == 0 and "points: 2 fail" in out, err
    [judgement] = judgements(Store(db), 1)
    assert judgement.rejudged and judgement.same_grid
    assert judgement.sequence_path == str(tight.resolve())
    assert judgement.limits["primary"]["max_peak_v"] == 70.0
    import hashlib

    assert judgement.sequence_sha256 == hashlib.sha256(tight.read_bytes()).hexdigest()
    code, _, err = run_cli("report", "1", "--db", str(db), "--out", str(tmp_path / "r"))
    html = (tmp_path / "r" / "report.html").read_text()
    assert code == 0 and 'id="rejudged"' in html and str(tight.resolve()) in html
    assert "Limits of the re-judging" in html and "70 V" in html
    # the run's own sequence again: the report no longer says it was re-judged
    code, _, _ = run_cli("analyze-run", "1", "--db", str(db))
    assert [j.source for j in judgements(Store(db), 1)] == ["file", "stored"]
    run_cli("report", "1", "--db", str(db), "--out", str(tmp_path / "r2"))
    assert 'id="rejudged"' not in (tmp_path / "r2" / "report.html").read_text()


def test_analyze_run_refuses_another_grid_unless_asked(db: Path, base_run, tmp_path: Path) -> None:
    other = tmp_path / "other.toml"
    text = base_run[0].read_text()
    other.write_text(text.replace('line_values = ["36 V", "48 V"]', 'line_values = ["36 V"]'))
    assert other.read_text() != text
    code, _, err = run_cli("analyze-run", "1", "--db", str(db), "--sequence", str(other))
    assert code == 2 and f"{other}: its grid (1 points" in err and "--allow-other-grid" in err
    assert judgements(Store(db), 1) == []
    code, out, err = run_cli(
        "analyze-run", "1", "--db", str(db), "--sequence", str(other), "--allow-other-grid"
    )
    assert code == 0 and "grid is not the run's" in out, err
    assert not judgements(Store(db), 1)[-1].same_grid


def test_a_long_or_escaped_reply_is_quoted_short_and_inert() -> None:
    from labseq_instruments.errors import ReplyFormatError
    from labseq_instruments.scpi import ScpiInstrument

    class Stub:
        label = "meter"

        def __init__(self, reply: str) -> None:
            self.reply = reply

        def query(self, command: str) -> str:
            return self.reply

        def reply_error(self, text: str) -> ReplyFormatError:
            return ReplyFormatError(f"{self.label}: {text}")

    with pytest.raises(ReplyFormatError) as caught:
        ScpiInstrument.query_float(Stub("\x1b[2J" + "7" * 1_000_000), "MEAS:VOLT?")
    message = str(caught.value)
    assert len(message) < 200 and "\x1b" not in message and "\\x1b[2J" in message
