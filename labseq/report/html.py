"""HTML building blocks: one self-contained page (inline CSS, images as data URIs, no scripts).

Every piece of text goes through :func:`esc` unless it is markup built here, so labels, notes,
file names and sequence text from users can never become markup.
"""

from __future__ import annotations

import base64
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from html import escape
from pathlib import Path

from labseq import __version__
from labseq.units import format_si

#: The usual cautions for an offline (mains-input) DUT.
OFFLINE_CAUTIONS = (
    "An offline converter's switch node carries hazardous voltage, and its bulk capacitor holds "
    "charge after the source is turned off: discharge it and confirm with a meter before "
    "touching the board. Isolate the device under test as the bench requires, measure the "
    "switch node with a differential or suitably rated probe, and never defeat the "
    "oscilloscope's protective earth. "
)
#: The cautions for a DC-input DUT ({peak}: the highest switch-node voltage the run saw).
DC_CAUTIONS = (
    "This DUT takes a DC input: its switch node carries the input voltage plus the reflected "
    "voltage and the ring, {peak}and its input capacitors hold charge after the source is "
    "turned off. Above 60 V DC (the ES1 limit of IEC 62368-1) treat it as hazardous: discharge "
    "the capacitors and confirm with a meter before touching the board, and measure the switch "
    "node with a probe rated for the peak. Keep the source's current limit set, and never "
    "defeat the oscilloscope's protective earth. "
)
DEFERENCE = (
    "These results support, and do not replace, local electrical codes, the laboratory's own "
    "rules and licensed practice."
)
#: The safety note of an offline DUT's report (and of one whose input is not known).
SAFETY_NOTE = OFFLINE_CAUTIONS + DEFERENCE
#: Width of the report's text column in CSS pixels (max-width less the side padding): images
#: no wider than this are shown at their own size.
CONTENT_WIDTH_PX = 1070


def safety_text(line_is_ac: bool | None, peak_v: float | None = None) -> str:
    """The cautions matched to the DUT's kind: offline (AC, or unknown) or DC input, with the
    highest switch-node voltage the run saw when known."""
    if line_is_ac is False:
        peak = "" if peak_v is None else f"up to {format_si(abs(peak_v), 'V')} in this run, "
        return DC_CAUTIONS.format(peak=peak) + DEFERENCE
    return SAFETY_NOTE


_CSS = """
body { font-family: system-ui, -apple-system, "Segoe UI", Roboto, sans-serif; margin: 0 auto;
  max-width: 1120px; padding: 1.2em 1.6em 3em; color: #1a1a1a; line-height: 1.4; }
h1 { font-size: 1.5em; margin-bottom: 0.2em; }
h2 { font-size: 1.2em; margin-top: 1.8em; border-bottom: 1px solid #ccc; padding-bottom: 0.2em; }
h3 { font-size: 1.0em; margin-bottom: 0.3em; }
p.sub { color: #555; margin-top: 0; }
p.headline { font-size: 1.15em; font-weight: 600; margin: 0.6em 0; }
.simulated { border: 2px dashed #555; background: #f0f0f0; padding: 0.4em 0.9em;
  font-weight: 600; }
.warning { border-left: 5px solid #E69F00; background: #fff8e6; padding: 0.4em 0.9em; }
.scroll { overflow-x: auto; }
table { border-collapse: collapse; margin: 0.5em 0 1em; font-size: 0.9em; }
th, td { border: 1px solid #c8c8c8; padding: 0.2em 0.55em; text-align: left; vertical-align: top;
  overflow-wrap: break-word; hyphens: none; }
td.prose { overflow-wrap: anywhere; min-width: 14em; }
td:first-child { white-space: nowrap; }
td.word { white-space: nowrap; }
td.long { word-break: break-all; }
th { background: #f1f1f1; font-weight: 600; }
td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
table.grid td { text-align: center; min-width: 3.2em; }
table.grid.dense td, table.grid.dense th { padding: 0 0.15em; font-size: 0.7em; min-width: 0; }
.v-pass, .c-better { background: #d4ece3; }
.v-fail, .c-worse { background: #f7d3c1; font-weight: 600; }
.v-incomplete, .c-missing { background: #fbe7b5; }
.badge { display: inline-block; padding: 0.25em 0.8em; border-radius: 0.3em;
  border: 2px solid #333; font-weight: 700; font-size: 1.25em; text-transform: uppercase; }
img { max-width: 100%; height: auto; border: 1px solid #e2e2e2; }
.maps { display: grid; grid-template-columns: 1fr; gap: 0.8em; }
.maps figure { margin: 0; }
figcaption { font-size: 0.85em; color: #444; }
pre { background: #f6f6f6; border: 1px solid #ddd; padding: 0.8em; overflow-x: auto;
  font-size: 0.82em; white-space: pre-wrap; }
.safety { border: 2px solid #E69F00; background: #fff8e6; padding: 0.6em 1em; }
.note { color: #555; font-size: 0.9em; }
@media (max-width: 640px) { body { padding: 0.8em 0.7em 2em; }
  td:first-child { white-space: normal; } }
"""


