"""The unattended sweep end to end through PyVISA against the simulated bench.

What a bench technician expects (common practice, no published source): line changes ramp in
steps no larger than the declared step, the load changes within a line value, every exit leaves
load and source off, and nothing captured is lost. The ES1 limit of 60 V DC that the runner waits
for on a real bench is IEC 62368-1's (from memory).
"""

from __future__ import annotations

import hashlib

import numpy as np
import pytest
from sweeps import demo_sequence

from labseq.pipeline import analyse_run
from labseq.progress import Progress
from labseq.runner import claim_for_resume, execute, run_sequence, start_run
from labseq.sequence import load_sequence
from labseq.store import Store
from labseq_sim_instruments.flyback import DEMO_DUTS, load_dut


def _design_for(sequence):
    """The simulated DUT with the sequence's snubber fitted (as `kind = "sim"` would build it)."""
    return load_dut(DEMO_DUTS["telecom_dc"]).with_snubber(
        sequence.snubber.resistance_ohm, sequence.snubber.capacitance_f
    )


def _capture_digests(store: Store, run_id: int) -> dict[int, str]:
    return {
        c.id: hashlib.sha256(c.codes.tobytes()).hexdigest() for c in store.iter_captures(run_id)
    }


def test_demo_sweep_end_to_end(tmp_path, make_sim_bench):
    path = demo_sequence(tmp_path, resources={})  # resources filled below, once ports exist
    probe = load_sequence(demo_sequence(tmp_path, name="probe.toml"))
    sim = make_sim_bench(design=_design_for(probe))
    path = demo_sequence(tmp_path, resources=sim.resources)
    sequence = load_sequence(path)
    with Store(tmp_path / "run.sqlite") as store:
        run_id = run_sequence(sequence, store)
        record = store.run(run_id)
        points = store.points(run_id)

        # Counts: the whole 4 x 4 grid, three captures per point.
        assert record.status == "finished"
        assert (record.points_done, record.points_total) == (16, 16)
        assert sum(len(store.captures(p.id, with_codes=False)) for p in points) == 48

        # Setpoint order: the source only ever moved by at most the declared step while on.
        step_v = sequence.bench.limits.line_step_max_v
        history = sim.state.line_history
        on_voltages = [v for v, on in history if on]
        assert on_voltages[0] == pytest.approx(36.0)
        assert max(np.abs(np.diff(on_voltages))) <= step_v + 1e-9
        # Loads change within a line value: the line changed exactly three times (36→48→60→75).
        lines_in_order = [p.line_v for p in points]
        assert lines_in_order == sorted(lines_in_order)

        # Readbacks agree with the setpoints (sim readings carry small noise).
        for point in points:
            assert point.source_voltage_v == pytest.approx(point.line_v, rel=0.02)
            assert point.load_current_a == pytest.approx(point.load_a, rel=0.02)
            assert 0.5 < point.efficiency < 1.0
            assert point.verdict in ("pass", "fail")

        # The stored capture decodes to exactly what the simulated scope sent.
        last = store.captures(points[-1].id)[-1]
        sent = sim.instruments["scope"].capture.payload(1, "INT8", False)
        assert last.codes.tobytes() == bytes(sent)
        assert store.integrity_check() == "ok"

    # Every exit leaves the bench safe.
    assert not sim.state.source_output_on
    assert not sim.state.load_input_on


def test_sim_kind_runs_in_process_and_figures_are_stored(tmp_path):
    sequence = load_sequence(demo_sequence(tmp_path, lines=["48 V"], loads=["1 A"], captures=2))
    with Store(tmp_path / "run.sqlite") as store:
        run_id = run_sequence(sequence, store)
        (point,) = store.points(run_id)
        figures = store.point_figures(run_id, node=sequence.primary.name)[point.id]
        # The plateau is the reflected voltage above the bus: Vin + n·(Vout + Vf) (flyback
        # relation; any power-electronics text, e.g. Erickson & Maksimović, ch. 6).
        design = load_dut(DEMO_DUTS["telecom_dc"])
        plateau_v = 48.0 + design.turns_ratio * (design.output_voltage_v + design.rectifier_drop_v)
        assert figures["plateau_v"]["mean"] == pytest.approx(plateau_v, rel=0.03)
        assert figures["peak_v"]["worst"] > plateau_v
        assert figures["damping_ratio"]["n"] == 2
        assert point.verdict in ("pass", "fail")


def test_analyze_run_rejudges_without_the_bench(tmp_path):
    sequence = load_sequence(demo_sequence(tmp_path, lines=["75 V"], loads=["2.2 A"], captures=2))
    with Store(tmp_path / "run.sqlite") as store:
        run_id = run_sequence(sequence, store)
        (point,) = store.points(run_id)
        peak_v = store.point_figures(run_id, node=sequence.primary.name)[point.id]["peak_v"][
            "worst"
        ]
        digests = _capture_digests(store, run_id)
        # Tighter limits: the same captures now fail on peak.
        strict = demo_sequence(tmp_path, lines=["75 V"], loads=["2.2 A"], name="strict.toml")
        text = strict.read_text().replace("[limits]", f'[limits]\nmax_peak = "{peak_v - 1:.3f} V"')
        strict.write_text(text)
        analysed = analyse_run(store, load_sequence(strict), run_id, only_missing=False)
        assert analysed == 2
        point = store.point(point.id)
        assert point.verdict == "fail"
        assert any(r.startswith("peak stress ") for r in point.verdict_reasons)
        assert _capture_digests(store, run_id) == digests  # nothing re-captured


