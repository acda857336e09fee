"""Sequence files (TOML): parse, validate against a bench, resolve. No instrument I/O.

A *sequence file* says what to test on a bench (:mod:`rig.planning.benchfile`): meters, modes, voltages,
loads, repetitions, timing, scope set-up, limits for verdicts. It is checked completely, and
against the bench it will run on, before any instrument is touched. Every problem becomes one
:class:`rigbase.errors.FileFormatError` naming the file, the dotted key (``charge.volts[2]``),
the line where that key stands, and the problem; unknown keys are refused with the nearest
valid name. Numbers follow the same rules as in bench files (SI units in the key name, SI
prefixes accepted in strings; see :func:`rigbase.tomlcheck.parse_si`).
"""

from __future__ import annotations

import math
import tomllib
from dataclasses import dataclass, fields
from pathlib import Path
from typing import Any

from rig.planning.benchfile import SIM_METERS_DIR, Bench, _optional_bandwidth, netlist_modes
from rig.store.schema import DEFAULT_CAPTURE, LIMIT_METRICS
from rigbase.errors import FileFormatError
from rigbase.loadfile import load_from_spec
from rigbase.tomlcheck import (
    Table,
    _nearest,
    jsonable,
    read_toml,
    resolve_file,
)

__all__ = [
    "DEFAULT_CAPTURE",
    "METRICS",
    "STATISTICS",
    "LimitSpec",
    "MeterSpec",
    "ScopeSettings",
    "Sequence",
    "load_sequence",
]

# Metric names a limit may name (rig.store.schema, shared with the analysis).
METRICS = LIMIT_METRICS
STATISTICS = ("utl", "max", "p99", "p95", "median", "mean")


@dataclass(frozen=True)
class MeterSpec:
    """One meter under test and the modes to test it in."""

    model: str
    serial: str
    rating: str
    modes: tuple[str, ...]
    sim_model: Path | None  # netlist of its simulated stand-in (required on a simulated bench)

    @property
    def label(self) -> str:
        return f"{self.model} s/n {self.serial}"


@dataclass(frozen=True)
class ScopeSettings:
    """Scope set-up for capturing one event. Input 1 carries the current sense, input 2 the
    divider probe (when fitted)."""

    sample_interval_s: float = 1e-9
    points: int = 20_000
    trigger_offset_s: float = -2e-6  # time of the first sample from the trigger (< 0: pre-trigger)
    current_range_amps: float = 40.0  # full-scale span, peak to peak, in amperes at the sense
    current_offset_amps: float = 0.0  # value at mid-scale, A
    trigger_level_amps: float = 0.2
    trigger_slope: str = "EITHer"  # "POSitive" | "NEGative" | "EITHer"
    bits: int = 8  # 8 | 16
    bandwidth_hz: float | None = None  # None = full bandwidth
    coupling: str = "DC"  # "DC" | "AC" (input 1)
    impedance_ohms: float = 50.0  # input 1 termination
    # input 2 (divider) span, peak to peak, in volts at the meter input; when a file leaves it
    # out, load_sequence sets 2.2 x the highest charge voltage (offset 0: covers +-1.1 x V)
    voltage_range_volts: float = 2200.0
    acquisition_timeout_s: float = 2.0  # how long the runner waits for a trigger
    # "point": each sample the input at its instant; "mean": the mean of the input over the
    # sample's interval, so a pulse shorter than the interval keeps its charge
    sampling: str = "point"

    @property
    def record_s(self) -> float:
        """Length of one record, s."""
        return self.points * self.sample_interval_s


@dataclass(frozen=True)
class LimitSpec:
    """A limit on one metric's group statistic; None in modes/volts/loads/captures means all."""

    metric: str
    max: float
    statistic: str = "utl"
    modes: tuple[str, ...] | None = None
    volts: tuple[float, ...] | None = None
    loads: tuple[str, ...] | None = None
    captures: tuple[str, ...] | None = None

    def applies(self, mode: str, volts: float, load: str, capture: str | None = None) -> bool:
        """Whether this limit covers the group (mode, volts in V, load, capture); a limit
        restricted to some captures does not cover ``capture=None``."""
        return (
            (self.modes is None or mode in self.modes)
            and (self.volts is None or any(math.isclose(volts, v) for v in self.volts))
            and (self.loads is None or load in self.loads)
            and (self.captures is None or capture in self.captures)
        )


