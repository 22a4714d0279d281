"""Sequence files: which bench, which DUT and snubber, which line × load grid, which limits.

A sequence file is TOML. :func:`load_sequence` reads it, converts every quantity to SI through
:func:`labseq.units.parse_quantity`, and validates everything before any instrument is opened:
unknown keys (with a "did you mean" suggestion), missing keys, wrong types, bad units,
non-positive values, points outside the bench's or the DUT's declared limits, duplicate points
and AC/DC mismatches. All problems found are reported together in one :class:`SequenceError`,
each naming the file, the key path, the line where it was found and what would be valid.

The result is a frozen :class:`Sequence` tree that also keeps the file's text and SHA-256, so a
run stored in the database can always be traced back to the exact file that drove it.
"""

from __future__ import annotations

import dataclasses
import hashlib
import math
import re
from collections.abc import Iterable
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any, NamedTuple

from labseq.analysis.verdict import Limits
from labseq.bench_kinds import BENCH_KINDS, BenchKind, bench_kind, owner_of
from labseq.errors import InputError
from labseq.figures import DEFAULT_DERATING, DEFAULT_SETTLING_BAND
from labseq.safety import ES1_AC_RMS_V, ES1_DC_V
from labseq.tomlread import MISSING, SAME_VALUE_RTOL, Table, quantity
from labseq.units import format_si
from labseq_instruments.command_map import ROLES
from labseq_instruments.connection import (
    FLOW_CONTROLS,
    PARITIES,
    TERMINATIONS,
    Connection,
    SerialSettings,
)
from labseq_instruments.files import FileProblem, read_regular_file
from labseq_instruments.text import quoted
from labseq_instruments.tomlkeys import Problem, Problems, describe_value, report

#: Bounds that keep every value ``check`` accepts runnable to its end (common practice, no
#: published source): a value beyond them is a typing slip, never a plan, and would otherwise
#: fail mid-run with the outputs on (a ramp of 10^13 steps filling the memory, a settle of 30
#: years, a reply timeout the VISA layer refuses).
MAX_RAMP_STEPS = 1000  # source steps from the lowest to the highest line value
MAX_REPLY_TIMEOUT_S = 600.0  # bench.timeout: one instrument reply
MIN_REPLY_TIMEOUT_S = 1e-3
MAX_ACQUISITION_TIMEOUT_S = 3600.0
MAX_SETTLE_S = 3600.0  # grid.settle: wait at each point
MAX_DWELL_S = 600.0  # bench.limits.line_step_dwell: wait on each ramp step
MAX_CAPTURES_PER_POINT = 1000

LINE_KINDS = ("dc", "ac")
POINT_ERROR_ACTIONS = ("skip", "abort")
COUPLINGS = ("dc", "ac")
TRIGGER_SLOPES = ("rising", "falling")
#: Which way a node moves at the edge of interest: a switch's drain rises at turn-off, a
#: rectifier's anode–cathode voltage falls (reverse voltage) when the primary turns on.
NODE_POLARITIES = ("rising", "falling")
#: A node's name: a short lower-case word, used in reports, the store and exported file names.
_NODE_NAME = re.compile(r"^[a-z][a-z0-9_-]{0,23}$")
#: The primary node's name when ``[scope] node`` gives none.
DEFAULT_PRIMARY_NAME = "primary"

#: VISA interface types (IVI VPP-4.3 resource names) we accept at the start of a resource string.
#: A VISA alias (VISA 4.3.6: a name the library maps to a resource, as in a visa.ini file).
_VISA_ALIAS = re.compile(r"[A-Za-z][A-Za-z0-9_.\-]{0,63}")
_VISA_RESOURCE = re.compile(r"^(TCPIP|USB|GPIB|ASRL|VXI|PXI|VICP)[^:\s]*::\S+$", re.IGNORECASE)


class SequenceError(InputError):
    """A sequence file that cannot be used; ``problems`` lists every problem found, each with
    its key and line (:class:`labseq_instruments.tomlkeys.Problem`)."""

    def __init__(self, path: Path, problems: list[Problem]) -> None:
        self.path = path
        self.problems = problems
        super().__init__(report(path, problems))


# --------------------------------------------------------------------------- the result tree


class GridPoint(NamedTuple):
    """One operating point: line value (DC volts or AC rms volts) and load current."""

    line_v: float
    load_a: float


@dataclass(frozen=True)
class BenchLimits:
    """What the bench may be asked for; every setpoint is checked against these."""

    source_max_voltage_v: float
    source_max_current_a: float
    load_max_current_a: float
    line_step_max_v: float
    line_step_dwell_s: float
    source_min_frequency_hz: float | None = None
    source_max_frequency_hz: float | None = None
    scope_max_record_length: int | None = None
    probe_max_voltage_v: float | None = None

    def ramp_v(self, start_v: float, stop_v: float) -> list[float]:
        """Line values from ``start_v`` (excluded) to ``stop_v`` (included) in equal steps no
        larger than ``line_step_max_v``, so the source never jumps by more than the declared step.
        """
        distance_v = stop_v - start_v
        if distance_v == 0:
            return []
        steps = max(1, math.ceil(abs(distance_v) / self.line_step_max_v - 1e-9))
        return [start_v + distance_v * k / steps for k in range(1, steps)] + [stop_v]


@dataclass(frozen=True)
class BenchSpec:
    """The instruments of a run as the sequence file describes them: its bench kind
    (:mod:`labseq.bench_kinds`: simulated, or real ones reached by VISA resource strings), the
    command map and limits of each role, and how to reach them."""

    kind: str  # a word of labseq.bench_kinds.BENCH_KINDS: "visa" or "sim"
    simulated: bool  # no hardware behind it: no ES1 gate, no bus to watch, no locks
    limits: BenchLimits
    maps: dict[str, str]  # role -> a command-map family name, or the path of a map file
    visa_library: str  # "" lets PyVISA choose (PYVISA_LIBRARY, .pyvisarc, IVI, pyvisa-py)
    timeout_s: float
    resources: dict[str, str] = field(default_factory=dict)  # role -> VISA resource or alias
    connections: dict[str, Connection] = field(default_factory=dict)  # role -> link settings
    settings: Any = None  # the kind's own settings (the simulated DUT file, its dialect)

    @property
    def scope_map(self) -> str:
        """The scope's command map."""
        return self.maps["scope"]


