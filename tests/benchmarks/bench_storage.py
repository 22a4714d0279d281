"""Storage cost of a run: bytes in the database file per stored 8-bit sample, by codec, scope
noise and page size.

* The DC demo swept on the simulated bench (16 points × 3 captures of 20 k samples) as
  ``labseq run`` stores it, codes compressed (the default): the whole file, write-ahead log
  folded in, is held to 0.5 bytes/sample. The same sweep with the scope's noise raised from the
  simulator's 0.4 LSB rms to 1.5 LSB rms — about what an 8-bit scope shows of a switch node
  through a high-voltage differential probe at full bandwidth (from memory, no published
  source) — is printed beside it: noise is what the codec cannot squeeze.
* A synthetic run of the same shape (16 × 3 captures, full-precision figures for four edges per
  capture, a verdict and two events per point) at 20 k and 100 k samples, raw and compressed,
  against its raw payload written to a plain file (one byte per sample).
* 4 KiB pages against 1 KiB: write and read-back time (paired per repeat, interleaved; see
  tests/benchmarks/paired.py) and file size. The speed ratios are printed, not asserted; the
  size, which does not move between runs, is what ``labseq.store.PAGE_SIZE`` was chosen on.
  Long records (1 M samples) take long to write and run under the ``slow`` marker.
"""

from __future__ import annotations

import sqlite3
import time
from pathlib import Path

import numpy as np
import pytest
from paired import interleaved_times, paired

import labseq.store
import labseq_sim_instruments.scope
from labseq.progress import Progress
from labseq.runner import execute, start_run
from labseq.sequence import load_sequence
from labseq.store import (
    CAPTURE_FIGURES,
    DEFAULT_CODEC,
    PAGE_SIZE,
    CaptureRecord,
    PointReadings,
    Store,
)
from labseq_instruments import Waveform

SEQUENCE = Path(__file__).resolve().parents[2] / "labseq" / "examples" / "demo_dc_flyback.toml"
LINES_V = (36.0, 48.0, 60.0, 75.0)
LOADS_A = (0.55, 1.1, 1.65, 2.2)
CAPTURES_PER_POINT = 3
EDGES_PER_CAPTURE = 4
MAX_RAW_BYTES_PER_SAMPLE = 1.05
MAX_PACKED_BYTES_PER_SAMPLE = 0.5
#: Scope noise of the simulator, and the stronger level a real probe chain shows (LSB rms).
SIM_NOISE_LSB = labseq_sim_instruments.scope.NOISE_LSB_RMS
PROBE_NOISE_LSB = 1.5
PAGE_REPEATS = 7


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


def realistic_waveforms(samples: int) -> list[Waveform]:
    """One record per capture of the grid, the plateau following the line voltage."""
    rng = np.random.default_rng(7)
    return [
        ringing_capture(rng, samples, 2 * line_v + 25.0)
        for line_v in LINES_V
        for _ in range(len(LOADS_A) * CAPTURES_PER_POINT)
    ]


def store_realistic_run(path: Path, waveforms: list[Waveform], codec: str = DEFAULT_CODEC) -> int:
    """Write the run as the runner stores it; return the number of samples stored."""
    rng = np.random.default_rng(7)
    records = iter(waveforms)
    stored = 0
    with Store(path, codec=codec) as store:
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
        for point_id in store.add_points(run_id, grid, line_is_ac=False):
            started = time.time()
            store.log_event(run_id, "info", "settled", point_id=point_id, data={"settle_s": 0.05})
            captures = [
                CaptureRecord(next(records), node="primary") for _ in range(CAPTURES_PER_POINT)
            ]
            stored += sum(capture.waveform.codes.size for capture in captures)
            readings = PointReadings(*(float(value) for value in rng.uniform(0.1, 100.0, size=10)))
            capture_ids = store.commit_point(
                point_id, captures=captures, readings=readings, started_at=started
            )
            for capture_id in capture_ids:
                edges = [figures(rng) for _ in range(EDGES_PER_CAPTURE)]
                store.set_capture_figures(capture_id, edges[0], edges=edges)
            stats = ("worst", "mean", "spread")
            stored_figures = {
                name: {**{s: rng.uniform() for s in stats}, "n": 3} for name in CAPTURE_FIGURES
            }
            store.set_point_judgement(
                point_id, {"primary": stored_figures}, {"primary": ("pass", [])}, "pass", []
            )
            store.log_event(run_id, "timing", "point done", point_id=point_id, data={"s": 0.41})
        store.set_run_status(run_id, "finished")
        store.checkpoint()
    return stored


def file_bytes(path: Path) -> int:
    """The database file and its write-ahead log."""
    wal = path.with_name(path.name + "-wal")
    return path.stat().st_size + (wal.stat().st_size if wal.exists() else 0)


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


def breakdown(path: Path) -> str:
    return ", ".join(f"{name} {size}" for name, size in table_bytes(path).items())


def read_back(path: Path) -> int:
    """Read every capture's codes, as export and analyze-run do."""
    with Store(path, create=False) as store:
        return sum(capture.codes.size for capture in store.iter_captures(store.runs()[-1].id))


# --------------------------------------------------------------------------- the demo


