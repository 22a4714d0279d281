"""Reading a run's captures back, and resuming a finished run, against plain SQLite reads.

A finished run of 16 points × 3 captures of 1 M int8 samples (the DC demo's grid at a long
record; every capture analysed, every point judged) is stored twice: codes raw and codes
compressed (the default). Timed interleaved in every repeat (tests/benchmarks/paired.py):

* ``Store.iter_captures`` of the run, every capture's codes as an array, against the least a
  reader must do: plain sqlite3 fetching the same blobs by id (and, for the compressed store,
  decompressing them). Target: median ratio ≤ 1.5.
* the single query that sorted the rows with their codes (labseq's read path before it read
  codes by id), on the raw store: compressed read-back must be no slower than it.
* what ``resume`` reads of a finished run before touching the bench
  (``runner.analyse_run(..., only_missing=True)``), against reading the run's point and capture
  rows without codes through the store (``Store.points`` and ``Store.iter_captures(...,
  with_codes=False)``, the same Python records a resume builds). Target: median ratio ≤ 2. Its
  ratio to plain sqlite3 fetching those rows as tuples is printed too.
"""

from __future__ import annotations

import sqlite3
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pytest
import zstandard
from bench_storage import ringing_capture
from paired import interleaved_times, paired

from labseq.pipeline import analyse_run
from labseq.sequence import load_sequence
from labseq.store import CAPTURE_FIGURES, CaptureRecord, Store

DEMO = Path(__file__).resolve().parents[2] / "labseq" / "examples" / "demo_dc_flyback.toml"
POINTS = 16
CAPTURES_PER_POINT = 3
SAMPLES = 1_000_000
REPEATS = 11
#: Calls per timed sample of the sub-millisecond reads, for a figure above the timer's noise.
SHORT_CALLS = 10
MAX_READBACK_RATIO = 1.5
MAX_RESUME_RATIO = 2.0

#: The capture columns but the codes.
HEADER_COLUMNS = (
    "id, point_id, run_id, capture_index, node, channel, dtype, x_increment_s, x_origin_s, "
    "y_increment_v, y_origin_v, y_reference, code_min, code_max, points, captured_at"
)