@dataclass(frozen=True)
class Dut:
    """The device under test as its designer declares it."""

    label: str
    line_is_ac: bool
    line_min_v: float
    line_max_v: float
    rated_load_a: float
    overload_margin: float  # fraction above the rated load the grid may reach
    switch_rating_v: float
    derating: float
    switching_frequency_hz: float
    leakage_inductance_h: float | None = None

    @property
    def max_load_a(self) -> float:
        """Highest load the grid may ask for: rated load × (1 + overload margin)."""
        return self.rated_load_a * (1.0 + self.overload_margin)


@dataclass(frozen=True)
class Snubber:
    """The RC snubber across the switch."""

    label: str
    resistance_ohm: float
    capacitance_f: float
    resistor_power_budget_w: float


@dataclass(frozen=True)
class Grid:
    """The line × load grid and what to do at each point."""

    line_is_ac: bool
    line_values_v: tuple[float, ...]
    line_frequency_hz: float  # 0 for DC
    load_values_a: tuple[float, ...]
    settle_s: float
    captures_per_point: int


@dataclass(frozen=True)
class Acquisition:
    """How the scope acquires every node at once: its timebase and record, the trigger on the
    primary node's channel, and how long one acquisition may take. Each node's channel settings
    are the node's own (:class:`NodeSpec`)."""

    time_per_div_s: float
    record_length: int
    trigger_level_v: float
    trigger_slope: str
    trigger_position: float  # fraction of the record before the trigger
    acquisition_timeout_s: float


@dataclass(frozen=True)
class Clamp:
    """The RCD clamp across the primary: its resistor and capacitor (the diode is not judged)."""

    label: str
    resistance_ohm: float
    capacitance_f: float


@dataclass(frozen=True)
class NodeSpec:
    """One node captured at every acquisition, all on the primary's trigger.

    The primary switch node is built from the file's [scope], [dut], [snubber] and [limits];
    further nodes come from ``[[nodes]]``. A falling node (a rectifier's reverse voltage) is
    analysed as its negative and reported in its own sign; its peak and stress margin are
    judged on magnitudes against ``rating_v`` × ``derating``.
    """

    name: str
    label: str
    channel: int
    polarity: int  # +1: rises at the edge of interest, -1: falls
    volts_per_div_v: float
    offset_v: float
    probe_ratio: float
    coupling: str
    bandwidth_limit_hz: float
    rating_v: float
    derating: float
    snubber: Snubber | None
    limits: Limits  # what the node is judged against (None in a field: not judged on it)
    settling_band: float  # half-width of the settling band, a fraction of the step

    @property
    def derated_rating_v(self) -> float:
        """What the node's peak magnitude may use: rating × derating."""
        return self.rating_v * self.derating

    @property
    def peak_word(self) -> str:
        """How a reviewer names the node's peak: stress on a switch, reverse voltage on a diode."""
        return "peak stress" if self.polarity > 0 else "peak reverse voltage"


@dataclass(frozen=True)
class Sequence:
    """A validated sequence file, SI units throughout."""

    path: Path
    text: str
    sha256: str
    name: str
    description: str
    bench: BenchSpec
    dut: Dut
    snubber: Snubber
    grid: Grid
    acquisition: Acquisition
    on_point_error: str  # "skip" or "abort"
    hazardous_voltage_acknowledged: bool
    nodes: tuple[NodeSpec, ...]  # every node captured per acquisition, the primary first
    clamp: Clamp | None = None  # the RCD clamp across the primary, when declared

    @property
    def primary(self) -> NodeSpec:
        """The primary switch node (the trigger's channel)."""
        return self.nodes[0]

    def node(self, name: str) -> NodeSpec | None:
        """The node called ``name``, or None."""
        return next((node for node in self.nodes if node.name == name), None)

    def above_es1(self) -> ExposedVoltage | None:
        """The exposed voltage furthest above its ES1 limit (see :func:`above_es1`), or None."""
        return above_es1(self.dut, self.grid, self.nodes)

    def points(self) -> list[GridPoint]:
        """The grid in run order: lines ascending, and loads ascending within each line, so the
        source changes as seldom as possible and the load changes inside a line value."""
        return [
            GridPoint(line_v, load_a)
            for line_v in sorted(self.grid.line_values_v)
            for load_a in sorted(self.grid.load_values_a)
        ]


# --------------------------------------------------------------------------- sections


