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
    bound_relation,
    figure_direction,
    format_change,
    format_figure,
    shown_unit,
)
from labseq.report import plots
from labseq.report.html import (
    Markup,
    Page,
    esc,
    long_cell,
    prose_cell,
    safety_text,
    table,
    verdict_cell,
)
from labseq.report.traces import point_traces
from labseq.review import (
    PointReview,
    RunReview,
    grid_cells,
    headline,
    limit_rows,
    line_text,
    not_passed,
)
from labseq.runlog import (
    FoldedTimings,
    Judgement,
    LogEntry,
    folded_log,
    judgements,
    point_problems,
    run_log,
)
from labseq.store import shown_status
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


def cell_texts(
    values: np.ndarray, describe: Callable[[float], str], bounds: np.ndarray | None = None
) -> Callable[[int, int], str]:
    """Cell text of a map: ``describe(value)``, or "—" where there is no value; a cell whose
    ``bounds`` entry is "≥" or "≤" (a clipped capture's bound) reads "≥ 89.6 V"."""

    def text(row: int, column: int) -> str:
        value = values[row, column]
        if not math.isfinite(value):
            return "—"
        bound = "" if bounds is None else bounds[row, column]
        return f"{bound} {describe(float(value))}" if bound else describe(float(value))

    return text


def bound_grid(review: RunReview, figure: str) -> np.ndarray:
    """Line × load grid of "≥"/"≤" where the viewed node's value of ``figure`` is a clipped
    capture's bound, "" elsewhere."""
    relation = bound_relation(figure, review.polarity)
    bounds = np.full((len(review.line_values_v), len(review.load_values_a)), "", dtype=object)
    if relation:
        for (row, column), point in zip(_cells(review), review.points, strict=True):
            if review.is_clipped(point):
                bounds[row, column] = relation
    return bounds


def beyond_grids(review: RunReview) -> dict[str, np.ndarray]:
    """Line × load grids, one per figure of the viewed node that is beyond its limit somewhere:
    True where it is (each point's excesses worked out once, for every figure)."""
    shape = (len(review.line_values_v), len(review.load_values_a))
    grids: dict[str, np.ndarray] = {}
    for (row, column), point in zip(_cells(review), review.points, strict=True):
        for excess in review.excesses(point):
            if excess.beyond and excess.node == review.node_name:
                grids.setdefault(excess.figure, np.zeros(shape, dtype=bool))[row, column] = True
    return grids


def beyond_grid(review: RunReview, figure: str) -> np.ndarray:
    """Line × load grid, True where the viewed node's ``figure`` is beyond its limit."""
    found = beyond_grids(review).get(figure)
    if found is None:
        return np.zeros((len(review.line_values_v), len(review.load_values_a)), dtype=bool)
    return found


def _cells(review: RunReview) -> list[tuple[int, int]]:
    return grid_cells(review.points, review.line_values_v, review.load_values_a)


#: What an outlined cell means, said in every map caption that has one.
OUTLINE_NOTE = "Outlined cells are beyond the limit."


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
    peak_bounds = bound_grid(review, "peak_v")
    beyond = beyond_grids(review)
    nowhere = np.zeros(peak.shape, dtype=bool)
    if np.isfinite(peak).any():
        if rating_v:
            share = 100 * np.abs(peak) / rating_v
            texts = cell_texts(
                peak,
                lambda v: f"{format_si(v, 'V')}\n{100 * abs(v) / rating_v:.0f} %",
                peak_bounds,
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
                outlined=beyond.get("peak_v", nowhere),
            )
            caption = f"Peak {where}; 100 % is the rating × derating. {OUTLINE_NOTE}"
        else:
            fig = plots.heat_map(
                peak,
                lines,
                loads,
                title=word.capitalize(),
                colour_label="peak (V)",
                cell_text=cell_texts(peak, lambda v: format_si(v, "V"), peak_bounds),
            )
            caption = f"Peak {where} (no rating known: the sequence does not describe the node)."
        if peak_bounds.any():
            caption += " " + CLIP_NOTE
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
        bounds = bound_grid(review, figure)
        texts = cell_texts(values, lambda v, f=figure: format_figure(f, v), bounds)
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
            outlined=beyond.get(figure, nowhere),
        )
        caption = f"{FIGURE_TITLES[figure].capitalize()} at each point; brighter is worse."
        if figure in beyond:
            caption += " " + OUTLINE_NOTE
        if bounds.any():
            caption += " " + CLIP_NOTE
        if figure == "snubber_loss_w":
            caption += " Each cell names its method. " + LOSS_ASSUMPTIONS
        maps.append((_prefix(review) + name, caption, plots.png_bytes(fig)))
    return maps


