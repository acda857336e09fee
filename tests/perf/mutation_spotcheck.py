"""Scripted mutation spot-check of the safety, store and compare modules.

Applies each deliberate bug below, one at a time, to a source file of this checkout, runs the
tests meant to guard that module, restores the file, and prints whether the tests caught it
(failed) and the share caught. Run from the repository root::

    PYTHONPATH=$PWD python3 tests/perf/mutation_spotcheck.py

The file is always restored (``finally``), also on Ctrl-C. Not a test: it prints figures.
"""

from __future__ import annotations

import os
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
INTERLOCKS = "rig/runner/interlocks.py"
RUNFOLDER = "rig/store/runfolder.py"
COMPARE = "rig/analysis/compare.py"

TESTS = {
    INTERLOCKS: ["tests/unit/test_interlocks.py"],
    RUNFOLDER: ["tests/unit/test_store_integrity.py"],
    COMPARE: [
        "tests/unit/test_repair_gate.py",
        "tests/reference/test_stats_reference.py",
        "tests/unit/test_analysis.py",
        "-k",
        "compare or tost or ratio or margin or gate",
    ],
}

# (file, what the bug is, exact text, replacement)
MUTANTS = [
    (INTERLOCKS, "pre-check residual check dropped",
     "if r is not None and abs(r) >= self.limits.safe_residual_volts:", "if False:"),
    (INTERLOCKS, "pre-check 'supply reads on' dropped",
     "        if self.bench.supply.output_is_on():\n            raise SafetyError(\"pre-check",
     "        if False:\n            raise SafetyError(\"pre-check"),
    (INTERLOCKS, "require_open never raises", "        if stuck:\n", "        if False:\n"),
    (INTERLOCKS, "voltage maximum check dropped",
     "if volts > self.limits.max_volts:", "if False:"),
    (INTERLOCKS, "hazardous-live comparison off by one",
     "abs(v) > self.limits.hazardous_live_volts", "abs(v) >= self.limits.hazardous_live_volts"),
    (INTERLOCKS, "charged check tenfold too lax",
     "abs(v) < fraction * volts", "abs(v) < 0.1 * fraction * volts"),
    (INTERLOCKS, "isolation current limit 100x too lax",
     "limit = 0.1 * v_in", "limit = 10 * v_in"),
    (INTERLOCKS, "safe state claims relays open",
     "rep.relays_open = not any(states[:-1])", "rep.relays_open = True"),
    (INTERLOCKS, "stuck contacts left out of the safe-state report",
     "for text in self.suspects:", "for text in []:"),
    (INTERLOCKS, "bleed not left closed on a failed bleed",
     "                switch.close([self.bleed])\n                raise",
     "                pass\n                raise"),
    (RUNFOLDER, "verify: duplicate-event check dropped", "if ev in seen:", "if False:"),
    (RUNFOLDER, "torn last journal line parsed as whole",
     "complete = lines[:-1]", "complete = lines"),
    (RUNFOLDER, "commit: duplicate guard dropped", "if event in self._done:", "if False:"),
    (RUNFOLDER, "reopen keeps a torn line", "if cut != len(data):", "if False:"),
    (RUNFOLDER, "verify: complete-but-missing check dropped",
     'if status == "complete" and missing:', "if False:"),
    (RUNFOLDER, "verify: checksum comparison dropped",
     'elif sha256_file(fp) != r.get("sha256"):', "elif False:"),
    (RUNFOLDER, "journal: non-object line accepted", "if not isinstance(row, dict):", "if False:"),
    (RUNFOLDER, "reopen without the lock",
     'lock = RunLock(path, "resume").acquire()', 'lock = RunLock(path, "resume")'),
    (COMPARE, "equivalence margin doubled",
     "lo, hi = math.log(1.0 - tolerance), math.log(1.0 + tolerance)",
     "lo, hi = math.log(1.0 - 2 * tolerance), math.log(1.0 + 2 * tolerance)"),
    (COMPARE, "gate counts 'inconclusive' as a pass",
     '(judged["verdict"] == "equivalent").all()', '(judged["verdict"] != "different").all()'),
    (COMPARE, "TOST takes the smaller one-sided p",
     "return float(max(p_lower, p_upper))", "return float(min(p_lower, p_upper))"),
    (COMPARE, "gate ignores groups only in the run",
     'judged = df[df["verdict"] != "only in baseline"]',
     'judged = df[~df["verdict"].isin(["only in baseline", "only in run"])]'),
    (COMPARE, "significance level doubled",
     "alpha = 1.0 - confidence", "alpha = 2.0 * (1.0 - confidence)"),
]  # fmt: skip


def run_tests(args: list[str]) -> int:
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    cmd = [sys.executable, "-m", "pytest", "-x", "-q", "-p", "no:cacheprovider", *args]
    return subprocess.run(cmd, cwd=ROOT, env=env, capture_output=True).returncode


def main() -> int:
    for f, args in TESTS.items():
        if run_tests(args) != 0:
            print(f"the tests of {f} fail without a mutation; fix them first")
            return 2
    caught = 0
    t0 = time.perf_counter()
    for f, what, old, new in MUTANTS:
        path = ROOT / f
        original = path.read_text()
        if original.count(old) != 1:
            print(f"SKIP  {f}: {what} (text found {original.count(old)} times)")
            continue
        try:
            path.write_text(original.replace(old, new))
            killed = run_tests(TESTS[f]) != 0
        finally:
            path.write_text(original)
        caught += killed
        print(f"{'caught' if killed else 'MISSED'}  {f}: {what}")
    n = len(MUTANTS)
    print(f"mutations caught: {caught}/{n} = {100 * caught / n:.0f} % "
          f"({time.perf_counter() - t0:.0f} s)")  # fmt: skip
    return 0


if __name__ == "__main__":
    sys.exit(main())