def _read_bench(top: Table, seq_dir: Path) -> tuple[BenchSpec | None, BenchKind | None, Any]:
    """The [bench] table: the generic keys here, the kind's own through its :class:`BenchKind`;
    the kind and its settings are returned too, for its checks against the rest of the file."""
    table = top.table("bench")
    if table is None:
        return None, None, None
    name = table.text("kind", choices=BENCH_KINDS)
    kind = None if name is None else bench_kind(name)
    settings = None if kind is None else kind.read(table, seq_dir)
    for key in (key for entry in BENCH_KINDS.values() for key in entry.keys):
        if key in table.data and key not in table.known:  # another kind's key
            table.known.append(key)
            if kind is not None:
                top.out.fail(
                    table.key(key), f'only for kind = "{owner_of(key)}"; a "{name}" bench has none'
                )
    real = kind is not None and not kind.simulated
    scope_map = table.text("scope_map", default=None)
    maps_table = table.table("maps", required=False)
    visa_library = table.text(
        "visa_library", default="" if kind is None else kind.default_visa_library
    )
    timeout_s = table.quantity(
        "timeout", "s", default=5.0, minimum=MIN_REPLY_TIMEOUT_S, maximum=MAX_REPLY_TIMEOUT_S
    )
    resources_table = table.table("resources", required=real)
    connections = _read_connections(top.out, table.table("connections", required=False))
    limits = _read_bench_limits(table.table("limits"))
    table.finish()
    maps = _read_maps(top.out, table, maps_table, scope_map, seq_dir)

    resources_map: dict[str, str] = {}
    if resources_table is not None:
        if kind is not None and kind.simulated:
            top.out.fail(
                resources_table.prefix, f'only for real instruments; a "{name}" bench has its own'
            )
        for role in ROLES:
            resource = resources_table.text(role)
            if resource is None:
                continue
            if not (_VISA_RESOURCE.match(resource) or _VISA_ALIAS.fullmatch(resource)):
                top.out.fail(
                    resources_table.key(role),
                    f"{quoted(resource)} is not a VISA resource string or alias; expected e.g. "
                    "'TCPIP0::192.168.1.20::inst0::INSTR', 'USB0::0x1234::0x5678::SN1::INSTR', "
                    "'ASRL3::INSTR' or an alias your VISA library knows, such as 'bench_scope'",
                )
            resources_map[role] = resource
        resources_table.finish()
    if kind is not None and kind.simulated and connections:
        top.out.fail(
            table.key("connections"), f'only for real instruments; a "{name}" bench has its own'
        )
    for role in connections or {}:
        serial = connections[role].serial
        resource = resources_map.get(role, "")
        if serial is not None and "::" in resource and not resource.upper().startswith("ASRL"):
            top.out.fail(
                f"{table.key('connections')}.{role}",
                f"serial settings for {quoted(resource)}, which is not a serial port (ASRL...)",
            )

    if None in (kind, limits, timeout_s, maps, visa_library, connections) or (
        BENCH_KINDS[name].keys and settings is None
    ):
        return None, kind, settings
    bench = BenchSpec(
        kind=name,
        simulated=kind.simulated,
        limits=limits,
        maps=maps,
        visa_library=visa_library,
        timeout_s=timeout_s,
        resources=resources_map,
        connections=connections,
        settings=settings,
    )
    return bench, kind, settings


def _read_maps(
    out: Problems,
    bench: Table,
    maps_table: Table | None,
    scope_map: str | None,
    seq_dir: Path,
) -> dict[str, str] | None:
    """The command map of every role: ``[bench.maps]`` names them (``scope_map`` is the
    scope's alone, kept from before there were maps for every role); a role not named gets the
    generic map."""
    named: dict[str, tuple[str, str]] = {}
    if maps_table is not None:
        for role in ROLES:
            value = maps_table.text(role, default=None)
            if value is not None:
                named[role] = (maps_table.key(role), value)
        maps_table.finish()
    if scope_map is not None:
        if "scope" in named:
            out.fail(bench.key("scope_map"), "give the scope's map once: here or in bench.maps")
        named["scope"] = (bench.key("scope_map"), scope_map)
    maps: dict[str, str] = {}
    for role in ROLES:
        key, value = named.get(role, (bench.key(f"maps.{role}"), "generic"))
        resolved = _resolve_map(out, key, value, role, seq_dir)
        if resolved is not None:
            maps[role] = resolved
    return maps if len(maps) == len(ROLES) else None


def _resolve_map(out: Problems, key: str, value: str, role: str, seq_dir: Path) -> str | None:
    """A ``role`` command map shipped in instruments/command_maps/<role>, or a file path
    (relative to the sequence file); it is loaded and validated here, so a bad map is reported
    before anything is opened."""
    from labseq_instruments.command_map import available_families, is_map_path, load_command_map
    from labseq_instruments.errors import CommandMapError

    if not is_map_path(value) and value not in available_families(role):
        shipped = ", ".join(available_families(role))
        out.fail(
            key, f"unknown {role} family {quoted(value)}; shipped: {shipped}, or a .toml file path"
        )
        return None
    reference = str(seq_dir / value) if is_map_path(value) else value
    if is_map_path(value) and not Path(reference).is_file():
        out.fail(key, f"no command-map file {reference}")
        return None
    try:
        load_command_map(reference, role)
    except CommandMapError as error:
        out.fail(key, f"the command map cannot be used: {error}")
        return None
    return reference


def _read_connections(out: Problems, table: Table | None) -> dict[str, Connection] | None:
    """``[bench.connections.<role>]``: terminations and serial line settings per role."""
    if table is None:
        return {}
    connections: dict[str, Connection] = {}
    failed = False
    for role in ROLES:
        role_table = table.table(role, required=False)
        if role_table is None:
            continue
        terminations = {
            name: role_table.text(name, default="lf", choices=TERMINATIONS)
            for name in ("read_termination", "write_termination")
        }
        serial_keys = ("baud_rate", "data_bits", "parity", "stop_bits", "flow_control")
        serial_values = {
            "baud_rate": role_table.integer("baud_rate", default=None),
            "data_bits": role_table.integer("data_bits", default=None, minimum=5),
            "parity": role_table.text("parity", default=None, choices=PARITIES),
            "stop_bits": role_table.raw("stop_bits", False, "1, 1.5 or 2"),
            "flow_control": role_table.text("flow_control", default=None, choices=FLOW_CONTROLS),
        }
        role_table.finish()
        given = {k: v for k, v in serial_values.items() if v is not None and v is not MISSING}
        serial = None
        if any(name in role_table.data for name in serial_keys):
            try:
                serial = SerialSettings(**given)
            except (ValueError, TypeError) as error:
                out.fail(role_table.prefix, str(error))
                failed = True
                continue
        if None in terminations.values():
            failed = True
            continue
        connections[role] = Connection(
            read_termination=TERMINATIONS[terminations["read_termination"]],
            write_termination=TERMINATIONS[terminations["write_termination"]],
            serial=serial,
        )
    table.finish()
    return None if failed else connections


