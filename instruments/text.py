"""Text from outside (an instrument's reply, a file's line) made safe to show and to quote.

An instrument's identity, its error-queue texts and its replies reach the terminal, the log and
the report. A reply may carry control characters — an ANSI escape sequence that recolours or
clears the terminal, a carriage return that overwrites the line before it, a bell — so every
such text passes through :func:`printable` before it is printed or stored for display. The raw
reply is still what the driver parses and what the trace records.
"""

from __future__ import annotations

import re

#: ECMA-48 escape sequences (5.4 CSI: ESC [ parameters intermediates final; 5.6/5.7 OSC and
#: other strings up to BEL or ST; and any other two-character ESC sequence), then every C0
#: and C1 control character and DEL (ISO/IEC 6429) that is left.
_ESCAPES = re.compile(
    r"\x1b\[[0-?]*[ -/]*[@-~]"  # CSI
    r"|\x9b[0-?]*[ -/]*[@-~]"  # CSI as its C1 code
    r"|\x1b[\]PX^_][^\x07\x1b\x9c]*(?:\x07|\x1b\\|\x9c)?"  # OSC, DCS, SOS, PM, APC strings
    r"|[\x90\x9d\x98\x9e\x9f][^\x07\x1b\x9c]*(?:\x07|\x1b\\|\x9c)?"  # the same as C1 codes
    r"|\x1b[ -/]*[0-~]?"  # any other escape sequence (or a lone ESC)
)
_CONTROLS = re.compile(r"[\x00-\x1f\x7f-\x9f]")


def printable(text: str) -> str:
    """``text`` without escape sequences and control characters: what is safe to print to a
    terminal or store for display. Tabs and line breaks become spaces (a reply is one line)."""
    text = _ESCAPES.sub("", text)
    text = re.sub(r"[\t\r\n]", " ", text)
    return _CONTROLS.sub("", text)


def quoted(text: str, limit: int = 60) -> str:
    """``text`` in quotes for an error message, cut to ``limit`` characters (a line of a 50 MB
    file is not echoed whole); ``repr`` shows any control character as its escape."""
    return repr(text if len(text) <= limit else text[:limit] + "…")
