"""Identify a meter's source network from its discharges into two or more known loads.

Input: the events of one meter, mode, charge voltage and delay, captured into at least two
loads whose resistance and wiring inductance the bench file gives (``manifest["bench"]``).
Each (load, scope capture) becomes one data set: the events' current waveforms averaged into
time bins (linear around the edge, logarithmic after it), the median over events per bin
(robust to contact bounce, which moves single events far off), and per bin the standard
error of that median from the events' spread (1.4826 MAD / sqrt(n), Hampel's MAD estimate of
sigma, any robust statistics text), with a floor of 0.3 % of the value for what the model
cannot describe (the meter is a ladder, the model a sum of branches).

Model: :class:`rig.analysis.sourcenet.FosterSource` with every branch charged to the
events' measured input voltage (``charged_volts``), into the load's resistance plus the
sense resistance and relay contacts, through the load's wiring inductance, seen through the
capture's bandwidth pole; time zero of the model is where its own current crosses the
capture's trigger level, as the scope's is. The branch count (1 to 4) is the one with the
smallest Bayesian information criterion (Schwarz 1978). The fit is scipy's
``least_squares`` on the logarithms; their covariance is ``(J^T J)^-1`` scaled by the
reduced chi-square when it exceeds one (the events' spread and the misfit both widen it).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from rig.analysis.runs import load_run, stack_waveforms
from rig.analysis.sourcenet import FosterSource, linear_current, modes_at, response_modes
from rig.store.runfolder import read_manifest
from rigbase.errors import RunFolderError

__all__ = ["DataSet", "collect", "fit_source", "identify", "path_of_load"]

REL_FLOOR = 3e-3
MAX_ORDER = 4
SLOW_DT = 1e-7  # a capture sampled this slowly or slower resolves only the tail
SLOW_START_S = 30e-6  # its bins start here: after any contact bounce (the bench's are < 12 us)


@dataclass
class DataSet:
    """One load x capture: bin times ``t`` (s from trigger), median current ``y`` (A), its
    standard error ``sigma`` (A); the path's ``ohms`` and ``henry``; the capture's bandwidth
    pole ``pole_hz`` (None = full) and trigger level (A); per-event ``peaks`` and ``charges``
    (A, C); the record's end ``record_after_s`` and sample interval ``dt`` (s); ``noise``, the
    per-sample noise (A, standard deviation before the edge); per event (rows of ``tails``,
    C) the charge from each time of ``tail_t`` (s) to the record's end."""

    load: str
    capture: str
    t: np.ndarray
    y: np.ndarray
    sigma: np.ndarray
    ohms: float
    henry: float
    pole_hz: float | None
    trigger_amps: float
    peaks: np.ndarray
    charges: np.ndarray
    record_after_s: float
    dt: float
    noise: float = 0.0
    tail_t: np.ndarray = field(default_factory=lambda: np.empty(0))
    tails: np.ndarray = field(default_factory=lambda: np.empty((0, 0)))


def path_of_load(
    manifest: Mapping[str, Any], load: str, journal_ohms: float
) -> tuple[float, float]:
    """(ohms, henry) of the discharge path through ``load``: the load's resistance and wiring
    inductance, the sense shunt, and the closed relay contacts (simulated bench: the
    ``contact_ohms`` of its bounce table; real bench: not known, taken as 0)."""
    bench = manifest.get("bench") or {}
    spec = next((x for x in bench.get("loads") or [] if x.get("name") == load), None)
    ohms = float(spec["ohms"]) if spec else float(journal_ohms)
    henry = float(spec.get("henry") or 0.0) if spec else 0.0
    sense = bench.get("sense") or {}
    if sense.get("kind") == "shunt":
        ohms += float(sense.get("ohms") or 0.0)
    sim = (bench.get("simulation") or {}).get("world") or {}
    contact = float((sim.get("bounce") or {}).get("contact_ohms") or 0.0)
    n_contacts = 2 if spec and spec.get("channel") is not None else 1
    return ohms + n_contacts * contact, henry


def _capture_settings(manifest: Mapping[str, Any], capture: str) -> dict[str, Any]:
    seq = manifest.get("sequence") or {}
    caps = seq.get("scope_captures") or {}
    return dict(caps.get(capture) or seq.get("scope") or {})


def _bins(t: np.ndarray, dt: float) -> np.ndarray:
    """Bin edges (s): one sample wide for 40 samples around the edge, then logarithmic."""
    t_end = float(t[-1])
    lin = np.arange(-5, 40) * dt
    start = 40 * dt
    if dt >= SLOW_DT:  # a slow capture: its first microseconds hold the filtered edge and
        lin, start = np.array([]), SLOW_START_S  # the bounce, which the fast one resolves
    logb = np.geomspace(start, t_end, 110)
    return np.unique(np.concatenate([lin, logb]))


