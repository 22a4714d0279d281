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
from labseq.analysis.design import PartSet, leakage_energy_loss_w
from labseq.commands._options import option_fraction_or_quantity, option_quantity
from labseq.commands._store import db_option, read_store, resolve_run
from labseq.errors import InputError
from labseq.units import format_si

#: Keyword of :func:`propose_snubber` → (option, unit).
OPTIONS: dict[str, tuple[str, str]] = {
    "ring_freq_hz": ("--ring-freq", "Hz"),
    "leakage_h": ("--leakage", "H"),
    "added_cap_f": ("--added-cap", "F"),
    "ring_freq_added_hz": ("--ring-freq-added", "Hz"),
    "damping_ratio": ("--damping", ""),
    "snubber_r_ohm": ("--snubber-r", "Ω"),
    "snubber_c_f": ("--snubber-c", "F"),
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
    ("Z0 = √(L/Cpar)", "z0_ohm", "Ω"),
    ("Cs", "cs_f", "F"),
    ("Rs for this Cs", "r_ohm", "Ω"),
    ("Rs loss Cs·V²·fsw", "loss_w", "W"),
)
#: How L and Cpar were found, as the text output says it.
NETWORK_FROM = {
    "leakage": "from the ring and the given leakage inductance",
    "added capacitance": "from the rings with and without the added capacitance",
    "loaded ring": "from the ring measured with the fitted damper (characteristic equation)",
}
CLAMP_LINES = (
    ("clamp voltage over bus", "clamp_voltage_v", "V"),
    ("clamp ripple", "clamp_ripple_v", "V"),
    ("clamp loss", "clamp_loss_w", "W"),
    ("clamp resistor", "clamp_r_ohm", "Ω"),
    ("clamp capacitor", "clamp_c_f", "F"),
)


