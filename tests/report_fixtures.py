"""Synthetic analysed run folders for the report tests (invented meters, invented data).

:func:`build_run` writes everything the report reads, with the columns of DEVELOPERS.md
("Run folder" and "Analysis outputs"): ``manifest.json``, ``plan.json``, ``journal.jsonl``,
``waveforms/<event>.npz`` (through :func:`rig.store.waveform.save_waveform`), ``metrics.parquet``,
``groups.csv`` and ``selfdischarge.csv``. The waveforms follow a two-path discharge model
(a fast spike through the meter's protection capacitance plus a slow RC tail through its
input network, with contact-bounce re-strikes); the metrics are computed from the stored
waveforms with plain numpy, so the figures and the tables agree with each other. This is
fixture data for tests and benchmarks only; the real metrics come from rig.analysis.analyze.
"""

from __future__ import annotations

import itertools
import json
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
from scipy import stats

from rig.store.waveform import Waveform, save_waveform

__all__ = ["DEFAULT_METERS", "FakeMeter", "build_run"]

MODES = ("AC V", "AC mV", "DC V")
LOAD = ("short", 0.05)
DT = 5e-9  # s per sample
N_SAMPLES = 40_000  # 200 us record
T0 = -2e-6  # pre-trigger, s
RISE = 3e-9  # s, edge of the fast spike
NOISE_A = 2e-3  # rms noise of the current sense, A
LIMITS = {"abs_peak_a": 4.0, "charge_c": 45e-6}  # invented peak limit; IEC 61010-1 45 uC


@dataclass(frozen=True)
class FakeMeter:
    """An invented meter: fast path (protection parts) and slow path (input network) per mode."""

    name: str
    serial: str
    rating: str
    r_fast: float  # ohm
    c_fast: float  # F
    r_slow: float  # ohm
    c_mode: dict[str, float] = field(default_factory=dict)  # F, coupling capacitance per mode
    r_leak: float = 100e6  # ohm, self-discharge path


DEFAULT_METERS = (
    FakeMeter(
        "Candidate C",
        "DEMO-C-0001",
        "CAT III 600 V (fictitious)",
        120.0,
        200e-12,
        1.0e3,
        {"AC V": 33e-9, "AC mV": 39e-9, "DC V": 1e-9},
        100e6,
    ),
    FakeMeter(
        "Examplo DM-7",
        "DM7-4242",
        "CAT IV 600 V (fictitious)",
        220.0,
        470e-12,
        800.0,
        {"AC V": 22e-9, "AC mV": 15e-9, "DC V": 0.5e-9},
        60e6,
    ),
)


def _current(
    meter: FakeMeter,
    mode: str,
    volts: float,
    t: np.ndarray,
    restrikes,
    contact: float = 1.0,
    load_ohms: float = 0.0,
) -> np.ndarray:
    """Discharge current (A) of one event at times ``t`` (s), restrikes = [(t_k, fraction)];
    ``contact`` scales the fast path's resistance (probe and relay contact, per event); the
    load adds to both paths' resistance."""
    tp = np.clip(t, 0.0, None)
    on = t >= 0.0
    r_fast = meter.r_fast * contact + load_ohms
    r_slow = meter.r_slow + load_ohms
    tau_f = r_fast * meter.c_fast
    tau_s = r_slow * meter.c_mode[mode]
    i = volts / r_fast * np.exp(-tp / tau_f) * (1 - np.exp(-tp / RISE))
    i += volts / r_slow * np.exp(-tp / tau_s) * (1 - np.exp(-tp / (10 * RISE)))
    for tk, frac in restrikes:
        tk_ = np.clip(t - tk, 0.0, None)
        i += (t >= tk) * frac * volts / r_fast * np.exp(-tk_ / tau_f) * (1 - np.exp(-tk_ / RISE))
    return i * on