def _read_bench_limits(table: Table | None) -> BenchLimits | None:
    if table is None:
        return None
    values = {
        "source_max_voltage_v": table.quantity("source_max_voltage", "V"),
        "source_max_current_a": table.quantity("source_max_current", "A"),
        "load_max_current_a": table.quantity("load_max_current", "A"),
        "line_step_max_v": table.quantity("line_step_max", "V"),
        "line_step_dwell_s": table.quantity(
            "line_step_dwell", "s", minimum=0.0, allow_equal=True, maximum=MAX_DWELL_S
        ),
        "source_min_frequency_hz": table.quantity("source_min_frequency", "Hz", default=None),
        "source_max_frequency_hz": table.quantity("source_max_frequency", "Hz", default=None),
        "scope_max_record_length": table.integer("scope_max_record_length", default=None),
        "probe_max_voltage_v": table.quantity("probe_max_voltage", "V", default=None),
    }
    table.finish()
    if any(values[name] is None for name in _required_fields(BenchLimits)):
        return None
    return BenchLimits(**values)


def _required_fields(cls: type) -> list[str]:
    """Names of a dataclass's fields without defaults (the ones a None means 'failed')."""
    unset = dataclasses.MISSING
    return [f.name for f in fields(cls) if f.default is unset and f.default_factory is unset]


def _read_dut(top: Table) -> Dut | None:
    table = top.table("dut")
    if table is None:
        return None
    line_kind = table.text("line_kind", choices=LINE_KINDS)
    values = {
        "label": table.text("label"),
        "line_is_ac": None if line_kind is None else line_kind == "ac",
        "line_min_v": table.quantity("line_min", "V"),
        "line_max_v": table.quantity("line_max", "V"),
        "rated_load_a": table.quantity("rated_load", "A"),
        "overload_margin": table.fraction("overload_margin", default=0.0, allow_zero=True),
        "switch_rating_v": table.quantity("switch_rating", "V"),
        "derating": table.fraction("derating", default=DEFAULT_DERATING),
        "switching_frequency_hz": table.quantity("switching_frequency", "Hz"),
        "leakage_inductance_h": table.quantity("leakage_inductance", "H", default=None),
    }
    table.finish()
    if any(values[name] is None for name in _required_fields(Dut)):
        return None
    if values["line_min_v"] > values["line_max_v"]:
        top.out.fail(
            table.key("line_min"),
            f"{format_si(values['line_min_v'], 'V')} is above line_max "
            f"{format_si(values['line_max_v'], 'V')}; line_min must be ≤ line_max",
        )
        return None
    return Dut(**values)


def _read_snubber(table: Table | None) -> Snubber | None:
    """An RC snubber table: [snubber] across the switch, or [nodes.snubber] across a device."""
    if table is None:
        return None
    label = table.text("label", default="")
    resistance = table.quantity("resistance", "Ω")
    capacitance = table.quantity("capacitance", "F")
    budget = table.quantity("resistor_power_budget", "W")
    table.finish()
    if None in (label, resistance, capacitance, budget):
        return None
    label = label or f"RC {format_si(resistance, 'Ω')} / {format_si(capacitance, 'F')}"
    return Snubber(label, resistance, capacitance, budget)


def _read_grid(top: Table, dut: Dut | None, bench: BenchSpec | None) -> Grid | None:
    """[grid], with every value checked against the DUT's declared range and the bench."""
    table = top.table("grid")
    if table is None:
        return None
    line_kind = table.text("line_kind", choices=LINE_KINDS)
    line_values = table.values("line_values", lambda v, k: quantity(v, "V", k, 0.0, False))
    frequency = table.quantity("line_frequency", "Hz", default=None)
    rated_load_a = dut.rated_load_a if dut is not None else None
    # a [dut] given but refused has its own problem reported: its loads are not judged again
    dut_refused = dut is None and "dut" in top.data
    load_values = table.values(
        "load_values", lambda v, k: _load_value(v, k, rated_load_a, dut_refused)
    )
    settle_s = table.quantity("settle", "s", minimum=0.0, allow_equal=True, maximum=MAX_SETTLE_S)
    captures = table.integer("captures_per_point", maximum=MAX_CAPTURES_PER_POINT)
    table.finish()

    out = top.out
    if line_values is not None:
        _check_line_values(out, table.key("line_values"), line_values, dut, bench)
        if bench is not None:
            _check_ramp(out, line_values, bench.limits)
    if load_values is not None:
        _check_load_values(out, table.key("load_values"), load_values, dut, bench)
    if line_kind is not None and dut is not None and (line_kind == "ac") != dut.line_is_ac:
        out.fail(
            table.key("line_kind"),
            f'the grid is "{line_kind}" but the DUT takes {_kind_word(dut.line_is_ac)} '
            "(dut.line_kind); they must match",
        )
    if line_kind == "ac" and frequency is None and "line_frequency" not in table.data:
        out.fail(table.key("line_frequency"), "missing; an AC grid needs it, e.g. '50 Hz'")
    if line_kind == "dc" and frequency is not None:
        out.fail(table.key("line_frequency"), 'only for line_kind = "ac"; remove it for DC')
    if line_kind == "ac" and frequency is not None and bench is not None:
        low, high = bench.limits.source_min_frequency_hz, bench.limits.source_max_frequency_hz
        if (low is not None and frequency < low) or (high is not None and frequency > high):
            out.fail(
                table.key("line_frequency"),
                f"{format_si(frequency, 'Hz')} is outside the source's range "
                f"{format_si(low, 'Hz')} to {format_si(high, 'Hz')} (bench.limits)",
            )
    if None in (line_kind, line_values, load_values, settle_s, captures):
        return None
    return Grid(
        line_is_ac=line_kind == "ac",
        line_values_v=tuple(line_values),
        line_frequency_hz=frequency or 0.0,
        load_values_a=tuple(load_values),
        settle_s=settle_s,
        captures_per_point=captures,
    )