def _before_break(t: np.ndarray, i: np.ndarray, noise: float) -> np.ndarray:
    """Mask of each event's samples before its first contact break (a bounce): the first
    sample after the edge where the current falls below a fifth of the events' upper
    quartile there while that quartile stands well above the noise. A bounced event is
    delayed after its break, so nothing after it describes the source's own decay."""
    ref = np.percentile(i, 75, axis=0)
    low = (np.abs(i) < 0.2 * np.abs(ref)) & (np.abs(ref) > 10 * noise + 1e-9) & (t > 10e-9)
    first = np.where(low.any(axis=1), low.argmax(axis=1), t.size)
    return np.arange(t.size)[None, :] < first[:, None]


def _dataset(
    run: Path, manifest: Mapping[str, Any], rows: pd.DataFrame, load: str, capture: str
) -> DataSet | None:
    sel = rows[(rows["load"] == load) & (rows["capture"] == capture)]
    if not len(sel):
        return None
    t, i = stack_waveforms(run, sel)
    dt = float(t[1] - t[0])
    n_pre = int(np.searchsorted(t, -5 * dt))  # samples before the edge: t < -5 dt
    if n_pre:
        base = np.median(i[:, :n_pre], axis=1)
        i -= base[:, None]  # our own stacked copy: in place (a record is millions of samples)
        noise = float(np.median(np.std(i[:, :n_pre], axis=1)))
    else:
        noise = 0.0
    edges = _bins(t, dt)
    k = np.unique(np.clip(np.searchsorted(t, edges), 0, t.size))
    k0, k1 = k[:-1], k[1:]
    n_b = k1 - k0  # no empty bins: k strictly increases
    # sums over the bins only, one pass (np.add.reduceat) over the span they cover
    span = slice(int(k[0]), int(k[-1]))
    sums = np.add.reduceat(i[:, span], k0 - k[0], axis=1)
    tb = np.add.reduceat(t[span], k0 - k[0]) / n_b
    if dt < SLOW_DT:
        valid = _before_break(t, i, noise)[:, span]
        # valid over the whole bin (counted as integers: a sum of booleans is their "or")
        full = np.add.reduceat(valid, k0 - k[0], axis=1, dtype=np.intp) == n_b
    else:
        full = np.ones(sums.shape, dtype=bool)
    ev = np.where(full, sums / n_b, np.nan)
    n_ok = full.sum(axis=0)
    keep = n_ok >= 3
    ev, tb, n_ok, n_b = ev[:, keep], tb[keep], n_ok[keep], n_b[keep]
    med = np.nanmedian(ev, axis=0)
    mad = 1.4826 * np.nanmedian(np.abs(ev - med), axis=0)
    sig = np.sqrt(
        (1.2533 * mad / np.sqrt(n_ok)) ** 2  # standard error of a median: 1.2533 s/sqrt(n)
        + (REL_FLOOR * med) ** 2
        + noise**2 / (n_b * n_ok)
    )
    sig = np.maximum(sig, 1e-12)
    settings = _capture_settings(manifest, capture)
    ohms, henry = path_of_load(manifest, load, float(sel["load_ohms"].iloc[0]))
    bw = settings.get("bandwidth_hz")
    # trapezoid rule on the uniform grid from the trigger on, without a copy of the records
    j = int(np.searchsorted(t, 0.0))
    charges = dt * (i[:, j:].sum(axis=1) - 0.5 * (i[:, j] + i[:, -1]))
    # charge from each of a few log-spaced times to the end: one pass of segment sums
    m = np.unique(np.searchsorted(t, np.geomspace(max(10 * dt, 1e-7), t[-1], 48)))
    m = m[m < t.size]
    tails = dt * np.cumsum(np.add.reduceat(i[:, m[0] :], m - m[0], axis=1)[:, ::-1], axis=1)
    return DataSet(
        load,
        capture,
        tb,
        med,
        sig,
        ohms,
        henry,
        float(bw) if bw else None,
        float(settings.get("trigger_level_amps", 0.2)),
        np.maximum(i.max(axis=1), -i.min(axis=1)),
        charges,
        float(t[-1]),
        dt,
        noise,
        t[m],
        tails[:, ::-1],
    )


