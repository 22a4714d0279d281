"""The arrows between labseq's packages point one way, and a command pays only for what it uses:
``instruments`` imports neither of the others, labseq meets the simulator in one module, and
the commands that need neither the simulator nor scipy do not import them."""

from __future__ import annotations

import ast
import json
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest
from sweeps import ROOT

#: What a command that drives no simulated bench and analyses nothing must not import.
HEAVY = ("labseq_sim_instruments", "scipy", "matplotlib")


def _imported_modules(path: Path) -> set[str]:
    """Every module a file imports (at any depth of the file), by its full name."""
    names: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            names.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module and not node.level:
            names.add(node.module)
    return names


def _importers(folder: str, imported: str) -> list[str]:
    """Files under ``folder`` that import anything of the package ``imported`` (by its import
    name: the folders ``instruments`` and ``sim_instruments`` install as ``labseq_instruments``
    and ``labseq_sim_instruments``)."""
    return sorted(
        str(path.relative_to(ROOT))
        for path in (ROOT / folder).rglob("*.py")
        if any(name.split(".")[0] == imported for name in _imported_modules(path))
    )


def test_instruments_imports_neither_labseq_nor_the_simulator() -> None:
    assert _importers("instruments", "labseq") == []
    assert _importers("instruments", "labseq_sim_instruments") == []


def test_labseq_meets_the_simulator_in_one_module() -> None:
    assert _importers("labseq", "labseq_sim_instruments") == ["labseq/sim_bench.py"]


@pytest.mark.parametrize("short_name", ["instruments", "sim_instruments"])
def test_nothing_imports_the_folders_by_their_short_names(short_name: str) -> None:
    """The installed import names are prefixed (``labseq_instruments``): an import of a bare
    folder name would work only from a clone, and would pick up another distribution's
    ``instruments`` where one is installed."""
    files = [
        path
        for folder in ("labseq", "instruments", "sim_instruments", "tests")
        for path in (ROOT / folder).rglob("*.py")
    ]
    assert [
        str(path.relative_to(ROOT))
        for path in files
        if any(name.split(".")[0] == short_name for name in _imported_modules(path))
    ] == []


def test_the_installed_names_are_prefixed_and_the_short_ones_absent(tmp_path: Path) -> None:
    """From outside the clone, the prefixed names import and the short ones are not labseq's."""
    probe = (
        "import importlib.util as u, json; "
        "print(json.dumps([u.find_spec(n) is not None for n in "
        "('labseq_instruments', 'labseq_sim_instruments', 'instruments', 'sim_instruments')]))"
    )
    done = subprocess.run(
        [sys.executable, "-c", probe],
        capture_output=True,
        text=True,
        cwd=tmp_path,
        timeout=60,
        check=True,
    )
    assert json.loads(done.stdout) == [True, True, False, False]


_STARTUP = textwrap.dedent(
    """
    import json, sys
    from labseq.cli import main
    try:
        main(sys.argv[1:])
    except SystemExit:
        pass
    print(json.dumps(sorted({name.split(".")[0] for name in sys.modules})))
    """
)


def _modules_after(*args: str, cwd: Path) -> set[str]:
    """The top-level modules loaded once ``labseq ARGS`` has run (in a fresh process)."""
    done = subprocess.run(
        [sys.executable, "-c", _STARTUP, *args],
        capture_output=True,
        text=True,
        cwd=cwd,
        timeout=120,
        check=True,
    )
    return set(json.loads(done.stdout.strip().splitlines()[-1]))


@pytest.mark.parametrize(
    "args",
    [
        ["--help"],
        ["runs", "--db", "missing.sqlite"],
        ["check", str(ROOT / "labseq" / "examples" / "template_real_bench.toml")],
        ["report", "--help"],
        ["analyze", "--help"],
    ],
    ids=["help", "runs", "check-real-bench", "report-help", "analyze-help"],
)
def test_commands_that_need_no_simulator_do_not_import_it(args: list[str], tmp_path: Path) -> None:
    loaded = _modules_after(*args, cwd=tmp_path)
    assert "labseq" in loaded
    assert loaded.isdisjoint(HEAVY), sorted(loaded & set(HEAVY))


def test_checking_a_simulated_sequence_reads_its_dut_file_without_the_physics(
    tmp_path: Path,
) -> None:
    loaded = _modules_after(
        "check", str(ROOT / "labseq" / "examples" / "demo_dc_flyback.toml"), cwd=tmp_path
    )
    assert "labseq_sim_instruments" in loaded  # the DUT file, read by the simulator's own reader
    assert loaded.isdisjoint({"scipy", "matplotlib"})
