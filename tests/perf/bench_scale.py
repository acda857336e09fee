"""Benchmark: one run folder of 10,000 and of 100,000 events through analysis, report and the
dataset; and, with ``--run``, a ``rig run`` of 10,000 events on the simulated bench.

Run by hand: ``python tests/perf/bench_scale.py [--small 10000] [--large 100000] [--run N]``.

The events. A seed run on the simulated bench (demo meter A, AC V and DC V, 1000 V, into a
short, the bundled qualification's charge capture: 5 us mean samples x 26,000) gives real
records; each event of the big run is one of them with its discharge scaled by a seeded
factor (1 + 3 % x N(0, 1)) and fresh Gaussian noise of the record's own baseline noise,
written with the store's own writer (compressed record, journal line, fsync), so the folder
is what ``rig run`` would leave. Each step then runs in a fresh process (``python -m
rig.cli ...``) and reports its wall time and peak resident memory (``ru_maxrss`` of that
process, threads included; "worker MB" is the largest of the worker processes it forked, such
as the report's figure workers, which share the parent's pages until they write them):

- ``rig analyze`` (metrics.parquet and groups.csv from nothing), then again with nothing new;
- ``rig report`` (report.html, figures, certificate);
- ``rig catalog --dataset`` (build) and ``rig query`` (group statistics per unit).

It prints the figures for both sizes and the ratios large/small. Targets (issue): time
ratio <= 11 (linear in the events, with a little to spare), memory ratio <= 1.3 (flat).

``--run N``: ``rig run`` of N events (AC V, one capture) on the simulated bench with its
end-of-run analysis and report, wall time and peak memory (target: 10,000 events within
4 GB).
"""

from __future__ import annotations

import argparse
import json
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from rig.analysis.runs import load_event_waveform, load_run  # noqa: E402
from rig.store.runfolder import RunWriter, read_journal, read_manifest, read_plan  # noqa: E402
from rig.store.waveform import Waveform  # noqa: E402

BENCH = ROOT / "sequences" / "benches" / "sim-demo.toml"

SEED_SEQUENCE = """
[sequence]
name = "scale seed"
repetitions = {reps}
[[meters]]
model = "Candidate A"
serial = "SCALE-A-0001"
rating = "CAT III 1000 V (fictitious)"
modes = {modes}
sim_model = "demo-a"
[charge]
volts = [1000]
dwell_s = 0.5
[discharge]
loads = ["short"]
delays_s = [0]
[bleed]
hold_s = 0.5
[scope]
current_range_amps = 8
current_offset_amps = 2
trigger_level_amps = 0.2
trigger_slope = "POSitive"
bits = 16
coupling = "DC"
impedance_ohms = 50
acquisition_timeout_s = 2
[scope.captures.charge]
sample_interval_s = "5u"
points = 26000
trigger_offset_s = "-10m"
bandwidth_hz = "2M"
sampling = "mean"
"""

# the child process that runs one CLI command and reports its own time and peak memory
CHILD = """
import json, resource, sys, time
from rig.cli import main
t = time.perf_counter()
code = main(sys.argv[1:])
print("BENCH " + json.dumps({"code": code, "s": time.perf_counter() - t,
      "rss_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
      "worker_rss_mb": resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024}))
"""


def cli(*args: str) -> dict[str, float]:
    """Run ``rig <args>`` in a fresh process: {code, s, rss_mb}."""
    out = subprocess.run(
        [sys.executable, "-c", CHILD, *args],
        capture_output=True,
        text=True,
        cwd=ROOT,
        check=False,
    )
    lines = [ln for ln in out.stdout.splitlines() if ln.startswith("BENCH ")]
    if not lines:
        raise SystemExit(f"rig {' '.join(args)} failed:\n{out.stdout[-2000:]}{out.stderr[-2000:]}")
    return json.loads(lines[-1][6:])


