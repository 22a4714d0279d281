"""One way to analyse a capture and to judge a stored point: the runner, ``analyze-run``, the
report's traces and ``design --run`` see the same figures of the same capture."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from test_report import DEMO_SEQUENCE, Ringing

from labseq.pipeline import analyse_run
from labseq.report.traces import point_traces
from labseq.sequence import load_sequence
from labseq.store import CaptureRecord, PointReadings, Store


def test_report_draws_the_ring_its_tables_describe_on_a_clipped_capture(tmp_path: Path) -> None:
    """A capture whose ring crest clipped: the ring fit leaves the clipped samples out (the
    scope's per-sample clip mask), and the report redraws that same fit, not one that a single
    "clipped" flag would give."""
    sequence = load_sequence(DEMO_SEQUENCE)
    record = Ringing(190.0, 60.0, 0.1, seed=3)  # crests above the screen's top code
    assert np.count_nonzero(record.codes >= record.code_max) > 5
    with Store(tmp_path / "run.sqlite") as store:
        run_id = store.create_run(
            sequence_text=sequence.text,
            sequence_sha256=sequence.sha256,
            sequence_path=str(sequence.path),
            dut_label="d",
            snubber_label="s",
            bench_kind="sim",
        )
        [point_id] = store.add_points(run_id, [(75.0, 2.2)], line_is_ac=False)
        store.commit_point(
            point_id,
            captures=[CaptureRecord(record, node=sequence.primary.name)],
            readings=PointReadings(efficiency=0.9),
        )
        analyse_run(store, sequence, run_id, only_missing=False)
        [capture] = store.captures(point_id)
        stored = store.capture_figures(capture.id)
        [trace] = point_traces(store, point_id, sequence, node=sequence.primary.name)
    assert stored["clipped"] and trace.fits
    fit = trace.fits[0]
    assert fit.decay_rate_per_s == pytest.approx(stored["decay_rate_per_s"], rel=1e-12)
    assert fit.frequency_hz == pytest.approx(stored["ring_frequency_hz"], rel=1e-12)
    assert trace.edge_time_s == pytest.approx(stored["edge_time_s"], rel=1e-12)