def _metrics(
    v: np.ndarray, t: np.ndarray, volts: float, clipped: bool, load_ohms: float, dt: float = DT
) -> dict[str, object]:
    """Per-event metrics of one decoded current trace (fixture arithmetic, not rig.analysis.analyze)."""
    pre = v[t < 0]
    base = float(pre.mean())
    noise = float(pre.std())
    y = v - base
    k = int(np.argmax(np.abs(y)))
    peak = float(y[k])
    pol = 1 if peak >= 0 else -1
    a = y * pol
    ap = abs(peak)

    def first(mask: np.ndarray, start: int = 0) -> int:
        idx = np.flatnonzero(mask[start:])
        return start + int(idx[0]) if idx.size else len(mask) - 1

    i10, i90 = first(a >= 0.1 * ap), first(a >= 0.9 * ap)
    i50a, i50b = first(a >= 0.5 * ap), first(a < 0.5 * ap, k)
    i37 = first(a < 0.368 * ap, k)
    post = t >= 0
    charge = float(a[post].sum() * dt)
    energy = float((a[post] ** 2).sum() * dt * load_ohms)
    return {
        "peak_a": peak,
        "abs_peak_a": ap,
        "polarity": pol,
        "t_peak_s": float(t[k]),
        "rise_s": float(t[i90] - t[i10]),
        "decay_s": float(t[i37] - t[k]),
        "fwhm_s": float(t[i50b] - t[i50a]),
        "charge_c": charge,
        "energy_j": energy,
        "c_equiv_f": charge / volts,
        "baseline_a": base,
        "noise_a": noise,
        "flag_clipped": clipped,
        "flag_not_captured": False,
        "flag_truncated": bool(np.abs(a[-200:]).mean() > 0.02 * ap),
        "flag_below_noise": bool(ap < 5 * noise),
        # HBM indicators: 100 pF / 1500 ohm network (ANSI/ESDA/JEDEC JS-001)
        "ind_hbm_volts": ap * 1500.0,
        "ind_hbm_charge_c": ap * 1500.0 * 100e-12,
        "ind_hbm_energy_j": 0.5 * 100e-12 * (ap * 1500.0) ** 2,
        "ind_iec61010_charge_ratio": charge / 45e-6,  # IEC 61010-1 stored-charge figure
    }


def _median_ci(x: np.ndarray, conf: float = 0.95) -> tuple[float, float]:
    """Distribution-free CI of the median from binomial order statistics."""
    x = np.sort(x)
    n = x.size
    if n < 2:
        return (float("nan"), float("nan"))
    lo = int(stats.binom.ppf((1 - conf) / 2, n, 0.5))
    hi = int(stats.binom.isf((1 - conf) / 2, n, 0.5))
    return float(x[max(lo - 1, 0)]), float(x[min(hi, n - 1)])


def _groups(metrics: pd.DataFrame) -> pd.DataFrame:
    keys = ["meter", "serial", "mode", "volts", "load", "delay_s"]
    if "capture" in metrics.columns:  # a run with scope captures: one group per capture
        keys.insert(3, "capture")
    names = ["abs_peak_a", "peak_a", "charge_c", "energy_j", "rise_s", "decay_s", "tau_s"]
    names += ["pulses"]
    rows = []
    for gk, g in metrics.groupby(keys, sort=True):
        for m in names:
            x = g[m].dropna().to_numpy(float)
            n = x.size
            # one-sided normal tolerance factor, exact noncentral-t form
            # (NIST/SEMATECH e-Handbook 7.2.6.3)
            k1 = (
                stats.nct.ppf(0.95, n - 1, stats.norm.ppf(0.99) * math.sqrt(n)) / math.sqrt(n)
                if n > 1
                else float("nan")
            )
            std = float(x.std(ddof=1)) if n > 1 else float("nan")
            lim = LIMITS.get(m, float("nan"))
            utl = float(x.mean() + k1 * std) if n > 1 else float("nan")
            lo, hi = _median_ci(x)
            verdict = "" if math.isnan(lim) else ("pass" if utl <= lim else "fail")
            rows.append(
                dict(zip(keys, gk, strict=True))
                | {
                    "metric": m,
                    "n_planned": len(g),
                    "n_captured": n,
                    "mean": float(x.mean()),
                    "std": std,
                    "median": float(np.median(x)),
                    "median_ci_low": lo,
                    "median_ci_high": hi,
                    "p95": float(np.percentile(x, 95)),
                    "p99": float(np.percentile(x, 99)),
                    "max": float(x.max()),
                    "utl": utl,
                    "utl_confidence": 0.95,
                    "utl_coverage": 0.99,
                    "limit": lim,
                    "share_over_limit": float((x > lim).mean())
                    if not math.isnan(lim)
                    else float("nan"),
                    "verdict": verdict,
                }
            )
    return pd.DataFrame(rows)


