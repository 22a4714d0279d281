"""Errors that reach the user as one clear line and an exit status, never as a traceback.

Exit statuses of every ``labseq`` command (README.md, "Exit statuses"; ``labseq --help``):

* 0 — done;
* 1 — judged: a regression (``compare``), or a failing verdict where it was asked for
  (``--strict``); never anything else;
* 2 — bad input: a file, an option or a value, named in the message;
* 3 — a bench, instrument or store failure, an unsafe end, or any unexpected error;
* 128 + n — ended by signal n (129 SIGHUP, 130 SIGINT / Ctrl-C, 143 SIGTERM).
"""

from __future__ import annotations

#: Everything asked for was done (and, where judged, passed).
EXIT_OK = 0
#: Judged: a regression, or a failing or incomplete verdict under ``--strict``.
EXIT_JUDGED = 1
#: Bad input: a file, an option or a value.
EXIT_INPUT = 2
#: A bench, instrument or store failure, an unsafe end, or an unexpected error.
EXIT_FAILURE = 3


class LabseqError(Exception):
    """A failure the user can act on. ``exit_code`` is what the CLI exits with."""

    exit_code = EXIT_FAILURE


class InputError(LabseqError):
    """Bad input from the user (a file, an option, a value): exit status 2, nothing switched on."""

    exit_code = EXIT_INPUT
