"""Bring-up: walk an instrument's profile command by command, safely, and say what to fix.

``rig bringup BENCH [--role ROLE]`` runs, for each instrument of the bench (or one):

1. the link: the profile's line ends (and serial settings) are tried with one harmless query;
   if nothing answers, the other candidates are tried (:func:`drivers.probe.find_link`), and
   whether the instrument answers ``*IDN?`` at all is noted;
2. the walk: every operation of the profile that is safe to send, one at a time, printing
   what was sent, what came back and whether it matched what the profile leads one to
   expect. Safe means: the supply's output is switched off and never on (its voltage
   setpoint is 0 V); each relay is closed alone, read back, opened and read back again (and
   the walk stops switching at the first readback that disagrees); the scope sets up input
   1 and acquires one short record of whatever is (not) connected;
3. the first thing to fix, and a proposed profile with the link finding written in
   (``--write DIR``), where the link differed from the profile's.

Only the supply's setpoint of 0 V and its output off are written to it; nothing here can put
a voltage on the bench.
"""

from __future__ import annotations

import re
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pyvisa

from drivers.clock import RealClock
from drivers.dialect import termination_name
from drivers.probe import Trial, find_link, probe
from drivers.profile import Profile
from drivers.scope import Scope
from drivers.session import ScpiSession
from drivers.supply import Supply
from drivers.switch import SwitchBoard
from rigbase.errors import InstrumentError, LimitError, SafetyError

__all__ = ["Step", "RoleReport", "bring_up", "propose_profile"]


@dataclass
class Step:
    """One command of the walk: what was sent, what came back, and the verdict."""

    operation: str
    sent: str
    reply: str
    ok: bool
    note: str = ""

    def line(self) -> str:
        mark = "ok  " if self.ok else "FAIL"
        note = f"  ({self.note})" if self.note else ""
        reply = self.reply if len(self.reply) <= 48 else self.reply[:45] + "..."
        return f"  {mark} {self.operation:28s} sent {self.sent!r:40s} got {reply!r}{note}"


@dataclass
class RoleReport:
    """The bring-up of one instrument."""

    role: str
    resource: str
    profile: Profile
    link: Trial | None = None
    trials: list[Trial] = field(default_factory=list)
    idn: bool | None = None
    steps: list[Step] = field(default_factory=list)

    def first_fix(self) -> str | None:
        """The first thing to fix, in words, or None when everything matched."""
        p = self.profile.path.name
        if self.link is None:
            return f"{self.role}: nothing answers on {self.resource} (cable, address, power?)"
        link = self.profile.dialect.link
        if self.link.write_termination != link.write_termination:
            return (
                f"{self.role}: {p} [link] write_termination: the instrument answers to "
                f"{termination_name(self.link.write_termination)}, not "
                f"{termination_name(link.write_termination)}"
            )
        if self.link.baud_rate is not None and self.link.baud_rate != link.baud_rate:
            return f"{self.role}: {p} [link] baud_rate: the instrument answers at {self.link.baud_rate}"
        if self.idn is False and self.profile.has_operation("common", "identify"):
            return f"{self.role}: {p} [common] identify: the instrument answers nothing to it"
        for s in self.steps:
            if not s.ok:
                return f"{self.role}: {p} {s.operation}: sent {s.sent!r}, {s.reply or s.note}"
        return None


class _Walk:
    """Runs steps on one session, recording each."""

    def __init__(self, report: RoleReport, session: ScpiSession) -> None:
        self.report, self.session = report, session

    def step(
        self,
        operation: str,
        command: str,
        *,
        query: bool,
        expect: Callable[[str], bool] | None = None,
        why: str = "",
    ) -> str | None:
        try:
            if query:
                reply = self.session.query(command, repeatable=False)
            else:
                self.session.write(command, repeatable=False)
                reply = self.session.profile.dialect.link.acknowledge
        except InstrumentError as exc:
            detail = exc.detail  # a ScpiError's detail is the instrument's own error
            self.report.steps.append(Step(operation, command, "", False, detail))
            return None
        ok = expect is None or expect(reply)
        self.report.steps.append(Step(operation, command, reply, ok, "" if ok else why))
        return reply


def _number(text: str) -> float | None:
    try:
        return float(text)
    except ValueError:
        return None


