"""The report of a regression compare: outcome and summary, the two runs, changed points,
side-by-side and change maps, overlays where the points moved most, and the sequence diff."""

from __future__ import annotations

import difflib
import math
from collections.abc import Callable
from pathlib import Path

import numpy as np

from labseq.compare import Comparison, FigureChange, PointChange, shared_nodes
from labseq.figures import (
    FIGURE_DIRECTIONS,
    FIGURE_TITLES,
    NOISE_FLOORS,
    format_change,
    format_figure,
    shown_unit,
)
from labseq.report import plots
from labseq.report.html import Markup, Page, cell, esc, long_cell, safety_text, table
from labseq.report.run_report import LOSS_ASSUMPTIONS, ReportFiles, cell_texts, with_loss_methods
from labseq.report.traces import point_traces
from labseq.review import RunReview, grid_cells, line_text
from labseq.store_api import RunStore
from labseq.units import format_si

#: Figures with maps and table columns, in reading order.
MAPPED_FIGURES = ("peak_v", "damping_ratio", "settling_time_s", "snubber_loss_w", "efficiency")
#: Figures of a node other than the primary in its change table (efficiency is the point's).
NODE_FIGURES = ("peak_v", "damping_ratio", "settling_time_s", "snubber_loss_w")
#: Points listed in the change table at most (changed ones first).
MAX_LISTED_POINTS = 200
#: Points given an overlay.
OVERLAY_POINTS = 3

_FLAG_CLASS = {
    "better": "c-better",
    "worse": "c-worse",
    "unchanged": "",
    "missing in baseline": "c-missing",
    "missing in candidate": "c-missing",
}


def _word_cell(text: str, css_class: str = "") -> Markup:
    """A cell of a word or two that never breaks inside a word ("better", "fail → pass")."""
    return cell(text, f"{css_class} word".strip())


def _change_cell(change: FigureChange | None) -> Markup | str:
    if change is None:
        return "—"
    b = change.baseline.value if change.baseline else None
    c = change.candidate.value if change.candidate else None
    text = f"{format_figure(change.figure, b)} → {format_figure(change.figure, c)}"
    if change.delta is not None:
        text += f" ({format_change(change.figure, change.delta)}, {change.flag})"
    else:
        text += f" ({change.flag})"
    return cell(text, _FLAG_CLASS[change.flag])


def _verdicts(change: PointChange) -> str:
    b = change.baseline.verdict if change.baseline else "—"
    c = change.candidate.verdict if change.candidate else "—"
    return f"{b} → {c}"


def _change_rows(comparison: Comparison) -> tuple[list[list[Markup | str]], int]:
    order = {"worse": 0, "missing in candidate": 1, "missing in baseline": 2, "better": 3}
    listed = sorted(comparison.points, key=lambda p: order.get(p.flag, 4))
    rows = [
        [
            comparison.label(p),
            _word_cell(p.flag, _FLAG_CLASS[p.flag]),
            _word_cell(_verdicts(p)),
            *(_change_cell(p.changes.get(figure)) for figure in MAPPED_FIGURES),
        ]
        for p in listed[:MAX_LISTED_POINTS]
    ]
    return rows, len(listed)


def _node_change_rows(comparison: Comparison, node: str) -> list[list[Markup | str]]:
    """One row per matched point where a figure of ``node`` moved beyond its threshold."""
    rows: list[list[Markup | str]] = []
    for change in comparison.points:
        changes = change.nodes.get(node, {})
        if not any(c.flag in ("better", "worse") for c in changes.values()):
            continue
        worse = any(c.flag == "worse" and c.figure in change.gated for c in changes.values())
        flag = "worse" if worse else "better"
        rows.append(
            [
                comparison.label(change),
                _word_cell(flag, _FLAG_CLASS[flag]),
                *(_change_cell(changes.get(figure)) for figure in NODE_FIGURES),
            ]
        )
    return rows[:MAX_LISTED_POINTS]


