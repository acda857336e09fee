"""Delay sweeps: how fast a meter's input loses its charge by itself, and when it is safe.

When a sequence sweeps the delay between the end of charging and the discharge, each group
(meter, serial, mode, capture, volts, load) gives the discharged charge Q against the delay d. A
self-discharging input follows Q(d) = Q0 exp(-d / tau), so log |Q| is linear in d: an
ordinary least-squares line through all captured events gives tau = -1 / slope with a
t-based confidence interval on the slope (textbook least-squares regression; the exponential
is the textbook RC discharge q = CV exp(-t / RC)).

The safe threshold is, by default, the charge that would hold the input at the safe residual
voltage: Q_safe = C_equiv(delay 0) x safe_residual_volts, with C_equiv the median equivalent
capacitance of the events at delay 0 (or, without such events, the fit's Q0 over the charge
voltage). The delay to safe is tau x ln(Q0 / Q_safe), zero when Q0 is already below it;
``delay_to_safe_upper_s`` is where the one-sided upper confidence bound of the fitted line
(the mean response's band of least-squares regression, e.g. Montgomery, Peck & Vining,
Introduction to Linear Regression Analysis, section 2.4.2 (from memory)) falls below Q_safe.
The same two figures are given for the hazardous-live voltage (the charge that would hold the
input at it) and for the 45 uC stored-charge figure of IEC 61010-1. ``max_delay_s`` is the
longest delay measured: a delay to safe beyond it is an extrapolation of the fit.
"""

from __future__ import annotations

import logging
import math

import numpy as np
import pandas as pd

from rig.analysis.stats import GROUP_KEYS, with_capture

__all__ = [
    "DEFAULT_SAFE_VOLTS",
    "SELFDISCHARGE_COLUMNS",
    "SweepFit",
    "delay_curve",
    "delay_to_reach",
    "fit_self_discharge",
    "has_delay_sweep",
    "self_discharge",
]

log = logging.getLogger(__name__)

#: Default safe residual, V d.c.: the hazardous-live d.c. level of IEC 61010-1 (30 V rms,
#: 42.4 V peak, 60 V d.c.; edition 3 (2010) uses 33 V rms, 46.7 V peak, 70 V d.c.).
DEFAULT_SAFE_VOLTS = 60.0
#: The group keys of rig.analysis.stats without the delay (the sweep's variable).
SWEEP_KEYS: tuple[str, ...] = tuple(k for k in GROUP_KEYS if k != "delay_s")
SELFDISCHARGE_COLUMNS: tuple[str, ...] = (
    *SWEEP_KEYS,
    "tau_s",
    "tau_ci_low",
    "tau_ci_high",
    "safe_charge_c",
    "delay_to_safe_s",
    "n_delays",
    "q0_c",
    "safe_volts",
    "delay_to_safe_upper_s",
    "max_delay_s",
    "hazard_volts",
    "hazard_charge_c",
    "delay_to_hazard_s",
    "delay_to_hazard_upper_s",
    "delay_to_45uc_s",
    "delay_to_45uc_upper_s",
)
#: IEC 61010-1 stored-charge figure, C (the same value as rig.analysis.metrics uses).
IEC61010_CHARGE_C = 45e-6


class SweepFit(tuple):
    """(tau_s, tau_ci_low, tau_ci_high, q0_c): fitted time constant, its interval, Q at 0 s."""

    __slots__ = ()

    def __new__(cls, tau: float, lo: float, hi: float, q0: float) -> SweepFit:
        return super().__new__(cls, (tau, lo, hi, q0))

    tau_s = property(lambda self: self[0])
    tau_ci_low = property(lambda self: self[1])
    tau_ci_high = property(lambda self: self[2])
    q0_c = property(lambda self: self[3])


def _line(d: np.ndarray, q: np.ndarray) -> tuple[float, float, float, float, int, int] | None:
    """Least squares of log q on d: (slope, intercept, residual sd, mean d, sxx, n), or None."""
    use = np.isfinite(d) & np.isfinite(q) & (q > 0)
    d, q = d[use], q[use]
    if d.size < 3 or np.unique(d).size < 2:
        return None
    y = np.log(q)
    dm = float(d.mean())
    sxx = float(((d - dm) ** 2).sum())
    slope = float(((d - dm) * (y - y.mean())).sum() / sxx)
    icpt = float(y.mean() - slope * dm)
    resid = y - (icpt + slope * d)
    sd = math.sqrt(float((resid**2).sum()) / (d.size - 2))
    return slope, icpt, sd, dm, sxx, int(d.size)


