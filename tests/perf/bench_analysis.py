"""Benchmark of the vectorised per-event metrics (run by hand: python tests/perf/bench_analysis.py).

Prints, for 10,000 events x 20,000 int8 samples:
- the time of the full metrics (rig.analysis.metrics.event_metrics) and of one numpy pass over the same
  array (convert to float32 and take the absolute maximum per row, chunk by chunk like the
  metrics), and their ratio (target: 5 or less);
- the speed-up over a naive per-event loop with scipy (find_peaks and curve_fit) on 200 events
  (target: 50x or more);
- the peak memory of the metrics call traced by tracemalloc, against the raw data
  (target: raw data + working memory under twice the raw data).
Options: --events, --samples for a smaller run.

With --run RUN_FOLDER (e.g. one made by `rig demo`), it prints instead, for that run:
- the wall and CPU time of `rig analyze RUN --full`'s metric step (compute_metrics), per
  capture, and the share of it spent in the whole-charge tail fit;
- the live display's cost per event (LiveDisplay.committed, quiet, in journal order), per
  capture, with the tail's time constants reused within a group (as the run does) and
  with the full fit on every event (as it did before), and the largest difference of the
  live charge medians between the two.
"""

from __future__ import annotations

import argparse
import contextlib
import time
import tracemalloc
from pathlib import Path

import numpy as np
from scipy.optimize import curve_fit
from scipy.signal import find_peaks

from rig.analysis.metrics import event_metrics

DT = 1e-9  # s per sample (1 GS/s)
PRE = 0.1  # pre-trigger share of the record
GAIN = 0.05  # A per code


def make_events(m: int, n: int, rng: np.random.Generator, chunk: int = 500) -> np.ndarray:
    """Invented discharge records as int8 codes: a fast edge, an exponential tail (tau from
    0.3 to 3 us), contact bounce (a second, smaller pulse) in a fifth of the events, noise."""
    codes = np.empty((m, n), dtype=np.int8)
    k = np.arange(n) - int(PRE * n)
    for a in range(0, m, chunk):
        b = min(m, a + chunk)
        r = b - a
        amp = rng.uniform(40, 120, (r, 1))
        tau = rng.uniform(300, 3000, (r, 1))
        x = np.where(k > 0, amp * (np.exp(-k / tau) - np.exp(-k / 4.0)), 0.0)
        bounce = rng.random(r) < 0.2
        kb = k - rng.integers(200, 2000, r)[:, None]
        kb = np.maximum(kb, 0)
        x[bounce] += np.where(kb > 0, 0.5 * amp * (np.exp(-kb / tau) - np.exp(-kb / 4.0)), 0.0)[
            bounce
        ]
        x[bounce] *= np.where((k > 150) & (k < 190), 0.0, 1.0)  # the break before the bounce
        x += rng.normal(0.0, 1.5, (r, n))
        codes[a:b] = np.clip(np.round(x), -128, 127).astype(np.int8)
    return codes


