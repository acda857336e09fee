"""Per-event metrics of discharge current records, vectorised over 2-D arrays of events.

:func:`event_metrics` takes a 2-D array (events x samples, one record length) of raw ADC codes
(int8/int16 with gain and offset) or of currents in amperes (float), and returns one 1-D
array per metric. It works through the events in chunks of rows, converting each chunk once
to float32 (codes, exact) or keeping float64, so memory stays bounded whatever the number of
events. Level crossings are searched sample by sample only in the 64 samples next to the
peak; beyond them a table of 64-sample block minima names the one block to read, so the
search costs a few blocks per event, not the record length (:mod:`rig.analysis.shape`). Pulses
are counted on 64-sample blocks of the threshold masks read as machine words
(:mod:`rig.analysis.pulses`); baseline and noise come from :mod:`rig.analysis.baseline`.
This module holds the definitions below and puts the three together, chunk by chunk.

Definitions (times in seconds, currents in amperes; ``y`` is the baseline-removed current
turned positive by the event's polarity, ``Ip`` its peak):

- baseline, noise: the mean (float64) and standard deviation of the pre-trigger samples
  within median +- (4 robust sigma + 3 codes) (robust sigma from 1.4826 x MAD, or for 8-bit
  codes the interquartile range; the noise at least the quantisation noise 1/sqrt(12) code).
  Always the mean: no rule that switches estimators, which noise could trip. Its standard
  uncertainty ``baseline_u_a`` comes from batch means of the same samples
  (:func:`rig.analysis.baseline.baseline_uncertainty`). Up to the last ``BASELINE_MAX``
  pre-trigger samples are used, so a long record with a long pre-trigger gets a baseline to
  match (the charge integral multiplies a baseline error by the record length).
- polarity: sign of the larger excursion from the baseline.
- peak: largest ``y`` sample; ``peak_a`` carries the polarity, ``abs_peak_a`` does not.
- rise time: 10 % to 90 % of ``Ip`` on the leading edge of the highest pulse (last crossings
  before the peak), linearly interpolated between samples (for a first-order edge it is
  tau ln 9 = 2.197 tau, textbook RC relation).
- decay time: from the peak to the first sample after it below 1/e = 36.8 % of ``Ip``
  (interpolated), the 1/e point of an RC discharge i = V/R exp(-t/RC) (textbook RC
  relation). Some texts measure from 90 % instead (from memory); this module measures from
  the peak.
- tau: time constant of the tail from a weighted log-linear fit (weights y^2, which makes it
  close to a least-squares fit of an exponential) of the samples after the peak between
  90 % of ``Ip`` and max(10 % of ``Ip``, 3 x noise); at most 256 evenly spaced samples.
- fwhm: time between the 50 % crossings either side of the peak.
- charge: ``charge_record_c`` is the integral of i dt from the end of the baseline window to
  the record's end (signed, float64: codes summed exactly, the baseline subtracted once);
  ``charge_c`` the whole discharge: that plus the tail beyond the record (``charge_tail_c``)
  from a fit of the record's tail by a sum of exponentials, the fit also refining the
  baseline within its uncertainty (:mod:`rig.analysis.wholecharge`); ``charge_u_c`` its
  standard uncertainty. ``tail_terms`` and ``term<k>_tau_s`` / ``term<k>_charge_c``: the
  fitted terms, slowest first, each with its charge from the trigger on.
- energy: load_ohms x integral of i^2 dt over the record.
- pulses: separate pulses above H = max(25 % of ``Ip``, (noise_factor + 3) x noise), with
  hysteresis: a pulse ends when the current falls below max(3 x noise, min(H / 2,
  H - noise_factor x noise)) (contact bounce); at least 1 for an event above noise.
- c_equiv: abs(charge) / the input voltage the discharge started from (``charge_volts``);
  r_equiv: the slowest term's branch resistance tau_1 x V / abs(charge_1) (the whole
  charge when that term holds 80 % of it or more; tau_s for tau_1 when the two agree within
  a factor 2, the pulse's own decay being the better fit of the same time constant).
- flags: clipped (a sample at the ADC's lowest or highest code), truncated (the fitted tail
  beyond the record holds more than ``TAIL_SHARE_LIMIT`` of the whole charge), below noise (``Ip`` not above noise_factor x noise: the
  peak and everything derived from it are NaN, never a peak).
- indicators (not measurements of an HBM or IEC 61010 test): ``ind_hbm_volts`` = abs peak x
  1500 ohm (the HBM network's resistance; meaningful for low-ohm loads), ``ind_hbm_charge_c``
  and ``ind_hbm_energy_j`` of the 100 pF HBM capacitor at that voltage (ANSI/ESDA/JEDEC
  JS-001), ``ind_iec61010_charge_ratio`` = abs(charge) / 45 uC (IEC 61010-1 stored charge).

:func:`quick_metrics` applies this to one captured waveform (live display); the run-folder
side (journal, batches of waveform files, output files) is :mod:`rig.analysis.analyze`.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from rig.analysis.baseline import BASELINE_MAX, MAD_TO_SIGMA, baseline_noise, baseline_uncertainty
from rig.analysis.pulses import count_pulses, pulse_masks
from rig.analysis.shape import BLOCK, envelope, fit_tail, interp, search
from rig.analysis.wholecharge import MAX_TERMS, TAIL_SHARE_LIMIT, fit_tail_terms
from rig.store.schema import METRIC_COLUMNS
from rig.store.waveform import Waveform

__all__ = [
    "DECAY_LEVEL",
    "HBM_FARADS",
    "HBM_OHMS",
    "IEC61010_CHARGE_C",
    "MAD_TO_SIGMA",
    "current_after_onset",
    "event_metrics",
    "quick_metrics",
]

# Indicator constants. HBM network: 100 pF discharged through 1500 ohm (ANSI/ESDA/JEDEC
# JS-001, human body model). Stored charge: 45 uC, the figure IEC 61010-1 gives for a
# capacitance charged up to 15 kV.
HBM_OHMS = 1500.0  # ANSI/ESDA/JEDEC JS-001 network resistance, ohm
HBM_FARADS = 100e-12  # ANSI/ESDA/JEDEC JS-001 network capacitance, F
IEC61010_CHARGE_C = 45e-6  # IEC 61010-1 stored-charge figure (up to 15 kV), C
DECAY_LEVEL = float(np.exp(-1.0))  # 36.8 % of peak: 1/e of an RC discharge (textbook)


def event_metrics(
    data: np.ndarray,
    *,
    dt: float,
    t0: float = 0.0,
    gain: float | np.ndarray = 1.0,
    offset: float | np.ndarray = 0.0,
    code_min: int | np.ndarray | None = None,
    code_max: int | np.ndarray | None = None,
    n_baseline: int | None = None,
    charge_volts: float | np.ndarray = np.nan,
    load_ohms: float | np.ndarray = np.nan,
    noise_factor: float = 6.0,
    pulse_fraction: float = 0.25,
    chunk_bytes: int = 16 << 20,
    tail_fit: bool = True,
    tail_taus: np.ndarray | None = None,
) -> dict[str, np.ndarray]:
    """Metrics of every event (row) of ``data``; one 1-D array per name in METRIC_COLUMNS.

    data: (events, samples) int8/int16 ADC codes, or float currents in A (gain 1, offset 0).
    dt: seconds per sample; t0: time of sample 0 relative to the trigger, s.
    gain, offset: A per code and A at code 0, scalars or one per event.
    code_min, code_max: the ADC's rails (codes), for the clipped flag; None for floats.
    n_baseline: pre-trigger samples at the start of each record; None: the samples before
        t = 0 when t0 < 0, else the first 10 % of the record. The last tenth of them is left
        out of the baseline, since the edge may already be rising there.
    charge_volts: charge voltage per event, V (for c_equiv); load_ohms: load, ohm (energy).
    noise_factor: a peak must exceed this multiple of the noise, or the event is flagged
        below noise. pulse_fraction: pulse-count threshold as a fraction of the peak.
    chunk_bytes: working-memory budget of one chunk of float rows (bytes).
    tail_fit: fit the tail beyond the record (rig.analysis.wholecharge). False (the live
        display of a peak capture, which shows only the peak): ``charge_c`` is the record's
        integral, ``charge_tail_c`` and ``charge_u_c`` are NaN and ``flag_truncated`` is
        False because nobody judged it; the analysis always fits.
    tail_taus: time constants, s (slowest first), tried first with only the tail's
        amplitudes refitted; the full fit runs where they do not describe a record
        (:func:`rig.analysis.wholecharge.refit_amplitudes`). For the live display of
        repeated events; the analysis never passes them (None).
    """
    out = _metrics(
        data,
        dt=dt,
        t0=t0,
        gain=gain,
        offset=offset,
        code_min=code_min,
        code_max=code_max,
        n_baseline=n_baseline,
        charge_volts=charge_volts,
        load_ohms=load_ohms,
        noise_factor=noise_factor,
        pulse_fraction=pulse_fraction,
        chunk_bytes=chunk_bytes,
        tail_fit=tail_fit,
        tail_taus=tail_taus,
    )
    del out["t_onset_s"], out["tail_start"]
    return out


def current_after_onset(
    data: np.ndarray,
    after_s: Any,
    *,
    dt: float,
    t0: float = 0.0,
    gain: Any = 1.0,
    offset: Any = 0.0,
    **kwargs: Any,
) -> np.ndarray:
    """Baseline-removed current, A, at the given times after each event's onset (the 10 %
    point of the leading edge of its highest pulse), linearly interpolated: the I30 and I60
    of IEC 61000-4-2 with after_s = (30e-9, 60e-9). Shape (events, len(after_s)); NaN where
    the event is below noise or the time falls outside the record."""
    data = np.asarray(data)
    res = _metrics(data, dt=dt, t0=t0, gain=gain, offset=offset, **kwargs)
    m, n = data.shape
    after = np.atleast_1d(np.asarray(after_s, dtype=float))
    t0_r = np.broadcast_to(np.asarray(t0, dtype=float), (m,))[:, None]
    pos = (res["t_onset_s"][:, None] + after[None, :] - t0_r) / dt
    inside = np.isfinite(pos) & (pos >= 0) & (pos <= n - 1)
    k = np.clip(np.floor(np.nan_to_num(pos)), 0, n - 2).astype(np.int64)
    frac = np.nan_to_num(pos) - k
    rows = np.arange(m)[:, None]
    g = np.broadcast_to(np.asarray(gain, dtype=float), (m,))[:, None]
    off = np.broadcast_to(np.asarray(offset, dtype=float), (m,))[:, None]
    if data.dtype.kind not in "iu":
        g, off = np.ones((m, 1)), np.zeros((m, 1))
    x0 = data[rows, k] * g + off
    x1 = data[rows, k + 1] * g + off
    val = x0 + frac * (x1 - x0) - res["baseline_a"][:, None]
    return np.where(inside, val, np.nan)


def _metrics(
    data: np.ndarray,
    *,
    dt: float,
    t0: float = 0.0,
    gain: float | np.ndarray = 1.0,
    offset: float | np.ndarray = 0.0,
    code_min: int | np.ndarray | None = None,
    code_max: int | np.ndarray | None = None,
    n_baseline: int | None = None,
    charge_volts: float | np.ndarray = np.nan,
    load_ohms: float | np.ndarray = np.nan,
    noise_factor: float = 6.0,
    pulse_fraction: float = 0.25,
    chunk_bytes: int = 16 << 20,
    tail_fit: bool = True,
    tail_taus: np.ndarray | None = None,
) -> dict[str, np.ndarray]:
    """:func:`event_metrics` plus ``t_onset_s`` (10 % point of the leading edge, s)."""
    data = np.asarray(data)
    if data.ndim != 2:
        raise ValueError(
            f"event_metrics: expected a 2-D array (events x samples), got {data.shape}"
        )
    m, n = data.shape
    if n < 4:
        raise ValueError(f"event_metrics: a record needs at least 4 samples, got {n}")
    if not dt > 0:
        raise ValueError(f"event_metrics: dt must be positive, got {dt!r}")
    integer = data.dtype.kind in "iu"
    t0_r = np.broadcast_to(np.asarray(t0, dtype=np.float64), (m,))
    t0_ref = float(np.max(t0_r))  # rows may differ by a sub-sample phase
    if n_baseline is None:
        n_pre = int(np.ceil(-t0_ref / dt)) if t0_ref < 0 else 0
        n_baseline = min(n_pre, n) if n_pre > 0 else max(1, n // 10)
    n_base = max(1, n_baseline - n_baseline // 10)
    base_lo = max(0, n_base - BASELINE_MAX)

    def per_row(v: Any, dtype: Any = np.float64) -> np.ndarray:
        return np.broadcast_to(np.asarray(v, dtype=dtype), (m,))

    gain_r = per_row(gain) if integer else np.ones(m)
    offset_r = per_row(offset) if integer else np.zeros(m)
    volts_r, ohms_r = per_row(charge_volts), per_row(load_ohms)
    lo_r = per_row(code_min if code_min is not None else np.iinfo(np.int64).min, np.int64)
    hi_r = per_row(code_max if code_max is not None else np.iinfo(np.int64).max, np.int64)

    out = {k: np.full(m, np.nan) for k in (*METRIC_COLUMNS, "t_onset_s")}
    for k in ("flag_clipped", "flag_not_captured", "flag_truncated", "flag_below_noise"):
        out[k] = np.zeros(m, dtype=bool)
    out["polarity"] = np.zeros(m, dtype=np.int8)
    out["pulses"] = np.zeros(m, dtype=np.int64)
    out["tail_terms"] = np.zeros(m, dtype=np.int64)
    out["tail_start"] = np.full(m, np.nan)

    taus = None if tail_taus is None else np.asarray(tail_taus, dtype=np.float64) / dt
    work = np.float32 if (integer or data.dtype == np.float32) else np.float64
    rows_per_chunk = max(1, int(chunk_bytes // (n * np.dtype(work).itemsize)))
    for a in range(0, m, rows_per_chunk):
        b = min(m, a + rows_per_chunk)
        _chunk(
            data[a:b],
            work,
            integer,
            base_lo,
            n_base,
            noise_factor,
            pulse_fraction,
            lo_r[a:b],
            hi_r[a:b],
            out,
            slice(a, b),
            trig_index=-t0_r[a:b] / dt,
            tail_fit=tail_fit,
            taus=taus,
        )

    # Scale code units to amperes and derive the rest; all per event, cheap.
    g = np.abs(gain_r)
    sgn = np.where(gain_r < 0, -1, 1).astype(np.int8)
    out["polarity"] = (out["polarity"] * sgn).astype(np.int8)
    out["baseline_a"] = out["baseline_a"] * gain_r + offset_r
    out["noise_a"] = out["noise_a"] * g
    out["abs_peak_a"] = out["abs_peak_a"] * g
    out["peak_a"] = out["abs_peak_a"] * out["polarity"]
    out["baseline_u_a"] = out["baseline_u_a"] * g
    for k in ("t_peak_s", "rise_s", "decay_s", "tau_s", "fwhm_s", "t_onset_s"):
        out[k] = out[k] * dt
    out["t_peak_s"] = out["t_peak_s"] + t0_r
    out["t_onset_s"] = out["t_onset_s"] + t0_r
    # charges: code x samples -> C (gain carries the sign of the codes' scale); the polarity
    # is already in them, so a discharge keeps its sign
    for k in ("charge_c", "charge_record_c", "charge_tail_c"):
        out[k] = out[k] * gain_r * dt
    out["charge_u_c"] = out["charge_u_c"] * g * dt
    for j in range(1, MAX_TERMS + 1):
        out[f"term{j}_tau_s"] = out[f"term{j}_tau_s"] * dt
        out[f"term{j}_charge_c"] = out[f"term{j}_charge_c"] * gain_r * dt
    out["energy_j"] = out["energy_j"] * g**2 * dt * ohms_r
    with np.errstate(divide="ignore", invalid="ignore"):
        # C = Q / V of the input voltage the discharge started from (textbook Q = C V)
        c_equiv = np.abs(out["charge_c"]) / volts_r
        out["c_equiv_f"] = np.where(volts_r > 0, c_equiv, np.nan)
        # the slowest term's branch: C_1 = Q_1 / V, R_1 = tau_1 / C_1 (textbook RC); when
        # that term holds nearly all the charge (80 % or more), C_1 is the whole measured
        # c_equiv rather than the term's charge extrapolated back to the trigger
        q1 = np.abs(out["term1_charge_c"])
        q_all = np.abs(out["charge_c"])
        c1 = np.where(q1 >= 0.8 * q_all, q_all, q1)
        # the same time constant as the pulse's own tail fit (within 2x): take tau_s, which
        # is fitted on the whole decay rather than the tail's last tenth
        tau1 = out["term1_tau_s"]
        same = np.abs(np.log(tau1 / out["tau_s"])) < np.log(2.0)
        r1 = np.where(same, out["tau_s"], tau1) * volts_r / c1
        out["r_equiv_ohm"] = np.where(volts_r > 0, r1, np.nan)
    # the peak of i = V/R exp(-t/RC) is V/R, so V = peak x R; then Q = C V, E = C V^2 / 2
    # (textbook RC relations)
    out["ind_hbm_volts"] = out["abs_peak_a"] * HBM_OHMS
    out["ind_hbm_charge_c"] = HBM_FARADS * out["ind_hbm_volts"]
    out["ind_hbm_energy_j"] = 0.5 * HBM_FARADS * out["ind_hbm_volts"] ** 2
    out["ind_iec61010_charge_ratio"] = np.abs(out["charge_c"]) / IEC61010_CHARGE_C
    return out


def _chunk(
    raw: np.ndarray,
    work: Any,
    integer: bool,
    base_lo: int,
    base_hi: int,
    noise_factor: float,
    pulse_fraction: float,
    code_lo: np.ndarray,
    code_hi: np.ndarray,
    out: dict[str, np.ndarray],
    sl: slice,
    trig_index: np.ndarray,
    tail_fit: bool = True,
    taus: np.ndarray | None = None,
) -> None:
    """Metrics of one chunk of rows in code units (samples for times), written into ``out``.
    ``trig_index``: the trigger's (fractional) sample index per row; ``tail_fit``: see
    :func:`event_metrics`; ``taus``: its ``tail_taus`` in samples."""
    r, n = raw.shape
    rows = np.arange(r)
    pre = raw[:, base_lo:base_hi]
    base, noise = baseline_noise(pre)
    u_base, corr = baseline_uncertainty(pre, base, noise)
    vmax, vmin = raw.max(axis=1), raw.min(axis=1)
    if integer:
        out["flag_clipped"][sl] = (vmax >= code_hi) | (vmin <= code_lo)
    pol = np.where(vmax - base >= base - vmin, 1.0, -1.0)
    neg = np.flatnonzero(pol < 0)

    # y = (raw - base) * pol, one float array for the chunk, built in place
    y = np.empty((r, n), dtype=work)
    np.subtract(raw, base[:, None].astype(work), out=y, casting="unsafe")
    for i in neg:  # row by row: usually none or all, no mask pass
        np.negative(y[i], out=y[i])
    if integer:  # argmax over 1-byte codes is cheaper than over floats
        p = np.argmax(raw, axis=1)
        if neg.size:
            p[neg] = np.argmin(raw[neg], axis=1)
    else:
        p = np.argmax(y, axis=1)
    ip = y[rows, p].astype(np.float64)
    below = ~(ip > noise_factor * noise)
    ok = ~below

    out["baseline_a"][sl] = base
    out["baseline_u_a"][sl] = u_base
    out["noise_a"][sl] = noise
    # the record's charge from the end of the baseline window on, in float64: integer codes
    # summed exactly, the baseline subtracted once (a float32 baseline times 10^5 samples
    # would cost tens of nanocoulombs)
    n_int = n - base_hi
    if integer:
        total = raw[:, base_hi:].sum(axis=1, dtype=np.int64).astype(np.float64)
    else:
        total = raw[:, base_hi:].sum(axis=1, dtype=np.float64)
    q_rec = total - base * n_int
    out["charge_record_c"][sl] = q_rec
    out["charge_c"][sl] = q_rec
    out["charge_tail_c"][sl] = 0.0 if tail_fit else np.nan
    out["charge_u_c"][sl] = u_base * n_int if tail_fit else np.nan
    # in float64: a float32 sum of squares came out different in its last bits for the
    # same row depending on how many rows shared the chunk (so incremental analysis could
    # not equal a full one); this form gives every row the same sum alone or in a chunk
    out["energy_j"][sl] = np.einsum("ij,ij->i", y, y, dtype=np.float64)
    out["flag_below_noise"][sl] = below
    if not ok.any():
        if tail_fit:
            _whole_charge(
                raw, base, pol, noise, u_base, corr, p, trig_index, n_int, ok, out, sl, taus
            )
        return
    out["polarity"][sl] = np.where(ok, pol, 0).astype(np.int8)
    out["abs_peak_a"][sl] = np.where(ok, ip, np.nan)
    out["t_peak_s"][sl] = np.where(ok, p, np.nan)

    # Level crossings, found in windows around the peak (levels as fractions of the peak).
    floor = np.maximum(0.1 * ip, 3.0 * noise)
    after_lv = np.stack([0.9 * ip, 0.5 * ip, DECAY_LEVEL * ip, floor], axis=1)
    before_lv = np.stack([0.9 * ip, 0.5 * ip, 0.1 * ip], axis=1)
    env = envelope(raw, y, base, neg, integer, work)
    k_after = search(y, env, BLOCK, p + 1, after_lv, forward=True)
    k_before = search(y, env, BLOCK, p - 1, before_lv, forward=False)
    t_after = interp(y, k_after, after_lv, forward=True)
    t_before = interp(y, k_before, before_lv, forward=False)

    nan = np.nan
    out["rise_s"][sl] = np.where(ok, t_before[:, 0] - t_before[:, 2], nan)
    out["t_onset_s"][sl] = np.where(ok, t_before[:, 2], nan)
    out["fwhm_s"][sl] = np.where(ok, t_after[:, 1] - t_before[:, 1], nan)
    out["decay_s"][sl] = np.where(ok, t_after[:, 2] - p, nan)
    end = np.where(k_after[:, 3] >= 0, k_after[:, 3], n)
    tau = fit_tail(y, np.where(k_after[:, 0] >= 0, k_after[:, 0], n), end)

    out["tau_s"][sl] = np.where(ok, tau, nan)

    # Thresholds: the upper one at least (noise_factor + 3) x noise and the lower one at
    # least 3 x noise, so there are noise_factor x noise of hysteresis (noise on a slow tail
    # is not a new pulse) and the baseline reads firmly as "under" (few state changes).
    thr_hi = np.maximum(pulse_fraction * ip, (noise_factor + 3.0) * noise)
    thr_lo = np.maximum(np.minimum(0.5 * thr_hi, thr_hi - noise_factor * noise), 3.0 * noise)
    # the tail fit starts where the pulse has fallen to its floor (10 % of the peak, at least
    # 3 x noise), and after the last pulse when a bounce made the current rise again (above
    # the pulse threshold, at least 9 x noise: never noise)
    start = end.copy()
    for i in range(r):
        hi_idx = np.flatnonzero(y[i, end[i] :] > thr_hi[i]) if end[i] < n else []
        if len(hi_idx):
            after = end[i] + int(hi_idx[-1]) + 1
            below = np.flatnonzero(y[i, after:] < floor[i])
            start[i] = after + int(below[0]) if below.size else after
    if tail_fit:
        _whole_charge(
            raw, base, pol, noise, u_base, corr, start, trig_index, n_int, ok, out, sl, taus
        )
    above, under = pulse_masks(raw, y, base, pol, thr_hi, thr_lo, integer)
    # an event whose peak clears the noise but not the upper threshold is one pulse
    out["pulses"][sl] = np.where(ok, np.maximum(count_pulses(above, under), 1), 0)


def _whole_charge(
    raw: np.ndarray,
    base: np.ndarray,
    pol: np.ndarray,
    noise: np.ndarray,
    u_base: np.ndarray,
    corr: np.ndarray,
    p: np.ndarray,
    trig_index: np.ndarray,
    n_int: int,
    ok: np.ndarray,
    out: dict[str, np.ndarray],
    sl: slice,
    taus: np.ndarray | None = None,
) -> None:
    """The tail beyond the record (rig.analysis.wholecharge), per event of the chunk, in
    code x samples: whole charge, its standard uncertainty, the fitted terms (charge from
    the trigger on, slowest first) and the truncated flag (tail share above
    TAIL_SHARE_LIMIT)."""
    n = raw.shape[1]
    idx = np.arange(sl.start, sl.stop)
    for i in range(raw.shape[0]):
        trig = float(np.clip(trig_index[i], 0.0, n - 1))
        # the fit starts after the fast part: past the peak and 1 % of the post-trigger span
        # (a tail far below the per-sample noise is still fitted: its bins average it out)
        start = int(np.ceil(trig + 0.01 * (n - trig)))
        if ok[i]:
            start = max(start, int(p[i]) + 4)  # p: where the pulse has fallen to its floor
        if start > n - 16:
            if ok[i] and p[i] >= n:  # the pulse is still above its floor at the record's end
                k = idx[i]
                out["charge_tail_c"][k] = out["charge_u_c"][k] = np.nan
                out["flag_truncated"][k] = True
            continue
        fit, start = fit_tail_terms(
            raw[i], float(base[i]), float(pol[i]), start, noise[i], corr[i], u_base[i], n_int, taus
        )
        k = idx[i]
        if fit.unmeasured:
            # the record is far too short to measure the tail's time constant, or the sum of
            # exponentials does not describe it: the whole charge is unknown; charge_c keeps
            # the record's integral, flagged truncated
            out["charge_tail_c"][k] = np.nan
            out["charge_u_c"][k] = np.nan
            out["tail_terms"][k] = fit.terms
            out["flag_truncated"][k] = True
            continue
        q_rec = out["charge_record_c"][k]
        q_tail = pol[i] * fit.beyond  # beyond the record's end
        q = q_rec + pol[i] * fit.tail  # + the tail, less the baseline offset the fit found
        out["charge_tail_c"][k] = q_tail
        out["charge_c"][k] = q
        out["charge_u_c"][k] = fit.tail_u
        out["tail_terms"][k] = fit.terms
        out["tail_start"][k] = start
        lag = (start - 0.5) - trig  # from the trigger to the fit's time origin, samples
        for j in range(min(fit.terms, MAX_TERMS)):
            tau = float(fit.taus[j])
            out[f"term{j + 1}_tau_s"][k] = tau
            # the term's charge from the trigger on (extrapolated back over the fit's lag;
            # meaningless for a term much faster than that lag: NaN)
            if lag / tau < 50.0:
                q_j = pol[i] * fit.amps[j] * tau * np.exp(lag / tau)
                out[f"term{j + 1}_charge_c"][k] = q_j
        with np.errstate(divide="ignore", invalid="ignore"):
            share = abs(q_tail) / abs(q) if q != 0 else np.inf
        out["flag_truncated"][k] = bool(share > TAIL_SHARE_LIMIT or not np.isfinite(share))


def quick_metrics(
    wf: Waveform,
    channel: str = "current",
    *,
    tail_fit: bool = True,
    tail_taus: np.ndarray | None = None,
) -> dict[str, Any]:
    """Metrics of one waveform as it is captured (live display): METRIC_COLUMNS values as
    Python scalars, ``abs_peak_a`` None below noise, and ``flagged`` (clipped, truncated or
    below noise). No charge voltage or load is known here, so c_equiv and energy are NaN.
    ``tail_fit=False``: no tail fit (see :func:`event_metrics`; a peak capture's live figure
    is its peak, and the fit of its microsecond record cost 20 times the rest).
    ``tail_taus``: see :func:`event_metrics` (the previous event's time constants, s)."""
    k = wf.index(channel)
    res = event_metrics(
        wf.codes[k : k + 1],
        dt=wf.dt,
        t0=wf.t0,
        gain=wf.gain[k],
        offset=wf.offset[k],
        code_min=wf.code_min[k],
        code_max=wf.code_max[k],
        tail_fit=tail_fit,
        tail_taus=tail_taus,
    )
    out: dict[str, Any] = {name: v[0].item() for name, v in res.items()}
    if not np.isfinite(out["abs_peak_a"]):
        out["abs_peak_a"] = None
    out["flagged"] = bool(out["flag_clipped"] or out["flag_truncated"] or out["flag_below_noise"])
    return out
