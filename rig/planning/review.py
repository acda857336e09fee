"""A plan described and reviewed for safety, before any instrument is touched: limits of the bench file,
the hazardous-live and stored-charge figures of IEC 61010-1, charge and bleed times from the
meters' netlists, and records too short for the slowest discharge time constant. ``rig check``,
``rig run`` and ``rig resume`` print the same findings; a "stop" finding ends the command.
"""

from __future__ import annotations

import logging
import math

from rig.planning.benchfile import Bench
from rig.planning.plan import (
    Finding,
    Plan,
    _bleed_s,
    _si,
    meter_capacitance_f,
)
from rig.planning.sequence import MeterSpec, Sequence

__all__ = ["RECORD_TAUS", "describe", "record_findings", "safety_review"]

log = logging.getLogger(__name__)


def safety_review(
    plan: Plan,
    bench: Bench,
    sequence: Sequence,
    time_constants: dict[tuple[int, str], float] | None = None,
) -> list[Finding]:
    """Check the plan against the bench's limits and the physics of its charge and bleed paths.

    "stop" findings forbid the run; "warn" findings need the operator's attention; "info"
    findings say what was assumed. Capacitances come from the meters' simulated netlists
    (sum of all capacitors: an upper estimate); for real meters without one they are unknown.
    ``time_constants`` maps (meter index, mode) to the slowest discharge time constant, s
    (``rig.runner.opener.meter_time_constants``): a capture shorter than 5 of them is named.
    """
    out: list[Finding] = []
    lim = bench.limits
    vmax = plan.max_volts
    sim = bench.simulation
    simulated = bench.uses_simulation

    # 1. voltage against the bench's own maximum and the supply's capability
    if vmax > lim.max_volts:
        out.append(
            Finding(
                "stop",
                f"highest voltage {vmax:g} V is above the bench's max_volts {lim.max_volts:g} V",
            )
        )
    if sim is not None and vmax > sim.world.supply_max_volts:
        out.append(
            Finding(
                "stop",
                f"highest voltage {vmax:g} V is above the simulated "
                f"supply's {sim.world.supply_max_volts:g} V",
            )
        )
    # 2. hazardous-live threshold (IEC 61010-1, see rig.planning.benchfile.Limits)
    if vmax > lim.hazardous_live_volts:
        if simulated:
            out.append(
                Finding(
                    "info",
                    f"highest voltage {vmax:g} V is above the hazardous-live "
                    f"limit {lim.hazardous_live_volts:g} V; simulated here, "
                    "real hardware would ask for confirmation",
                )
            )
        else:
            out.append(
                Finding(
                    "warn",
                    f"HIGH VOLTAGE: the plan charges to {vmax:g} V, above the "
                    f"hazardous-live limit {lim.hazardous_live_volts:g} V; "
                    "the run will ask for an explicit confirmation",
                )
            )
    # 3. current limit against the charge path and the supply
    r_charge = bench.charge_ohms + (sim.world.wiring.supply_output_ohms if sim else 0.0)
    i_peak = vmax / r_charge if r_charge > 0 else math.inf
    if sim is not None and lim.current_limit_amps > sim.world.supply_max_amps:
        out.append(
            Finding(
                "warn",
                f"current_limit_amps {lim.current_limit_amps:g} A is above "
                f"the simulated supply's {sim.world.supply_max_amps:g} A",
            )
        )
    if lim.current_limit_amps < i_peak:
        out.append(
            Finding(
                "warn",
                f"supply current limit {_si(lim.current_limit_amps, 'A')} is "
                f"below the charge path's initial current V/R_charge = "
                f"{_si(i_peak, 'A')}: charging starts at constant current "
                "and takes longer than 5 time constants",
            )
        )
    else:
        out.append(
            Finding(
                "info",
                f"charge current at most V/R_charge = {_si(i_peak, 'A')} "
                f"(supply limit {_si(lim.current_limit_amps, 'A')})",
            )
        )
    # 4-6. per meter: dwell vs 5 tau, stored charge, bleed time vs hold
    for meter in sequence.meters:
        out.extend(_meter_findings(meter, plan, bench, sequence, r_charge))
    # 6b. record length against the slowest discharge time constant
    out.extend(record_findings(sequence, time_constants or {}))
    # 7. how the residual is checked
    if bench.divider_ratio is not None:
        out.append(
            Finding(
                "info",
                f"residual measured through the {bench.divider_ratio:g}:1 divider on scope input 2",
            )
        )
        if len(sequence.delays_s) > 1:
            out.append(
                Finding(
                    "info",
                    f"during the delays the divider's {_si(bench.divider_ohms, 'ohm')}"
                    " also drains the meter's input; the self-discharge time "
                    "constant includes it",
                )
            )
    else:
        out.append(
            Finding(
                "warn",
                "no divider probe fitted: the residual is only inferred from "
                "the bleed time, never measured",
            )
        )
    return out


