"""The ``labseq`` command: a thin layer over the library, one module per command.

Each module in ``labseq.commands`` exposes ``command`` (a click command). Errors the user can act
on arrive as :class:`labseq.errors.LabseqError` or :class:`instruments.errors.InstrumentError` and
are printed as one line; set ``LABSEQ_DEBUG=1`` to see the traceback of an unexpected failure.
"""

from __future__ import annotations

import importlib
import os
import sys

import click

from labseq import __version__
from labseq.errors import LabseqError

#: Modules under ``labseq.commands`` that each add one command to the group.
COMMAND_MODULES: tuple[str, ...] = (
    "sim",
    "check",
    "probe",
    "run",
    "resume",
    "runs",
    "export",
    "analyze",
    "analyze_run",
    "design",
    "report",
    "compare",
)


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="labseq")
def group() -> None:
    """Prove a flyback snubber at every line and load corner, on a real or simulated bench."""


for _name in COMMAND_MODULES:
    group.add_command(importlib.import_module(f"labseq.commands.{_name}").command)


def main(argv: list[str] | None = None) -> None:
    """Console entry point: run the group and turn known errors into a message and exit code."""
    from instruments.errors import InstrumentError

    try:
        group.main(args=argv, prog_name="labseq", standalone_mode=False)
    except click.exceptions.Abort:
        click.echo("labseq: interrupted", err=True)
        sys.exit(130)
    except click.ClickException as exc:
        exc.show()
        sys.exit(2 if isinstance(exc, click.UsageError | click.BadParameter) else exc.exit_code)
    except LabseqError as exc:
        click.echo(f"labseq: error: {exc}", err=True)
        sys.exit(exc.exit_code)
    except InstrumentError as exc:
        click.echo(f"labseq: instrument error: {exc}", err=True)
        sys.exit(1)
    except KeyboardInterrupt:
        click.echo("labseq: interrupted", err=True)
        sys.exit(130)
    except Exception as exc:  # last resort: no traceback reaches a user
        if os.environ.get("LABSEQ_DEBUG"):
            raise
        click.echo(
            f"labseq: unexpected error: {type(exc).__name__}: {exc} "
            "(set LABSEQ_DEBUG=1 for the traceback)",
            err=True,
        )
        sys.exit(1)
