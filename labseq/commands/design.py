"""``labseq design``: propose RC snubber values from a measured ring, and size an RCD clamp."""

from __future__ import annotations

import json
from dataclasses import fields
from pathlib import Path

import click

from labseq.analysis import (
    ClampProposal,
    DesignInputError,
    SnubberProposal,
    cheaper_tool,
    propose_clamp,
    propose_snubber,
)
from labseq.commands._options import option_fraction_or_quantity, option_quantity
from labseq.commands._store import db_option, resolve_run
from labseq.errors import InputError
from labseq.units import format_si

#: Keyword of :func:`propose_snubber` → (option, unit).
OPTIONS: dict[str, tuple[str, str]] = {
    "ring_freq_hz": ("--ring-freq", "Hz"),
    "leakage_h": ("--leakage", "H"),
    "added_cap_f": ("--added-cap", "F"),
    "ring_freq_added_hz": ("--ring-freq-added", "Hz"),
    "volts": ("--volts", "V"),
    "fsw_hz": ("--fsw", "Hz"),
    "loss_budget_w": ("--loss-budget", "W"),
    "cs_f": ("--cs", "F"),
}
#: Keyword of :func:`propose_clamp` → (option, unit), beyond ``leakage_h`` and ``fsw_hz``.
CLAMP_OPTIONS: dict[str, tuple[str, str]] = {
    "clamp_voltage_v": ("--clamp-voltage", "V"),
    "peak_current_a": ("--peak-current", "A"),
    "reflected_voltage_v": ("--reflected-voltage", "V"),
    "clamp_ripple_v": ("--clamp-ripple", "V"),
}
#: Clamp capacitor ripple when none is given: from memory of AN-4147, which takes 5-10 % of the
#: clamp voltage as reasonable.
DEFAULT_CLAMP_RIPPLE = "10%"

#: Lines of the text output: (label, field, unit).
REPORT_LINES = (
    ("ring frequency", "ring_freq_hz", "Hz"),
    ("node capacitance Cpar", "c_par_f", "F"),
    ("leakage inductance L", "l_leak_h", "H"),
    ("Rs = √(L/Cpar)", "r_ohm", "Ω"),
    ("Cs", "cs_f", "F"),
    ("Rs loss Cs·V²·fsw", "loss_w", "W"),
)
CLAMP_LINES = (
    ("clamp voltage over bus", "clamp_voltage_v", "V"),
    ("clamp ripple", "clamp_ripple_v", "V"),
    ("clamp loss", "clamp_loss_w", "W"),
    ("clamp resistor", "clamp_r_ohm", "Ω"),
    ("clamp capacitor", "clamp_c_f", "F"),
)


def _with_option_names(message: str) -> str:
    """Replace keyword names in a design message by the command's option names."""
    names = {**OPTIONS, **CLAMP_OPTIONS}
    for keyword, (option, _) in sorted(names.items(), key=lambda item: -len(item[0])):
        message = message.replace(keyword, option)
    return message


def report_text(proposal: SnubberProposal) -> str:
    """The RC proposal as aligned lines in engineering notation."""
    lines = []
    for label, name, unit in REPORT_LINES:
        value = getattr(proposal, name)
        suffix = f"  ({proposal.cs_source})" if name == "cs_f" and value is not None else ""
        lines.append(f"{label:<24}{format_si(value, unit)}{suffix}")
    zeta = proposal.damping_ratio
    lines.append(f"{'damping ratio ζ':<24}{'—' if zeta is None else f'{zeta:.3g}'}")
    lines.extend(f"warning: {warning}" for warning in proposal.warnings)
    return "\n".join(lines)


def clamp_text(clamp: ClampProposal) -> str:
    """The RCD clamp sizing as aligned lines in engineering notation."""
    lines = ["RCD clamp (Fairchild AN-4147 method)"]
    lines.extend(
        f"{label:<24}{format_si(getattr(clamp, name), unit)}" for label, name, unit in CLAMP_LINES
    )
    return "\n".join(lines)


def comparison_text(rc_loss_w: float, clamp_loss_w: float) -> str:
    """One line saying which tool dissipates less at these operating conditions."""
    rc, clamp = format_si(rc_loss_w, "W"), format_si(clamp_loss_w, "W")
    if cheaper_tool(rc_loss_w, clamp_loss_w) == "rcd clamp":
        return f"the RCD clamp is the cheaper tool: {clamp} against {rc} in the RC damper"
    return f"the RC damper is the cheaper tool: {rc} against {clamp} in the RCD clamp"