def _run_rows(baseline: RunReview, candidate: RunReview) -> list[list[Markup | str]]:
    def both(value: Callable[[RunReview], object]) -> list[str]:
        return [str(value(baseline)), str(value(candidate))]

    def counts(review: RunReview) -> str:
        c = review.verdict_counts
        return f"{c['pass']} pass, {c['fail']} fail, {c['incomplete']} incomplete"

    return [
        ["run", *both(lambda r: r.run.id)],
        ["verdict", *both(lambda r: r.verdict)],
        ["points", *both(counts)],
        ["DUT", *both(lambda r: r.run.dut_label)],
        ["rated load", *both(lambda r: format_si(r.rated_load_a, "A") if r.rated_load_a else "—")],
        ["snubber", *both(lambda r: r.run.snubber_label)],
        ["bench", *both(lambda r: "simulated" if r.simulated else r.run.bench_kind)],
        ["status", *both(lambda r: r.run.status)],
        ["started (UTC)", *both(lambda r: r.run.started_at)],
        ["labseq version", *both(lambda r: r.run.software_version)],
        ["sequence file", *map(long_cell, both(lambda r: r.run.sequence_path))],
        ["sequence SHA-256", *map(long_cell, both(lambda r: r.run.sequence_sha256))],
    ]


def _axes(comparison: Comparison) -> tuple[list[str], list[str]]:
    is_ac = comparison.points[0].either.point.line_is_ac if comparison.points else False
    lines = [line_text(value, is_ac) for value in comparison.line_values_v]
    return lines, plots.axis_texts(comparison.load_values_a, "A")


def _beyond(comparison: Comparison, side: str, figure: str) -> np.ndarray:
    """The compare grid, True where run ``side``'s point is beyond its own limit on ``figure``."""
    review: RunReview = getattr(comparison, side)
    beyond = np.zeros((len(comparison.line_values_v), len(comparison.load_values_a)), dtype=bool)
    cells = grid_cells(
        [p.either for p in comparison.points], comparison.line_values_v, comparison.load_values_a
    )
    primary = review.node_names[0]
    for (row, column), change in zip(cells, comparison.points, strict=True):
        point = getattr(change, side)
        if point is not None:
            beyond[row, column] = any(
                e.beyond and e.figure == figure and e.node == primary
                for e in review.excesses(point)
            )
    return beyond


def _figure_maps(page: Page, comparison: Comparison, figure: str) -> None:
    """Baseline and candidate side by side on one scale, then the change map."""
    baseline = comparison.grid(figure, "baseline")
    candidate = comparison.grid(figure, "candidate")
    if not (np.isfinite(baseline).any() or np.isfinite(candidate).any()):
        return
    lines, loads = _axes(comparison)
    scale = 100.0 if figure == "efficiency" else 1.0
    both = np.concatenate([baseline[np.isfinite(baseline)], candidate[np.isfinite(candidate)]])
    limits = (float(both.min()) * scale, float(both.max()) * scale)
    unit = shown_unit(figure)

    def formatted(describe: Callable[[str, float], str]) -> Callable[[float], str] | None:
        """Colour-bar ticks in engineering notation (efficiency is already in %)."""
        return None if figure == "efficiency" else lambda value: describe(figure, value)

    title = FIGURE_TITLES[figure]
    colour_label = title + (f" ({unit})" if unit else "")
    images = []
    for side, values in (("baseline", baseline), ("candidate", candidate)):
        review = getattr(comparison, side)
        run_id = review.run.id
        texts = cell_texts(values, lambda v: format_figure(figure, v))
        if figure == "snubber_loss_w":
            texts = with_loss_methods(
                review, texts, comparison.line_values_v, comparison.load_values_a
            )
        fig = plots.heat_map(
            values,
            lines,
            loads,
            outlined=_beyond(comparison, side, figure),
            colour_values=values * scale,
            title=f"{title.capitalize()}: {side} (run {run_id})",
            colour_label=colour_label,
            cell_text=texts,
            limits=limits,
            cmap_name=plots.value_map(FIGURE_DIRECTIONS[figure]),
            colour_format=formatted(format_figure),
        )
        caption = (
            f"{title.capitalize()} of the {side} run; both runs share the scale, brighter is "
            "worse; outlined cells are beyond that run's limit."
        )
        if figure == "snubber_loss_w":
            caption += " Each cell names its method. " + LOSS_ASSUMPTIONS
        images.append(page.image(f"map_{figure}_{side}", plots.png_bytes(fig), caption))
    page.add('<div class="maps">' + "".join(images) + "</div>")

    delta = comparison.grid(figure, "change")
    if not np.isfinite(delta).any():
        return
    flags = comparison.flag_grid(figure)
    higher_better = FIGURE_DIRECTIONS[figure] > 0
    direction = "higher" if higher_better else "lower"

    def change_text(row: int, column: int) -> str:
        value = delta[row, column]
        flag = flags[row][column] or ""
        return f"{format_change(figure, float(value))}\n{flag}" if math.isfinite(value) else flag

    # One sign everywhere: cells, colour bar and text all give candidate − baseline; the colour
    # map is turned so that purple is better whichever way the figure improves.
    fig = plots.heat_map(
        delta,
        lines,
        loads,
        colour_values=delta * scale,
        cmap_name=plots.change_map(higher_better),
        centre=0.0,
        title=f"{title.capitalize()}: change, candidate − baseline ({direction} is better)",
        colour_label=f"candidate − baseline ({unit})" if unit else "candidate − baseline",
        cell_text=change_text,
        colour_format=formatted(format_change),
    )
    caption = (
        f"Change of {title} at each point (candidate − baseline, the sign used everywhere in this "
        "report) and whether it is beyond the captures' own spread; purple is better, orange "
        "worse."
    )
    page.add(
        '<div class="maps">'
        + page.image(f"change_{figure}", plots.png_bytes(fig), caption)
        + "</div>"
    )