def _probe_queries(profile: Profile, role: str, bench: Any) -> list[str]:
    out = []
    if profile.has_operation("common", "identify"):
        out.append(profile.command("common", "identify"))
    if role == "supply":
        out.append(profile.command("supply", "get_output"))
    elif role == "switch":
        ch = bench.channels.charge
        out.append(
            profile.command(
                "switch", "get_closed", channels=profile.dialect.channel_list.text([ch])
            )
        )
    elif role == "scope":
        out.append(profile.command("scope", "measure_dc", ch=1))
    return out


def _walk_common(w: _Walk, p: Profile) -> None:
    if p.has_operation("common", "clear_status"):
        w.step("clear_status", p.command("common", "clear_status"), query=False)
    if p.has_operation("common", "next_error"):
        w.step(
            "next_error",
            p.command("common", "next_error"),
            query=True,
            expect=lambda r: r.strip().lstrip("+").split(",")[0] == "0",
            why="expected an empty queue (0,...)",
        )


def _walk_supply(w: _Walk, p: Profile) -> None:
    c = lambda op, **f: p.command("supply", op, **f)  # noqa: E731
    low_amps = p.ranges("supply")["amps"][0]
    amps = max(low_amps, 1e-3)
    w.step("output_off", c("output_off"), query=False)
    if p.has_operation("supply", "disable_output"):
        w.step("disable_output", c("disable_output"), query=False)
    w.step(
        "get_output",
        c("get_output"),
        query=True,
        expect=lambda r: r.strip().upper() in ("0", "OFF", "+0"),
        why="expected off",
    )
    w.step("set_voltage", c("set_voltage", volts=0.0), query=False)
    w.step(
        "get_voltage",
        c("get_voltage"),
        query=True,
        expect=lambda r: _number(r) == 0.0,
        why="expected 0",
    )
    w.step("set_current_limit", c("set_current_limit", amps=amps), query=False)
    w.step(
        "get_current_limit",
        c("get_current_limit"),
        query=True,
        expect=lambda r: (v := _number(r)) is not None and abs(v - amps) <= 1e-9 + 1e-6 * amps,
        why=f"expected {amps:g}",
    )
    if p.has_operation("supply", "get_interlock"):
        closed = p.dialect.interlock_closed
        w.step(
            "get_interlock",
            c("get_interlock"),
            query=True,
            expect=lambda r: r.strip() == closed,
            why=f"expected {closed!r} (interlock closed)",
        )
    for op in ("measure_voltage", "measure_current"):
        w.step(
            op, c(op), query=True, expect=lambda r: _number(r) is not None, why="expected a number"
        )


def _walk_switch(w: _Walk, p: Profile, bench: Any) -> None:
    sw = SwitchBoard(w.session, p)
    chans = [bench.channels.charge, bench.channels.discharge, bench.channels.bleed]
    chans += [ld.channel for ld in bench.loads if ld.channel is not None]
    w.step("open_all", p.command("switch", "open_all"), query=False)
    rb = p.dialect.readback
    for ch in chans:
        lst = sw._list([ch])
        for op, want in (("close", rb.closed), ("open", rb.open)):
            w.step(op, p.command("switch", op, channels=lst), query=False)
            got = w.step(
                "get_closed",
                p.command("switch", "get_closed", channels=lst),
                query=True,
                expect=lambda r, want=want: r.strip() == want,
                why=f"channel {ch}: expected {want!r}",
            )
            if got is None or got.strip() != want:
                w.step("open_all", p.command("switch", "open_all"), query=False)
                return  # stop switching at the first readback that disagrees


class _Recorder:
    """A session stand-in for a driver: every exchange becomes a step of the walk."""

    def __init__(self, walk: _Walk) -> None:
        self.walk, self.session = walk, walk.session
        self.name, self.profile = walk.session.name, walk.session.profile

    def _do(self, command: str, fn: Callable[[], Any], shown: Callable[[Any], str]) -> Any:
        try:
            result = fn()
        except InstrumentError as exc:
            detail = exc.detail
            self.walk.report.steps.append(
                Step(_operation(self.profile, command), command, "", False, detail)
            )
            raise
        self.walk.report.steps.append(
            Step(_operation(self.profile, command), command, shown(result), True)
        )
        return result

    def write(self, command: str, **kw: Any) -> None:
        self._do(command, lambda: self.session.write(command, **kw), lambda r: "")

    def query(self, command: str, **kw: Any) -> str:
        return self._do(command, lambda: self.session.query(command, **kw), str)

    def query_float(self, command: str, **kw: Any) -> float:
        return self._do(command, lambda: self.session.query_float(command, **kw), str)

    def query_int(self, command: str, **kw: Any) -> int:
        return self._do(command, lambda: self.session.query_int(command, **kw), str)

    def query_block(self, command: str, *a: Any, **kw: Any) -> Any:
        return self._do(
            command,
            lambda: self.session.query_block(command, *a, **kw),
            lambda r: f"block of {len(r)} codes",
        )