#: a record should run this many slowest time constants past the trigger (the tail beyond
#: then holds under 1 % of the charge: exp(-5) = 0.7 %, textbook exponential)
RECORD_TAUS = 5.0


def record_findings(
    sequence: Sequence, time_constants: dict[tuple[int, str], float]
) -> list[Finding]:
    """A warning per meter and mode whose longest capture ends less than RECORD_TAUS slowest
    time constants after the trigger, naming the capture and the record it would need."""
    out: list[Finding] = []
    for (k, mode), tau in sorted(time_constants.items()):
        if not (math.isfinite(tau) and tau > 0):
            continue
        spans = {c: sequence.scope_for(mode, c) for c in sequence.captures}
        name = max(spans, key=lambda c: spans[c].record_s)
        s = spans[name]
        post = s.record_s + min(0.0, s.trigger_offset_s)
        need = RECORD_TAUS * tau
        if post >= need:
            continue
        points = math.ceil((need - min(0.0, s.trigger_offset_s)) / s.sample_interval_s)
        out.append(
            Finding(
                "warn",
                f"{sequence.meters[k].label} {mode}: slowest discharge time constant "
                f"{_si(tau, 's')}; capture {name!r} records {_si(post, 's')} after the "
                f"trigger, less than {RECORD_TAUS:g} time constants ({_si(need, 's')}): "
                f"the charge beyond the record is extrapolated and flagged; set points >= "
                f"{points} at {_si(s.sample_interval_s, 's')}",
            )
        )
    return out


def _meter_findings(
    meter: MeterSpec, plan: Plan, bench: Bench, sequence: Sequence, r_charge: float
) -> list[Finding]:
    out: list[Finding] = []
    lim = bench.limits
    vmax = max(
        (e.volts for e in plan.events if e.serial == meter.serial and e.meter == meter.model),
        default=plan.max_volts,
    )
    c_f = meter_capacitance_f(meter)
    name = meter.label
    if c_f is None:
        c_ok = sequence.dwell_s / (5 * r_charge)
        out.append(
            Finding(
                "info",
                f"{name}: input capacitance unknown; dwell_s "
                f"{sequence.dwell_s:g} s covers 5 time constants for up to "
                f"{_si(c_ok, 'F')} through R_charge",
            )
        )
        return out
    tau = r_charge * c_f
    if sequence.dwell_s < 5 * tau:
        reached = 1 - math.exp(-sequence.dwell_s / tau)
        out.append(
            Finding(
                "warn",
                f"{name}: dwell_s {sequence.dwell_s:g} s is shorter than "
                f"5 time constants ({5 * tau:.3g} s for {_si(c_f, 'F')} "
                f"through {_si(r_charge, 'ohm')}): charged to about "
                f"{100 * reached:.0f} %",
            )
        )
    else:
        out.append(
            Finding(
                "info",
                f"{name}: dwell_s {sequence.dwell_s:g} s >= 5 time constants "
                f"({5 * tau:.3g} s; C <= {_si(c_f, 'F')} from its netlist)",
            )
        )
    if sequence.charge_done_amps is not None:
        out.append(
            Finding(
                "info",
                f"{name}: the dwell may end early once the supply current "
                f"falls below {_si(sequence.charge_done_amps, 'A')}",
            )
        )
    stored = c_f * vmax
    if stored > lim.stored_charge_limit_c:
        out.append(
            Finding(
                "warn",
                f"{name}: its input may store up to {_si(stored, 'C')} at "
                f"{vmax:g} V, above the stored-charge limit "
                f"{_si(lim.stored_charge_limit_c, 'C')} (IEC 61010-1); C is the sum of its netlist's capacitors, an upper estimate",
            )
        )
    t_bleed = _bleed_s(vmax, c_f, bench)
    if t_bleed > sequence.hold_s:
        out.append(
            Finding(
                "warn",
                f"{name}: the bleed needs about {t_bleed:.3g} s to bring "
                f"{vmax:g} V below {lim.safe_residual_volts:g} V "
                f"(tau = {bench.bleed_ohms * c_f:.3g} s), longer than "
                f"hold_s {sequence.hold_s:g} s: the residual check will wait",
            )
        )
    return out