def store_finished_run(path: Path, codec: str) -> int:
    """A finished run with figures for every capture and a verdict for every point."""
    rng = np.random.default_rng(11)
    records = [ringing_capture(rng, SAMPLES, 100.0 + 10 * k) for k in range(4)]
    with Store(path, codec=codec) as store:
        run_id = store.create_run(
            sequence_text=DEMO.read_text(encoding="utf-8"),
            sequence_sha256="0" * 64,
            sequence_path=str(DEMO),
            dut_label="Telecom 36-75 V DC flyback, 12 V 2.2 A",
            snubber_label="RC 100 ohm / 220 pF (stock)",
            bench_kind="sim",
        )
        grid = [(36.0 + 13 * (i // 4), 0.55 * (1 + i % 4)) for i in range(POINTS)]
        for index, point_id in enumerate(store.add_points(run_id, grid, line_is_ac=False)):
            captures = [
                CaptureRecord(records[(index + k) % len(records)], node="primary")
                for k in range(CAPTURES_PER_POINT)
            ]
            for capture_id in store.commit_point(point_id, captures=captures):
                store.set_capture_figures(capture_id, dict.fromkeys(CAPTURE_FIGURES, 1.0))
            store.set_point_judgement(point_id, {}, {}, "pass", [])
        store.set_run_status(run_id, "finished")
        store.checkpoint()
    return run_id


def sorted_join_read(conn: sqlite3.Connection, run_id: int) -> int:
    """The query labseq read captures with before: the rows sorted together with their codes."""
    query = (
        "SELECT c.id, c.dtype, c.codes FROM captures c JOIN points p ON p.id = c.point_id "
        "WHERE c.run_id = ? ORDER BY p.point_index, c.capture_index, c.id"
    )
    return sum(np.frombuffer(codes, np.int8).size for _, _, codes in conn.execute(query, [run_id]))


def repeated(action: Callable[[], object]) -> None:
    for _ in range(SHORT_CALLS):
        action()


@pytest.mark.benchmark
def test_readback_and_resume(tmp_path: Path) -> None:
    sequence = load_sequence(DEMO)
    paths = {codec: tmp_path / f"{codec}.sqlite" for codec in ("raw", "zstd")}
    run_ids = {codec: store_finished_run(path, codec) for codec, path in paths.items()}
    assert run_ids["raw"] == run_ids["zstd"]
    run_id = run_ids["raw"]
    stores = {codec: Store(path, create=False) for codec, path in paths.items()}
    plain = {codec: sqlite3.connect(path) for codec, path in paths.items()}
    ids = [row[0] for row in plain["raw"].execute("SELECT id FROM captures ORDER BY id")]
    decompressor = zstandard.ZstdDecompressor()
    total = POINTS * CAPTURES_PER_POINT * SAMPLES

    def read_back(codec: str) -> int:
        return sum(capture.codes.size for capture in stores[codec].iter_captures(run_id))

    def blobs_by_id(codec: str) -> int:
        query = "SELECT codes FROM captures WHERE id = ?"
        blobs = (plain[codec].execute(query, [capture_id]).fetchone()[0] for capture_id in ids)
        if codec == "zstd":
            blobs = (decompressor.decompress(blob) for blob in blobs)
        return sum(np.frombuffer(blob, np.int8).size for blob in blobs)

    def resume_reads() -> int:
        return analyse_run(stores["zstd"], sequence, run_id, only_missing=True)

    def rows_without_codes() -> int:
        store = stores["zstd"]
        headers = store.iter_captures(run_id, with_codes=False)
        return len(store.points(run_id)) + sum(1 for _ in headers)

    def plain_rows_without_codes() -> int:
        conn = plain["zstd"]
        points = conn.execute("SELECT * FROM points WHERE run_id = ?", [run_id]).fetchall()
        query = f"SELECT {HEADER_COLUMNS} FROM captures WHERE run_id = ?"
        return len(points) + len(conn.execute(query, [run_id]).fetchall())

    try:
        assert read_back("raw") == read_back("zstd") == blobs_by_id("zstd") == total
        assert sorted_join_read(plain["raw"], run_id) == total
        assert resume_reads() == 0  # nothing missing: no capture analysed again
        times = interleaved_times(
            {
                "read-back raw": lambda: read_back("raw"),
                "blobs by id raw": lambda: blobs_by_id("raw"),
                "read-back zstd": lambda: read_back("zstd"),
                "blobs by id zstd": lambda: blobs_by_id("zstd"),
                "sorted join raw": lambda: sorted_join_read(plain["raw"], run_id),
                "resume": lambda: repeated(resume_reads),
                "rows without codes": lambda: repeated(rows_without_codes),
                "plain rows without codes": lambda: repeated(plain_rows_without_codes),
            },
            REPEATS,
        )
    finally:
        for store in stores.values():
            store.close()
        for conn in plain.values():
            conn.close()
    sizes = {codec: path.stat().st_size / total for codec, path in paths.items()}
    raw = paired(times, "read-back raw", "blobs by id raw")
    packed = paired(times, "read-back zstd", "blobs by id zstd")
    before = paired(times, "read-back zstd", "sorted join raw")
    before_raw = paired(times, "read-back raw", "sorted join raw")
    resume = paired(times, "resume", "rows without codes")
    resume_plain = paired(times, "resume", "plain rows without codes")
    print(
        f"\nread-back of {POINTS * CAPTURES_PER_POINT} × {SAMPLES:,} int8 samples "
        f"(raw {sizes['raw']:.3f} B/sample, zstd {sizes['zstd']:.3f} B/sample):\n"
        f"  raw codes, iter_captures / plain blobs by id: {raw.summary()}\n"
        f"  zstd codes, iter_captures / plain blobs by id + decompress: {packed.summary()}\n"
        f"  zstd codes, iter_captures / the former sorted join on raw codes: {before.summary()}\n"
        f"  raw codes, iter_captures / the former sorted join: {before_raw.summary()}\n"
        f"  resume of the finished run / its rows without codes: {resume.summary()}\n"
        f"  resume of the finished run / those rows as plain tuples: {resume_plain.summary()}"
    )
    assert raw.median <= MAX_READBACK_RATIO
    assert packed.median <= MAX_READBACK_RATIO
    assert before.median <= 1.0
    assert resume.median <= MAX_RESUME_RATIO
