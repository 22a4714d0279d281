"""How one instrument's link is set up: message terminations, and a serial port's line settings.

The values are the ones PyVISA's message-based and serial resources take (the VISA
specification's VI_ATTR_ASRL_* attributes); a sequence file names them in plain words, which
:func:`Connection.from_words` checks and turns into PyVISA's constants.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from pyvisa import constants

#: Plain names of the termination strings a sequence may give.
TERMINATIONS = {"lf": "\n", "crlf": "\r\n", "cr": "\r"}
PARITIES = {
    "none": constants.Parity.none,
    "odd": constants.Parity.odd,
    "even": constants.Parity.even,
    "mark": constants.Parity.mark,
    "space": constants.Parity.space,
}
STOP_BITS = {
    1: constants.StopBits.one,
    1.5: constants.StopBits.one_and_a_half,
    2: constants.StopBits.two,
}
FLOW_CONTROLS = {
    "none": constants.ControlFlow.none,
    "xon_xoff": constants.ControlFlow.xon_xoff,
    "rts_cts": constants.ControlFlow.rts_cts,
    "dtr_dsr": constants.ControlFlow.dtr_dsr,
}
DATA_BITS = (5, 6, 7, 8)


@dataclass(frozen=True)
class SerialSettings:
    """A serial port's line settings (VISA ASRL resources)."""

    baud_rate: int = 9600
    data_bits: int = 8
    parity: str = "none"
    stop_bits: float = 1
    flow_control: str = "none"

    def __post_init__(self) -> None:
        problems = []
        if not isinstance(self.baud_rate, int) or self.baud_rate <= 0:
            problems.append(f"baud_rate {self.baud_rate!r} must be a positive whole number")
        if self.data_bits not in DATA_BITS:
            problems.append(f"data_bits {self.data_bits!r} must be one of 5, 6, 7, 8")
        if self.parity not in PARITIES:
            problems.append(f"parity {self.parity!r} must be one of {', '.join(PARITIES)}")
        if self.stop_bits not in STOP_BITS:
            problems.append(f"stop_bits {self.stop_bits!r} must be 1, 1.5 or 2")
        if self.flow_control not in FLOW_CONTROLS:
            problems.append(
                f"flow_control {self.flow_control!r} must be one of {', '.join(FLOW_CONTROLS)}"
            )
        if problems:
            raise ValueError("; ".join(problems))


@dataclass(frozen=True)
class Connection:
    """Terminations of every message, and serial settings where the link is a serial port."""

    read_termination: str = "\n"
    write_termination: str = "\n"
    serial: SerialSettings | None = None

    def apply(self, resource: Any) -> None:
        """Set the terminations (and serial settings) on an open PyVISA resource."""
        resource.read_termination = self.read_termination
        resource.write_termination = self.write_termination
        if self.serial is None:
            return
        if not hasattr(resource, "baud_rate"):
            raise ValueError(
                f"{resource.resource_name} is not a serial port; serial settings apply only to "
                "ASRL resources"
            )
        serial = self.serial
        resource.baud_rate = serial.baud_rate
        resource.data_bits = serial.data_bits
        resource.parity = PARITIES[serial.parity]
        resource.stop_bits = STOP_BITS[serial.stop_bits]
        resource.flow_control = FLOW_CONTROLS[serial.flow_control]
