"""The event cycle as a state machine, with the safe state on every exit path.

One discharge event (DESIGN.md):

    PRECHECK   supply off, charge and discharge open, residual below the limit
    CHARGE     limits checked, charge relay closed (break before make), supply on, dwell
    ISOLATE    supply off at 0 V, charge relay open and verified, planned delay
    ARM        scope single shot
    DISCHARGE  discharge relay closed (charge and bleed verified open first), acquisition
    FETCH      waveform and its scaling, discharge relay opened and verified
    BLEED      bleed until the residual is safe, hold
    COMMIT     waveform file and journal line, fsynced

Whatever ends the run - the last event, Ctrl-C, SIGTERM, an instrument error, a lost
connection, a timeout, an interlock, any exception - :meth:`Runner.run` drives the bench to
the safe state, records which exit path it took in the manifest, and returns a
:class:`RunOutcome`. The runner computes no metrics: it stores raw codes and scaling.
"""

from __future__ import annotations

import logging
import signal
import socket
import sys
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import UTC, datetime
from enum import Enum
from typing import Any

import numpy as np

from rig.runner.interlocks import Interlocks, SafeReport
from rig.store.runfolder import RunWriter
from rig.store.waveform import Waveform
from rigbase.errors import (
    ConnectionLost,
    InstrumentError,
    InstrumentTimeout,
    LimitError,
    SafetyError,
)

__all__ = ["ExitPath", "Phase", "RunOutcome", "Runner", "Terminated"]

log = logging.getLogger(__name__)


class Phase(Enum):
    """Where in the event cycle the runner is."""

    IDLE = "idle"
    SETUP = "set-up"
    PRECHECK = "pre-check"
    CHARGE = "charge"
    ISOLATE = "isolate"
    ARM = "arm"
    DISCHARGE = "discharge"
    FETCH = "fetch"
    BLEED = "bleed"
    COMMIT = "commit"
    SAFE = "safe state"


class ExitPath(Enum):
    """How a run ended."""

    NORMAL = "normal end"
    CTRL_C = "Ctrl-C"
    SIGTERM = "SIGTERM"
    INSTRUMENT = "instrument error"
    CONNECTION = "lost connection"
    TIMEOUT = "timeout"
    INTERLOCK = "interlock"
    LIMIT = "limit"
    EXCEPTION = "exception"


class Terminated(BaseException):
    """Raised in the main thread when SIGTERM arrives (a BaseException, like Ctrl-C)."""


@dataclass
class RunOutcome:
    """What :meth:`Runner.run` did."""

    exit_path: ExitPath
    status: str  # "complete" | "interrupted" | "failed"
    error: str | None
    phase: Phase
    safe: SafeReport
    done: int
    planned: int
    timing: dict[str, float] = field(default_factory=dict)
    # groups (meter serial, mode, capture, volts, load, delay) whose events were all done but
    # none captured a waveform: a scope that never triggered
    empty_groups: list[str] = field(default_factory=list)
    # a Ctrl-C or SIGTERM that arrived while the safe state and the bookkeeping were shielded
    late_signal: str | None = None

    @property
    def ok(self) -> bool:
        return (
            self.status == "complete"
            and self.safe.reached
            and not self.empty_groups
            and self.late_signal is None
        )


class Observer:
    """Receives progress (the CLI's live display subclasses this). All methods optional."""

    def start(self, planned: int, done: int) -> None: ...

    def phase(self, event: Any, phase: Phase) -> None: ...

    def committed(self, row: dict[str, Any], waveform: Waveform | None) -> None: ...

    def message(self, text: str) -> None: ...


def _classify(exc: BaseException) -> ExitPath:
    if isinstance(exc, KeyboardInterrupt):
        return ExitPath.CTRL_C
    if isinstance(exc, Terminated):
        return ExitPath.SIGTERM
    if isinstance(exc, InstrumentTimeout):
        return ExitPath.TIMEOUT
    if isinstance(exc, ConnectionLost | ConnectionError):
        return ExitPath.CONNECTION
    if isinstance(exc, SafetyError):
        return ExitPath.INTERLOCK
    if isinstance(exc, LimitError):
        return ExitPath.LIMIT
    if isinstance(exc, InstrumentError):
        return ExitPath.INSTRUMENT
    return ExitPath.EXCEPTION


