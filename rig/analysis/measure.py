"""Metrics of one waveform saved elsewhere (a scope's CSV export or a NumPy array).

Accepted files:

- CSV with a header row: a time column (``time``, ``t``, ``seconds``, ``s``; a unit in
  brackets or after an underscore is ignored, e.g. ``Time (s)``, ``time_s``) and either a
  current column (``current``, ``i``, ``amps``, ``a``) in amperes, or a voltage column
  (``voltage``, ``v``, ``volts``) across a shunt of ``shunt_ohms``. Time must be evenly
  sampled (within 1 %).
- ``.npy``: a 1-D array of current in amperes, with ``dt`` given (time of sample 0 is 0).

The baseline comes from the samples before the time origin when there are at least eight of
them, else from the first 10 % of the record.
"""

from __future__ import annotations

import csv
import math
import re
from pathlib import Path
from typing import Any

import numpy as np

from rig.analysis.metrics import event_metrics
from rig.analysis.options import (
    check_charge_volts,
    check_dt,
    check_load_ohms,
    check_shunt_ohms,
)
from rigbase.errors import FileFormatError

__all__ = ["measure_file", "read_trace"]

_TIME = {"time", "t", "seconds", "s", "sec"}
_CURRENT = {"current", "i", "amps", "a", "amp", "ampere", "amperes"}
_VOLTAGE = {"voltage", "v", "volts", "volt", "u"}
_MIN_PRE = 8


def _norm(name: str) -> str:
    """'Time (s)' -> 'time', 'current_A' -> 'current', ' I [A] ' -> 'i'."""
    s = re.sub(r"[\(\[].*?[\)\]]", "", name).strip().lower()
    s = re.sub(r"[_ ](s|a|v|sec|amps|volts)$", "", s)
    return s.strip()


def read_trace(
    path: str | Path, *, dt: float | None = None, shunt_ohms: float | None = None
) -> tuple[np.ndarray, float, float]:
    """(current in A, dt in s, t0 in s) of a CSV or .npy file; FileFormatError naming the file
    and column on any problem."""
    path = Path(path)
    if not path.exists():
        raise FileFormatError(path, "", "no such file")
    if path.suffix.lower() == ".npy":
        return _read_npy(path, dt)
    if path.suffix.lower() in (".csv", ".txt"):
        return _read_csv(path, shunt_ohms)
    raise FileFormatError(path, "", f"unknown file type {path.suffix!r} (expected .csv or .npy)")


def _read_npy(path: Path, dt: float | None) -> tuple[np.ndarray, float, float]:
    if dt is None or not dt > 0:
        raise FileFormatError(path, "dt", "a .npy trace needs dt (seconds per sample) > 0")
    try:
        arr = np.load(path, allow_pickle=False)
    except (ValueError, EOFError, OSError) as exc:
        raise FileFormatError(path, "", f"not a plain NumPy array ({exc})") from None
    if not isinstance(arr, np.ndarray):
        raise FileFormatError(path, "", "an .npz archive, not one .npy array")
    arr = np.squeeze(arr)
    if arr.ndim != 1 or arr.dtype.kind not in "iuf":
        raise FileFormatError(
            path, "", f"expected a 1-D numeric array, got {arr.dtype} of shape {arr.shape}"
        )
    out = arr.astype(np.float64)
    if not np.isfinite(out).all():
        raise FileFormatError(path, "", "contains NaN or infinite values")
    return out, float(dt), 0.0


def _read_csv(path: Path, shunt_ohms: float | None) -> tuple[np.ndarray, float, float]:
    try:
        return _read_csv_text(path, shunt_ohms)
    except UnicodeDecodeError as exc:
        raise FileFormatError(
            path, "", f"not UTF-8 text (byte 0x{exc.object[exc.start]:02x} at offset {exc.start})"
        ) from None
    except csv.Error as exc:
        raise FileFormatError(path, "", f"not readable as CSV ({exc})") from None


