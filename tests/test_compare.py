"""``labseq compare``: the significance rule, point matching, exit status (0 unchanged, 1 worse,
2 bad input), missing points, the report — on synthetic stores and on a small simulated sweep."""

from __future__ import annotations

import json
import math
import re
from pathlib import Path

import pytest
from sweeps import small_sequence
from test_report import LINES_V, LOADS_A, make_run, parse_page, run_cli

from labseq.compare import DEFAULT_COVERAGE, compare_figure, compare_runs
from labseq.figures import NOISE_FLOORS
from labseq.review import FigureStats, review_run
from labseq.store import Store


@pytest.fixture
def db(tmp_path: Path) -> Path:
    return tmp_path / "store.sqlite"


# --------------------------------------------------------------------------- the rule


def stats(value: float, spread: float | None) -> FigureStats:
    return FigureStats(worst=value, mean=value, spread=spread, n=3)


def test_change_beyond_combined_spread() -> None:
    # Two independent standard deviations combine as √(s_b² + s_c²) (JCGM 100:2008, the GUM,
    # 5.1.2, uncorrelated inputs; from memory); with k = 2 and spreads 3 V and 4 V the threshold
    # is 10 V.
    assert DEFAULT_COVERAGE == 2.0
    inside = compare_figure("peak_v", stats(100.0, 3.0), stats(109.9, 4.0))
    assert inside.flag == "unchanged" and inside.threshold == pytest.approx(10.0)
    beyond = compare_figure("peak_v", stats(100.0, 3.0), stats(110.1, 4.0))
    assert beyond.flag == "worse" and beyond.delta == pytest.approx(10.1)
    assert compare_figure("peak_v", stats(100.0, 3.0), stats(89.9, 4.0)).flag == "better"


def test_direction_per_figure_and_floor() -> None:
    # Higher damping, margin and efficiency are better; lower loss and settling are better.
    assert compare_figure("damping_ratio", stats(0.1, 0.01), stats(0.3, 0.01)).flag == "better"
    assert compare_figure("stress_margin_v", stats(20, 1), stats(5, 1)).flag == "worse"
    assert compare_figure("efficiency", stats(0.90, None), stats(0.88, None)).flag == "worse"
    assert compare_figure("snubber_loss_w", stats(0.2, 0.01), stats(0.1, 0.01)).flag == "better"
    assert compare_figure("settling_time_s", stats(1e-7, 1e-9), stats(3e-7, 1e-9)).flag == "worse"
    # One capture (no spread): the floor alone decides, so quantisation is not a regression.
    floor = NOISE_FLOORS["peak_v"]
    assert compare_figure("peak_v", stats(100, None), stats(100 + 0.9 * floor, None)).flag == (
        "unchanged"
    )
    assert compare_figure("peak_v", stats(100, None), stats(100 + 1.1 * floor, None)).flag == (
        "worse"
    )
    missing = compare_figure("damping_ratio", None, stats(0.3, 0.01))
    assert missing.flag == "missing in baseline" and missing.delta is None


# --------------------------------------------------------------------------- synthetic runs


def test_identical_runs_are_unchanged(db: Path) -> None:
    with Store(db) as store:
        make_run(store)
        make_run(store)
    code, stdout, stderr = run_cli("compare", "1", "2", "--db", str(db), "--json")
    assert code == 0, stderr
    summary = json.loads(stdout)
    assert summary["regressed"] is False and summary["worst_regression"] is None
    assert len(summary["points"]) == len(LINES_V) * len(LOADS_A)
    assert {p["flag"] for p in summary["points"]} == {"unchanged"}
    flags = {f["flag"] for p in summary["points"] for f in p["figures"].values()}
    assert flags == {"unchanged"}
    assert all(f["change"] == 0 for p in summary["points"] for f in p["figures"].values())


def test_one_worse_point_fails_and_is_named(db: Path) -> None:
    with Store(db) as store:
        make_run(store, peak_scale=0.2)
        make_run(store, peak_scale=0.2, worse_at=(60.0, 1.65))
    code, stdout, stderr = run_cli("compare", "1", "2", "--db", str(db))
    assert code == 1
    assert "1 point(s) got worse" in stderr
    assert "worst at 60 V / 1.65 A" in stderr and "pass → fail" in stderr
    assert "peak stress +60 V" in stderr
    assert "Traceback" not in stderr


