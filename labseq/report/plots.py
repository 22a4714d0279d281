"""Figures of a report: heat maps over line × load, change maps, capture overlays.

Colours are colour-blind safe: cividis for value maps (monotonic in lightness and readable with
any common colour-vision deficiency), the ColorBrewer PuOr diverging map for changes, and the
Okabe–Ito palette (Color Universal Design, 2002) for lines. Every map cell also carries its value
in words when the grid is small enough to read, so nothing depends on colour alone.

Figures are :class:`matplotlib.figure.Figure` objects rendered straight to PNG: nothing here
imports pyplot or chooses a backend, so importing labseq in a notebook leaves its plotting alone.
"""

from __future__ import annotations

import io
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import matplotlib
import matplotlib.ticker
import numpy as np
from matplotlib.axes import Axes
from matplotlib.collections import PatchCollection
from matplotlib.colors import Normalize, TwoSlopeNorm
from matplotlib.figure import Figure
from matplotlib.patches import Rectangle

from labseq.analysis import RingFit
from labseq.units import format_si

#: Okabe & Ito palette, in the order lines are drawn.
OKABE_ITO = ("#0072B2", "#E69F00", "#009E73", "#CC79A7", "#56B4E9", "#D55E00", "#F0E442", "#000000")
BASELINE_COLOUR = "#0072B2"  # blue
CANDIDATE_COLOUR = "#D55E00"  # vermillion
FIT_COLOUR = "#000000"
LIMIT_COLOUR = "#CC79A7"  # reddish purple
VALUE_MAP = "cividis"
CHANGE_MAP = "PuOr"
MISSING_CELL = "#d9d9d9"
#: Grids with more cells than this are drawn without per-cell text (it would not be legible).
MAX_ANNOTATED_CELLS = 100
#: Cell text size (points at the figure's own size). A map is at most MAX_MAP_WIDTH_IN wide and
#: shown one to a row, never scaled down on a page as wide as the report's (html.CONTENT_WIDTH_PX),
#: so its cell text reads at this size: at least 9 pt.
CELL_FONT_PT = 10
MAX_MAP_WIDTH_IN = 10.0
#: Outline of a cell beyond its limit: a dark band with a light line inside it, visible on the
#: dark and the light end of every map.
OUTLINE_DARK, OUTLINE_LIGHT = "#000000", "#ffffff"
#: Axis ticks shown at most (evenly thinned beyond).
MAX_TICKS = 12
DPI = 100
#: Damping ratio from which a fitted ring barely oscillates, so its period does not set the window.
OVERDAMPED_RATIO = 0.5
#: Time shown after an edge whose ring could not be fitted.
NO_FIT_SPAN_S = 1e-6


@dataclass(frozen=True)
class Trace:
    """One capture as drawn: samples, the fitted rings of its edges, and what went wrong."""

    label: str
    time_s: np.ndarray
    volts: np.ndarray
    fits: tuple[RingFit, ...]
    edge_time_s: float | None  # the worst edge's mid-reference instant
    problem: str | None = None


def value_map(direction: int) -> str:
    """Colour map of a figure: brighter is always worse (cividis, reversed when higher is
    better)."""
    return VALUE_MAP if direction < 0 else VALUE_MAP + "_r"


def change_map(higher_is_better: bool) -> str:
    """Colour map of a change (candidate − baseline): purple for better, orange for worse, so
    it is PuOr (purple high) when higher is better, turned round when lower is."""
    return CHANGE_MAP if higher_is_better else CHANGE_MAP + "_r"


def png_bytes(fig: Figure) -> bytes:
    """Render ``fig`` as PNG (a figure made without pyplot is not kept anywhere once dropped)."""
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=DPI)
    return buffer.getvalue()


def _tick_positions(count: int) -> list[int]:
    step = max(1, math.ceil(count / MAX_TICKS))
    return list(range(0, count, step))


def _axes_labels(ax: Axes, lines_text: Sequence[str], loads_text: Sequence[str]) -> None:
    """Line values down the side and load values along the bottom, at the cell centres."""
    rows, columns = _tick_positions(len(lines_text)), _tick_positions(len(loads_text))
    ax.set_yticks([r + 0.5 for r in rows], [lines_text[i] for i in rows])
    ax.set_xticks([c + 0.5 for c in columns], [loads_text[i] for i in columns])
    ax.set_ylabel("line")
    ax.set_xlabel("load")
    if len(columns) > 6:
        ax.tick_params(axis="x", labelrotation=45)


