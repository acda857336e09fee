"""One captured event on disk: raw ADC codes plus the scaling that turns them into SI values.

Two formats, chosen by the file name. New runs write ``.zarr.zip`` (:data:`WAVEFORM_SUFFIX`):
a compressed Zarr v3 group in one zip file, see :mod:`rig.store.zarrwave`. Run folders
recorded before it hold ``.npz`` files, which :func:`load_waveform` still reads (and
:func:`save_waveform` still writes when given such a name). The runner and analysis only call
these two functions and never see the difference.

``.npz`` format (written with :func:`numpy.savez`, read with ``allow_pickle=False``):

==============  =====================  ===================================================
key             dtype / shape          meaning
==============  =====================  ===================================================
``codes``       int8 or int16 (c, n)   raw codes, one row per channel
``gain``        float64 (c,)           SI units per code
``offset``      float64 (c,)           SI value of code 0: ``value = codes * gain + offset``
``code_min``    int64 (c,)             lowest code of the ADC (a sample there is clipped)
``code_max``    int64 (c,)             highest code of the ADC
``dt``          float64 ()             seconds per sample
``t0``          float64 ()             time of sample 0 relative to the trigger, seconds
``channels``    str (c,)               channel names, e.g. "current", "voltage"
``units``       str (c,)               SI unit of each row after scaling, e.g. "A", "V"
==============  =====================  ===================================================

Either file is written to a temporary name in the same folder, flushed, fsynced and renamed,
so a reader never sees half a file.
"""

from __future__ import annotations

import hashlib
import zipfile
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from rig.store.atomic import atomic_write
from rig.store.zarrwave import ZARR_SUFFIX, read_zarr_waveform, write_zarr_waveform
from rigbase.errors import RunFolderError

__all__ = ["WAVEFORM_SUFFIX", "Waveform", "load_waveform", "save_waveform", "sha256_file"]

WAVEFORM_SUFFIX = ZARR_SUFFIX  # the format new events are written in
_NPZ = ".npz"

_KEYS = ("codes", "gain", "offset", "code_min", "code_max", "dt", "t0", "channels", "units")


@dataclass(frozen=True)
class Waveform:
    """Raw codes of one event with their scaling (see the module docstring)."""

    codes: np.ndarray
    gain: np.ndarray
    offset: np.ndarray
    code_min: np.ndarray
    code_max: np.ndarray
    dt: float
    t0: float
    channels: tuple[str, ...]
    units: tuple[str, ...]

    @property
    def n(self) -> int:
        """Samples per channel."""
        return int(self.codes.shape[1])

    def index(self, channel: str) -> int:
        """Row of a named channel (ValueError if absent)."""
        return self.channels.index(channel)

    def values(self, channel: str = "current") -> np.ndarray:
        """The channel in SI units (float64)."""
        k = self.index(channel)
        return self.codes[k].astype(np.float64) * self.gain[k] + self.offset[k]

    def time(self) -> np.ndarray:
        """Sample times relative to the trigger, seconds."""
        return self.t0 + self.dt * np.arange(self.n)


def _format(path: Path) -> str:
    """``"zarr"`` or ``"npz"`` from the file name; ValueError naming the file otherwise."""
    if path.name.endswith(ZARR_SUFFIX):
        return "zarr"
    if path.name.endswith(_NPZ):
        return "npz"
    raise ValueError(f"{path}: unknown waveform format (expected {ZARR_SUFFIX} or {_NPZ})")


def save_waveform(path: str | Path, wf: Waveform) -> str:
    """Write ``wf`` atomically to ``path`` (format from the name: ``.zarr.zip`` or ``.npz``);
    returns the file's SHA-256 (hex)."""
    path = Path(path)
    if _format(path) == "zarr":
        write_zarr_waveform(path, wf)
        return sha256_file(path)

    def write(tmp: Path) -> None:
        with open(tmp, "wb") as fh:  # a file, not a name: savez would add ".npz" to a name
            _savez(fh, wf)

    atomic_write(path, write)
    return sha256_file(path)


def _savez(fh: Any, wf: Waveform) -> None:
    np.savez(
        fh,
        codes=np.ascontiguousarray(wf.codes),
        gain=np.asarray(wf.gain, dtype=np.float64),
        offset=np.asarray(wf.offset, dtype=np.float64),
        code_min=np.asarray(wf.code_min, dtype=np.int64),
        code_max=np.asarray(wf.code_max, dtype=np.int64),
        dt=np.float64(wf.dt),
        t0=np.float64(wf.t0),
        channels=np.asarray(wf.channels, dtype=str),
        units=np.asarray(wf.units, dtype=str),
    )


def load_waveform(path: str | Path, channels: tuple[str, ...] | None = None) -> Waveform:
    """Read a waveform file of either format, only ``channels`` when given (a ``.zarr.zip``
    then decompresses no other); RunFolderError (a ValueError) naming the file when it is
    incomplete, truncated, not an archive or lacks a channel; FileNotFoundError when it is
    missing."""
    path = Path(path)
    try:
        wf = _load_waveform(path, channels)
    except FileNotFoundError:
        raise
    except (zipfile.BadZipFile, EOFError, KeyError, ValueError, OSError, TypeError) as exc:
        if isinstance(exc, RunFolderError):
            raise
        raise RunFolderError(f"{path}: unreadable waveform file ({exc})") from None
    if channels is not None and wf.channels != tuple(channels):  # an .npz holds them all
        missing = [c for c in channels if c not in wf.channels]
        if missing:
            raise RunFolderError(f"{path} [channels]: no {missing[0]!r} channel")
        k = [wf.index(c) for c in channels]
        wf = Waveform(
            wf.codes[k],
            wf.gain[k],
            wf.offset[k],
            wf.code_min[k],
            wf.code_max[k],
            wf.dt,
            wf.t0,
            tuple(channels),
            tuple(wf.units[j] for j in k),
        )
    return wf


def _load_waveform(path: Path, channels: tuple[str, ...] | None) -> Waveform:
    if _format(path) == "zarr":
        fields = read_zarr_waveform(path, channels)
        codes = fields["codes"]
        if codes.ndim != 2 or codes.dtype not in (np.int8, np.int16):
            raise RunFolderError(f"{path} [codes]: expected a 2-D int8 or int16 array")
        return Waveform(**fields)
    # the file is opened here so that it is closed however np.load fails on it
    with open(path, "rb") as fh, np.load(fh, allow_pickle=False) as z:
        missing = [k for k in _KEYS if k not in z.files]
        if missing:
            raise RunFolderError(f"{path}: waveform file lacks {', '.join(missing)}")
        codes = z["codes"]
        if codes.ndim != 2 or codes.dtype not in (np.int8, np.int16):
            raise RunFolderError(f"{path} [codes]: expected a 2-D int8 or int16 array")
        return Waveform(
            codes=codes,
            gain=z["gain"],
            offset=z["offset"],
            code_min=z["code_min"],
            code_max=z["code_max"],
            dt=float(z["dt"]),
            t0=float(z["t0"]),
            channels=tuple(str(s) for s in z["channels"]),
            units=tuple(str(s) for s in z["units"]),
        )


def sha256_file(path: str | Path) -> str:
    """SHA-256 of a file's bytes, hex."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()