#: What a "≥" cell means, said in the caption of a map that has one.
CLIP_NOTE = (
    "A value marked ≥ (or ≤) is a bound: a capture there clipped at the scope's screen edge, so "
    "the true value may be worse."
)

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
    """One row per figure: its worst value and where, its limit, whether that value is within
    the limit and by how much, and the point's own verdict (which other figures may decide)."""
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
        value = review.figure_text(figure, worst.point, worst.value)
        method = review.loss_method(worst.point) if figure == "snubber_loss_w" else None
        excess = next(
            (
                e
                for e in review.excesses(worst.point)
                if e.figure == figure and e.node == review.node_name
            ),
            None,
        )
        if excess is None:
            own: Markup | str = "no limit" if limit is None else "—"
            margin = "—"
        else:
            own = verdict_cell("fail" if excess.beyond else "pass")
            side = ("over" if excess.is_max else "under") if excess.beyond else "to spare"
            margin = f"{format_change(figure, abs(excess.excess)).lstrip('+±')} {side}"
        rows.append(
            [
                review.peak_word if figure == "peak_v" else FIGURE_TITLES[figure],
                f"{value} ({method})" if method else value,
                review.label(worst.point),
                f"{relation} {format_figure(figure, limit)}" if limit is not None else "—",
                own,
                margin,
                verdict_cell(worst.point.verdict),
            ]
        )
    return rows


#: Header of the worst-point tables: the figure's own verdict, then the point's.
WORST_HEADER = ["figure", "worst value", "at", "limit", "this figure", "margin"]


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
    header = [*WORST_HEADER, f"the point's {view.node_name} verdict"]
    page.add(table(header, _worst_rows(view), numeric=[1, 5]))
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
    rows += [
        ["labseq version", run.software_version],
        ["sequence file", long_cell(run.sequence_path)],
        ["sequence SHA-256", long_cell(run.sequence_sha256)],
        ["host", run.host or "—"],
        ["notes", run.notes or "—"],
    ]
    return rows


#: The parts of an instrument's identity (its ``*IDN?`` reply and its resource), in the order of
#: the instruments table.
IDENTITY_FIELDS = ("manufacturer", "model", "serial", "firmware", "resource")


def _instrument_rows(review: RunReview) -> list[list[str]]:
    """One row per role: manufacturer, model, serial, firmware and resource."""
    rows = []
    for role, identity in review.run.instruments.items():
        if isinstance(identity, dict):
            known = [str(identity.get(name) or "—") for name in IDENTITY_FIELDS]
            rest = {k: v for k, v in identity.items() if k not in IDENTITY_FIELDS}
            if rest:  # anything else the bench recorded stays visible
                known[-1] += " (" + ", ".join(f"{k}: {v}" for k, v in rest.items()) + ")"
        else:
            known = [str(identity), "—", "—", "—", "—"]
        rows.append([role, *known])
    return rows


def _not_passed_rows(review: RunReview, problems: dict[int, str]) -> tuple[list[list[str]], int]:
    listed = not_passed(review, problems)
    rows = [
        [review.label(item.point), verdict_cell(item.point.verdict), prose_cell(item.why)]
        for item in listed[:MAX_LISTED_POINTS]
    ]
    return rows, len(listed)


#: Event kinds counted above the run log, with what they are called there.
LOG_COUNTS = {
    "fault": "faults",
    "scpi-error": "instrument errors",
    "retry": "retries",
    "skip": "skipped points",
    "safety": "safety events",
}


def _log_row(entry: LogEntry | FoldedTimings) -> list[Markup | str]:
    if isinstance(entry, FoldedTimings):
        return [entry.first.time_text, "timing", prose_cell(entry.message), "every point", ""]
    return [
        entry.time_text,
        entry.kind,
        prose_cell(entry.message),
        entry.point_text,
        prose_cell(entry.data_text),
    ]


def _log_table(page: Page, entries: list[LogEntry], run_id: int) -> None:
    """The run's events in the order they happened (times in UTC), each point's timing folded
    into one line, with a count of each kind above."""
    if not entries:
        page.paragraph("No events recorded for this run.", "note")
        return
    counts = dict.fromkeys(LOG_COUNTS, 0)
    for entry in entries:
        if entry.kind in counts:
            counts[entry.kind] += 1
    page.paragraph(" · ".join(f"{LOG_COUNTS[kind]}: {n}" for kind, n in counts.items()))
    folded = folded_log(entries)
    rows = [_log_row(entry) for entry in folded[:MAX_LISTED_EVENTS]]
    page.add(table(["time (UTC)", "kind", "event", "point", "data"], rows))
    if len(folded) > len(rows):
        page.paragraph(f"… and {len(folded) - len(rows)} more: see labseq log {run_id}.", "note")


def _line_is_ac(review: RunReview) -> bool | None:
    """Whether the DUT takes AC (offline), from its sequence, else its points; None unknown."""
    if review.sequence is not None:
        return review.sequence.dut.line_is_ac
    return review.points[0].point.line_is_ac if review.points else None