def _text_colour(cmap: matplotlib.colors.Colormap, fraction: float) -> str:
    """Black on light cells, white on dark ones (relative luminance, ITU-R BT.709 weights)."""
    red, green, blue, _ = cmap(fraction)
    return "black" if 0.2126 * red + 0.7152 * green + 0.0722 * blue > 0.45 else "white"


def heat_map(
    values: np.ndarray,
    lines_text: Sequence[str],
    loads_text: Sequence[str],
    *,
    title: str,
    colour_label: str,
    cell_text: Callable[[int, int], str] | None = None,
    colour_values: np.ndarray | None = None,
    cmap_name: str = VALUE_MAP,
    centre: float | None = None,
    limits: tuple[float, float] | None = None,
    colour_format: Callable[[float], str] | None = None,
    outlined: np.ndarray | None = None,
) -> Figure:
    """A line (rows) × load (columns) map of ``values``.

    ``colour_values`` (default ``values``) sets the colours; ``cell_text(row, column)`` writes
    each cell's words on small grids; NaN cells are grey and read "—". ``centre`` makes the
    scale diverge around that value; ``limits`` fixes the scale (to share it between maps).
    ``outlined`` (a boolean grid) draws a heavy outline round those cells (beyond a limit).
    """
    shown = values if colour_values is None else colour_values
    cmap = matplotlib.colormaps[cmap_name].with_extremes(bad=MISSING_CELL)
    finite = shown[np.isfinite(shown)]
    if limits is not None:
        low, high = limits
    elif finite.size:
        low, high = float(finite.min()), float(finite.max())
    else:
        low, high = 0.0, 1.0
    if centre is not None:
        reach = max(abs(low - centre), abs(high - centre)) or 1.0
        norm: Normalize = TwoSlopeNorm(centre, centre - reach, centre + reach)
    else:
        norm = Normalize(low, high if high > low else low + (abs(low) or 1.0))
    rows, columns = shown.shape
    width = min(MAX_MAP_WIDTH_IN, 3.2 + 0.9 * columns)
    height = min(8.0, 2.0 + 0.55 * rows)
    fig = Figure(figsize=(max(width, 5.2), max(height, 3.2)), layout="constrained")
    ax = fig.subplots()
    mesh = ax.pcolormesh(
        np.ma.masked_invalid(shown), cmap=cmap, norm=norm, edgecolors="white", linewidth=0.5
    )
    ax.set_xlim(0, columns)
    ax.set_ylim(0, rows)
    _axes_labels(ax, lines_text, loads_text)
    ax.set_title(title)
    bar = fig.colorbar(mesh, ax=ax, label=colour_label)
    if colour_format is not None:
        bar.formatter = matplotlib.ticker.FuncFormatter(lambda v, _: colour_format(v))
        bar.update_ticks()
    if cell_text is not None and rows * columns <= MAX_ANNOTATED_CELLS:
        for row in range(rows):
            for column in range(columns):
                colour_value = shown[row, column]
                colour = (
                    _text_colour(cmap, float(norm(colour_value)))
                    if np.isfinite(colour_value)
                    else "black"
                )
                ax.text(
                    column + 0.5,
                    row + 0.5,
                    cell_text(row, column),
                    ha="center",
                    va="center",
                    fontsize=CELL_FONT_PT,
                    color=colour,
                )
    if outlined is not None and outlined.any():
        # one collection per stroke, not a patch per cell: a 100 × 100 grid stays quick to draw
        cells = [
            Rectangle((column + 0.06, row + 0.06), 0.88, 0.88)
            for row, column in zip(*np.nonzero(outlined), strict=True)
        ]
        for colour, width in ((OUTLINE_DARK, 4.0), (OUTLINE_LIGHT, 1.3)):
            ax.add_collection(
                PatchCollection(cells, facecolor="none", edgecolor=colour, linewidth=width),
                autolim=False,
            )
    return fig


