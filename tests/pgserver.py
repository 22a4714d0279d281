"""A throwaway PostgreSQL server for the tests: initdb in a temporary directory, listening only on
a Unix socket in that directory, password authentication on, stopped and removed afterwards.

PostgreSQL refuses to run as root (CI runs as root), so then the server runs as the package's
unprivileged ``postgres`` user (``runuser -u postgres --``) in a directory handed over to it. The
server binaries are found in ``$LABSEQ_PG_BIN``, Debian's ``/usr/lib/postgresql/<version>/bin``
(the newest), or on the PATH. Where there are none, or the server cannot start, :func:`start`
raises :class:`Unavailable` with the reason, and the tests that need it skip with that reason.
"""

from __future__ import annotations

import os
import secrets
import shutil
import subprocess
import tempfile
from dataclasses import dataclass
from pathlib import Path
from urllib.parse import quote

#: The server's superuser; the tests log in as it with a password.
USER = "lab"
SERVER_USER = "postgres"  # the Debian package's unprivileged user, for when we are root


class Unavailable(RuntimeError):
    """No PostgreSQL server can be started here; the message says why."""


def find_bindir() -> Path:
    """The directory of initdb, pg_ctl and postgres."""
    given = os.environ.get("LABSEQ_PG_BIN")
    candidates = [Path(given)] if given else []
    debian = sorted(
        Path("/usr/lib/postgresql").glob("*/bin"),
        key=lambda p: int(p.parent.name) if p.parent.name.isdigit() else 0,
    )
    candidates += reversed(debian)
    on_path = shutil.which("initdb")
    if on_path:
        candidates.append(Path(on_path).parent)
    for bindir in candidates:
        if (bindir / "initdb").is_file() and (bindir / "pg_ctl").is_file():
            return bindir
    raise Unavailable(
        "no PostgreSQL server binaries (initdb, pg_ctl): install Debian's postgresql package "
        "(`make test` does so as root) or set LABSEQ_PG_BIN"
    )


@dataclass
class PgServer:
    """A running server: its socket directory and the superuser's password."""

    bindir: Path
    root: Path
    password: str
    as_user: list[str]  # the command prefix that runs a program as the server's user

    @property
    def socket_dir(self) -> Path:
        return self.root

    def url(self, dbname: str = "postgres", *, password: bool = True) -> str:
        """A libpq URL of database ``dbname`` over the Unix socket (with the password or not)."""
        secret = f":{quote(self.password, safe='')}" if password else ""
        return f"postgresql://{USER}{secret}@/{dbname}?host={quote(str(self.root), safe='')}"

    def _run(self, *args: str) -> subprocess.CompletedProcess[str]:
        return subprocess.run(
            [*self.as_user, *args], capture_output=True, text=True, timeout=120, check=False
        )

    def stop(self) -> None:
        """Stop the server at once (no checkpoint: its data is thrown away) and remove it."""
        self._run(
            str(self.bindir / "pg_ctl"),
            "-D",
            str(self.root / "data"),
            "-m",
            "immediate",
            "-w",
            "stop",
        )
        shutil.rmtree(self.root, ignore_errors=True)


def start() -> PgServer:
    """initdb and start a server in a new temporary directory; raise :class:`Unavailable`."""
    bindir = find_bindir()
    as_user: list[str] = []
    if os.geteuid() == 0:
        runuser = shutil.which("runuser")
        try:
            import pwd

            server_uid = pwd.getpwnam(SERVER_USER).pw_uid
        except KeyError:
            raise Unavailable(
                f"running as root and there is no {SERVER_USER!r} user to run PostgreSQL as "
                "(the server refuses root)"
            ) from None
        if runuser is None:
            raise Unavailable("running as root and no runuser to start PostgreSQL as postgres")
        as_user = [runuser, "-u", SERVER_USER, "--"]
    # a short path: a Unix socket's path may not exceed about 100 bytes
    root = Path(tempfile.mkdtemp(prefix="labseq-pg-", dir="/tmp"))
    server = PgServer(bindir, root, secrets.token_urlsafe(12) + "@:/?", as_user)
    try:
        if as_user:
            os.chown(root, server_uid, -1)
        password_file = root / "pw"
        password_file.write_text(server.password + "\n")
        if as_user:
            os.chown(password_file, server_uid, -1)
        init = server._run(
            str(bindir / "initdb"),
            "-D",
            str(root / "data"),
            "-U",
            USER,
            f"--pwfile={password_file}",
            "-A",
            "scram-sha-256",
            "-E",
            "UTF8",
            "--no-sync",
            "--locale=C",
        )
        password_file.unlink()
        if init.returncode != 0:
            raise Unavailable(f"initdb failed: {init.stderr.strip()[-400:]}")
        options = f"-k {root} -c listen_addresses='' -F -c max_connections=40"
        started = server._run(
            str(bindir / "pg_ctl"),
            "-D",
            str(root / "data"),
            "-o",
            options,
            "-l",
            str(root / "server.log"),
            "-w",
            "-t",
            "60",
            "start",
        )
        if started.returncode != 0:
            log = (root / "server.log").read_text(errors="replace")[-400:]
            raise Unavailable(f"the PostgreSQL server did not start: {started.stderr} {log}")
    except Unavailable:
        shutil.rmtree(root, ignore_errors=True)
        raise
    except OSError as exc:
        shutil.rmtree(root, ignore_errors=True)
        raise Unavailable(f"cannot start PostgreSQL: {exc}") from None
    return server
