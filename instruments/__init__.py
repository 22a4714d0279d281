"""SCPI instrument drivers over PyVISA: one base class, one small class per bench role."""

from labseq_instruments.block import encode_block, parse_block
from labseq_instruments.command_map import CommandMap, available_families, load_command_map
from labseq_instruments.connection import Connection, SerialSettings
from labseq_instruments.limits import LoadLimits, ScopeLimits, SourceLimits
from labseq_instruments.roles import (
    ElectronicLoad,
    LineSource,
    MappedInstrument,
    MeterReading,
    Oscilloscope,
    PowerMeter,
    Waveform,
)
from labseq_instruments.scpi import Identity, ScpiInstrument, open_resource

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
