"""The simulated bench as a bench kind: the one place labseq meets :mod:`labseq_sim_instruments`.

Registered as kind ``"sim"`` in :data:`labseq.bench_kinds.BENCH_KINDS`, so it is imported only
when a sequence names a simulated bench, or by ``labseq sim``. Reading such a sequence loads its
DUT file (:mod:`labseq_sim_instruments.flyback_design`: TOML and units, no physics) to check the
file
against it; starting a run starts the simulated bench in this process — its SCPI servers on
loopback, the physics imported only then — with the sequence's parts fitted (:func:`sim_design`),
reached through PyVISA exactly like a real bench.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from pathlib import Path
from typing import TYPE_CHECKING, Any

from labseq.bench_kinds import BenchKind, Fail, Started
from labseq.errors import InputError
from labseq_instruments.tomlkeys import describe_value
from labseq_sim_instruments import DIALECTS, SECONDARY_CHANNEL
from labseq_sim_instruments.faults import KINDS as FAULT_KINDS
from labseq_sim_instruments.faults import ROLES as FAULT_ROLES
from labseq_sim_instruments.flyback_design import (
    DEMO_DUTS,
    DutFileError,
    FlybackDesign,
    load_dut,
    resolve_dut,
)

if TYPE_CHECKING:
    from labseq.sequence import BenchSpec, Clamp, Dut, NodeSpec, Sequence
    from labseq_sim_instruments.bench import SimBench

__all__ = [
    "DEMO_DUTS",
    "DIALECTS",
    "FAULT_KINDS",
    "FAULT_ROLES",
    "SIM_BENCH",
    "SimSettings",
    "serve",
    "sim_design",
]


@dataclass(frozen=True)
class SimSettings:
    """What a sequence says of its simulated bench: the DUT file (as read) and the command set
    the instruments speak."""

    dut_path: Path
    design: FlybackDesign
    dialect: str


class SimulatedBench(BenchKind):
    """``kind = "sim"``: the simulated bench, started in process for each run."""

    name = "sim"
    simulated = True
    default_visa_library = "@py"

    def read(self, table: Any, seq_dir: Path) -> SimSettings | None:
        """``dut`` (a demo DUT name, or a DUT file relative to the sequence file, read here)
        and ``sim_dialect``."""
        value = table.raw("dut", True, 'a demo DUT name (e.g. "telecom_dc") or a file')
        dialect = table.text("sim_dialect", default=DIALECTS[0], choices=DIALECTS)
        if "dut" not in table.data:
            return None
        key = table.key("dut")
        if not isinstance(value, str):
            table.out.fail(
                key, f"expected a demo DUT name or a file path, got {describe_value(value)}"
            )
            return None
        path = DEMO_DUTS[value] if value in DEMO_DUTS else seq_dir / value
        if not path.is_file():
            table.out.fail(
                key,
                f"no demo DUT named {value!r} and no file {path}; demo DUTs: "
                f"{', '.join(sorted(DEMO_DUTS))}, or a DUT file path relative to the sequence "
                "file",
            )
            return None
        try:
            design = load_dut(path)
        except (ValueError, OSError) as exc:  # its problems, indented under this one
            nested = str(exc).replace("\n", "\n    ")
            table.out.fail(key, f"the DUT file cannot be used: {nested}")
            return None
        return None if dialect is None else SimSettings(path, design, dialect)

    def check(
        self,
        settings: SimSettings,
        fail: Fail,
        *,
        dut: Dut | None,
        nodes: list[NodeSpec],
        clamp: Clamp | None,
    ) -> None:
        """The DUT file's line kind is the sequence's; each further node is probed by the
        simulated scope; a clamp declared in the file has one in the DUT file to replace."""
        design = settings.design
        if dut is not None and design.line_kind != ("ac" if dut.line_is_ac else "dc"):
            fail(
                "dut.line_kind",
                f'the simulated DUT file (bench.dut) takes "{design.line_kind}" but '
                f'dut.line_kind is "{"ac" if dut.line_is_ac else "dc"}"; they must match',
            )
        for index, node in enumerate(nodes):
            if node.channel != SECONDARY_CHANNEL or design.secondary is None:
                fail(
                    f"nodes[{index}].channel",
                    f"the simulated scope probes only the primary and, when the DUT file "
                    f"declares [secondary], the output rectifier on channel {SECONDARY_CHANNEL}; "
                    f"channel {node.channel} would be a flat trace",
                )
        if clamp is not None and not design.has_clamp:
            fail(
                "clamp",
                "the simulated DUT file (bench.dut) declares no [clamp] whose values this table "
                "could replace; remove [clamp] or use a DUT file with one",
            )

    def start(self, sequence: Sequence, *, faults: str = "", seed: int = 0) -> Started:
        """Start the simulated bench for ``sequence`` with its parts fitted (:func:`sim_design`)."""
        from labseq_sim_instruments.bench import SimBench
        from labseq_sim_instruments.faults import FaultSpecError

        settings: SimSettings = sequence.bench.settings
        try:
            sim = SimBench(
                sim_design(sequence), faults=faults, seed=seed, dialect=settings.dialect
            ).start()
        except FaultSpecError as error:
            raise InputError(str(error)) from None
        return Started(dict(sim.resources), sim.stop)

    def describe(self, spec: BenchSpec) -> str:
        return f"simulated ({spec.settings.dut_path.name})"


SIM_BENCH = SimulatedBench()


def sim_design(sequence: Sequence) -> FlybackDesign:
    """The simulated DUT with the sequence's parts fitted: its snubber across the switch, its
    clamp's R and C in place of the DUT file's (whose nominal clamp voltage stays the solver's
    start), and a node's snubber across the output rectifier it probes (channel 2). A node
    without a snubber leaves the DUT file's rectifier damper as it is."""
    settings: SimSettings = sequence.bench.settings
    design = settings.design.with_snubber(
        sequence.snubber.resistance_ohm, sequence.snubber.capacitance_f
    )
    clamp = sequence.clamp
    if clamp is not None and design.has_clamp:
        design = replace(
            design,
            clamp_resistance_ohm=clamp.resistance_ohm,
            clamp_capacitance_f=clamp.capacitance_f,
        )
    for node in sequence.nodes[1:]:
        snubber = node.snubber
        if node.channel == SECONDARY_CHANNEL and design.secondary and snubber is not None:
            rectifier = replace(
                design.secondary,
                snubber_resistance_ohm=snubber.resistance_ohm,
                snubber_capacitance_f=snubber.capacitance_f,
            )
            design = replace(design, secondary=rectifier)
    return design


def serve(
    dut: str, *, faults: str, host: str, allow_remote: bool, seed: int, dialect: str
) -> SimBench:
    """A started simulated bench for ``labseq sim``: the DUT ``dut`` (a demo name or a DUT
    file) as its file describes it. Bad input, or a port that cannot be served, is an
    :class:`InputError`."""
    from labseq_sim_instruments.bench import SimBench
    from labseq_sim_instruments.faults import FaultSpecError
    from labseq_sim_instruments.server import ServerConfigError

    try:
        design = load_dut(resolve_dut(dut))
        return SimBench(
            design, faults=faults, host=host, allow_remote=allow_remote, seed=seed, dialect=dialect
        ).start()
    except (DutFileError, FaultSpecError, ServerConfigError) as error:
        raise InputError(str(error)) from None