def _overlays(
    page: Page, comparison: Comparison, baseline_store: RunStore, candidate_store: RunStore
) -> None:
    for index, change in enumerate(comparison.most_moved(OVERLAY_POINTS)):
        label = comparison.label(change)
        moved = sorted(change.all_changes, key=lambda c: -c.significance)[:3]
        node = moved[0].node or comparison.candidate.node_names[0]
        words = ", ".join(
            (f"{c.node}: " if c.node else "")
            + f"{FIGURE_TITLES[c.figure]} {format_change(c.figure, c.delta)}"
            for c in moved
        )
        view = comparison.candidate.node_view(node)
        rating = view.derated_rating_v or comparison.baseline.node_view(node).derated_rating_v
        rating = None if rating is None else view.polarity * rating
        page.add(f"<h3>{esc(label)}: {esc(words)}</h3>")
        groups = [
            (
                f"baseline (run {comparison.baseline.run.id})",
                point_traces(
                    baseline_store,
                    change.baseline.point.id,
                    comparison.baseline.sequence,
                    node=node,
                ),
                [plots.BASELINE_COLOUR],
            ),
            (
                f"candidate (run {comparison.candidate.run.id})",
                point_traces(
                    candidate_store,
                    change.candidate.point.id,
                    comparison.candidate.sequence,
                    node=node,
                ),
                [plots.CANDIDATE_COLOUR],
            ),
        ]
        if not any(traces for _, traces, _ in groups):
            page.paragraph("No captures stored for this point in either run.", "note")
            continue
        fig = plots.overlay(
            groups,
            title=f"{label}: baseline and candidate captures, fitted rings dashed",
            limit_v=rating,
            limit_label="derated rating" if rating else "",
        )
        caption = f"Baseline (blue) and candidate (vermillion) captures at {label}."
        page.add(page.image(f"overlay_{index + 1}", plots.png_bytes(fig), caption))


def _rule_text(comparison: Comparison) -> str:
    floors = ", ".join(
        f"{FIGURE_TITLES[name]} {format_change(name, value).removeprefix('+')}"
        for name, value in NOISE_FLOORS.items()
    )
    return (
        f"Points match when line and load agree within {100 * comparison.rel_tol:.3g} %. A "
        f"figure's change Δ (of the worst values over each point's captures) counts only when "
        f"|Δ| > max(k·√(s_b² + s_c²), floor), with s the captures' standard deviations, "
        f"k = {comparison.coverage:g} and floors {floors}. Figures that gate the outcome: "
        f"{', '.join(FIGURE_TITLES[name] for name in comparison.gated) or 'none'}."
    )