def delay_to_reach(
    delay_s: np.ndarray,
    charge_c: np.ndarray,
    threshold_c: float,
    *,
    confidence: float = 0.95,
) -> tuple[float, float]:
    """(fitted delay, upper confidence bound of the delay) after which |Q| is below
    ``threshold_c``: where the fitted line of log |Q|, and where its one-sided upper confidence
    bound for the mean response, cross log threshold (seconds; 0 when already below at delay 0,
    +inf when the fit does not exclude a charge that never decays; NaN without a fit)."""
    # scipy takes ~0.7 s to import; imported where used so that importing rig.analysis
    # (as `rig report` does) does not pay for it
    from scipy import stats as sps
    from scipy.optimize import brentq

    fit = _line(np.asarray(delay_s, float), np.abs(np.asarray(charge_c, float)))
    if fit is None or not (threshold_c > 0):
        return math.nan, math.nan
    slope, icpt, sd, dm, sxx, n = fit
    level = math.log(threshold_c)
    k = float(sps.t.ppf(confidence, n - 2)) * sd

    def upper(d: float) -> float:
        return icpt + slope * d + k * math.sqrt(1.0 / n + (d - dm) ** 2 / sxx) - level

    best = 0.0 if icpt <= level else (math.inf if slope >= 0 else (level - icpt) / slope)
    if upper(0.0) <= 0:
        return best, 0.0
    if slope + k / math.sqrt(sxx) >= 0:  # the bound's asymptotic slope: it never comes down
        return best, math.inf
    hi = max(dm, 1e-9)
    while upper(hi) > 0:
        hi *= 2.0
    return best, float(brentq(upper, 0.0, hi, xtol=1e-12 * hi + 1e-15))


def fit_self_discharge(
    delay_s: np.ndarray, charge_c: np.ndarray, *, confidence: float = 0.95
) -> SweepFit:
    """Fit |Q| = Q0 exp(-d / tau) by least squares on log |Q| (seconds, coulombs).

    The interval maps the slope's t interval through tau = -1 / slope; where the interval of
    the slope reaches zero or above, the upper end of tau is +inf (no decay is excluded).
    Needs at least two distinct delays and three positive charges, else all NaN.
    """
    from scipy import stats as sps  # lazily: see delay_to_reach

    d = np.asarray(delay_s, dtype=float)
    q = np.abs(np.asarray(charge_c, dtype=float))
    use = np.isfinite(d) & np.isfinite(q) & (q > 0)
    d, q = d[use], q[use]
    nan = math.nan
    if d.size < 3 or np.unique(d).size < 2:
        return SweepFit(nan, nan, nan, nan)
    y = np.log(q)
    dm = d.mean()
    sxx = float(((d - dm) ** 2).sum())
    slope = float(((d - dm) * (y - y.mean())).sum() / sxx)
    icpt = float(y.mean() - slope * dm)
    resid = y - (icpt + slope * d)
    dof = d.size - 2
    se = math.sqrt(float((resid**2).sum()) / dof / sxx) if dof > 0 else nan
    tq = float(sps.t.ppf(0.5 + confidence / 2.0, dof)) if dof > 0 else nan
    s_lo, s_hi = slope - tq * se, slope + tq * se
    tau = -1.0 / slope if slope < 0 else math.inf
    tau_lo = -1.0 / s_lo if s_lo < 0 else math.inf
    tau_hi = -1.0 / s_hi if s_hi < 0 else math.inf
    return SweepFit(tau, tau_lo, tau_hi, math.exp(icpt))


def has_delay_sweep(metrics: pd.DataFrame) -> bool:
    """True when some (meter, serial, mode, capture, volts, load) was run at more than one
    delay."""
    if "delay_s" not in metrics:
        return False
    metrics = with_capture(metrics)
    frame = metrics[[*SWEEP_KEYS, "delay_s"]].astype(str)
    return bool((frame.groupby(list(SWEEP_KEYS))["delay_s"].nunique() > 1).any())


