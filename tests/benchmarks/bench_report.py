"""Report speed on a large run: 10 000 points (a 100 × 100 line × load grid) with stored figures
and verdicts, and raw captures at a few points only. The report must come from the stored
figures, so its cost per point should stay a small multiple of just reading the point rows.

Timed: the whole report (review, maps, tables, overlays, points.csv) against the baseline —
reading the run's point rows from the store — interleaved in each repeat, the baseline read
several times per repeat for a steadier figure (tests/benchmarks/paired.py). About half of the
report is a fixed cost (rendering a dozen figures), the rest grows with the points. Asserted: the
median ratio stays under 60 (it measures 20-40 on a busy two-core machine); a report that read
the raw captures of every point, or anything quadratic in the points, lands far beyond it.
"""

from __future__ import annotations

import time
from pathlib import Path

import numpy as np
import pytest
from paired import interleaved_times, paired

from labseq.figures import FIGURE_DIRECTIONS
from labseq.report import build_run_report
from labseq.review import review_run
from labseq.store import CaptureRecord, Store
from labseq_instruments import Waveform

SEQUENCE = Path(__file__).resolve().parents[2] / "labseq" / "examples" / "demo_dc_flyback.toml"
LINES = 100
LOADS = 100
CAPTURED_POINTS = 4
REPEATS = 3
BASELINE_READS = 3
MAX_RATIO = 60.0


def ringing_capture(seed: int) -> Waveform:
    """A short 8-bit switch-node record with one ringing turn-off edge."""
    rng = np.random.default_rng(seed)
    x_increment_s, x_origin_s, y_increment_v = 1e-9, -0.5e-6, 250 / 256
    t_s = x_origin_s + np.arange(2500) * x_increment_s
    ring = 30 * np.exp(-2e6 * t_s) * np.sin(2 * np.pi * 20e6 * t_s)
    volts = np.where(t_s < 0, 0.0, 100 + ring) + rng.normal(0, 0.3, t_s.size)
    codes = np.clip(np.round((volts - 100) / y_increment_v), -128, 127).astype(np.int8)
    return Waveform(codes, x_increment_s, x_origin_s, y_increment_v, 100.0, 0.0, -128, 127)


def build_store(path: Path) -> int:
    """A finished run of LINES × LOADS points written with executemany; return its id."""
    rng = np.random.default_rng(3)
    with Store(path) as store:
        run_id = store.create_run(
            sequence_text=SEQUENCE.read_text(encoding="utf-8"),
            sequence_sha256="0" * 64,
            sequence_path=str(SEQUENCE),
            dut_label="Telecom 36-75 V DC flyback, 12 V 2.2 A",
            snubber_label="RC 100 ohm / 220 pF (stock)",
            bench_kind="sim",
        )
        lines_v = np.linspace(36, 75, LINES)
        loads_a = np.linspace(0.1, 2.2, LOADS)
        rows = []
        figures = []
        for index in range(LINES * LOADS):
            line_v, load_a = float(lines_v[index // LOADS]), float(loads_a[index % LOADS])
            peak_v = line_v + 25 + 20 * load_a + rng.normal(0, 1)
            verdict = "fail" if peak_v > 120 else "pass"
            rows.append((run_id, index, line_v, load_a, 0.9 - 0.01 * load_a, verdict))
            values = {
                "peak_v": peak_v,
                "stress_margin_v": 120 - peak_v,
                "overshoot_v": peak_v - line_v - 25,
                "overshoot_pct": 100 * (peak_v - line_v - 25) / (line_v + 25),
                "damping_ratio": 0.3 - 0.01 * load_a,
                "q_factor": 0.5 / (0.3 - 0.01 * load_a),
                "settling_time_s": 1e-7 + 1e-8 * load_a,
                "snubber_loss_w": 2e-3 * (line_v + 25),
                "clamp_level_v": line_v + 150 + 10 * load_a,
                "clamp_loss_w": 0.3 + 0.1 * load_a,
                "ring_frequency_hz": 20e6,
            }
            figures.append(values)
        with store.db.atomic():
            store.db.conn.executemany(
                "INSERT INTO points (run_id, point_index, line_v, line_is_ac, line_frequency_hz, "
                "load_a, status, efficiency, verdict, verdict_reasons) "
                "VALUES (?, ?, ?, 0, 0, ?, 'done', ?, ?, '[]')",
                rows,
            )
            ids = [
                row[0]
                for row in store.db.conn.execute(
                    "SELECT id FROM points WHERE run_id = ? ORDER BY point_index", [run_id]
                )
            ]
            store.db.conn.executemany(
                "INSERT INTO point_figures (point_id, figure, worst, mean, spread, n) "
                "VALUES (?, ?, ?, ?, ?, 3)",
                [
                    (point_id, name, value, value, abs(value) * 0.01)
                    for point_id, values in zip(ids, figures, strict=True)
                    for name, value in values.items()
                ],
            )
        # Raw captures only where the report draws them: the worst points.
        review = review_run(store, run_id)
        worst_ids = {worst.point.point.id for worst in review.worst.values()}
        for seed, point_id in enumerate(sorted(worst_ids)[:CAPTURED_POINTS]):
            store.commit_point(
                point_id, captures=[CaptureRecord(ringing_capture(seed), node="primary")]
            )
        store.set_run_status(run_id, "finished")
    return run_id


@pytest.mark.benchmark
def test_report_of_ten_thousand_points(tmp_path: Path) -> None:
    db = tmp_path / "large.sqlite"
    started = time.perf_counter()
    run_id = build_store(db)
    build_s = time.perf_counter() - started
    points = LINES * LOADS
    outputs = []

    def report() -> None:
        review = review_run(store, run_id)
        outputs.append((review, build_run_report(store, review, tmp_path / "report")))

    def read_point_rows() -> None:
        for _ in range(BASELINE_READS):
            assert len(store.points(run_id)) == points

    with Store(db, create=False) as store:
        times = interleaved_times({"report": report, "read": read_point_rows}, REPEATS, warmup=0)
    review, files = outputs[-1]
    assert set(review.worst) == set(FIGURE_DIRECTIONS)
    assert files.html.stat().st_size > 0 and files.csv is not None
    read_s = tuple(t / BASELINE_READS for t in times["read"])
    ratios = paired({"report": times["report"], "read": read_s}, "report", "read")
    report_s = min(times["report"])
    print(
        f"\nreport of {points} points: best {report_s:.2f} s = {points / report_s:,.0f} points/s; "
        f"ratio to reading the point rows: {ratios.summary()}; "
        f"report.html {files.html.stat().st_size / 1e6:.1f} MB; store built in {build_s:.1f} s"
    )
    assert ratios.median < MAX_RATIO