def _window_s(traces: Sequence[Trace]) -> tuple[float, float]:
    """A time window around the first trace's worst edge that holds its ring: from a little
    before the edge to about five decay time constants after it (3 to 30 ring periods, or just the
    decay for a response that barely oscillates); 1 µs
    when no ring was fitted; the whole record when no edge was found."""
    for trace in traces:
        if trace.edge_time_s is None:
            continue
        span_s = NO_FIT_SPAN_S
        # the edge's own ring starts at its peak, well within NO_FIT_SPAN_S of the edge
        later = [
            fit for fit in trace.fits if 0 <= fit.t_start_s - trace.edge_time_s < NO_FIT_SPAN_S
        ]
        if later:
            fit = min(later, key=lambda f: f.t_start_s)
            period_s = 1.0 / fit.frequency_hz
            decay_s = 5.0 / fit.decay_rate_per_s if fit.decay_rate_per_s > 0 else math.inf
            # a response damped past oscillating (ζ ≥ 0.5) is shown over its decay alone
            shortest_s = 3 * period_s if fit.damping_ratio < OVERDAMPED_RATIO else 0.0
            span_s = (
                fit.t_start_s - trace.edge_time_s + min(max(decay_s, shortest_s), 30 * period_s)
            )
        return trace.edge_time_s - 0.15 * span_s, trace.edge_time_s + span_s
    if traces:
        return min(float(t.time_s[0]) for t in traces), max(float(t.time_s[-1]) for t in traces)
    return 0.0, 1.0


def _time_scale(span_s: float) -> tuple[float, str]:
    return (1e9, "ns") if span_s < 2e-6 else (1e6, "µs")


def overlay(
    groups: Sequence[tuple[str, Sequence[Trace], Sequence[str]]],
    *,
    title: str,
    limit_v: float | None = None,
    limit_label: str = "",
    y_label: str = "switch node (V)",
) -> Figure:
    """Captures overlaid around their worst edge, with their fitted rings dashed.

    ``groups`` are (name, traces, colours); a run report draws one group with one colour per
    capture, a compare draws the baseline and the candidate in one colour each.
    """
    every = [trace for _, traces, _ in groups for trace in traces]
    start_s, stop_s = _window_s(every)
    scale, unit = _time_scale(stop_s - start_s)
    fig = Figure(figsize=(10, 4.2), layout="constrained")
    ax = fig.subplots()
    one_group = len(groups) == 1
    for name, traces, colours in groups:
        for index, trace in enumerate(traces):
            colour = colours[index % len(colours)]
            inside = (trace.time_s >= start_s) & (trace.time_s <= stop_s)
            ax.plot(
                trace.time_s[inside] * scale,
                trace.volts[inside],
                color=colour,
                lw=0.9,
                alpha=0.85,
                label=trace.label if one_group else name,
            )
            for fit in trace.fits:
                if not start_s <= fit.t_start_s < stop_s:
                    continue  # a ring of another edge of the record
                t_fit = np.linspace(fit.t_start_s, stop_s, 600)
                ax.plot(
                    t_fit * scale,
                    fit.evaluate(t_fit),
                    color=FIT_COLOUR if one_group else colour,
                    lw=1.1,
                    ls="--",
                    label="fitted ring" + ("" if one_group else f", {name}"),
                )
    if limit_v is not None:
        ax.axhline(limit_v, color=LIMIT_COLOUR, ls=":", lw=1.5, label=limit_label)
    problems = sorted({t.problem for t in every if t.problem})
    if problems:
        ax.text(
            0.01,
            0.02,
            "; ".join(problems)[:160],
            transform=ax.transAxes,
            fontsize=8,
            va="bottom",
        )
    ax.set_xlabel(f"time from trigger ({unit})")
    ax.set_ylabel(y_label)
    ax.set_title(title)
    ax.grid(True, color="#e0e0e0", lw=0.6)
    handles, labels = ax.get_legend_handles_labels()
    if handles:
        unique = dict(zip(labels, handles, strict=True))
        ax.legend(unique.values(), unique.keys(), loc="lower right", fontsize=8)
    return fig


def axis_texts(values: Sequence[float], unit: str, suffix: str = "") -> list[str]:
    """Tick labels in engineering notation: ``36 V``, ``2.2 A``."""
    return [format_si(value, unit) + suffix for value in values]