#: Why a ring frequency alone proposes nothing, and what would do.
NO_NETWORK = (
    "design: a ring frequency alone cannot size a snubber: L and Cpar need one more fact. Give "
    "--leakage (the known leakage inductance), or --added-cap with --ring-freq-added (the ring "
    "with a known capacitance added), or --damping with --snubber-r and --snubber-c (the ring "
    "measured with that damper fitted); or --run RUN for a stored run"
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
    if proposal.network_from is not None:
        lines.append(f"L and Cpar {NETWORK_FROM[proposal.network_from]}")
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
    lines = ["RCD clamp energy balance"]
    lines.extend(
        f"{label:<24}{format_si(getattr(clamp, name), unit)}" for label, name, unit in CLAMP_LINES
    )
    return "\n".join(lines)


def comparison_text(rc_loss_w: float, clamp_loss_w: float, leakage_w: float) -> str:
    """Which tool dissipates less at these operating conditions. The RC damper's resistor takes
    Cs·V²·fsw and also the leakage energy ½·L·Ipk²·fsw that the clamp would otherwise take, so
    the damper's figure here includes it."""
    total = rc_loss_w + leakage_w
    rc = (
        f"{format_si(total, 'W')} in the RC damper (Cs·V²·fsw {format_si(rc_loss_w, 'W')} + "
        f"leakage energy ½·L·Ipk²·fsw {format_si(leakage_w, 'W')})"
    )
    clamp = format_si(clamp_loss_w, "W")
    if cheaper_tool(total, clamp_loss_w) == "rcd clamp":
        return f"the RCD clamp is the cheaper tool: {clamp} against {rc}"
    return f"the RC damper is the cheaper tool: {rc} against {clamp} in the RCD clamp"


def clamp_leakage_h(proposal: SnubberProposal | None, values: dict) -> float | None:
    """The leakage inductance for the clamp: the RC proposal's L, else --leakage."""
    if proposal is not None and proposal.l_leak_h is not None:
        return proposal.l_leak_h
    return values["leakage_h"]


def _damping(text: str | None) -> float | None:
    """--damping as a number (a damping ratio, no unit)."""
    if text is None:
        return None
    try:
        return float(text)
    except ValueError:
        raise InputError(
            f"--damping {text!r}: give the damping ratio ζ as a number such as 0.3"
        ) from None


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
@click.option(
    "--damping", help="Damping ratio of the ring measured with a damper fitted, e.g. 0.3."
)
@click.option("--snubber-r", help="Resistor of the damper fitted when the ring was measured.")
@click.option("--snubber-c", help="Capacitor of the damper fitted when the ring was measured.")
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
@db_option("The store holding --run.", lab=True)
@click.option("--json", "as_json", is_flag=True, help="Print one JSON object (SI numbers).")
def command(
    as_json: bool, clamp_ripple: str | None, run: str | None, db_path: Path, **options: str | None
) -> None:
    """Propose Rs and Cs from a measured ring, and size an RCD clamp when --clamp-voltage,
    --peak-current and --reflected-voltage are given.

    L and Cpar come from the ring frequency and a known --leakage, or from the rings with and
    without --added-cap, or from one ring measured with a damper fitted (--ring-freq, --damping,
    --snubber-r, --snubber-c). A --loss-budget caps Cs; Rs is the one that damps the ring most
    with that Cs.

    With --run, every point of a stored run gives its own L and Cpar from its measured ring and
    the run's damper (or from the run's leakage inductance when it has no damper), and one part
    set for every point is proposed, checked at the point with the largest step.
    """
    if run is not None:
        _run_proposals(run, db_path, options, as_json)
        return
    values = {
        keyword: option_quantity(options[option.lstrip("-").replace("-", "_")], unit, option)
        for keyword, (option, unit) in {**OPTIONS, **CLAMP_OPTIONS}.items()
        if keyword not in ("clamp_ripple_v", "damping_ratio")
    }
    values["damping_ratio"] = _damping(options["damping"])
    wants_clamp = clamp_ripple is not None or any(
        values[keyword] is not None for keyword in CLAMP_OPTIONS if keyword != "clamp_ripple_v"
    )
    wants_rc = values["ring_freq_hz"] is not None or not wants_clamp
    proposal = clamp = None
    try:
        if wants_rc:
            proposal = propose_snubber(**{keyword: values[keyword] for keyword in OPTIONS})
        if wants_clamp:
            clamp = propose_clamp(
                leakage_h=clamp_leakage_h(proposal, values),
                peak_current_a=values["peak_current_a"],
                fsw_hz=values["fsw_hz"],
                reflected_voltage_v=values["reflected_voltage_v"],
                clamp_voltage_v=values["clamp_voltage_v"],
                clamp_ripple_v=_ripple_v(clamp_ripple, values["clamp_voltage_v"]),
            )
    except DesignInputError as exc:
        raise InputError(f"design: {_with_option_names(str(exc))}") from None
    if proposal is not None and proposal.c_par_f is None:
        raise InputError(NO_NETWORK)

    tool = leakage_w = None
    if proposal is not None and clamp is not None and proposal.loss_w is not None:
        leakage_w = leakage_energy_loss_w(
            clamp_leakage_h(proposal, values), values["peak_current_a"], values["fsw_hz"]
        )
        tool = cheaper_tool(proposal.loss_w + leakage_w, clamp.clamp_loss_w)
    if as_json:
        rc_dict = (
            proposal.as_dict()
            if proposal is not None
            else {**{f.name: None for f in fields(SnubberProposal)}, "warnings": []}
        )
        clamp_dict = (
            clamp.as_dict() if clamp is not None else {f.name: None for f in fields(ClampProposal)}
        )
        rc_total = None if leakage_w is None else proposal.loss_w + leakage_w
        click.echo(
            json.dumps(
                {**rc_dict, **clamp_dict, "rc_loss_with_leakage_w": rc_total, "cheaper_tool": tool},
                indent=2,
            )
        )
        return
    blocks = [report_text(proposal)] if proposal is not None else []
    if clamp is not None:
        blocks.append(clamp_text(clamp))
    if tool is not None:
        blocks.append(comparison_text(proposal.loss_w, clamp.clamp_loss_w, leakage_w))
    click.echo("\n".join(blocks))


def _run_proposals(run: str, db_path: Path, options: dict[str, str | None], as_json: bool) -> None:
    """``design --run``: one proposal per measured point of a stored run, worst peak first, and
    one part set for all of them (:func:`labseq.proposals.propose_for_run`)."""
    from labseq.proposals import propose_for_run

    given = {k: option_quantity(options[k], unit, f"--{k.replace('_', '-')}") for k, unit in
             (("loss_budget", "W"), ("cs", "F"))}  # fmt: skip
    for name in ("leakage", "damping", "snubber_r", "snubber_c"):
        if options.get(name) is not None:
            raise InputError(
                f"design --run: --{name.replace('_', '-')} is not used with --run: every point's "
                "L and Cpar come from its ring measured with the run's own damper"
            )
    with read_store(db_path) as store:
        run_id = resolve_run(store, run)
        try:
            found = propose_for_run(
                store, run_id, loss_budget_w=given["loss_budget"], cs_f=given["cs"]
            )
        except DesignInputError as exc:
            raise InputError(f"design --run {run_id}, {_with_option_names(str(exc))}") from None
    part_set = found.part_set
    if as_json:
        point_rows = [
            {
                "line_v": row.point.line_v,
                "load_a": row.point.load_a,
                "peak_v": row.peak_v,
                "step_v": row.step_v,
                "clipped": row.clipped,
                "measured_damping_ratio": row.measured_damping_ratio,
                **row.proposal.as_dict(),
                "part_set_damping_ratio": zeta,
            }
            for row, zeta in zip(found.points, part_set.damping_ratios, strict=True)
        ]
        click.echo(
            json.dumps(
                {"run": run_id, "points": point_rows, "part_set": part_set.as_dict()}, indent=2
            )
        )
        return
    click.echo(
        f"run {run_id}: {len(found.points)} points, worst peak first; damper fitted "
        f"{found.snubber.label}, fsw = {format_si(found.fsw_hz, 'Hz')}; L and Cpar of each point "
        "from its ring measured with that damper"
    )
    for row in found.points:
        prop, point = row.proposal, row.point
        zeta = "—" if prop.damping_ratio is None else f"{prop.damping_ratio:.2f}"
        click.echo(
            f"{format_si(point.line_v, 'V'):>7} / {format_si(point.load_a, 'A'):<8} "
            f"peak {format_si(row.peak_v, 'V'):>7}{' (clipped)' if row.clipped else ''}  "
            f"ring {format_si(prop.ring_freq_hz, 'Hz'):>9}  L {format_si(prop.l_leak_h, 'H'):>7}  "
            f"Cpar {format_si(prop.c_par_f, 'F'):>7}  Rs {format_si(prop.r_ohm, 'Ω'):>7}  "
            f"Cs {format_si(prop.cs_f, 'F'):>7}  loss {format_si(prop.loss_w, 'W'):>7}  ζ {zeta}"
        )
        for warning in prop.warnings:
            click.echo(f"    warning: {warning}")
    if any(row.clipped for row in found.points):
        click.echo(
            "clipped: the scope reached full scale at these points; their peak is a lower bound "
            "(the ring was fitted without the clipped samples)"
        )
    click.echo(part_set_text(part_set, found.loss_budget_w))


def part_set_text(part_set: PartSet, budget_w: float | None) -> str:
    """The one part set for every point, as lines."""
    budget = "" if budget_w is None else f" (budget {format_si(budget_w, 'W')})"
    return "\n".join(
        [
            "one part set for every point:",
            f"  Rs {format_si(part_set.r_ohm, 'Ω')}, Cs {format_si(part_set.cs_f, 'F')} "
            f"({part_set.cs_source})",
            f"  loss at the worst-step corner ({format_si(part_set.worst_step_v, 'V')} step): "
            f"{format_si(part_set.worst_step_loss_w, 'W')}{budget}",
            f"  smallest damping ratio over the points: {part_set.min_damping_ratio:.2f}",
        ]
    )
