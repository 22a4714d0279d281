"""The report of one run: verdict and limits, verdict grid, heat maps, worst points, identities,
the run's event log, the sequence as run and the safety note — in the order a reviewer reads
them.

The verdict grid is the points' combined verdicts (the worst of their nodes); heat maps, worst
points and overlays are the primary node's, then one section per further node (e.g. "Secondary
rectifier — peak reverse voltage against the derated rating") with its own limits.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from labseq.analysis.verdict import LIMIT_FIGURES
from labseq.export import write_points_csv
from labseq.figures import (
    FIGURE_TITLES,
    figure_direction,
    format_figure,
    shown_unit,
)
from labseq.report import plots
from labseq.report.html import Markup, Page, esc, table, verdict_cell
from labseq.report.traces import point_traces
from labseq.review import PointReview, RunReview, limit_rows, line_text
from labseq.runlog import run_log
from labseq.store_api import RunStore
from labseq.units import format_si

#: Rows of the "did not pass" table at most; points.csv has them all.
MAX_LISTED_POINTS = 200
#: Events of the run log listed at most; ``labseq log RUN`` has them all.
MAX_LISTED_EVENTS = 300


@dataclass(frozen=True)
class ReportFiles:
    """What a report wrote."""

    html: Path
    csv: Path | None
    images: list[Path]


def grid_axes(review: RunReview) -> tuple[list[str], list[str]]:
    """Axis labels of the run's grid: line values (with AC/DC) and load values."""
    is_ac = bool(review.points) and review.points[0].point.line_is_ac
    lines = [line_text(value, is_ac) for value in review.line_values_v]
    return lines, plots.axis_texts(review.load_values_a, "A")


def verdict_grid_table(review: RunReview) -> str:
    """Line × load table of verdict words."""
    lines, loads = grid_axes(review)
    dense = " dense" if len(loads) > 16 else ""
    head = "<th>line \\ load</th>" + "".join(f"<th>{esc(load)}</th>" for load in loads)
    rows = []
    for line, verdicts in zip(lines, review.verdict_grid(), strict=True):
        cells = "".join(verdict_cell(verdict) for verdict in verdicts)
        rows.append(f"<tr><th>{esc(line)}</th>{cells}</tr>")
    return (
        f'<table class="grid{dense}"><thead><tr>{head}</tr></thead>'
        f"<tbody>{''.join(rows)}</tbody></table>"
    )


def cell_texts(values: np.ndarray, describe: Callable[[float], str]) -> Callable[[int, int], str]:
    """Cell text of a map: ``describe(value)``, or "—" where there is no value."""

    def text(row: int, column: int) -> str:
        value = values[row, column]
        return describe(float(value)) if math.isfinite(value) else "—"

    return text


def _prefix(review: RunReview) -> str:
    """File-name prefix of a node's images: none for the first (primary) node."""
    return "" if review.node_name == review.node_names[0] else f"{review.node_name}_"


