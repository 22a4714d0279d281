"""``labseq design``: propose RC snubber values from a measured ring."""

from __future__ import annotations

import json

import click

from labseq.analysis import DesignInputError, SnubberProposal, propose_snubber
from labseq.commands.analyze import option_quantity
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

#: Lines of the text output: (label, field, unit).
REPORT_LINES = (
    ("ring frequency", "ring_freq_hz", "Hz"),
    ("node capacitance Cpar", "c_par_f", "F"),
    ("leakage inductance L", "l_leak_h", "H"),
    ("Rs = √(L/Cpar)", "r_ohm", "Ω"),
    ("Cs", "cs_f", "F"),
    ("Rs loss Cs·V²·fsw", "loss_w", "W"),
)


def _with_option_names(message: str) -> str:
    """Replace keyword names in a design message by the command's option names."""
    for keyword, (option, _) in sorted(OPTIONS.items(), key=lambda item: -len(item[0])):
        message = message.replace(keyword, option)
    return message


def report_text(proposal: SnubberProposal) -> str:
    """The proposal as aligned lines in engineering notation."""
    lines = []
    for label, name, unit in REPORT_LINES:
        value = getattr(proposal, name)
        suffix = f"  ({proposal.cs_source})" if name == "cs_f" and value is not None else ""
        lines.append(f"{label:<24}{format_si(value, unit)}{suffix}")
    zeta = proposal.damping_ratio
    lines.append(f"{'damping ratio ζ':<24}{'—' if zeta is None else f'{zeta:.3g}'}")
    lines.extend(f"warning: {warning}" for warning in proposal.warnings)
    return "\n".join(lines)


@click.command("design")
@click.option("--ring-freq", help="Measured ring frequency, e.g. 25MHz.")
@click.option("--leakage", help="Known leakage inductance, e.g. 200n.")
@click.option("--added-cap", help="Capacitance added for a second measurement, e.g. 100p.")
@click.option("--ring-freq-added", help="Ring frequency with --added-cap fitted.")
@click.option("--volts", help="Step voltage at the node, e.g. 400V.")
@click.option("--fsw", help="Switching frequency, e.g. 100kHz.")
@click.option("--loss-budget", help="Allowed snubber resistor loss, e.g. 0.5W.")
@click.option("--cs", help="A chosen snubber capacitance instead of a loss budget.")
@click.option("--json", "as_json", is_flag=True, help="Print one JSON object (SI numbers).")
def command(as_json: bool, **options: str | None) -> None:
    """Propose Rs and Cs from the ring frequency and L (or an added-capacitance measurement)."""
    values = {
        keyword: option_quantity(options[option.lstrip("-").replace("-", "_")], unit, option)
        for keyword, (option, unit) in OPTIONS.items()
    }
    try:
        proposal = propose_snubber(**values)
    except DesignInputError as exc:
        raise InputError(f"design: {_with_option_names(str(exc))}") from None
    if as_json:
        click.echo(json.dumps(proposal.as_dict(), indent=2))
    else:
        click.echo(report_text(proposal))
