"""What an installed wheel carries: the example sequences and demo DUT files (reachable through
``labseq examples``), the command maps, the py.typed markers, the metadata; and the examples
copied out of a wheel run ``labseq check`` as they do in a clone."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import zipfile
from collections.abc import Iterator
from pathlib import Path

import pytest
from sweeps import run_cli

from labseq.commands.examples import example_files

ROOT = Path(__file__).resolve().parent.parent
#: The installed import names (the folders instruments/ and sim_instruments/ install prefixed).
PACKAGES = ("labseq", "labseq_instruments", "labseq_sim_instruments")
FOLDERS = {"instruments": "labseq_instruments", "sim_instruments": "labseq_sim_instruments"}


def _shipped_data() -> list[str]:
    """Every data file of the source tree an installed labseq needs, as wheel member names."""
    data = [
        *ROOT.glob("labseq/examples/**/*.toml"),
        *ROOT.glob("instruments/command_maps/**/*.toml"),
    ]
    data += ROOT.glob("sim_instruments/duts/*.toml")
    names = [path.relative_to(ROOT).as_posix() for path in data]
    return sorted(
        FOLDERS.get(name.split("/")[0], name.split("/")[0]) + "/" + name.split("/", 1)[1]
        for name in names
    )


def test_examples_lists_and_copies(tmp_path: Path) -> None:
    code, out, _ = run_cli("examples")
    assert code == 0
    listed = dict(line.split(maxsplit=1) for line in out.splitlines())
    names = [name for name, _ in example_files()]
    assert list(listed) == names
    assert {
        "demo_dc_flyback.toml",
        "template_real_bench.toml",
        "duts/telecom_dc_flyback.toml",
    } <= set(names)
    assert all(Path(path).is_file() for path in listed.values())
    target = tmp_path / "sequences"
    (target).mkdir()
    (target / "demo_dc_flyback.toml").write_text("# mine\n", encoding="utf-8")
    code, out, _ = run_cli("examples", "--copy", str(target))
    assert code == 0 and f"{len(names) - 1} file(s) copied into {target}, 1 kept" in out
    assert (target / "demo_dc_flyback.toml").read_text(encoding="utf-8") == "# mine\n"  # kept
    for name, path in example_files()[1:]:
        assert (target / name).read_bytes() == path.read_bytes()
    # a copied sequence names a copied DUT file by its path from the sequence
    sequence = (target / "demo_offline_flyback.toml").read_text(encoding="utf-8")
    custom = target / "custom.toml"
    custom.write_text(
        sequence.replace('dut = "offline_ac"', 'dut = "duts/offline_ac_flyback.toml"', 1),
        encoding="utf-8",
    )
    assert 'dut = "duts/offline_ac_flyback.toml"' in custom.read_text(encoding="utf-8")
    code, out, err = run_cli("check", str(custom))
    assert code == 0, err


@pytest.fixture(scope="module")
def wheel(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Path]:
    """labseq built as a wheel, as ``pip wheel`` builds it for an install (a few seconds; pip
    fetches the build backend named in pyproject.toml from the package index)."""
    out = tmp_path_factory.mktemp("wheel")
    # from a copy of the tree: a build leaves build/ behind, whose stale files a later build of
    # the same tree could pack
    source = out / "source"
    shutil.copytree(
        ROOT,
        source,
        ignore=shutil.ignore_patterns(
            ".git", ".venv", "build", "*.egg-info", "__pycache__", ".*_cache", ".hypothesis"
        ),
    )
    done = subprocess.run(
        [sys.executable, "-m", "pip", "wheel", "--no-deps", "-q", "-w", str(out), str(source)],
        capture_output=True,
        text=True,
        timeout=300,
    )
    assert done.returncode == 0, done.stderr[-3000:]
    (built,) = out.glob("labseq-*.whl")
    yield built


def test_wheel_carries_examples_maps_and_markers(wheel: Path) -> None:
    with zipfile.ZipFile(wheel) as archive:
        names = set(archive.namelist())
        metadata = archive.read(next(n for n in names if n.endswith(".dist-info/METADATA")))
    data = _shipped_data()
    assert len(data) >= 15
    assert set(data) <= names, sorted(set(data) - names)
    for package in PACKAGES:
        assert f"{package}/py.typed" in names
    text = metadata.decode("utf-8")
    assert "License-Expression: MIT" in text  # the SPDX expression (PEP 639)
    assert "Classifier: Typing :: Typed" in text and "Provides-Extra: notebook" in text


def test_examples_from_an_installed_wheel(wheel: Path, tmp_path: Path) -> None:
    # The wheel unpacked is what an install puts in site-packages; this interpreter's
    # dependencies serve it. The examples are copied out of it and checked, nothing else.
    site = tmp_path / "site"
    with zipfile.ZipFile(wheel) as archive:
        archive.extractall(site)
    env = {**os.environ, "PYTHONPATH": str(site)}
    where = subprocess.run(
        [sys.executable, "-c", "import labseq, labseq_instruments; print(labseq.__file__)"],
        capture_output=True, text=True, env=env, cwd=tmp_path, timeout=60, check=True,
    )  # fmt: skip
    assert Path(where.stdout.strip()).is_relative_to(site)
    copy = tmp_path / "sequences"
    labseq = [sys.executable, "-m", "labseq"]
    done = subprocess.run(
        [*labseq, "examples", "--copy", str(copy)],
        capture_output=True, text=True, env=env, cwd=tmp_path, timeout=60,
    )  # fmt: skip
    assert done.returncode == 0, done.stderr
    assert (
        str(site)
        in subprocess.run(
            [*labseq, "examples"], capture_output=True, text=True, env=env, cwd=tmp_path, timeout=60
        ).stdout
    )
    for sequence in ("demo_dc_flyback.toml", "demo_offline_flyback.toml"):
        checked = subprocess.run(
            [*labseq, "check", str(copy / sequence)],
            capture_output=True, text=True, env=env, cwd=tmp_path, timeout=60,
        )  # fmt: skip
        assert checked.returncode == 0, checked.stderr
