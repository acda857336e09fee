"""What to run, decided before any instrument is touched: the bench file (what hardware
is where, its limits), the sequence file (meters, modes, voltages, loads, captures, limits) and
the plan built from both (the ordered events, the duration estimate and the safety review).
Nothing here does instrument I/O; `rig check` and `rig run` both validate through this package.
"""

from rig.planning.benchfile import (
    DEFAULT_DIVIDER_OHMS,
    PROFILES_DIR,
    ROLES,
    SIM_METERS_DIR,
    Bench,
    Channels,
    InstrumentSpec,
    Limits,
    Load,
    Sense,
    Simulation,
    netlist_modes,
    parse_si,
    read_bench_file,
    resolve_meter_model,
)
from rig.planning.limits import LIMITS, checked_plan, plan_size
from rig.planning.plan import (
    EVENT_OVERHEAD_S,
    METER_CHANGE_S,
    MODE_CHANGE_MANUAL_S,
    MODE_CHANGE_SCPI_S,
    Event,
    Finding,
    Plan,
    build_plan,
    meter_capacitance_f,
)
from rig.planning.review import RECORD_TAUS, describe, record_findings, safety_review
from rig.planning.sequence import (
    DEFAULT_CAPTURE,
    METRICS,
    STATISTICS,
    LimitSpec,
    MeterSpec,
    ScopeSettings,
    Sequence,
    load_sequence,
)

__all__ = [
    "RECORD_TAUS",
    "record_findings",
    "LIMITS",
    "checked_plan",
    "plan_size",
    "Bench",
    "Channels",
    "DEFAULT_CAPTURE",
    "DEFAULT_DIVIDER_OHMS",
    "EVENT_OVERHEAD_S",
    "Event",
    "Finding",
    "InstrumentSpec",
    "LimitSpec",
    "Limits",
    "Load",
    "METER_CHANGE_S",
    "METRICS",
    "MODE_CHANGE_MANUAL_S",
    "MODE_CHANGE_SCPI_S",
    "MeterSpec",
    "PROFILES_DIR",
    "Plan",
    "ROLES",
    "SIM_METERS_DIR",
    "STATISTICS",
    "ScopeSettings",
    "Sense",
    "Sequence",
    "Simulation",
    "build_plan",
    "describe",
    "load_sequence",
    "meter_capacitance_f",
    "netlist_modes",
    "parse_si",
    "read_bench_file",
    "resolve_meter_model",
    "safety_review",
]
