"""Contact arcs of the simulated relays: a contact that breaks while it carries more than
``ARC_MIN_AMPS`` holds ``ARC_VOLTS`` against the current until the current reaches zero (or the
contact makes again), so the energy of the inductances around it goes into the arc and the
resistors instead of vanishing. The arc is the closed contact (``contact_ohms``) in parallel
with a current source ``-V/contact_ohms`` (the Norton form of ARC_VOLTS in series with the
contact); its end is found on the exact solution. :class:`ContactArcs` holds these methods
for :class:`drivers.sim.world.BenchWorld`, which keeps the segments they read.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from scipy.optimize import brentq

from drivers.sim.circuit import Probe

__all__ = ["ARC_MIN_AMPS", "ARC_VOLTS", "ContactArcs"]

#: Voltage a breaking relay contact holds while it arcs, V: a fixed value of the order of the
#: minimum arc voltage of common contact metals (about 10 to 15 V; from memory).
ARC_VOLTS = 12.0
#: a contact breaking less current than this does not arc, A: below the minimum arc current
#: of common contact metals (a few hundred mA; from memory), so the charge path's milliamperes
#: never arc, while a bounce in a discharge of amperes does
ARC_MIN_AMPS = 0.1


class ContactArcs:
    """Arc bookkeeping of the bench world (needs ``config``, ``_segments``, ``_arcs`` and
    ``_chan_switch`` from it)."""

    config: Any
    _segments: list[Any]
    _arcs: dict[str, float]
    _chan_switch: dict[str, int]

    # -- contact arcs ------------------------------------------------------------------------
    def _arc_segment(self, seg: Any) -> dict[str, float]:
        """The arcs of segment ``seg``: contact -> signed arc voltage (from its inputs)."""
        c, r_k = seg.circuit, self.config.bounce.contact_ohms
        out = {}
        for k, name in enumerate(c.inputs):
            if name.startswith("arc:") and seg.u[k] != 0.0:
                out[name[4:]] = -float(seg.u[k]) * r_k
        return out

    def _arc_current(self, seg: Any, name: str, vs: float, t: np.ndarray) -> np.ndarray:
        """Current through arcing contact ``name`` at times ``t`` after the segment start:
        (v_ab - V) / contact_ohms, the Norton pair's total."""
        e = seg.circuit.element_by_name[name]
        ss = seg.circuit.model(seg.closed, [Probe("v", e.a, e.b)])
        return (ss.outputs(seg.x0, seg.u, t)[0] - vs) / self.config.bounce.contact_ohms

    def _arc_energy(self, seg: Any, t_end: float) -> float:
        """Energy into the arcs of ``seg`` from its start to ``t_end``, J (V i integrated on
        a grid dense near the start, where the fast modes are; trapezoid rule)."""
        span = t_end - seg.t0
        if span <= 0:
            return 0.0
        grid = np.unique(np.concatenate([[0.0], np.geomspace(1e-13, span, 4000), [span]]))
        total = 0.0
        for name, vs in self._arc_segment(seg).items():
            i = self._arc_current(seg, name, vs, grid)
            total += vs * float(np.sum(0.5 * (i[1:] + i[:-1]) * np.diff(grid)))
        return total

    def _arc_exit(self, seg: Any, t_limit: float) -> tuple[float, str] | None:
        """The first instant in (t0, t_limit] where an arc's current reaches zero."""
        span = t_limit - seg.t0
        if span <= 0:
            return None
        grid = np.concatenate([[0.0], np.geomspace(min(1e-12, span), span, 600)])
        best: tuple[float, str] | None = None
        for name, vs in self._arc_segment(seg).items():
            i = self._arc_current(seg, name, vs, grid) * np.sign(vs)
            hit = np.nonzero(i <= 0)[0]
            if not hit.size:
                continue
            k = hit[0]
            if k == 0:
                te = 0.0
            else:
                te = brentq(
                    lambda x, n=name, v=vs: float(self._arc_current(seg, n, v, np.array([x]))[0]),
                    grid[k - 1],
                    grid[k],
                    xtol=1e-15,
                )
            if best is None or seg.t0 + te < best[0]:
                best = (seg.t0 + te, name)
        return best

    def _start_arcs(self, ch: int, closing: bool, t: float) -> None:
        """Contacts of channel ``ch`` change at ``t``: a make ends their arcs; a break of a
        contact carrying current starts one, its voltage against that current."""
        names = [n for n, c in self._chan_switch.items() if c == ch]
        if closing:
            for n in names:
                self._arcs.pop(n, None)
            return
        seg = self._segments[-1]
        for n in names:
            if n not in seg.closed:
                continue
            ss = seg.circuit.model(seg.closed, [Probe("i", n)])
            i0 = float(ss.outputs(seg.x0, seg.u, np.array([t - seg.t0]))[0, 0])
            i0 += float(seg.u[seg.circuit.inputs.index(f"arc:{n}")])  # an arc's own source
            if abs(i0) > ARC_MIN_AMPS:
                self._arcs[n] = ARC_VOLTS * float(np.sign(i0))
