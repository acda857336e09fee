"""Which metrics each scope capture can measure, so that no table shows a number it cannot.

A metric belongs to one of two families, decided by its name in rig.store.schema (so columns
that the analysis adds later fall in place): the *fast* family (peak current, its timing, the
energy of the pulse, the HBM indicators) needs a sample interval that resolves the pulse; the
*tail* family (every column whose name holds "charge", except the HBM indicator derived from
the peak, and the tail's time constant and equivalent source) needs a record that covers the
slow tail. Other columns (baseline, noise) are measured by every capture.

With several captures, the fast family is read only from the capture with the finest sample
interval and the tail family only from the one with the longest record
(rig.analysis.stats.capture_roles). Any capture whose 10-90 % rise spans fewer than
:data:`MIN_RISE_SAMPLES` sample intervals does not resolve the pulse (common practice, no
source: a rise needs a few samples to be measured), so its fast family is not shown either.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from rig.analysis.stats import capture_roles
from rig.store.schema import METRIC_COLUMNS
from rigbase.units import eng

__all__ = [
    "CHARGE_COLUMNS",
    "MIN_RISE_SAMPLES",
    "fast_resolved",
    "measures",
    "metric_family",
    "shown_groups",
]

MIN_RISE_SAMPLES = 3.0
_FAST = {"peak_a", "abs_peak_a", "t_peak_s", "rise_s", "decay_s", "fwhm_s", "pulses", "energy_j"}
_TAIL = {"tau_s", "c_equiv_f", "r_equiv_ohm"}


def metric_family(name: str) -> str:
    """ "fast", "tail" or "any" for a metric column name."""
    if name in _FAST or name.startswith("ind_hbm"):
        return "fast"
    if name in _TAIL or "charge" in name or name == "tail_terms" or name.startswith("term"):
        return "tail"  # the charge columns and the fitted tail's terms
    return "any"


#: The charge columns of the analysis (by name), for the sections that show charge.
CHARGE_COLUMNS: tuple[str, ...] = tuple(
    c for c in METRIC_COLUMNS if metric_family(c) == "tail" and "charge" in c
)


def fast_resolved(m: pd.DataFrame, capture: str) -> bool:
    """True when the capture's median 10-90 % rise spans at least MIN_RISE_SAMPLES samples
    (or when the events carry no dt_s/rise_s to judge by: older runs)."""
    sel = m[m["capture"].astype(str) == str(capture)] if "capture" in m else m
    if not {"dt_s", "rise_s"} <= set(sel.columns):
        return True
    dt = pd.to_numeric(sel["dt_s"], errors="coerce").median()
    rise = pd.to_numeric(sel["rise_s"], errors="coerce").median()
    if not (np.isfinite(dt) and np.isfinite(rise)) or dt <= 0:
        return True
    return bool(rise >= MIN_RISE_SAMPLES * dt)


def measures(m: pd.DataFrame) -> dict[str, set[str]]:
    """{capture: families it measures} for the captures of the events ``m``."""
    caps = [str(c) for c in dict.fromkeys(m["capture"])] if "capture" in m else ["main"]
    if not caps:  # no captured event at all (a scope that never triggered)
        return {}
    peak_cap, charge_cap = capture_roles(m) if len(caps) > 1 else (caps[0], caps[0])
    out: dict[str, set[str]] = {}
    for c in caps:
        fam = {"any"}
        if c == peak_cap and fast_resolved(m, c):
            fam.add("fast")
        if c == charge_cap:
            fam.add("tail")
        out[c] = fam
    return out


def shown_groups(g: pd.DataFrame, m: pd.DataFrame) -> tuple[pd.DataFrame, str]:
    """(rows of groups.csv a table may show, one sentence saying what was left out and why).

    Leaves out the signed ``peak_a`` where ``abs_peak_a`` is summarised for the same group
    (groups.csv summarises both by magnitude: the same numbers twice), and every metric its
    capture cannot measure (see the module docstring)."""
    fam = measures(m)
    keep = pd.Series(True, index=g.index)
    names = set(g["metric"].astype(str))
    if "abs_peak_a" in names:
        keep &= g["metric"] != "peak_a"
    dropped: list[str] = []
    for cap, families in fam.items():
        for family, what in (("fast", "peak and pulse metrics"), ("tail", "charge and tail")):
            if family in families:
                continue
            bad = (g["capture"].astype(str) == cap) & (
                g["metric"].astype(str).map(metric_family) == family
            )
            if bad.any():
                keep &= ~bad
                dropped.append(f"{what} of capture “{cap}” ({_why(m, cap, family)})")
    note = ("Not shown: " + "; ".join(dropped) + ".") if dropped else ""
    return g[keep], note


def _why(m: pd.DataFrame, capture: str, family: str) -> str:
    sel = m[m["capture"].astype(str) == capture] if "capture" in m else m
    dt = pd.to_numeric(sel.get("dt_s", pd.Series(dtype=float)), errors="coerce").median()
    span = pd.to_numeric(sel.get("record_s", pd.Series(dtype=float)), errors="coerce").median()
    if family == "tail":
        return f"its {eng(span, 's')} record ends before the tail that carries the charge"
    return f"its {eng(dt, 's')} sample interval does not resolve the pulse's rise"
