"""Storage cost of a realistic run: bytes in the database file per stored 8-bit sample.

A run of 16 points × 3 captures of int8 codes (a ringing switch node quantised as an 8-bit scope
sends it, four turn-off edges per record) stored as the runner stores it: the demo sequence's
text, every capture with its scaling, per-capture figures with one row per edge, per-point
figures, a verdict and two events per point. The baseline, measured in the same run, is the raw
payload written to a plain file (one byte per sample); the whole database file, write-ahead log
folded in, should cost at most 1.05 bytes per sample.
"""

from __future__ import annotations

import sqlite3
import time
from pathlib import Path

import numpy as np
import pytest

from instruments import Waveform
from labseq.store import CAPTURE_FIGURES, PAGE_SIZE, CaptureRecord, PointReadings, Store

SEQUENCE = Path(__file__).resolve().parents[2] / "sequences" / "demo_dc_flyback.toml"
LINES_V = (36.0, 48.0, 60.0, 75.0)
LOADS_A = (0.55, 1.1, 1.65, 2.2)
CAPTURES_PER_POINT = 3
EDGES_PER_CAPTURE = 4
MAX_BYTES_PER_SAMPLE = 1.05


def ringing_capture(rng: np.random.Generator, samples: int, plateau_v: float) -> Waveform:
    """A switch-node record at 1 GS/s as 8-bit codes: turn-off every 5 µs, 15 MHz ring, noise."""
    x_increment_s = 1e-9
    t_s = np.arange(samples) * x_increment_s - 1e-6
    phase_s = np.mod(t_s, 5e-6)
    ring_v = 0.4 * plateau_v * np.exp(-phase_s / 150e-9) * np.sin(2 * np.pi * 15e6 * phase_s)
    volts = np.where(phase_s < 2.5e-6, plateau_v + ring_v, 0.0) + rng.normal(0.0, 0.5, samples)
    y_increment_v, y_origin_v = 250.0 / 256, 100.0
    codes = np.clip(np.round((volts - y_origin_v) / y_increment_v), -128, 127).astype(np.int8)
    return Waveform(
        codes=codes,
        x_increment_s=x_increment_s,
        x_origin_s=-1e-6,
        y_increment_v=y_increment_v,
        y_origin_v=y_origin_v,
        y_reference=0.0,
        code_min=-128,
        code_max=127,
    )


def figures(rng: np.random.Generator) -> dict[str, float]:
    """Figures of one edge with full-precision values, as an analysis produces them."""
    return {
        name: float(rng.uniform(0.5, 2.0)) * 10.0 ** rng.integers(-9, 3) for name in CAPTURE_FIGURES
    }


def store_realistic_run(path: Path, samples: int) -> int:
    """Write the run; return the number of samples stored."""
    rng = np.random.default_rng(7)
    stored = 0
    with Store(path) as store:
        run_id = store.create_run(
            sequence_text=SEQUENCE.read_text(encoding="utf-8"),
            sequence_sha256="0" * 64,
            sequence_path=str(SEQUENCE),
            dut_label="Telecom 36-75 V DC flyback, 12 V 2.2 A",
            snubber_label="RC 100 ohm / 220 pF (stock)",
            bench_kind="sim",
            instruments={
                role: f"LABSEQ,SIM-{role.upper()},0,0.1.0"
                for role in ("source", "load", "meter", "scope")
            },
        )
        grid = [(line_v, load_a) for line_v in LINES_V for load_a in LOADS_A]
        point_ids = store.add_points(run_id, grid, line_is_ac=False)
        for point_id, (line_v, _) in zip(point_ids, grid, strict=True):
            started = time.time()
            store.log_event(run_id, "info", "settled", point_id=point_id, data={"settle_s": 0.05})
            records = [
                CaptureRecord(ringing_capture(rng, samples, 2 * line_v + 25.0))
                for _ in range(CAPTURES_PER_POINT)
            ]
            stored += sum(record.waveform.codes.size for record in records)
            readings = PointReadings(*(float(value) for value in rng.uniform(0.1, 100.0, size=10)))
            capture_ids = store.commit_point(
                point_id, captures=records, readings=readings, started_at=started
            )
            for capture_id in capture_ids:
                edges = [figures(rng) for _ in range(EDGES_PER_CAPTURE)]
                store.set_capture_figures(capture_id, edges[0], edges=edges)
            store.set_point_figures(
                point_id,
                {
                    name: {
                        "worst": rng.uniform(),
                        "mean": rng.uniform(),
                        "spread": rng.uniform(),
                        "n": 3,
                    }
                    for name in CAPTURE_FIGURES
                },
            )
            store.set_point_verdict(point_id, "pass", [])
            store.log_event(run_id, "timing", "point done", point_id=point_id, data={"s": 0.41})
        store.set_run_status(run_id, "finished")
        store.checkpoint()
    return stored