def run_maps(review: RunReview) -> list[tuple[str, str, bytes]]:
    """(file name, caption, PNG) of each heat map the viewed node's figures allow."""
    lines, loads = grid_axes(review)
    maps: list[tuple[str, str, bytes]] = []
    peak = review.grid("peak_v")
    rating_v = review.derated_rating_v
    word = review.peak_word
    where = "switch-node voltage" if review.polarity > 0 else f"{review.node_title.lower()} voltage"
    if np.isfinite(peak).any():
        if rating_v:
            share = 100 * np.abs(peak) / rating_v
            texts = cell_texts(
                peak, lambda v: f"{format_si(v, 'V')}\n{100 * abs(v) / rating_v:.0f} %"
            )
            fig = plots.heat_map(
                peak,
                lines,
                loads,
                colour_values=share,
                title=f"{word.capitalize()} against the derated rating "
                f"({format_si(rating_v, 'V')})",
                colour_label="|peak| / derated rating (%)",
                cell_text=texts,
            )
            caption = f"Peak {where}; 100 % is the rating × derating."
        else:
            fig = plots.heat_map(
                peak,
                lines,
                loads,
                title=word.capitalize(),
                colour_label="peak (V)",
                cell_text=cell_texts(peak, lambda v: format_si(v, "V")),
            )
            caption = f"Peak {where} (no rating known: the sequence does not describe the node)."
        maps.append((f"{_prefix(review)}map_peak", caption, plots.png_bytes(fig)))
    damping = "damping_ratio" if np.isfinite(review.grid("damping_ratio")).any() else "q_factor"
    for figure, name in (
        (damping, "map_damping"),
        ("settling_time_s", "map_settling"),
        ("snubber_loss_w", "map_snubber_loss"),
        ("clamp_level_v", "map_clamp_level"),
        ("clamp_loss_w", "map_clamp_loss"),
        ("efficiency", "map_efficiency"),
    ):
        values = review.grid(figure)
        if not np.isfinite(values).any():
            continue
        texts = cell_texts(values, lambda v, f=figure: format_figure(f, v))
        if figure == "snubber_loss_w":
            texts = with_loss_methods(review, texts)
        shown = 100 * values if figure == "efficiency" else values
        unit = shown_unit(figure)
        fig = plots.heat_map(
            values,
            lines,
            loads,
            colour_values=shown,
            title=FIGURE_TITLES[figure].capitalize()
            + ("" if figure == "efficiency" else " (worst over the captures)"),
            cmap_name=plots.value_map(figure_direction(figure, review.polarity)),
            colour_label=f"{FIGURE_TITLES[figure]}" + (f" ({unit})" if unit else ""),
            cell_text=texts,
            colour_format=None if figure == "efficiency" else _colour_format(figure),
        )
        caption = f"{FIGURE_TITLES[figure].capitalize()} at each point; brighter is worse."
        if figure == "snubber_loss_w":
            caption += " Each cell names its method. " + LOSS_ASSUMPTIONS
        maps.append((_prefix(review) + name, caption, plots.png_bytes(fig)))
    return maps


#: What the snubber loss figure assumes, shown where it is.
LOSS_ASSUMPTIONS = (
    "Waveform: the nominal Rs–Cs branch driven by the measured node voltage, Rs·i² averaged over "
    "one switching period, less the scope noise measured in the record; it assumes the probe "
    "sits across the whole branch and Rs and Cs have their nominal values. Cs·V²·fsw: the record "
    "was shorter than a switching period plus 5·Rs·Cs, so the loss is the usual estimate, which "
    "ignores the ring and a partial discharge at light load."
)


def with_loss_methods(
    review: RunReview,
    texts: Callable[[int, int], str],
    lines_v: Sequence[float] | None = None,
    loads_a: Sequence[float] | None = None,
) -> Callable[[int, int], str]:
    """Cell texts of a snubber-loss map with each point's loss method on a second line; the map's
    rows and columns are ``lines_v`` × ``loads_a`` (the review's own grid by default)."""
    lines_v = review.line_values_v if lines_v is None else lines_v
    loads_a = review.load_values_a if loads_a is None else loads_a
    by_setpoint = {(p.point.line_v, p.point.load_a): p for p in review.points}

    def text(row: int, column: int) -> str:
        point = by_setpoint.get((lines_v[row], loads_a[column]))
        method = review.loss_method(point) if point is not None else None
        return texts(row, column) + (f"\n{method}" if method else "")

    return text


def _colour_format(figure: str) -> Callable[[float], str]:
    return lambda value: format_figure(figure, value)


def _worst_rows(review: RunReview) -> list[list[str]]:
    spec = review.node_spec
    limit_of = {
        figure: (
            ("|peak| " if figure == "peak_v" and review.polarity < 0 else "")
            + ("≤" if is_max else "≥"),
            getattr(spec.limits, name) if spec else None,
        )
        for name, (figure, is_max) in LIMIT_FIGURES.items()
    }
    rows = []
    for figure, worst in review.worst.items():
        relation, limit = limit_of.get(figure, ("", None))
        value = format_figure(figure, worst.value)
        method = review.loss_method(worst.point) if figure == "snubber_loss_w" else None
        rows.append(
            [
                review.peak_word if figure == "peak_v" else FIGURE_TITLES[figure],
                f"{value} ({method})" if method else value,
                review.label(worst.point),
                f"{relation} {format_figure(figure, limit)}" if limit is not None else "—",
                verdict_cell(worst.point.verdict),
            ]
        )
    return rows