def _head_rx(template: str) -> re.Pattern[str]:
    word = template.split()[0] if template.split() else template
    return re.compile(re.sub(r"\\\{[^}]*\\\}", ".*?", re.escape(word)), re.IGNORECASE)


def _operation(profile: Profile, command: str) -> str:
    """The profile operation whose command header matches ``command``'s (for messages)."""
    head = command.split()[0] if command.split() else ""
    for role, ops in profile.templates.items():
        for op, template in ops.items():
            if _head_rx(template).fullmatch(head):
                return f"[{role}] {op}"
    for name, q in profile.dialect.scaling_queries.items():
        if isinstance(q, str) and _head_rx(q).fullmatch(head):
            return f"[scope.scaling_queries] {name}"
    return "(driver)"


def _walk_scope(w: _Walk, p: Profile) -> None:
    sc = Scope(_Recorder(w), p)  # type: ignore[arg-type]
    points = int(max(p.ranges("scope")["points"][0], 1000))
    clock = RealClock()
    try:
        sc.configure_channel(
            1,
            coupling="DC",
            impedance_ohms=1e6,
            bandwidth_hz=None,
            range_volts=1.0,
            offset_volts=0.0,
        )
        sc.configure_acquisition(1e-6, points, 0.0)
        sc.configure_trigger(1, 0.0, "either")
        sc.set_format(8)
        sc.arm()
        forced = sc.force_trigger()
        clock.sleep(points * 1e-6)
        if not sc.wait_complete(clock, timeout_s=2.0, poll_s=0.05):
            why = "no record within 2 s" + ("" if forced else " (no force_trigger: open input)")
            w.report.steps.append(
                Step("wait_complete", p.dialect.completion.method, "", False, why)
            )
            sc.abort()
            return
        trace = sc.fetch(1)
    except (InstrumentError, LimitError):
        return  # the recorder has the failing step
    ok = len(trace.codes) == points
    w.report.steps.append(
        Step(
            "record",
            f"input 1, {points} points",
            f"{len(trace.codes)} codes",
            ok,
            "" if ok else f"expected {points} codes",
        )
    )


def _supply_off(bench: Any, resources: dict[str, str], rm: Any, out: Callable[[str], None]) -> bool:
    """Before any relay moves: the supply's output off at 0 V, confirmed by its readback."""
    spec = bench.instruments["supply"]
    resource = resources.get("supply", spec.resource)
    try:
        profile = Profile.load(spec.profile)
        with ScpiSession(
            resource,
            "supply",
            profile=profile,
            timeout_s=min(spec.timeout_s, 2.0),
            reconnect_attempts=0,
            resource_manager=rm,
        ) as s:
            supply = Supply(s, profile)
            supply.make_safe()
            off = not supply.output_is_on()
    except (InstrumentError, LimitError, SafetyError) as exc:
        out(f"  supply: cannot confirm its output off ({exc}); relays stay as they are")
        return False
    out(
        "  supply: output off at 0 V (read back) before switching relays"
        if off
        else "  supply: output still reads on; relays stay as they are"
    )
    return off


