"""The flyback DUT description: what the physics needs, read from a TOML DUT file.

A DUT file groups quantities by part of the converter. Quantities may be written in engineering
notation (``"4.7n"``, ``"220pF"``, ``"75 V"``) or as plain SI numbers::

    label = "..."
    [line]        kind ("dc"/"ac"), min, max, frequency (AC), bulk_capacitance, bleed_time_constant
    [transformer] magnetizing_inductance, leakage_inductance, turns_ratio
    [output]      voltage, rectifier_drop, rated_load
    [switch]      frequency, rating, coss_c0, coss_vj, stray_capacitance
    [losses]      damping_resistance, other_loss_fraction
    [snubber]     resistance, capacitance          (capacitance 0 = no damper fitted)
    [clamp]       voltage, resistance, capacitance (whole table optional: RCD clamp)
    [secondary]   kind ("schottky"/"pn"), junction_capacitance, loop_inductance,
                  series_resistance, reverse_rating, carrier_lifetime (pn only),
                  snubber_resistance, snubber_capacitance (whole table optional: the output
                  rectifier; its forward drop is [output] rectifier_drop)

The clamp ``voltage`` is the design's nominal clamp voltage above the bus; the simulated clamp
capacitor settles wherever R, C and the energy balance put it, starting from that value.

Every problem of a file is reported at once, each naming the file, the key and its line, and
what would be valid (:mod:`labseq_instruments.tomlkeys`).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

from labseq.units import UnitError, parse_quantity
from labseq_instruments.tomlkeys import Problems, describe_value

DUT_DIR = Path(__file__).resolve().parent / "duts"

#: The demo DUTs shipped with the simulated bench (invented scenarios).
DEMO_DUTS: dict[str, Path] = {
    "telecom_dc": DUT_DIR / "telecom_dc_flyback.toml",
    "offline_ac": DUT_DIR / "offline_ac_flyback.toml",
}

#: Line frequencies a mains-fed DUT may declare.
VALID_LINE_FREQUENCIES_HZ = (50.0, 60.0)


#: Output rectifier kinds a DUT file may declare.
RECTIFIER_KINDS = ("schottky", "pn")


class DutFileError(ValueError):
    """A DUT file that cannot be used; the message names the file, the key and what is valid."""


@dataclass(frozen=True)
class SecondaryRectifier:
    """The output rectifier diode and what rings with it once the primary switch turns on.

    ``loop_inductance_h`` is the secondary side's own loop (winding leakage and traces); the
    ring also sees the primary leakage referred by n²
    (:mod:`labseq_sim_instruments.flyback_secondary`).
    A ``pn`` diode stores charge ``carrier_lifetime_s`` × forward current; a Schottky stores none.
    """

    kind: str  # "schottky" or "pn"
    junction_capacitance_f: float
    loop_inductance_h: float
    series_resistance_ohm: float
    reverse_rating_v: float
    carrier_lifetime_s: float = 0.0
    snubber_resistance_ohm: float = 0.0
    snubber_capacitance_f: float = 0.0  # 0 = no RC damper across the diode

    @property
    def has_snubber(self) -> bool:
        """True when an RC damper is fitted across the diode."""
        return self.snubber_capacitance_f > 0.0


@dataclass(frozen=True)
class FlybackDesign:
    """Everything the flyback physics needs, in SI units. Built by :func:`load_dut`."""

    label: str
    line_kind: str
    line_min_v: float
    line_max_v: float
    line_frequency_hz: float
    bulk_capacitance_f: float
    bus_bleed_time_constant_s: float
    magnetizing_inductance_h: float
    leakage_inductance_h: float
    turns_ratio: float
    output_voltage_v: float
    rectifier_drop_v: float
    rated_load_a: float
    switching_frequency_hz: float
    switch_rating_v: float
    coss_c0_f: float
    coss_vj_v: float
    stray_capacitance_f: float
    damping_resistance_ohm: float
    snubber_resistance_ohm: float
    snubber_capacitance_f: float
    clamp_voltage_v: float | None  # nominal clamp voltage above the bus; None = no clamp
    clamp_resistance_ohm: float | None
    clamp_capacitance_f: float | None
    other_loss_fraction: float
    secondary: SecondaryRectifier | None = None  # None: the DUT file declares no [secondary]

    @property
    def has_snubber(self) -> bool:
        """True when an RC damper is fitted across the switch."""
        return self.snubber_capacitance_f > 0.0

    @property
    def has_clamp(self) -> bool:
        """True when an RCD clamp is fitted across the primary."""
        return self.clamp_voltage_v is not None

    @property
    def reflected_voltage_v(self) -> float:
        """Output plus rectifier drop reflected to the primary: Vr = n·(Vout + Vf)."""
        return self.turns_ratio * (self.output_voltage_v + self.rectifier_drop_v)

    def coss_f(self, drain_v: float) -> float:
        """Switch output capacitance Coss(V) = C0 / sqrt(1 + V/Vj) (0 for C0 = 0)."""
        if self.coss_c0_f == 0.0:
            return 0.0
        return self.coss_c0_f / math.sqrt(1.0 + max(drain_v, 0.0) / self.coss_vj_v)

    def with_snubber(self, resistance_ohm: float, capacitance_f: float) -> FlybackDesign:
        """The same DUT with another RC damper (capacitance 0 removes it)."""
        _check_snubber(resistance_ohm, capacitance_f, "with_snubber")
        return replace(
            self,
            snubber_resistance_ohm=float(resistance_ohm),
            snubber_capacitance_f=float(capacitance_f),
        )


def _check_snubber(resistance_ohm: float, capacitance_f: float, where: str) -> None:
    """An RC damper needs C ≥ 0 and, when fitted, R > 0 (a bare capacitor has no damping)."""
    if not (math.isfinite(capacitance_f) and capacitance_f >= 0.0):
        raise DutFileError(f"{where}: snubber capacitance must be ≥ 0 F, got {capacitance_f!r}")
    if capacitance_f > 0.0 and not (math.isfinite(resistance_ohm) and resistance_ohm > 0.0):
        raise DutFileError(
            f"{where}: snubber resistance must be > 0 Ω when a capacitance is fitted, "
            f"got {resistance_ohm!r}"
        )


# --- DUT file schema -----------------------------------------------------------------------------

Check = Callable[[float], str | None]  # returns what is valid when the value is not, else None


def _positive(value: float) -> str | None:
    return None if value > 0.0 else "a value > 0"


def _non_negative(value: float) -> str | None:
    return None if value >= 0.0 else "a value ≥ 0"


def _fraction(value: float) -> str | None:
    return None if 0.0 <= value < 1.0 else "a fraction from 0 to below 1 (e.g. 0.06)"


def _line_frequency(value: float) -> str | None:
    return None if value in VALID_LINE_FREQUENCIES_HZ else "50 Hz or 60 Hz"


@dataclass(frozen=True)
class _Key:
    """One quantity of a DUT file table: its unit, its check and whether it may be left out."""

    unit: str
    check: Check
    required: bool = True
    default: float | None = None


_SCHEMA: dict[str, dict[str, _Key]] = {
    "line": {
        "min": _Key("V", _positive),
        "max": _Key("V", _positive),
        "frequency": _Key("Hz", _line_frequency, required=False),
        "bulk_capacitance": _Key("F", _positive),
        "bleed_time_constant": _Key("s", _positive),
    },
    "transformer": {
        "magnetizing_inductance": _Key("H", _positive),
        "leakage_inductance": _Key("H", _positive),
        "turns_ratio": _Key("", _positive),
    },
    "output": {
        "voltage": _Key("V", _positive),
        "rectifier_drop": _Key("V", _non_negative),
        "rated_load": _Key("A", _positive),
    },
    "switch": {
        "frequency": _Key("Hz", _positive),
        "rating": _Key("V", _positive),
        "coss_c0": _Key("F", _non_negative),
        "coss_vj": _Key("V", _positive),
        "stray_capacitance": _Key("F", _non_negative),
    },
    "losses": {
        "damping_resistance": _Key("Ω", _positive),
        "other_loss_fraction": _Key("", _fraction, required=False, default=0.0),
    },
    "snubber": {
        "resistance": _Key("Ω", _non_negative),
        "capacitance": _Key("F", _non_negative),
    },
    "clamp": {
        "voltage": _Key("V", _positive),
        "resistance": _Key("Ω", _positive),
        "capacitance": _Key("F", _positive),
    },
    "secondary": {
        "junction_capacitance": _Key("F", _positive),
        "loop_inductance": _Key("H", _non_negative),
        "series_resistance": _Key("Ω", _positive),
        "reverse_rating": _Key("V", _positive),
        "carrier_lifetime": _Key("s", _positive, required=False),
        "snubber_resistance": _Key("Ω", _non_negative, required=False, default=0.0),
        "snubber_capacitance": _Key("F", _non_negative, required=False, default=0.0),
    },
}
_OPTIONAL_TABLES = {"clamp", "secondary"}
#: Tables with a text ``kind`` beside their quantities.
_KIND_TABLES = {"line", "secondary"}
_TOP_LEVEL = {"label", *_SCHEMA}
_LINE_KINDS = ("dc", "ac")


def _read_table(problems: Problems, data: dict[str, Any], table: str) -> dict[str, float] | None:
    """One table's quantities, each checked: {key: SI value}; None when the table is not one.
    A key left out or wrong is recorded in ``problems`` and is absent from the result."""
    raw = data.get(table)
    if not isinstance(raw, dict):
        problems.fail(table, f"must be a table of quantities, got {describe_value(raw)}")
        return None
    schema = _SCHEMA[table]
    problems.unknown_keys(raw, [*schema, *(["kind"] if table in _KIND_TABLES else [])], table)
    values: dict[str, float] = {}
    for name, key in schema.items():
        where = f"{table}.{name}"
        if name not in raw:
            if key.required:
                problems.fail(where, f"missing; give a quantity in {key.unit or 'units'}")
            elif key.default is not None:
                values[name] = key.default
            continue
        try:
            value = parse_quantity(raw[name], key.unit, what=where)
        except UnitError as exc:
            problems.fail(where, str(exc).removeprefix(f"{where}: "))
            continue
        problem = key.check(value)
        if problem:
            problems.fail(where, f"{raw[name]!r} is not valid; expected {problem}")
            continue
        values[name] = value
    return values


def load_dut(path: str | Path) -> FlybackDesign:
    """Read a DUT file into a :class:`FlybackDesign`; :class:`DutFileError` listing every
    problem found, each with its key and line."""
    path = Path(path)
    if not path.exists():
        raise DutFileError(f"{path}: no such DUT file")
    problems = Problems(path)
    data = problems.load()
    if data is None:
        raise DutFileError(problems.report())
    design = _design(problems, data)
    if problems or design is None:
        raise DutFileError(problems.report())
    return design


def _design(problems: Problems, data: dict[str, Any]) -> FlybackDesign | None:
    """The design ``data`` describes, or None with every problem recorded."""
    problems.unknown_keys(data, sorted(_TOP_LEVEL))
    for table in _SCHEMA:
        if table not in data and table not in _OPTIONAL_TABLES:
            problems.fail(table, f"missing; the DUT file needs a [{table}] table")
    label = data.get("label")
    if not isinstance(label, str) or not label.strip():
        problems.fail("label", f"must be a non-empty text, got {label!r}")
    tables = {
        table: _read_table(problems, data, table)
        for table in _SCHEMA
        if table in data and table != "secondary"
    }
    line = tables.get("line")
    kind = line and data["line"].get("kind")
    if line is not None and kind not in _LINE_KINDS:
        problems.fail("line.kind", f"{kind!r} is not valid; expected 'dc' or 'ac'")
    if line is not None and {"min", "max"} <= set(line) and line["max"] < line["min"]:
        problems.fail("line.max", f"{line['max']} V is below min ({line['min']} V)")
    if line is not None and kind == "ac" and "frequency" not in data["line"]:
        problems.fail("line.frequency", "missing; an AC line needs 50 Hz or 60 Hz")
    if line is not None and kind == "dc" and "frequency" in data["line"]:
        problems.fail("line.frequency", "for kind = 'ac' only; remove it")
    switch = tables.get("switch") or {}
    if switch.get("coss_c0") == 0.0 and switch.get("stray_capacitance") == 0.0:
        problems.fail(
            "switch.coss_c0",
            "coss_c0 and stray_capacitance are both 0; the switch node needs some capacitance "
            "(a value > 0 in either)",
        )
    snubber = tables.get("snubber") or {}
    if snubber.get("capacitance", 0.0) > 0.0 and snubber.get("resistance") == 0.0:
        problems.fail(
            "snubber.resistance",
            "0 is not valid with a capacitance fitted; expected a value > 0 (or capacitance = 0 "
            "for no damper)",
        )
    secondary = _read_secondary(problems, data) if "secondary" in data else None
    if problems:
        return None
    transformer, output, losses = tables["transformer"], tables["output"], tables["losses"]
    clamp = tables.get("clamp")
    return FlybackDesign(
        label=label.strip(),
        line_kind=kind,
        line_min_v=line["min"],
        line_max_v=line["max"],
        line_frequency_hz=line.get("frequency", 0.0),
        bulk_capacitance_f=line["bulk_capacitance"],
        bus_bleed_time_constant_s=line["bleed_time_constant"],
        magnetizing_inductance_h=transformer["magnetizing_inductance"],
        leakage_inductance_h=transformer["leakage_inductance"],
        turns_ratio=transformer["turns_ratio"],
        output_voltage_v=output["voltage"],
        rectifier_drop_v=output["rectifier_drop"],
        rated_load_a=output["rated_load"],
        switching_frequency_hz=switch["frequency"],
        switch_rating_v=switch["rating"],
        coss_c0_f=switch["coss_c0"],
        coss_vj_v=switch["coss_vj"],
        stray_capacitance_f=switch["stray_capacitance"],
        damping_resistance_ohm=losses["damping_resistance"],
        snubber_resistance_ohm=snubber["resistance"],
        snubber_capacitance_f=snubber["capacitance"],
        clamp_voltage_v=clamp["voltage"] if clamp else None,
        clamp_resistance_ohm=clamp["resistance"] if clamp else None,
        clamp_capacitance_f=clamp["capacitance"] if clamp else None,
        other_loss_fraction=losses["other_loss_fraction"],
        secondary=secondary,
    )


def _read_secondary(problems: Problems, data: dict[str, Any]) -> SecondaryRectifier | None:
    """The optional [secondary] table: a Schottky or pn rectifier, with an optional RC damper."""
    values = _read_table(problems, data, "secondary")
    if values is None:
        return None
    kind = data["secondary"].get("kind")
    if kind not in RECTIFIER_KINDS:
        problems.fail("secondary.kind", f"{kind!r} is not valid; expected 'schottky' or 'pn'")
    if kind == "pn" and "carrier_lifetime" not in data["secondary"]:
        problems.fail(
            "secondary.carrier_lifetime",
            'missing; a pn rectifier needs one in s (e.g. "20ns")',
        )
    if kind == "schottky" and "carrier_lifetime" in data["secondary"]:
        problems.fail(
            "secondary.carrier_lifetime",
            "for kind = 'pn' only (a Schottky stores no charge); remove it",
        )
    if values.get("snubber_capacitance", 0.0) > 0.0 and values.get("snubber_resistance") == 0.0:
        problems.fail(
            "secondary.snubber_resistance",
            "0 is not valid with a snubber_capacitance fitted; expected a value > 0 (or "
            "snubber_capacitance = 0 for no damper)",
        )
    if problems:
        return None
    return SecondaryRectifier(
        kind=kind,
        junction_capacitance_f=values["junction_capacitance"],
        loop_inductance_h=values["loop_inductance"],
        series_resistance_ohm=values["series_resistance"],
        reverse_rating_v=values["reverse_rating"],
        carrier_lifetime_s=values.get("carrier_lifetime", 0.0),
        snubber_resistance_ohm=values["snubber_resistance"],
        snubber_capacitance_f=values["snubber_capacitance"],
    )


def resolve_dut(name_or_path: str) -> Path:
    """Return the DUT file for a demo name (see :data:`DEMO_DUTS`) or an existing file path."""
    if name_or_path in DEMO_DUTS:
        return DEMO_DUTS[name_or_path]
    path = Path(name_or_path)
    if path.is_file():
        return path
    raise DutFileError(
        f"DUT {name_or_path!r}: neither a demo DUT ({', '.join(sorted(DEMO_DUTS))}) "
        f"nor an existing DUT file"
    )