class Markup(str):
    """Markup built by this module: kept as is where plain text would be escaped."""


def esc(text: object) -> str:
    """``text`` as HTML text (quotes too, so it is safe in attributes)."""
    return escape(str(text), quote=True)


def cell(text: str, css_class: str) -> Markup:
    """A table cell with a class (e.g. a verdict's colour) around escaped text."""
    return Markup(f'<td class="{esc(css_class)}">{esc(text)}</td>')


def prose_cell(text: str) -> Markup:
    """A cell of running text (a reason, an event) whose long tokens (a resource string) may
    break anywhere, so a narrow page wraps it rather than scroll."""
    return cell(text, "prose")


def long_cell(text: str) -> Markup:
    """A cell of one long unbroken token (a path, a hash) that may break anywhere to fit."""
    return cell(text, "long")


def verdict_cell(verdict: str | None) -> Markup:
    """A cell that says its verdict in a word and a colour-blind-safe background."""
    return Markup("<td>—</td>") if verdict is None else cell(verdict, f"v-{verdict} word")


def table(
    header: Sequence[str],
    rows: Iterable[Sequence[str]],
    *,
    numeric: Iterable[int] = (),
    css_class: str = "",
) -> str:
    """A table; header and text cells are escaped, :class:`Markup` cells (from :func:`cell`)
    are kept as built. ``numeric`` columns are right-aligned."""
    numeric = set(numeric)
    head = "".join(f"<th>{esc(name)}</th>" for name in header)
    body = []
    for row in rows:
        cells = []
        for index, item in enumerate(row):
            if isinstance(item, Markup):
                cells.append(item)
            else:
                css = ' class="num"' if index in numeric else ""
                cells.append(f"<td{css}>{esc(item)}</td>")
        body.append("<tr>" + "".join(cells) + "</tr>")
    attribute = f' class="{esc(css_class)}"' if css_class else ""
    return (
        f'<div class="scroll"><table{attribute}><thead><tr>{head}</tr></thead>'
        f"<tbody>{''.join(body)}</tbody></table></div>"
    )


@dataclass
class Page:
    """A report page being built; images are written beside it and embedded in it."""

    out_dir: Path
    title: str
    parts: list[str] = field(default_factory=list)
    images: list[Path] = field(default_factory=list)

    def add(self, markup: str) -> None:
        """Append markup built with this module's helpers."""
        self.parts.append(markup)

    def section(self, anchor: str, heading: str) -> None:
        """Start a section with an anchor a reader (or a test) can find."""
        self.parts.append(f'<h2 id="{esc(anchor)}">{esc(heading)}</h2>')

    def paragraph(self, text: str, css_class: str = "") -> None:
        attribute = f' class="{esc(css_class)}"' if css_class else ""
        self.parts.append(f"<p{attribute}>{esc(text)}</p>")

    def image(self, name: str, png: bytes, caption: str) -> str:
        """Write ``name``.png beside the report; return a figure element that embeds it."""
        path = self.out_dir / f"{name}.png"
        path.write_bytes(png)
        self.images.append(path)
        data = base64.b64encode(png).decode("ascii")
        return (
            f'<figure><img src="data:image/png;base64,{data}" alt="{esc(caption)}">'
            f"<figcaption>{esc(caption)}</figcaption></figure>"
        )

    def render(self) -> str:
        """The whole document."""
        return (
            '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
            '<meta name="viewport" content="width=device-width, initial-scale=1">'
            f"<title>{esc(self.title)}</title><style>{_CSS}</style></head><body>"
            + "\n".join(self.parts)
            + f'<p class="note">Made by labseq {esc(__version__)}.</p></body></html>\n'
        )

    def write(self, name: str = "report.html") -> Path:
        """Write the document into ``out_dir``; return its path."""
        path = self.out_dir / name
        path.write_text(self.render(), encoding="utf-8")
        return path

    def safety(self, text: str = SAFETY_NOTE) -> None:
        """The safety note (:func:`safety_text`, matched to the DUT) as the last section."""
        self.section("safety", "Safety")
        self.parts.append(f'<div class="safety"><p>{esc(text)}</p></div>')
