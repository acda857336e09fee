"""Header patterns of the simulated instruments' command trees, and matching typed headers.

An instrument declares each header as a pattern such as ``"[SOURce]:VOLTage[:LEVel]"`` or
``"INPut#:COUPling"``: the upper-case part of a mnemonic is its short form, the whole word
its long form (SCPI-1999 Vol. 1, 6.2.1 mnemonics), brackets mark optional nodes and ``#`` a
node that takes a numeric suffix. :func:`parse_header_pattern` turns a pattern into
:class:`Node` objects and :func:`match_nodes` matches what a client typed against them,
returning the numeric suffixes (missing suffix = 1).
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from dataclasses import dataclass

__all__ = ["Node", "match_nodes", "parse_header_pattern", "split_mnemonic"]


@dataclass(frozen=True)
class Node:
    """One mnemonic of a header pattern."""

    short: str  # upper case
    long: str  # upper case
    optional: bool
    numbered: bool

    def accepts(self, alpha: str) -> bool:
        return alpha == self.short or alpha == self.long


_PATTERN_NODE = re.compile(r"(\[)?:?([A-Za-z][A-Za-z0-9]*?)(#)?(\])?$")


def parse_header_pattern(pattern: str) -> tuple[Node, ...]:
    """Turn ``"[SOURce]:VOLTage[:LEVel]"`` into nodes (upper-case part = short form)."""
    if pattern.startswith("*"):
        return (Node(pattern.upper(), pattern.upper(), False, False),)
    nodes: list[Node] = []
    for raw in re.findall(r"\[?:?[A-Za-z][A-Za-z0-9]*#?\]?", pattern):
        m = _PATTERN_NODE.match(raw)
        if m is None:  # pragma: no cover - the findall pattern guarantees a match
            raise ValueError(f"bad header pattern {pattern!r}")
        name = m.group(2)
        short = "".join(c for c in name if c.isupper() or c.isdigit())
        nodes.append(Node(short, name.upper(), bool(m.group(1)), bool(m.group(3))))
    if not nodes:
        raise ValueError(f"empty header pattern {pattern!r}")
    return tuple(nodes)


def split_mnemonic(token: str) -> tuple[str, int | None]:
    """``"INP2"`` -> ``("INP", 2)``; no trailing digits -> ``(token, None)``."""
    m = re.match(r"^(.*?[A-Z_])(\d+)$", token)
    if m:
        return m.group(1), int(m.group(2))
    return token, None


def match_nodes(nodes: Sequence[Node], typed: Sequence[str]) -> dict[str, int] | None:
    """Match typed mnemonics (upper case) against pattern nodes; returns the suffixes or None.

    Optional nodes may be left out; a numbered node left out or typed without a suffix
    gets suffix 1 (SCPI-1999 Vol. 1, 6.2.5.2 numeric suffixes).
    """

    def rec(pi: int, ti: int, suffixes: dict[str, int]) -> dict[str, int] | None:
        if ti == len(typed):
            if all(n.optional for n in nodes[pi:]):
                rest = {n.long: 1 for n in nodes[pi:] if n.numbered}
                return {**rest, **suffixes}
            return None
        if pi == len(nodes):
            return None
        node = nodes[pi]
        token = typed[ti]
        if node.numbered:
            alpha, number = split_mnemonic(token)
            ok = node.accepts(alpha)
        else:
            number = None
            ok = node.accepts(token)
        if ok:
            taken = suffixes
            if node.numbered:
                taken = {**suffixes, node.long: 1 if number is None else number}
            found = rec(pi + 1, ti + 1, taken)
            if found is not None:
                return found
        if node.optional:
            skipped = {**suffixes, node.long: 1} if node.numbered else suffixes
            return rec(pi + 1, ti, skipped)
        return None

    return rec(0, 0, {})