FAULTS = [
    ("source:no-reply@point=2", "fault"),
    ("load:drop@point=2", "fault"),
    ("meter:malformed@point=2", "fault"),
    ("source:scpi-error@point=2", "scpi-error"),  # fires at the ramp to 60 V
    ("scope:no-trigger@point=2", "fault"),
]


@pytest.mark.parametrize(("fault", "event_kind"), FAULTS)
def test_fault_skips_the_point_ends_safe_and_resume_completes(
    tmp_path, make_sim_bench, fault, event_kind
):
    probe = load_sequence(demo_sequence(tmp_path, name="probe.toml"))
    sim = make_sim_bench(design=_design_for(probe), faults=fault)
    path = demo_sequence(
        tmp_path,
        lines=["48 V", "60 V"],
        loads=["1 A", "2 A"],
        captures=2,
        resources=sim.resources,
        timeout="1 s",
    )
    sequence = load_sequence(path)
    with Store(tmp_path / "run.sqlite") as store:
        run_id = run_sequence(sequence, store)
        assert sim.fired_faults, "the fault must have fired"
        assert not sim.state.source_output_on and not sim.state.load_input_on
        assert store.integrity_check() == "ok"
        statuses = [p.status for p in store.points(run_id)]
        assert statuses.count("failed") == 1, statuses
        assert any(e["kind"] == event_kind for e in store.events(run_id))
        before = _capture_digests(store, run_id)

        outcome = execute(sequence, store, run_id, progress=Progress(quiet=True))
        assert outcome.status == "finished"
        assert (outcome.points_done, outcome.points_total) == (4, 4)
        after = _capture_digests(store, run_id)
        assert {k: after[k] for k in before} == before  # committed captures intact
        # Exactly the missing captures were taken: two per point, none twice.
        assert len(after) == 8
        assert not sim.state.source_output_on and not sim.state.load_input_on


def test_abort_policy_stops_at_the_failing_point(tmp_path, make_sim_bench):
    probe = load_sequence(demo_sequence(tmp_path, name="probe.toml"))
    sim = make_sim_bench(design=_design_for(probe), faults="scope:no-trigger@point=2")
    path = demo_sequence(
        tmp_path,
        lines=["48 V"],
        loads=["1 A", "1.5 A", "2 A"],
        captures=1,
        resources=sim.resources,
        on_point_error="abort",
    )
    sequence = load_sequence(path)
    with Store(tmp_path / "run.sqlite") as store:
        run_id = start_run(sequence, store)
        outcome = execute(sequence, store, run_id, progress=Progress(quiet=True))
        assert outcome.status == "aborted" and outcome.exit_code == 3
        assert [p.status for p in store.points(run_id)] == ["done", "pending", "pending"]
        assert not sim.state.source_output_on and not sim.state.load_input_on
        assert store.run(run_id).status == "aborted"
        # The run may be resumed: not finished, and no live process owns it.
        claim_for_resume(store, run_id)
        assert store.run(run_id).status == "running"


def test_a_signal_between_begin_and_commit_still_records_the_ending(
    tmp_path, make_sim_bench, monkeypatch
):
    # A signal raised from its handler just after a store block's BEGIN (before the block's
    # error handling starts) leaves the transaction open; every later write would join it and
    # be lost when the process ends. The runner rolls it back before it records the ending.
    from labseq.runner import Sweep
    from labseq.safety import Interrupted

    probe = load_sequence(demo_sequence(tmp_path, name="probe.toml"))
    sim = make_sim_bench(design=_design_for(probe))
    path = demo_sequence(
        tmp_path, lines=["48 V"], loads=["1 A"], captures=1, resources=sim.resources
    )
    sequence = load_sequence(path)
    measure = Sweep.measure_point

    def struck_after_begin(self, point, index, total):
        measure(self, point, index, total)
        self.store.db.conn.execute("BEGIN")  # the block's BEGIN ran, its try not yet entered
        raise Interrupted("SIGTERM")

    monkeypatch.setattr(Sweep, "measure_point", struck_after_begin)
    db = tmp_path / "run.sqlite"
    with Store(db) as store:
        run_id = start_run(sequence, store)
        outcome = execute(sequence, store, run_id, progress=Progress(quiet=True))
        assert outcome.status == "interrupted"
        assert not store.db.conn.in_transaction
    # Read by another connection, as `labseq runs` would after the process has gone.
    with Store(db, create=False) as reader:
        assert reader.run(run_id).status == "interrupted"
        assert any("rolled back" in e["message"] for e in reader.events(run_id))
    assert not sim.state.source_output_on and not sim.state.load_input_on
