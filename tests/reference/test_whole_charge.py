"""The whole discharge's charge against closed forms: RC ladders with two and three time
constants, sampled like the simulated digitiser's charge capture (random sample-clock phase,
each sample the mean over its interval, Gaussian noise, 8/12/16-bit codes).

Closed form (own derivation, textbook nodal / state-variable analysis, e.g. Nilsson & Riedel,
"Electric Circuits", natural response of RC circuits; from memory): a ladder of capacitors
C_k at nodes k = 1..N, node 1 tied to ground through the sense resistor R_1, node k to node
k+1 through R_{k+1}. Nodal equations C dv/dt = -G v, so v(t) = exp(-C^-1 G t) v(0): a sum of
N exponentials, one per eigenvalue of C^-1 G. The current into ground is i = v_1 / R_1, and
since R_1 is the only way to ground, its integral is the whole stored charge,
Q = sum_k C_k v_k(0) (conservation of charge). The waveform is checked against
scipy.linalg.expm before it is used.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.linalg import expm

from rig.analysis.metrics import event_metrics
from rig.analysis.wholecharge import TAIL_SHARE_LIMIT

NOISE_A = 5e-3 / np.sqrt(500)  # the demo's 5 mA per native sample, as a 500 ns mean sample


def _ladder(caps: list[float], ohms: list[float]) -> tuple[np.ndarray, np.ndarray]:
    """State matrix A = -C^-1 G of the ladder and its capacitances."""
    n = len(caps)
    g = np.zeros((n, n))
    g[0, 0] += 1.0 / ohms[0]
    for k in range(1, n):
        gk = 1.0 / ohms[k]
        g[k - 1, k - 1] += gk
        g[k, k] += gk
        g[k - 1, k] -= gk
        g[k, k - 1] -= gk
    return -np.diag(1.0 / np.asarray(caps)) @ g, np.asarray(caps)


def _record(
    a: np.ndarray, r1: float, v0: float, tau_slow: float, n_taus: float, rng, bits: int
) -> tuple[np.ndarray, float, float, float]:
    """Codes of one record: 10 % pre-trigger, ``n_taus`` slowest time constants after the
    event, interval means of i = v_1 / R_1 with a random phase; returns codes, dt, t0, gain."""
    lam, vec = np.linalg.eig(a)
    lam, vec = lam.real, vec.real
    coef = np.linalg.solve(vec, np.full(a.shape[0], v0))
    # the eigen expansion against scipy's matrix exponential at a few instants
    for t in (0.1 * tau_slow, tau_slow, 3 * tau_slow):
        ref = expm(a * t) @ np.full(a.shape[0], v0)  # reference: scipy.linalg.expm
        np.testing.assert_allclose(vec @ (coef * np.exp(lam * t)), ref, rtol=1e-9)
    n_post = 60_000
    dt = n_taus * tau_slow / n_post
    n_pre = n_post // 9
    t0 = -(n_pre - rng.random()) * dt  # the sample clock's phase is random
    t = t0 + dt * np.arange(n_pre + n_post)
    lo, hi = np.maximum(t - dt / 2, 0.0), np.maximum(t + dt / 2, 0.0)
    # interval mean of each exponential term of i(t) = sum_k w_k exp(lam_k t)
    w = vec[0] * coef / r1
    mean = np.zeros_like(t)
    for lk, wk in zip(lam, w, strict=True):
        mean += wk * (np.exp(lk * hi) - np.exp(lk * lo)) / lk / dt
    mean += rng.normal(0.0, NOISE_A, t.size)
    peak = v0 / r1
    span = 2.5 * peak
    gain = span / 2**bits
    lo_c, hi_c = -(2 ** (bits - 1)), 2 ** (bits - 1) - 1
    codes = np.clip(np.round((mean - 0.4 * peak) / gain), lo_c, hi_c).astype(np.int16)
    if bits == 8:
        codes = codes.astype(np.int8)
    return codes, dt, t0, gain


LADDERS = {
    "two": ([47e-9, 100e-9], [100e3, 220e3]),
    "three": ([22e-9, 47e-9, 100e-9], [47e3, 100e3, 220e3]),
}


@pytest.mark.parametrize("ladder", sorted(LADDERS))
@pytest.mark.parametrize("bits", [8, 12, 16])
@pytest.mark.parametrize("n_taus", [1.0, 2.0, 3.0, 5.0])
def test_whole_charge_of_rc_ladders(ladder: str, bits: int, n_taus: float) -> None:
    caps, ohms = LADDERS[ladder]
    a, c = _ladder(caps, ohms)
    tau_slow = float(np.max(-1.0 / np.linalg.eigvals(a).real))
    v0 = 1000.0
    q_ref = v0 * float(np.sum(c))  # conservation of charge: all of it leaves through R_1
    rng = np.random.default_rng(1000 * bits + int(10 * n_taus) + len(caps))
    errors, flags = [], []
    for _ in range(3):
        codes, dt, t0, gain = _record(a, ohms[0], v0, tau_slow, n_taus, rng, bits)
        lo_c, hi_c = -(2 ** (bits - 1)), 2 ** (bits - 1) - 1
        m = event_metrics(
            codes[None, :],
            dt=dt,
            t0=t0,
            gain=gain,
            offset=0.4 * v0 / ohms[0],
            code_min=lo_c,
            code_max=hi_c,
            charge_volts=v0,
        )
        err = m["charge_c"][0] / q_ref - 1.0
        errors.append(err)
        flags.append(bool(m["flag_truncated"][0]))
        # the stated uncertainty covers the error (3 standard uncertainties)
        assert abs(m["charge_c"][0] - q_ref) < 3 * m["charge_u_c"][0] + 0.002 * q_ref
        assert m["charge_c"][0] > 0  # a positive discharge keeps its sign
    if n_taus >= 5:
        assert max(abs(e) for e in errors) < 0.01, errors
    else:
        assert max(abs(e) for e in errors) < 0.03, errors
        # the record ends with more than TAIL_SHARE_LIMIT of the charge still to come
        assert np.exp(-n_taus) > TAIL_SHARE_LIMIT and all(flags), flags