def collect(run_dir: str | Path, loads: list[str], **keys: Any) -> tuple[list[DataSet], float]:
    """Data sets of the events matching ``keys`` (meter, mode, volts, delay_s...) into each of
    ``loads``, every capture; and their mean ``charged_volts`` (else the setpoint)."""
    run = Path(run_dir)
    manifest = read_manifest(run)
    df = load_run(run)
    sel = df["status"] == "captured"
    for col, want in keys.items():
        sel &= np.isclose(df[col], want) if isinstance(want, float) else df[col] == want
    rows = df[sel & df["load"].isin(loads)]
    if rows.empty:
        raise RunFolderError(f"{run}: no captured events for {keys} into {loads}")
    missing = set(loads) - set(rows["load"])
    if missing:
        raise RunFolderError(f"{run}: no captured events into {sorted(missing)} for {keys}")
    volts = pd.to_numeric(rows.get("charged_volts"), errors="coerce")
    v0 = float(volts.mean()) if volts.notna().any() else float(rows["volts"].mean())
    sets = []
    for load in loads:
        for cap in sorted(rows.loc[rows["load"] == load, "capture"].unique()):
            ds = _dataset(run, manifest, rows, load, str(cap))
            if ds is not None:
                sets.append(ds)
    return sets, v0


_TF = np.concatenate([[0.0], np.geomspace(1e-12, 2e-5, 240)])  # where the trigger is sought


def _models(thetas: np.ndarray, shifts: np.ndarray, v0: float, ds: DataSet) -> np.ndarray:
    """The model of ``ds`` (batch x bins) for parameter rows ``thetas`` (batch x p) and
    trigger shifts (batch,). Time zero is the model's own trigger instant: where its
    (filtered) current first crosses the level, plus ``shift`` sample intervals (the scope
    triggers on a sample at or after it)."""
    amp, lam = response_modes(thetas, v0, ds.ohms, ds.henry, ds.pole_hz)
    yf = modes_at(amp, lam, _TF)
    above = yf >= ds.trigger_amps
    j = np.where(above.any(axis=1), above.argmax(axis=1), 0)
    rows = np.arange(len(yf))
    jm = np.maximum(j - 1, 0)
    y0, y1 = yf[rows, jm], yf[rows, j]
    with np.errstate(divide="ignore", invalid="ignore"):
        frac = (ds.trigger_amps - y0) / (y1 - y0)
    t_trig = np.where(j > 0, _TF[jm] + frac * (_TF[j] - _TF[jm]), 0.0)
    t_trig = t_trig + np.asarray(shifts) * ds.dt
    return modes_at(amp, lam, ds.t[None, :] + t_trig[:, None])


def _split(full: np.ndarray, nd: int) -> tuple[np.ndarray, np.ndarray]:
    return full[:-nd], full[-nd:]


def _residuals(full: np.ndarray, v0: float, sets: list[DataSet]) -> np.ndarray:
    theta, shifts = _split(full, len(sets))
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        r = np.concatenate(
            [
                (_models(theta[None], shifts[d : d + 1], v0, ds)[0] - ds.y) / ds.sigma
                for d, ds in enumerate(sets)
            ]
        )
    # a trial step whose model is not finite is a very bad fit, not an error: the fit steps back
    return np.where(np.isfinite(r), r, 1e6)


def _jacobian(
    full: np.ndarray, v0: float, sets: list[DataSet], lo: np.ndarray, hi: np.ndarray
) -> np.ndarray:
    """Forward-difference Jacobian of :func:`_residuals`, the steps scipy's ``2-point``
    scheme takes (sqrt(eps) max(1, |x|), backward where the bound is near), with every
    data set's steps evaluated as one batch (one batched eigen-decomposition instead of one
    per parameter)."""
    nd = len(sets)
    theta, shifts = _split(full, nd)
    h = np.sqrt(np.finfo(float).eps) * np.maximum(1.0, np.abs(full)) * np.where(full < 0, -1, 1)
    h = np.where((full + h > hi) | (full + h < lo), -h, h)
    h = (full + h) - full
    npar = theta.size
    blocks = []
    for d, ds in enumerate(sets):
        # rows: the point, each source parameter stepped, this set's trigger shift stepped
        th = np.repeat(theta[None], npar + 2, axis=0)
        th[1 : npar + 1] += np.diag(h[:npar])
        sh = np.full(npar + 2, shifts[d])
        sh[-1] += h[npar + d]
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            r = (_models(th, sh, v0, ds) - ds.y) / ds.sigma
        r = np.where(np.isfinite(r), r, 1e6)
        J = np.zeros((ds.t.size, full.size))
        J[:, :npar] = ((r[1 : npar + 1] - r[0]) / h[:npar, None]).T
        J[:, npar + d] = (r[-1] - r[0]) / h[npar + d]
        blocks.append(J)
    return np.vstack(blocks)