def table_bytes(path: Path) -> dict[str, int]:
    """Bytes of pages per table and index (SQLite's dbstat table, when built in)."""
    conn = sqlite3.connect(path)
    try:
        rows = conn.execute("SELECT name, SUM(pgsize) FROM dbstat GROUP BY name ORDER BY 2 DESC")
        return dict(rows.fetchall())
    except sqlite3.OperationalError:
        return {}
    finally:
        conn.close()


@pytest.mark.benchmark
@pytest.mark.parametrize("samples", [20_000, 100_000])
def test_storage_cost_per_sample(tmp_path: Path, samples: int) -> None:
    """The whole file is held to 1.05 bytes/sample for 100 k-sample records (a usual scope
    record for this job). For the demo's short 20 k-sample records the per-capture figures (about
    2 kB each, four edges at full precision) cost more than 5 % on their own, so there only the
    captures table (codes, scaling, page rounding) is held to 1.05; the whole-file figure is
    printed."""
    db_path = tmp_path / "run.sqlite"
    start = time.perf_counter()
    stored = store_realistic_run(db_path, samples)
    store_s = time.perf_counter() - start
    wal_path = db_path.with_name(db_path.name + "-wal")
    wal_bytes = wal_path.stat().st_size if wal_path.exists() else 0
    file_bytes = db_path.stat().st_size + wal_bytes

    # Baseline: the same payload, one byte per int8 sample, written to a plain file.
    rng = np.random.default_rng(7)
    raw_path = tmp_path / "raw.bin"
    start = time.perf_counter()
    with raw_path.open("wb") as handle:
        for _ in range(stored // samples):
            handle.write(ringing_capture(rng, samples, 100.0).codes.tobytes())
    raw_s = time.perf_counter() - start
    raw_bytes = raw_path.stat().st_size

    breakdown = ", ".join(f"{name} {size}" for name, size in table_bytes(db_path).items())
    print(
        f"\nstorage, {samples}-sample captures, page size {PAGE_SIZE} B: {stored} samples, "
        f"database {file_bytes} B (WAL {wal_bytes} B), raw {raw_bytes} B -> "
        f"{file_bytes / stored:.4f} bytes/sample (ratio to raw {file_bytes / raw_bytes:.4f}); "
        f"store {store_s:.3f} s vs raw file {raw_s:.3f} s (ratio {store_s / raw_s:.1f})\n"
        f"  bytes by table: {breakdown}"
    )
    assert raw_bytes == stored
    if samples >= 100_000:
        assert file_bytes / stored <= MAX_BYTES_PER_SAMPLE
    else:
        captures_bytes = table_bytes(db_path).get("captures")
        if captures_bytes is None:
            pytest.skip("this SQLite has no dbstat table to measure the captures table alone")
        print(f"  captures table alone: {captures_bytes / stored:.4f} bytes/sample")
        assert captures_bytes / stored <= MAX_BYTES_PER_SAMPLE
