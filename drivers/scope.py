"""The digitising oscilloscope role: input set-up, single-shot acquisition, raw-code fetch.

A fetched :class:`Trace` keeps the raw ADC codes plus the scaling the scope reports for them
(the profile's ``scaling`` query, its fields mapped by ``[scope.scaling_fields]``), so the run
folder can store codes (small, exact) and analysis can scale them later:
``volts = (code - reference_code) * volts_per_code + reference_volts`` and
``seconds from trigger = first_sample_s + index * sample_interval_s``.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass
from typing import Literal

import numpy as np

from drivers.clock import Clock
from drivers.profile import Profile
from drivers.session import ByteOrder, ScpiSession
from rigbase.errors import (
    BlockFormatError,
    InstrumentError,
    InstrumentTimeout,
    LimitError,
    ProfileError,
)

__all__ = ["SAMPLING_WORDS", "Scope", "Trace"]

log = logging.getLogger(__name__)

# SCPI-1999 STATus:OPERation bits (as the shipped profile states): 3 sweeping (acquiring),
# 5 waiting for trigger.
SWEEPING_BIT = 1 << 3
WAITING_BIT = 1 << 5

_COUPLINGS = {"AC", "DC"}
_SLOPES = {
    "positive": "POSitive",
    "pos": "POSitive",
    "rising": "POSitive",
    "negative": "NEGative",
    "neg": "NEGative",
    "falling": "NEGative",
    "either": "EITHer",
    "eith": "EITHer",
    "both": "EITHer",
}
# FORMat:BORDer NORMal sends the most significant byte first (big-endian), SWAPped the
# least significant first (SCPI-1999 Vol. 2, FORMat:BORDer; from memory).
_ORDERS: dict[str, str] = {"big": "NORMal", "little": "SWAPped"}
#: sequence-file sampling -> the profile's word: "point" stores the input at each sample
#: instant, "mean" the mean of the input over each sample interval
SAMPLING_WORDS: dict[str, str] = {"point": "POINt", "mean": "MEAN"}


@dataclass(frozen=True)
class Trace:
    """One channel's raw codes with the scaling the scope reported for them."""

    codes: np.ndarray  # int8 or int16, one per sample
    sample_interval_s: float  # seconds per sample
    first_sample_s: float  # seconds from the trigger to sample 0
    volts_per_code: float  # volts per ADC code
    reference_volts: float  # volts at code reference_code
    reference_code: float  # the code that reads reference_volts
    bits: int  # 8 or 16

    def volts(self) -> np.ndarray:
        """The samples in volts (float64)."""
        codes = self.codes.astype(np.float64)
        return (codes - self.reference_code) * self.volts_per_code + self.reference_volts

    def time(self) -> np.ndarray:
        """Sample times in seconds from the trigger (float64)."""
        index = np.arange(len(self.codes), dtype=np.float64)
        return self.first_sample_s + self.sample_interval_s * index