def bring_up(
    bench: Any, roles: list[str], resources: dict[str, str], out: Callable[[str], None]
) -> list[RoleReport]:
    """Walk each role's profile against its instrument (``resources``: role -> VISA resource)
    and print the steps with ``out``; returns the reports."""
    reports: list[RoleReport] = []
    rm = pyvisa.ResourceManager("@py")
    try:
        for role in roles:
            spec = bench.instruments[role]
            profile = Profile.load(spec.profile)
            rep = RoleReport(role, resources[role], profile)
            reports.append(rep)
            out(f"{role}: {rep.resource}, profile {profile.path.name} ({profile.name})")
            rep.link, rep.trials = find_link(
                rm, rep.resource, _probe_queries(profile, role, bench), profile.dialect.link
            )
            for t in rep.trials:
                out(f"  link  {t.describe()}")
            if rep.link is None:
                out(f"  first thing to fix: {rep.first_fix()}")
                continue
            idn = probe(
                rm,
                rep.resource,
                "*IDN?",
                rep.link.write_termination,
                profile.dialect.link,
                rep.link.baud_rate,
            )
            rep.idn = idn.answer is not None and not profile.dialect.link.error_match(
                idn.answer.decode("latin-1")
            )
            out(
                f"  *IDN? {'answered ' + repr(idn.answer.decode('latin-1').strip()) if rep.idn else 'not answered'}"
            )
            if rep.first_fix() is not None:
                out(f"  first thing to fix: {rep.first_fix()}")
                continue
            session = ScpiSession(
                rep.resource,
                role,
                profile=profile,
                timeout_s=min(spec.timeout_s, 2.0),
                reconnect_attempts=0,
                resource_manager=rm,
            )
            walk = _Walk(rep, session)
            try:
                _walk_common(walk, profile)
                if role == "supply":
                    _walk_supply(walk, profile)
                elif role == "switch":
                    if _supply_off(bench, resources, rm, out):
                        _walk_switch(walk, profile, bench)
                    else:
                        rep.steps.append(
                            Step(
                                "(supply)",
                                "output off, 0 V",
                                "",
                                False,
                                "supply not confirmed off: no relay switched",
                            )
                        )
                elif role == "scope":
                    _walk_scope(walk, profile)
            finally:
                if role == "supply":
                    try:
                        Supply(session, profile).make_safe()
                    except (InstrumentError, LimitError, SafetyError) as exc:
                        out(f"  supply: making safe failed: {exc}")
                session.close()
            for s in rep.steps:
                out(s.line())
            fix = rep.first_fix()
            out(f"  {'first thing to fix: ' + fix if fix else 'every step matched'}")
    finally:
        rm.close()
    return reports


def propose_profile(rep: RoleReport, folder: Path) -> Path | None:
    """Write ``<folder>/<profile stem>.proposed.toml``: the profile with the link finding
    (line ends, baud rate, identify) written in; None when the link matched the profile."""
    link, found = rep.profile.dialect.link, rep.link
    if found is None:
        return None
    changes: dict[str, object] = {}
    if found.write_termination != link.write_termination:
        changes["write_termination"] = found.write_termination
    if found.read_termination and found.read_termination != link.read_termination:
        changes["read_termination"] = found.read_termination
    if found.baud_rate is not None and found.baud_rate != link.baud_rate:
        changes["baud_rate"] = found.baud_rate
    drop_idn = rep.idn is False and rep.profile.has_operation("common", "identify")
    if not changes and not drop_idn:
        return None
    text = rep.profile.path.read_text(encoding="utf-8")
    text = re.sub(r"(?m)^format\s*=\s*1\b", "format = 2", text)
    lines = [f"{k} = {_toml(v)}  # found by rig bringup" for k, v in changes.items()]
    if re.search(r"(?m)^\[link\]", text):
        for k in changes:
            text = re.sub(rf"(?m)^{k}\s*=.*\n", "", text)
        text = re.sub(
            r"(?m)^\[link\][^\n]*\n", lambda m: m.group(0) + "\n".join(lines) + "\n", text
        )
    elif lines:
        text = re.sub(
            r"(?m)^\[common\]", "[link]\n" + "\n".join(lines) + "\n\n[common]", text, count=1
        )
    if drop_idn:
        text = re.sub(
            r"(?m)^identify\s*=.*$",
            lambda m: "# " + m.group(0) + "  # answers nothing (rig bringup)",
            text,
        )
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / f"{rep.profile.path.stem}.proposed.toml"
    path.write_text(text, encoding="utf-8")
    Profile.load(path)  # the proposal must itself load
    return path


def _toml(value: object) -> str:
    if isinstance(value, str):
        return '"' + value.replace("\\", "\\\\").replace("\r", "\\r").replace("\n", "\\n") + '"'
    return str(value)
