"""What a reader sees first: the report's sentence, its points worst first with why, outlined
and bounded cells, each figure's own verdict, the simulated mark; the compare's outcome, sign
convention and warnings; `check`'s limits, estimate and plausibility warnings; the console's
errors; and one JSON shape per object across commands.

The expected values are worked out here from the figures the test stores (peak = line + 25 V +
20 V/A × load, limit 150 V × 0.8 = 120 V), never read back from the code under test."""

from __future__ import annotations

import io
import json
import re
import sqlite3
import subprocess
import sys
from pathlib import Path

import matplotlib.pyplot as plt
import numpy as np
import pytest
from sweeps import ROOT, demo_sequence, run_cli
from test_report import LINES_V, LOADS_A, MAX_PEAK_V, make_run, parse_page

from labseq.compare import compare_runs
from labseq.figures import format_change
from labseq.report import plots
from labseq.report.html import CONTENT_WIDTH_PX, safety_text
from labseq.report.run_report import beyond_grid, bound_grid, cell_texts
from labseq.review import RUN_FIELDS, headline, not_passed, reason_words, review_run
from labseq.runlog import point_problems, run_log
from labseq.store import Store
from labseq.units import format_si

DEMO = ROOT / "labseq" / "examples" / "demo_dc_flyback.toml"
OFFLINE = ROOT / "labseq" / "examples" / "demo_offline_flyback.toml"


def peak_of(line_v: float, load_a: float) -> float:
    """The synthetic run's peak at a point (tests/test_report.py's point_figures)."""
    return line_v + 25.0 + 20.0 * load_a


@pytest.fixture
def db(tmp_path: Path) -> Path:
    return tmp_path / "runs.sqlite"


# --------------------------------------------------------------------------- the run report


def test_first_sentence_names_the_worst_point_and_its_margin(db: Path) -> None:
    with Store(db) as store:
        run_id = make_run(store)
        review = review_run(store, run_id)
    failing = [(v, a) for v in LINES_V for a in LOADS_A if peak_of(v, a) > MAX_PEAK_V]
    worst_v, worst_a = max(failing, key=lambda p: peak_of(*p))
    worst = peak_of(worst_v, worst_a)
    sentence = headline(review)
    assert sentence == (
        f"fails at {len(failing)} of 16 points; worst: peak stress {format_si(worst, 'V')} at "
        f"{format_si(worst_v, 'V')} / {format_si(worst_a, 'A')} (100 %), "
        f"{format_si(worst - MAX_PEAK_V, 'V')} over the derated rating"
    )


def test_passing_run_sentence_says_the_closest_margin(db: Path) -> None:
    # peaks scaled to line + 25 V + 7 V/A × load: 115.4 V at most, 4.6 V under 120 V; the
    # snubber budget raised to 5 W so the peak is the figure closest to its limit
    text = DEMO.read_text(encoding="utf-8").replace(
        'resistor_power_budget = "0.5 W"', 'resistor_power_budget = "5 W"'
    )
    with Store(db) as store:
        run_id = make_run(store, peak_scale=0.35, sequence_text=text)
        sentence = headline(review_run(store, run_id))
    closest = 75.0 + 25.0 + 20.0 * 2.2 * 0.35
    assert sentence == (
        f"passes at all 16 points; closest to a limit: peak stress {format_si(closest, 'V')} at "
        f"75 V / 2.2 A (100 %), {format_si(MAX_PEAK_V - closest, 'V')} under the derated rating"
    )


