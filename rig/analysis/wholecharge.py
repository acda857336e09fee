"""The whole discharge's charge: the record's integral plus the tail beyond its end.

A record ends at a fixed time; a meter's slow coupling capacitor may still be discharging
then. The charge beyond the end is estimated from the record's own tail: binned means of
the baseline-removed current are fitted with a sum of K decaying exponentials,

    i(t) = sum_j A_j exp(-t / tau_j),   K = 0 .. MAX_TERMS,

(the natural response of a linear RC network is such a sum, one term per eigenvalue of its
state matrix: textbook state-variable analysis), and the number of terms is chosen by the
data: the K with the smallest Bayesian information criterion chi^2 + 2K ln(bins)
(Schwarz 1978), so a term is kept only when it explains more than its two parameters cost.
Beyond the record's end E each term holds A_j tau_j exp(-E / tau_j) (the integral of an
exponential), and the tail charge is their sum.

Standard uncertainty (GUM-style propagation, first order): the fit's covariance
(inverse of J^T J, scaled by chi^2 / dof when that exceeds 1) carried to the tail charge
through its gradient, combined with the baseline's standard uncertainty times the
sensitivity of the whole figure to a baseline shift (the integrated samples plus the
fitted tail's response to a constant offset, at fixed time constants).

Everything here works in the record's own units (codes or amperes per sample, times in
samples); :mod:`rig.analysis.metrics` scales to coulombs and seconds.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

__all__ = [
    "MAX_TERMS",
    "TAIL_SHARE_LIMIT",
    "TAU_MAX_SPANS",
    "TailFit",
    "fit_bins",
    "fit_tail_terms",
    "refit_amplitudes",
    "log_bins",
]

MAX_TERMS = 3  # exponential terms of the tail model, at most
N_BINS = 64  # log-spaced bins of the fitted part of the record
#: The truncated flag: the tail beyond the record carries more than this share of the whole
#: discharge's charge (1 %: a single exponential recorded over 4.6 time constants).
TAIL_SHARE_LIMIT = 0.01
#: the slowest time constant the fit may find, in fitted spans: beyond it the record cannot
#: tell a tail from a baseline shift; a term at this bound makes the tail unknown (flagged)
TAU_MAX_SPANS = 10.0
BAD_FIT = 9.0  # reduced chi^2 above which the tail model is rejected (3 sigma per bin)
_GRID = 24  # trial time constants per added term (log-spaced) before the polish
COLLAPSED = 1e-3  # two fitted ln(tau) this close are one term (0.1 % apart)


@dataclass
class TailFit:
    """A fitted tail in record units: amplitudes at the fit's start (current), time
    constants (samples), slowest first; the charge to add to the record integral (the tail
    beyond the record's end less the fitted baseline offset over the integrated samples)
    and the whole figure's standard uncertainty (current x samples)."""

    amps: np.ndarray = field(default_factory=lambda: np.zeros(0))
    taus: np.ndarray = field(default_factory=lambda: np.zeros(0))
    tail: float = 0.0
    tail_u: float = 0.0
    beyond: float = 0.0  # the charge beyond the record's end alone
    unmeasured: bool = False  # the slowest term sits at TAU_MAX_SPANS: the tail is unknown

    @property
    def terms(self) -> int:
        """Number of exponential terms chosen."""
        return int(self.amps.size)


def log_bins(start: int, stop: int, n_bins: int = N_BINS) -> np.ndarray:
    """Bin edges (sample indices) from ``start`` to ``stop``, widths growing geometrically:
    fine where the fast terms decay, coarse on the slow tail. At least one sample a bin."""
    span = stop - start
    if span < 2:
        return np.array([start, stop])
    edges = start - 1 + np.geomspace(1, span + 1, n_bins + 1)
    edges = np.unique(np.round(edges).astype(np.int64))
    edges[0], edges[-1] = start, stop
    return np.unique(edges)


def _basis(a: np.ndarray, b: np.ndarray, taus: np.ndarray) -> np.ndarray:
    """Mean of exp(-t / tau) over each bin [a, b) (samples from the fit's start)."""
    tau = taus[None, :]
    w = (b - a)[:, None]
    return tau * (np.exp(-a[:, None] / tau) - np.exp(-b[:, None] / tau)) / w


def _design(phi: np.ndarray, s: np.ndarray, u_off: float) -> np.ndarray:
    """Weighted design matrix: the exponentials, a constant offset (the baseline's residual
    error), and one prior row that holds the offset to 0 +- u_off."""
    n, k = phi.shape
    m = np.zeros((n + 1, k + 1))
    m[:n, :k] = phi / s[:, None]
    m[:n, k] = 1.0 / s
    m[n, k] = 1.0 / u_off
    return m


def _solve(y: np.ndarray, s: np.ndarray, phi: np.ndarray, u_off: float) -> tuple[np.ndarray, float]:
    """Weighted linear least squares: amplitudes then the offset, and chi^2 (with the
    offset's prior term)."""
    m = _design(phi, s, u_off)
    rhs = np.append(y / s, 0.0)
    coef, *_ = np.linalg.lstsq(m, rhs, rcond=None)
    r = rhs - m @ coef
    return coef, float(r @ r)


def _grid_chis(
    a: np.ndarray, b: np.ndarray, y: np.ndarray, s: np.ndarray, trials: np.ndarray, u_off: float
) -> np.ndarray:
    """chi^2 of the weighted linear fit for each row of trial time constants, all at once
    (stacked QR factorisations); only the starting point of the polish is chosen with it."""
    n = y.size
    k = trials.shape[1]
    m = np.zeros((trials.shape[0], n + 1, k + 1))
    # _basis of every trial at once (the same element-wise operations: the same numbers)
    tau = trials[:, None, :]
    a3, b3 = a[None, :, None], b[None, :, None]
    phi = tau * (np.exp(-a3 / tau) - np.exp(-b3 / tau)) / (b3 - a3)
    m[:, :n, :k] = phi / s[None, :, None]
    m[:, :n, k] = 1.0 / s
    m[:, n, k] = 1.0 / u_off
    rhs = np.append(y / s, 0.0)
    q, _ = np.linalg.qr(m)
    proj = np.einsum("tij,i->tj", q, rhs)
    r = rhs[None, :] - np.einsum("tij,tj->ti", q, proj)
    return np.einsum("ti,ti->t", r, r)


def _polish(
    a: np.ndarray,
    b: np.ndarray,
    y: np.ndarray,
    s: np.ndarray,
    u_off: float,
    x0: np.ndarray,
    lo: float,
    hi: float,
    max_iter: int = 60,
) -> np.ndarray:
    """Log time constants that minimise chi^2, the amplitudes and the offset eliminated
    (variable projection, Golub and Pereyra 1973): Levenberg-Marquardt steps on ln tau
    within [lo, hi], with Kaufman's (1975) approximate Jacobian of the projected residual,
    -(I - Q Q^T) dM/d(ln tau_j) c. A 1-3-parameter problem: a general trust-region solver
    spent four fifths of its time in its own bookkeeping here."""
    rhs = np.append(y / s, 0.0)
    a_col, b_col, w = a[:, None], b[:, None], (b - a)[:, None]

    def evaluate(x: np.ndarray) -> tuple[np.ndarray, tuple]:
        # _basis and its derivative in ln tau, d/d(ln tau) of the bin mean of exp(-t / tau)
        # = (tau (e_a - e_b) + a e_a - b e_b) / (b - a), sharing their exponentials
        tau = np.exp(x)[None, :]
        ea, eb = np.exp(-a_col / tau), np.exp(-b_col / tau)
        diff = tau * (ea - eb)
        m = _design(diff / w, s, u_off)
        q, rr = np.linalg.qr(m)
        proj = q.T @ rhs
        r = rhs - q @ proj
        return r, (m, q, rr, proj, ea, eb, diff)

    def jacobian(parts: tuple) -> np.ndarray:
        # only for accepted steps that go on: two in five trial steps are rejected on
        # their residual alone
        m, q, rr, proj, ea, eb, diff = parts
        try:
            coef = np.linalg.solve(rr, proj)
        except np.linalg.LinAlgError:
            coef = np.linalg.lstsq(m, rhs, rcond=None)[0]
        k = diff.shape[1]
        d = np.zeros((rhs.size, k))
        d[:-1] = (diff + a_col * ea - b_col * eb) / w * coef[None, :k] / s[:, None]
        return -(d - q @ (q.T @ d))

    x = np.asarray(x0, dtype=float)
    r, parts = evaluate(x)
    jac = jacobian(parts)
    cost = float(r @ r)
    lam = 1e-3
    for _ in range(max_iter):
        # (the small-array forms of np.diag, np.trace and np.clip: the same numbers, without
        # their call overhead, which on a 1-3-parameter problem was a tenth of the fit)
        g = jac.T @ r
        h = jac.T @ jac
        hd = h.diagonal()
        scale = hd + 1e-12 * max(1.0, float(hd.sum()))
        damped = h.copy()
        damped.flat[:: x.size + 1] += lam * scale  # the diagonal
        try:
            step = np.linalg.solve(damped, -g)
        except np.linalg.LinAlgError:
            break
        x_new = np.minimum(np.maximum(x + step, lo), hi)
        r_new, parts = evaluate(x_new)
        cost_new = float(r_new @ r_new)
        if cost_new < cost:
            done = cost - cost_new <= 1e-10 * cost or float(np.max(np.abs(x_new - x))) < 1e-7
            x, r, cost = x_new, r_new, cost_new
            lam = max(lam / 3.0, 1e-9)
            # two time constants merging: the model has become one term fewer, which the
            # information criterion has already weighed (two equal modes are no RC network's)
            if done or (x.size > 1 and float(np.min(np.diff(np.sort(x)))) < COLLAPSED):
                break
            jac = jacobian(parts)
        else:
            lam *= 4.0
            if lam > 1e8:
                break
    return x


def fit_bins(
    a: np.ndarray,
    b: np.ndarray,
    y: np.ndarray,
    s: np.ndarray,
    end: float,
    u_off: float,
    n_int: float,
) -> TailFit:
    """Fit bin means ``y`` (standard errors ``s``) over bins [a, b) (samples from the fit's
    start) with 0..MAX_TERMS exponentials plus a constant offset held to 0 +- ``u_off`` (the
    baseline's standard uncertainty: a very slow term and a baseline error look alike, and
    only the pre-trigger samples tell them apart); choose K by the BIC. The returned tail
    is the charge beyond ``end`` minus the offset over the ``n_int`` integrated samples
    (the record integral's correction), with the uncertainty of that sum."""
    n = y.size
    u_off = max(float(u_off), 1e-12 * max(1.0, float(np.max(np.abs(y)))))
    empty = np.zeros((n, 0))
    coef0, chi0 = _solve(y, s, empty, u_off)
    best = _tail(a, b, y, s, coef0, np.zeros(0), chi0, end, u_off, n_int)
    if n < 4:
        return best
    span = float(b[-1])
    lo, hi = np.log(max(0.3, 0.3 * float(b[0] - a[0]))), np.log(TAU_MAX_SPANS * span)
    grid = np.exp(np.linspace(lo, hi, _GRID))
    taus: np.ndarray = np.zeros(0)
    bic_best = chi0
    for k in range(1, MAX_TERMS + 1):
        if n <= 2 * k + 1:
            break
        # a trial equal to a term already fitted would make the design singular
        fresh = [g for g in grid if not np.any(np.abs(np.log(taus / g)) < 1e-6)]
        trials = np.stack([np.sort(np.append(taus, g))[::-1] for g in fresh])
        start = trials[int(np.argmin(_grid_chis(a, b, y, s, trials, u_off)))]
        x0 = np.clip(np.log(start), lo + 1e-9, hi - 1e-9)
        taus = np.sort(np.exp(_polish(a, b, y, s, u_off, x0, lo, hi)))[::-1]
        coef, chi = _solve(y, s, _basis(a, b, taus), u_off)
        bic = chi + 2 * k * np.log(n)
        # the slowest term of a discharge must carry the discharge's own sign: for an RC
        # network (a Metzler state matrix) charged one way, the slowest mode's eigenvector
        # and weight are positive (Perron-Frobenius; from memory). A negative slowest term
        # is a baseline shift the exponentials are imitating, not a tail.
        if coef[0] <= 0:
            continue
        if bic < bic_best:
            bic_best = bic
            best = _tail(a, b, y, s, coef, taus, chi, end, u_off, n_int)
    return best


def _tail(
    a: np.ndarray,
    b: np.ndarray,
    y: np.ndarray,
    s: np.ndarray,
    coef: np.ndarray,
    taus: np.ndarray,
    chi: float,
    end: float,
    u_off: float,
    n_int: float,
) -> TailFit:
    """Tail charge beyond ``end`` less the offset's share of the record integral, and its
    standard uncertainty from the fit's covariance (first-order propagation)."""
    k = taus.size
    amps, off = coef[:k], float(coef[k])
    decay = np.exp(-end / taus)
    tail = float(np.sum(amps * taus * decay)) - off * n_int
    phi = _basis(a, b, taus)
    h = 1e-5  # d(bin mean)/d tau_j by a central difference in log tau
    dphi = (_basis(a, b, taus * np.exp(h)) - _basis(a, b, taus * np.exp(-h))) / (2 * h * taus)
    m = _design(phi, s, u_off)
    jac = np.hstack([m, np.vstack([dphi * amps[None, :] / s[:, None], np.zeros((1, k))])])
    dof = max(1, y.size - 2 * k - 1)
    scale = max(1.0, chi / dof)
    grad = np.concatenate([taus * decay, [-n_int], amps * decay * (1.0 + end / taus)])
    try:
        var = float(grad @ (np.linalg.pinv(jac.T @ jac) * scale) @ grad)
    except np.linalg.LinAlgError:
        var = np.inf
    tail_u = float(np.sqrt(var)) if np.isfinite(var) and var >= 0 else np.inf
    beyond = float(np.sum(amps * taus * decay))
    # unmeasured: the slowest term at its bound, or a fit the model does not describe
    # (reduced chi^2 above BAD_FIT: ringing, a pulse not yet over)
    unmeasured = bool(k and taus[0] > 0.99 * TAU_MAX_SPANS * float(b[-1])) or chi / dof > BAD_FIT
    return TailFit(amps, taus, tail, tail_u, beyond, unmeasured)


def refit_amplitudes(
    a: np.ndarray,
    b: np.ndarray,
    y: np.ndarray,
    s: np.ndarray,
    end: float,
    u_off: float,
    n_int: float,
    taus: np.ndarray,
) -> TailFit | None:
    """The tail with its time constants given (samples, slowest first; e.g. those of the
    previous event of a group of repeated discharges): amplitudes and offset by one weighted
    linear least-squares solve, the tail and its uncertainty as :func:`fit_bins` gives them.
    None when those time constants do not describe these bins (reduced chi^2 above BAD_FIT,
    a slowest term of the wrong sign, or one beyond this record's TAU_MAX_SPANS bound): then
    only the full fit can say what the tail is."""
    n, k = y.size, taus.size
    if n <= 2 * k + 1 or (k and taus[0] > 0.99 * TAU_MAX_SPANS * float(b[-1])):
        return None
    u_off = max(float(u_off), 1e-12 * max(1.0, float(np.max(np.abs(y)))))
    coef, chi = _solve(y, s, _basis(a, b, taus), u_off)
    if k and coef[0] <= 0:
        return None
    fit = _tail(a, b, y, s, coef, taus, chi, end, u_off, n_int)
    return None if fit.unmeasured else fit


def fit_tail_terms(
    row: np.ndarray,
    base: float,
    pol: float,
    start: int,
    sigma: float,
    corr: float,
    u_base: float,
    n_int: float,
    taus: np.ndarray | None = None,
) -> tuple[TailFit, int]:
    """Fit the tail of one record ``row`` (raw samples, baseline ``base`` with standard
    uncertainty ``u_base``, polarity ``pol``) from sample ``start`` to its end. ``sigma`` is
    the noise per sample and ``corr`` >= 1 the variance inflation of a long mean by the
    noise's correlation (from the baseline); ``n_int`` the samples the record integral
    covers. ``taus``: time constants (samples) to try first with only the amplitudes
    refitted (:func:`refit_amplitudes`); the full fit runs when they do not describe the
    record. Returns the fit (times in samples from ``start``; its ``tail`` includes the
    record integral's offset correction and ``tail_u`` the whole figure's uncertainty) and
    ``start``."""
    n = row.size
    edges = log_bins(start, n)
    if edges.size < 6:
        return TailFit(), start
    sums = np.add.reduceat(row[: edges[-1]], edges[:-1], dtype=np.float64)
    width = np.diff(edges).astype(np.float64)
    y = pol * (sums / width - base)
    s = sigma * np.sqrt(np.minimum(corr, width) / width)
    s = np.maximum(s, 1e-12 * max(1.0, float(np.max(np.abs(y)))))
    a = (edges[:-1] - start).astype(np.float64)
    b = (edges[1:] - start).astype(np.float64)
    if taus is not None:
        fit = refit_amplitudes(a, b, y, s, float(n - start), u_base, n_int, taus)
        if fit is not None:
            return fit, start
    return fit_bins(a, b, y, s, float(n - start), u_base, n_int), start
