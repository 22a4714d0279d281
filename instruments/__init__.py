"""SCPI instrument drivers over PyVISA: one base class, one small class per bench role."""

from instruments.block import encode_block, parse_block
from instruments.command_map import CommandMap, available_families, load_command_map
from instruments.connection import Connection, SerialSettings
from instruments.limits import LoadLimits, ScopeLimits, SourceLimits
from instruments.roles import (
    ElectronicLoad,
    LineSource,
    MappedInstrument,
    MeterReading,
    Oscilloscope,
    PowerMeter,
    Waveform,
)
from instruments.scpi import Identity, ScpiInstrument, open_resource

__all__ = [
    "CommandMap",
    "Connection",
    "ElectronicLoad",
    "Identity",
    "LineSource",
    "LoadLimits",
    "MappedInstrument",
    "MeterReading",
    "Oscilloscope",
    "PowerMeter",
    "ScopeLimits",
    "ScpiInstrument",
    "SerialSettings",
    "SourceLimits",
    "Waveform",
    "available_families",
    "encode_block",
    "load_command_map",
    "open_resource",
    "parse_block",
]
