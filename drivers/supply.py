"""The programmable high-voltage supply role.

Every setpoint is checked against the profile's ``[supply.ranges]`` and the bench's own
limits (passed at construction) before anything is sent: a value over a limit raises
:class:`~rigbase.errors.LimitError` and the instrument never sees it.
"""

from __future__ import annotations

import logging
import math

from drivers.profile import Profile
from drivers.session import ScpiSession
from rigbase.errors import InstrumentError, LimitError, SafetyError

__all__ = ["Supply", "parse_bool"]

log = logging.getLogger(__name__)

_TRUE = {"1", "ON", "+1", "1.0"}
_FALSE = {"0", "OFF", "+0", "0.0"}


def parse_bool(instrument: str, command: str, text: str) -> bool:
    """An SCPI boolean answer (``1``/``0``/``ON``/``OFF``) as bool (InstrumentError if not)."""
    word = text.strip().upper()
    if word in _TRUE:
        return True
    if word in _FALSE:
        return False
    raise InstrumentError(instrument, command, f"expected 1 or 0, got {text!r}")


class Supply:
    """Programmable supply: voltage, current limit, output, readbacks, safe state.

    ``max_volts`` and ``max_amps`` are the bench's limits (volts, amperes); the tighter of
    them and the profile ranges applies.
    """

    ROLE = "supply"

    def __init__(
        self,
        session: ScpiSession,
        profile: Profile,
        *,
        max_volts: float | None = None,
        max_amps: float | None = None,
    ) -> None:
        profile.require_role(self.ROLE)
        self.session = session
        self.profile = profile
        ranges = profile.ranges(self.ROLE)
        self._limits: dict[str, tuple[float, float, str]] = {}
        for key, bench in (("volts", max_volts), ("amps", max_amps)):
            low, high = ranges[key]
            source = f"profile {profile.path.name} [supply.ranges] {key}"
            if bench is not None and bench < high:
                high, source = float(bench), "bench limit"
            self._limits[key] = (low, high, source)

    @property
    def name(self) -> str:
        """Instrument name used in errors."""
        return self.session.name

    def limits(self) -> dict[str, tuple[float, float]]:
        """Allowed setpoints: ``{"volts": (low, high), "amps": (low, high)}``."""
        return {k: (lo, hi) for k, (lo, hi, _src) in self._limits.items()}

    def _check(self, key: str, value: float, unit: str) -> float:
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise LimitError(f"{self.name}: {key} must be a number, got {value!r}")
        low, high, source = self._limits[key]
        if not math.isfinite(value) or not low <= value <= high:
            raise LimitError(
                f"{self.name}: {value:g} {unit} is outside [{low:g}, {high:g}] {unit} ({source})"
            )
        return float(value)

    def _cmd(self, operation: str, **fields: object) -> str:
        return self.profile.command(self.ROLE, operation, **fields)

    def set_voltage(self, volts: float) -> None:
        """Program the output voltage, volts (checked against the limits first)."""
        value = self._check("volts", volts, "V")
        self.session.write(self._cmd("set_voltage", volts=value))

    def set_current_limit(self, amps: float) -> None:
        """Program the current limit, amperes (checked against the limits first)."""
        value = self._check("amps", amps, "A")
        self.session.write(self._cmd("set_current_limit", amps=value))

    def interlock_closed(self) -> bool | None:
        """True if the supply reports its interlock (safety loop) closed; None when the
        profile has no ``get_interlock`` query."""
        if not self.profile.has_operation(self.ROLE, "get_interlock"):
            return None
        cmd = self._cmd("get_interlock")
        return self.session.query(cmd).strip() == self.profile.dialect.interlock_closed

    def output(self, on: bool) -> None:
        """Switch the output on or off.

        On: where the profile has an interlock query, the interlock must read closed
        (SafetyError otherwise, nothing sent), and where it has a separate enable command,
        that goes first. Off: output off first, then the enable is withdrawn."""
        has = self.profile.has_operation
        if on:
            if self.interlock_closed() is False:
                raise SafetyError(f"{self.name}: interlock open; the output stays off")
            if has(self.ROLE, "enable_output"):
                self.session.write(self._cmd("enable_output"))
            self.session.write(self._cmd("output_on"))
            return
        self.session.write(self._cmd("output_off"))
        if has(self.ROLE, "disable_output"):
            self.session.write(self._cmd("disable_output"))

    def output_is_on(self) -> bool:
        """True if the supply reports its output on."""
        cmd = self._cmd("get_output")
        return parse_bool(self.name, cmd, self.session.query(cmd))

    def programmed_voltage(self) -> float:
        """The voltage setpoint as the supply reports it, volts."""
        return self.session.query_float(self._cmd("get_voltage"))

    def programmed_current_limit(self) -> float:
        """The current limit as the supply reports it, amperes."""
        return self.session.query_float(self._cmd("get_current_limit"))

    def measure_voltage(self) -> float:
        """Measured output voltage, volts."""
        return self.session.query_float(self._cmd("measure_voltage"))

    def measure_current(self) -> float:
        """Measured output current, amperes."""
        return self.session.query_float(self._cmd("measure_current"))

    def make_safe(self) -> None:
        """Output off, then 0 V. Both are tried even if one fails; the first failure is
        raised afterwards (with the second attached as a note)."""
        failures: list[Exception] = []
        for label, action in (
            ("output off", lambda: self.output(False)),
            ("0 V", lambda: self.set_voltage(0.0)),
        ):
            try:
                action()
            except (InstrumentError, LimitError) as exc:
                log.error(
                    "%s: make_safe %s failed: %s",
                    self.name,
                    label,
                    exc,
                    extra={"instrument": self.name},
                )
                failures.append(exc)
        if failures:
            first = failures[0]
            for other in failures[1:]:
                first.add_note(f"also failed: {other}")
            raise first