def build_run(
    root: str | Path,
    rng: np.random.Generator,
    *,
    run_id: str = "2026-12-01-120000-fictitious-qualification",
    meters: tuple[FakeMeter, ...] = DEFAULT_METERS,
    modes: tuple[str, ...] = MODES,
    loads: tuple[tuple[str, float], ...] = (LOAD,),
    volts: tuple[float, ...] = (300.0, 600.0),
    reps: int = 4,
    delays: tuple[float, ...] = (0.5, 1.0, 2.0, 5.0),
    operator_note: str = "Fictitious demo run for the report tests.",
    gain_scale: float = 1.0,
    captures: tuple[tuple[str, float, int, float], ...] | None = None,
) -> Path:
    """Write a synthetic analysed run folder ``root/run_id``; returns its path.

    ``reps`` events per (meter, mode, voltage) group at zero delay, plus a delay sweep (2 events
    per delay) at the highest voltage in the first of ``modes`` when ``delays`` is not empty. Two
    events are made faulty on purpose: one clips the scope, one is not captured.
    ``gain_scale`` multiplies every meter's currents (a repaired meter for a baseline test).
    ``captures``: (name, dt s, samples, t0 s) of each scope capture; every event is then run
    once per capture (rows gain ``capture``, ``dt_s`` and ``record_s``); None writes a run
    as recorded before captures existed (no such columns, one 200 us timebase).
    """
    run = Path(root) / run_id
    (run / "waveforms").mkdir(parents=True, exist_ok=True)
    timebase = {name: (dt, n, t0) for name, dt, n, t0 in captures or ()}
    plan: list[dict[str, object]] = []
    for m, mode, cap in itertools.product(meters, modes, list(timebase) or [None]):
        for load, v, r in itertools.product(loads, volts, range(reps)):
            plan.append(
                ({"capture": cap} if cap is not None else {})
                | {
                    "meter": m.name,
                    "serial": m.serial,
                    "mode": mode,
                    "volts": v,
                    "delay_s": 0.0,
                    "rep": r,
                    "load": load[0],
                    "load_ohms": load[1],
                }
            )
        if delays and mode == modes[0]:
            for d in delays:
                for r in range(2):
                    plan.append(
                        ({"capture": cap} if cap is not None else {})
                        | {
                            "meter": m.name,
                            "serial": m.serial,
                            "mode": mode,
                            "volts": max(volts),
                            "delay_s": d,
                            "rep": r,
                            "load": loads[0][0],
                            "load_ohms": loads[0][1],
                        }
                    )
    for i, p in enumerate(plan):
        p["event"] = i
        p["key"] = (
            f"{p['serial']}/{p['mode']}/{p['volts']:g}V/{p['load']}/{p['delay_s']:g}s/{p['rep']}"
        ) + (f"/{p['capture']}" if "capture" in p else "")
    by_name = {m.name: m for m in meters}
    clip_event, lost_event = 1, 6
    journal, rows = [], []
    for p in plan:
        m = by_name[str(p["meter"])]
        tau_leak = m.r_leak * m.c_mode[str(p["mode"])]
        v_eff = float(p["volts"]) * math.exp(-float(p["delay_s"]) / tau_leak) * gain_scale
        restrikes = [
            (rng.uniform(200e-9, 2e-6), rng.uniform(0.3, 0.7))
            for _ in range(int(rng.integers(0, 3)))
        ]
        ev = int(p["event"])
        rec = dict(p) | {
            "status": "captured",
            "file": f"waveforms/{ev:06d}.npz",
            "sha256": None,
            "time": f"2026-12-01T12:{ev // 60:02d}:{ev % 60:02d}Z",
            "supply_volts": float(p["volts"]) * (1 + rng.normal(0, 1e-3)),
            "residual_volts": abs(rng.normal(0.2, 0.05)),
        }
        if ev == lost_event:
            rec |= {"status": "not_captured", "file": None}
            journal.append(rec)
            rows.append(
                rec
                | {
                    "flag_not_captured": True,
                    "flag_clipped": False,
                    "flag_truncated": False,
                    "flag_below_noise": False,
                }
            )
            continue
        ohms = float(p["load_ohms"])
        dt, n_samples, t0 = timebase.get(str(p.get("capture")), (DT, N_SAMPLES, T0))
        t = t0 + dt * np.arange(n_samples)
        contact = rng.lognormal(0.0, 0.15)
        i = _current(m, str(p["mode"]), v_eff, t, restrikes, contact, ohms)
        i += rng.normal(0, NOISE_A, t.size)
        full_scale = 1.6 * v_eff * (1 / (m.r_fast + ohms) + 1 / (m.r_slow + ohms)) + 10 * NOISE_A
        if ev == clip_event:
            full_scale *= 0.25
        gain = full_scale / 32000
        codes = np.clip(np.round(i / gain), -32768, 32767).astype(np.int16)
        wf = Waveform(
            codes[None, :],
            np.array([gain]),
            np.array([0.0]),
            np.array([-32768]),
            np.array([32767]),
            dt,
            t0,
            ("current",),
            ("A",),
        )
        rec["sha256"] = save_waveform(run / str(rec["file"]), wf)
        journal.append(rec)
        clipped = bool(np.any(np.abs(codes) >= 32767))
        met = _metrics(wf.values("current"), t, float(p["volts"]), clipped, ohms, dt)
        if timebase:
            met |= {"dt_s": dt, "record_s": n_samples * dt}
        tau_s = (m.r_slow + ohms) * m.c_mode[str(p["mode"])] * (1 + rng.normal(0, 0.02))
        met |= {
            "pulses": 1 + len(restrikes),
            "tau_s": tau_s,
            "r_equiv_ohm": tau_s / max(float(met["c_equiv_f"]), 1e-30),
        }
        rows.append(rec | met)
    metrics = pd.DataFrame(rows)
    metrics.to_parquet(run / "metrics.parquet", index=False)
    _groups(metrics).to_csv(run / "groups.csv", index=False)
    if delays:
        _selfdischarge(metrics, meters).to_csv(run / "selfdischarge.csv", index=False)
    with open(run / "journal.jsonl", "w", encoding="utf-8") as fh:
        for rec in journal:
            fh.write(json.dumps(rec) + "\n")
    (run / "plan.json").write_text(json.dumps(plan, indent=1), encoding="utf-8")
    (run / "manifest.json").write_text(
        json.dumps(_manifest(run_id, meters, modes, loads, volts, reps, operator_note), indent=1),
        encoding="utf-8",
    )
    return run