def _worst_overlays(page: Page, store: RunStore, review: RunReview) -> None:
    """One overlay per distinct worst point, naming the figures it is worst in."""
    by_point: dict[int, tuple[PointReview, list[str]]] = {}
    for figure, worst in review.worst.items():
        entry = by_point.setdefault(worst.point.point.id, (worst.point, []))
        entry[1].append(FIGURE_TITLES[figure])
    rating_v = review.derated_rating_v
    limit_v = None if rating_v is None else review.polarity * rating_v
    prefix = _prefix(review)
    for point, figures in by_point.values():
        traces = point_traces(store, point.point.id, review.sequence, node=review.node_name)
        label = review.label(point)
        heading = f"{label} — worst {', '.join(figures)}"
        anchor = f"{prefix}point-{point.point.point_index}"
        page.add(f'<h3 id="{esc(anchor)}">{esc(heading)}</h3>')
        if not traces:
            page.paragraph("No captures stored for this point.", "note")
            continue
        fig = plots.overlay(
            [("", traces, plots.OKABE_ITO)],
            title=f"{label}: {len(traces)} capture(s), fitted ring dashed",
            limit_v=limit_v,
            limit_label=f"derated rating {format_si(limit_v, 'V')}" if limit_v else "",
            y_label=f"{review.node_title.lower()} (V)",
        )
        caption = f"Captures at {label} overlaid around the worst edge, with the fitted ring."
        name = f"{prefix}overlay_p{point.point.point_index:04d}"
        page.add(page.image(name, plots.png_bytes(fig), caption))


def _node_section(page: Page, store: RunStore, view: RunReview) -> None:
    """A further node: its limits, its heat maps, its worst points with their overlays."""
    page.section(
        f"node-{view.node_name}",
        f"{view.node_title} — {view.peak_word} against the derated rating",
    )
    limits = limit_rows(view)
    if limits:
        page.add(table(["limit", "value"], limits, numeric=[1]))
    figures = [page.image(name, png, caption) for name, caption, png in run_maps(view)]
    if not figures:
        page.paragraph(f"No figures stored for {view.node_name} yet.", "note")
        return
    page.add('<div class="maps">' + "".join(figures) + "</div>")
    page.add(f"<h3>Worst point for each figure ({esc(view.node_name)})</h3>")
    header = ["figure", "worst value", "at", "limit", f"{view.node_name} verdict there"]
    page.add(table(header, _worst_rows(view), numeric=[1]))
    _worst_overlays(page, store, view)


def _identity_rows(review: RunReview) -> list[list[str]]:
    run = review.run
    rows = [
        ["run", str(run.id)],
        ["status", run.status],
        ["started (UTC)", run.started_at],
        ["finished (UTC)", run.finished_at or "—"],
        ["DUT", run.dut_label],
        ["snubber", run.snubber_label],
        ["bench", run.bench_kind],
        ["nodes", ", ".join(review.node_names)],
    ]
    if review.sequence is not None and review.sequence.clamp is not None:
        rows.insert(6, ["clamp", review.sequence.clamp.label])
    rows += [[f"{role} identity", str(identity)] for role, identity in run.instruments.items()]
    rows += [
        ["labseq version", run.software_version],
        ["sequence file", run.sequence_path],
        ["sequence SHA-256", run.sequence_sha256],
        ["host", run.host or "—"],
        ["notes", run.notes or "—"],
    ]
    return rows


def _not_passed_rows(review: RunReview) -> tuple[list[list[str]], int]:
    listed = [p for p in review.points if p.verdict != "pass"]
    rows = [
        [
            review.label(p),
            verdict_cell(p.verdict),
            "; ".join(p.point.verdict_reasons) or p.point.status,
        ]
        for p in listed[:MAX_LISTED_POINTS]
    ]
    return rows, len(listed)


