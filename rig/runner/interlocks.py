"""Interlocks: limits checked before commands are sent, readbacks, residual voltage, safe state.

The safe state is: supply output off and programmed to 0 V, charge and discharge relays (and
load selectors) open, bleed relay closed, residual voltage on the meter input verified below
the bench's limit. :meth:`Interlocks.make_safe` drives the bench there from any state and
tries every step even when an earlier one fails, then says what it could and could not
confirm.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass, field
from typing import Any

from rigbase.errors import LimitError, SafetyError

__all__ = ["Interlocks", "SafeReport"]

log = logging.getLogger(__name__)


@dataclass
class SafeReport:
    """What the safe-state procedure confirmed by readback."""

    supply_off: bool | None = None
    relays_open: bool | None = None
    bleed_closed: bool | None = None
    residual_volts: float | None = None
    residual_limit: float = 1.0
    problems: list[str] = field(default_factory=list)

    @property
    def reached(self) -> bool:
        """True when every readback confirmed the safe state."""
        residual_ok = self.residual_volts is None or abs(self.residual_volts) < self.residual_limit
        return (
            not self.problems
            and bool(self.supply_off)
            and bool(self.relays_open)
            and bool(self.bleed_closed)
            and residual_ok
        )

    def summary(self) -> str:
        """One line for the operator."""
        if self.residual_volts is None:
            res = "residual not measured (no divider probe): treat the input as live"
        else:
            res = f"residual {self.residual_volts:.3g} V"
        if self.reached:
            return f"safe state reached: supply off at 0 V, relays open, bleed closed, {res}"
        return "SAFE STATE NOT CONFIRMED: " + "; ".join(self.problems or [res])

    def to_dict(self) -> dict[str, Any]:
        return {
            "reached": self.reached,
            "supply_off": self.supply_off,
            "relays_open": self.relays_open,
            "bleed_closed": self.bleed_closed,
            "residual_volts": self.residual_volts,
            "problems": list(self.problems),
            "summary": self.summary(),
        }


class Interlocks:
    """Limits and safe-state logic for one open bench (``rig.runner.opener.OpenBench``)."""

    def __init__(self, bench: Any, config: Any) -> None:
        self.bench = bench
        self.config = config
        self.limits = config.limits
        ch = config.channels
        self.charge = int(ch.charge)
        self.discharge = int(ch.discharge)
        self.bleed = int(ch.bleed)
        self.selectors = tuple(int(ld.channel) for ld in config.loads if ld.channel is not None)
        self.divider = config.divider_ratio
        # contacts the bench's own measurements showed stuck although the coil reads back as
        # commanded: the safe-state report cannot claim those relays open
        self.suspects: list[str] = []

    def _stuck(self, text: str, check: str) -> SafetyError:
        """A stuck-contact alarm: remembered for the safe-state report, one line for the
        operator with what to check before touching the bench."""
        self.suspects.append(text)
        return SafetyError(f"{text}; before touching the bench: {check}")

    # -- limits (checked before any command is sent) --------------------------------------------
    def check_voltage(self, volts: float) -> None:
        """LimitError if a charge voltage is outside the bench's limits."""
        if not math.isfinite(volts) or volts < 0:
            raise LimitError(f"charge voltage {volts!r} V is not a non-negative number")
        if volts > self.limits.max_volts:
            raise LimitError(
                f"charge voltage {volts:g} V exceeds the bench limit max_volts = "
                f"{self.limits.max_volts:g} V"
            )

    # -- readbacks ------------------------------------------------------------------------------
    def residual(self) -> float | None:
        """Meter input voltage from the divider probe on scope input 2 (None if not fitted)."""
        if not self.divider:
            return None
        return float(self.bench.scope.measure_dc(2)) * float(self.divider)

    def require_open(self, channels: tuple[int, ...], why: str) -> None:
        """SafetyError unless every listed relay reads back open."""
        states = self.bench.switch.closed(list(channels))
        stuck = [c for c, s in zip(channels, states, strict=True) if s]
        if stuck:
            raise SafetyError(f"relay channel(s) {stuck} read back closed {why}")

    def supply_live(self) -> float | None:
        """The supply's measured output voltage when it is above the hazardous-live limit with
        the output commanded off (a supply that does not turn off), else None."""
        v = float(self.bench.supply.measure_voltage())
        return v if abs(v) > self.limits.hazardous_live_volts else None

    def precheck(self) -> float | None:
        """Before an event: supply off (commanded and measured), charge and discharge open,
        residual below the limit."""
        if self.bench.supply.output_is_on():
            raise SafetyError("pre-check: supply output reads back ON before charging")
        live = self.supply_live()
        if live is not None:
            raise SafetyError(
                f"pre-check: supply measures {live:.4g} V with its output off (above "
                f"{self.limits.hazardous_live_volts:g} V): it does not turn off"
            )
        self.require_open((self.charge, self.discharge), "before charging")
        r = self.residual()
        if r is not None and abs(r) >= self.limits.safe_residual_volts:
            raise SafetyError(
                f"pre-check: residual {r:.3g} V on the meter input is above "
                f"safe_residual_volts = {self.limits.safe_residual_volts:g} V"
            )
        return r

    def verify_charged(self, volts: float, fraction: float = 0.5) -> float | None:
        """After the dwell, the meter input must have reached ``fraction`` of the setpoint.

        Less means current is going somewhere else - a shorted input, or a discharge relay
        whose contacts welded while its coil reads back open - so the run stops before the
        discharge. Returns the input voltage (None without a divider probe)."""
        if volts > 0 and not self.bench.supply.output_is_on():
            raise SafetyError(
                f"supply output reads back OFF after the charge dwell at {volts:g} V: "
                "the supply tripped (current or voltage protection); check its front panel "
                "and the charge path for a short before going on"
            )
        v = self.residual()
        if v is not None and volts > 0 and abs(v) < fraction * volts:
            raise self._stuck(
                f"meter input reached only {v:.3g} V of {volts:g} V after the charge dwell: "
                f"shorted input, welded discharge relay (channel {self.discharge}) or a charge "
                f"relay (channel {self.charge}) that does not close",
                f"measure the meter input, then check relay channels {self.discharge} and "
                f"{self.charge} and the input for a short",
            )
        return v

    def verify_isolated(self, charged_volts: float | None, volts: float) -> None:
        """After ISOLATE (supply off at 0 V, charge relay commanded open): the supply must
        carry no current. A welded charge contact lets the charged input drain back into the
        supply, about ``V_in / (R_charge + R_out)``; an open one carries nothing. The limit is
        a tenth of the least such current, ``V_in / R_charge`` (R_out unknown, >= 0)."""
        v_in = abs(charged_volts) if charged_volts is not None else volts
        if v_in <= self.limits.safe_residual_volts:
            return
        amps = abs(float(self.bench.supply.measure_current()))
        limit = 0.1 * v_in / float(self.config.charge_ohms)
        if amps > limit:
            raise self._stuck(
                f"charge relay channel {self.charge} conducts although it reads back open: "
                f"the supply carries {amps:.3g} A with its output off (limit {limit:.3g} A); "
                "welded contact",
                "switch the supply off at the mains, then measure the meter input and replace "
                f"relay channel {self.charge}",
            )

    def verify_discharge_path(
        self, captured: bool, charged_volts: float | None, load: str, selector: int | None
    ) -> None:
        """After DISCHARGE, when the scope did not trigger (so the acquisition timeout has
        passed with the discharge relay closed): through a working path the input is empty by
        then; charge left above the safe residual and above 1 % of the charge means no
        current flowed - the discharge relay or the load's selector did not close."""
        if captured or charged_volts is None:
            return
        v = self.residual()
        floor = max(self.limits.safe_residual_volts, 0.01 * abs(charged_volts))
        if v is not None and abs(v) > floor:
            sel = f" or load selector channel {selector} ({load})" if selector else ""
            raise self._stuck(
                f"no discharge: the input still holds {v:.3g} V of {charged_volts:.3g} V and the "
                f"scope did not trigger; discharge relay channel {self.discharge}{sel} does "
                "not close",
                f"let the bleed work, measure the meter input, then check relay channel "
                f"{self.discharge}" + (f" and {selector}" if selector else ""),
            )

    def check_peak(self, peak_amps: float, volts: float, path_ohms: float, load: str) -> None:
        """The discharge current cannot exceed twice ``volts / path_ohms`` through the
        selected load alone (resistive bound, doubled for ringing). More means a second
        path conducts: another load's selector welded closed."""
        bound = 2.0 * volts / path_ohms if path_ohms > 0 else math.inf
        if volts > 0 and abs(peak_amps) > bound:
            others = list(self.selectors)
            raise self._stuck(
                f"discharge peak {abs(peak_amps):.3g} A exceeds {bound:.3g} A that load {load!r} "
                f"allows at {volts:g} V: another load path conducts; welded load selector "
                f"(channels {others})?",
                f"check load selector relays {others} for welded contacts",
            )

    # -- bleeding -------------------------------------------------------------------------------
    def bleed_until_safe(
        self, bleed_s: float, max_wait_s: float, settle_s: float = 0.01
    ) -> float | None:
        """Close the bleed relay, wait, open it and read the residual with the bleed open
        (charge held behind a series capacitor comes back once the bleed lets go); repeat
        until safe or ``max_wait_s`` is spent. Returns the residual (None if not measured);
        SafetyError if it stays above the limit. Leaves the bleed open."""
        clock = self.bench.clock
        switch = self.bench.switch
        waited = 0.0
        step = max(bleed_s, 1e-3)
        while True:
            switch.close([self.bleed])
            clock.sleep(step)
            waited += step
            switch.open([self.bleed])
            clock.sleep(settle_s)
            r = self.residual()
            if r is None or abs(r) < self.limits.safe_residual_volts:
                return r
            if waited >= max_wait_s:
                switch.close([self.bleed])
                raise SafetyError(
                    f"residual {r:.3g} V still above {self.limits.safe_residual_volts:g} V after "
                    f"{waited:.3g} s of bleeding; bleed left closed"
                )
            step = min(step * 2, max_wait_s)

    # -- the safe state -------------------------------------------------------------------------
    def make_safe(self, bleed_s: float = 1.0, max_wait_s: float = 30.0) -> SafeReport:
        """Drive the bench to the safe state from anywhere; never raises."""
        rep = SafeReport(residual_limit=self.limits.safe_residual_volts)
        b = self.bench
        try:
            b.supply.make_safe()
        except Exception as exc:
            rep.problems.append(f"supply: could not switch off ({exc})")
        try:
            b.scope.abort()
        except Exception:  # an idle scope may refuse; not a safety matter
            pass
        risky = (self.charge, self.discharge, *self.selectors)
        try:
            b.switch.open(list(risky))
        except Exception as exc:
            rep.problems.append(f"switch: could not open {list(risky)} ({exc})")
        try:
            b.switch.close([self.bleed])
        except Exception as exc:
            rep.problems.append(f"switch: could not close bleed channel {self.bleed} ({exc})")
        # readbacks
        try:
            rep.supply_off = not b.supply.output_is_on()
            if not rep.supply_off:
                rep.problems.append("supply output still reads back ON")
            live = self.supply_live()
            if live is not None:
                rep.supply_off = False
                rep.problems.append(
                    f"supply still measures {live:.4g} V with its output off: switch it off at "
                    "the mains; the charge relay is the only barrier"
                )
        except Exception as exc:
            rep.problems.append(f"supply readback failed ({exc})")
        try:
            states = b.switch.closed([*risky, self.bleed])
            rep.relays_open = not any(states[:-1])
            rep.bleed_closed = bool(states[-1])
            if not rep.relays_open:
                stuck = [c for c, s in zip(risky, states[:-1], strict=True) if s]
                rep.problems.append(f"relay channel(s) {stuck} still read back closed")
            if not rep.bleed_closed:
                rep.problems.append(f"bleed channel {self.bleed} does not read back closed")
        except Exception as exc:
            rep.problems.append(f"switch readback failed ({exc})")
        # bleed: measured where a divider is fitted; where the measurement fails or no
        # divider is fitted, wait the full bleed allowance, since nothing can confirm it
        waited, step = 0.0, max(bleed_s, 1e-3)
        measured = bool(self.divider)
        while True:
            step = min(step, max_wait_s - waited) if waited < max_wait_s else 0.0
            b.clock.sleep(step)
            waited += step
            if not measured:
                if waited >= max_wait_s:
                    break
                step *= 2
                continue
            try:
                rep.residual_volts = self.residual()
            except Exception as exc:
                rep.problems.append(f"residual measurement failed ({exc}); bled {max_wait_s:g} s")
                rep.residual_volts = None
                measured = False
                continue
            if abs(rep.residual_volts) < self.limits.safe_residual_volts:
                break
            if waited >= max_wait_s:
                rep.problems.append(
                    f"residual {rep.residual_volts:.3g} V above "
                    f"{self.limits.safe_residual_volts:g} V after {waited:.3g} s of bleeding"
                )
                break
            step *= 2
        for text in self.suspects:
            rep.relays_open = False
            rep.problems.append(f"{text} (the coil readback cannot show it)")
        log.info("%s", rep.summary())
        return rep