def test_worse_snubber_names_the_worst_point(db: Path) -> None:
    with Store(db) as store:
        base = make_run(store, peak_scale=0.2, damping=0.3)
        cand = make_run(store, peak_scale=1.0, damping=0.1)
        baseline = {(p.line_v, p.load_a): p.verdict for p in store.points(base)}
        candidate = {(p.line_v, p.load_a): p.verdict for p in store.points(cand)}
        went_to_fail = {k for k in baseline if baseline[k] == "pass" and candidate[k] == "fail"}
        comparison = compare_runs(review_run(store, base), review_run(store, cand))
    assert went_to_fail, "the synthetic candidate must fail where the baseline passed"
    code, stdout, stderr = run_cli("compare", str(base), str(cand), "--db", str(db))
    assert code == 1
    match = re.search(r"worst at (\S+) V / (\S+ m?A)", stderr)
    assert match, stderr
    named = comparison.regressions[0].candidate.point
    assert (named.line_v, named.load_a) in went_to_fail  # pass → fail ranks first
    assert "peak stress +" in stdout and "damping ratio down from" in stdout
    # Swapped, the ring improves everywhere; only the (ungated) snubber loss gets worse.
    args = ("compare", str(cand), str(base), "--db", str(db), "--ignore", "snubber_loss_w")
    code, stdout, stderr = run_cli(*args)
    assert code == 0, stderr
    assert "damping ratio up from" in stdout


def test_missing_points_are_reported_not_fatal(db: Path) -> None:
    with Store(db) as store:
        make_run(store)
        make_run(store, skip=((36.0, 0.55), (75.0, 2.2)))
    code, stdout, stderr = run_cli("compare", "1", "latest", "--db", str(db), "--json")
    assert code == 0, stderr
    summary = json.loads(stdout)
    missing = [p for p in summary["points"] if p["flag"] == "missing in candidate"]
    assert sorted((p["line_v"], p["load_a"]) for p in missing) == [(36.0, 0.55), (75.0, 2.2)]
    assert "2 baseline point(s) missing in the candidate" in summary["summary"]
    code, stdout, _ = run_cli("compare", "2", "1", "--db", str(db))
    assert code == 0 and "2 candidate point(s) not in the baseline" in stdout


def test_setpoints_match_within_tolerance(db: Path) -> None:
    with Store(db) as store:
        make_run(store)
        make_run(store, shift=1.003)  # every line 0.3 % higher: the same points
        make_run(store, shift=1.01)  # 1 % higher: other points at the default 0.5 %
    code, stdout, _ = run_cli("compare", "1", "2", "--db", str(db), "--json")
    assert code == 0
    assert {p["flag"] for p in json.loads(stdout)["points"]} == {"unchanged"}
    code, stdout, _ = run_cli("compare", "1", "3", "--db", str(db), "--json")
    flags = [p["flag"] for p in json.loads(stdout)["points"]]
    assert flags.count("missing in candidate") == flags.count("missing in baseline") == 16
    code, stdout, _ = run_cli("compare", "1", "3", "--db", str(db), "--json", "--tolerance", "2")
    assert {p["flag"] for p in json.loads(stdout)["points"]} == {"unchanged"}


def test_candidate_in_another_store_and_report(tmp_path: Path) -> None:
    base_db, cand_db = tmp_path / "base.sqlite", tmp_path / "cand.sqlite"
    with Store(base_db) as store:
        make_run(store, peak_scale=0.2, damping=0.3)
    with Store(cand_db) as store:
        make_run(store, snubber_label="RC <b>bold</b>", peak_scale=1.0, damping=0.1)
    out = tmp_path / "cmp"
    code, _, stderr = run_cli(
        "compare", "1", "1", "--db", str(base_db), "--candidate-db", str(cand_db),
        "--report", str(out),
    )  # fmt: skip
    assert code == 1, stderr
    parser = parse_page(out / "report.html")
    for section in ("verdict", "runs", "changes", "maps", "overlays", "sequence", "safety"):
        assert section in parser.section_ids
    page = (out / "report.html").read_text(encoding="utf-8")
    assert "<b>bold</b>" not in page and "&lt;b&gt;bold&lt;/b&gt;" in page
    assert "regressed" in page
    assert len(parser.images) == len(list(out.glob("*.png"))) >= 10