# --------------------------------------------------------------------------------------------
# Text for `rig check`
# --------------------------------------------------------------------------------------------


def _duration_text(seconds: float) -> str:
    seconds = int(round(seconds))
    h, rest = divmod(seconds, 3600)
    m, s = divmod(rest, 60)
    if h:
        return f"{h} h {m:02d} min"
    if m:
        return f"{m} min {s:02d} s"
    return f"{s} s"


def describe(
    plan: Plan,
    bench: Bench,
    sequence: Sequence,
    time_constants: dict[tuple[int, str], float] | None = None,
) -> str:
    """The summary `rig check` prints: events, counts per meter and mode, changes, highest
    voltage, estimated duration and the safety review's findings."""
    lines = [
        f"sequence  {sequence.name}  ({sequence.path})",
        f"bench     {bench.name}  ({bench.path}){'  [simulated]' if bench.uses_simulation else ''}",
    ]
    if sequence.operator_note:
        lines.append(f"note      {sequence.operator_note}")
    lines.append(
        f"events    {len(plan.events)}  ({sequence.order}"
        + (f", seed {sequence.shuffle_seed}" if sequence.order == "shuffled" else "")
        + f"; {sequence.repetitions} per group)"
    )
    counts: dict[tuple[int, str], int] = {}
    for e in plan.events:
        counts[(e.meter_index, e.mode)] = counts.get((e.meter_index, e.mode), 0) + 1
    for m_index, meter in enumerate(sequence.meters):
        lines.append(
            f"  meter {m_index}: {meter.label}" + (f"  ({meter.rating})" if meter.rating else "")
        )
        for mode in meter.modes:
            lines.append(f"    {mode:<10s} {counts.get((m_index, mode), 0):6d} events")
    lines.append(
        f"captures  {len(sequence.captures)} per event "
        "(sample interval, record, span, bits, bandwidth; per-mode overrides not shown):"
    )
    for name in sequence.captures:
        s = (sequence.scope_captures or {}).get(name, sequence.scope)
        bw = _si(s.bandwidth_hz, "Hz") if s.bandwidth_hz else "full"
        lines.append(
            f"    {name:<10s} {_si(s.sample_interval_s, 's')}, {s.points} points = "
            f"{_si(s.record_s, 's')}, {s.current_offset_amps - s.current_range_amps / 2:g} .. "
            f"{s.current_offset_amps + s.current_range_amps / 2:g} A, {s.bits} bits, {bw}"
        )
    volts = ", ".join(f"{v:g}" for v in sequence.volts)
    delays = ", ".join(f"{d:g}" for d in sequence.delays_s)
    lines += [
        f"volts     {volts} V;  loads {', '.join(sequence.loads)};  delays {delays} s",
        f"changes   {plan.mode_changes} mode changes, {plan.meter_changes} meter changes",
        f"highest   {plan.max_volts:g} V  (bench max_volts {bench.limits.max_volts:g} V)",
        f"duration  about {_duration_text(plan.estimated_s)} in real time"
        + (
            "  (virtual clock: much faster)"
            if bench.simulation and bench.simulation.clock == "virtual"
            else ""
        ),
    ]
    findings = safety_review(plan, bench, sequence, time_constants)
    lines.append("safety review:")
    order = {"stop": 0, "warn": 1, "info": 2}
    for f in sorted(findings, key=lambda f: order[f.level]):
        lines.append(f"  {f.level.upper():5s} {f.message}")
    if not findings:
        lines.append("  (nothing to report)")
    return "\n".join(lines)
