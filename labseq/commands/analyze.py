"""``labseq analyze FILE``: the ringing figures of one waveform file, as a table, JSON or a plot."""

from __future__ import annotations

import json
from pathlib import Path

import click
import numpy as np

from labseq.analysis import (
    EDGE_FIGURE_NAMES,
    CaptureFigures,
    EdgeFigures,
    SnubberBranch,
    analyze_capture,
)
from labseq.analysis.capture import NO_RING
from labseq.analysis.snubber import METHOD_LABELS
from labseq.commands._options import option_fraction_or_quantity, option_quantity
from labseq.errors import InputError
from labseq.figures import DEFAULT_DERATING, DEFAULT_SETTLING_BAND, FIGURE, FIGURE_UNITS
from labseq.units import format_si
from labseq.waveform_files import FileRecord, read_waveform

#: Okabe & Ito colour-blind-safe palette (Color Universal Design, 2002).
COLOURS = {
    "record": "#0072B2",
    "fit": "#D55E00",
    "base": "#009E73",
    "plateau": "#E69F00",
    "peak": "#CC79A7",
}
#: How a figure that clipping bounds is shown: ≥ its value (a lower bound) or ≤ (an upper one).
BOUND_SIGNS = {"lower": "≥", "upper": "≤"}
#: What the snubber loss from the waveform assumes, printed with it.
LOSS_ASSUMPTIONS = (
    "Snubber loss, waveform method: the nominal Rs–Cs branch driven by the measured voltage, Rs·i²"
    " averaged over one switching period around each edge, less the scope noise measured in the"
    " record; it assumes the probe is across the whole branch and Rs, Cs are nominal. Cs·V²·fsw:"
    " the record is shorter than one switching period plus 5·Rs·Cs, so the usual estimate is"
    " used, which ignores the ring and a partial discharge at light load."
)
#: Ring figures that read "no ring" when the edge settles without oscillating.
RING_ONLY_FIGURES = {"ring_frequency_hz", "natural_frequency_hz", "damping_ratio", "q_factor"}


def _settling_band(text: str) -> float:
    """``5%`` or ``0.05`` → 0.05."""
    band = option_fraction_or_quantity(text, "", "--settling-band")
    if not 0 < band < 1:
        raise InputError(
            f"--settling-band {text!r}: give a percentage of the step such as '5%' or a fraction "
            "between 0 and 1 such as 0.05"
        )
    return band


def _snubber(fsw: str | None, cs: str | None, rs: str | None) -> SnubberBranch | None:
    given = [fsw is not None, cs is not None, rs is not None]
    if not any(given):
        return None
    if not all(given):
        raise InputError("--fsw, --cs and --rs go together (switching frequency, Cs and Rs)")
    try:
        return SnubberBranch(
            rs_ohm=option_quantity(rs, "Ω", "--rs"),
            cs_f=option_quantity(cs, "F", "--cs"),
            fsw_hz=option_quantity(fsw, "Hz", "--fsw"),
        )
    except ValueError as exc:
        raise InputError(str(exc)) from None


def format_figure(edge: EdgeFigures, name: str) -> str:
    """One figure of an edge in engineering notation, with ≥/≤ when clipping bounds it."""
    value = getattr(edge, name)
    if value is None and name in RING_ONLY_FIGURES and edge.ring_model == NO_RING:
        return NO_RING
    if name == "snubber_loss_method" and value is not None:
        return METHOD_LABELS.get(value, value)
    if isinstance(value, bool | str) or value is None:
        return "—" if value is None else str(value).lower()
    unit = FIGURE_UNITS.get(name)
    text = format_si(value, unit) if unit else f"{value:.3g}"
    if name == "snubber_loss_w" and edge.snubber_loss_method is not None:
        text += f" ({METHOD_LABELS.get(edge.snubber_loss_method, edge.snubber_loss_method)})"
    bound = FIGURE[name].clip_bound if name in FIGURE else None
    return f"{BOUND_SIGNS[bound]} {text}" if edge.clipped and bound else text


def _print_table(path: Path, figures: CaptureFigures) -> None:
    from rich.table import Table

    shown = figures.edges if len(figures.edges) <= 6 else [figures.worst]
    table = Table(title=f"{path.name}: {len(figures.edges)} turn-off edge(s)")
    table.add_column("figure")
    for edge in shown:
        index = figures.edges.index(edge)
        marker = " (worst)" if index == figures.worst_index else ""
        table.add_column(f"edge {index + 1}{marker}", justify="right")
    for name in EDGE_FIGURE_NAMES:
        table.add_row(name, *(format_figure(edge, name) for edge in shown))
    from labseq.progress import make_console

    console = make_console()
    console.print(table)
    if figures.clipped:
        console.print("The record reached full scale: peak and overshoot are lower bounds.")
    if figures.worst.snubber_loss_w is not None:
        console.print(LOSS_ASSUMPTIONS)