def test_points_that_did_not_pass_are_worst_first_with_why(db: Path, tmp_path: Path) -> None:
    with Store(db) as store:
        run_id = make_run(store, incomplete_at=(36.0, 0.55))
        skipped = next(p for p in store.points(run_id) if (p.line_v, p.load_a) == (36.0, 0.55))
        store.log_event(
            run_id,
            "fault",
            "36 V / 0.55 A: scope (TCPIP::x): trigger did not fire within 2 s",
            point_id=skipped.id,
        )
        store.log_event(run_id, "skip", "point 1 skipped after the error", point_id=skipped.id)
        review = review_run(store, run_id)
        problems = point_problems(run_log(store, run_id))
    listed = not_passed(review, problems)
    fails = [item for item in listed if item.point.verdict == "fail"]
    margins = [item.beyond[0].excess for item in fails]
    assert margins == sorted(margins, reverse=True) and len(margins) >= 2
    assert listed[-1].point.point.id == skipped.id  # incomplete after every failure
    assert listed[-1].why == "scope (TCPIP::x): trigger did not fire within 2 s — skipped"
    out = tmp_path / "report"
    code, _, stderr = run_cli("report", str(run_id), "--db", str(db), "--out", str(out))
    assert code == 0, stderr
    page = parse_page(out / "report.html")
    rows = [r for r in page.rows_by_section["grid"] if len(r) == 3 and r[0] != "point"]
    why = [r[2] for r in rows]
    assert why[-1].endswith("— skipped") and "trigger did not fire" in why[-1]
    over = [float(re.search(r", ([\d.]+) V over", w)[1]) for w in why if " over " in w]
    assert over == sorted(over, reverse=True) and len(over) == len(fails)
    # reasons in words: no figure keys, and the stored "peak_v …" reads "peak stress …"
    assert not any(re.search(r"\b[a-z]+_[a-z_]+\b", w) for w in why)
    html = (out / "report.html").read_text(encoding="utf-8")
    assert 'id="headline"' in html and "Fails at" in html


def test_reason_words_for_reasons_an_older_store_kept() -> None:
    assert reason_words("primary: damping_ratio 266 m breaks limit ≥ 100 m") == (
        "primary: damping ratio 0.266 breaks limit ≥ 0.1"
    )
    assert (
        reason_words("peak_v 124 V breaks limit ≤ 120 V")
        == "peak stress 124 V breaks limit ≤ 120 V"
    )
    assert reason_words("settling_time_s: not determined; limit ≤ 500 ns") == (
        "settling time: not determined; limit ≤ 500 ns"
    )
    already = "peak stress 124 V breaks limit ≤ 120 V"
    assert reason_words(already) == already


def test_failing_cells_outlined_and_clipped_cells_read_as_bounds(db: Path) -> None:
    with Store(db) as store:
        run_id = make_run(store)
        clipped = next(p for p in store.points(run_id) if (p.line_v, p.load_a) == (75.0, 2.2))
        for capture in store.captures(clipped.id, with_codes=False):
            store.set_capture_figures(capture.id, {"peak_v": 144.0, "clipped": True})
        review = review_run(store, run_id)
    beyond = beyond_grid(review, "peak_v")
    expected = np.array([[peak_of(v, a) > MAX_PEAK_V for a in LOADS_A] for v in LINES_V])
    assert (beyond == expected).all()
    bounds = bound_grid(review, "peak_v")
    row, column = LINES_V.index(75.0), LOADS_A.index(2.2)
    assert bounds[row, column] == "≥" and (bounds != "").sum() == 1
    texts = cell_texts(review.grid("peak_v"), lambda v: format_si(v, "V"), bounds)
    assert texts(row, column) == f"≥ {format_si(peak_of(75.0, 2.2), 'V')}"
    assert not texts(0, 0).startswith("≥")
    # the stress margin is bounded the other way: the true margin may be smaller
    assert bound_grid(review, "stress_margin_v")[row, column] == "≤"


def test_map_cell_text_is_legible_at_the_page_width(db: Path, tmp_path: Path) -> None:
    # ≥ 9 pt as shown: the cell font in points times the scale the page shows the image at.
    with Store(db) as store:
        run_id = make_run(store)
    out = tmp_path / "report"
    assert run_cli("report", str(run_id), "--db", str(db), "--out", str(out))[0] == 0
    for png in sorted(out.glob("map_*.png")):
        width_px = plt.imread(png).shape[1]
        shown = min(1.0, CONTENT_WIDTH_PX / width_px)
        assert plots.CELL_FONT_PT * shown >= 9.0, (png.name, width_px)
    css = (out / "report.html").read_text(encoding="utf-8")
    assert ".maps { display: grid; grid-template-columns: 1fr;" in css  # one map to a row