def build_compare_report(
    comparison: Comparison, baseline_store: RunStore, candidate_store: RunStore, out_dir: Path
) -> ReportFiles:
    """Write the compare's ``report.html`` and its PNGs into ``out_dir``."""
    out_dir.mkdir(parents=True, exist_ok=True)
    b, c = comparison.baseline, comparison.candidate
    page = Page(out_dir, f"labseq compare: run {b.run.id} → run {c.run.id}")
    simulated = [side for side, r in (("baseline", b), ("candidate", c)) if r.simulated]
    if simulated:
        page.add(
            f'<p class="simulated" id="simulated">Simulated bench ({" and ".join(simulated)}): '
            "no hardware was driven; those readings come from a model of the DUT.</p>"
        )
    page.add(f"<h1>Compare: run {b.run.id} (baseline) → run {c.run.id} (candidate)</h1>")
    page.add(
        f'<p class="sub">{esc(b.run.snubber_label)} → {esc(c.run.snubber_label)} · '
        f"{esc(c.run.dut_label)}</p>"
    )

    page.section("verdict", "Outcome")
    regressions = comparison.regressions
    if regressions:
        word, css = "regressed", "v-fail"
    elif c.verdict == "pass":
        word, css = "no regression", "v-pass"
    else:  # nothing got worse, but the candidate does not pass: not a green result
        word, css = "no regression", "v-incomplete"
    outcome = comparison.outcome.removeprefix(word).lstrip(" —")
    page.add(
        f'<p class="headline" id="outcome"><span class="badge {css}">{esc(word)}</span> '
        f"— {esc(outcome)}</p>"
    )
    for warning in comparison.differences():
        page.add(f'<p class="warning">Not like for like: {esc(warning)}.</p>')
    page.paragraph(comparison.summary() + ".")
    if regressions:
        page.paragraph(
            f"{len(regressions)} point(s) got worse; the worst: "
            + comparison.describe_regression(regressions[0])
            + "."
        )
    page.paragraph(_rule_text(comparison), "note")

    page.section("runs", "The two runs")
    page.add(table(["", "baseline", "candidate"], _run_rows(b, c)))

    page.section("changes", "Changes at each point")
    rows, total = _change_rows(comparison)
    header = ["point", "result", "verdict", *(FIGURE_TITLES[f] for f in MAPPED_FIGURES)]
    page.add(table(header, rows))
    if total > len(rows):
        page.paragraph(f"… and {total - len(rows)} more points: see compare --json.", "note")

    for node in shared_nodes(b, c):
        page.section(f"changes-{node}", f"Changes of the {node} node")
        node_rows = _node_change_rows(comparison, node)
        if node_rows:
            node_header = ["point", "result", *(FIGURE_TITLES[f] for f in NODE_FIGURES)]
            page.add(table(node_header, node_rows))
        else:
            page.paragraph(f"No figure of the {node} node moved beyond its threshold.", "note")

    page.section("maps", "Side-by-side and change maps")
    for figure in MAPPED_FIGURES:
        _figure_maps(page, comparison, figure)

    page.section("overlays", "Captures where the points moved most")
    _overlays(page, comparison, baseline_store, candidate_store)

    page.section("sequence", "Sequence changes (baseline → candidate)")
    diff = difflib.unified_diff(
        b.run.sequence_text.splitlines(),
        c.run.sequence_text.splitlines(),
        f"run {b.run.id}: {b.run.sequence_path}",
        f"run {c.run.id}: {c.run.sequence_path}",
        lineterm="",
    )
    page.add(f"<pre>{esc(chr(10).join(diff) or 'The two sequence files are identical.')}</pre>")
    page.safety(safety_text(c.sequence.dut.line_is_ac if c.sequence else None))
    return ReportFiles(page.write(), None, page.images)