def seed_run(tmp: Path, reps: int, modes: list[str]) -> Path:
    seq = tmp / "seed.toml"
    seq.write_text(SEED_SEQUENCE.format(reps=reps, modes=json.dumps(modes)))
    results = tmp / "seed-results"
    got = cli("run", str(seq), "--bench", str(BENCH), "--results", str(results), "--quiet")
    if got["code"] not in (0, 1):  # 1: a limit failed (none here), still a complete run
        raise SystemExit(f"seed run exited {got['code']}")
    (run,) = [p for p in results.iterdir() if p.is_dir()]
    return run


def replicate(seed: Path, dest: Path, events: int, rng: np.random.Generator) -> tuple[Path, float]:
    """A run folder of ``events`` events made from the seed's records; (folder, s per event)."""
    manifest = read_manifest(seed)
    plan = read_plan(seed)
    journal = {int(r["event"]): r for r in read_journal(seed)}
    df = load_run(seed)
    captured = df[df["status"] == "captured"]
    by_mode: dict[str, list[tuple[dict, Waveform]]] = {}
    for ev in captured["event"]:
        row = journal[int(ev)]
        by_mode.setdefault(row["mode"], []).append((row, load_event_waveform(seed, int(ev))))
    modes = sorted(by_mode)
    per_mode = events // len(modes)
    big_plan, sources = [], []
    for mode in modes:
        template = next(p for p in plan if p["mode"] == mode)
        for r in range(per_mode):
            big_plan.append({**template, "event": len(big_plan), "repetition": r})
            sources.append(mode)
    manifest = {k: v for k, v in manifest.items() if k not in ("run_id", "status", "ended")}
    writer = RunWriter.create(dest, f"scale-{events}", manifest, big_plan)
    t0 = time.perf_counter()
    with writer:
        for entry, mode in zip(big_plan, sources, strict=True):
            row, wf = by_mode[mode][int(rng.integers(len(by_mode[mode])))]
            k = wf.index("current")
            codes = wf.codes.copy()
            n_pre = int(np.floor(-wf.t0 / wf.dt))
            base = float(np.mean(codes[k, :n_pre]))
            noise = float(np.std(codes[k, :n_pre]))
            cur = (codes[k].astype(np.float64) - base) * (1.0 + 0.03 * rng.standard_normal())
            cur += base + rng.normal(0.0, noise, cur.size)
            codes[k] = np.clip(np.round(cur), wf.code_min[k], wf.code_max[k])
            new = Waveform(
                codes=codes,
                gain=wf.gain,
                offset=wf.offset,
                code_min=wf.code_min,
                code_max=wf.code_max,
                dt=wf.dt,
                t0=wf.t0,
                channels=wf.channels,
                units=wf.units,
            )
            out = {
                k2: v
                for k2, v in row.items()
                if k2 not in ("file", "sha256", "event", "repetition", "started", "ended")
            }
            writer.commit({**out, "event": entry["event"], "repetition": entry["repetition"]}, new)
        writer.update_manifest(status="complete")
    return writer.path, (time.perf_counter() - t0) / len(big_plan)


def generate(seed: Path, tmp: Path, events: int) -> tuple[Path, dict[str, float]]:
    """The run folder of ``events`` events and its writing figures; one kept from an earlier
    call in the same work folder is reused (``--keep``: generate once, measure again)."""
    results = tmp / f"results-{events}"
    note = tmp / f"write-{events}.json"
    run = results / f"scale-{events}"
    if note.exists() and run.is_dir():
        return run, json.loads(note.read_text())
    shutil.rmtree(results, ignore_errors=True)
    run, write_s = replicate(seed, results, events, np.random.default_rng(events))
    disk = sum(f.stat().st_size for f in run.rglob("*") if f.is_file())
    figures = {"s": write_s * events, "per_event_ms": write_s * 1e3, "disk_mb": disk / 1e6}
    note.write_text(json.dumps(figures))
    return run, figures