def test_worst_table_gives_each_figure_its_own_verdict(db: Path, tmp_path: Path) -> None:
    with Store(db) as store:
        run_id = make_run(store)
    out = tmp_path / "report"
    assert run_cli("report", str(run_id), "--db", str(db), "--out", str(out))[0] == 0
    page = parse_page(out / "report.html")
    rows = {r[0]: r for r in page.rows_by_section["worst"] if len(r) == 7}
    assert rows["figure"][4:] == ["this figure", "margin", "the point's verdict"]
    worst = peak_of(75.0, 2.2)
    assert rows["peak stress"][4] == "fail"
    assert rows["peak stress"][5] == f"{format_si(worst - MAX_PEAK_V, 'V')} over"
    # the snubber loss is within its 500 mW budget wherever it is worst, whatever the point
    assert rows["snubber loss"][4] == "pass" and rows["snubber loss"][5].endswith("to spare")
    assert rows["overshoot"][4] == "no limit"


def test_identities_table_simulated_mark_and_safety_text(db: Path, tmp_path: Path) -> None:
    with Store(db) as store:
        run_id = make_run(store)
        store.set_run_instruments(
            run_id,
            {
                "scope": {
                    "manufacturer": "ACME",
                    "model": "SCOPE-1",
                    "serial": "S1",
                    "firmware": "2.0",
                    "resource": "TCPIP::10.0.0.9::INSTR",
                }
            },
        )
    out = tmp_path / "report"
    assert run_cli("report", str(run_id), "--db", str(db), "--out", str(out))[0] == 0
    html = (out / "report.html").read_text(encoding="utf-8")
    page = parse_page(out / "report.html")
    assert ["scope", "ACME", "SCOPE-1", "S1", "2.0", "TCPIP::10.0.0.9::INSTR"] in (
        page.rows_by_section["identity"]
    )
    assert "{&#x27;" not in html and "{'" not in html  # no dict text
    assert html.index('id="simulated"') < html.index("<h1>")  # marked at the very top
    assert "DC input" in html and "offline converter" not in html  # the DUT takes 36-75 V DC
    # a real bench's run carries no such mark
    with sqlite3.connect(db) as connection:
        connection.execute("UPDATE runs SET bench_kind = 'visa' WHERE id = ?", (run_id,))
    assert run_cli("report", str(run_id), "--db", str(db), "--out", str(tmp_path / "r2"))[0] == 0
    assert 'id="simulated"' not in (tmp_path / "r2" / "report.html").read_text(encoding="utf-8")
    # the offline text for an AC-input DUT
    assert "offline converter" in safety_text(True) and "DC input" not in safety_text(True)


def test_run_log_folds_point_timings(db: Path, tmp_path: Path) -> None:
    with Store(db) as store:
        run_id = make_run(store)
        for point in store.points(run_id):
            store.log_event(
                run_id,
                "timing",
                f"point {point.point_index + 1}/16: 0.{point.point_index + 10} s",
                point_id=point.id,
            )
        store.log_event(run_id, "retry", "reconnecting scope: dropped")
    out = tmp_path / "report"
    assert run_cli("report", str(run_id), "--db", str(db), "--out", str(out))[0] == 0
    page = parse_page(out / "report.html")
    log = [r for r in page.rows_by_section["log"] if r[0] != "time (UTC)"]
    timing = [r for r in log if r[1] == "timing"]
    assert len(timing) == 1 and timing[0][2].startswith("16 points timed: 0.10 s to 0.25 s")
    assert any(r[1] == "retry" for r in log)


# --------------------------------------------------------------------------- compare


