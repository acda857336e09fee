"""The identified source: a meter's stored charge as an equivalent network, and its response.

A charged meter seen from its terminals is a linear one-port holding charge. Its admittance
has a Foster (second form) expansion, a sum of series R-C branches in parallel (any network
synthesis text, Foster's reactance theorem extended to RC one-ports); a meter charged to
``V0`` and left to settle holds every branch capacitor at ``V0`` with no current, so the
discharge into any load is that of the branches, each charged to ``V0``, behind the series
inductance of its leads::

    branch k:  C_k (charged to V0) -- R_k --+
                                          node n -- L_s -- terminal -> load -> common

:class:`FosterSource` holds the values, their covariance (of the logarithms) and the spreads
it was identified with; it is saved as JSON (``rig predict --source``). :func:`linear_current`
is the exact response into a series R-L load (eigen-decomposition of the small state matrix),
used by the fit; :func:`source_parts` builds the network for :mod:`rigbase.nonlinear` when the
load is anything else.
"""

from __future__ import annotations

import json
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np

from rig.store.atomic import atomic_write_text
from rigbase.errors import FileFormatError
from rigbase.nonlinear import Part

__all__ = ["FosterSource", "linear_current", "modes_at", "response_modes", "source_parts"]

TERMINAL = "src:t"


@dataclass(frozen=True)
class FosterSource:
    """An identified source (see the module docstring). ``ohms``/``farads``: the branches,
    slowest last; ``henry``: series inductance; ``volts``: the charge of every branch.
    ``cov``: covariance of ``log([henry, ohms_1, farads_1, ...])``; ``spread``: relative
    event-to-event standard deviation of each metric (``peak``, ``charge``) in the events it
    was fitted to; ``misfit``: the largest relative miss of the fit on those events' median
    metrics; ``info``: group keys and fit figures."""

    volts: float
    henry: float
    ohms: tuple[float, ...]
    farads: tuple[float, ...]
    cov: tuple[tuple[float, ...], ...] = ()
    spread: dict[str, float] = field(default_factory=dict)
    misfit: dict[str, float] = field(default_factory=dict)
    info: dict[str, object] = field(default_factory=dict)

    @property
    def order(self) -> int:
        return len(self.ohms)

    @property
    def theta(self) -> np.ndarray:
        """``log([henry, ohms_1, farads_1, ...])``."""
        v = [self.henry]
        for r, c in zip(self.ohms, self.farads, strict=True):
            v += [r, c]
        return np.log(np.array(v))

    def with_theta(self, theta: np.ndarray) -> FosterSource:
        """The same source with parameters ``exp(theta)`` (branches re-sorted, slowest last)."""
        p = np.exp(np.asarray(theta, dtype=float))
        r, c = p[1::2], p[2::2]
        k = np.argsort(r * c)
        return FosterSource(
            self.volts,
            float(p[0]),
            tuple(r[k]),
            tuple(c[k]),
            self.cov,
            self.spread,
            self.misfit,
            self.info,
        )

    def dominant(self) -> tuple[float, float]:
        """(farads, seconds): the branch holding the most charge and its time constant R C."""
        k = int(np.argmax(self.farads))
        return self.farads[k], self.ohms[k] * self.farads[k]

    def stored_charge(self) -> float:
        """Charge held (C): V0 times the sum of the branch capacitances."""
        return self.volts * float(np.sum(self.farads))

    def save(self, path: str | Path) -> None:
        d = asdict(self)
        atomic_write_text(Path(path), json.dumps(d, indent=1, default=float) + "\n")

    @classmethod
    def load(cls, path: str | Path) -> FosterSource:
        """Read a saved source; FileFormatError names the file and the missing key."""
        path = Path(path)
        try:
            d = json.loads(path.read_text(encoding="utf-8"))
        except (OSError, ValueError) as exc:
            raise FileFormatError(path, "", f"cannot read identified source: {exc}") from None
        for key in ("volts", "henry", "ohms", "farads"):
            if key not in d:
                raise FileFormatError(path, key, f"missing key {key!r}")
        if len(d["ohms"]) != len(d["farads"]) or not d["ohms"]:
            raise FileFormatError(path, "ohms", "ohms and farads must be equal, non-empty lists")
        return cls(
            float(d["volts"]),
            float(d["henry"]),
            tuple(map(float, d["ohms"])),
            tuple(map(float, d["farads"])),
            tuple(tuple(r) for r in d.get("cov", ())),
            dict(d.get("spread", {})),
            dict(d.get("misfit", {})),
            dict(d.get("info", {})),
        )


