"""Several nodes per point: the secondary rectifier captured on the primary's trigger, through
the sequence file, the runner, the store (and its upgrade from schema 1), the verdicts, the
report, the compare and the export."""

from __future__ import annotations

import csv
import json
import re
import sqlite3
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest

from labseq.analysis.verdict import Limits, aggregate, judge
from labseq.compare import compare_runs, comparison_summary
from labseq.export import write_captures_npz, write_points_csv
from labseq.report import build_run_report
from labseq.review import review_run, run_summary
from labseq.runner import run_sequence
from labseq.sequence import SequenceError, load_sequence
from labseq.sim_bench import sim_design
from labseq.store import SCHEMA_VERSION, CaptureRecord, Store, StoreFileError
from labseq_instruments.tomlkeys import find_key_line
from labseq_sim_instruments.flyback import DEMO_DUTS, load_dut

ROOT = Path(__file__).resolve().parent.parent
DEMO_DC = ROOT / "labseq" / "examples" / "demo_dc_flyback.toml"
DEMO_OFFLINE = ROOT / "labseq" / "examples" / "demo_offline_flyback.toml"

#: The telecom demo's output rectifier as a second node (100 V Schottky, channel 2), with an RC
#: damper that the simulated bench fits across the diode in place of the DUT file's (none).
DC_SECONDARY = """
[[nodes]]
name = "secondary"
channel = 2
polarity = "falling"
volts_per_div = "20 V"
offset = "-50 V"
probe_ratio = 10
rating = "100 V"

[nodes.snubber]                  # near the ring's impedance sqrt(72 nH / 250 pF) = 17 ohm
resistance = "22 ohm"
capacitance = "1nF"
resistor_power_budget = "0.5 W"
"""


def _set(text: str, key: str, value: str) -> str:
    pattern = re.compile(rf"^{re.escape(key)}\s*=.*$", re.MULTILINE)
    assert pattern.search(text), key
    return pattern.sub(lambda _: f"{key} = {value}", text, count=1)


