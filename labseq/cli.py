"""The ``labseq`` command: a thin layer over the library, one module per command.

Each module in ``labseq.commands`` exposes ``command`` (a click command), imported only when that
command is run or listed: ``labseq runs`` loads the store and nothing of the bench, and no
command module imports the simulator or scipy before its command needs them. Errors the user can
act on arrive as :class:`labseq.errors.LabseqError` or
:class:`labseq_instruments.errors.InstrumentError` and are printed as one line; set
``LABSEQ_DEBUG=1``
to see the traceback of an unexpected failure.
"""

from __future__ import annotations

import contextlib
import importlib
import os
import sys

import click

from labseq import __version__
from labseq.errors import EXIT_FAILURE, EXIT_INPUT, LabseqError
from labseq.safety import Interrupted

#: Modules under ``labseq.commands`` that each add one command to the group.
COMMAND_MODULES: tuple[str, ...] = (
    "sim",
    "examples",
    "check",
    "probe",
    "run",
    "resume",
    "runs",
    "log",
    "export",
    "analyze",
    "analyze_run",
    "design",
    "report",
    "compare",
    "merge",
    "publish",
)


#: Command name → its module (``analyze-run`` lives in ``analyze_run``).
COMMANDS: dict[str, str] = {module.replace("_", "-"): module for module in COMMAND_MODULES}


class _CommandGroup(click.Group):
    """The group of :data:`COMMANDS`, each imported from its module when first asked for."""

    def list_commands(self, ctx: click.Context) -> list[str]:
        return sorted(COMMANDS)

    def get_command(self, ctx: click.Context, cmd_name: str) -> click.Command | None:
        module = COMMANDS.get(cmd_name)
        if module is None:
            return None
        return importlib.import_module(f"labseq.commands.{module}").command


#: The exit statuses, as ``labseq --help`` shows them (``\b``: click keeps the lines as they are).
EXIT_STATUS_HELP = """\b
Exit status:
  0        done (and, where judged, passed)
  1        judged: a regression (compare), or a failing or incomplete
           run under --strict (run, resume, analyze-run, report)
  2        bad input: a file, an option or a value
  3        a bench, instrument or store failure, an unsafe end, or an
           unexpected error
  128 + n  ended by signal n: 129 SIGHUP, 130 Ctrl-C, 143 SIGTERM"""


@click.group(
    cls=_CommandGroup,
    context_settings={"help_option_names": ["-h", "--help"]},
    epilog=EXIT_STATUS_HELP,
)
@click.version_option(__version__, prog_name="labseq")
def group() -> None:
    """Prove a flyback snubber at every line and load corner, on a real or simulated bench."""


def main(argv: list[str] | None = None) -> None:
    """Console entry point: run the group and turn known errors into a message and exit code.

    Called with ``argv`` (in-process, as the tests do) it raises SystemExit like any click
    program. As the process's own command line it ends the process itself, see
    :func:`end_process`."""
    if argv is not None:
        _run(argv)
        return
    try:
        _run(None)
        code = 0
    except SystemExit as exc:
        code = exc.code if isinstance(exc.code, int) else int(exc.code is not None)
    end_process(code)


def end_process(code: int) -> None:
    """Flush stdout and stderr and end the process with ``code``, without Python's teardown.

    While Python tears itself down it puts the default signal handlers back, and threads it
    did not start (a BLAS library's workers) take any signal then: a SIGTERM would end the
    process with no exit status of ours. A run ended by SIGTERM must exit 143 even when a
    second signal reaches it as it ends; every file and session is closed by then."""
    for stream in (sys.stdout, sys.stderr):
        with contextlib.suppress(OSError, ValueError):
            stream.flush()
    os._exit(code)


def _run(argv: list[str] | None) -> None:
    """Run the group; known errors become a message and an exit status (SystemExit)."""
    from labseq_instruments.errors import InstrumentError

    try:
        group.main(args=argv, prog_name="labseq", standalone_mode=False)
    except click.exceptions.Abort:
        click.echo("labseq: interrupted", err=True)
        sys.exit(130)
    except click.ClickException as exc:
        exc.show()
        sys.exit(EXIT_INPUT)  # a usage error, a bad parameter, a file click could not open
    except LabseqError as exc:
        click.echo(f"labseq: error: {exc}", err=True)
        sys.exit(exc.exit_code)
    except InstrumentError as exc:
        click.echo(f"labseq: instrument error: {exc}", err=True)
        sys.exit(EXIT_FAILURE)
    except KeyboardInterrupt:
        click.echo("labseq: interrupted", err=True)
        sys.exit(130)
    except Interrupted as exc:  # a signal before a run's bench was opened: nothing switched on
        click.echo(f"labseq: {exc}", err=True)
        sys.exit(exc.exit_code)
    except Exception as exc:  # last resort: no traceback reaches a user
        if os.environ.get("LABSEQ_DEBUG"):
            raise
        click.echo(
            f"labseq: unexpected error: {type(exc).__name__}: {exc} "
            "(set LABSEQ_DEBUG=1 for the traceback)",
            err=True,
        )
        sys.exit(EXIT_FAILURE)  # never 1, which says "judged"
