"""``labseq sim``: run the simulated bench until Ctrl-C or SIGTERM.

Each role's VISA resource string is printed, so a sequence file or any VISA client can point at
it. The bench stops cleanly (outputs off, ports closed) on either signal and exits 0.

The command's options name what the simulator offers (its demo DUTs, fault kinds and command
sets); they are built from it (:mod:`labseq.sim_bench`) only when the command runs or shows its
own help, so listing labseq's commands does not import the simulator.
"""

from __future__ import annotations

import json
import sys
import time
from typing import Any

import click

from labseq.safety import Interrupted, signals_raise_interrupted

SIMULATION_NOTICE = (
    "This is a simulated bench: no hardware is driven, and every reading comes from a model of "
    "the DUT, not from a measurement. A real bench carries hazardous voltages; see the cautions "
    "printed by a real run."
)


def _options() -> list[click.Parameter]:
    """The command's options, named from what the simulator offers."""
    from labseq.sim_bench import DEMO_DUTS, DIALECTS, FAULT_KINDS, FAULT_ROLES

    return [
        click.Option(
            ["--dut", "dut_name"],
            default="telecom_dc",
            show_default=True,
            help=f"Demo DUT ({', '.join(sorted(DEMO_DUTS))}) or the path of a DUT TOML file.",
        ),
        click.Option(
            ["--faults"],
            default="",
            help=(
                "Faults to inject, ROLE:KIND@call=N, @point=N or @off=N (+ after N: every time "
                "from then on), comma-separated "
                f"(roles: {', '.join(FAULT_ROLES)}; kinds: {', '.join(FAULT_KINDS)})."
            ),
        ),
        click.Option(
            ["--host"], default="127.0.0.1", show_default=True, help="Address to listen on."
        ),
        click.Option(
            ["--allow-remote"],
            is_flag=True,
            help="Allow a --host other than loopback (LAN exposure).",
        ),
        click.Option(
            ["--seed"], type=int, default=0, show_default=True, help="Seed of every random draw."
        ),
        click.Option(
            ["--json", "as_json"],
            is_flag=True,
            help="Print the resource strings as one JSON object (one line), then serve.",
        ),
        click.Option(
            ["--dialect"],
            type=click.Choice(DIALECTS),
            default=DIALECTS[0],
            show_default=True,
            help="Command set every instrument speaks: the generic maps', or the second ('alt') "
            "one.",
        ),
    ]


class _SimCommand(click.Command):
    """A command whose options are built on first use (see the module notes)."""

    def get_params(self, ctx: click.Context) -> list[click.Parameter]:
        if not self.params:
            self.params = _options()
        return super().get_params(ctx)


def sim_object(bench: Any, dialect: str, faults: str) -> dict[str, Any]:
    """The running simulated bench for JSON: its DUT, dialect, faults and each role's VISA
    resource string (the same strings the text output prints)."""
    return {
        "dut": bench.design.label,
        "dialect": dialect,
        "faults": faults or None,
        "resources": dict(bench.resources),
        "simulated": True,
        "notice": SIMULATION_NOTICE,
    }


@click.command("sim", cls=_SimCommand)
def command(**options: Any) -> None:
    """Serve a simulated source, load, meter and scope on TCP ports until interrupted."""
    from labseq.sim_bench import serve

    dialect = options["dialect"]
    with signals_raise_interrupted():
        bench = serve(
            options["dut_name"],
            faults=options["faults"],
            host=options["host"],
            allow_remote=options["allow_remote"],
            seed=options["seed"],
            dialect=dialect,
        )
        try:
            if options["as_json"]:
                click.echo(json.dumps(sim_object(bench, dialect, options["faults"])), nl=True)
                sys.stdout.flush()
                while True:
                    time.sleep(3600)
            click.echo(
                f"Simulated bench for {bench.design.label} ({dialect} dialect: maps {dialect!r})"
            )
            for role, resource in bench.resources.items():
                click.echo(f"  {role:<6} {resource}")
            if options["faults"]:
                click.echo(f"  faults: {options['faults']}")
            click.echo(SIMULATION_NOTICE)
            click.echo("Press Ctrl-C to stop.")
            while True:
                time.sleep(3600)
        except Interrupted:
            click.echo("Simulated bench stopped.", err=options["as_json"])
        finally:
            bench.stop()