def _check_line_values(
    out: Problems, key: str, values_v: list[float], dut: Dut | None, bench: BenchSpec | None
) -> None:
    """Each line value inside the DUT's declared range and under the source's maximum."""
    for index, line_v in enumerate(values_v):
        shown = format_si(line_v, "V")
        if dut is not None and not (dut.line_min_v <= line_v <= dut.line_max_v):
            out.fail(
                f"{key}[{index}]",
                f"{shown} is outside the DUT's declared line range; valid: "
                f"{format_si(dut.line_min_v, 'V')} to {format_si(dut.line_max_v, 'V')}",
            )
        if bench is not None and line_v > bench.limits.source_max_voltage_v:
            limit = format_si(bench.limits.source_max_voltage_v, "V")
            out.fail(f"{key}[{index}]", f"{shown} is above bench.limits.source_max_voltage {limit}")


def _check_ramp(out: Problems, values_v: list[float], limits: BenchLimits) -> None:
    """The source's ramp between line values takes at most :data:`MAX_RAMP_STEPS` steps, even
    from the lowest value to the highest (as a resume may have to)."""
    steps = (max(values_v) - min(values_v)) / limits.line_step_max_v
    if steps > MAX_RAMP_STEPS:
        span = format_si(max(values_v) - min(values_v), "V")
        shortest = format_si((max(values_v) - min(values_v)) / MAX_RAMP_STEPS * 1.001, "V")
        out.fail(
            "bench.limits.line_step_max",
            f"{format_si(limits.line_step_max_v, 'V')} would ramp the {span} between the lowest "
            f"and highest line value in {steps:.3g} steps; at most {MAX_RAMP_STEPS} are allowed, "
            f"so the step must be ≥ {shortest}",
        )


def _check_load_values(
    out: Problems, key: str, values_a: list[float], dut: Dut | None, bench: BenchSpec | None
) -> None:
    """Each load under the DUT's rated load × (1 + margin) and the electronic load's maximum."""
    for index, load_a in enumerate(values_a):
        shown = format_si(load_a, "A")
        if dut is not None and load_a > dut.max_load_a * (1 + SAME_VALUE_RTOL):
            out.fail(
                f"{key}[{index}]",
                f"{shown} is above the DUT's rated load {format_si(dut.rated_load_a, 'A')} × "
                f"(1 + overload_margin {dut.overload_margin:.0%}) = "
                f"{format_si(dut.max_load_a, 'A')}",
            )
        if bench is not None and load_a > bench.limits.load_max_current_a:
            limit = format_si(bench.limits.load_max_current_a, "A")
            out.fail(f"{key}[{index}]", f"{shown} is above bench.limits.load_max_current {limit}")


def _load_value(
    value: Any, key: str, rated_load_a: float | None, dut_refused: bool = False
) -> float:
    """A load in amps, or in percent of the DUT's rated load; NaN for a percentage of a [dut]
    that was refused (one problem per cause: the [dut] value is the one reported)."""
    if isinstance(value, str) and "%" in value:
        if rated_load_a is None and dut_refused:
            return math.nan
        if rated_load_a is None:
            raise ValueError("a percentage needs dut.rated_load, which is missing")
        return quantity(value, "%", key, 0.0, False) / 100.0 * rated_load_a
    return quantity(value, "A", key, 0.0, False)


def _channel_values(table: Table) -> dict[str, Any]:
    """The scope-channel keys a node is captured with (the primary's in [scope], the others' in
    their [[nodes]] entry)."""
    return {
        "channel": table.integer("channel"),
        "volts_per_div_v": table.quantity("volts_per_div", "V"),
        "offset_v": table.quantity("offset", "V", default=0.0, minimum=None),
        "probe_ratio": table.quantity("probe_ratio", "", default=1.0),
        "coupling": table.text("coupling", default="dc", choices=COUPLINGS),
        "bandwidth_limit_hz": table.quantity(
            "bandwidth_limit", "Hz", default=0.0, minimum=0.0, allow_equal=True
        ),
    }


class _PrimaryChannel(NamedTuple):
    """The primary node's channel as [scope] gives it, before the node itself is built (its
    rating, snubber and limits come from other tables, which may hold problems of their own)."""

    name: str
    polarity: int  # from the trigger's slope: the primary rises at turn-off when it triggers so
    channel: int
    volts_per_div_v: float
    offset_v: float
    probe_ratio: float
    coupling: str
    bandwidth_limit_hz: float


def _read_scope(top: Table) -> tuple[_PrimaryChannel | None, Acquisition | None]:
    """[scope]: the primary node's channel and name, and the acquisition settings."""
    table = top.table("scope")
    if table is None:
        return None, None
    channel = {
        **_channel_values(table),
        "name": table.text("node", default=DEFAULT_PRIMARY_NAME),
    }
    acquisition = {
        "time_per_div_s": table.quantity("time_per_div", "s"),
        "record_length": table.integer("record_length", minimum=2),
        "trigger_level_v": table.quantity("trigger_level", "V", minimum=None),
        "trigger_slope": table.text("trigger_slope", default="rising", choices=TRIGGER_SLOPES),
        "trigger_position": table.fraction("trigger_position", default=0.1, allow_zero=True),
        "acquisition_timeout_s": table.quantity(
            "acquisition_timeout", "s", default=2.0, maximum=MAX_ACQUISITION_TIMEOUT_S
        ),
    }
    table.finish()
    if any(value is None for value in (*channel.values(), *acquisition.values())):
        return None, None
    read = Acquisition(**acquisition)
    polarity = 1 if read.trigger_slope == "rising" else -1
    return _PrimaryChannel(polarity=polarity, **channel), read