def measure(seed: Path, tmp: Path, events: int, keep: bool) -> dict[str, dict[str, float]]:
    run, figures = generate(seed, tmp, events)
    results = run.parent
    for pattern in ("metrics.parquet*", "groups.csv*", "report.html*", "certificate.pdf*"):
        for derived in run.glob(pattern):  # every measurement starts from nothing
            derived.unlink()
    shutil.rmtree(run / "figures", ignore_errors=True)
    got = {"write": figures}
    got["analyze"] = cli("analyze", str(run))
    got["analyze again"] = cli("analyze", str(run))
    got["report"] = cli("report", str(run))
    dataset = tmp / f"dataset-{events}"
    got["dataset build"] = cli("catalog", str(results), "--dataset", str(dataset))
    got["query"] = cli("query", str(dataset), "--metric", "charge_c", "--per", "unit")
    shutil.rmtree(dataset)
    if not keep:
        shutil.rmtree(run / "waveforms")  # keep the disk free for the next size
    return got


def rig_run(tmp: Path, events: int) -> dict[str, float]:
    seq = tmp / "run.toml"
    seq.write_text(SEED_SEQUENCE.format(reps=events, modes='["AC V"]'))
    return cli("run", str(seq), "--bench", str(BENCH), "--results", str(tmp / "run"), "--quiet")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--small", type=int, default=10_000)
    ap.add_argument("--large", type=int, default=100_000)
    ap.add_argument("--run", type=int, default=0, help="also rig run this many events")
    ap.add_argument("--keep", help="work in this folder and keep it (a rerun reuses its runs)")
    ap.add_argument("--generate-only", action="store_true", help="only write the run folders")
    args = ap.parse_args()
    tmp = Path(args.keep or tempfile.mkdtemp(prefix="bench-scale-"))
    tmp.mkdir(parents=True, exist_ok=True)
    print(f"work folder {tmp}", flush=True)
    if args.run:
        r = rig_run(tmp, args.run)
        print(
            f"rig run of {args.run} events (with analysis and report): {r['s']:.0f} s, "
            f"peak {r['rss_mb']:.0f} MB (target 4096 MB), exit {r['code']}",
            flush=True,
        )
    seeds = [p for p in (tmp / "seed-results").glob("*") if p.is_dir()]
    seed = seeds[0] if seeds else seed_run(tmp, 4, ["AC V", "DC V"])
    sizes = (args.small, args.large)
    if args.generate_only:
        for n in sizes:
            run, figures = generate(seed, tmp, n)
            print(f"{run}: {json.dumps(figures)}", flush=True)
        return
    res = {}
    for n in sizes:
        res[n] = measure(seed, tmp, n, bool(args.keep))
        print(f"{n} events done: {json.dumps(res[n])}", flush=True)
    small, large = (res[n] for n in sizes)
    print(f"\n{'step':16s} {'':>12s}{sizes[0]:>10d}{sizes[1]:>12d}   ratio")
    for step in small:
        for key, unit in (
            ("s", "s"),
            ("rss_mb", "MB"),
            ("worker_rss_mb", "worker MB"),
            ("per_event_ms", "ms/event"),
            ("disk_mb", "MB"),
        ):
            if key in small[step]:
                a, b = small[step][key], large[step][key]
                ratio = f"{b / a:5.2f}" if a else "    -"  # a step that forked no worker
                print(f"{step:16s} {unit:>12s}{a:10.1f}{b:12.1f}   {ratio}")
    for step in ("analyze", "report"):
        t = large[step]["s"] / small[step]["s"]
        m = large[step]["rss_mb"] / small[step]["rss_mb"]
        print(
            f"{step}: time ratio {t:.2f} (target <= {sizes[1] / sizes[0] * 1.1:.0f}), memory "
            f"ratio {m:.2f} (target <= 1.3)"
        )
    if not args.keep:
        shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    main()