@pytest.mark.benchmark
@pytest.mark.parametrize("noise_lsb", [SIM_NOISE_LSB, PROBE_NOISE_LSB])
def test_demo_store_per_sample(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, noise_lsb: float
) -> None:
    """The demo's whole file with compressed codes: ≤ 0.5 bytes/sample with the simulator's
    noise; printed for the stronger noise."""
    monkeypatch.setattr(labseq_sim_instruments.scope, "NOISE_LSB_RMS", noise_lsb)
    sequence = load_sequence(SEQUENCE)
    path = tmp_path / "demo.sqlite"
    with Store(path) as store:
        run_id = start_run(sequence, store)
        outcome = execute(sequence, store, run_id, progress=Progress(quiet=True))
        assert outcome.status == "finished"
        codecs = store.db.execute(
            "SELECT codec, COUNT(*), SUM(points), SUM(length(codes)) FROM captures GROUP BY codec"
        ).fetchall()
        store.checkpoint()
    assert [(codec, count) for codec, count, _, _ in codecs] == [(DEFAULT_CODEC, 48)]
    [(_, _, samples, code_bytes)] = codecs
    whole = file_bytes(path) / samples
    print(
        f"\ndemo store, scope noise {noise_lsb} LSB rms, codes {DEFAULT_CODEC}, page size "
        f"{PAGE_SIZE} B: {samples} samples, whole file {whole:.4f} bytes/sample (codes alone "
        f"{code_bytes / samples:.4f}, {samples / code_bytes:.2f}x smaller than raw)\n"
        f"  bytes by table: {breakdown(path)}"
    )
    if noise_lsb == SIM_NOISE_LSB:
        assert whole <= MAX_PACKED_BYTES_PER_SAMPLE


# --------------------------------------------------------------------------- codecs


@pytest.mark.benchmark
@pytest.mark.parametrize("codec", ["raw", "zstd"])
@pytest.mark.parametrize("samples", [20_000, 100_000])
def test_storage_cost_per_sample(tmp_path: Path, samples: int, codec: str) -> None:
    """Raw codes: the whole file ≤ 1.05 bytes/sample for 100 k-sample records (a usual scope
    record for this job). For the demo's short 20 k-sample records the per-capture figures (about
    2 kB each, four edges at full precision) cost more than 5 % on their own, so there only the
    captures table (codes, scaling, page rounding) is held to 1.05; the whole-file figure is
    printed. Compressed codes: the whole file ≤ 0.5 bytes/sample at both lengths."""
    waveforms = realistic_waveforms(samples)
    db_path = tmp_path / "run.sqlite"
    stored = store_realistic_run(db_path, waveforms, codec)

    # Baseline: the same payload, one byte per int8 sample, written to a plain file.
    raw_path = tmp_path / "raw.bin"
    with raw_path.open("wb") as handle:
        for waveform in waveforms:
            handle.write(waveform.codes.tobytes())
    raw_bytes = raw_path.stat().st_size

    total = file_bytes(db_path)
    print(
        f"\nstorage, {samples}-sample captures, codes {codec}, page size {PAGE_SIZE} B: "
        f"{stored} samples, database {total} B, raw {raw_bytes} B -> "
        f"{total / stored:.4f} bytes/sample\n"
        f"  bytes by table: {breakdown(db_path)}"
    )
    assert raw_bytes == stored
    if codec != "raw":
        assert total / stored <= MAX_PACKED_BYTES_PER_SAMPLE
    elif samples >= 100_000:
        assert total / stored <= MAX_RAW_BYTES_PER_SAMPLE
    else:
        captures_bytes = table_bytes(db_path).get("captures")
        if captures_bytes is None:
            pytest.skip("this SQLite has no dbstat table to measure the captures table alone")
        print(f"  captures table alone: {captures_bytes / stored:.4f} bytes/sample")
        assert captures_bytes / stored <= MAX_RAW_BYTES_PER_SAMPLE


# --------------------------------------------------------------------------- page size


def compare_page_sizes(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, samples: int, codec: str, repeats: int
) -> dict[int, int]:
    """Write and read the synthetic run with 1 KiB and 4 KiB pages, interleaved; print the
    paired ratios 4 KiB / 1 KiB; return each page size's file bytes."""
    waveforms = realistic_waveforms(samples)
    paths = {size: tmp_path / f"pages{size}.sqlite" for size in (1024, 4096)}

    def write(size: int) -> None:
        for stale in tmp_path.glob(f"pages{size}.sqlite*"):
            stale.unlink()
        monkeypatch.setattr(labseq.store, "PAGE_SIZE", size)
        store_realistic_run(paths[size], waveforms, codec)

    actions = {}
    for size in paths:
        actions[f"write {size}"] = lambda size=size: write(size)
        actions[f"read {size}"] = lambda size=size: read_back(paths[size])
    times = interleaved_times(actions, repeats)
    sizes = {size: file_bytes(path) for size, path in paths.items()}
    stored = len(waveforms) * samples
    print(
        f"\npage size 4096 / 1024 B, {samples}-sample captures, codes {codec}: file "
        f"{sizes[4096] / stored:.4f} / {sizes[1024] / stored:.4f} bytes/sample\n"
        f"  write: {paired(times, 'write 4096', 'write 1024').summary()}\n"
        f"  read:  {paired(times, 'read 4096', 'read 1024').summary()}"
    )
    return sizes


@pytest.mark.benchmark
@pytest.mark.parametrize("codec", ["raw", "zstd"])
@pytest.mark.parametrize("samples", [20_000, 100_000])
def test_page_size(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, samples: int, codec: str
) -> None:
    """The chosen page size keeps the demo's compressed store small: with 4 KiB pages each
    compressed 20 k-sample capture leaves most of a page unused."""
    sizes = compare_page_sizes(tmp_path, monkeypatch, samples, codec, PAGE_REPEATS)
    if samples == 20_000 and codec == DEFAULT_CODEC:
        assert sizes[PAGE_SIZE] == min(sizes.values())


@pytest.mark.slow
@pytest.mark.benchmark
@pytest.mark.parametrize("codec", ["raw", "zstd"])
def test_page_size_long_records(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, codec: str
) -> None:
    """1 M-sample records: printed only (48 MB written per repeat)."""
    compare_page_sizes(tmp_path, monkeypatch, 1_000_000, codec, 5)