def _read_csv_text(path: Path, shunt_ohms: float | None) -> tuple[np.ndarray, float, float]:
    with open(path, newline="", encoding="utf-8-sig") as fh:
        sample = fh.read(4096)
        fh.seek(0)
        try:
            dialect = csv.Sniffer().sniff(sample, delimiters=",;\t ")
        except csv.Error:
            dialect = csv.excel
        reader = csv.reader(fh, dialect)
        try:
            header = next(reader)
        except StopIteration:
            raise FileFormatError(path, "", "empty file") from None
        names = [_norm(h) for h in header]
        rows = [r for r in reader if any(c.strip() for c in r)]
    col_t = _find(names, _TIME)
    col_i = _find(names, _CURRENT)
    col_v = _find(names, _VOLTAGE)
    if col_t is None:
        raise FileFormatError(path, "time", f"no time column among {header}")
    if col_i is None and col_v is None:
        raise FileFormatError(path, "current", f"no current or voltage column among {header}")
    col = col_i if col_i is not None else col_v
    assert col is not None
    t = _column(path, rows, col_t, header[col_t])
    x = _column(path, rows, col, header[col])
    if col_i is None:
        if shunt_ohms is None or not shunt_ohms > 0:
            raise FileFormatError(path, header[col], "a voltage column needs shunt_ohms > 0")
        x = x / shunt_ohms
    if t.size < 4:
        raise FileFormatError(path, header[col_t], f"only {t.size} samples")
    steps = np.diff(t)
    dt = float(np.median(steps))
    if not dt > 0 or np.max(np.abs(steps - dt)) > 0.01 * dt:
        raise FileFormatError(path, header[col_t], "time is not increasing in even steps")
    return x, dt, float(t[0])


def _find(names: list[str], wanted: set[str]) -> int | None:
    for k, name in enumerate(names):
        if name in wanted:
            return k
    return None


def _column(path: Path, rows: list[list[str]], col: int, name: str) -> np.ndarray:
    out = np.empty(len(rows))
    for line, r in enumerate(rows, start=2):
        try:
            out[line - 2] = float(r[col])
        except (IndexError, ValueError):
            cell = r[col] if col < len(r) else "(missing)"
            raise FileFormatError(path, name, f"not a number: {cell!r}", line=line) from None
    if not np.isfinite(out).all():
        raise FileFormatError(path, name, "contains NaN or infinite values")
    return out


def measure_file(
    path: str | Path,
    *,
    dt: float | None = None,
    shunt_ohms: float | None = None,
    charge_volts: float,
    load_ohms: float,
    noise_factor: float = 6.0,
) -> dict[str, Any]:
    """Metrics of one saved waveform (see the module docstring for the formats).

    dt: seconds per sample (.npy only; a CSV's time column gives it).
    shunt_ohms: shunt resistance, ohm, when the CSV holds voltage across a shunt.
    charge_volts: charge voltage of the event, V; load_ohms: load resistance, ohm.
    Returns {metric name: value} with the names of rig.store.schema.METRIC_COLUMNS plus
    ``dt_s``, ``t0_s``, ``n_samples`` and ``file``.
    """
    charge_volts = check_charge_volts(charge_volts)
    load_ohms = check_load_ohms(load_ohms)
    i, step, t0 = read_trace(path, dt=check_dt(dt), shunt_ohms=check_shunt_ohms(shunt_ohms))
    n_pre = int(math.ceil(-t0 / step)) if t0 < 0 else 0
    n_base = n_pre if n_pre >= _MIN_PRE else max(1, i.size // 10)
    res = event_metrics(
        i[None, :],
        dt=step,
        t0=t0,
        n_baseline=n_base,
        charge_volts=charge_volts,
        load_ohms=load_ohms,
        noise_factor=noise_factor,
    )
    out: dict[str, Any] = {k: v[0].item() for k, v in res.items()}
    out.update(dt_s=step, t0_s=t0, n_samples=int(i.size), file=str(path))
    return out
