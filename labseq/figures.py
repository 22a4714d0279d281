"""The figure catalogue: every figure labseq measures, judges or compares, and its facts, once.

Each :class:`Figure` says its unit, its plain title, which way is better, whether it keeps a
falling node's sign, which bound clipping makes of it, the smallest change a compare takes as
real, and how the store keeps it. What used to be spread over the analysis, the verdict, the
review, the compare and the store derives from :data:`FIGURES`: :data:`FIGURE_UNITS`, the
worst-value directions of :func:`labseq.analysis.aggregate`, :data:`SIGNED_FIGURES`,
:data:`BOUNDED_BY_CLIPPING`, :data:`FIGURE_DIRECTIONS` (the figures a review reports, in the
order a reviewer reads them), :data:`FIGURE_TITLES`, :data:`NOISE_FLOORS`, and the capture
columns of the store (:data:`CAPTURE_FIGURES`, :data:`CAPTURE_METHODS`).

Beside them: the verdict words, the defaults a sequence and the analysis share, and the figures
in words (:func:`format_figure`, :func:`format_change`). The limits a node is judged against
are :class:`labseq.analysis.verdict.Limits`, whose fields are named after these figures.

Pure data and pure functions: importing this module costs nothing.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal

from labseq.units import format_si

#: Fraction of the rating that the peak may use. From memory of common power-supply component
#: derating guidelines (switch and rectifier voltage around 80 % of rating); not from a document.
DEFAULT_DERATING = 0.8
#: Settling band as a fraction of the step when none is given (IEEE 181 leaves the band to the
#: user; 5 % is common practice, no published source).
DEFAULT_SETTLING_BAND = 0.05

HIGHER, LOWER = +1, -1


@dataclass(frozen=True)
class Figure:
    """What is known about one figure, by its name (the analysis' name and the store's column).

    ``better`` is :data:`HIGHER` or :data:`LOWER` (which way the figure improves) or None for a
    figure without a direction, which has no worst value. ``signed``: kept in the node's own
    sign, so on a falling node the worse value is the more negative one. ``clip_bound``: what a
    clipped capture makes of the figure — a "lower" bound (the true value may be higher, i.e.
    worse) or an "upper" one. ``noise_floor``: the smallest change a compare takes as real
    (about one 8-bit code on a 250 V screen for volts, two samples at 1 GS/s for times, and what
    the figures' printed precision resolves otherwise; common practice, no published source).
    ``column``: the SQL type of its column among a capture's stored figures ("REAL" for a
    number, "TEXT" for a word saying how a figure was obtained), None when it is not a capture
    figure. ``fraction``: a fraction shown in percent (efficiency).
    """

    name: str
    unit: str = ""
    title: str | None = None
    better: int | None = None
    signed: bool = False
    clip_bound: Literal["lower", "upper"] | None = None
    noise_floor: float | None = None
    column: Literal["REAL", "TEXT"] | None = "REAL"
    fraction: bool = False


#: Every figure, in the order of the store's capture columns (numbers, then words), then the
#: point figures.
FIGURES: tuple[Figure, ...] = (
    Figure("base_v", "V"),
    Figure("plateau_v", "V"),
    Figure("peak_v", "V", "peak stress", LOWER, True, "lower", 1.0),
    Figure("overshoot_v", "V", "overshoot", LOWER, clip_bound="lower", noise_floor=1.0),
    Figure(
        "overshoot_pct", "%", "overshoot (% of step)", LOWER, clip_bound="lower", noise_floor=0.5
    ),
    Figure("rise_time_s", "s"),
    Figure("edge_time_s", "s"),
    Figure("ring_frequency_hz", "Hz", "ring frequency"),
    Figure("natural_frequency_hz", "Hz"),
    Figure("decay_rate_per_s", "/s"),
    Figure("real_pole_decay_rate_per_s", "/s"),
    Figure("damping_ratio", "", "damping ratio", HIGHER, noise_floor=0.005),
    Figure("q_factor", "", "Q", LOWER, noise_floor=0.05),
    Figure("fit_quality", "", better=HIGHER),
    Figure("settling_time_s", "s", "settling time", LOWER, noise_floor=2e-9),
    Figure("snubber_loss_w", "W", "snubber loss", LOWER, noise_floor=1e-3),
    Figure("stress_margin_v", "V", "stress margin", HIGHER, clip_bound="upper", noise_floor=1.0),
    Figure("clamp_level_v", "V", "clamp level", LOWER, noise_floor=1.0),
    Figure("clamp_loss_w", "W", "clamp loss", LOWER, noise_floor=1e-3),
    Figure("snubber_loss_method", column="TEXT"),
    Figure("clamp_loss_method", column="TEXT"),
    Figure("ring_model", column="TEXT"),
    Figure("efficiency", "", "efficiency", HIGHER, noise_floor=1e-3, column=None, fraction=True),
)
FIGURE: dict[str, Figure] = {figure.name: figure for figure in FIGURES}

#: The figures a review reports and a compare compares, in the order a reviewer reads them.
REVIEWED = (
    "peak_v",
    "stress_margin_v",
    "overshoot_v",
    "overshoot_pct",
    "damping_ratio",
    "q_factor",
    "settling_time_s",
    "snubber_loss_w",
    "clamp_level_v",
    "clamp_loss_w",
    "efficiency",
)

#: Units of the figures that have one (for engineering notation at the edges).
FIGURE_UNITS: dict[str, str] = {f.name: f.unit for f in FIGURES if f.unit}
#: A capture's stored numbers and words, one column each (the analysis' names).
CAPTURE_FIGURES: tuple[str, ...] = tuple(f.name for f in FIGURES if f.column == "REAL")
CAPTURE_METHODS: tuple[str, ...] = tuple(f.name for f in FIGURES if f.column == "TEXT")
#: Figures whose worst value is the largest, and those whose worst is the smallest.
WORST_IS_MAX = frozenset(f.name for f in FIGURES if f.better == LOWER)
WORST_IS_MIN = frozenset(f.name for f in FIGURES if f.better == HIGHER)
#: Figures kept in the node's own sign: on a falling node their worst is the most negative.
SIGNED_FIGURES = frozenset(f.name for f in FIGURES if f.signed)
#: Figures that clipping turns into a bound on the safe side (their true value may be worse).
BOUNDED_BY_CLIPPING = frozenset(f.name for f in FIGURES if f.clip_bound)
#: The reviewed figures' directions: +1 when a higher value is better, −1 when lower is.
FIGURE_DIRECTIONS: dict[str, int] = {name: FIGURE[name].better for name in REVIEWED}
#: Plain names for tables and sentences.
FIGURE_TITLES: dict[str, str] = {f.name: f.title for f in FIGURES if f.title}
#: Smallest change a compare takes as real, per reviewed figure.
NOISE_FLOORS: dict[str, float] = {name: FIGURE[name].noise_floor for name in REVIEWED}


def figure_direction(figure: str, polarity: int = 1) -> int:
    """+1 when a higher value of ``figure`` is better, −1 when lower is; turned round for a
    signed figure (the peak) of a falling node, whose worse peak is the more negative."""
    direction = FIGURE_DIRECTIONS[figure]
    return -direction if polarity < 0 and figure in SIGNED_FIGURES else direction


def figure_unit(figure: str) -> str:
    """Unit symbol of a figure as stored ("" for ratios and fractions)."""
    return FIGURE_UNITS.get(figure, "")


def shown_unit(figure: str) -> str:
    """Unit of a figure as shown: efficiency, a fraction, in %."""
    return "%" if FIGURE[figure].fraction else figure_unit(figure)


def figure_title(figure: str, polarity: int = 1) -> str:
    """The plain title of a figure ("peak stress"; a falling node's peak is its "peak reverse
    voltage"); the figure's name when the catalogue gives it no title."""
    if figure == "peak_v" and polarity < 0:
        return "peak reverse voltage"
    return FIGURE_TITLES.get(figure, figure)


def bound_relation(figure: str, polarity: int = 1) -> str:
    """How a value of ``figure`` from a clipped capture relates to the truth, as shown before
    it: "≥" when the true value may be higher, "≤" when lower, "" when clipping does not bound
    it. A falling node's signed peak may be more negative than a clipped capture shows."""
    bound = FIGURE[figure].clip_bound if figure in FIGURE else None
    if bound is None:
        return ""
    higher = bound == "lower"
    if polarity < 0 and figure in SIGNED_FIGURES:
        higher = not higher
    return "≥" if higher else "≤"


MINUS = "\u2212"


def format_figure(figure: str, value: float | None) -> str:
    """A figure in engineering notation: ``112 V``, ``0.31``, ``91.2 %``."""
    if value is None or not math.isfinite(value):
        return "—"
    if FIGURE[figure].fraction:
        return f"{100 * value:.3g} %"
    unit = figure_unit(figure)
    if unit == "%":
        return f"{value:.3g} %"
    return format_si(value, unit) if unit else f"{value:.3g}"


def format_change(figure: str, delta: float | None) -> str:
    """A signed change: ``+41 mW``, ``−38 V``, ``−0.2 pt`` (percentages in percentage
    points)."""
    if delta is None or not math.isfinite(delta):
        return "—"
    sign = "+" if delta > 0 else MINUS if delta < 0 else "±"
    if FIGURE[figure].fraction:
        return f"{sign}{abs(100 * delta):.2g} pt"
    unit = figure_unit(figure)
    if unit == "%":
        return f"{sign}{abs(delta):.2g} pt"
    return sign + (format_si(abs(delta), unit) if unit else f"{abs(delta):.2g}")


# --------------------------------------------------------------------------- verdicts

#: The verdict words (in the order the store has always listed them), and worst first (several
#: verdicts combine into their worst: :func:`labseq.analysis.verdict.worst_verdict`).
VERDICTS = ("pass", "fail", "incomplete")
VERDICTS_WORST_FIRST = ("fail", "incomplete", "pass")