def _read_limits(
    table: Table,
    rating: tuple[float, float, str, str] | None,
    snubber: Snubber | None,
    *,
    point_limits: bool,
) -> tuple[Limits, float] | None:
    """A limits table, all optional: [limits] (``point_limits``: efficiency is judged there) or
    [nodes.limits]: the limits and the settling band. The peak defaults to rating × derating and
    the snubber loss to the resistor's budget; ``rating`` is (rating, derating, its name, the
    key that declares it)."""
    values = {
        "max_peak_v": table.quantity("max_peak", "V", default=None),
        "min_stress_margin_v": table.quantity(
            "min_stress_margin", "V", default=None, minimum=0.0, allow_equal=True
        ),
        "min_damping_ratio": table.quantity("min_damping_ratio", "", default=None),
        "max_q_factor": table.quantity("max_q", "", default=None),
        "max_settling_time_s": table.quantity("max_settling_time", "s", default=None),
        "max_snubber_loss_w": table.quantity("max_snubber_loss", "W", default=None),
        "min_efficiency": (
            table.fraction("min_efficiency", default=None) if point_limits else None
        ),
        "settling_band": table.fraction("settling_band", default=DEFAULT_SETTLING_BAND),
    }
    if not point_limits and "min_efficiency" in table.data:
        table.known.append("min_efficiency")
        table.out.fail(
            table.key("min_efficiency"),
            "efficiency belongs to the whole point; set min_efficiency in [limits]",
        )
    table.finish()
    if values["settling_band"] is None or any(
        values[name] is None and name in table.data for name in values
    ):
        return None
    if rating is not None:
        rating_v, derating, rating_name, rating_key = rating
        if values["max_peak_v"] is None:
            values["max_peak_v"] = rating_v * derating
        elif values["max_peak_v"] > rating_v:
            table.out.fail(
                table.key("max_peak"),
                f"{format_si(values['max_peak_v'], 'V')} is above the {rating_name} "
                f"{format_si(rating_v, 'V')}; must be ≤ {rating_key}",
            )
    if values["max_snubber_loss_w"] is None and snubber is not None:
        values["max_snubber_loss_w"] = snubber.resistor_power_budget_w
    band = values.pop("settling_band")
    return Limits(**values), band


def _primary_node(
    channel: _PrimaryChannel, dut: Dut, snubber: Snubber, judged: tuple[Limits, float]
) -> NodeSpec:
    """The primary switch node from [scope], [dut], [snubber] and [limits]."""
    limits, settling_band = judged
    return NodeSpec(
        label="Primary switch",
        rating_v=dut.switch_rating_v,
        derating=dut.derating,
        snubber=snubber if snubber.capacitance_f > 0 and snubber.resistance_ohm > 0 else None,
        limits=limits,
        settling_band=settling_band,
        **channel._asdict(),
    )


def _read_node(table: Table) -> NodeSpec | None:
    """One ``[[nodes]]`` entry: a further node captured on the primary's trigger."""
    name = table.text("name")
    label = table.text("label", default="")
    polarity = table.text("polarity", default="rising", choices=NODE_POLARITIES)
    values = {
        **_channel_values(table),
        "rating_v": table.quantity("rating", "V"),
        "derating": table.fraction("derating", default=DEFAULT_DERATING),
    }
    snubber_table = table.table("snubber", required=False)
    snubber = _read_snubber(snubber_table)
    limits_table = table.table("limits", required=False) or Table(
        {}, table.key("limits"), table.out
    )
    rating = (
        None
        if values["rating_v"] is None or values["derating"] is None
        else (values["rating_v"], values["derating"], "rating", table.key("rating"))
    )
    judged = _read_limits(limits_table, rating, snubber, point_limits=False)
    table.finish()
    if isinstance(name, str) and not _NODE_NAME.match(name):
        table.out.fail(
            table.key("name"),
            f"{quoted(name)} is not a node name; use a short lower-case word (letters, digits, - "
            'or _, at most 24 characters), e.g. "secondary"',
        )
        return None
    if (
        None in (name, label, polarity, judged)
        or any(value is None for value in values.values())
        or (snubber_table is not None and snubber is None)
    ):
        return None
    return NodeSpec(
        name=name,
        label=label or name.capitalize(),
        polarity=1 if polarity == "rising" else -1,
        snubber=snubber,
        limits=judged[0],
        settling_band=judged[1],
        **values,
    )


def _read_nodes(top: Table, primary: NodeSpec | None) -> list[NodeSpec] | None:
    """The optional ``[[nodes]]`` array, each node checked against the primary and the others:
    names and channels unique, and no node on the primary's channel (the trigger's)."""
    raw = top.raw("nodes", False, "an array of tables [[nodes]]")
    if raw is MISSING:
        return []
    if not isinstance(raw, list) or not all(isinstance(item, dict) for item in raw):
        top.out.fail("nodes", f"expected an array of tables [[nodes]], got {describe_value(raw)}")
        return None
    nodes = [_read_node(Table(item, f"nodes[{index}]", top.out)) for index, item in enumerate(raw)]
    names = {primary.name: "the primary node ([scope] node)"} if primary else {}
    channels = {primary.channel: "the primary node's, where the scope triggers"} if primary else {}
    for index, node in enumerate(nodes):
        if node is None:
            continue
        key = f"nodes[{index}]"
        if node.name in names:
            top.out.fail(
                f"{key}.name",
                f"{node.name!r} is already the name of {names[node.name]}; "
                "each node needs its own name",
            )
        if node.channel in channels:
            top.out.fail(
                f"{key}.channel",
                f"channel {node.channel} is already {channels[node.channel]}; each node needs "
                "its own channel",
            )
        names.setdefault(node.name, key)
        channels.setdefault(node.channel, f"the channel of {key}")
    return None if any(node is None for node in nodes) else nodes  # type: ignore[return-value]


def _read_clamp(top: Table) -> Clamp | None:
    """The optional [clamp]: the RCD clamp across the primary."""
    table = top.table("clamp", required=False)
    if table is None:
        return None
    label = table.text("label", default="")
    resistance = table.quantity("resistance", "Ω")
    capacitance = table.quantity("capacitance", "F")
    table.finish()
    if None in (label, resistance, capacitance):
        return None
    label = label or f"RCD clamp {format_si(resistance, 'Ω')} / {format_si(capacitance, 'F')}"
    return Clamp(label, resistance, capacitance)


