"""Exact evaluation of one linear state-space model: eigenbasis solution, expm fallback.

A :class:`StateSpace` is ``x' = A x + B u``, ``y = C x + D u`` for one switch configuration
of a network (assembled by :mod:`drivers.sim.assembly`). Within it, with constant inputs,
the solution is exact: ``x(t) = exp(A t) x0 + integral_0^t exp(A s) ds B u``, evaluated in
the eigenbasis of ``A`` (with ``expm1(l t) / l`` for the forced part, so conserved charges
with ``l = 0`` are exact too), vectorised over all sample times. When the eigenvectors are
ill-conditioned (near-defective ``A``) it falls back to ``scipy.linalg.expm`` of the
augmented matrix ``[[A, B], [0, 0]]`` (the augmented-matrix method, Van Loan 1978), with
repeated multiplication over runs of equal sample steps. States of inductors without a closed loop are held at zero.
"""

from __future__ import annotations

import logging

import numpy as np
import scipy.linalg

__all__ = ["EIG_COND_LIMIT", "StateSpace"]

log = logging.getLogger(__name__)

#: Eigenvector condition number above which the expm fallback is used (default).
EIG_COND_LIMIT = 1.0e9


class StateSpace:
    """``x' = A x + B u``, ``y = C x + D u`` for one configuration, with exact evaluation.

    ``x`` has ``n_net`` network states followed by one state per output-filter pole.
    States listed in ``dead`` (inductors without a closed loop) are held at zero.
    ``filt_src`` gives, per filter state, the (C row, D row) of the output it follows, or
    (None, None) for a later pole of a cascade. Eigenvectors whose condition number is not
    below ``cond_limit`` switch the model to the ``expm`` fallback.
    """

    def __init__(
        self,
        A,
        B,
        C,
        D,
        n_net: int,
        dead: np.ndarray,
        filt_src: list,
        cond_limit: float = EIG_COND_LIMIT,
    ) -> None:
        self.A, self.B, self.C, self.D = A, B, C, D
        self.n_net = n_net
        self.n_states = A.shape[0]
        self.dead = dead
        self._filt_src = filt_src  # per filter state: (probe row of C0/D0 or previous state)
        self.live = np.setdiff1d(np.arange(self.n_states), dead)
        Al = A[np.ix_(self.live, self.live)]
        self._Al, self._Bl = Al, B[self.live]
        lam, V = np.linalg.eig(Al) if Al.size else (np.zeros(0), np.zeros((0, 0)))
        cond = np.linalg.cond(V) if Al.size else 1.0
        self.eig_ok = bool(np.isfinite(cond) and cond < cond_limit)
        if self.eig_ok:
            self._lam, self._V, self._Vi = lam, V, np.linalg.inv(V)
        else:
            log.debug("eigenvectors ill-conditioned (cond %.3g): expm fallback", cond)
        self._nonsingular = bool(Al.size) and bool(np.all(lam != 0))
        self._expm_cache: dict[float, tuple[np.ndarray, np.ndarray]] = {}

    @property
    def eigenvectors(self) -> np.ndarray:
        """Eigenvectors of the live part of ``A``, one per column (only when ``eig_ok``)."""
        if not self.eig_ok:
            raise ValueError("eigenvectors too ill-conditioned to be used")
        return self._V

    def eigenvalues(self) -> np.ndarray:
        """Eigenvalues of the live part of ``A`` (1/s)."""
        if self.eig_ok:
            return self._lam
        return np.linalg.eigvals(self._Al)

    def settle(self, x_net: np.ndarray, u: np.ndarray) -> np.ndarray:
        """Full state whose filter states equal their inputs' present values (steady filters)."""
        x = np.zeros(self.n_states)
        x[: self.n_net] = x_net
        for k, (row_C, row_D) in enumerate(self._filt_src):
            if row_C is None:  # a later pole of a cascade: equal to the previous pole
                x[self.n_net + k] = x[self.n_net + k - 1]
            else:
                x[self.n_net + k] = row_C @ x[: self.n_net] + row_D @ u
        return x

    def advance(self, x0: np.ndarray, u: np.ndarray, dt: float) -> np.ndarray:
        """Full state after ``dt`` seconds from ``x0`` with inputs ``u``."""
        x = np.zeros(self.n_states)
        xl = x0[self.live]
        if dt <= 0 or not len(xl):
            x[self.live] = xl
            return x
        if self.eig_ok:
            xs, z0, w = self._modal(xl, u)
            x[self.live] = xs + _eig_eval(self._lam, self._V, z0, w, np.array([dt]))[:, 0]
        else:
            Phi, Gam = self._phi(dt)
            x[self.live] = Phi @ xl + Gam @ u
        return x

    def outputs(self, x0: np.ndarray, u: np.ndarray, t: np.ndarray) -> np.ndarray:
        """Outputs at times ``t`` (s, relative to the state ``x0``, all >= 0): (n_out, len(t))."""
        t = np.asarray(t, dtype=float)
        n_out = self.C.shape[0]
        if t.size == 0:
            return np.zeros((n_out, 0))
        order = None
        if np.any(np.diff(t) < 0):
            order = np.argsort(t, kind="stable")
            t = t[order]
        xl = x0[self.live]
        Cl = self.C[:, self.live]
        y = (self.D @ u)[:, None] + np.zeros((n_out, t.size))
        if len(xl):
            if self.eig_ok:
                xs, z0, w = self._modal(xl, u)
                y += (Cl @ xs)[:, None] + _eig_eval(self._lam, Cl @ self._V, z0, w, t)
            else:
                y += Cl @ self._propagate(xl, u, t)
        if order is not None:
            out = np.empty_like(y)
            out[:, order] = y
            return out
        return y

    def _modal(self, xl: np.ndarray, u: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(x_ss, z0, w): the solution is ``x_ss + V (exp(L t) z0 + expm1(L t)/L w)``.

        With a nonsingular ``A`` the forced part is the steady state ``x_ss = -A^-1 B u``
        from a direct solve and ``w = 0``: projecting ``B u`` on the eigenbasis instead would
        multiply its rounding error by ``t`` in the slowest modes (seconds against
        nanoseconds). A singular ``A`` (a conserved charge) keeps the ``expm1`` form.
        """
        bu = self._Bl @ u
        if not np.any(bu):
            return np.zeros_like(xl), self._Vi @ xl, np.zeros_like(xl, dtype=complex)
        if self._nonsingular:
            xs = np.linalg.solve(self._Al, -bu)
            if np.all(np.isfinite(xs)):
                return xs, self._Vi @ (xl - xs), np.zeros_like(xl, dtype=complex)
        return np.zeros_like(xl), self._Vi @ xl, self._Vi @ bu

    # -- expm fallback -------------------------------------------------------------------
    def _phi(self, dt: float) -> tuple[np.ndarray, np.ndarray]:
        key = float(dt)
        hit = self._expm_cache.get(key)
        if hit is None:
            n, m = self._Al.shape[0], self._Bl.shape[1]
            M = np.zeros((n + m, n + m))
            M[:n, :n], M[:n, n:] = self._Al * dt, self._Bl * dt
            E = scipy.linalg.expm(M)
            hit = (E[:n, :n], E[:n, n:])
            if len(self._expm_cache) < 4096:
                self._expm_cache[key] = hit
        return hit

    def _propagate(self, xl: np.ndarray, u: np.ndarray, t: np.ndarray) -> np.ndarray:
        """States at sorted times ``t`` by exact steps; uniform runs use matrix powers."""
        X = np.empty((len(xl), t.size))
        x = xl.copy()
        if t[0] > 0:
            Phi, Gam = self._phi(t[0])
            x = Phi @ x + Gam @ u
        dts = np.diff(t)
        X[:, 0] = x
        if not dts.size:
            return X
        # runs of equal steps (uniform grids are one run): boundaries found once, vectorised
        change = np.abs(np.diff(dts)) > 1e-9 * np.maximum(dts[1:], 1e-30)
        bounds = np.concatenate([[0], np.nonzero(change)[0] + 1, [dts.size]])
        for r0, r1 in zip(bounds[:-1], bounds[1:], strict=True):
            j, run, h = int(r0) + 1, int(r1 - r0), float(dts[r0])
            Phi, Gam = self._phi(h)
            g = Gam @ u
            blk = min(run, 512)
            P = np.empty((blk, len(x), len(x)))
            q = np.empty((blk, len(x)))
            P[0], q[0] = Phi, g
            for k in range(1, blk):
                P[k], q[k] = Phi @ P[k - 1], Phi @ q[k - 1] + g
            done = 0
            while done < run:
                n = min(blk, run - done)
                chunk = P[:n] @ x + q[:n]
                X[:, j + done : j + done + n] = chunk.T
                x = chunk[-1]
                done += n
        return X


def _eig_eval(lam, CV, z0, w, t) -> np.ndarray:
    """``Re sum_i CV[:, i] (exp(l_i t) z0_i + expm1(l_i t)/l_i w_i)`` at sorted times ``t``.

    Conjugate pairs are evaluated once (weight 2); modes that have decayed below 1e-18 are
    only evaluated on the prefix of ``t`` where they still matter.
    """
    out = np.zeros((CV.shape[0], t.size))
    tmax = t[-1]
    for i, li in enumerate(lam):
        if li.imag < 0:
            continue
        wgt = 2.0 if li.imag > 0 else 1.0
        c = CV[:, i]
        if not np.any(c) or (z0[i] == 0 and w[i] == 0):
            continue
        lr = li.real
        if abs(li) * tmax > 1e-2:
            # exp(l t) (z0 + w/l) - w/l; the constant part applies at every time
            cut = t.size
            if lr < 0:
                cut = int(np.searchsorted(t, 41.5 / -lr, side="right"))
            a = z0[i] + w[i] / li
            if cut:
                e = np.exp(li * t[:cut]) if li.imag else np.exp(lr * t[:cut])
                out[:, :cut] += wgt * np.real(np.outer(c * a, e))
            out -= wgt * np.real(c * (w[i] / li))[:, None]
        else:
            if li == 0:
                psi = t
            else:
                psi = np.expm1(li * t) / li if li.imag else np.expm1(lr * t) / lr
            e = np.exp(li * t) if li.imag else np.exp(lr * t)
            out += wgt * np.real(np.outer(c * z0[i], e) + np.outer(c * w[i], psi))
    return out