@dataclass(frozen=True)
class Sequence:
    """A validated sequence file, checked against the bench it will run on."""

    path: Path
    name: str
    operator_note: str
    meters: tuple[MeterSpec, ...]
    volts: tuple[float, ...]
    loads: tuple[str, ...]
    repetitions: int
    dwell_s: float
    hold_s: float
    delays_s: tuple[float, ...]
    charge_done_amps: float | None
    scope: ScopeSettings  # [scope]: the base settings of every capture
    scope_modes: dict[str, ScopeSettings]  # first capture, mode overrides applied (modes with any)
    limits: tuple[LimitSpec, ...]
    order: str  # "grouped" | "shuffled"
    shuffle_seed: int | None
    raw: dict[str, Any]
    # Named captures in file order (one "main" capture when the file names none); every event
    # of the plan is recorded once per capture.
    captures: tuple[str, ...] = (DEFAULT_CAPTURE,)
    scope_captures: dict[str, ScopeSettings] | None = None  # base + capture overrides
    # capture -> mode -> base + capture + mode overrides (only modes with overrides)
    scope_grid: dict[str, dict[str, ScopeSettings]] | None = None
    # [predict] loads: loads the report predicts each identified source into (bench load
    # names, load files relative to the sequence file, or resistances)
    predict_loads: tuple[str, ...] = ()

    def scope_for(self, mode: str, capture: str | None = None) -> ScopeSettings:
        """Scope settings for events in ``mode`` recorded by ``capture`` (None: the first
        capture): the base settings, then the capture's overrides, then the mode's."""
        name = self.captures[0] if capture is None else capture
        if name not in self.captures:
            raise KeyError(f"sequence {self.path} has no capture {name!r}")
        grid = (self.scope_grid or {}).get(name, {})
        if mode in grid:
            return grid[mode]
        if self.scope_captures is None or name not in self.scope_captures:
            return self.scope_modes.get(mode, self.scope)
        return self.scope_captures[name]

    @property
    def modes(self) -> tuple[str, ...]:
        """Every mode of every meter, first appearance first."""
        return tuple(dict.fromkeys(m for meter in self.meters for m in meter.modes))


_SEQ_TOP = ("sequence", "meters", "charge", "discharge", "bleed", "scope", "limits", "predict")
_SCOPE_KEYS = tuple(f.name for f in fields(ScopeSettings))


def _read_meters(top: Table, bench: Bench, base_dir: Path) -> tuple[MeterSpec, ...]:
    meters: list[MeterSpec] = []
    allowed = ("model", "serial", "rating", "modes", "sim_model")
    scpi_functions = _meter_functions(bench)
    for t in top.tables("meters", allowed, required=True):
        model = t.string("model")
        serial = t.string("serial")
        if any(m.model == model and m.serial == serial for m in meters):
            raise t.error("serial", f"meter {model!r} s/n {serial!r} is listed twice")
        modes = t.strings("modes", choices=scpi_functions, what="meter-profile mode")
        sim_model = None
        if t.has("sim_model"):
            sim_model = resolve_file(
                t, "sim_model", t.string("sim_model"), base_dir, SIM_METERS_DIR, "meter netlist"
            )
        elif bench.uses_simulation:
            raise t.error(
                "sim_model", f"missing required key 'sim_model': bench {bench.path} is simulated"
            )
        if sim_model is not None and bench.uses_simulation:
            try:
                known = netlist_modes(sim_model)
            except FileFormatError as exc:  # name the sequence key that pointed there
                raise t.error("sim_model", str(exc)) from None
            for i, mode in enumerate(modes):
                if mode not in known:
                    hint = _nearest(mode, known)
                    tip = f"did you mean {hint!r}?" if hint else "it has " + ", ".join(known)
                    raise t.error(
                        ("modes", i), f"mode {mode!r} is not in netlist {sim_model.name}; {tip}"
                    )
        meters.append(MeterSpec(model, serial, t.string("rating", ""), modes, sim_model))
    return tuple(meters)


def _check_sampling(
    st: Table,
    bench: Bench,
    grid: dict[str, dict[str, ScopeSettings]],
    captures: dict[str, ScopeSettings],
) -> None:
    """``sampling = "mean"`` needs the scope profile's optional ``set_sampling`` operation."""
    settings = [*captures.values(), *(s for g in grid.values() for s in g.values())]
    if not any(s.sampling == "mean" for s in settings):
        return
    spec = bench.instruments.get("scope")
    if spec is None:
        return
    try:
        data = tomllib.loads(Path(spec.profile).read_text(encoding="utf-8"))
        ok = "set_sampling" in data["scope"]
    except (OSError, tomllib.TOMLDecodeError, KeyError, TypeError):
        return  # the profile's own loader reports a broken profile
    if not ok:
        raise st.error(
            "sampling",
            f'"mean" needs the operation set_sampling in the scope profile {spec.profile}',
        )


