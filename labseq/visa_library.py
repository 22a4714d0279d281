"""Which VISA library a sequence makes labseq load, and whether it may.

``[bench] visa_library`` may name a shared library by its path, and loading a shared library
runs its code: a sequence file that names one is then as trusted as a program. So a library is
loaded without asking only from where VISA libraries are installed — the system's library
directories, ``/opt`` (where vendors install theirs), Windows' system directories and IVI
Foundation folders, and the places PyVISA itself finds a VISA library — or when it is a
backend name (``@py``, ``@ivi``, ``@sim``) or a bare file name the system's loader resolves. Any
other path needs ``--allow-visa-library PATH`` on the command that loads it (``run``,
``resume``, ``probe``, and ``check``, which names the library it would load).
"""

from __future__ import annotations

import os
import sys
from collections.abc import Callable, Iterable
from pathlib import Path, PurePath
from typing import TYPE_CHECKING, Any

import click

from labseq.errors import InputError
from labseq_instruments.tomlkeys import find_key_line

if TYPE_CHECKING:
    from labseq.sequence import Sequence

#: Directories a VISA library is installed in: the system's library directories and /opt on
#: POSIX (the Filesystem Hierarchy Standard 3.0, 4.6 and 3.13), the system directories and the
#: IVI Foundation's folders under Program Files on Windows (IVI-6.1 VISA shared components).
POSIX_LIBRARY_DIRS = (
    "/lib",
    "/lib32",
    "/lib64",
    "/usr/lib",
    "/usr/lib32",
    "/usr/lib64",
    "/usr/local/lib",
    "/usr/local/lib64",
    "/opt",
)
#: Environment variables of Windows' program folders (each may hold an "IVI Foundation" one).
WINDOWS_PROGRAM_VARIABLES = ("ProgramFiles", "ProgramFiles(x86)", "ProgramW6432")


def library_file(spec: str) -> str:
    """The file part of a VISA library specification (``/path/libvisa.so@ivi`` names the file
    and its backend); "" for a backend name alone (``@py``) or PyVISA's own choice ("")."""
    if spec.startswith("@"):
        return ""
    return spec.rpartition("@")[0] if "@" in spec else spec


def _pyvisa_found() -> list[Path]:
    """The VISA libraries PyVISA finds on this machine by itself (none when it cannot look)."""
    try:
        from pyvisa.ctwrapper.highlevel import IVIVisaLibrary

        return [Path(str(path)) for path in IVIVisaLibrary.get_library_paths()]
    except Exception:  # noqa: BLE001 - a PyVISA that cannot look finds nothing
        return []


def trusted_dirs() -> list[Path]:
    """Where a VISA library may be loaded from without asking, on this system."""
    if sys.platform == "win32":
        system = os.environ.get("SYSTEMROOT", r"C:\Windows")
        programs = [os.environ.get(name, "") for name in WINDOWS_PROGRAM_VARIABLES]
        dirs = [Path(system) / "System32", Path(system) / "SysWOW64"]
        dirs += [Path(root) / "IVI Foundation" for root in programs if root]
    else:
        dirs = [Path(name) for name in POSIX_LIBRARY_DIRS]
    return dirs + [path.parent for path in _pyvisa_found()]


def _within(path: Path, directory: Path) -> bool:
    try:
        path.relative_to(directory.resolve())
    except ValueError:
        return False
    return True


def sequence_visa_library(sequence: Sequence, allowed: Iterable[Path], where: str = "") -> str:
    """:func:`check_visa_library` for the library ``sequence`` names (``where``: the file and
    key to name in messages, by default the sequence file's ``bench.visa_library``)."""
    line = find_key_line(sequence.text, "bench.visa_library")
    at = f"line {line}, " if line else ""
    return check_visa_library(
        sequence.bench.visa_library,
        where=where or f"{sequence.path}: {at}bench.visa_library",
        allowed=allowed,
    )


def check_visa_library(spec: str, *, where: str, allowed: Iterable[Path] = ()) -> str:
    """Say which library ``spec`` (a sequence's ``visa_library``) loads; :class:`InputError`
    when it is a file outside :func:`trusted_dirs` that ``allowed`` (the paths given with
    ``--allow-visa-library``) does not name. ``where`` names the file and key in messages."""
    name = library_file(spec)
    if not spec:
        return "PyVISA's choice (PYVISA_LIBRARY, else .pyvisarc, else IVI, else pyvisa-py)"
    if not name:
        return f"backend {spec}"
    if PurePath(name).name == name:  # a bare name: the system's loader searches its own paths
        return f"{spec} (found by the system's library loader)"
    resolved = Path(name).expanduser().resolve()
    if any(resolved == Path(path).expanduser().resolve() for path in allowed):
        return f"{spec} (allowed by --allow-visa-library)"
    if any(_within(resolved, directory) for directory in trusted_dirs()):
        return f"{spec} (installed in {resolved.parent})"
    raise InputError(
        f"{where}: {name!r} is a shared library outside the places VISA libraries are "
        f"installed ({', '.join(str(d) for d in trusted_dirs()[:6])}, …); loading it would run "
        "its code. If you trust it, give --allow-visa-library "
        f'{resolved}; else use a backend such as "@py", or leave visa_library out'
    )


def allow_option() -> Callable[[Any], Any]:
    """``--allow-visa-library PATH``: load this library though it lies outside the usual
    places (repeat for several)."""
    return click.option(
        "--allow-visa-library",
        "allowed_libraries",
        type=click.Path(path_type=Path, dir_okay=False),
        multiple=True,
        metavar="PATH",
        help="Load this VISA library though the sequence names it outside the places VISA "
        "libraries are installed (loading a library runs its code: trust it first).",
    )
