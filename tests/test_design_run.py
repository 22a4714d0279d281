"""``labseq design --run``: snubber proposals for every point of a stored sweep."""

from __future__ import annotations

import json
import math

import pytest
from sweeps import demo_sequence, run_cli

from labseq.runner import run_sequence
from labseq.sequence import load_sequence
from labseq.store import Store
from sim_instruments.flyback import DEMO_DUTS, load_dut


def test_design_run_proposes_per_point_worst_first(tmp_path):
    sequence = load_sequence(
        demo_sequence(tmp_path, lines=["36 V", "75 V"], loads=["2.2 A"], captures=2)
    )
    db = tmp_path / "run.sqlite"
    with Store(db) as store:
        run_sequence(sequence, store)
    code, out, err = run_cli("design", "--run", "latest", "--db", str(db), "--json")
    assert code == 0, err
    rows = json.loads(out)
    assert [row["line_v"] for row in rows] == [75.0, 36.0]  # worst (highest) peak first
    assert rows[0]["peak_v"] >= rows[1]["peak_v"]

    design = load_dut(DEMO_DUTS["telecom_dc"])
    for row in rows:
        # f = 1/(2π√(L·C)) and R = √(L/C) = 2π·f·L (Severns, "Design of Snubbers for Power
        # Circuits"): the proposal is self-consistent…
        c_par = 1.0 / ((2 * math.pi * row["ring_freq_hz"]) ** 2 * row["l_leak_h"])
        assert row["c_par_f"] == pytest.approx(c_par, rel=1e-9)
        assert row["r_ohm"] == pytest.approx(2 * math.pi * row["ring_freq_hz"] * 250e-9, rel=1e-9)
        # …and the node capacitance it infers from the measured ring is the simulated DUT's
        # switch capacitance at the plateau plus its stray capacitance, to within what the
        # damper branch adds (it loads the node a little): 0.8–1.4 × (the physics, not a source).
        plateau_v = row["line_v"] + design.turns_ratio * (
            design.output_voltage_v + design.rectifier_drop_v
        )
        node_f = design.coss_f(plateau_v) + design.stray_capacitance_f
        assert 0.8 * node_f < row["c_par_f"] < 1.4 * node_f
        # Cs from the resistor budget: Cs = P / (V²·fsw) (Severns).
        assert row["loss_w"] == pytest.approx(sequence.snubber.resistor_power_budget_w)

    code, out, _ = run_cli("design", "--run", "latest", "--db", str(db))
    assert "worst peak first" in out and "Rs" in out


def test_design_run_without_leakage_is_a_clear_error(tmp_path):
    path = demo_sequence(tmp_path, lines=["48 V"], loads=["1 A"], captures=1)
    path.write_text(path.read_text().replace('leakage_inductance = "250nH"', ""))
    db = tmp_path / "run.sqlite"
    with Store(db) as store:
        run_sequence(load_sequence(path), store)
    code, _, err = run_cli("design", "--run", "1", "--db", str(db))
    assert code == 2
    assert "no leakage inductance" in err and "--leakage" in err and "Traceback" not in err