class Scope:
    """An oscilloscope driven through the profile's ``[scope]`` templates."""

    ROLE = "scope"

    def __init__(self, session: ScpiSession, profile: Profile) -> None:
        profile.require_role(self.ROLE)
        self.session = session
        self.profile = profile
        self._ranges = profile.ranges(self.ROLE)
        self._format: tuple[int, ByteOrder] | None = None

    @property
    def name(self) -> str:
        """Instrument name used in errors."""
        return self.session.name

    # -- helpers ------------------------------------------------------------------------------
    def _cmd(self, operation: str, **fields: object) -> str:
        return self.profile.command(self.ROLE, operation, **fields)

    def _write(self, operation: str, **fields: object) -> None:
        self.session.write(self._cmd(operation, **fields))

    def _in_range(self, key: str, value: float, what: str) -> None:
        low, high = self._ranges[key]
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise LimitError(f"{self.name}: {what} must be a number, got {value!r}")
        if not (math.isfinite(value) and low <= value <= high):
            raise LimitError(
                f"{self.name}: {what} {value!r} outside [{low:g}, {high:g}] "
                f"(profile {self.profile.path.name} [scope.ranges] {key})"
            )

    def _positive(self, value: float | None, what: str) -> float:
        if (
            isinstance(value, bool)
            or not isinstance(value, int | float)
            or not (math.isfinite(value) and value > 0)
        ):
            raise LimitError(f"{self.name}: {what} must be a positive number, got {value!r}")
        return float(value)

    def _finite(self, value: float, what: str) -> float:
        if (
            isinstance(value, bool)
            or not isinstance(value, int | float)
            or not math.isfinite(value)
        ):
            raise LimitError(f"{self.name}: {what} must be a finite number, got {value!r}")
        return float(value)

    # -- set-up -------------------------------------------------------------------------------
    def configure_channel(
        self,
        ch: int,
        *,
        coupling: str,
        impedance_ohms: float,
        bandwidth_hz: float | None,
        range_volts: float,
        offset_volts: float,
        enabled: bool = True,
    ) -> None:
        """Set up input ``ch``: coupling ``"AC"``/``"DC"``, input impedance (ohms), bandwidth
        limit (Hz; None = limit off), full-scale peak-to-peak range (volts), offset at
        mid-scale (volts), and whether the channel is acquired. All values are checked
        before the first command is sent."""
        self._in_range("channel", ch, "channel")
        coup = str(coupling).upper()
        if coup not in _COUPLINGS:
            raise LimitError(f"{self.name}: coupling {coupling!r} is not AC or DC")
        ohms = self._positive(impedance_ohms, "impedance_ohms")
        hz = None if bandwidth_hz is None else self._positive(bandwidth_hz, "bandwidth_hz")
        span = self._positive(range_volts, "range_volts")
        offset = self._finite(offset_volts, "offset_volts")
        self._write("set_channel_state", ch=ch, state="ON" if enabled else "OFF")
        self._write("set_coupling", ch=ch, coupling=coup)
        self._write("set_impedance", ch=ch, ohms=ohms)
        if hz is None:
            self._write("set_bandwidth_state", ch=ch, state="OFF")
        else:
            self._write("set_bandwidth", ch=ch, hz=hz)
            self._write("set_bandwidth_state", ch=ch, state="ON")
        self._write("set_range", ch=ch, volts=span)
        self._write("set_offset", ch=ch, volts=offset)

    def configure_acquisition(
        self, sample_interval_s: float, points: int, trigger_offset_s: float
    ) -> None:
        """Sample interval (seconds), record length (points) and time of the first sample
        relative to the trigger (seconds; negative keeps pre-trigger samples)."""
        self._in_range("seconds", sample_interval_s, "sample_interval_s")
        if isinstance(points, bool) or not isinstance(points, int | np.integer):
            raise LimitError(f"{self.name}: points must be an integer, got {points!r}")
        self._in_range("points", int(points), "points")
        offset = self._finite(trigger_offset_s, "trigger_offset_s")
        self._write("set_sample_interval", seconds=float(sample_interval_s))
        self._write("set_points", points=int(points))
        self._write("set_trigger_offset", seconds=offset)

    def set_sampling(self, sampling: str) -> None:
        """``"point"`` (the input at each sample instant) or ``"mean"`` (the mean of the input
        over each sample interval: high-resolution acquisition). A profile without the
        optional ``set_sampling`` operation accepts only ``"point"`` (sends nothing)."""
        word = SAMPLING_WORDS.get(str(sampling).strip().lower())
        if word is None:
            raise LimitError(f"{self.name}: sampling {sampling!r} is not point or mean")
        if not self.profile.has_operation(self.ROLE, "set_sampling"):
            if word == "POINt":
                return
            raise ProfileError(
                self.profile.path,
                "scope.set_sampling",
                'missing operation: needed for sampling = "mean"',
            )
        self._write("set_sampling", sampling=word)

    def configure_trigger(self, ch: int, level_volts: float, slope: str) -> None:
        """Edge trigger on input ``ch`` at ``level_volts`` (volts); ``slope`` is
        ``"positive"``, ``"negative"`` or ``"either"`` (SCPI forms accepted too)."""
        self._in_range("channel", ch, "trigger channel")
        level = self._finite(level_volts, "level_volts")
        word = _SLOPES.get(str(slope).strip().lower())
        if word is None:
            raise LimitError(f"{self.name}: slope {slope!r} is not positive, negative or either")
        self._write("set_trigger_source", ch=ch)
        self._write("set_trigger_level", volts=level)
        self._write("set_trigger_slope", slope=word)

    def set_format(self, bits: int, byte_order: ByteOrder | None = None) -> None:
        """Raw-code transfer format: 8 or 16 bit signed integers, ``"big"``/``"little"``
        (default: the profile's ``[scope.transfer] byte_order``). A profile without a
        ``set_byte_order`` command has a fixed order, which then applies whatever is asked."""
        if bits not in (8, 16) or isinstance(bits, bool):
            raise LimitError(f"{self.name}: bits must be 8 or 16, got {bits!r}")
        order = byte_order or self.profile.dialect.transfer.byte_order
        if order not in _ORDERS:
            raise LimitError(f"{self.name}: byte order {byte_order!r} is not big or little")
        self._write("set_format", fmt=f"INT,{bits}")
        if self.profile.has_operation(self.ROLE, "set_byte_order"):
            self._write("set_byte_order", order=_ORDERS[order])
        else:
            order = self.profile.dialect.transfer.byte_order  # type: ignore[assignment]
        self._format = (bits, order)  # type: ignore[assignment]

    # -- acquisition --------------------------------------------------------------------------
    def arm(self) -> None:
        """Start one single-shot acquisition (it then waits for its trigger)."""
        self._write("single")

    def force_trigger(self) -> bool:
        """Trigger the armed acquisition now (False when the profile has no such command)."""
        if not self.profile.has_operation(self.ROLE, "force_trigger"):
            return False
        self._write("force_trigger")
        return True

    def abort(self) -> None:
        """Stop the acquisition in progress, if any."""
        self._write("abort")

    def condition(self) -> int:
        """The STATus:OPERation condition register."""
        return self.session.query_int(self._cmd("get_condition"))

    def state(self) -> Literal["waiting", "acquiring", "complete"]:
        """``"waiting"`` for the trigger, ``"acquiring"`` (sweeping), or ``"complete"``
        (bits of ``[scope.completion]``; SCPI-1999 STATus:OPERation by default)."""
        cond = self.condition()
        done = self.profile.dialect.completion
        if cond & (1 << done.waiting_bit):
            return "waiting"
        if cond & (1 << done.acquiring_bit):
            return "acquiring"
        return "complete"

    def _opc_done(self, clock: Clock, wait_s: float) -> bool:
        """The completion query answered (True) within ``wait_s`` seconds, or not (False).
        A virtual clock cannot advance while the instrument holds its reply, so there the
        query is asked with a short read timeout and time moves on between asks."""
        cmd = self.profile.command("common", "operation_complete")
        try:
            text = self.session.query(cmd, repeatable=False, timeout_s=max(wait_s, 1e-3))
        except InstrumentTimeout:
            return False
        if text.strip().lstrip("+") not in ("1", "1.0"):
            raise InstrumentError(self.name, cmd, f"expected 1, got {text!r}")
        return True

    def wait_complete(self, clock: Clock, timeout_s: float, poll_s: float) -> bool:
        """Wait until the acquisition is complete (True) or ``timeout_s`` seconds have passed
        on ``clock`` (False), the way ``[scope.completion]`` says: poll :meth:`state` every
        ``poll_s`` seconds (``status``), ask the completion query (``opc``), or wait its
        fixed ``wait_s`` and assume it (``wait``: the fetch then finds a missing record)."""
        poll = self._positive(poll_s, "poll_s")
        limit = self._finite(timeout_s, "timeout_s")
        done = self.profile.dialect.completion
        if done.method == "wait":
            clock.sleep(done.wait_s)
            return True
        start = clock.now()
        while True:
            if done.method == "opc":
                left = limit - (clock.now() - start)
                if self._opc_done(clock, 0.2 if clock.virtual else max(left, 1e-3)):
                    return True
            elif self.state() == "complete":
                return True
            left = limit - (clock.now() - start)
            if left <= 0:
                log.info(
                    "%s: acquisition not complete after %g s",
                    self.name,
                    limit,
                    extra={"instrument": self.name},
                )
                return False
            clock.sleep(min(poll, left))

    def fetch(self, ch: int) -> Trace:
        """Raw codes and scaling of input ``ch`` from the last acquisition.

        Uses the format last set with :meth:`set_format`; if none was set, sets 8-bit
        big-endian first so the driver and the instrument agree.
        """
        self._in_range("channel", ch, "channel")
        if self._format is None:
            self.set_format(8, "big")
        assert self._format is not None
        bits, order = self._format
        pick = self._scaling(ch)
        cmd = self._cmd("fetch", ch=ch)
        if self.profile.dialect.transfer.encoding == "ascii":
            codes = self._ascii_codes(cmd, bits)
        else:
            codes = self.session.query_block(cmd, "int8" if bits == 8 else "int16", order)
        if len(codes) != int(pick["points"]):
            raise BlockFormatError(
                self.name,
                cmd,
                f"block holds {len(codes)} points, the scaling answer says {pick['points']:g}",
            )
        return Trace(
            codes=codes,
            sample_interval_s=pick["sample_interval_s"],
            first_sample_s=pick["first_sample_s"],
            volts_per_code=pick["volts_per_code"],
            reference_volts=pick["reference_volts"],
            reference_code=pick["reference_code"],
            bits=bits,
        )

    def _scaling(self, ch: int) -> dict[str, float]:
        """The scaling fields of input ``ch``: one combined reply mapped by position
        (``[scope.scaling_fields]``), or one query per field (``[scope.scaling_queries]``)."""
        queries = self.profile.dialect.scaling_queries
        if queries:
            out: dict[str, float] = {}
            for name, q in queries.items():
                if isinstance(q, float):
                    out[name] = q
                else:
                    out[name] = self.session.query_float(q.format(ch=ch))
            return out
        scaling_cmd = self._cmd("scaling", ch=ch)
        text = self.session.query(scaling_cmd)
        fields = self.profile.scaling_fields
        try:
            values = [float(v) for v in text.split(",")]
            return {k: values[i] for k, i in fields.items()}
        except (ValueError, IndexError):
            raise InstrumentError(
                self.name,
                scaling_cmd,
                f"scaling answer {text!r} does not fit [scope.scaling_fields]",
            ) from None

    def _ascii_codes(self, cmd: str, bits: int) -> np.ndarray:
        """Codes sent as comma-separated ASCII integers, as int8/int16 (checked in range)."""
        text = self.session.query(cmd)
        try:
            values = np.array([int(v) for v in text.split(",")], dtype=np.int64)
        except ValueError:
            raise BlockFormatError(self.name, cmd, "ASCII codes are not integers") from None
        dtype = np.int8 if bits == 8 else np.int16
        info = np.iinfo(dtype)
        if values.size and (values.min() < info.min or values.max() > info.max):
            raise BlockFormatError(self.name, cmd, f"ASCII codes outside {bits}-bit range")
        return values.astype(dtype)

    def measure_dc(self, ch: int) -> float:
        """Mean voltage at input ``ch`` now, volts."""
        self._in_range("channel", ch, "channel")
        return self.session.query_float(self._cmd("measure_dc", ch=ch))
