"""Options of the commands a CI job gates on: ``--strict`` (exit 1 unless the run passed) and
``--junit FILE`` (the outcome as JUnit XML, as CI servers read it)."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING, Any

import click

from labseq.analysis.verdict import worst_verdict
from labseq.errors import EXIT_JUDGED, InputError
from labseq.store import Store

if TYPE_CHECKING:
    from xml.etree.ElementTree import ElementTree


def strict_option(command: Callable[..., Any]) -> Callable[..., Any]:
    """``--strict``: exit 1 when the run's verdict is fail or incomplete."""
    return click.option(
        "--strict",
        is_flag=True,
        help="Exit 1 when the run's verdict is fail or incomplete (a CI gate); without it the "
        "exit status says only whether the command itself worked.",
    )(command)


def junit_option(command: Callable[..., Any]) -> Callable[..., Any]:
    """``--junit FILE``: also write the outcome as JUnit XML."""
    return click.option(
        "--junit",
        "junit_path",
        type=click.Path(path_type=Path, dir_okay=False),
        default=None,
        metavar="FILE",
        help="Also write the outcome as JUnit XML to FILE, one test case per point (and node), "
        "for a CI server to show.",
    )(command)


def run_verdict(store: Store, run_id: int) -> str:
    """The run's verdict as its review gives it: fail if any point failed, else incomplete if
    any point was not judged (pending, skipped, failed on the bench), else pass."""
    return worst_verdict(point.verdict or "incomplete" for point in store.points(run_id))


def strict_failure(run_id: int, verdict: str) -> bool:
    """Under ``--strict``: whether ``verdict`` fails the gate, saying so on stderr."""
    if verdict == "pass":
        return False
    click.echo(f"labseq: run {run_id} verdict: {verdict} (--strict: exit {EXIT_JUDGED})", err=True)
    return True


def write_junit(tree: ElementTree, path: Path, option: str = "--junit") -> None:
    """Write ``tree`` as UTF-8 XML with its declaration; an unwritable path is bad input."""
    try:
        tree.write(path, encoding="utf-8", xml_declaration=True)
    except OSError as exc:
        raise InputError(f"{option} {path}: cannot write there ({exc.strerror})") from None