def _matrices(thetas: np.ndarray, load_ohms: float, load_henry: float, pole_hz: float | None):
    """State matrices (batch x n x n) for the log-parameter rows ``thetas`` (batch x p)."""
    # log-parameters; a trial step of the fit far outside any physical value (e^60 = 1e26)
    # is held at that bound so the model stays finite and the fit steps back
    p = np.exp(np.clip(thetas, -60.0, 60.0))
    ls, r, c = p[:, 0], p[:, 1::2], p[:, 2::2]
    nb, k = r.shape
    g = 1.0 / r
    gs = g.sum(axis=1)
    n = k + 1 + (pole_hz is not None)
    M = np.zeros((nb, n, n))
    # v_n = (sum u_k g_k - i) / gs; C_k u_k' = -g_k (u_k - v_n); L i' = v_n - R i
    vn_u, vn_i = g / gs[:, None], -1.0 / gs
    gc = g / c
    M[:, :k, :k] = -gc[:, :, None] * (np.eye(k)[None] - vn_u[:, None, :])
    M[:, :k, k] = gc * vn_i[:, None]
    lt = ls + load_henry
    M[:, k, :k] = vn_u / lt[:, None]
    M[:, k, k] = (vn_i - load_ohms) / lt
    if pole_hz is not None:
        w = 2 * np.pi * pole_hz
        M[:, k + 1, k], M[:, k + 1, k + 1] = w, -w
    return M, k


def response_modes(
    thetas: np.ndarray, volts: float, load_ohms: float, load_henry: float, pole_hz: float | None
) -> tuple[np.ndarray, np.ndarray]:
    """The response into a series R-L load as a sum of modes, for a batch of parameter rows
    ``thetas`` (batch x p): (amplitudes in A, rates in 1/s), each batch x modes, complex in
    general; the current is ``real(sum(amp exp(rate t)))`` (:func:`modes_at`). One batched
    eigen-decomposition for all rows (the fit's Jacobian is such a batch)."""
    thetas = np.atleast_2d(np.asarray(thetas, dtype=float))
    M, k = _matrices(thetas, load_ohms, load_henry, pole_hz)
    x0 = np.zeros(M.shape[1], dtype=complex)
    x0[:k] = volts
    lam, V = np.linalg.eig(M)
    coef = np.linalg.solve(V, np.broadcast_to(x0[None, :, None], (len(M), x0.size, 1)))[..., 0]
    row = V[:, -1] if pole_hz is not None else V[:, k]
    return row * coef, lam


def modes_at(amp: np.ndarray, lam: np.ndarray, t: np.ndarray) -> np.ndarray:
    """Currents (A, batch x samples) of the modes (:func:`response_modes`) at times ``t`` (s from
    contact, 0 before; samples, or batch x samples)."""
    t = np.asarray(t, dtype=float)
    tt = np.clip(np.broadcast_to(t, (len(amp), t.shape[-1])), 0.0, None)
    y = np.real(np.einsum("bn,bnt->bt", amp, np.exp(lam[:, :, None] * tt[:, None, :])))
    return np.where(np.broadcast_to(t, y.shape) >= 0, y, 0.0)


def linear_current(
    theta: np.ndarray,
    volts: float,
    load_ohms: float,
    load_henry: float,
    t: np.ndarray,
    pole_hz: float | None = None,
) -> np.ndarray:
    """Current (A) into a series R-L load at times ``t`` (s, from contact; 0 before), seen
    through a first-order pole at ``pole_hz`` when given (a scope's bandwidth)."""
    amp, lam = response_modes(np.asarray(theta)[None], volts, load_ohms, load_henry, pole_hz)
    return modes_at(amp, lam, t)[0]


def source_parts(
    src: FosterSource, terminal: str = TERMINAL, common: str = "0", extra_henry: float = 0.0
) -> list[Part]:
    """The source as parts for :func:`rigbase.nonlinear.assemble`: branch capacitors (to be
    charged to ``src.volts`` at nodes ``src:c<k>``), resistors, the series inductor ``src:L``
    (its current is the current into the load; ``extra_henry`` of wiring added to it)."""
    parts = []
    for k, (r, c) in enumerate(zip(src.ohms, src.farads, strict=True)):
        parts.append(Part(f"src:C{k + 1}", "C", f"src:c{k + 1}", common, c))
        parts.append(Part(f"src:R{k + 1}", "R", f"src:c{k + 1}", "src:n", r))
    parts.append(Part("src:L", "L", "src:n", terminal, src.henry + extra_henry))
    return parts
