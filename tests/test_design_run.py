"""``labseq design --run``: snubber proposals for every point of a stored sweep, from rings measured
with the run's own damper fitted."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from sweeps import demo_sequence, run_cli

from labseq.runner import run_sequence
from labseq.sequence import load_sequence
from labseq.store import Store
from labseq_sim_instruments.flyback import DEMO_DUTS, load_dut

#: A matched damper on the demo DUT's ~215 pF node behind 250 nH: Rs ≈ √(L/C) ≈ 34 Ω and
#: Cs ≈ 3 × Cpar (Severns, "Design of Snubbers for Power Circuits"; the 3–4 × ratio is common
#: practice, no published source).
MATCHED_R, MATCHED_C = "33 ohm", "680pF"


def matched_damper_run(tmp_path, **grid):
    path = demo_sequence(tmp_path, **grid)
    text = path.read_text()
    for old, new in (
        ('label = "RC 100 ohm / 220 pF (stock)"', 'label = "RC 33 ohm / 680 pF (matched)"'),
        ('resistance = "100 ohm"', f'resistance = "{MATCHED_R}"'),
        ('capacitance = "220pF"', f'capacitance = "{MATCHED_C}"'),
    ):
        assert old in text
        text = text.replace(old, new)
    path.write_text(text)
    sequence = load_sequence(path)
    db = tmp_path / "run.sqlite"
    with Store(db) as store:
        run_sequence(sequence, store)
    return sequence, db


def state_matrix_poles(l_h: float, c_f: float, rs_ohm: float, cs_f: float) -> np.ndarray:
    """Eigenvalues of L driving Cpar ∥ (Rs + Cs), states (i_L, v, v_Cs) (numpy)."""
    return np.linalg.eigvals(
        np.array(
            [
                [0.0, -1 / l_h, 0.0],
                [1 / c_f, -1 / (rs_ohm * c_f), 1 / (rs_ohm * c_f)],
                [0.0, 1 / (rs_ohm * cs_f), -1 / (rs_ohm * cs_f)],
            ]
        )
    )


def ring_damping(poles: np.ndarray) -> float:
    pair = poles[poles.imag > 0]
    return float(-pair[0].real / abs(pair[0])) if pair.size else 1.0


def test_design_run_proposes_per_point_worst_first(tmp_path):
    sequence, db = matched_damper_run(tmp_path, lines=["36 V", "75 V"], loads=["2.2 A"], captures=2)
    code, out, err = run_cli("design", "--run", "latest", "--db", str(db), "--json")
    assert code == 0, err
    data = json.loads(out)
    rows = data["points"]
    assert [row["line_v"] for row in rows] == [75.0, 36.0]  # worst (highest) peak first
    assert rows[0]["peak_v"] >= rows[1]["peak_v"]

    design = load_dut(DEMO_DUTS["telecom_dc"])
    rs, cs = sequence.snubber.resistance_ohm, sequence.snubber.capacitance_f
    fsw = sequence.dut.switching_frequency_hz
    budget = sequence.snubber.resistor_power_budget_w
    for row in rows:
        assert row["network_from"] == "loaded ring" and not row["clipped"]
        # The measured pole is a natural frequency of the network it proposes from: an eigenvalue
        # of the state matrix of L — Cpar ∥ (Rs + Cs) with the run's damper (numpy)…
        wd = 2 * math.pi * row["ring_freq_hz"]
        zeta = row["measured_damping_ratio"]
        pole = complex(-zeta * wd / math.sqrt(1 - zeta**2), wd)
        poles = state_matrix_poles(row["l_leak_h"], row["c_par_f"], rs, cs)
        assert np.min(np.abs(poles - pole)) == pytest.approx(0.0, abs=1e-9 * abs(pole))
        # …and the node capacitance it infers from the measured ring is the simulated DUT's
        # switch capacitance at the plateau plus its stray capacitance, to within what the
        # damper branch adds (it loads the node a little): 0.8–1.4 × (the physics, not a source).
        plateau_v = row["line_v"] + design.turns_ratio * (
            design.output_voltage_v + design.rectifier_drop_v
        )
        node_f = design.coss_f(plateau_v) + design.stray_capacitance_f
        assert 0.8 * node_f < row["c_par_f"] < 1.4 * node_f
        # The leakage inductance too, within 10 %: the winding's 1 Ω, which the method reads as
        # damper damping, moves the small-signal answer by about 3 % (the physics, not a source).
        assert row["l_leak_h"] == pytest.approx(design.leakage_inductance_h, rel=0.10)
        # Cs: 3 × Cpar capped by the resistor budget, P = Cs·V²·fsw (Severns); the budget is a cap.
        cap = budget / (row["step_v"] ** 2 * fsw)
        assert row["cs_f"] == pytest.approx(min(3 * row["c_par_f"], cap), rel=1e-9)
        assert row["loss_w"] == pytest.approx(row["cs_f"] * row["step_v"] ** 2 * fsw, rel=1e-9)
        assert row["loss_w"] <= budget * (1 + 1e-9)
        # Rs: the resistance that damps the ring most with that Cs — a scan of the network's
        # eigenvalues (numpy) over R finds the same optimum.
        z0 = math.sqrt(row["l_leak_h"] / row["c_par_f"])
        scan = z0 * np.geomspace(0.1, 10, 2001)
        zetas = [ring_damping(state_matrix_poles(row["l_leak_h"], row["c_par_f"], r, row["cs_f"]))
                 for r in scan]  # fmt: skip
        assert row["r_ohm"] == pytest.approx(scan[int(np.argmax(zetas))], rel=0.01)

    part_set = data["part_set"]
    # One part set for both points, checked at the worst-step corner: its loss there is within
    # the budget (Severns, P = Cs·V²·fsw) and it damps every point.
    worst_step = max(row["step_v"] for row in rows)
    assert part_set["worst_step_v"] == pytest.approx(worst_step)
    assert part_set["worst_step_loss_w"] == pytest.approx(part_set["cs_f"] * worst_step**2 * fsw)
    assert part_set["worst_step_loss_w"] <= budget * (1 + 1e-9)
    assert part_set["min_damping_ratio"] == pytest.approx(
        min(row["part_set_damping_ratio"] for row in rows)
    )

    code, out, _ = run_cli("design", "--run", "latest", "--db", str(db))
    assert "worst peak first" in out and "Rs" in out and "one part set" in out


def test_design_run_needs_no_leakage_inductance(tmp_path):
    path = demo_sequence(tmp_path, lines=["48 V"], loads=["1 A"], captures=1)
    path.write_text(path.read_text().replace('leakage_inductance = "250nH"', ""))
    db = tmp_path / "run.sqlite"
    with Store(db) as store:
        run_sequence(load_sequence(path), store)
    # The ring measured with the damper fitted fixes L and Cpar: no leakage inductance needed.
    code, out, err = run_cli("design", "--run", "1", "--db", str(db), "--json")
    assert code == 0, err
    assert json.loads(out)["points"][0]["l_leak_h"] > 0
    code, _, err = run_cli("design", "--run", "1", "--db", str(db), "--leakage", "250n")
    assert code == 2
    assert "--leakage is not used with --run" in err and "Traceback" not in err


def test_design_run_reads_the_primary_node_by_its_name(tmp_path):
    """The primary node's name is the sequence's (``[scope] node``), not a fixed word: a run
    whose switch node is called "drain" is designed from like any other."""
    path = demo_sequence(tmp_path, lines=["48 V"], loads=["1 A"], captures=1)
    path.write_text(path.read_text().replace("[scope]\n", '[scope]\nnode = "drain"\n', 1))
    sequence = load_sequence(path)
    assert sequence.primary.name == "drain"
    db = tmp_path / "run.sqlite"
    with Store(db) as store:
        run_sequence(sequence, store)
        assert store.node_names(1) == ["drain"]
    code, out, err = run_cli("design", "--run", "1", "--db", str(db), "--json")
    assert code == 0, err
    [row] = json.loads(out)["points"]
    assert row["line_v"] == 48.0 and row["l_leak_h"] > 0 and row["network_from"] == "loaded ring"
    # The review reads the node by the same name: its figures and verdict are the drain's.
    code, out, err = run_cli("report", "1", "--db", str(db), "--format", "json")
    assert code == 0, err
    review = json.loads(out)
    assert review["nodes"] == ["drain"] and review["worst"]["peak_v"]["value"] > 48.0
    [point] = review["points"]
    assert point["verdict"] in ("pass", "fail") and "peak_v" in point["nodes"]["drain"]["figures"]
