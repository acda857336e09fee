"""Benchmark of the waveform files (run by hand: python tests/perf/bench_waveform_store.py).

Prints, per format, the bytes per event, the write time per event (atomic: temporary name,
fsync, rename, then the SHA-256 the journal records, as rig.store.runfolder does) and the read
time per event, for today's compressed Zarr v3 zip against the ``.npz`` of earlier runs.
Targets (issue 14): at least 2x smaller than ``.npz`` at no more than 15 ms per event.

The events are shaped like the demo's (both scope captures of every event: 2 x 20,000 and
2 x 275,000 int16 samples, current and voltage channels, noise of 4 and 15 codes rms as in
the demo's stored records), or taken from a run folder with ``--run DIR`` (its first
``--events`` waveform files). Options: --events (default 40 per capture).
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np

from rig.store.waveform import WAVEFORM_SUFFIX, Waveform, load_waveform, save_waveform

# the demo's scaling (16-bit scope, 80 A and 2200 V full scale)
GAIN = np.array([80.0 / 65536, 2200.0 / 65536])
OFFSET = np.array([20.0, 0.0])
CAPTURES = {"peak": (1e-9, 20_000, -2e-6), "charge": (2e-7, 275_000, -5e-3)}


def synthetic(capture: str, rng: np.random.Generator) -> Waveform:
    """One invented event: a fast spike plus a slow RC tail in current, the input voltage
    falling from the charge level, both with the demo's noise."""
    dt, n, t0 = CAPTURES[capture]
    t = t0 + dt * np.arange(n)
    on = t >= 0
    ts = np.where(on, t, 0.0)
    amp = rng.uniform(20, 35)
    i = on * (amp * (np.exp(-ts / 30e-9) - np.exp(-ts / 3e-9)) + 0.5 * np.exp(-ts / 2e-3))
    v = np.where(on, 494.0 * np.exp(-ts / 2e-3), 494.0)
    ci = np.round((i - OFFSET[0]) / GAIN[0] + rng.normal(0, 4.2, n))
    cv = np.round((v - OFFSET[1]) / GAIN[1] + rng.normal(0, 14.5, n))
    return Waveform(
        codes=np.stack([ci, cv]).clip(-32768, 32767).astype(np.int16),
        gain=GAIN.copy(),
        offset=OFFSET.copy(),
        code_min=np.array([-32768, -32768]),
        code_max=np.array([32767, 32767]),
        dt=dt,
        t0=t0,
        channels=("current", "voltage"),
        units=("A", "V"),
    )


def measure(events: list[Waveform], suffix: str, folder: Path) -> tuple[float, float, float]:
    """(bytes per event, write s per event, read s per event) for one format."""
    save_waveform(folder / f"warm{suffix}", events[0])  # first call loads codecs
    load_waveform(folder / f"warm{suffix}")
    size = t_write = t_read = 0.0
    for k, wf in enumerate(events):
        path = folder / f"e{k:06d}{suffix}"
        t = time.perf_counter()
        save_waveform(path, wf)
        t_write += time.perf_counter() - t
        size += path.stat().st_size
        t = time.perf_counter()
        back = load_waveform(path)
        t_read += time.perf_counter() - t
        assert np.array_equal(back.codes, wf.codes)
    m = len(events)
    return size / m, t_write / m, t_read / m


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--events", type=int, default=40, help="events per capture")
    ap.add_argument("--run", type=Path, help="measure this run folder's waveform files")
    args = ap.parse_args()
    rng = np.random.default_rng(14)
    if args.run:
        files = sorted((args.run / "waveforms").iterdir())[: args.events]
        sets = {"run": [load_waveform(f) for f in files]}
    else:
        sets = {c: [synthetic(c, rng) for _ in range(args.events)] for c in CAPTURES}
        sets["both"] = [wf for pair in zip(*sets.values(), strict=True) for wf in pair]
    print(
        f"{'events':>8} {'format':>10} {'bytes/event':>12} {'ratio':>6} "
        f"{'write ms':>9} {'read ms':>8}"
    )
    for name, events in sets.items():
        with tempfile.TemporaryDirectory() as tmp:
            npz = measure(events, ".npz", Path(tmp))
            new = measure(events, WAVEFORM_SUFFIX, Path(tmp))
        for fmt, (b, w, r) in ((".npz", npz), (WAVEFORM_SUFFIX, new)):
            print(f"{name:>8} {fmt:>10} {b:12.0f} {npz[0] / b:6.2f} {1e3 * w:9.2f} {1e3 * r:8.2f}")
    print("target: ratio >= 2.0 at write <= 15 ms per event")


if __name__ == "__main__":
    main()