def test_compare_outcome_carries_the_candidates_own_verdict(db: Path, tmp_path: Path) -> None:
    with Store(db) as store:
        base, cand = make_run(store), make_run(store)
        comparison = compare_runs(review_run(store, base), review_run(store, cand))
    failing = sum(peak_of(v, a) > MAX_PEAK_V for v in LINES_V for a in LOADS_A)
    assert comparison.outcome == f"no regression — candidate still fails {failing} of 16 points"
    assert comparison.differences() == []
    out = tmp_path / "cmp"
    code, stdout, _ = run_cli(
        "compare", str(base), str(cand), "--db", str(db), "--report", str(out)
    )
    assert code == 0 and stdout.splitlines()[1] == comparison.outcome
    html = (out / "report.html").read_text(encoding="utf-8")
    assert 'class="badge v-incomplete">no regression</span> — candidate still fails' in html


def test_compare_warns_when_dut_grid_or_limits_differ(db: Path) -> None:
    other = DEMO.read_text(encoding="utf-8").replace('rated_load = "2.2 A"', 'rated_load = "2.4 A"')
    other = other.replace("min_damping_ratio = 0.1", "min_damping_ratio = 0.2")
    with Store(db) as store:
        base = make_run(store)
        cand = make_run(store, sequence_text=other, skip=((36.0, 0.55),))
        store.db.execute("UPDATE runs SET dut_label = 'another DUT' WHERE id = ?", [cand])
        comparison = compare_runs(review_run(store, base), review_run(store, cand))
    warnings = comparison.differences()
    assert any(w.startswith("different DUTs:") for w in warnings)
    assert any(w.startswith("different rated loads: 2.2 A → 2.4 A") for w in warnings)
    assert any("1 baseline point(s) have no match" in w for w in warnings)
    assert any("damping ratio ≥ 0.1 → 0.2" in w for w in warnings)
    # each run's own rated load: 550 mA is 25 % of 2.2 A and 22.9 % of 2.4 A
    change = next(p for p in comparison.points if p.matched and p.either.point.load_a == 0.55)
    label = comparison.label(change)
    assert "25 % of the baseline's rated load" in label
    assert "22.9 % of the candidate's" in label


def test_one_sign_convention_in_change_maps(db: Path, tmp_path: Path, monkeypatch) -> None:
    # Cells, colour bar and text all give candidate − baseline; purple marks better both for a
    # figure where lower is better (peak) and one where higher is (damping ratio).
    calls = []
    real = plots.heat_map

    def spy(values, *args, **kwargs):
        calls.append((values, kwargs))
        return real(values, *args, **kwargs)

    monkeypatch.setattr(plots, "heat_map", spy)
    with Store(db) as store:
        base, cand = make_run(store), make_run(store, peak_scale=0.5, damping=0.4)
        comparison = compare_runs(review_run(store, base), review_run(store, cand))
        from labseq.report import build_compare_report

        build_compare_report(comparison, store, store, tmp_path / "cmp")
    change_maps = [(v, k) for v, k in calls if k.get("centre") == 0.0]
    assert change_maps
    for values, kwargs in change_maps:
        finite = np.isfinite(values) & (values != 0)
        scale = kwargs["colour_values"][finite] / values[finite]
        assert (scale > 0).all()  # colour follows the cells' own sign
        assert kwargs["colour_format"] is None or kwargs["colour_format"](-20.0).startswith("−")
    peak_values, peak_kwargs = next((v, k) for v, k in change_maps if "Peak stress" in k["title"])
    assert np.nanmax(peak_values) < 0  # the candidate's peaks are lower: better
    cmap = plt.get_cmap(peak_kwargs["cmap_name"])
    red, _, blue, _ = cmap(0.0)  # the most negative change of a lower-is-better figure
    assert blue > red  # purple end (ColorBrewer PuOr)
    assert format_change("peak_v", float(np.nanmin(peak_values))).startswith("−")
    cmap = plt.get_cmap(plots.change_map(True))
    red, _, blue, _ = cmap(1.0)  # the most positive change of a higher-is-better figure
    assert blue > red