def _plot(path: Path, waveform: FileRecord, figures: CaptureFigures) -> None:
    from matplotlib.figure import Figure  # not pyplot: no backend is chosen

    time_s = waveform.t0_s + np.arange(waveform.volts.size) * waveform.sample_interval_s
    fig = Figure(figsize=(10, 5), layout="constrained")
    ax = fig.subplots()
    ax.plot(time_s * 1e6, waveform.volts, color=COLOURS["record"], lw=0.8, label="record")
    for index, fit in enumerate(figures.ring_fits):
        if fit is None:
            continue
        span_s = min(4.0 / fit.decay_rate_per_s, time_s[-1] - fit.t_start_s)
        t_fit = np.linspace(fit.t_start_s, fit.t_start_s + span_s, 400)
        ax.plot(
            t_fit * 1e6,
            fit.evaluate(t_fit),
            color=COLOURS["fit"],
            lw=1.2,
            ls="--",
            label="fitted ring" if index == figures.worst_index else None,
        )
    worst = figures.worst
    ax.axhline(
        worst.base_v, color=COLOURS["base"], ls=":", label=f"base {format_si(worst.base_v, 'V')}"
    )
    ax.axhline(
        worst.plateau_v,
        color=COLOURS["plateau"],
        ls="-.",
        label=f"plateau {format_si(worst.plateau_v, 'V')}",
    )
    ax.axhline(
        worst.peak_v,
        color=COLOURS["peak"],
        ls=(0, (1, 3)),
        label=f"peak {format_figure(worst, 'peak_v')}",
    )
    ax.set_xlabel("time (µs)")
    ax.set_ylabel("volts (V)")
    ax.set_title(
        f"ring {format_si(worst.ring_frequency_hz, 'Hz')}, ζ = "
        f"{'—' if worst.damping_ratio is None else f'{worst.damping_ratio:.3g}'}"
    )
    ax.legend(loc="best")
    try:
        fig.savefig(path, dpi=120)
    except OSError as exc:
        raise InputError(f"--plot {path}: cannot write the image: {exc}") from None


@click.command("analyze")
@click.argument("file", type=click.Path(path_type=Path, dir_okay=False))
@click.option("--json", "as_json", is_flag=True, help="Print one JSON object (SI numbers).")
@click.option("--plot", type=click.Path(path_type=Path, dir_okay=False), help="Write a PNG plot.")
@click.option(
    "--settling-band",
    default=f"{DEFAULT_SETTLING_BAND:.0%}",
    show_default=True,
    help="Band around the plateau.",
)
@click.option(
    "--polarity",
    type=click.Choice(["rising", "falling"]),
    default="rising",
    show_default=True,
    help="Direction of the node at turn-off (falling: e.g. a diode's reverse voltage).",
)
@click.option("--rating", help="Voltage rating of the device at the node, e.g. 650V.")
@click.option(
    "--derating", type=float, default=DEFAULT_DERATING, show_default=True, help="Usable fraction."
)
@click.option("--fsw", help="Switching frequency, e.g. 150kHz (with --cs and --rs).")
@click.option("--cs", help="Snubber capacitance, e.g. 470p.")
@click.option("--rs", help="Snubber resistance, e.g. 47.")
@click.option(
    "--channel", help="Voltage column of a file with several: its name (CH2) or number (2)."
)
@click.option(
    "--time-unit", help="Unit of the times where the file states none: s, ms, us, ns or ps."
)
@click.option("--capture", help="Capture of labseq's NPZ export (captures.npz), e.g. p003_c01.")
def command(
    file: Path,
    as_json: bool,
    plot: Path | None,
    settling_band: str,
    polarity: str,
    rating: str | None,
    derating: float,
    fsw: str | None,
    cs: str | None,
    rs: str | None,
    channel: str | None,
    time_unit: str | None,
    capture: str | None,
) -> None:
    """Analyse every turn-off edge in a waveform FILE: text (CSV and the like, as scopes and
    spreadsheets save it), NPY, NPZ, or labseq's own export."""
    band = _settling_band(settling_band)
    snubber = _snubber(fsw, cs, rs)
    rating_v = option_quantity(rating, "V", "--rating")
    waveform = read_waveform(file, channel=channel, time_unit=time_unit, capture=capture)
    if waveform.note:
        click.echo(f"{file}: read {waveform.note}", err=True)
    try:
        figures = analyze_capture(
            waveform.volts,
            waveform.sample_interval_s,
            waveform.t0_s,
            clipped=waveform.clipped,
            polarity=1 if polarity == "rising" else -1,
            settling_band=band,
            snubber=snubber,
            rating_v=rating_v,
            derating=derating,
        )
    except ValueError as exc:
        raise InputError(f"{file}: {exc}") from None
    if plot is not None:
        _plot(plot, waveform, figures)
    if as_json:
        note = {"snubber_loss_assumptions": LOSS_ASSUMPTIONS} if snubber is not None else {}
        click.echo(json.dumps({"file": str(file), **figures.as_dict(), **note}, indent=2))
    else:
        _print_table(file, figures)