# --------------------------------------------------------------------------- cross-checks


def _kind_word(is_ac: bool) -> str:
    return '"ac"' if is_ac else '"dc"'


def _check_bench(
    out: Problems, bench: BenchSpec, dut: Dut | None, acquisition: Acquisition | None
) -> None:
    """Scope and probe limits of the bench against the settings and the DUT."""
    limits = bench.limits
    if (
        acquisition is not None
        and limits.scope_max_record_length is not None
        and (acquisition.record_length > limits.scope_max_record_length)
    ):
        out.fail(
            "scope.record_length",
            f"{acquisition.record_length} is above bench.limits.scope_max_record_length "
            f"{limits.scope_max_record_length}",
        )
    if (
        dut is not None
        and limits.probe_max_voltage_v is not None
        and (limits.probe_max_voltage_v < dut.switch_rating_v)
    ):
        out.fail(
            "bench.limits.probe_max_voltage",
            f"{format_si(limits.probe_max_voltage_v, 'V')} is below the switch rating "
            f"{format_si(dut.switch_rating_v, 'V')}, which the node can reach; use a probe rated "
            "at least that high",
        )


def _check_nodes_on_bench(
    out: Problems, bench: BenchSpec, primary: _PrimaryChannel | None, nodes: list[NodeSpec]
) -> None:
    """Every node's channel on the scope, its rating within the probe's."""
    channels = _scope_channels(bench.scope_map)
    if channels is not None and primary is not None and primary.channel > channels:
        out.fail("scope.channel", f"channel {primary.channel} is beyond the scope's {channels}")
    probe_v = bench.limits.probe_max_voltage_v
    for index, node in enumerate(nodes):
        key = f"nodes[{index}]"
        if channels is not None and node.channel > channels:
            out.fail(
                f"{key}.channel",
                f"channel {node.channel} is beyond the scope's {channels} channels "
                f"(bench.scope_map); valid: 1 to {channels}",
            )
        if probe_v is not None and probe_v < node.rating_v:
            out.fail(
                f"{key}.rating",
                f"{format_si(node.rating_v, 'V')} is above bench.limits.probe_max_voltage "
                f"{format_si(probe_v, 'V')}; use a probe rated at least as high as the device",
            )


def _scope_map(scope_map: str) -> Any:
    """The scope command map (None when it cannot be loaded: reported elsewhere)."""
    from labseq_instruments.command_map import load_command_map
    from labseq_instruments.errors import CommandMapError

    try:
        return load_command_map(scope_map)
    except (CommandMapError, OSError):
        return None


def _scope_channels(scope_map: str) -> int | None:
    """The channel count of a scope command map (None when it cannot be loaded)."""
    found = _scope_map(scope_map)
    return None if found is None else found.channels


def _check_scope_limits(
    out: Problems,
    bench: BenchSpec,
    primary: _PrimaryChannel | None,
    acquisition: Acquisition | None,
    nodes: list[NodeSpec],
) -> None:
    """The scope settings inside the limits its command map declares (the checks the driver
    makes again before sending), so the set-up cannot fail once the run has started."""
    from labseq_instruments.errors import LimitError
    from labseq_instruments.limits import check_count, check_setpoint

    command_map = _scope_map(bench.scope_map)
    if command_map is None or primary is None or acquisition is None:
        return
    limits = command_map.limits
    offset_v = limits.max_offset_v
    ranges: list[tuple[str, float, float, float, str]] = [
        (
            "scope.time_per_div",
            acquisition.time_per_div_s,
            limits.min_seconds_per_div,
            limits.max_seconds_per_div,
            "s",
        ),
        ("scope.trigger_level", acquisition.trigger_level_v, -offset_v, offset_v, "V"),
    ]
    for prefix, channel in [("scope", primary)] + [(f"nodes[{i}]", n) for i, n in enumerate(nodes)]:
        ranges += [
            (
                f"{prefix}.volts_per_div",
                channel.volts_per_div_v,
                limits.min_volts_per_div,
                limits.max_volts_per_div,
                "V",
            ),
            (f"{prefix}.offset", channel.offset_v, -offset_v, offset_v, "V"),
            (
                f"{prefix}.probe_ratio",
                channel.probe_ratio,
                limits.min_probe_ratio,
                limits.max_probe_ratio,
                "",
            ),
            (
                f"{prefix}.bandwidth_limit",
                channel.bandwidth_limit_hz,
                0.0,
                limits.max_bandwidth_limit_hz,
                "Hz",
            ),
        ]
    where = f"(the limits of bench.scope_map {bench.scope_map!r})"
    for key, value, low, high, unit in ranges:
        try:
            check_setpoint(key.rpartition(".")[2].replace("_", " "), value, low, high, unit)
        except LimitError as error:
            out.fail(key, f"{error} {where}")
    try:
        check_count(
            "record length",
            acquisition.record_length,
            limits.min_record_length,
            limits.max_record_length,
        )
    except LimitError as error:
        out.fail("scope.record_length", f"{error} {where}")


class ExposedVoltage(NamedTuple):
    """The highest voltage a run can put on an exposed node, and where it comes from."""

    volts: float
    limit_v: float  # the ES1 limit it is judged against
    kind: str  # "DC", "AC rms" or "peak"
    key: str  # the sequence key that declares it
    what: str  # what it is, in words

    def describe(self) -> str:
        """E.g. "the switch node (up to its rating) can reach 150 V peak (dut.switch_rating),
        above the 60 V DC limit of ES1 (IEC 62368-1)"."""
        limit_kind = "AC rms" if self.kind == "AC rms" else "DC"
        return (
            f"{self.what} can reach {format_si(self.volts, 'V')} {self.kind} ({self.key}), above "
            f"the {format_si(self.limit_v, 'V')} {limit_kind} limit of ES1 (IEC 62368-1)"
        )