# --------------------------------------------------------------------------- check and console


def test_check_prints_limits_estimate_and_plausibility(tmp_path: Path) -> None:
    code, stdout, _ = run_cli("check", str(DEMO))
    assert code == 0
    assert "peak stress ≤ 120 V (rating 150 V × derating 0.8)" in stdout
    assert "damping ratio ≥ 0.1" in stdout and "settle 50 ms" in stdout
    # 16 points × (50 ms + 3 × (20 µs + 150 ms) + 50 ms) + 6 ramp steps × 20 ms = 8.92 s
    assert "estimated run time: about 8.92 s" in stdout and "how: each point" in stdout
    assert "warning: node primary: the snubber" not in stdout
    # 330 nF where 330 pF was meant: Cs·V²·fsw = 330 nF × (75 V)² × 200 kHz = 371 W (Severns)
    text = DEMO.read_text(encoding="utf-8").replace(
        'capacitance = "220pF"', 'capacitance = "330nF"'
    )
    text = text.replace('volts_per_div = "25 V"', 'volts_per_div = "2 V"')
    odd = tmp_path / "odd.toml"
    odd.write_text(text, encoding="utf-8")
    code, stdout, _ = run_cli("check", str(odd))
    assert code == 0
    assert "Cs·V²·fsw is about 371 W" in stdout and "budget of 500 mW" in stdout
    # screen 100 V ± 5 div × 2 V reaches 110 V, under the 120 V derated rating: peaks clip
    assert (
        "the scope screen reaches 110 V but the peak may reach the derated rating 120 V" in stdout
    )


def test_check_json(tmp_path: Path) -> None:
    code, stdout, _ = run_cli("check", str(DEMO), "--json")
    assert code == 0
    found = json.loads(stdout)
    assert found["ok"] and len(found["points"]) == 16
    assert set(found["points"][0]) == {"point_index", "line_v", "line_is_ac", "load_a"}
    peak = next(limit for limit in found["limits"] if limit["figure"] == "peak_v")
    assert peak["value"] == pytest.approx(120.0)
    # 16 × (50 ms + 3 × (20 µs + 150 ms) + 50 ms) + 6 × 20 ms
    assert found["estimate"]["typical_s"] == pytest.approx(16 * (0.1 + 3 * 0.15002) + 0.12)


def test_one_error_per_root_cause(tmp_path: Path) -> None:
    bad = tmp_path / "bad.toml"
    bad.write_text(
        DEMO.read_text(encoding="utf-8").replace('rated_load = "2.2 A"', 'rated_load = "2.2 X"'),
        encoding="utf-8",
    )
    code, _, stderr = run_cli("check", str(bad))
    assert code == 2
    assert "1 problem:" in stderr and "dut.rated_load" in stderr
    assert "grid.load_values" not in stderr  # the percentages are not blamed as well


def test_design_with_a_ring_frequency_alone_is_an_error() -> None:
    code, stdout, stderr = run_cli("design", "--ring-freq", "25MHz")
    assert code == 2 and stdout == ""
    assert "a ring frequency alone cannot size a snubber" in stderr and "--leakage" in stderr


def test_output_that_is_not_a_terminal_is_not_wrapped() -> None:
    from labseq.progress import make_console

    console = make_console(stderr=True)
    assert not console.is_terminal
    line = "TCPIP::127.0.0.1::40449::SOCKET " * 12
    buffer = io.StringIO()
    console.file = buffer
    console.print(line, markup=False)
    assert buffer.getvalue() == line + "\n"


# --------------------------------------------------------------------------- machine output