class Runner:
    """Runs the planned events of a sequence on an open bench into a run folder."""

    def __init__(
        self,
        bench: Any,
        bench_config: Any,
        sequence: Any,
        plan: Any,
        writer: RunWriter,
        *,
        observer: Observer | None = None,
        now: Callable[[], datetime] = lambda: datetime.now(UTC),
    ) -> None:
        self.bench = bench
        self.cfg = bench_config
        self.seq = sequence
        self.plan = plan
        self.writer = writer
        self.obs = observer or Observer()
        self.now = now
        self.interlocks = Interlocks(bench, bench_config)
        self.phase = Phase.IDLE
        self.timing = {"io": 0.0, "transfer": 0.0, "storage": 0.0, "total": 0.0, "events": 0}
        self._meter: int | None = None
        self._mode: str | None = None
        self._scope_key: Any = None
        self._load: str | None = None
        sense = bench_config.sense
        # volts at scope input 1 per ampere through the load
        self.volts_per_amp = (
            float(sense.ohms) if sense.kind == "shunt" else 1.0 / float(sense.amps_per_volt)
        )

    # -- the run ----------------------------------------------------------------------------------
    def run(self) -> RunOutcome:
        """Run every planned event not yet journalled; always end in the safe state."""
        todo = [e for e in self.plan.events if e.index not in self.writer.done]
        planned = len(self.plan.events)
        self.obs.start(planned, planned - len(todo))
        exit_path, error = ExitPath.NORMAL, None
        restore = self._install_sigterm()
        self.writer.update_manifest(status="running", resumed_at=self._iso())
        try:
            for event in todo:
                self._event(event)
        except BaseException as exc:  # every exit path, Ctrl-C included, goes to the safe state
            exit_path, error = _classify(exc), f"{type(exc).__name__}: {exc}"
            if not isinstance(exc, Exception):
                error = exit_path.value
            log.error("run stopped during %s: %s", self.phase.value, error)
            if not isinstance(exc, KeyboardInterrupt | Terminated | Exception):
                raise  # SystemExit and the like: the finally clause still makes the bench safe
        finally:
            # from here to the end, neither a second Ctrl-C nor a SIGTERM may cut the safe-state
            # procedure or the bookkeeping short (the run folder would say "running" forever)
            in_main = threading.current_thread() is threading.main_thread()
            shielded = {}
            late: list[str] = []  # signals held back until the bookkeeping is done

            def defer(signum: int, frame: object) -> None:
                late.append(signal.Signals(signum).name)

            if in_main:
                restore()
                for sig in (signal.SIGINT, signal.SIGTERM):
                    shielded[sig] = signal.signal(sig, defer)
            try:
                failed_phase = self.phase
                safe = self._make_safe()
                # the journal is the count: a signal between a journal line's fsync and the
                # writer's own tally must not make the printed count differ from the file's
                try:
                    done = len(self.writer.reload_done())
                except (OSError, ValueError):  # an unreadable journal: keep the writer's tally
                    done = len(self.writer.done)
                if exit_path is ExitPath.NORMAL and done == planned:
                    status = "complete"
                elif exit_path in (ExitPath.CTRL_C, ExitPath.SIGTERM):
                    status = "interrupted"
                else:
                    status = "failed"
                try:
                    empty = self._empty_groups() if status == "complete" else []
                except (OSError, ValueError):
                    empty = []
                self.writer.write_event_table()
                self.writer.update_manifest(
                    status=status,
                    groups_without_capture=empty,
                    exit_path=exit_path.value,
                    error=error,
                    failed_phase=None if exit_path is ExitPath.NORMAL else failed_phase.value,
                    ended=self._iso(),
                    safe_state=safe.to_dict(),
                    timing=dict(self.timing),
                )
                self.obs.message(f"run ended by {exit_path.value}; {safe.summary()}")
            finally:
                for sig, old in shielded.items():
                    signal.signal(sig, old)
        late_signal = late[0] if late and exit_path is ExitPath.NORMAL else None
        return RunOutcome(
            exit_path,
            status,
            error,
            failed_phase,
            safe,
            done,
            planned,
            dict(self.timing),
            empty,
            late_signal,
        )

    def _empty_groups(self) -> list[str]:
        """Groups of the plan in which no journalled event captured a waveform."""
        from rig.store.runfolder import read_journal

        def group(d: dict[str, Any]) -> tuple[Any, ...]:
            return tuple(
                d.get(k) for k in ("meter", "serial", "mode", "capture", "volts", "load", "delay_s")
            )

        captured = {group(r) for r in read_journal(self.writer.path) if r.get("file")}
        out: list[str] = []
        for e in self.plan.events:
            g = group({**e.to_dict()})
            if g not in captured:
                text = "/".join(str(x) for x in g[1:])
                if text not in out:
                    out.append(text)
        return out

    def _make_safe(self) -> SafeReport:
        """Safe-state procedure (the caller shields it from a second Ctrl-C)."""
        self.phase = Phase.SAFE
        return self.interlocks.make_safe(
            bleed_s=max(self.seq.hold_s, 0.01), max_wait_s=max(30.0, 10 * self.seq.hold_s)
        )

    def _install_sigterm(self) -> Callable[[], None]:
        if threading.current_thread() is not threading.main_thread():
            return lambda: None

        def handler(signum: int, frame: object) -> None:
            raise Terminated("SIGTERM")

        old = signal.signal(signal.SIGTERM, handler)
        return lambda: signal.signal(signal.SIGTERM, old)

    def _iso(self) -> str:
        return self.now().isoformat(timespec="seconds")

    # -- one event --------------------------------------------------------------------------------
    def _enter(self, event: Any, phase: Phase) -> None:
        self.phase = phase
        self.obs.phase(event, phase)

    def _event(self, e: Any) -> None:
        t_start = time.perf_counter()
        b, lock, ch = self.bench, self.interlocks, self.cfg.channels
        clock = b.clock
        io_start = self._io_s()
        self._enter(e, Phase.SETUP)
        lock.check_voltage(e.volts)  # before any command is sent for this event
        self._setup_for(e)
        self._enter(e, Phase.PRECHECK)
        lock.precheck()

        self._enter(e, Phase.CHARGE)
        b.supply.set_current_limit(self.cfg.limits.current_limit_amps)
        b.supply.set_voltage(e.volts)
        # break before make: discharge and bleed verified open before the charge relay closes
        b.switch.transfer([ch.discharge, ch.bleed], [ch.charge], clock=clock, settle_s=0.0)
        b.supply.output(True)
        self._dwell()
        supply_volts = b.supply.measure_voltage()
        charged_volts = lock.verify_charged(e.volts)

        self._enter(e, Phase.ISOLATE)
        b.supply.output(False)
        b.supply.set_voltage(0.0)
        b.switch.open([ch.charge])
        lock.require_open((ch.charge,), "after charging")
        lock.verify_isolated(charged_volts, e.volts)
        clock.sleep(e.delay_s)

        self._enter(e, Phase.ARM)
        b.scope.arm()

        self._enter(e, Phase.DISCHARGE)
        b.switch.transfer([ch.charge, ch.bleed], [ch.discharge], clock=clock, settle_s=0.0)
        s = self.seq.scope_for(e.mode, e.capture)
        record_s = s.points * s.sample_interval_s
        clock.sleep(record_s)
        captured = b.scope.wait_complete(
            clock, timeout_s=s.acquisition_timeout_s, poll_s=max(record_s, 1e-3)
        )

        load = next(ld for ld in self.cfg.loads if ld.name == e.load)
        lock.verify_discharge_path(captured, charged_volts, e.load, load.channel)

        self._enter(e, Phase.FETCH)
        t0, io_f0 = time.perf_counter(), self._io_s()
        wf = self._fetch(s) if captured else None
        if wf is not None:
            # a readback check of the discharge path, not a metric: |i| within what the load allows
            lock.check_peak(float(np.max(np.abs(wf.values("current")))), e.volts, load.ohms, e.load)
        t_transfer = time.perf_counter() - t0
        io_fetch = self._io_s() - io_f0
        if not captured:
            b.scope.abort()
        b.switch.open([ch.discharge])
        lock.require_open((ch.discharge,), "after the discharge")

        self._enter(e, Phase.BLEED)
        residual = lock.bleed_until_safe(
            bleed_s=max(self.seq.hold_s, 1e-3), max_wait_s=max(30.0, 10 * self.seq.hold_s)
        )
        clock.sleep(self.seq.hold_s)
        t_io = self._io_s() - io_start - io_fetch  # SCPI exchanges other than the transfer

        self._enter(e, Phase.COMMIT)
        t0 = time.perf_counter()
        row = {
            **e.to_dict(),
            "event": e.index,
            "status": "captured" if captured else "not_captured",
            "time": self._iso(),
            "t_bench_s": clock.now(),
            "supply_volts": supply_volts,
            "charged_volts": charged_volts,
            "residual_volts": residual,
        }
        row.pop("index", None)
        row = self.writer.commit(row, wf)
        t_store = time.perf_counter() - t0
        self.obs.committed(row, wf)
        tm = self.timing
        tm["io"] += t_io
        tm["transfer"] += t_transfer
        tm["storage"] += t_store
        tm["total"] += time.perf_counter() - t_start
        tm["events"] += 1

    def _io_s(self) -> float:
        """Time spent in instrument exchanges so far (0 for a bench that does not count)."""
        counter = getattr(self.bench, "io_seconds", None)
        return counter() if counter is not None else 0.0

    def _dwell(self) -> None:
        """Charge dwell: the planned time, or less once the supply current falls below the
        sequence's ``charge_done_amps`` (polled ten times per dwell)."""
        clock, seq = self.bench.clock, self.seq
        if seq.charge_done_amps is None:
            clock.sleep(seq.dwell_s)
            return
        step = seq.dwell_s / 10
        for _ in range(10):
            clock.sleep(step)
            if abs(self.bench.supply.measure_current()) < seq.charge_done_amps:
                return

    def _setup_for(self, e: Any) -> None:
        """Meter, mode, load and scope set-up, each only when it changes."""
        b, ch = self.bench, self.cfg.channels
        if e.meter_index != self._meter:
            meter = self.seq.meters[e.meter_index]
            b.connect_meter(meter.model, meter.serial, meter.sim_model)
            self._meter, self._mode = e.meter_index, None
        if e.mode != self._mode:
            self.obs.message(f"mode change: {e.meter} -> {e.mode}")
            b.meter.set_mode(e.mode)
            self._mode = e.mode
        if e.load != self._load:
            loads = {ld.name: ld for ld in self.cfg.loads}
            selectors = [ld.channel for ld in self.cfg.loads if ld.channel is not None]
            target = loads[e.load].channel
            others = [c for c in selectors if c != target]
            b.switch.open([ch.discharge])
            b.switch.transfer(
                others, [target] if target is not None else [], clock=b.clock, settle_s=0.0
            )
            self._load = e.load
        s = self.seq.scope_for(e.mode, e.capture)
        if s != self._scope_key:
            self._configure_scope(s)
            self._scope_key = s

    def _configure_scope(self, s: Any) -> None:
        sc, vpa = self.bench.scope, self.volts_per_amp
        sc.configure_channel(
            1,
            coupling=s.coupling,
            impedance_ohms=s.impedance_ohms,
            bandwidth_hz=s.bandwidth_hz,
            range_volts=s.current_range_amps * vpa,
            offset_volts=s.current_offset_amps * vpa,
        )
        if self.cfg.divider_ratio:
            sc.configure_channel(
                2,
                coupling="DC",
                impedance_ohms=1e6,
                bandwidth_hz=s.bandwidth_hz,
                range_volts=s.voltage_range_volts / self.cfg.divider_ratio,
                offset_volts=0.0,
            )
        sc.configure_acquisition(s.sample_interval_s, s.points, s.trigger_offset_s)
        sc.set_sampling(s.sampling)
        sc.configure_trigger(1, s.trigger_level_amps * vpa, s.trigger_slope)
        sc.set_format(s.bits)  # the byte order the profile prefers

    def _fetch(self, s: Any) -> Waveform:
        """Raw codes of the current (and voltage) inputs with scaling to amperes (and volts)."""
        sc = self.bench.scope
        # calibration (rig.planning.calibration): the sense's gain and zero error are applied
        # to the stored scaling; the divider's measured ratio is already cfg.divider_ratio
        cal = getattr(self.cfg, "calibration", None)
        gain_cal = cal.current_gain if cal is not None else 1.0
        zero_amps = cal.current_offset_amps if cal is not None else 0.0
        inputs = [(1, "current", "A", 1.0 / self.volts_per_amp / gain_cal)]
        if self.cfg.divider_ratio:
            inputs.append((2, "voltage", "V", float(self.cfg.divider_ratio)))
        traces = [(sc.fetch(k), name, unit, scale) for k, name, unit, scale in inputs]
        first = traces[0][0]
        n = min(len(t.codes) for t, *_ in traces)
        codes = np.stack([t.codes[:n] for t, *_ in traces])
        gain = np.array([t.volts_per_code * scale for t, _, _, scale in traces])
        offset = np.array(
            [
                (t.reference_volts - t.reference_code * t.volts_per_code) * scale
                for t, _, _, scale in traces
            ]
        )
        offset[0] -= zero_amps
        lo, hi = np.iinfo(codes.dtype).min, np.iinfo(codes.dtype).max
        return Waveform(
            codes=codes,
            gain=gain,
            offset=offset,
            code_min=np.full(len(traces), lo),
            code_max=np.full(len(traces), hi),
            dt=float(first.sample_interval_s),
            t0=float(first.first_sample_s),
            channels=tuple(name for _, name, _, _ in traces),
            units=tuple(unit for _, _, unit, _ in traces),
        )


def host_info() -> dict[str, str]:
    """Host and software identity for the manifest."""
    import platform

    import pyvisa

    from rig import __version__

    return {
        "host": socket.gethostname(),
        "platform": platform.platform(),
        "python": sys.version.split()[0],
        "rig": __version__,
        "numpy": np.__version__,
        "pyvisa": pyvisa.__version__,
    }