def _starts(v0: float, sets: list[DataSet], order: int) -> list[np.ndarray]:
    fast = max(sets, key=lambda d: d.y.max() / (d.ohms + 1.0))
    r_fast = max(v0 / max(float(np.max(fast.peaks)), 1e-9) - fast.ohms, 1.0)
    slow = max(sets, key=lambda d: d.t[-1])
    q = float(np.median(slow.charges))
    tau_slow = max(q / max(float(np.interp(slow.t[-1] * 0.02, slow.t, slow.y)), 1e-12), 1e-6)
    out = []
    for tau_fast in (5e-9, 2e-8):
        taus = np.geomspace(tau_fast, tau_slow, order) if order > 1 else np.array([tau_slow])
        rs = (
            np.geomspace(r_fast, 2.0 * v0 * tau_slow / q, order)
            if order > 1
            else np.array([v0 * tau_slow / q])
        )
        th = [math.log(20e-9)]
        for r, tau in zip(rs, taus, strict=True):
            th += [math.log(r), math.log(tau / (r + fast.ohms))]
        out.append(np.array(th))
    return out


def fit_source(sets: list[DataSet], v0: float, max_order: int = MAX_ORDER) -> FosterSource:
    """Fit the source (see the module docstring); the data choose the branch count."""
    # scipy.optimize takes ~0.3 s to import; imported here so that importing rig.analysis
    # (as `rig report` does) does not pay for it
    from scipy.optimize import least_squares

    n = sum(d.t.size for d in sets)
    best: tuple[float, Any, int] | None = None
    fits = {}
    nd = len(sets)
    for order in range(1, max_order + 1):
        starts = _starts(v0, sets, order)
        # a fresh start while the grown fits are few; then growing the previous fit suffices
        cands = [np.concatenate([c, np.full(nd, 0.5)]) for c in starts[: int(order <= 2)]]
        if order - 1 in fits:  # grow the previous fit by one branch (fast end, then slow)
            prev = fits[order - 1].x
            th, sh = prev[:-nd], prev[-nd:]
            cands.append(np.concatenate([th[:1], starts[0][1:3], th[1:], sh]))
            cands.append(np.concatenate([th, starts[0][-2:] + [0.0, 0.7], sh]))
        lo = np.full(1 + 2 * order + nd, -np.inf)
        hi = np.full(1 + 2 * order + nd, np.inf)
        lo[0], hi[0] = math.log(1e-11), math.log(1e-5)  # series inductance, H
        lo[-nd:], hi[-nd:] = -0.5, 1.5  # trigger sample after the crossing, in intervals
        sols = [
            least_squares(
                _residuals,
                np.clip(c, lo + 1e-9, hi - 1e-9),
                jac=lambda x, *_, lo=lo, hi=hi: _jacobian(x, v0, sets, lo, hi),
                args=(v0, sets),
                method="trf",
                bounds=(lo, hi),
                max_nfev=100,
                ftol=1e-6,
                xtol=1e-6,
            )
            for c in cands
        ]
        sol = min(sols, key=lambda s: s.cost)
        fits[order] = sol
        bic = 2 * sol.cost + sol.x.size * math.log(n)
        if best is not None and bic >= best[0]:
            break  # one more branch did not pay for itself: neither will two
        best = (bic, sol, order)
    assert best is not None
    _, sol, order = best
    dof = max(n - sol.x.size, 1)
    chi2 = 2 * sol.cost / dof
    J = sol.jac
    cov = np.linalg.pinv(J.T @ J) * max(chi2, 1.0)
    theta = sol.x[: -len(sets)]
    src = FosterSource(v0, 1.0, (1.0,) * order, (1.0,) * order).with_theta(theta)
    # covariance of the source parameters (trigger shifts marginalised), in sorted order
    perm = _sorted_perm(theta)
    cov = cov[np.ix_(perm, perm)]
    spread, misfit = _spreads(src, sets)
    info = {
        "order": order,
        "chi2_reduced": float(chi2),
        "bins": n,
        "loads": sorted({d.load for d in sets}),
    }
    return FosterSource(
        src.volts,
        src.henry,
        src.ohms,
        src.farads,
        tuple(map(tuple, cov.tolist())),
        spread,
        misfit,
        info,
    )