def one_pass(codes: np.ndarray, chunk_bytes: int = 16 << 20) -> np.ndarray:
    """Reference: convert to float32 and take the absolute maximum per row, chunk-wise."""
    m, n = codes.shape
    rows = max(1, chunk_bytes // (4 * n))
    out = np.empty(m, dtype=np.float32)
    for a in range(0, m, rows):
        out[a : a + rows] = np.abs(codes[a : a + rows].astype(np.float32)).max(axis=1)
    return out


def naive(codes: np.ndarray) -> list[dict[str, float]]:
    """What one would write event by event: scipy find_peaks for the pulses, curve_fit for
    the tail, Python loops for the crossings."""
    n = codes.shape[1]
    t = (np.arange(n) - int(PRE * n)) * DT
    res = []
    for row in codes:
        i = row.astype(np.float64) * GAIN
        pre = i[: int(PRE * n) * 9 // 10]
        base = np.median(pre)
        noise = 1.4826 * np.median(np.abs(pre - base))
        i = i - base
        p = int(np.argmax(np.abs(i)))
        sign = np.sign(i[p])
        y = i * sign
        ip = y[p]
        peaks, _ = find_peaks(y, height=0.25 * ip, prominence=0.25 * ip)
        k10 = next(k for k in range(p, -1, -1) if y[k] < 0.1 * ip)
        k90 = next(k for k in range(p, -1, -1) if y[k] < 0.9 * ip)
        k37 = next((k for k in range(p, n) if y[k] < np.exp(-1) * ip), n - 1)
        tail = slice(p, n)
        try:
            (a, tau), _ = curve_fit(
                lambda tt, a, tau: a * np.exp(-tt / tau),
                t[tail] - t[p],
                y[tail],
                p0=(ip, max(t[k37] - t[p], DT)),
            )
        except RuntimeError:
            tau = np.nan
        res.append(
            {
                "peak": sign * ip,
                "rise": t[k90] - t[k10],
                "decay": t[k37] - t[p],
                "tau": tau,
                "charge": sign * np.trapezoid(y, t),
                "energy": np.trapezoid(y * y, t),
                "pulses": len(peaks),
                "noise": noise,
            }
        )
    return res


def bench_run(run: Path) -> None:
    """Figures of one run folder: the metric step per capture and the live display."""
    import io
    from types import SimpleNamespace

    from rich.console import Console

    from rig.analysis import wholecharge
    from rig.analysis.analyze import compute_metrics
    from rig.runner import display as live
    from rig.store.waveform import load_waveform

    fit_time = [0.0]
    fit = wholecharge.fit_tail_terms

    def timed_fit(*a: object, **k: object) -> object:
        t = time.process_time()
        try:
            return fit(*a, **k)
        finally:
            fit_time[0] += time.process_time() - t

    import rig.analysis.metrics as metrics_mod

    metrics_mod.fit_tail_terms = timed_fit
    w0, c0 = time.perf_counter(), time.process_time()
    table = compute_metrics(run)
    wall, cpu = time.perf_counter() - w0, time.process_time() - c0
    metrics_mod.fit_tail_terms = fit
    n = len(table)
    print(f"run: {run.name}, {n} events")
    print(
        f"metric step (compute_metrics): {wall:.2f} s wall, {cpu:.2f} s CPU; "
        f"tail fit {fit_time[0]:.2f} s CPU ({fit_time[0] / cpu:.0%})"
    )

    rows = table.sort_values("event")
    captures = sorted(rows["capture"].astype(str).unique())
    spans = rows.groupby("capture")["record_s"].median()
    charge = frozenset({str(spans.idxmax())}) if len(captures) > 1 else frozenset()
    events = [
        (r, load_waveform(run / r["file"]))
        for r in rows.to_dict("records")
        if isinstance(r["file"], str) and r["file"]
    ]
    for label, reuse in (("time constants reused (now)", True), ("full fit every event", False)):
        plan = SimpleNamespace(events=[None] * len(events))
        console = Console(file=io.StringIO(), force_terminal=False)
        disp = live.LiveDisplay(plan, quiet=True, console=console, charge_captures=charge)
        per: dict[str, list[float]] = {c: [] for c in captures}
        with disp, contextlib.redirect_stderr(io.StringIO()):  # its quiet log lines
            for r, wf in events:
                t = time.process_time()
                disp.committed(r, wf)
                per[str(r["capture"])].append(time.process_time() - t)
                if not reuse:
                    for g in disp.groups.values():
                        g.taus = None
        figures = ", ".join(f"{c} {np.mean(v) * 1e3:.2f} ms" for c, v in per.items())
        every = np.mean([x for v in per.values() for x in v]) * 1e3
        print(f"live display per event, {label}: {every:.2f} ms ({figures})")
        medians = {k: g.values.median() for k, g in disp.groups.items() if k[2] in charge}
        if reuse:
            reused = medians
        else:
            worst = max((abs(reused[k] / v - 1.0) for k, v in medians.items() if v), default=0.0)
            print(f"largest difference of a live charge median between the two: {worst:.1e}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--events", type=int, default=10_000)
    ap.add_argument("--samples", type=int, default=20_000)
    ap.add_argument("--naive-events", type=int, default=200)
    ap.add_argument("--run", type=Path, default=None, help="a run folder: its own figures")
    args = ap.parse_args()
    if args.run is not None:
        bench_run(args.run)
        return
    rng = np.random.default_rng(20261201)
    codes = make_events(args.events, args.samples, rng)
    raw_mb = codes.nbytes / 1e6
    kw = dict(
        dt=DT,
        t0=-PRE * args.samples * DT,
        gain=GAIN,
        code_min=-128,
        code_max=127,
        charge_volts=500.0,
        load_ohms=10.0,
    )

    one_pass(codes[:100])  # warm-up
    event_metrics(codes[:100], **kw)
    t_pass = t_full = np.inf
    for _ in range(3):  # best of three, alternating, so both see the same machine load
        t1 = time.perf_counter()
        one_pass(codes)
        t2 = time.perf_counter()
        event_metrics(codes, **kw)
        t3 = time.perf_counter()
        t_pass, t_full = min(t_pass, t2 - t1), min(t_full, t3 - t2)

    tracemalloc.start()
    base_mem = tracemalloc.get_traced_memory()[0]
    res = event_metrics(codes, **kw)
    peak_mem = tracemalloc.get_traced_memory()[1] - base_mem
    tracemalloc.stop()

    sub = codes[: args.naive_events]
    t4 = time.perf_counter()
    naive(sub)
    t5 = time.perf_counter()
    t_vec_sub = np.inf
    for _ in range(3):
        t6 = time.perf_counter()
        event_metrics(sub, **kw)
        t_vec_sub = min(t_vec_sub, time.perf_counter() - t6)
    per_naive = (t5 - t4) / len(sub)
    per_vec = t_full / len(codes)

    print(f"data: {args.events} events x {args.samples} int8 samples = {raw_mb:.0f} MB")
    print(f"full metrics:        {t_full:8.3f} s  ({per_vec * 1e6:.1f} us/event)")
    print(f"one numpy pass:      {t_pass:8.3f} s  (float32 conversion + abs max per row)")
    print(f"ratio:               {t_full / t_pass:8.2f}   (target <= 5)")
    print(f"naive scipy loop:    {per_naive * 1e3:8.2f} ms/event on {len(sub)} events")
    print(
        f"speed-up:            {per_naive / per_vec:8.0f} x (vs the full run's per-event time;"
        f" {per_naive * len(sub) / t_vec_sub:.0f} x vs the same {len(sub)} events vectorised)"
        "  (target >= 50)"
    )
    print(
        f"peak working memory: {peak_mem / 1e6:8.1f} MB (tracemalloc) = "
        f"{peak_mem / codes.nbytes:.2f} x raw; raw + working = "
        f"{(codes.nbytes + peak_mem) / codes.nbytes:.2f} x raw  (target < 2)"
    )
    flagged = int(res["flag_below_noise"].sum())
    print(f"sanity: {flagged} events below noise, pulses histogram {np.bincount(res['pulses'])}")


if __name__ == "__main__":
    main()