def small(base: Path, tmp_path: Path, name: str, lines: str, loads: str, extra: str = "") -> Path:
    """A copy of ``base`` with a 2 × 2 grid, two captures per point, and ``extra`` appended."""
    text = base.read_text(encoding="utf-8")
    text = _set(text, "line_values", lines)
    text = _set(text, "load_values", loads)
    text = _set(text, "captures_per_point", "2")
    path = tmp_path / name
    path.write_text(text + extra, encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def dc_run(tmp_path_factory: pytest.TempPathFactory) -> Iterator[tuple[Store, int, Path]]:
    """The telecom DC demo with its rectifier as a second node: 2 lines × 2 loads × 2."""
    tmp_path = tmp_path_factory.mktemp("dc")
    path = small(
        DEMO_DC, tmp_path, "dc.toml", '["36 V", "75 V"]', '["50 %", "100 %"]', DC_SECONDARY
    )
    sequence = load_sequence(path)
    with Store(tmp_path / "dc.sqlite") as store:
        yield store, run_sequence(sequence, store), path


@pytest.fixture(scope="module")
def offline_runs(tmp_path_factory: pytest.TempPathFactory) -> Iterator[tuple[Store, int, int]]:
    """The offline demo (primary, secondary, clamp) as baseline, and a candidate whose diode
    damper capacitor is halved: 2 lines × 2 loads × 2 captures each."""
    tmp_path = tmp_path_factory.mktemp("offline")
    lines, loads = '["90 V", "264 V"]', '["25 %", "100 %"]'
    base = small(DEMO_OFFLINE, tmp_path, "base.toml", lines, loads)
    text = base.read_text(encoding="utf-8").replace(
        'capacitance = "470pF"', 'capacitance = "220pF"'
    )
    candidate = tmp_path / "candidate.toml"
    candidate.write_text(text, encoding="utf-8")
    with Store(tmp_path / "offline.sqlite") as store:
        first = run_sequence(load_sequence(base), store)
        second = run_sequence(load_sequence(candidate), store)
        yield store, first, second


# --------------------------------------------------------------------------- sequence files


def test_demo_offline_declares_secondary_and_clamp() -> None:
    sequence = load_sequence(DEMO_OFFLINE)
    assert [node.name for node in sequence.nodes] == ["primary", "secondary"]
    primary, secondary = sequence.nodes
    assert primary.channel == 1 and primary.polarity == 1  # [scope] channel, rising trigger
    assert secondary.channel == 2 and secondary.polarity == -1
    # |peak| limit defaults to rating x derating: 200 V x 0.8 (derating from memory of common
    # derating guidelines).
    assert secondary.limits.max_peak_v == pytest.approx(160.0)
    assert secondary.snubber is not None and secondary.snubber.capacitance_f == pytest.approx(
        470e-12
    )
    assert secondary.limits.min_efficiency is None  # efficiency is judged with the primary
    assert sequence.clamp is not None and sequence.clamp.resistance_ohm == pytest.approx(47e3)


NODE_ERRORS = [
    # (id, text appended after DC_SECONDARY's node, key named, words in the message)
    (
        "same channel as the trigger",
        DC_SECONDARY.replace("channel = 2", "channel = 1"),
        "nodes[1].channel",
        "where the scope triggers",
    ),
    ("same name as another node", DC_SECONDARY, "nodes[1].name", "already the name"),
    (
        "channel beyond the scope",
        DC_SECONDARY.replace("channel = 2", "channel = 5").replace('"secondary"', '"aux"'),
        "nodes[1].channel",
        "beyond the scope's 4",
    ),
    (
        "unknown key",
        DC_SECONDARY.replace('"secondary"', '"aux"').replace(
            "channel = 2", "channel = 3\nratng = 1"
        ),
        "nodes[1].ratng",
        "did you mean 'rating'",
    ),
    (
        "efficiency on a node",
        DC_SECONDARY.replace('"secondary"', '"aux"').replace("channel = 2", "channel = 3")
        + "[nodes.limits]\nmin_efficiency = 0.8\n",
        "nodes[1].limits.min_efficiency",
        "belongs to the whole point",
    ),
    (
        "unprobed sim channel",
        DC_SECONDARY.replace('"secondary"', '"aux"').replace("channel = 2", "channel = 3"),
        "nodes[1].channel",
        "flat trace",
    ),
    (
        "bad name",
        DC_SECONDARY.replace('"secondary"', '"Sec Node"').replace("channel = 2", "channel = 3"),
        "nodes[1].name",
        "short lower-case word",
    ),
]


@pytest.mark.parametrize(
    ("extra", "key", "words"), [c[1:] for c in NODE_ERRORS], ids=[c[0] for c in NODE_ERRORS]
)
def test_node_mistakes_are_named_with_their_line(
    tmp_path: Path, extra: str, key: str, words: str
) -> None:
    path = tmp_path / "nodes.toml"
    path.write_text(DEMO_DC.read_text(encoding="utf-8") + DC_SECONDARY + extra, encoding="utf-8")
    with pytest.raises(SequenceError) as info:
        load_sequence(path)
    found = [p for p in info.value.problems if p.key == key]
    assert found, info.value
    assert words in found[0].message
    # the line is that of the second [[nodes]] entry, not the first
    first_nodes_line = find_key_line(path.read_text(encoding="utf-8"), "nodes[0]")
    assert found[0].line is not None and found[0].line > first_nodes_line


def test_clamp_needs_a_sim_dut_with_one(tmp_path: Path) -> None:
    path = tmp_path / "clamp.toml"
    text = (
        DEMO_DC.read_text(encoding="utf-8") + '\n[clamp]\nresistance = "10k"\ncapacitance = "1n"\n'
    )
    path.write_text(text, encoding="utf-8")
    with pytest.raises(SequenceError, match=r"declares no \[clamp\]"):
        load_sequence(path)


# --------------------------------------------------------------------------- sweep and store


def test_each_acquisition_stores_one_capture_per_node(dc_run: tuple[Store, int, Path]) -> None:
    store, run_id, _ = dc_run
    for point in store.points(run_id):
        captures = store.captures(point.id, with_codes=False)
        assert sorted((c.node, c.capture_index) for c in captures) == [
            ("primary", 0),
            ("primary", 1),
            ("secondary", 0),
            ("secondary", 1),
        ]
        assert {c.channel for c in captures if c.node == "secondary"} == {2}
        assert store.acquisitions(point.id) == 2


def test_secondary_plateau_is_the_reflected_bus(dc_run: tuple[Store, int, Path]) -> None:
    store, run_id, _ = dc_run
    design = load_dut(DEMO_DUTS["telecom_dc"])
    figures = store.node_figures(run_id)
    for point in store.points(run_id):
        secondary = figures[point.id]["secondary"]
        # Flyback relation (Erickson & Maksimović, Fundamentals of Power Electronics, ch. 6):
        # while the switch is on the rectifier blocks Vin/n + Vout.
        expected_v = -(point.line_v / design.turns_ratio + design.output_voltage_v)
        assert secondary["plateau_v"]["mean"] == pytest.approx(expected_v, rel=0.03)
        # its ring overshoots beyond the plateau: the peak is more negative
        assert secondary["peak_v"]["worst"] < secondary["plateau_v"]["mean"] - 1.0


def test_secondary_verdict_judges_the_peak_magnitude(dc_run: tuple[Store, int, Path]) -> None:
    store, run_id, path = dc_run
    sequence = load_sequence(path)
    limit_v = sequence.node("secondary").limits.max_peak_v
    assert limit_v == pytest.approx(80.0)  # 100 V x 0.8 (derating from memory)
    figures, verdicts = store.node_figures(run_id), store.node_verdicts(run_id)
    for point in store.points(run_id):
        peak_v = figures[point.id]["secondary"]["peak_v"]["worst"]
        margin_v = figures[point.id]["secondary"]["stress_margin_v"]["worst"]
        assert margin_v == pytest.approx(limit_v - abs(peak_v))
        status, reasons = verdicts[point.id]["secondary"]
        assert any(r.startswith("peak reverse voltage ") for r in reasons) == (
            abs(peak_v) > limit_v
        )
        # the point's verdict is the worst of its nodes', reasons named by node
        statuses = {status, verdicts[point.id]["primary"][0]}
        expected = (
            "fail" if "fail" in statuses else "incomplete" if "incomplete" in statuses else "pass"
        )
        assert point.verdict == expected
        assert all(r.split(":")[0] in ("primary", "secondary") for r in point.verdict_reasons)


def test_falling_peak_magnitude_against_a_limit() -> None:
    # A falling node's worst peak is its most negative; its limit applies to |peak|.
    summary = aggregate([{"peak_v": -70.0}, {"peak_v": -85.0}], polarity=-1)
    assert summary.worst("peak_v") == -85.0
    limits = Limits(max_peak_v=load_sequence(DEMO_OFFLINE).node("secondary").limits.max_peak_v)
    assert judge(summary, limits, polarity=-1).status == "pass"  # 85 V < 160 V
    failing = aggregate([{"peak_v": -170.0}], polarity=-1)
    verdict = judge(failing, limits, polarity=-1)
    assert verdict.status == "fail" and "|peak| ≤ 160 V" in verdict.reasons[0]
    assert verdict.reasons[0].startswith("peak reverse voltage -170 V")


# --------------------------------------------------------------------------- report and compare


def test_report_shows_both_nodes(offline_runs: tuple[Store, int, int], tmp_path: Path) -> None:
    store, run_id, _ = offline_runs
    review = review_run(store, run_id)
    assert review.node_names == ("primary", "secondary")
    files = build_run_report(store, review, tmp_path / "report")
    html = files.html.read_text(encoding="utf-8")
    assert "Secondary rectifier — peak reverse voltage against the derated rating" in html
    names = {image.name for image in files.images}
    assert {"map_peak.png", "secondary_map_peak.png", "map_clamp_loss.png"} <= names
    summary = run_summary(review)
    point = summary["points"][0]
    assert point["figures"]["peak_v"]["worst"] > 0  # the primary's, as before
    assert point["nodes"]["secondary"]["figures"]["peak_v"]["worst"] < 0
    assert summary["limits"]["nodes"]["secondary"]["polarity"] == "falling"
    with (tmp_path / "report" / "points.csv").open(encoding="utf-8") as handle:
        header = next(csv.reader(handle))
    assert "peak_v_worst" in header and "secondary_peak_v_worst" in header
    assert "secondary_verdict" in header and "clamp_loss_w_mean" in header


def test_compare_reports_each_node(offline_runs: tuple[Store, int, int]) -> None:
    store, first, second = offline_runs
    comparison = compare_runs(review_run(store, first), review_run(store, second))
    assert "secondary: peak" in comparison.summary()
    data = comparison_summary(comparison)
    assert data["nodes"] == ["primary", "secondary"]
    matched = [
        p
        for p in data["points"]
        if p["flag"] not in ("missing in baseline", "missing in candidate")
    ]
    assert matched and all("peak_v" in p["nodes"]["secondary"] for p in matched)
    json.dumps(data)  # plain data for scripts


def test_clamp_figures_stored_per_point(offline_runs: tuple[Store, int, int]) -> None:
    store, run_id, _ = offline_runs
    figures = store.point_figures(run_id, node="primary")
    assert all(figures[p.id]["clamp_loss_w"]["n"] == 2 for p in store.points(run_id))
    methods = {
        store.capture_figures(c.id)["clamp_loss_method"]
        for c in store.iter_captures(run_id, with_codes=False)
        if c.node == "primary"
    }
    assert methods <= {"valley-ring", "line-peak"}  # an AC line: never the DC line


def test_export_names_node_captures(offline_runs: tuple[Store, int, int], tmp_path: Path) -> None:
    store, run_id, _ = offline_runs
    assert write_captures_npz(store, run_id, tmp_path / "captures.npz") == 16
    with np.load(tmp_path / "captures.npz") as archive:
        names = set(archive["scaling"]["name"])
    assert {"p000_c00", "p000_c00_secondary", "p003_c01_secondary"} <= names
    assert write_points_csv(store, run_id, tmp_path / "points.csv") == 4


# --------------------------------------------------------------------------- schema upgrade

#: The version-1 schema as labseq wrote it (one node per point).
SCHEMA_V1 = """
CREATE TABLE schema_info ( version INTEGER NOT NULL, application TEXT NOT NULL, created_by TEXT NOT
    NULL, created_at TEXT NOT NULL );
CREATE TABLE runs ( id INTEGER PRIMARY KEY, sequence_text TEXT NOT NULL, sequence_sha256 TEXT NOT
    NULL, sequence_path TEXT NOT NULL, dut_label TEXT NOT NULL, snubber_label TEXT NOT NULL,
    bench_kind TEXT NOT NULL, instruments TEXT NOT NULL DEFAULT '{}', software_version TEXT NOT
    NULL, status TEXT NOT NULL, started_at TEXT NOT NULL, finished_at TEXT, notes TEXT NOT NULL
    DEFAULT '', pid INTEGER, host TEXT );
CREATE TABLE points ( id INTEGER PRIMARY KEY, run_id INTEGER NOT NULL REFERENCES runs(id),
    point_index INTEGER NOT NULL, line_v REAL NOT NULL, line_is_ac INTEGER NOT NULL,
    line_frequency_hz REAL NOT NULL, load_a REAL NOT NULL, status TEXT NOT NULL DEFAULT 'pending',
    source_voltage_v REAL, source_current_a REAL, load_voltage_v REAL, load_current_a REAL,
    meter_voltage_v REAL, meter_current_a REAL, meter_power_w REAL, meter_power_factor REAL,
    output_power_w REAL, efficiency REAL, verdict TEXT, verdict_reasons TEXT, started_at TEXT,
    finished_at TEXT, duration_s REAL, UNIQUE (run_id, point_index) );
CREATE TABLE captures ( id INTEGER PRIMARY KEY, point_id INTEGER NOT NULL REFERENCES points(id),
    run_id INTEGER NOT NULL REFERENCES runs(id), capture_index INTEGER NOT NULL, node TEXT NOT NULL
    DEFAULT 'primary', channel INTEGER NOT NULL, dtype TEXT NOT NULL, x_increment_s REAL NOT NULL,
    x_origin_s REAL NOT NULL, y_increment_v REAL NOT NULL, y_origin_v REAL NOT NULL, y_reference
    REAL NOT NULL, code_min REAL, code_max REAL, points INTEGER NOT NULL, captured_at TEXT NOT
    NULL, codes BLOB NOT NULL, UNIQUE (point_id, capture_index) );
CREATE TABLE capture_figures ( capture_id INTEGER PRIMARY KEY REFERENCES captures(id), base_v REAL,
    plateau_v REAL, peak_v REAL, overshoot_v REAL, overshoot_pct REAL, rise_time_s REAL,
    edge_time_s REAL, ring_frequency_hz REAL, decay_rate_per_s REAL, damping_ratio REAL, q_factor
    REAL, fit_quality REAL, settling_time_s REAL, snubber_loss_w REAL, stress_margin_v REAL,
    snubber_loss_method TEXT, clipped INTEGER, edge_count INTEGER, error TEXT, edges_json TEXT );
CREATE TABLE point_figures ( point_id INTEGER NOT NULL REFERENCES points(id), figure TEXT NOT NULL,
    worst REAL, mean REAL, spread REAL, n INTEGER NOT NULL, PRIMARY KEY (point_id, figure) )
    WITHOUT ROWID;
CREATE TABLE events ( id INTEGER PRIMARY KEY, run_id INTEGER NOT NULL REFERENCES runs(id), point_id
    INTEGER REFERENCES points(id), time TEXT NOT NULL, kind TEXT NOT NULL, message TEXT NOT NULL,
    data TEXT );
INSERT INTO schema_info VALUES (1, 'labseq', '0.1', '2024-01-01T00:00:00');
INSERT INTO runs (id, sequence_text, sequence_sha256, sequence_path, dut_label, snubber_label,
    bench_kind, software_version, status, started_at) VALUES (1, '', '', 'x.toml', 'dut', 'rc',
    'sim', '0.1', 'finished', '2024-01-01');
INSERT INTO points (id, run_id, point_index, line_v, line_is_ac, line_frequency_hz, load_a, status,
    verdict) VALUES (1, 1, 0, 48.0, 0, 0.0, 1.1, 'done', 'pass');
INSERT INTO captures (id, point_id, run_id, capture_index, channel, dtype, x_increment_s,
    x_origin_s, y_increment_v, y_origin_v, y_reference, points, captured_at, codes) VALUES (1, 1,
    1, 0, 1, 'int8', 1e-9, 0.0, 1.0, 0.0, 0.0, 2, '2024-01-01', x'0102');
INSERT INTO capture_figures (capture_id, peak_v) VALUES (1, 101.0);
INSERT INTO point_figures VALUES (1, 'peak_v', 101.0, 100.0, 0.5, 3);
"""


def test_schema_1_store_is_upgraded(tmp_path: Path) -> None:
    path = tmp_path / "old.sqlite"
    with sqlite3.connect(path) as conn:
        conn.executescript(SCHEMA_V1)
    with Store(path) as store:
        assert store.db.execute("SELECT version FROM schema_info").fetchone()[0] == SCHEMA_VERSION
        # the old figures are the primary's; captures, their codes and figures are kept
        assert store.point_figures(1, node="primary")[1]["peak_v"]["worst"] == 101.0
        assert store.node_figures(1) == {1: {"primary": store.point_figures(1, node="primary")[1]}}
        (capture,) = store.captures(1)
        assert capture.node == "primary" and capture.codes.tobytes() == b"\x01\x02"
        assert store.capture_figures(1)["peak_v"] == 101.0
        # a second node's capture of the same acquisition now fits beside it
        waveform = capture
        store.commit_point(
            1, captures=[CaptureRecord(waveform, channel=2, node="secondary")], status=None
        )
        assert store.acquisitions(1) == 1
        # version 3: a run may end with its bench not confirmed safe
        store.set_run_status(1, "unsafe-end")
        assert store.run(1).status == "unsafe-end"
        assert store.integrity_check() == "ok"
    with sqlite3.connect(path) as conn:
        conn.execute("UPDATE schema_info SET version = ?", [SCHEMA_VERSION + 1])
    with pytest.raises(StoreFileError, match="newer labseq"):
        Store(path)


def test_sim_bench_fits_the_sequence_clamp_and_diode_damper(tmp_path: Path) -> None:
    text = DEMO_OFFLINE.read_text(encoding="utf-8")
    text = text.replace('resistance = "47kohm"', 'resistance = "33kohm"')
    text = text.replace('capacitance = "470pF"', 'capacitance = "1nF"')
    path = tmp_path / "parts.toml"
    path.write_text(text, encoding="utf-8")
    design = sim_design(load_sequence(path))
    assert design.clamp_resistance_ohm == pytest.approx(33e3)  # the DUT file says 47 kΩ
    assert design.clamp_voltage_v == load_dut(DEMO_DUTS["offline_ac"]).clamp_voltage_v
    assert design.secondary.snubber_capacitance_f == pytest.approx(1e-9)  # the file: 470 pF