def _captured(metrics: pd.DataFrame) -> pd.DataFrame:
    metrics = with_capture(metrics)
    keep = ~metrics["flag_not_captured"].astype(bool)
    return metrics.loc[keep]


def delay_curve(metrics: pd.DataFrame) -> pd.DataFrame:
    """Per sweep group and delay: events, median charge (magnitude, C) and median peak
    current (magnitude, A); for figures of charge and peak against delay."""
    m = _captured(metrics).copy()
    m["abs_charge_c"] = m["charge_c"].abs()
    m["abs_peak"] = m["peak_a"].abs()
    g = m.groupby([*SWEEP_KEYS, "delay_s"], dropna=False, sort=True)
    out = g.agg(
        n=("charge_c", "size"), charge_c=("abs_charge_c", "median"), peak_a=("abs_peak", "median")
    ).reset_index()
    return out


def self_discharge(
    metrics: pd.DataFrame,
    *,
    safe_residual_volts: float = DEFAULT_SAFE_VOLTS,
    safe_charge_c: float | None = None,
    confidence: float = 0.95,
    hazard_volts: float = DEFAULT_SAFE_VOLTS,
) -> pd.DataFrame:
    """selfdischarge.csv (columns SELFDISCHARGE_COLUMNS) for every group with >= 2 delays.

    safe_residual_volts: residual voltage counted as safe, V (sets Q_safe per group).
    safe_charge_c: a fixed threshold in coulombs instead (e.g. 45e-6, IEC 61010-1).
    hazard_volts: the hazardous-live voltage, V (the bench's ``hazardous_live_volts``).
    """
    m = _captured(metrics)
    rows = []
    for key, grp in m.groupby(list(SWEEP_KEYS), dropna=False, sort=True):
        delays = pd.to_numeric(grp["delay_s"], errors="coerce").to_numpy(float)
        n_delays = int(np.unique(delays[np.isfinite(delays)]).size)
        if n_delays < 2:
            continue
        q = grp["charge_c"].to_numpy(float)
        fit = fit_self_discharge(delays, q, confidence=confidence)
        if safe_charge_c is not None:
            q_safe = float(safe_charge_c)
        else:
            at0 = pd.to_numeric(grp.loc[delays == 0, "c_equiv_f"], errors="coerce")
            c0 = float(np.nanmedian(at0)) if at0.notna().any() else math.nan
            if not np.isfinite(c0):
                volts = float(key[SWEEP_KEYS.index("volts")])
                c0 = fit.q0_c / volts if volts > 0 else math.nan
            q_safe = c0 * safe_residual_volts
        if np.isfinite(fit.q0_c) and q_safe > 0:
            delay = max(0.0, fit.tau_s * math.log(fit.q0_c / q_safe)) if fit.q0_c > q_safe else 0.0
        else:
            delay = math.nan
        c_per_volt = q_safe / safe_residual_volts if safe_charge_c is None else math.nan
        q_hazard = c_per_volt * hazard_volts
        rows.append(
            {
                **dict(zip(SWEEP_KEYS, key, strict=True)),
                "tau_s": fit.tau_s,
                "tau_ci_low": fit.tau_ci_low,
                "tau_ci_high": fit.tau_ci_high,
                "safe_charge_c": q_safe,
                "delay_to_safe_s": delay,
                "n_delays": n_delays,
                "q0_c": fit.q0_c,
                "safe_volts": safe_residual_volts if safe_charge_c is None else math.nan,
                "delay_to_safe_upper_s": delay_to_reach(delays, q, q_safe, confidence=confidence)[
                    1
                ],
                "max_delay_s": float(np.nanmax(delays)),
                "hazard_volts": hazard_volts,
                "hazard_charge_c": q_hazard,
                **dict(
                    zip(
                        ("delay_to_hazard_s", "delay_to_hazard_upper_s"),
                        delay_to_reach(delays, q, q_hazard, confidence=confidence),
                        strict=True,
                    )
                ),
                **dict(
                    zip(
                        ("delay_to_45uc_s", "delay_to_45uc_upper_s"),
                        delay_to_reach(delays, q, IEC61010_CHARGE_C, confidence=confidence),
                        strict=True,
                    )
                ),
            }
        )
    log.info("self-discharge fitted for %s group(s)", len(rows))
    return pd.DataFrame(rows, columns=list(SELFDISCHARGE_COLUMNS))
