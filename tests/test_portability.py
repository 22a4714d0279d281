"""labseq starts where POSIX-only modules do not exist (Windows bench PCs): nothing imported at
start-up may need them, and the lock and process checks choose their platform's way lazily."""

from __future__ import annotations

import subprocess
import sys
import textwrap

from sweeps import ROOT

#: Standard-library modules that exist on POSIX systems only (Python docs, "Availability: Unix").
POSIX_ONLY = ("fcntl", "termios", "tty", "pty", "pwd", "grp", "resource", "syslog", "posix_ipc")

_RUN_WITHOUT_POSIX = textwrap.dedent(
    """
    import importlib.abc, sys

    class NoPosixOnly(importlib.abc.MetaPathFinder):
        def find_spec(self, name, path=None, target=None):
            if name.split(".")[0] in {blocked!r}:
                raise ModuleNotFoundError(f"No module named {{name!r}} (blocked)", name=name)
            return None

    for name in {blocked!r}:
        sys.modules.pop(name, None)
    sys.meta_path.insert(0, NoPosixOnly())
    from labseq.cli import main
    sys.argv = ["labseq", *sys.argv[1:]]
    main(sys.argv[1:])
    """
)


def _labseq_without_posix(*args: str, cwd) -> subprocess.CompletedProcess[str]:
    script = _RUN_WITHOUT_POSIX.format(blocked=POSIX_ONLY)
    return subprocess.run(
        [sys.executable, "-c", script, *args],
        capture_output=True,
        text=True,
        cwd=cwd,
        timeout=120,
    )


def test_help_design_and_runs_work_without_posix_only_modules(tmp_path):
    helped = _labseq_without_posix("--help", cwd=tmp_path)
    assert helped.returncode == 0, helped.stderr
    assert "run" in helped.stdout

    # Rs, Cs from a ring frequency and leakage: the design command works end to end.
    designed = _labseq_without_posix(
        "design", "--ring-freq", "18MHz", "--leakage", "1.2u", "--volts", "120", cwd=tmp_path
    )
    assert designed.returncode == 0, designed.stderr
    assert "Rs" in designed.stdout or "R" in designed.stdout

    # A store made here (it needs nothing POSIX-only either) is listed.
    from labseq.store import Store

    db = tmp_path / "s.sqlite"
    with Store(db) as store:
        run_id = store.create_run(
            sequence_text="",
            sequence_sha256="",
            sequence_path="x",
            dut_label="bench-dut",
            snubber_label="s",
            bench_kind="sim",
        )
        # Ended: a "running" run would make `runs` ask psutil whether its process lives, and
        # psutil's Linux backend imports `resource` (its Windows backend does not).
        store.set_run_status(run_id, "finished")
    listed = _labseq_without_posix("runs", "--db", str(db), cwd=tmp_path)
    assert listed.returncode == 0, listed.stderr
    assert "bench-dut" in listed.stdout
    assert "Traceback" not in helped.stderr + designed.stderr + listed.stderr


def test_the_block_really_blocks():
    # The harness itself: a POSIX-only import fails under it, so the test above means something.
    script = _RUN_WITHOUT_POSIX.format(blocked=POSIX_ONLY).replace(
        "from labseq.cli import main", "import fcntl"
    )
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, cwd=ROOT)
    assert done.returncode != 0 and "blocked" in done.stderr
