"""Storage cost of a realistic run: bytes in the database file per stored 8-bit sample.

A run of 16 points × 3 captures × 20 000 int8 samples (a ringing switch node, quantised as an
8-bit scope sends it) with per-capture and per-point figures and a few events per point. The
baseline is the raw payload (one byte per sample) measured in the same run; the whole database
file, write-ahead log folded in, must cost at most 1.05 bytes per sample.
"""

from __future__ import annotations

import time
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pytest

from labseq.store import CAPTURE_FIGURES, PAGE_SIZE, CaptureRecord, PointReadings, Store

LINES_V = (36.0, 48.0, 60.0, 75.0)
LOADS_A = (0.6, 1.2, 1.8, 2.4)
CAPTURES_PER_POINT = 3
SAMPLES = 20_000
MAX_BYTES_PER_SAMPLE = 1.05
import os
EDGES = int(os.environ.get('EDGES', 4))


def ringing_codes(rng: np.random.Generator, plateau_v: float) -> SimpleNamespace:
    """A switch-node record as an 8-bit scope sends it: edges every 5 µs, 20 MHz ring, noise."""
    x_increment_s = 1e-9
    t_s = np.arange(SAMPLES) * x_increment_s - 1e-6
    phase_s = np.mod(t_s, 5e-6)
    off = phase_s < 2.5e-6
    ring_v = 0.4 * plateau_v * np.exp(-phase_s / 150e-9) * np.sin(2 * np.pi * 20e6 * phase_s)
    volts = np.where(off, plateau_v + ring_v, 0.0) + rng.normal(0.0, 0.5, SAMPLES)
    y_increment_v, y_origin_v = 250.0 / 256, 100.0
    codes = np.clip(np.round((volts - y_origin_v) / y_increment_v), -128, 127).astype(np.int8)
    return SimpleNamespace(
        codes=codes,
        x_increment_s=x_increment_s,
        x_origin_s=-1e-6,
        y_increment_v=y_increment_v,
        y_origin_v=y_origin_v,
        y_reference=0.0,
        code_min=-128,
        code_max=127,
    )


def store_realistic_run(path: Path) -> int:
    """Write the run; return the number of samples stored."""
    rng = np.random.default_rng(7)
    samples = 0
    with Store(path) as store:
        run_id = store.create_run(
            sequence_text="# demo sequence\n" + "x = 1\n" * 60,
            sequence_sha256="0" * 64,
            sequence_path="sequences/demo_dc_flyback.toml",
            dut_label="telecom flyback",
            snubber_label="RC 47 Ω / 470 pF",
            bench_kind="sim",
            instruments={"source": "SIM,SOURCE,0,1.0", "scope": "SIM,SCOPE,0,1.0"},
        )
        grid = [(line_v, load_a) for line_v in LINES_V for load_a in LOADS_A]
        point_ids = store.add_points(run_id, grid, line_is_ac=False)
        for point_id, (line_v, load_a) in zip(point_ids, grid, strict=True):
            store.log_event(run_id, "info", "point started", point_id=point_id)
            records = [
                CaptureRecord(ringing_codes(rng, line_v + 60.0)) for _ in range(CAPTURES_PER_POINT)
            ]
            samples += sum(record.waveform.codes.size for record in records)
            readings = PointReadings(meter_voltage_v=line_v, meter_power_w=30.0, efficiency=0.88)
            capture_ids = store.commit_point(point_id, captures=records, readings=readings)
            for capture_id in capture_ids:
                figures = {name: float(rng.uniform(1, 100)) for name in CAPTURE_FIGURES}
                edges = [dict(figures) for _ in range(EDGES)]
                store.set_capture_figures(capture_id, figures, edges=edges)
            store.set_point_figures(
                point_id,
                {name: {"worst": rng.uniform(1, 100), "mean": rng.uniform(1, 100), "spread": rng.uniform(0, 1), "n": 3} for name in CAPTURE_FIGURES},
            )
            store.set_point_verdict(point_id, "pass", [])
            store.log_event(run_id, "timing", "point done", point_id=point_id, data={"s": 0.4})
        store.set_run_status(run_id, "finished")
        store.checkpoint()
    return samples


@pytest.mark.benchmark
def test_storage_cost_per_sample(tmp_path: Path) -> None:
    db_path = tmp_path / "run.sqlite"
    start = time.perf_counter()
    samples = store_realistic_run(db_path)
    store_s = time.perf_counter() - start
    wal_path = db_path.with_name(db_path.name + "-wal")
    wal_bytes = wal_path.stat().st_size if wal_path.exists() else 0
    file_bytes = db_path.stat().st_size + wal_bytes

    # Baseline: the raw payload, one byte per int8 sample, written to a plain file.
    raw_path = tmp_path / "raw.bin"
    start = time.perf_counter()
    rng = np.random.default_rng(7)
    with raw_path.open("wb") as handle:
        for _ in range(samples // SAMPLES):
            handle.write(ringing_codes(rng, 100.0).codes.tobytes())
    raw_s = time.perf_counter() - start
    raw_bytes = raw_path.stat().st_size

    ratio = file_bytes / raw_bytes
    print(
        f"\nstorage: page size {PAGE_SIZE} B, {samples} samples, database {file_bytes} B "
        f"(WAL {wal_bytes} B), raw {raw_bytes} B -> {file_bytes / samples:.4f} bytes/sample, "
        f"ratio to raw {ratio:.4f}; time to store {store_s:.3f} s vs raw file {raw_s:.3f} s "
        f"(ratio {store_s / raw_s:.1f})"
    )
    assert raw_bytes == samples
    assert file_bytes / samples <= MAX_BYTES_PER_SAMPLE