def _ripple_v(ripple: str | None, clamp_voltage_v: float | None) -> float | None:
    """--clamp-ripple in volts, or as a percentage of --clamp-voltage (None if that is missing:
    the clamp sizing then names the missing clamp voltage)."""
    text = ripple or DEFAULT_CLAMP_RIPPLE
    if text.strip().endswith("%"):
        if clamp_voltage_v is None:
            return None
        return option_fraction_or_quantity(text, "V", "--clamp-ripple", clamp_voltage_v)
    return option_quantity(text, "V", "--clamp-ripple")


@click.command("design")
@click.option("--ring-freq", help="Measured ring frequency, e.g. 25MHz.")
@click.option("--leakage", help="Known leakage inductance, e.g. 200n.")
@click.option("--added-cap", help="Capacitance added for a second measurement, e.g. 100p.")
@click.option("--ring-freq-added", help="Ring frequency with --added-cap fitted.")
@click.option("--volts", help="Step voltage at the node, e.g. 400V.")
@click.option("--fsw", help="Switching frequency, e.g. 100kHz.")
@click.option("--loss-budget", help="Allowed snubber resistor loss, e.g. 0.5W.")
@click.option("--cs", help="A chosen snubber capacitance instead of a loss budget.")
@click.option("--clamp-voltage", help="RCD clamp: capacitor voltage above the bus, e.g. 150V.")
@click.option("--peak-current", help="RCD clamp: peak primary current, e.g. 1.8A.")
@click.option("--reflected-voltage", help="RCD clamp: reflected voltage n·(Vout+Vf), e.g. 100V.")
@click.option(
    "--clamp-ripple", help=f"RCD clamp: capacitor ripple, e.g. 10V or 5% [{DEFAULT_CLAMP_RIPPLE}]."
)
@click.option(
    "--run",
    "run",
    metavar="RUN",
    help="Propose for every point of a stored run (id or 'latest'), worst peak first.",
)
@db_option("The store holding --run.")
@click.option("--json", "as_json", is_flag=True, help="Print one JSON object (SI numbers).")
def command(
    as_json: bool, clamp_ripple: str | None, run: str | None, db_path: Path, **options: str | None
) -> None:
    """Propose Rs and Cs from the ring frequency and L (or an added-capacitance measurement),
    and size an RCD clamp when --clamp-voltage, --peak-current and --reflected-voltage are given.

    With --run, the ring frequency and step voltage of every point of a stored run are used,
    with the run's switching frequency, leakage inductance (or --leakage) and resistor budget
    (or --loss-budget / --cs).
    """
    if run is not None:
        _run_proposals(run, db_path, options, as_json)
        return
    values = {
        keyword: option_quantity(options[option.lstrip("-").replace("-", "_")], unit, option)
        for keyword, (option, unit) in {**OPTIONS, **CLAMP_OPTIONS}.items()
        if keyword != "clamp_ripple_v"
    }
    wants_clamp = clamp_ripple is not None or any(
        values[keyword] is not None for keyword in CLAMP_OPTIONS if keyword != "clamp_ripple_v"
    )
    wants_rc = values["ring_freq_hz"] is not None or not wants_clamp
    proposal = clamp = None
    try:
        if wants_rc:
            proposal = propose_snubber(**{keyword: values[keyword] for keyword in OPTIONS})
        if wants_clamp:
            leakage_h = proposal.l_leak_h if proposal is not None else values["leakage_h"]
            clamp = propose_clamp(
                leakage_h=leakage_h,
                peak_current_a=values["peak_current_a"],
                fsw_hz=values["fsw_hz"],
                reflected_voltage_v=values["reflected_voltage_v"],
                clamp_voltage_v=values["clamp_voltage_v"],
                clamp_ripple_v=_ripple_v(clamp_ripple, values["clamp_voltage_v"]),
            )
    except DesignInputError as exc:
        raise InputError(f"design: {_with_option_names(str(exc))}") from None

    tool = None
    if proposal is not None and clamp is not None and proposal.loss_w is not None:
        tool = cheaper_tool(proposal.loss_w, clamp.clamp_loss_w)
    if as_json:
        rc_dict = (
            proposal.as_dict()
            if proposal is not None
            else {**{f.name: None for f in fields(SnubberProposal)}, "warnings": []}
        )
        clamp_dict = (
            clamp.as_dict() if clamp is not None else {f.name: None for f in fields(ClampProposal)}
        )
        click.echo(json.dumps({**rc_dict, **clamp_dict, "cheaper_tool": tool}, indent=2))
        return
    blocks = [report_text(proposal)] if proposal is not None else []
    if clamp is not None:
        blocks.append(clamp_text(clamp))
    if tool is not None:
        blocks.append(comparison_text(proposal.loss_w, clamp.clamp_loss_w))
    click.echo("\n".join(blocks))


