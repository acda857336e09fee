"""Names shared along the data flow: the per-event metric columns and the group keys.

Defined once here so that the files (which limits may name), the analysis (what it writes),
the statistics (how it groups) and the report agree; this module imports nothing heavy.
"""

from __future__ import annotations

__all__ = ["DEFAULT_CAPTURE", "GROUP_KEYS", "LIMIT_METRICS", "METRIC_COLUMNS"]

#: Per-event output columns of the analysis, in the order of DEVELOPERS.md.
METRIC_COLUMNS: tuple[str, ...] = (
    "peak_a",
    "abs_peak_a",
    "polarity",
    "t_peak_s",
    "rise_s",
    "decay_s",
    "tau_s",
    "fwhm_s",
    "charge_c",
    "energy_j",
    "pulses",
    "c_equiv_f",
    "r_equiv_ohm",
    "baseline_a",
    "noise_a",
    "flag_clipped",
    "flag_not_captured",
    "flag_truncated",
    "flag_below_noise",
    "ind_hbm_volts",
    "ind_hbm_charge_c",
    "ind_hbm_energy_j",
    "ind_iec61010_charge_ratio",
    "charge_record_c",
    "charge_tail_c",
    "charge_u_c",
    "baseline_u_a",
    "tail_terms",
    "term1_tau_s",
    "term1_charge_c",
    "term2_tau_s",
    "term2_charge_c",
    "term3_tau_s",
    "term3_charge_c",
)

#: Metrics a sequence's [[limits]] may name: the measured quantities (not flags or polarity).
LIMIT_METRICS: tuple[str, ...] = tuple(
    c for c in METRIC_COLUMNS if not c.startswith("flag_") and c not in ("polarity", "tail_terms")
)

#: The keys of a group: compare drops the serial, self-discharge drops the delay.
GROUP_KEYS: tuple[str, ...] = ("meter", "serial", "mode", "capture", "volts", "load", "delay_s")

#: The capture of rows that name none (runs recorded before captures existed).
DEFAULT_CAPTURE = "main"
