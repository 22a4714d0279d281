"""``labseq examples``: where the shipped example sequences and demo DUT files are, and a copy of
them to start from.

They are package data (``labseq/examples/`` and the simulator's ``duts/``), so an installed
wheel has them as a clone does.
"""

from __future__ import annotations

import shutil
from importlib import resources
from pathlib import Path

import click

from labseq.errors import InputError

#: The folder of a copy that holds the demo DUT files.
DUTS_DIR = "duts"


def example_files() -> list[tuple[str, Path]]:
    """Every shipped example as (its path relative to a copy, where it is installed): the
    sequences (``demo_regression/baseline.toml``…), then the demo DUT files (``duts/…``)."""
    from labseq.sim_bench import DEMO_DUTS  # the DUT files belong to the simulator

    root = Path(str(resources.files("labseq") / "examples"))
    files = [(path.relative_to(root).as_posix(), path) for path in sorted(root.rglob("*.toml"))]
    files += [(f"{DUTS_DIR}/{path.name}", path) for path in sorted(set(DEMO_DUTS.values()))]
    return files


@click.command("examples")
@click.option(
    "--copy",
    "copy_dir",
    type=click.Path(path_type=Path, file_okay=False),
    default=None,
    metavar="DIR",
    help="Copy them into DIR (created if missing); files already there are left as they are.",
)
def command(copy_dir: Path | None) -> None:
    """List the example sequences and demo DUT files shipped with labseq, or copy them.

    `labseq examples --copy sequences` gives a folder to start from: sequences/demo_dc_flyback.toml
    runs on the simulated bench as it is, sequences/template_real_bench.toml is the start of
    your own bench's sequence. A sequence names a demo DUT (dut = "telecom_dc") or a DUT file
    by its path from the sequence (dut = "duts/telecom_dc_flyback.toml" in the copy's folder).
    """
    files = example_files()
    if copy_dir is None:
        width = max(len(name) for name, _ in files)
        for name, path in files:
            click.echo(f"{name:<{width}}  {path}")
        return
    copied = kept = 0
    for name, path in files:
        target = copy_dir / name
        if target.exists():
            click.echo(f"kept   {target} (already there)")
            kept += 1
            continue
        try:
            target.parent.mkdir(parents=True, exist_ok=True)
            shutil.copyfile(path, target)
        except OSError as exc:
            raise InputError(f"--copy {copy_dir}: cannot write {target} ({exc.strerror})") from None
        click.echo(f"copied {target}")
        copied += 1
    click.echo(f"{copied} file(s) copied into {copy_dir}, {kept} kept")
