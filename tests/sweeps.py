"""Helpers for tests that run sweeps: small sequence files made from the shipped demo, and the
``labseq`` command run in-process."""

from __future__ import annotations

import contextlib
import io
import re
import signal
import sys
from pathlib import Path

from labseq.cli import main
from labseq.safety import HANDLED_SIGNALS

ROOT = Path(__file__).resolve().parent.parent
DEMO_DC = ROOT / "labseq" / "examples" / "demo_dc_flyback.toml"
LABSEQ = [sys.executable, "-m", "labseq"]


def _set(text: str, key: str, value: str) -> str:
    """Replace the value of the first ``key = ...`` line (comments after it are dropped)."""
    pattern = re.compile(rf"^{re.escape(key)}\s*=.*$", re.MULTILINE)
    if not pattern.search(text):
        raise KeyError(key)
    return pattern.sub(lambda _: f"{key} = {value}", text, count=1)


def demo_sequence(
    tmp_path: Path,
    *,
    lines: list[str] | None = None,
    loads: list[str] | None = None,
    captures: int | None = None,
    resources: dict[str, str] | None = None,
    on_point_error: str | None = None,
    timeout: str = "1 s",
    acquisition_timeout: str = "2 s",
    settle: str | None = None,
    name: str = "sweep.toml",
) -> Path:
    """A copy of the DC demo sequence with a smaller grid, written into ``tmp_path``.

    With ``resources`` the bench becomes ``kind = "visa"`` on those resource strings (a simulated
    bench started by the test), as a real bench would be, so the hazardous-voltage
    acknowledgement is set (the demo's lines reach 75 V DC, above ES1's 60 V).
    """
    text = DEMO_DC.read_text()
    if lines is not None:
        text = _set(text, "line_values", "[" + ", ".join(f'"{v}"' for v in lines) + "]")
    if loads is not None:
        text = _set(text, "load_values", "[" + ", ".join(f'"{v}"' for v in loads) + "]")
    if captures is not None:
        text = _set(text, "captures_per_point", str(captures))
    if settle is not None:
        text = _set(text, "settle", f'"{settle}"')
    if on_point_error is not None:
        text = _set(text, "on_point_error", f'"{on_point_error}"')
    text = _set(text, "acquisition_timeout", f'"{acquisition_timeout}"')
    if resources is not None:
        text = _set(text, "kind", '"visa"')
        text = re.sub(r"^dut = .*$", "", text, count=1, flags=re.MULTILINE)
        table = "\n".join(f'{role} = "{resource}"' for role, resource in resources.items())
        text = text.replace(
            "[bench.limits]",
            f'timeout = "{timeout}"\n\n[bench.resources]\n{table}\n\n[bench.limits]',
        )
        text += "\n[safety]\nhazardous_voltage_acknowledged = true\n"
    path = tmp_path / name
    path.write_text(text)
    return path


def small_sequence(tmp_path: Path, name: str) -> Path:
    """A demo regression sequence shrunk to 2 lines × 2 loads × 2 captures."""
    text = (ROOT / "labseq" / "examples" / "demo_regression" / f"{name}.toml").read_text(
        encoding="utf-8"
    )
    text = re.sub(r"(?m)^line_values = .*$", 'line_values = ["36 V", "75 V"]', text)
    text = re.sub(r"(?m)^load_values = .*$", 'load_values = ["25 %", "100 %"]', text)
    text = re.sub(r"(?m)^captures_per_point = .*$", "captures_per_point = 2", text)
    path = tmp_path / f"{name}.toml"
    path.write_text(text, encoding="utf-8")
    return path


def run_cli(*args: str) -> tuple[int, str, str]:
    """Run ``labseq`` in-process as a user would; return (exit status, stdout, stderr).

    ``run`` and ``resume`` keep their signal handlers for the rest of the process (a command's
    process ends with them); here the test process's own handlers are put back afterwards."""
    out, err = io.StringIO(), io.StringIO()
    code = 0
    handlers = {sig: signal.getsignal(sig) for sig in HANDLED_SIGNALS}
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        try:
            main(list(args))
        except SystemExit as exc:
            code = int(exc.code or 0)
        finally:
            for sig, handler in handlers.items():
                signal.signal(sig, handler)
    return code, out.getvalue(), err.getvalue()