def _meter_functions(bench: Bench) -> tuple[str, ...] | None:
    """Mode names a SCPI-controlled meter's profile knows (None: no restriction)."""
    spec = bench.instruments.get("meter")
    if spec is None or spec.control != "scpi":
        return None
    try:
        data = tomllib.loads(spec.profile.read_text(encoding="utf-8"))
        functions = data["meter"]["functions"]
    except (OSError, tomllib.TOMLDecodeError, KeyError, TypeError):
        return None
    return tuple(functions) if isinstance(functions, dict) else None


def _read_scope(t: Table, base: ScopeSettings) -> ScopeSettings:
    values: dict[str, Any] = {}
    for name in _SCOPE_KEYS:
        default = getattr(base, name)
        if name == "points":
            values[name] = t.integer(name, default, minimum=2)
        elif name == "bits":
            values[name] = t.integer(name, default)
            if values[name] not in (8, 16):
                raise t.error(name, f"must be 8 or 16, got {values[name]}")
        elif name == "trigger_slope":
            values[name] = t.string(name, default, choices=("POSitive", "NEGative", "EITHer"))
        elif name == "coupling":
            values[name] = t.string(name, default, choices=("DC", "AC"))
        elif name == "sampling":
            values[name] = t.string(name, default, choices=("point", "mean"))
        elif name == "bandwidth_hz":
            values[name] = _optional_bandwidth(t, name) if t.has(name) else default
        elif name in ("trigger_offset_s", "current_offset_amps", "trigger_level_amps"):
            values[name] = t.number(name, default)
        else:
            values[name] = t.number(name, default, positive=True)
    s = ScopeSettings(**values)
    if s.trigger_offset_s <= -s.record_s:
        raise t.error(
            "trigger_offset_s",
            f"pre-trigger {-s.trigger_offset_s:.4g} s is longer than the record "
            f"({s.points} points x {s.sample_interval_s:.4g} s = {s.record_s:.4g} s)",
        )
    if abs(s.trigger_level_amps - s.current_offset_amps) >= s.current_range_amps / 2:
        raise t.error(
            "trigger_level_amps",
            f"trigger level {s.trigger_level_amps:g} A lies outside the current range "
            f"({s.current_offset_amps:g} +- {s.current_range_amps / 2:g} A)",
        )
    return s


def _read_limit(
    t: Table,
    modes: tuple[str, ...],
    volts: tuple[float, ...],
    loads: tuple[str, ...],
    captures: tuple[str, ...],
) -> LimitSpec:
    lim_volts = t.numbers("volts", None, positive=True)
    if lim_volts is not None:
        for i, v in enumerate(lim_volts):
            if not any(math.isclose(v, x) for x in volts):
                key = ("volts", i) if isinstance(t.data["volts"], list) else "volts"
                raise t.error(key, f"{v:g} V is not one of the sequence's charge.volts")
    return LimitSpec(
        metric=t.string("metric", choices=METRICS, what="metric"),
        max=t.number("max"),
        statistic=t.string("statistic", "utl", choices=STATISTICS, what="statistic"),
        modes=t.strings("modes", None, choices=modes, what="mode"),
        volts=lim_volts,
        loads=t.strings("loads", None, choices=loads, what="load"),
        captures=t.strings("captures", None, choices=captures, what="capture"),
    )


def _read_captures(
    st: Table, base: ScopeSettings, modes: tuple[str, ...]
) -> tuple[tuple[str, ...], dict[str, ScopeSettings], dict[str, dict[str, ScopeSettings]]]:
    """Capture names, base + capture settings, and capture -> mode -> settings with the mode
    overrides on top (every combination is validated, since a mode override that fits one
    capture's record may not fit another's)."""
    raw = st.data.get("captures", {})
    tables = st.table("captures", tuple(raw) if isinstance(raw, dict) else ())
    if st.has("captures") and not tables.data:
        raise st.error("captures", "needs at least one [scope.captures.<name>] table")
    names = tuple(tables.data) or (DEFAULT_CAPTURE,)
    for name in names:
        if not name.strip() or "|" in name:
            raise tables.error(name, f"capture name {name!r} must be non-empty and without '|'")
    per_capture = {
        name: _read_scope(tables.table(name, _SCOPE_KEYS), base) if tables.data else base
        for name in names
    }
    per_mode = st.table("modes", modes)
    grid: dict[str, dict[str, ScopeSettings]] = {}
    for name in names:
        grid[name] = {}
        for mode in per_mode.data:
            try:
                grid[name][mode] = _read_scope(per_mode.table(mode, _SCOPE_KEYS), per_capture[name])
            except FileFormatError as exc:
                if len(names) == 1:
                    raise
                raise FileFormatError(
                    exc.path, exc.key, f"{exc.problem} (with capture {name!r})", exc.line
                ) from None
    return names, per_capture, grid