def exposed_voltages(dut: Dut, grid: Grid, nodes: Iterable[NodeSpec]) -> list[ExposedVoltage]:
    """Every voltage the run can put on a node a person could touch, each against its ES1 limit
    (IEC 62368-1, from memory): the line (DC, or AC rms against the AC limit), and each probed
    node up to its declared device rating — the primary switch node swings to the bus plus the
    reflected voltage plus the leakage spike, so a 60 V DC-input flyback reaches well above
    60 V. A node's peak limit is validated to be at most its rating, so the rating is the
    highest value declared; the node's pulsating voltage is judged against the DC limit."""
    line_v = max(grid.line_values_v)
    found = [
        ExposedVoltage(
            line_v,
            ES1_AC_RMS_V if grid.line_is_ac else ES1_DC_V,
            "AC rms" if grid.line_is_ac else "DC",
            "grid.line_values",
            "the line",
        )
    ]
    for index, node in enumerate(nodes):
        key = "dut.switch_rating" if index == 0 else f"nodes[{index - 1}].rating"
        what = "the switch node (up to its rating)" if index == 0 else f"node {node.name!r}"
        found.append(ExposedVoltage(node.rating_v, ES1_DC_V, "peak", key, what))
    return found


def above_es1(dut: Dut, grid: Grid, nodes: Iterable[NodeSpec]) -> ExposedVoltage | None:
    """The exposed voltage that goes furthest above its ES1 limit, or None if none does."""
    over = [e for e in exposed_voltages(dut, grid, nodes) if e.volts > e.limit_v]
    return max(over, key=lambda e: e.volts / e.limit_v, default=None)


def _check_hazard(
    out: Problems,
    bench: BenchSpec,
    dut: Dut,
    grid: Grid,
    nodes: list[NodeSpec],
    acknowledged: bool,
) -> None:
    """A real bench above the ES1 limits of IEC 62368-1 on any exposed node needs the file's
    acknowledgement; the message names the value that trips the limit."""
    if bench.simulated or acknowledged:
        return
    hazard = above_es1(dut, grid, nodes)
    if hazard is not None:
        out.fail(
            "safety.hazardous_voltage_acknowledged",
            f"{hazard.describe()}; set it to true only once the bench is set up for hazardous "
            "voltage",
        )


# --------------------------------------------------------------------------- entry points


def load_sequence(path: str | Path) -> Sequence:
    """Read and validate the sequence file at ``path``; raise :class:`SequenceError` if unusable."""
    out = Problems(path)
    try:
        data = read_regular_file(out.path)
    except FileProblem as problem:
        out.fail("(file)", str(problem))
        raise SequenceError(out.path, out.sorted()) from None
    document = out.load(data)
    return _sequence(out, document, hashlib.sha256(data).hexdigest())


def parse_sequence(text: str, path: str | Path, *, sha256: str | None = None) -> Sequence:
    """Validate sequence ``text`` read from ``path`` (relative file names resolve beside it)."""
    out = Problems(path)
    document = out.parse(text)
    return _sequence(out, document, sha256 or hashlib.sha256(text.encode("utf-8")).hexdigest())


def _sequence(out: Problems, document: dict[str, Any] | None, sha256: str) -> Sequence:
    """The sequence ``document`` (None: it could not be read, as ``out`` records) describes;
    :class:`SequenceError` with every problem found."""
    if document is None:
        raise SequenceError(out.path, out.sorted())
    path, text = out.path, out.text
    top = Table(document, "", out)
    name = top.text("name", default=path.stem)
    description = top.text("description", default="")
    on_point_error = top.text("on_point_error", default="skip", choices=POINT_ERROR_ACTIONS)
    bench, kind, bench_settings = _read_bench(top, path.parent)
    dut = _read_dut(top)
    snubber = _read_snubber(top.table("snubber"))
    grid = _read_grid(top, dut, bench)
    primary_channel, acquisition = _read_scope(top)
    judged = _read_limits(
        top.table("limits", required=False) or Table({}, "limits", out),
        None
        if dut is None
        else (dut.switch_rating_v, dut.derating, "switch rating", "dut.switch_rating"),
        snubber,
        point_limits=True,
    )
    primary = (
        None
        if None in (primary_channel, dut, snubber, judged)
        else _primary_node(primary_channel, dut, snubber, judged)  # type: ignore[arg-type]
    )
    nodes = _read_nodes(top, primary)
    clamp = _read_clamp(top)
    safety = top.table("safety", required=False)
    acknowledged = (
        False if safety is None else safety.boolean("hazardous_voltage_acknowledged", default=False)
    )
    if safety is not None:
        safety.finish()
    top.finish()

    if bench is not None:
        _check_bench(out, bench, dut, acquisition)
        _check_nodes_on_bench(out, bench, primary_channel, nodes or [])
        _check_scope_limits(out, bench, primary_channel, acquisition, nodes or [])
        if None not in (grid, dut, primary, nodes, acknowledged):
            _check_hazard(out, bench, dut, grid, [primary, *nodes], acknowledged)
    if bench_settings is not None:
        kind.check(bench_settings, out.fail, dut=dut, nodes=nodes or [], clamp=clamp)
    parts = (
        name,
        description,
        on_point_error,
        bench,
        dut,
        snubber,
        grid,
        acquisition,
        primary,
        nodes,
    )
    if out or any(part is None for part in parts) or acknowledged is None:
        if not out:  # every None above comes with a recorded problem
            out.fail("(file)", "incomplete sequence")
        raise SequenceError(path, out.sorted())
    return Sequence(
        path=path,
        text=text,
        sha256=sha256,
        name=name,
        description=description,
        bench=bench,
        dut=dut,
        snubber=snubber,
        grid=grid,
        acquisition=acquisition,
        on_point_error=on_point_error,
        hazardous_voltage_acknowledged=acknowledged,
        nodes=(primary, *nodes),
        clamp=clamp,
    )
