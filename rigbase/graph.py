"""Connected groups of nodes: which nodes a set of two-terminal parts joins together.

One rule for the whole project (the circuit engine's node merging, the nonlinear solver's,
and the netlist check that every node can be bled to COM): a disjoint-set forest with path
halving (Tarjan and van Leeuwen 1984; a textbook structure, e.g. Cormen et al.,
*Introduction to Algorithms*, ch. 21 in the 3rd edition, chapter number from memory).
"""

from __future__ import annotations

from collections.abc import Hashable, Iterable

__all__ = ["connected_groups"]


def connected_groups(
    nodes: Iterable[Hashable], pairs: Iterable[tuple[Hashable, Hashable]]
) -> list[set]:
    """The nodes split into groups joined by ``pairs`` (each pair one part between two
    nodes); a node of a pair need not be listed in ``nodes``. Groups come in the order of
    their first node as met (listed nodes first), so the result is deterministic."""
    parent: dict = {n: n for n in nodes}

    def find(n: Hashable) -> Hashable:
        while parent[n] != n:
            parent[n] = parent[parent[n]]  # path halving
            n = parent[n]
        return n

    for a, b in pairs:
        parent.setdefault(a, a)
        parent.setdefault(b, b)
        ra, rb = find(a), find(b)
        if ra != rb:
            parent[ra] = rb
    groups: dict = {}
    for n in parent:
        groups.setdefault(find(n), set()).add(n)
    return list(groups.values())