def load_sequence(path: str | Path, bench: Bench) -> Sequence:
    """Read and validate a sequence file against ``bench`` (voltages, loads, meter models)."""
    path = Path(path)
    ctx, data = read_toml(path, "sequence")
    base_dir = path.resolve().parent
    top = Table(ctx, data, (), _SEQ_TOP)
    head = top.table(
        "sequence",
        ("name", "operator_note", "repetitions", "order", "shuffle_seed"),
        required=True,
    )
    name = head.string("name")
    operator_note = head.string("operator_note", "")
    repetitions = head.integer("repetitions", minimum=1)
    order = head.string("order", "grouped", choices=("grouped", "shuffled"), what="order")
    shuffle_seed = head.integer("shuffle_seed", None, minimum=0)
    if order == "shuffled" and shuffle_seed is None:
        raise head.error("shuffle_seed", "order = 'shuffled' needs a shuffle_seed (an integer)")
    meters = _read_meters(top, bench, base_dir)
    charge = top.table("charge", ("volts", "dwell_s", "done_amps"), required=True)
    volts = charge.numbers(
        "volts",
        positive=True,
        maximum=bench.limits.max_volts,
        maximum_why=f"limits.max_volts of bench {bench.path}",
    )
    dwell_s = charge.number("dwell_s", positive=True)
    done_amps = charge.number("done_amps", None, positive=True)
    dis = top.table("discharge", ("loads", "delays_s"), required=True)
    loads = dis.strings("loads", choices=[spec.name for spec in bench.loads], what="load")
    delays = dis.numbers("delays_s", (0.0,), minimum=0.0)
    hold_s = top.table("bleed", ("hold_s",)).number("hold_s", 0.0, minimum=0.0)
    modes = tuple(dict.fromkeys(m for meter in meters for m in meter.modes))
    st = top.table("scope", _SCOPE_KEYS + ("modes", "captures"))
    scope = _read_scope(st, ScopeSettings(voltage_range_volts=2.2 * max(volts)))
    captures, scope_captures, scope_grid = _read_captures(st, scope, modes)
    scope_modes = dict(scope_grid[captures[0]])
    _check_sampling(st, bench, scope_grid, scope_captures)
    limits = tuple(
        _read_limit(t, modes, volts, loads, captures)
        for t in top.tables(
            "limits", ("metric", "max", "statistic", "modes", "volts", "loads", "captures")
        )
    )
    predict_loads = _read_predict(top, bench, base_dir)
    fields_ = {
        "path": path,
        "name": name,
        "operator_note": operator_note,
        "meters": meters,
        "volts": volts,
        "loads": loads,
        "repetitions": repetitions,
        "dwell_s": dwell_s,
        "hold_s": hold_s,
        "delays_s": delays,
        "charge_done_amps": done_amps,
        "scope": scope,
        "scope_modes": scope_modes,
        "limits": limits,
        "order": order,
        "shuffle_seed": shuffle_seed,
        "captures": captures,
        "scope_captures": scope_captures,
        "scope_grid": scope_grid,
        "predict_loads": predict_loads,
    }
    return Sequence(**fields_, raw=jsonable(fields_))


def _read_predict(top: Table, bench: Bench, base_dir: Path) -> tuple[str, ...]:
    """``[predict] loads``: each a bench load, a readable load file or a resistance."""
    t = top.table("predict", ("loads",))
    specs = tuple(t.strings("loads", ()))
    names = {spec.name for spec in bench.loads}
    for k, spec in enumerate(specs):
        if spec in names:
            continue
        try:
            load_from_spec(spec, base_dir)
        except FileFormatError:
            raise
        except ValueError as exc:
            raise t.error(("loads", k), str(exc)) from None
    return specs
