"""A bench file to paste for the bench ``rig sim serve`` is serving.

The served instruments are reached like hardware (VISA resource strings), so the bench file
a user's own scripts or a second ``rig`` use is the served one with each ``resource = "sim"``
replaced by the instrument's resource string and the ``[simulation]`` tables left out (a
real-resource bench file may not have them). Everything else, comments included, is kept.
"""

from __future__ import annotations

import re
from collections.abc import Mapping

__all__ = ["pasteable_bench"]

_HEADER = re.compile(r"^\s*\[\[?\s*([A-Za-z0-9_.\"-]+?)\s*\]\]?")
_RESOURCE = re.compile(r"^(\s*resource\s*=\s*)\"sim\"(.*)$")


def pasteable_bench(text: str, resources: Mapping[str, str]) -> str:
    """``text`` (a simulated bench file) with its resources filled in from ``resources``
    (role -> VISA resource string) and without its ``[simulation]`` tables."""
    out: list[str] = []
    table = ""
    for line in text.splitlines():
        m = _HEADER.match(line)
        if m:
            table = m.group(1)
        if table == "simulation" or table.startswith("simulation."):
            continue
        r = _RESOURCE.match(line)
        role = table.split(".", 1)[1] if table.startswith("instruments.") else None
        if r and role in resources:
            line = f'{r.group(1)}"{resources[role]}"{r.group(2)}'
        out.append(line)
    while out and not out[-1].strip():
        out.pop()
    return "\n".join(out) + "\n"