def _log_table(page: Page, store: RunStore, review: RunReview) -> None:
    """The run's events in the order they happened (times in UTC)."""
    entries = run_log(store, review.run.id)
    if not entries:
        page.paragraph("No events recorded for this run.", "note")
        return
    rows = [
        [
            entry.time_text,
            entry.kind,
            entry.message,
            entry.point_text,
            entry.data_text,
        ]
        for entry in entries[:MAX_LISTED_EVENTS]
    ]
    page.add(table(["time (UTC)", "kind", "event", "point", "data"], rows))
    if len(entries) > len(rows):
        page.paragraph(
            f"… and {len(entries) - len(rows)} more: see labseq log {review.run.id}.", "note"
        )


def build_run_report(store: RunStore, review: RunReview, out_dir: Path) -> ReportFiles:
    """Write ``report.html``, its PNGs and ``points.csv`` for a reviewed run into ``out_dir``."""
    out_dir.mkdir(parents=True, exist_ok=True)
    run = review.run
    page = Page(out_dir, f"labseq run {run.id}: {run.dut_label}")
    page.add(f"<h1>Run {run.id}: {esc(run.dut_label)}</h1>")
    page.add(f'<p class="sub">Snubber: {esc(run.snubber_label)} · status {esc(run.status)}</p>')
    if run.status == "unsafe-end":
        found = review.end_safety or "bench NOT confirmed safe (no record of its shutdown)"
        page.add(
            '<div class="safety" id="unsafe-end"><p><strong>The end of this run left the bench '
            f"unconfirmed:</strong> {esc(found)}.</p></div>"
        )

    page.section("verdict", "Verdict")
    counts = review.verdict_counts
    page.add(
        f'<p><span class="badge v-{esc(review.verdict)}">{esc(review.verdict)}</span> '
        f"{len(review.points)} points: {counts['pass']} pass, {counts['fail']} fail, "
        f"{counts['incomplete']} incomplete. The run fails if any point fails, and is "
        "incomplete if any point is incomplete and none fails.</p>"
    )
    page.add("<h3>Limits the points were judged against</h3>")
    limits = limit_rows(review)
    if limits:
        page.add(table(["limit", "value"], limits, numeric=[1]))
    else:
        page.paragraph(
            f"The stored sequence no longer validates, so its limits cannot be shown: "
            f"{review.sequence_problem}",
            "note",
        )

    page.section("grid", "Verdict at each point (line × load)")
    page.add(verdict_grid_table(review))
    rows, total = _not_passed_rows(review)
    if rows:
        page.add(f"<h3>Points that did not pass ({total})</h3>")
        page.add(table(["point", "verdict", "why"], rows))
        if total > len(rows):
            page.paragraph(f"… and {total - len(rows)} more: see points.csv.", "note")

    page.section("maps", "Heat maps over line × load")
    figures = [page.image(name, png, caption) for name, caption, png in run_maps(review)]
    page.add('<div class="maps">' + "".join(figures) + "</div>" if figures else "")
    if not figures:
        page.paragraph("No figures stored for this run yet.", "note")

    page.section("worst", "Worst point for each figure")
    if review.worst:
        header = ["figure", "worst value", "at", "limit", "verdict there"]
        page.add(table(header, _worst_rows(review), numeric=[1]))
        _worst_overlays(page, store, review)
    else:
        page.paragraph("No figures stored for this run yet.", "note")

    for node in review.node_names[1:]:
        _node_section(page, store, review.node_view(node))

    page.section("identity", "DUT, snubber, bench and software")
    page.add(table(["what", "value"], _identity_rows(review)))

    page.section("log", "Run log")
    _log_table(page, store, review)

    page.section("sequence", "Sequence file as run")
    page.add(Markup(f"<pre>{esc(run.sequence_text)}</pre>"))
    page.safety()

    csv_path = out_dir / "points.csv"
    write_points_csv(store, run.id, csv_path)
    return ReportFiles(page.write(), csv_path, page.images)
