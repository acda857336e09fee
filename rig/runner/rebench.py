"""Resuming with a corrected bench file (``rig resume RUN --bench corrected.toml``).

After a fault the operator may need to change how the instruments are reached (a resource
address, a timeout, a profile) or, on the simulated bench, remove an injected fault. Such a
file is accepted only when nothing that changes the measurement differs from the bench file
the run started with: channels, parts, loads, senses, divider, limits and the simulated
physics must be identical. The run folder keeps the first bench file as
``bench.original.toml`` and the corrected one as ``bench.toml``.
"""

from __future__ import annotations

import shutil
import tomllib
from pathlib import Path
from typing import Any

from rig.planning.benchfile import Bench
from rig.store.atomic import atomic_write_bytes
from rigbase.errors import FileFormatError

__all__ = ["IGNORED", "adopt_bench", "bench_differences", "record_bench"]

#: parts of a bench file that do not change what is measured (dotted key prefixes)
IGNORED = ("bench.name", "instruments", "simulation.faults")


def bench_differences(old: dict[str, Any], new: dict[str, Any], prefix: str = "") -> list[str]:
    """Dotted keys whose values differ between two bench files, ignoring :data:`IGNORED`."""
    out: list[str] = []
    for key in sorted(set(old) | set(new), key=str):
        dotted = f"{prefix}{key}"
        if any(dotted == i or dotted.startswith(i + ".") for i in IGNORED):
            continue
        a, b = old.get(key), new.get(key)
        if isinstance(a, dict) and isinstance(b, dict):
            out += bench_differences(a, b, dotted + ".")
        elif a != b:
            out.append(f"{dotted} ({a!r} -> {b!r})")
    return out


def adopt_bench(run: Path, corrected: Bench, path: Path) -> Bench:
    """``corrected`` (read from ``path``) if it measures the same way as the run's own
    ``bench.toml``, else FileFormatError naming the corrected file and what differs. Both
    files are compared as written (keys as in the file), after both passed the bench checks."""
    original = tomllib.loads((run / "bench.toml").read_text(encoding="utf-8"))
    diff = bench_differences(original, tomllib.loads(path.read_text(encoding="utf-8")))
    if diff:
        raise FileFormatError(
            path,
            diff[0].split(" ")[0],
            f"differs from {run / 'bench.toml'} in what changes the measurement: "
            + "; ".join(diff[:3])
            + (f" (+{len(diff) - 3} more)" if len(diff) > 3 else ""),
        )
    return corrected


def record_bench(run: Path, path: Path) -> None:
    """Keep the run's first bench file and put the corrected one in its place (atomically;
    call with the run folder's lock held)."""
    first = run / "bench.original.toml"
    if not first.exists():
        shutil.copyfile(run / "bench.toml", first)
    atomic_write_bytes(run / "bench.toml", path.read_bytes())
