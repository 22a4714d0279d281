"""A run's verdicts and a compare's changes as JUnit XML, the report format CI servers display.

The shape is the one CI servers read (``testsuites`` › ``testsuite`` › ``testcase``, with
``failure``, ``error`` or ``skipped`` inside a case, and ``tests``/``failures``/``errors``/
``skipped`` counts on each suite and on the whole):

* a run (``labseq report --junit``): one suite per node, one case per point; a failing verdict is
  a ``failure`` carrying the verdict's reasons, a point that could not be judged (pending,
  skipped, failed on the bench, figures missing) an ``error``. A run of one node has one suite.
* a compare (``labseq compare --junit``): one suite per node, one case per matched point for its
  verdict (pass → fail is a ``failure``) and one per figure compared there (a gated figure that
  got worse is a ``failure``, an ungated one passes with its change in ``system-out``); a point
  of one run only is ``skipped``.

Nothing here reads a store: the inputs are a :class:`~labseq.review.RunReview` or a
:class:`~labseq.compare.Comparison`.
"""

from __future__ import annotations

import xml.etree.ElementTree as ET
from collections.abc import Iterable

from labseq.compare import Comparison, FigureChange, PointChange, _change_text, shared_nodes
from labseq.figures import FIGURE_TITLES
from labseq.review import PointReview, RunReview

#: The name of the whole report, as a CI server heads it.
SUITES_NAME = "labseq"


def _case(classname: str, name: str) -> ET.Element:
    return ET.Element("testcase", {"classname": classname, "name": name})


def _outcome(case: ET.Element, kind: str, message: str, details: Iterable[str] = ()) -> None:
    """Put a ``failure``, ``error`` or ``skipped`` element with its message into ``case``."""
    element = ET.SubElement(case, kind, {"message": message})
    if kind != "skipped":
        element.set("type", kind)
    text = "\n".join(details)
    if text:
        element.text = text


def _suite(name: str, cases: list[ET.Element], timestamp: str | None = None) -> ET.Element:
    """A ``testsuite`` of ``cases`` with its counts."""
    suite = ET.Element("testsuite", {"name": name})
    counts = _counts(cases)
    for key, value in counts.items():
        suite.set(key, str(value))
    if timestamp:  # ISO 8601 without the zone, as the format has it (labseq stores UTC)
        suite.set("timestamp", timestamp[:19])
    suite.extend(cases)
    return suite


def _counts(cases: Iterable[ET.Element]) -> dict[str, int]:
    cases = list(cases)
    return {
        "tests": len(cases),
        "failures": sum(case.find("failure") is not None for case in cases),
        "errors": sum(case.find("error") is not None for case in cases),
        "skipped": sum(case.find("skipped") is not None for case in cases),
    }


def _document(suites: list[ET.Element]) -> ET.ElementTree:
    root = ET.Element("testsuites", {"name": SUITES_NAME})
    totals = _counts(case for suite in suites for case in suite.iter("testcase"))
    for key, value in totals.items():
        root.set(key, str(value))
    root.extend(suites)
    ET.indent(root)
    return ET.ElementTree(root)


# --------------------------------------------------------------------------- a run


def _point_case(review: RunReview, point: PointReview, classname: str) -> ET.Element:
    record = point.point
    case = _case(classname, f"p{record.point_index:03d} {review.label(point)}")
    if record.duration_s is not None:
        case.set("time", f"{record.duration_s:.3f}")
    verdict, reasons = point.verdict, point.reasons
    if verdict == "fail":
        _outcome(case, "failure", "; ".join(reasons) or "fail", reasons)
    elif verdict == "incomplete":
        why = reasons or [f"not judged: the point is {record.status}"]
        _outcome(case, "error", "incomplete: " + "; ".join(why), why)
    return case


def run_junit(review: RunReview) -> ET.ElementTree:
    """Run ``review`` as JUnit XML: a suite per node, a case per point (see the module notes)."""
    run = review.run
    suites = []
    for node in review.node_names:
        view = review.node_view(node)
        several = len(review.node_names) > 1
        classname = f"labseq.run{run.id}" + (f".{node}" if several else "")
        cases = [
            _point_case(view, point.of_node(node) if several else point, classname)
            for point in view.points
        ]
        name = f"run {run.id}: {run.dut_label}" + (f" — {view.node_title}" if several else "")
        suites.append(_suite(name, cases, run.started_at))
    return _document(suites)


# --------------------------------------------------------------------------- a compare


def _figure_case(
    comparison: Comparison, point: PointChange, change: FigureChange, classname: str
) -> ET.Element:
    case = _case(classname, f"{comparison.label(point)}: {FIGURE_TITLES[change.figure]}")
    text = _change_text(change)
    if change.flag == "worse" and change.figure in comparison.gated:
        _outcome(case, "failure", f"worse: {text}", [f"beyond ±{change.threshold:.3g}"])
    else:
        ET.SubElement(case, "system-out").text = f"{change.flag}: {text}"
    return case


def _verdict_case(comparison: Comparison, point: PointChange, classname: str) -> ET.Element:
    case = _case(classname, f"{comparison.label(point)}: verdict")
    if not point.matched:
        _outcome(case, "skipped", f"{point.flag}: not compared")
    elif point.verdict_went_to_fail:
        reasons = point.candidate.reasons if point.candidate else []
        _outcome(case, "failure", "verdict pass → fail: " + "; ".join(reasons), reasons)
    return case


def compare_junit(comparison: Comparison) -> ET.ElementTree:
    """``comparison`` as JUnit XML: per node a suite, per point its verdict and figure changes
    (see the module notes); the failures are exactly the compare's regressions."""
    b, c = comparison.baseline.run, comparison.candidate.run
    nodes = [None, *shared_nodes(comparison.baseline, comparison.candidate)]
    suites = []
    for node in nodes:
        name = comparison.candidate.node_names[0] if node is None else node
        classname = f"labseq.compare{b.id}_{c.id}.{name}"
        cases = []
        for point in comparison.points:
            if node is None:
                cases.append(_verdict_case(comparison, point, classname))
            changes = point.changes if node is None else point.nodes.get(node, {})
            cases += [_figure_case(comparison, point, ch, classname) for ch in changes.values()]
        suites.append(_suite(f"compare run {b.id} → run {c.id}: {name}", cases))
    return _document(suites)
