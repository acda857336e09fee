"""What made a derived file: the options and the input files' checksums, beside the file.

Every file the analysis or the report derives from a run folder (``groups.csv``,
``compare-<id>.csv``, ``report.html``, ``certificate.pdf``) gets a sidecar
``<name>.options.json``::

    {"file": "groups.csv", "kind": "groups", "options": {...},
     "inputs": {"metrics.parquet": "<sha256>", ...}, "software": "0.1.0", "written": "..."}

:func:`read_options` is the one reader (the report and ``rig compare`` both use it);
:func:`mismatch` says in one line why a file on disk does not answer a request (other
options, or an input that has changed since), so the caller can recompute or refuse.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from rig.store.atomic import atomic_write_text
from rig.store.waveform import sha256_file
from rigbase.errors import RunFolderError

__all__ = [
    "DerivedRecord",
    "input_checksums",
    "mismatch",
    "read_options",
    "record_options",
    "sidecar_path",
]

SUFFIX = ".options.json"


@dataclass(frozen=True)
class DerivedRecord:
    """The sidecar of a derived file: its kind, the options and input checksums that made it."""

    path: Path
    kind: str
    options: dict[str, Any]
    inputs: dict[str, str]
    software: str


def sidecar_path(path: str | Path) -> Path:
    """``groups.csv`` -> ``groups.csv.options.json`` (same folder)."""
    p = Path(path)
    return p.with_name(p.name + SUFFIX)


def _plain(value: Any) -> Any:
    """Options as JSON values: tuples become lists, paths strings, NaN None."""
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_plain(v) for v in value]
    if isinstance(value, Path):
        return str(value)
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if hasattr(value, "item"):  # numpy scalars
        return _plain(value.item())
    return value


def input_checksums(inputs: dict[str, str | Path]) -> dict[str, str]:
    """{label: sha256 of the file} for the inputs that exist ("missing" for the others)."""
    return {k: sha256_file(Path(p)) if Path(p).is_file() else "missing" for k, p in inputs.items()}


def record_options(
    path: str | Path, kind: str, options: dict[str, Any], inputs: dict[str, str | Path]
) -> Path:
    """Write the sidecar of ``path``: the options that made it and its inputs' checksums."""
    from rig import __version__

    side = sidecar_path(path)
    rec = {
        "file": Path(path).name,
        "kind": kind,
        "options": _plain(options),
        "inputs": input_checksums(inputs),
        "software": __version__,
        "written": datetime.now(UTC).isoformat(timespec="seconds"),
    }
    atomic_write_text(side, json.dumps(rec, indent=1, sort_keys=True) + "\n")
    return side


def read_options(path: str | Path) -> DerivedRecord | None:
    """The sidecar of ``path``, or None when there is none (a file from an older version).

    Raises RunFolderError naming the sidecar when it exists but cannot be read."""
    side = sidecar_path(path)
    if not side.exists():
        return None
    try:
        rec = json.loads(side.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise RunFolderError(f"{side}: unreadable options record ({exc})") from None
    if not isinstance(rec, dict) or not isinstance(rec.get("options"), dict):
        raise RunFolderError(f"{side} [options]: missing or not a table")
    inputs = rec.get("inputs") if isinstance(rec.get("inputs"), dict) else {}
    return DerivedRecord(
        side, str(rec.get("kind", "")), rec["options"], inputs, str(rec.get("software", ""))
    )


def mismatch(
    path: str | Path, options: dict[str, Any], inputs: dict[str, str | Path]
) -> str | None:
    """Why the derived file ``path`` does not answer ``options`` on ``inputs`` (one line), or
    None when it does. Only the options named in ``options`` are compared."""
    p = Path(path)
    if not p.exists():
        return f"{p.name} does not exist"
    rec = read_options(p)
    if rec is None:
        return f"{p.name} records no options (written by an older version)"
    want = _plain(options)
    diff = [k for k, v in want.items() if rec.options.get(k) != v]
    if diff:
        return f"{p.name} was made with " + ", ".join(
            f"{k}={rec.options.get(k)!r} (asked {want[k]!r})" for k in diff
        )
    now = input_checksums(inputs)
    changed = [k for k, v in now.items() if rec.inputs.get(k) != v]
    if changed:
        return f"{p.name} is older than {', '.join(changed)} (checksum differs)"
    return None