def test_bad_input_exits_2(db: Path, tmp_path: Path) -> None:
    with Store(db) as store:
        make_run(store, captures=0)
    for args, words in (
        (("compare", "1", "7", "--db", str(db)), "no run 7"),
        (("compare", "1", "1", "--db", str(tmp_path / "none.sqlite")), "none.sqlite"),
        (("compare", "x", "1", "--db", str(db)), "BASELINE 'x'"),
        (("compare", "1", "1", "--db", str(db), "--tolerance", "80"), "tolerance"),
        (("compare", "1", "1", "--db", str(db), "--ignore", "colour"), "colour"),
    ):
        code, _, stderr = run_cli(*args)
        assert code == 2, (args, stderr)
        assert words in stderr and "Traceback" not in stderr


# --------------------------------------------------------------------------- simulated sweep


@pytest.fixture(scope="module")
def sim_runs(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A store with the small baseline (run 1) and candidate (run 2) sweeps on the sim bench."""
    runner = pytest.importorskip("labseq.runner")
    from labseq.sequence import load_sequence

    tmp_path = tmp_path_factory.mktemp("sim")
    db = tmp_path / "sim.sqlite"
    with Store(db) as store:
        for name in ("baseline", "candidate"):
            runner.run_sequence(load_sequence(small_sequence(tmp_path, name)), store)
    return db


def test_sim_sweep_better_snubber_and_worse_snubber(sim_runs: Path, tmp_path: Path) -> None:
    # The candidate keeps the damper capacitor and brings the resistor down to the ring's
    # characteristic impedance √(L/C) (Severns, "Design of Snubbers for Power Circuits"; RC
    # damper sizing): the ring is better damped and the peak lower. On this simulated DUT the
    # resistor loss falls too, so nothing gets worse and the exit status is 0.
    code, stdout, _ = run_cli("compare", "1", "2", "--db", str(sim_runs))
    assert code == 0, stdout
    assert "damping ratio up from" in stdout and "peak stress −" in stdout
    assert "snubber loss −" in stdout
    # The under-damped snubber as the candidate: worse, exit 1, the worst point named.
    code, stdout, stderr = run_cli("compare", "2", "1", "--db", str(sim_runs), "--json")
    assert code == 1
    summary = json.loads(stdout)
    assert summary["regressed"] and summary["worst_regression"]
    assert re.search(r"worst at (36|75) V / \S+ m?A", stderr)
    damping = [p["figures"]["damping_ratio"]["flag"] for p in summary["points"]]
    # Where the under-damped ring's fit failed (36 V, full load) damping is missing, not better.
    assert damping.count("worse") >= 3 and set(damping) <= {"worse", "missing in candidate"}
    # A run compared with itself is unchanged everywhere.
    code, stdout, _ = run_cli("compare", "2", "2", "--db", str(sim_runs), "--json")
    assert code == 0
    assert {p["flag"] for p in json.loads(stdout)["points"]} == {"unchanged"}


def test_sim_sweep_report(sim_runs: Path, tmp_path: Path) -> None:
    out = tmp_path / "report"
    code, stdout, stderr = run_cli("report", "2", "--db", str(sim_runs), "--out", str(out))
    assert code == 0, stderr
    parser = parse_page(out / "report.html")
    assert "worst" in parser.section_ids and len(parser.images) >= 6
    with Store(sim_runs, create=False) as store:
        review = review_run(store, 2)
        peaks = [p.value("peak_v") for p in review.points]
    assert all(v is not None and math.isfinite(v) for v in peaks)
    worst_row = next(r for r in parser.rows_by_section["worst"] if r and r[0] == "peak stress")
    top = review.worst["peak_v"].point.point
    assert worst_row[2].startswith(f"{top.line_v:g} V / ")
    assert max(peaks) == review.worst["peak_v"].value
