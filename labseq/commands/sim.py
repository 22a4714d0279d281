"""``labseq sim``: run the simulated bench until Ctrl-C or SIGTERM.

Each role's VISA resource string is printed, so a sequence file or any VISA client can point at
it. The bench stops cleanly (outputs off, ports closed) on either signal and exits 0.
"""

from __future__ import annotations

import time

import click

from labseq.errors import InputError
from labseq.safety import Interrupted, signals_raise_interrupted
from sim_instruments.bench import SimBench
from sim_instruments.faults import KINDS, ROLES, FaultSpecError
from sim_instruments.flyback import DEMO_DUTS, DutFileError, load_dut, resolve_dut
from sim_instruments.instruments import DIALECTS
from sim_instruments.server import ServerConfigError

SIMULATION_NOTICE = (
    "This is a simulated bench: no hardware is driven, and every reading comes from a model of "
    "the DUT, not from a measurement. A real bench carries hazardous voltages; see the cautions "
    "printed by a real run."
)


@click.command("sim")
@click.option(
    "--dut",
    "dut_name",
    default="telecom_dc",
    show_default=True,
    help=f"Demo DUT ({', '.join(sorted(DEMO_DUTS))}) or the path of a DUT TOML file.",
)
@click.option(
    "--faults",
    default="",
    help=(
        "Faults to inject, ROLE:KIND@call=N, @point=N or @off=N (+ after N: every time from "
        "then on), comma-separated "
        f"(roles: {', '.join(ROLES)}; kinds: {', '.join(KINDS)})."
    ),
)
@click.option("--host", default="127.0.0.1", show_default=True, help="Address to listen on.")
@click.option(
    "--allow-remote", is_flag=True, help="Allow a --host other than loopback (LAN exposure)."
)
@click.option("--seed", type=int, default=0, show_default=True, help="Seed of every random draw.")
@click.option(
    "--dialect",
    type=click.Choice(DIALECTS),
    default=DIALECTS[0],
    show_default=True,
    help="Command set every instrument speaks: the generic maps', or the second ('alt') one.",
)
def command(
    dut_name: str, faults: str, host: str, allow_remote: bool, seed: int, dialect: str
) -> None:
    """Serve a simulated source, load, meter and scope on TCP ports until interrupted."""
    try:
        design = load_dut(resolve_dut(dut_name))
        bench = SimBench(
            design,
            faults=faults,
            host=host,
            allow_remote=allow_remote,
            seed=seed,
            dialect=dialect,
        )
    except (DutFileError, FaultSpecError, ServerConfigError) as error:
        raise InputError(str(error)) from None
    with signals_raise_interrupted():
        try:
            bench.start()
        except ServerConfigError as error:
            raise InputError(str(error)) from None
        try:
            click.echo(f"Simulated bench for {design.label} ({dialect} dialect: maps {dialect!r})")
            for role, resource in bench.resources.items():
                click.echo(f"  {role:<6} {resource}")
            if faults:
                click.echo(f"  faults: {faults}")
            click.echo(SIMULATION_NOTICE)
            click.echo("Press Ctrl-C to stop.")
            while True:
                time.sleep(3600)
        except Interrupted:
            click.echo("Simulated bench stopped.")
        finally:
            bench.stop()