def _highest_peak_v(review: RunReview) -> float | None:
    """The largest |peak| any node reached in the run."""
    peaks = [
        abs(stats["peak_v"].value)
        for point in review.points
        for stats in point.nodes.values()
        if "peak_v" in stats and stats["peak_v"].value is not None
    ]
    return max(peaks) if peaks else None


def judgement_rows(judgement: Judgement) -> list[tuple[str, str, str]]:
    """The limits of a judging as (node, limit, value) rows, in the catalogue's words."""
    rows = []
    for node, limits in judgement.limits.items():
        rating, derating = limits.get("rating_v"), limits.get("derating")
        if rating is not None and derating is not None:
            rows.append((node, "rating × derating", f"{format_si(rating, 'V')} × {derating:g}"))
        for name, (figure, is_max) in LIMIT_FIGURES.items():
            value = limits.get(name)
            if value is not None:
                relation = "≤" if is_max else "≥"
                rows.append(
                    (node, f"{FIGURE_TITLES[figure]} {relation}", format_figure(figure, value))
                )
        band = limits.get("settling_band")
        if band is not None:
            rows.append((node, "settling band", f"±{100 * band:.3g} % of the step"))
    return rows


def _rejudging(page: Page, store: RunStore, run_id: int) -> bool:
    """Say, near the verdict, that the run was last judged against another sequence file than
    the one it was made with (``labseq analyze-run --sequence``), with that file's limits; True
    when it was."""
    recorded = judgements(store, run_id)
    if not recorded or not recorded[-1].rejudged:
        return False
    last = recorded[-1]
    grid = "" if last.same_grid else " (whose line × load grid is not the run's)"
    page.add(
        f'<p class="note" id="rejudged"><strong>Re-judged</strong> on '
        f"{esc(last.time.replace('T', ' ').removesuffix('+00:00'))} UTC against "
        f"{esc(last.sequence_path)}{esc(grid)} (sha256 {esc(last.sequence_sha256[:12])}): the "
        "verdicts in this report are against its limits, listed here; the limits after them "
        "are those the run was made with.</p>"
    )
    page.add("<h3>Limits of the re-judging</h3>")
    page.add(table(["node", "limit", "value"], judgement_rows(last), numeric=[2]))
    return True


def build_run_report(store: RunStore, review: RunReview, out_dir: Path) -> ReportFiles:
    """Write ``report.html``, its PNGs and ``points.csv`` for a reviewed run into ``out_dir``."""
    out_dir.mkdir(parents=True, exist_ok=True)
    run = review.run
    entries = run_log(store, run.id)
    problems = point_problems(entries)
    page = Page(out_dir, f"labseq run {run.id}: {run.dut_label}")
    if review.simulated:
        page.add(
            '<p class="simulated" id="simulated">Simulated bench: no hardware was driven; every '
            "reading in this report comes from a model of the DUT, not from a measurement.</p>"
        )
    page.add(f"<h1>Run {run.id}: {esc(run.dut_label)}</h1>")
    page.add(
        f'<p class="sub">Snubber: {esc(run.snubber_label)} · status {esc(shown_status(run))}</p>'
    )
    sentence = headline(review, problems)
    page.add(f'<p class="headline" id="headline">{esc(sentence[0].upper() + sentence[1:])}.</p>')
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
    rejudged = _rejudging(page, store, run.id)
    page.add(
        "<h3>Limits of the sequence the run was made with</h3>"
        if rejudged
        else "<h3>Limits the points were judged against</h3>"
    )
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
    rows, total = _not_passed_rows(review, problems)
    if rows:
        page.add(f"<h3>Points that did not pass ({total}), worst first</h3>")
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
        header = [*WORST_HEADER, "the point's verdict"]
        page.add(table(header, _worst_rows(review), numeric=[1, 5]))
        _worst_overlays(page, store, review)
    else:
        page.paragraph("No figures stored for this run yet.", "note")

    for node in review.node_names[1:]:
        _node_section(page, store, review.node_view(node))

    page.section("identity", "DUT, snubber, bench and software")
    page.add(table(["what", "value"], _identity_rows(review)))
    instruments = _instrument_rows(review)
    if instruments:
        page.add("<h3>Instruments</h3>")
        page.add(table(["role", *IDENTITY_FIELDS], instruments))

    page.section("log", "Run log")
    _log_table(page, entries, run.id)

    page.section("sequence", "Sequence file as run")
    page.add(Markup(f"<pre>{esc(run.sequence_text)}</pre>"))
    page.safety(safety_text(_line_is_ac(review), _highest_peak_v(review)))

    csv_path = out_dir / "points.csv"
    write_points_csv(store, run.id, csv_path)
    return ReportFiles(page.write(), csv_path, page.images)
