"""What a CI job acts on: the exit statuses (1 only ever means "judged"), ``--strict`` on run,
resume, analyze-run and report, and ``--junit FILE`` on report and compare."""

from __future__ import annotations

import re
import xml.etree.ElementTree as ET
from collections.abc import Iterator
from pathlib import Path

import pytest
from sweeps import demo_sequence, run_cli
from test_report import LINES_V, LOADS_A, Ringing, make_run

from labseq.compare import compare_runs
from labseq.review import review_run
from labseq.store import CaptureRecord, Store

# --------------------------------------------------------------------------- exit statuses


def test_help_lists_the_exit_statuses() -> None:
    code, out, _ = run_cli("--help")
    assert code == 0
    epilog = out[out.index("Exit status:") :]
    for status in ("0", "1", "2", "3", "128 + n"):
        assert re.search(rf"^\s+{re.escape(status)}\s+\S", epilog, re.MULTILINE), status
    assert "130 Ctrl-C" in epilog and "143 SIGTERM" in epilog and "--strict" in epilog


@pytest.mark.parametrize(
    ("command", "target"),
    [
        ("compare", "labseq.commands.compare.compare_runs"),
        ("report", "labseq.commands.report.review_run"),
        ("runs", "labseq.store.Store.runs"),
    ],
)
def test_a_crash_inside_a_command_exits_3_not_1(
    command: str, target: str, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    db = tmp_path / "store.sqlite"
    with Store(db) as store:
        make_run(store, captures=0)
        make_run(store, captures=0)

    def crash(*_args: object, **_kwargs: object) -> None:
        raise ZeroDivisionError("a defect")

    monkeypatch.setattr(target, crash)
    monkeypatch.delenv("LABSEQ_DEBUG", raising=False)
    args = {"compare": ["1", "2"], "report": ["1", "--format", "json"], "runs": []}[command]
    code, _, err = run_cli(command, *args, "--db", str(db))
    assert code == 3, err
    assert "unexpected error: ZeroDivisionError: a defect" in err and "Traceback" not in err


def test_a_damaged_store_is_a_store_failure(tmp_path: Path) -> None:
    db = tmp_path / "store.sqlite"
    with Store(db) as store:
        make_run(store, captures=1)
        store.db.execute("UPDATE captures SET codes = x'00' WHERE id = 1")
    code, _, err = run_cli("analyze-run", "1", "--db", str(db))
    assert code == 3 and "is damaged" in err and "Traceback" not in err


# --------------------------------------------------------------------------- --strict


@pytest.fixture(scope="module")
def sim_store(tmp_path_factory: pytest.TempPathFactory) -> Iterator[tuple[Path, Path, Path]]:
    """A one-point sweep on the simulated bench (run 1), with the sequence it was run with and
    one whose peak limit no flyback meets."""
    tmp_path = tmp_path_factory.mktemp("strict")
    sequence = demo_sequence(tmp_path, lines=["48 V"], loads=["50 %"], captures=1)
    tight = tmp_path / "tight.toml"
    tight.write_text(
        sequence.read_text().replace("[limits]", '[limits]\nmax_peak = "10 V"'), encoding="utf-8"
    )
    db = tmp_path / "run.sqlite"
    code, _, err = run_cli("run", str(sequence), "--db", str(db), "--quiet")
    assert code == 0, err
    yield db, sequence, tight


def test_strict_report_and_analyze_run(sim_store: tuple[Path, Path, Path]) -> None:
    db, sequence, tight = sim_store
    with Store(db, create=False) as store:
        assert review_run(store, 1).verdict == "pass"
    assert run_cli("report", "1", "--db", str(db), "--format", "json", "--strict")[0] == 0
    # Judged again against a limit the point breaks: a fail, which only --strict turns into 1.
    code, out, _ = run_cli("analyze-run", "1", "--db", str(db), "--sequence", str(tight))
    assert code == 0 and "1 fail" in out
    code, _, err = run_cli(
        "analyze-run", "1", "--db", str(db), "--sequence", str(tight), "--strict"
    )
    assert code == 1 and "run 1 verdict: fail (--strict" in err
    assert run_cli("report", "1", "--db", str(db), "--format", "json")[0] == 0
    code, _, err = run_cli("report", "1", "--db", str(db), "--format", "json", "--strict")
    assert code == 1 and "verdict: fail" in err
    # resume of a finished run does nothing on the bench but make it safe; --strict still judges
    assert run_cli("resume", "1", "--db", str(db), "--quiet")[0] == 0
    assert run_cli("resume", "1", "--db", str(db), "--quiet", "--strict")[0] == 1
    # and judged back against the run's own limits it passes again
    code, _, _ = run_cli("analyze-run", "1", "--db", str(db), "--strict")
    assert code == 0
    assert run_cli("resume", "1", "--db", str(db), "--quiet", "--strict")[0] == 0


def test_strict_run(sim_store: tuple[Path, Path, Path], tmp_path: Path) -> None:
    _, _, tight = sim_store
    db = tmp_path / "tight.sqlite"
    code, out, err = run_cli("run", str(tight), "--db", str(db), "--quiet")
    assert code == 0 and "finished: 1/1 points" in out, err
    code, _, err = run_cli("run", str(tight), "--db", str(db), "--quiet", "--strict")
    assert code == 1 and "run 2 verdict: fail" in err
    with Store(db, create=False) as store:
        assert [p.verdict for p in store.points(2)] == ["fail"]


def test_strict_counts_an_incomplete_run(tmp_path: Path) -> None:
    db = tmp_path / "store.sqlite"
    with Store(db) as store:
        make_run(store, peak_scale=0.2, captures=0)
        make_run(store, peak_scale=0.2, captures=0, incomplete_at=(48.0, 1.1))
    assert run_cli("report", "1", "--db", str(db), "--format", "json", "--strict")[0] == 0
    code, _, err = run_cli("report", "2", "--db", str(db), "--format", "json", "--strict")
    assert code == 1 and "verdict: incomplete" in err


# --------------------------------------------------------------------------- --junit


def _check_counts(root: ET.Element) -> None:
    """Every tests/failures/errors/skipped attribute agrees with the cases beneath it."""
    assert root.tag == "testsuites"
    for element in (root, *root.findall("testsuite")):
        cases = list(element.iter("testcase"))
        assert int(element.get("tests")) == len(cases)
        for kind, attribute in (
            ("failure", "failures"),
            ("error", "errors"),
            ("skipped", "skipped"),
        ):
            assert int(element.get(attribute)) == sum(c.find(kind) is not None for c in cases)
    for case in root.iter("testcase"):
        assert case.get("classname") and case.get("name")
        assert sum(case.find(k) is not None for k in ("failure", "error", "skipped")) <= 1


def test_report_junit_one_case_per_point(tmp_path: Path) -> None:
    db = tmp_path / "store.sqlite"
    with Store(db) as store:
        run_id = make_run(store, captures=0, incomplete_at=(36.0, 0.55))
        points = store.points(run_id)
    xml = tmp_path / "junit.xml"
    code, _, err = run_cli(
        "report", "1", "--db", str(db), "--out", str(tmp_path / "r"), "--junit", str(xml)
    )
    assert code == 0, err
    root = ET.parse(xml).getroot()
    _check_counts(root)
    cases = list(root.iter("testcase"))
    assert len(root.findall("testsuite")) == 1 and len(cases) == len(LINES_V) * len(LOADS_A)
    failing = [p for p in points if p.verdict == "fail"]
    assert failing, "the synthetic run must fail somewhere"
    assert int(root.get("failures")) == len(failing) and int(root.get("errors")) == 1
    by_name = {case.get("name"): case for case in cases}
    for point in failing:
        case = next(c for n, c in by_name.items() if n.startswith(f"p{point.point_index:03d} "))
        failure = case.find("failure")
        assert failure is not None and failure.get("message") == "; ".join(point.verdict_reasons)
    error = next(c for c in cases if c.find("error") is not None).find("error")
    assert "damping_ratio: not determined" in error.get("message")


def test_report_junit_a_suite_per_node(tmp_path: Path) -> None:
    db = tmp_path / "store.sqlite"
    with Store(db) as store:
        run_id = make_run(store, captures=0)
        point = store.points(run_id)[0]
        reasons = ["secondary: peak_v 190 V breaks limit ≤ 160 V"]
        store.set_point_judgement(
            point.id,
            {"primary": {}, "secondary": {}},
            {"primary": ("pass", []), "secondary": ("fail", reasons[0:1])},
            "fail",
            reasons,
        )
        # a capture of a second node makes it a node of the run
        secondary = CaptureRecord(Ringing(-60.0, 20.0, 0.3, seed=1), node="secondary")
        store.commit_point(point.id, captures=[secondary], status=None)
    xml = tmp_path / "junit.xml"
    code, _, err = run_cli("report", "1", "--db", str(db), "--format", "json", "--junit", str(xml))
    assert code == 0, err
    root = ET.parse(xml).getroot()
    _check_counts(root)
    suites = root.findall("testsuite")
    assert [s.get("name").split(" — ")[-1] for s in suites] == ["Primary switch", "Secondary"]
    secondary = suites[1]
    assert int(secondary.get("tests")) == len(LINES_V) * len(LOADS_A)
    failure = secondary.find("testcase/failure")
    assert failure is not None and failure.get("message") == reasons[0]


def test_compare_junit_failures_are_the_regressions(tmp_path: Path) -> None:
    db = tmp_path / "store.sqlite"
    with Store(db) as store:
        base = make_run(store, peak_scale=0.2, damping=0.3, captures=0)
        cand = make_run(store, peak_scale=1.0, damping=0.1, captures=0, skip=((36.0, 0.55),))
        comparison = compare_runs(review_run(store, base), review_run(store, cand))
    xml = tmp_path / "compare.xml"
    code, _, _ = run_cli("compare", "1", "2", "--db", str(db), "--junit", str(xml))
    assert code == 1
    root = ET.parse(xml).getroot()
    _check_counts(root)
    cases = list(root.iter("testcase"))
    # one verdict case per point of either run, one per figure compared at a matched point
    figures = sum(len(p.all_changes) for p in comparison.points)
    assert len(cases) == len(comparison.points) + figures
    worse = sum(
        c.flag == "worse" and c.figure in comparison.gated
        for p in comparison.points
        for c in p.all_changes
    )
    went_to_fail = sum(p.verdict_went_to_fail for p in comparison.points)
    assert worse and went_to_fail
    assert int(root.get("failures")) == worse + went_to_fail
    assert int(root.get("skipped")) == 1  # the point the candidate lacks
    failed_points = {
        case.get("name").split(":")[0] for case in cases if case.find("failure") is not None
    }
    assert failed_points == {comparison.label(p) for p in comparison.regressions}
    # an unchanged compare writes only passing cases
    code, _, _ = run_cli("compare", "1", "1", "--db", str(db), "--junit", str(xml))
    root = ET.parse(xml).getroot()
    assert code == 0 and root.get("failures") == "0" and int(root.get("tests")) > 16


def test_junit_to_an_unwritable_place_is_bad_input(tmp_path: Path) -> None:
    db = tmp_path / "store.sqlite"
    with Store(db) as store:
        make_run(store, captures=0)
    target = tmp_path / "missing-dir" / "junit.xml"
    code, _, err = run_cli(
        "report", "1", "--db", str(db), "--format", "json", "--junit", str(target)
    )
    assert code == 2 and str(target) in err and "Traceback" not in err
