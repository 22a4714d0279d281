"""The run's event log is shown, not only written: ``labseq log RUN`` (lines and JSON) and the
run report's log section give back every event the runner recorded, in order, with its point."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from sweeps import demo_sequence, run_cli

from labseq.store import Store


@pytest.fixture(scope="module")
def faulty_run(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A two-point run on the simulated bench whose scope never triggers at the second point
    (the point is skipped and the run goes on)."""
    tmp_path = tmp_path_factory.mktemp("log")
    path = demo_sequence(
        tmp_path, lines=["48 V"], loads=["1 A", "2 A"], captures=1, acquisition_timeout="0.5 s"
    )
    db = tmp_path / "run.sqlite"
    code, _, err = run_cli(
        "run", str(path), "--db", str(db), "--quiet", "--sim-faults", "scope:no-trigger@point=2"
    )
    assert code == 3, err  # a point is missing after the scope failed
    return db


def test_log_json_holds_every_event_in_order(faulty_run: Path) -> None:
    code, out, err = run_cli("log", "latest", "--db", str(faulty_run), "--json")
    assert code == 0, err
    events = json.loads(out)
    with Store(faulty_run) as store:
        stored = store.events(1)
    assert [(e["time"], e["kind"], e["message"]) for e in events] == [
        (e["time"], e["kind"], e["message"]) for e in stored
    ]
    assert events == sorted(events, key=lambda e: e["time"])
    kinds = [e["kind"] for e in events]
    assert kinds[0] == "safety" and "skip" in kinds and "fault" in kinds
    [fault] = [e for e in events if e["kind"] == "fault" and e["point_index"] is not None]
    assert (fault["point_index"], fault["line_v"], fault["load_a"]) == (1, 48.0, 2.0)
    ending = [e for e in events if e["kind"] == "safety" and e["message"].startswith("end of run")]
    assert len(ending) == 1 and ending[0]["data"] == {"safe": True, "when": "end of run"}


def test_log_lines_and_kind_filter(faulty_run: Path) -> None:
    code, out, err = run_cli("log", "1", "--db", str(faulty_run), "--kind", "skip")
    assert code == 0, err
    lines = out.splitlines()
    assert lines[0] == "run 1: 1 event(s), times in UTC"
    assert "skip" in lines[1] and "point 2 (48 V / 2 A)" in lines[1]
    code, out, err = run_cli("log", "1", "--db", str(faulty_run), "--kind", "nonsense")
    assert code == 2 and "nonsense" in err and "Traceback" not in err
    code, out, err = run_cli("log", "7", "--db", str(faulty_run))
    assert code == 2 and "no run 7" in err


def test_report_lists_the_run_log(faulty_run: Path, tmp_path: Path) -> None:
    code, _, err = run_cli("report", "1", "--db", str(faulty_run), "--out", str(tmp_path))
    assert code == 0, err
    page = (tmp_path / "report.html").read_text(encoding="utf-8")
    assert '<h2 id="log">Run log</h2>' in page
    log = page.split('<h2 id="log">')[1].split("<h2 ")[0]
    with Store(faulty_run) as store:
        messages = [event["message"] for event in store.events(1)]
    assert all(message.split(":")[0] in log for message in messages)
    assert log.count("<tr>") == len(messages) + 1  # the header, then one row per event
