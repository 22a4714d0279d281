"""Errors that reach the user as one clear line and an exit status, never as a traceback."""

from __future__ import annotations


class LabseqError(Exception):
    """A failure the user can act on. ``exit_code`` is what the CLI exits with."""

    exit_code = 1


class InputError(LabseqError):
    """Bad input from the user (a file, an option, a value): exit status 2, nothing switched on."""

    exit_code = 2
