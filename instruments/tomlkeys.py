"""Where a key is written in a TOML file, so that every problem found in a sequence file or a
command map can be reported with its line."""

from __future__ import annotations

import re


def find_key_line(text: str, key: str) -> int | None:
    """Line number (1-based) where ``key`` (a dotted path such as ``nodes[1].channel``) is
    written in ``text``.

    A simple scan of table headers and ``name =`` lines; the n-th ``[[name]]`` header is
    ``name[n]`` (and so are the ``[name.sub]`` tables under it). Falls back to the nearest parent
    that is found, then to the same path without indices.
    """
    section = ""
    counts: dict[str, int] = {}
    found: dict[str, int] = {}
    for number, raw in enumerate(text.splitlines(), start=1):
        line = raw.strip()
        header = re.match(r"^(\[\[?)\s*([^\]]+?)\s*\]\]?", line)
        if header:
            name = re.sub(r"\s*\.\s*", ".", header.group(2)).replace('"', "")
            head, dot, rest = name.partition(".")
            if header.group(1) == "[[":
                counts[name] = counts.get(name, -1) + 1
                found.setdefault(name, number)
                name = f"{name}[{counts[name]}]"
            elif head in counts:
                name = f"{head}[{counts[head]}]{dot}{rest}"
            section = name
            found.setdefault(section, number)
            continue
        assignment = re.match(r'^([A-Za-z0-9_\-."\' ]+?)\s*=', line)
        if assignment:
            name = re.sub(r"\s*\.\s*", ".", assignment.group(1)).replace('"', "").replace("'", "")
            found.setdefault(f"{section}.{name}" if section else name, number)
    for target in (key, re.sub(r"\[\d+\]", "", key)):
        while target:
            if target in found:
                return found[target]
            target = re.sub(r"(\[\d+\]|\.?[^.\[]*)$", "", target, count=1)
    return None