def test_one_run_object_in_every_commands_json(db: Path, tmp_path: Path) -> None:
    with Store(db) as store:
        run_id = make_run(store)
        make_run(store)
    seen = []
    _, stdout, _ = run_cli("runs", "--db", str(db), "--json")
    seen.append(json.loads(stdout)[0])
    _, stdout, _ = run_cli("report", "1", "--db", str(db), "--format", "json")
    report = json.loads(stdout)
    seen.append(report["run"])
    _, stdout, _ = run_cli("compare", "1", "2", "--db", str(db), "--json")
    seen.append(json.loads(stdout)["baseline"])
    code, stdout, stderr = run_cli(
        "export", "1", "--db", str(db), "--json", "--out", str(tmp_path / "ex")
    )
    assert code == 0, stderr
    exported = json.loads(stdout)
    seen.append(exported["run"])
    assert exported["points"] == 16 and "points.csv" in exported["files"]
    assert {tuple(sorted(obj)) for obj in seen} == {
        tuple(sorted([*RUN_FIELDS, "simulated", "end_safety", "recorded_status", "label"]))
    }
    assert all(obj == seen[0] for obj in seen) and seen[0]["id"] == run_id
    assert report["headline"].startswith("fails at")
    point_keys = {"point_index", "line_v", "line_is_ac", "load_a"}
    assert point_keys <= set(report["points"][0])
    # CSV booleans are true/false
    csv_text = (tmp_path / "ex" / "points.csv").read_text(encoding="utf-8")
    assert ",false," in csv_text and "False" not in csv_text


def test_default_output_folders_share_one_pattern(db: Path, tmp_path: Path, monkeypatch) -> None:
    with Store(db) as store:
        make_run(store)
    monkeypatch.chdir(tmp_path)
    assert run_cli("export", "1", "--db", str(db))[0] == 0
    assert run_cli("report", "1", "--db", str(db))[0] == 0
    assert (tmp_path / "export-run1" / "points.csv").exists()
    assert (tmp_path / "report-run1" / "report.html").exists()


def test_run_and_analyze_run_json_on_the_simulated_bench(tmp_path: Path) -> None:
    sequence = demo_sequence(tmp_path, lines=["36 V"], loads=["1.1 A"], captures=1)
    db = tmp_path / "sim.sqlite"
    code, stdout, stderr = run_cli("run", str(sequence), "--db", str(db), "--json", "--quiet")
    assert code == 0, stderr
    outcome = json.loads(stdout)
    assert outcome["run"]["simulated"] is True and outcome["run"]["id"] == 1
    assert outcome["outcome"]["status"] == "finished" and outcome["outcome"]["exit_code"] == 0
    assert outcome["outcome"]["bench_safe"] is True
    code, stdout, _ = run_cli("analyze-run", "1", "--db", str(db), "--json")
    again = json.loads(stdout)
    assert code == 0 and again["captures_analysed"] == 1
    assert set(again["run"]) == set(outcome["run"])


def test_sim_json_gives_the_resource_strings(tmp_path: Path) -> None:
    process = subprocess.Popen(
        [sys.executable, "-m", "labseq", "sim", "--json"],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    try:
        found = json.loads(process.stdout.readline())
    finally:
        process.terminate()
        process.wait(timeout=30)
    assert set(found["resources"]) == {"source", "load", "meter", "scope"}
    assert all(
        re.fullmatch(r"TCPIP::127\.0\.0\.1::\d+::SOCKET", r) for r in found["resources"].values()
    )
    assert found["simulated"] is True


def test_incomplete_run_sentence_names_one_reason(db: Path) -> None:
    text = DEMO.read_text(encoding="utf-8").replace(
        'resistor_power_budget = "0.5 W"', 'resistor_power_budget = "5 W"'
    )
    with Store(db) as store:
        run_id = make_run(store, peak_scale=0.35, sequence_text=text, incomplete_at=(36.0, 0.55))
        sentence = headline(review_run(store, run_id))
    assert sentence == (
        "incomplete: 1 of 16 points could not be judged (e.g. 36 V / 550 mA (25 %): damping "
        "ratio: not determined); the other 15 pass"
    )