def _selfdischarge(metrics: pd.DataFrame, meters: tuple[FakeMeter, ...]) -> pd.DataFrame:
    """Fit q(d) = q0 exp(-d/tau) per (meter, mode, volts, load) with a delay sweep (log-linear)."""
    rows = []
    keys = ["meter", "serial", "mode", "volts", "load"]
    if "capture" in metrics.columns:
        keys.insert(3, "capture")
    for gk, g in metrics.dropna(subset=["charge_c"]).groupby(keys):
        if g["delay_s"].nunique() < 3:
            continue
        res = stats.linregress(g["delay_s"], np.log(g["charge_c"]))
        tau = -1.0 / res.slope
        dtau = tau**2 * res.stderr * 1.96
        q0 = math.exp(res.intercept)
        safe = 1e-6  # invented threshold for the fixture, C
        rows.append(
            dict(zip(keys, gk, strict=True))
            | {
                "tau_s": tau,
                "tau_ci_low": tau - dtau,
                "tau_ci_high": tau + dtau,
                "safe_charge_c": safe,
                "delay_to_safe_s": max(0.0, tau * math.log(q0 / safe)),
                "n_delays": int(g["delay_s"].nunique()),
            }
        )
    return pd.DataFrame(rows)


def _manifest(run_id, meters, modes, loads, volts, reps, note) -> dict[str, object]:
    """A manifest shaped like the one ``rig run`` writes: the resolved sequence and bench,
    the instruments' identities, host and software."""
    sim = {
        "role": "",
        "resource": "sim",
        "profile": "/x/drivers/profiles/scpi1999.toml",
        "timeout_s": 5.0,
        "control": "scpi",
    }
    return {
        "run_id": run_id,
        "sequence_file": "/lab/sequences/fictitious.toml",
        "bench_file": "/lab/sequences/benches/fictitious-bench.toml",
        "sequence": {
            "path": "sequences/fictitious.toml",
            "name": "fictitious qualification",
            "operator_note": note,
            "meters": [
                {
                    "model": m.name,
                    "serial": m.serial,
                    "rating": m.rating,
                    "modes": list(modes),
                    "sim_model": "/x/drivers/sim/meters/fictitious.toml",
                }
                for m in meters
            ],
            "volts": list(volts),
            "loads": [name for name, _ in loads],
            "repetitions": reps,
            "delays_s": [0.0],
            "scope": {"sample_interval_s": DT, "points": N_SAMPLES, "bits": 16},
            # the fixture's own groups.csv applies the same limits (LIMITS)
            "limits": [
                {
                    "metric": "peak_a",
                    "max": LIMITS["abs_peak_a"],
                    "statistic": "utl",
                    "modes": None,
                    "volts": None,
                    "loads": None,
                },
                {
                    "metric": "charge_c",
                    "max": LIMITS["charge_c"],
                    "statistic": "utl",
                    "modes": None,
                    "volts": None,
                    "loads": None,
                },
            ],
        },
        "bench": {
            "path": "sequences/benches/fictitious-bench.toml",
            "name": "simulated bench (fictitious)",
            "instruments": {r: sim | {"role": r} for r in ("supply", "switch", "scope", "meter")},
            "charge_ohms": 100e3,
            "loads": [
                {"name": name, "ohms": ohms, "henry": 2e-7, "channel": 4 + k}
                for k, (name, ohms) in enumerate(loads)
            ],
            "sense": {"kind": "shunt", "ohms": 0.1, "amps_per_volt": 1.0, "bandwidth_hz": None},
            "limits": {
                "max_volts": 1100.0,
                "safe_residual_volts": 1.0,
                "stored_charge_limit_c": 45e-6,
            },
            "simulation": {"clock": "virtual", "world": {"seed": 1, "wiring": {"loads": []}}},
        },
        "simulated": True,
        "instruments": {
            "supply": "FICTITIOUS,Simulated supply,0001,1.0",
            "switch": "FICTITIOUS,Simulated relay board,0002,1.0",
            "scope": "FICTITIOUS,Simulated scope,0003,1.0",
            "meter": "FICTIVE,DMM-SIM,SN0004,1.0",
        },
        "software": {
            "host": "bench-pc (fictitious)",
            "platform": "Linux",
            "python": "3.11",
            "rig": "0.1.0",
            "numpy": np.__version__,
        },
        "started": "2026-12-01T12:00:00Z",
        "ended": "2026-12-01T12:20:00Z",
        "status": "complete",
    }
