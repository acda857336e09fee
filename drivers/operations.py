"""The vocabulary of command-dialect profiles: operations, their fields, ranges, tables.

What a profile may contain, by role (:mod:`drivers.profile` validates files against it and
hands these names on): each operation with the fields the driver fills in, the operations
a layout may leave out, the ranges, the scope's scaling fields, and the sub-tables.
"""

from __future__ import annotations

from collections.abc import Mapping
from types import MappingProxyType

__all__ = [
    "LAYOUT2_ONLY",
    "OPERATIONS",
    "OPTIONAL",
    "OPTIONAL_ALWAYS",
    "RANGES",
    "SCALING_FIELDS",
]

#: role -> operation -> the fields the driver supplies; a template must use every one of
#: them (leaving one out would silently drop a value) and no other.
OPERATIONS: Mapping[str, Mapping[str, frozenset[str]]] = MappingProxyType(
    {
        "common": {
            "identify": frozenset(),
            "reset": frozenset(),
            "clear_status": frozenset(),
            "operation_complete": frozenset(),
            "next_error": frozenset(),
        },
        "supply": {
            "set_voltage": frozenset({"volts"}),
            "get_voltage": frozenset(),
            "set_current_limit": frozenset({"amps"}),
            "get_current_limit": frozenset(),
            "output_on": frozenset(),
            "output_off": frozenset(),
            "get_output": frozenset(),
            "measure_voltage": frozenset(),
            "measure_current": frozenset(),
            "enable_output": frozenset(),
            "disable_output": frozenset(),
            "get_interlock": frozenset(),
        },
        "switch": {
            "close": frozenset({"channels"}),
            "open": frozenset({"channels"}),
            "open_all": frozenset(),
            "get_closed": frozenset({"channels"}),
        },
        "scope": {
            "set_coupling": frozenset({"ch", "coupling"}),
            "set_impedance": frozenset({"ch", "ohms"}),
            "set_bandwidth": frozenset({"ch", "hz"}),
            "set_bandwidth_state": frozenset({"ch", "state"}),
            "set_range": frozenset({"ch", "volts"}),
            "set_offset": frozenset({"ch", "volts"}),
            "set_channel_state": frozenset({"ch", "state"}),
            "set_sample_interval": frozenset({"seconds"}),
            "set_points": frozenset({"points"}),
            "set_trigger_offset": frozenset({"seconds"}),
            "set_sampling": frozenset({"sampling"}),
            "set_trigger_source": frozenset({"ch"}),
            "set_trigger_level": frozenset({"volts"}),
            "set_trigger_slope": frozenset({"slope"}),
            "single": frozenset(),
            "abort": frozenset(),
            "force_trigger": frozenset(),
            "get_condition": frozenset(),
            "set_format": frozenset({"fmt"}),
            "set_byte_order": frozenset({"order"}),
            "fetch": frozenset({"ch"}),
            "scaling": frozenset({"ch"}),
            "measure_dc": frozenset({"ch"}),
        },
        "meter": {
            "set_function": frozenset({"function"}),
            "get_function": frozenset(),
        },
    }
)

#: Operations a layout-2 profile may leave out (the instrument has no such command); the
#: drivers then do without (no identity, no error queue, a fixed byte order...).
OPTIONAL: Mapping[str, frozenset[str]] = MappingProxyType(
    {
        "common": frozenset(OPERATIONS["common"]),
        "supply": frozenset({"enable_output", "disable_output", "get_interlock"}),
        "scope": frozenset({"set_byte_order", "get_condition", "scaling"}),
    }
)
#: Operations any layout may leave out (added after layout 1 files were written).
# set_sampling: an instrument without an averaging mode samples points; a sequence asking for
# "mean" sampling is then refused (ProfileError naming the operation).
OPTIONAL_ALWAYS = frozenset({"force_trigger", "set_sampling"})
#: Operations that exist only from layout 2 on.
LAYOUT2_ONLY = frozenset({"enable_output", "disable_output", "get_interlock"})

#: role -> names of the [low, high] ranges a role table must carry.
RANGES: Mapping[str, tuple[str, ...]] = MappingProxyType(
    {
        "supply": ("volts", "amps"),
        "switch": ("channel",),
        "scope": ("channel", "points", "seconds"),
    }
)

#: Fields of the scope's scaling answer that turn raw codes into volts and sample indices
#: into seconds: ``volts = (code - reference_code) * volts_per_code + reference_volts`` and
#: ``seconds from the trigger = first_sample_s + index * sample_interval_s``; ``points`` is
#: the record length, checked against the block. ``[scope.scaling_fields]`` gives the
#: position of each in the instrument's comma-separated answer (other positions are ignored).
SCALING_FIELDS = (
    "points",
    "sample_interval_s",
    "first_sample_s",
    "volts_per_code",
    "reference_volts",
    "reference_code",
)

# A value of the right type for every field, used to try each template once at load time so a
# bad format spec ("{volts:.9q}") fails here rather than at the first command.
_SAMPLES: dict[str, object] = {
    "volts": 1.5,
    "amps": 0.01,
    "channels": "(@1,3)",
    "ch": 1,
    "coupling": "DC",
    "ohms": 50.0,
    "hz": 20e6,
    "state": "ON",
    "seconds": 1e-9,
    "points": 1000,
    "slope": "POSitive",
    "sampling": "MEAN",
    "fmt": "INT,8",
    "order": "NORMal",
    "function": "VOLTage:DC",
}

_SUBTABLES = {
    "ranges",
    "scaling_fields",
    "functions",
    "values",
    "channel_list",
    "readback",
    "transfer",
    "completion",
    "scaling_queries",
}
_ROLE_TABLES: Mapping[str, set[str]] = MappingProxyType(
    {
        "common": {"compound"},
        "supply": {"ranges", "values", "interlock_closed"},
        "switch": {"ranges", "values", "channel_list", "readback"},
        "scope": {
            "ranges",
            "scaling_fields",
            "values",
            "transfer",
            "completion",
            "scaling_queries",
        },
        "meter": {"functions", "values"},
    }
)
_ROLE_TABLES_1 = {
    "common": {"compound"},
    "meter": {"functions"},
    "scope": {"ranges", "scaling_fields"},
}