def _run_proposals(run: str, db_path: Path, options: dict[str, str | None], as_json: bool) -> None:
    """``design --run``: one RC proposal per measured point of a stored run, worst peak first."""
    from labseq.runner import stored_sequence
    from labseq.store import Store

    given = {k: option_quantity(options[k], unit, f"--{k.replace('_', '-')}") for k, unit in
             (("leakage", "H"), ("loss_budget", "W"), ("cs", "F"))}  # fmt: skip
    with Store(db_path, create=False) as store:
        run_id = resolve_run(store, run)
        sequence = stored_sequence(store, run_id)
        points = store.points(run_id, status="done")
        figures = store.point_figures(run_id)
    leakage_h = given["leakage"] or sequence.dut.leakage_inductance_h
    if leakage_h is None:
        raise InputError(
            f"design --run {run_id}: the run's sequence declares no leakage inductance; give "
            "--leakage, or measure the ring with and without a known added capacitance and use "
            "--ring-freq, --added-cap and --ring-freq-added"
        )
    cs_f = given["cs"]
    budget_w = None if cs_f is not None else given["loss_budget"]
    budget_w = budget_w or (None if cs_f is not None else sequence.snubber.resistor_power_budget_w)
    rows = []
    for point in points:
        point_figures = figures.get(point.id, {})

        def mean(name: str, figures_of_point: dict = point_figures) -> float | None:
            return figures_of_point.get(name, {}).get("mean")

        ring_hz, plateau_v, base_v = mean("ring_frequency_hz"), mean("plateau_v"), mean("base_v")
        if ring_hz is None or plateau_v is None or base_v is None:
            continue  # no ring fitted at this point: nothing to size from
        try:
            proposal = propose_snubber(
                ring_freq_hz=ring_hz,
                leakage_h=leakage_h,
                volts=plateau_v - base_v,
                fsw_hz=sequence.dut.switching_frequency_hz,
                loss_budget_w=budget_w,
                cs_f=cs_f,
            )
        except DesignInputError as exc:
            raise InputError(f"design --run {run_id}: {_with_option_names(str(exc))}") from None
        peak_v = point_figures.get("peak_v", {}).get("worst")
        rows.append((peak_v if peak_v is not None else float("-inf"), point, proposal))
    if not rows:
        raise InputError(f"design --run {run_id}: no point of the run has a fitted ring")
    rows.sort(key=lambda row: -row[0])
    if as_json:
        click.echo(
            json.dumps(
                [
                    {"line_v": p.line_v, "load_a": p.load_a, "peak_v": peak, **prop.as_dict()}
                    for peak, p, prop in rows
                ],
                indent=2,
            )
        )
        return
    click.echo(
        f"run {run_id}: {len(rows)} points, worst peak first; L = {format_si(leakage_h, 'H')}, "
        f"fsw = {format_si(sequence.dut.switching_frequency_hz, 'Hz')}"
    )
    for peak_v, point, prop in rows:
        zeta = "—" if prop.damping_ratio is None else f"{prop.damping_ratio:.2f}"
        click.echo(
            f"{format_si(point.line_v, 'V'):>7} / {format_si(point.load_a, 'A'):<8} "
            f"peak {format_si(peak_v, 'V'):>7}  ring {format_si(prop.ring_freq_hz, 'Hz'):>9}  "
            f"Cpar {format_si(prop.c_par_f, 'F'):>7}  Rs {format_si(prop.r_ohm, 'Ω'):>7}  "
            f"Cs {format_si(prop.cs_f, 'F'):>7}  loss {format_si(prop.loss_w, 'W'):>7}  ζ {zeta}"
        )
        for warning in prop.warnings:
            click.echo(f"    warning: {warning}")