def _sorted_perm(theta: np.ndarray) -> list[int]:
    r, c = np.exp(theta[1::2]), np.exp(theta[2::2])
    k = np.argsort(r * c)
    perm = [0]
    for j in k:
        perm += [1 + 2 * int(j), 2 + 2 * int(j)]
    return perm


def _spreads(src: FosterSource, sets: list[DataSet]) -> tuple[dict[str, float], dict[str, float]]:
    """Relative event spread and fit misfit of peak (finest capture) and charge
    (:func:`_event_charge`), the largest over the loads."""
    th = src.theta
    spread: dict[str, float] = {"peak": 0.0, "charge": 0.0}
    misfit: dict[str, float] = {"peak": 0.0, "charge": 0.0}
    for load in {d.load for d in sets}:
        mine = [d for d in sets if d.load == load]
        fine = min(mine, key=lambda d: d.dt)
        long = max(mine, key=lambda d: d.record_after_s)
        spread["peak"] = max(spread["peak"], _rel_sd(fine.peaks))
        tt = np.linspace(0, 2e-6, 20001)
        pk = float(
            np.abs(linear_current(th, src.volts, fine.ohms, fine.henry, tt, fine.pole_hz)).max()
        )
        misfit["peak"] = max(misfit["peak"], abs(pk / np.median(fine.peaks) - 1))
        q_med, q_sd = _event_charge(fine, long)
        spread["charge"] = max(spread["charge"], q_sd / abs(q_med) if q_med else 0.0)
        q = _model_charge(th, src.volts, long)
        misfit["charge"] = max(misfit["charge"], abs(q / q_med - 1) if q_med else 0.0)
    return spread, misfit


def _event_charge(fine: DataSet, long: DataSet) -> tuple[float, float]:
    """(median, standard deviation) in C of the events' own charge over the long record.

    With a finer capture beside the long one, the charge up to the fine record's end comes
    from it and the rest from the long one (medians and variances added: the captures are
    separate events): a coarse capture undersamples a fast spike at the edge, so its
    charge there depends on where the samples fall. From the long capture's variance goes
    the scope's noise integrated over the span, sigma^2 dt^2 N (white noise; any
    measurement text), which is the capture's and not the discharge's. Standard deviations
    are the robust 1.4826 MAD."""
    t_split = fine.record_after_s if fine is not long and long.tail_t.size else 0.0
    if t_split > 0 and t_split < long.record_after_s:
        late = np.array([np.interp(t_split, long.tail_t, q) for q in long.tails])
        early = fine.charges
        var_e = _sd(early) ** 2 - _noise_var(fine, 0.0)
        med = float(np.median(early) + np.median(late))
    else:
        late, var_e, med = long.charges, 0.0, float(np.median(long.charges))
    var_l = _sd(late) ** 2 - _noise_var(long, t_split)
    return med, float(np.sqrt(max(var_e, 0.0) + max(var_l, 0.0)))


def _noise_var(ds: DataSet, t_from: float) -> float:
    """Variance (C^2) of the noise integrated from ``t_from`` to the record's end."""
    n = max(ds.record_after_s - t_from, 0.0) / ds.dt
    return (ds.noise * ds.dt) ** 2 * n


def _model_charge(theta: np.ndarray, v0: float, ds: DataSet) -> float:
    t = np.concatenate([[0.0], np.geomspace(1e-12, ds.record_after_s, 4000)])
    return float(np.trapezoid(linear_current(theta, v0, ds.ohms, ds.henry, t), t))


def _sd(x: np.ndarray) -> float:
    x = np.asarray(x, dtype=float)
    return float(1.4826 * np.median(np.abs(x - np.median(x)))) if x.size >= 2 else 0.0


def _rel_sd(x: np.ndarray) -> float:
    x = np.asarray(x, dtype=float)
    if x.size < 2 or np.median(x) == 0:
        return 0.0
    return float(1.4826 * np.median(np.abs(x - np.median(x))) / abs(np.median(x)))


def identify(run_dir: str | Path, loads: list[str], **keys: Any) -> FosterSource:
    """Identify the source of one meter/mode/volts group from its events into ``loads``
    (at least two); ``keys`` select the group (``meter``, ``mode``, ``volts``, ...)."""
    if len(set(loads)) < 2:
        raise ValueError("identification needs events into at least two different loads")
    sets, v0 = collect(run_dir, list(loads), **keys)
    src = fit_source(sets, v0)
    info = {**src.info, "run": str(run_dir), **{k: v for k, v in keys.items()}}
    return FosterSource(
        src.volts, src.henry, src.ohms, src.farads, src.cov, src.spread, src.misfit, info
    )
