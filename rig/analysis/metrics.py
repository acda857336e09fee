"""Per-event metrics of discharge current records, vectorised over 2-D arrays of events.

:func:`event_metrics` takes a 2-D array (events x samples, one record length) of raw ADC codes
(int8/int16 with gain and offset) or of currents in amperes (float), and returns one 1-D
array per metric. It works through the events in chunks of rows, converting each chunk once
to float32 (codes, exact) or keeping float64, so memory stays bounded whatever the number of
events. Level crossings are searched sample by sample only in the 64 samples next to the
peak; beyond them a table of 64-sample block minima names the one block to read, so the
search costs a few blocks per event, not the record length. Pulses are counted on 64-sample
blocks of the threshold masks read as machine words.

Definitions (times in seconds, currents in amperes; ``y`` is the baseline-removed current
turned positive by the event's polarity, ``Ip`` its peak):

- baseline, noise: median and 1.4826 x MAD of the pre-trigger samples (robust against the
  odd spike). For integer codes, where the MAD of rounded samples is too coarse below a code
  or so of noise, the noise is the standard deviation of the samples within median +-
  (4 robust sigma + 3 codes), robust sigma from the MAD (or, for 8-bit codes, the
  interquartile range), and at least the quantisation noise 1/sqrt(12) code. The median of
  whole codes is itself a whole (or half) code, up to half a code off the true level, and
  the charge integral multiplies a baseline error by the record length (half a 1 mA code
  over a 50 ms record is 25 uC); so where the mean of those same samples differs from the
  median by more than twice its standard error, the baseline is that mean (the median is
  kept otherwise: it is exact when the level sits on a code). Up to the last
  ``_BASELINE_MAX`` pre-trigger samples are used, so a long record with a long pre-trigger
  gets a baseline to match.
- polarity: sign of the larger excursion from the baseline.
- peak: largest ``y`` sample; ``peak_a`` carries the polarity, ``abs_peak_a`` does not.
- rise time: 10 % to 90 % of ``Ip`` on the leading edge of the highest pulse (last crossings
  before the peak), linearly interpolated between samples.
- decay time: from the peak to the first sample after it below 1/e = 36.8 % of ``Ip``
  (interpolated). Some texts measure from 90 % instead; this module measures from the peak.
- tau: time constant of the tail from a weighted log-linear fit (weights y^2, which makes it
  close to a least-squares fit of an exponential) of the samples after the peak between
  90 % of ``Ip`` and max(10 % of ``Ip``, 3 x noise); at most 256 evenly spaced samples.
- fwhm: time between the 50 % crossings either side of the peak.
- charge: integral of i dt over the record (signed); energy: load_ohms x integral of i^2 dt.
- pulses: separate pulses above H = max(25 % of ``Ip``, (noise_factor + 3) x noise), with
  hysteresis: a pulse ends when the current falls below max(3 x noise, min(H / 2,
  H - noise_factor x noise)) (contact bounce); at least 1 for an event above noise.
- c_equiv: abs(charge) / charge voltage; r_equiv: tau / c_equiv.
- flags: clipped (a sample at the ADC's lowest or highest code), truncated (mean of the last
  samples still above 5 % of ``Ip``), below noise (``Ip`` not above noise_factor x noise: the
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


HBM_OHMS = 1500.0  # JS-001 network resistance [T], REFERENCES.md section 1
HBM_FARADS = 100e-12  # JS-001 network capacitance [T]
IEC61010_CHARGE_C = 45e-6  # IEC 61010-1 stored-charge figure [T], REFERENCES.md section 3
DECAY_LEVEL = float(np.exp(-1.0))  # 36.8 % of peak
MAD_TO_SIGMA = 1.4826  # MAD of a normal distribution x 1.4826 = sigma (common practice)
# Samples used for the baseline, at most: a long record (a slow capture of the tail) needs a
# long pre-trigger, since its baseline error times the record length lands in the charge;
# bounded so that the cost stays linear in a few tens of thousands of samples per event.
_BASELINE_MAX = 1 << 15
_FIT_POINTS = 256
_BLOCK = 64  # samples per block of the crossing search's envelope


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
    truncation_fraction: float = 0.05,
    chunk_bytes: int = 16 << 20,
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
    truncation_fraction: the truncated flag is set when the record ends above this
        fraction of the peak.
    chunk_bytes: working-memory budget of one chunk of float rows (bytes).
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
        truncation_fraction=truncation_fraction,
        chunk_bytes=chunk_bytes,
    )
    del out["t_onset_s"]
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
    pos = (res["t_onset_s"][:, None] + after[None, :] - t0) / dt
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
    truncation_fraction: float = 0.05,
    chunk_bytes: int = 16 << 20,
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
    if n_baseline is None:
        n_pre = int(np.ceil(-t0 / dt)) if t0 < 0 else 0
        n_baseline = min(n_pre, n) if n_pre > 0 else max(1, n // 10)
    n_base = max(1, n_baseline - n_baseline // 10)
    base_lo = max(0, n_base - _BASELINE_MAX)

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
            truncation_fraction,
            lo_r[a:b],
            hi_r[a:b],
            out,
            slice(a, b),
        )

    # Scale code units to amperes and derive the rest; all per event, cheap.
    g = np.abs(gain_r)
    sgn = np.where(gain_r < 0, -1, 1).astype(np.int8)
    out["polarity"] = (out["polarity"] * sgn).astype(np.int8)
    out["baseline_a"] = out["baseline_a"] * gain_r + offset_r
    out["noise_a"] = out["noise_a"] * g
    out["abs_peak_a"] = out["abs_peak_a"] * g
    out["peak_a"] = out["abs_peak_a"] * out["polarity"]
    for k in ("t_peak_s", "rise_s", "decay_s", "tau_s", "fwhm_s", "t_onset_s"):
        out[k] = out[k] * dt
    out["t_peak_s"] = out["t_peak_s"] + t0
    out["t_onset_s"] = out["t_onset_s"] + t0
    out["charge_c"] = out["charge_c"] * gain_r * dt
    out["energy_j"] = out["energy_j"] * g**2 * dt * ohms_r
    with np.errstate(divide="ignore", invalid="ignore"):
        c_equiv = np.abs(out["charge_c"]) / volts_r
        out["c_equiv_f"] = np.where(volts_r > 0, c_equiv, np.nan)
        out["r_equiv_ohm"] = out["tau_s"] / out["c_equiv_f"]
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
    trunc_fraction: float,
    code_lo: np.ndarray,
    code_hi: np.ndarray,
    out: dict[str, np.ndarray],
    sl: slice,
) -> None:
    """Metrics of one chunk of rows in code units (samples for times), written into ``out``."""
    r, n = raw.shape
    rows = np.arange(r)
    pre = raw[:, base_lo:base_hi]
    if raw.dtype == np.int8:
        base, noise = _baseline_int8(pre)
    else:
        base = np.median(pre, axis=1)
        noise = MAD_TO_SIGMA * np.median(np.abs(pre - base[:, None]), axis=1)
        if integer:
            base, noise = _code_baseline(pre, base, noise)
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
    out["noise_a"][sl] = noise
    # float32 sums in SIMD blocks: relative error well under 1e-3 over 1e5 samples
    out["charge_c"][sl] = pol * np.einsum("ij->i", y)
    out["energy_j"][sl] = np.einsum("ij,ij->i", y, y)
    out["flag_below_noise"][sl] = below
    if not ok.any():
        return
    out["polarity"][sl] = np.where(ok, pol, 0).astype(np.int8)
    out["abs_peak_a"][sl] = np.where(ok, ip, np.nan)
    out["t_peak_s"][sl] = np.where(ok, p, np.nan)

    # Level crossings, found in windows around the peak (levels as fractions of the peak).
    floor = np.maximum(0.1 * ip, 3.0 * noise)
    after_lv = np.stack([0.9 * ip, 0.5 * ip, DECAY_LEVEL * ip, floor], axis=1)
    before_lv = np.stack([0.9 * ip, 0.5 * ip, 0.1 * ip], axis=1)
    env = _envelope(raw, y, base, neg, integer, work)
    k_after = _search(y, env, _BLOCK, p + 1, after_lv, forward=True)
    k_before = _search(y, env, _BLOCK, p - 1, before_lv, forward=False)
    t_after = _interp(y, k_after, after_lv, forward=True)
    t_before = _interp(y, k_before, before_lv, forward=False)

    nan = np.nan
    out["rise_s"][sl] = np.where(ok, t_before[:, 0] - t_before[:, 2], nan)
    out["t_onset_s"][sl] = np.where(ok, t_before[:, 2], nan)
    out["fwhm_s"][sl] = np.where(ok, t_after[:, 1] - t_before[:, 1], nan)
    out["decay_s"][sl] = np.where(ok, t_after[:, 2] - p, nan)
    end = np.where(k_after[:, 3] >= 0, k_after[:, 3], n)
    tau = _fit_tail(y, np.where(k_after[:, 0] >= 0, k_after[:, 0], n), end)
    out["tau_s"][sl] = np.where(ok, tau, nan)

    tail = max(4, n // 200)
    tail_mean = y[:, n - tail :].mean(axis=1, dtype=np.float64)
    out["flag_truncated"][sl] = ok & (tail_mean > trunc_fraction * ip)

    # Thresholds: the upper one at least (noise_factor + 3) x noise and the lower one at
    # least 3 x noise, so there are noise_factor x noise of hysteresis (noise on a slow tail
    # is not a new pulse) and the baseline reads firmly as "under" (few state changes).
    thr_hi = np.maximum(pulse_fraction * ip, (noise_factor + 3.0) * noise)
    thr_lo = np.maximum(np.minimum(0.5 * thr_hi, thr_hi - noise_factor * noise), 3.0 * noise)
    above, under = _pulse_masks(raw, y, base, pol, thr_hi, thr_lo, integer)
    # an event whose peak clears the noise but not the upper threshold is one pulse
    out["pulses"][sl] = np.where(ok, np.maximum(_count_pulses(above, under), 1), 0)


def _code_baseline(
    pre: np.ndarray, med: np.ndarray, mad_sigma: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Baseline and noise of integer codes, in codes, from the samples within median +-
    (4 x MAD sigma + 3 codes) (spikes beyond stay out). Noise: their standard deviation
    (below about one code of noise the MAD of rounded samples collapses to 0 or 1 code), at
    least the quantisation noise 1/sqrt(12) code. Baseline: see :func:`_settle_baseline`."""
    dev = pre - med[:, None]
    keep = np.abs(dev) <= (4.0 * mad_sigma + 3.0)[:, None]
    cnt = np.maximum(keep.sum(axis=1), 1)
    mean = np.where(keep, dev, 0.0).sum(axis=1) / cnt
    var = np.where(keep, (dev - mean[:, None]) ** 2, 0.0).sum(axis=1) / np.maximum(cnt - 1, 1)
    return _settle_baseline(med, mean, var, cnt), np.maximum(np.sqrt(var), 1.0 / np.sqrt(12.0))


def _settle_baseline(
    med: np.ndarray, mean_dev: np.ndarray, var: np.ndarray, cnt: np.ndarray
) -> np.ndarray:
    """The median of whole codes, or the mean of the kept samples (median + mean_dev) where
    the two differ by more than twice the mean's standard error sqrt(var / cnt): the median
    is then off the true level by part of a code (it is a whole or half code), which the
    charge integral would multiply by the record length. Where they agree the median stays,
    since it is exact when the level sits on a code."""
    se = np.sqrt(np.maximum(var, 1.0 / 12.0) / np.maximum(cnt, 1))
    return np.where(np.abs(mean_dev) > 2.0 * se, med + mean_dev, med)


def _baseline_int8(pre: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Baselines and noise (codes) of int8 codes from per-row histograms, from the samples
    within median +- (4 sigma + 3 codes), where sigma = IQR / 1.349 (normal distribution);
    the same rule as :func:`_code_baseline` with the interquartile range in place of the
    MAD, at a fraction of the cost."""
    r, k = pre.shape
    # bin index code + 128 of each row's own 256 bins: the uint8 view XOR 0x80 is code + 128
    # (two's complement), 3.5x cheaper than widening and adding 128
    flat = (pre.view(np.uint8) ^ np.uint8(0x80)).astype(np.intp)
    flat += (256 * np.arange(r, dtype=np.intp))[:, None]
    counts = np.bincount(flat.ravel(), minlength=256 * r).reshape(r, 256)
    cum = np.cumsum(counts, axis=1)
    codes = np.arange(-128, 128, dtype=np.float64)

    def rank(q: int) -> np.ndarray:
        return codes[np.argmax(cum > q, axis=1)]

    med = 0.5 * (rank((k - 1) // 2) + rank(k // 2))
    sigma = (rank((3 * k) // 4) - rank(k // 4)) / 1.349
    dev = codes[None, :] - med[:, None]
    w = np.where(np.abs(dev) <= (4.0 * sigma + 3.0)[:, None], counts, 0)
    cnt = np.maximum(w.sum(axis=1), 1)
    mean = (w * dev).sum(axis=1) / cnt
    var = (w * (dev - mean[:, None]) ** 2).sum(axis=1) / np.maximum(cnt - 1, 1)
    return _settle_baseline(med, mean, var, cnt), np.maximum(np.sqrt(var), 1.0 / np.sqrt(12.0))


def _pulse_masks(
    raw: np.ndarray,
    y: np.ndarray,
    base: np.ndarray,
    pol: np.ndarray,
    hi: np.ndarray,
    lo: np.ndarray,
    integer: bool,
) -> tuple[np.ndarray, np.ndarray]:
    """Boolean masks y > hi and y < lo. For integer codes the comparison is done on the raw
    codes against integer thresholds (exact for integers, and 4x less memory traffic)."""
    if not integer:
        return y > hi[:, None].astype(y.dtype), y < lo[:, None].astype(y.dtype)
    info = np.iinfo(raw.dtype)

    def th(v: np.ndarray) -> np.ndarray:
        return np.clip(v, info.min, info.max).astype(raw.dtype)[:, None]

    above = np.empty(raw.shape, dtype=bool)
    under = np.empty(raw.shape, dtype=bool)
    pos = pol > 0
    for sel, positive in ((pos, True), (~pos, False)):
        if not sel.any():
            continue
        part = raw if sel.all() else raw[sel]
        if positive:  # raw > base + hi; raw < base + lo
            a = part > th(np.floor(base[sel] + hi[sel]))
            u = part <= th(np.ceil(base[sel] + lo[sel]) - 1)
        else:  # raw < base - hi; raw > base - lo
            a = part < th(np.ceil(base[sel] - hi[sel]))
            u = part >= th(np.floor(base[sel] - lo[sel]) + 1)
        if sel.all():
            return a, u
        above[sel], under[sel] = a, u
    return above, under


def _envelope(
    raw: np.ndarray, y: np.ndarray, base: np.ndarray, neg: np.ndarray, integer: bool, work: Any
) -> np.ndarray:
    """Block minima of y = (raw - base) x polarity. For integer codes they are taken on the
    raw codes (1 or 2 bytes a sample instead of 4) and shifted afterwards: y is a monotonic
    function of raw within a row, computed by the same float subtraction, so the result is
    identical to ``_block_min(y, _BLOCK)``."""
    if not integer:
        return _block_min(y, _BLOCK)
    r = raw.shape[0]
    env = np.empty((r, raw.shape[1] // _BLOCK), dtype=work)
    b = base[:, None].astype(work)
    if neg.size == 0:
        np.subtract(_block_min(raw, _BLOCK), b, out=env, casting="unsafe")
        return env
    pos = np.ones(r, dtype=bool)
    pos[neg] = False
    if pos.any():
        env[pos] = _block_min(raw[pos], _BLOCK).astype(work) - b[pos]
    env[neg] = -(-_block_min(-raw[neg].astype(np.int32), _BLOCK).astype(work) - b[neg])
    return env


def _block_min(y: np.ndarray, block: int) -> np.ndarray:
    """Minimum of each whole block of ``block`` samples (a power of two) per row, by halving
    (pairwise minima over contiguous data are much faster than a reduction over short axes)."""
    nb = y.shape[1] // block
    m = y[:, : nb * block]
    while m.shape[1] > nb:
        m = np.minimum(m[:, 0::2], m[:, 1::2])
    return m


def _window(y: np.ndarray, rows: np.ndarray, first: np.ndarray, width: int):
    """Samples ``first .. first+width-1`` of each row (copied as contiguous blocks through a
    sliding-window view), with their indices; samples outside the row read as +inf."""
    n = y.shape[1]
    flat = y.reshape(-1)
    width = min(width, flat.size)
    view = np.lib.stride_tricks.sliding_window_view(flat, width)
    fstart = np.clip(rows * n + first, 0, flat.size - width)
    vals = view[fstart].astype(np.float64)
    idx = (fstart - rows * n)[:, None] + np.arange(width)
    outside = (idx < first[:, None]) | (idx >= first[:, None] + width) | (idx < 0) | (idx >= n)
    vals[outside] = np.inf
    return vals, idx


def _first_below(vals: np.ndarray, idx: np.ndarray, level: np.ndarray, forward: bool):
    """Nearest index (first when forward, last when backward) with vals < level; -1 if none."""
    cond = vals < level[:, None]
    if not forward:
        cond = cond[:, ::-1]
        idx = idx[:, ::-1]
    hit = cond.any(axis=1)
    return np.where(hit, idx[np.arange(idx.shape[0]), np.argmax(cond, axis=1)], -1)


def _search(
    y: np.ndarray,
    env: np.ndarray,
    block: int,
    start: np.ndarray,
    levels: np.ndarray,
    *,
    forward: bool,
) -> np.ndarray:
    """Per row and level, the nearest index from ``start`` on (forward or backward, start
    included) where ``y`` is below the level; -1 where there is none.

    Exact look at the ``block`` samples from ``start``; beyond them the block minima ``env``
    name the first block that holds a crossing, and only that block is read sample by sample.
    """
    r, n = y.shape
    nb = env.shape[1]
    found = np.full(levels.shape, -1, dtype=np.int64)
    rows = np.flatnonzero((start >= 0) & (start < n))
    if rows.size == 0:
        return found
    st = start[rows].astype(np.int64)
    first = st if forward else st - (block - 1)
    vals, idx = _window(y, rows, first, block)
    blocks = np.arange(nb)
    if forward:
        beyond = blocks[None, :] >= (st // block + 1)[:, None]
    else:
        beyond = blocks[None, :] <= (st // block - 1)[:, None]
    env_r = env[rows]
    for j in range(levels.shape[1]):
        lv = levels[rows, j]
        k = _first_below(vals, idx, lv, forward)
        todo = k < 0
        if todo.any():
            cond = (env_r[todo] < lv[todo, None]) & beyond[todo]
            hit = cond.any(axis=1)
            pick = np.argmax(cond, axis=1) if forward else nb - 1 - np.argmax(cond[:, ::-1], axis=1)
            sub = np.flatnonzero(todo)
            kb = np.full(sub.size, -1, dtype=np.int64)
            if hit.any():
                v2, i2 = _window(y, rows[sub[hit]], pick[hit] * block, block)
                kb[hit] = _first_below(v2, i2, lv[sub[hit]], forward)
            if forward and nb * block < n:  # samples after the last whole block
                rest = (kb < 0) & (st[sub] < nb * block)
                if rest.any():
                    tail_first = np.full(int(rest.sum()), nb * block, dtype=np.int64)
                    v3, i3 = _window(y, rows[sub[rest]], tail_first, block)
                    kb[rest] = _first_below(v3, i3, lv[sub[rest]], forward)
            k[todo] = kb
        found[rows, j] = k
    return found


def _interp(y: np.ndarray, k: np.ndarray, levels: np.ndarray, *, forward: bool) -> np.ndarray:
    """Fractional sample index where ``y`` crosses each level next to the found sample ``k``
    (the neighbour towards the peak is at or above the level); NaN where k < 0."""
    n = y.shape[1]
    rows = np.arange(y.shape[0])[:, None]
    kk = np.clip(k, 0, n - 1)
    nb = np.clip(kk - 1 if forward else kk + 1, 0, n - 1)
    y_k = y[rows, kk].astype(np.float64)
    y_nb = y[rows, nb].astype(np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        frac = (y_nb - levels) / (y_nb - y_k)
    frac = np.clip(np.nan_to_num(frac, nan=0.0), 0.0, 1.0)
    t = nb + frac if forward else nb - frac
    return np.where(k >= 0, t, np.nan)


def _fit_tail(y: np.ndarray, start: np.ndarray, end: np.ndarray) -> np.ndarray:
    """Tail time constant in samples: weighted least squares of log y on time, weights y^2,
    over at most _FIT_POINTS evenly spaced samples in [start, end); NaN with < 3 points."""
    n = y.shape[1]
    length = np.maximum(end - start, 0)
    stride = np.maximum(1, -(-length // _FIT_POINTS))
    idx = start[:, None] + stride[:, None] * np.arange(_FIT_POINTS)
    use = idx < end[:, None]
    vals = y[np.arange(y.shape[0])[:, None], np.clip(idx, 0, n - 1)].astype(np.float64)
    use &= vals > 0
    w = np.where(use, vals * vals, 0.0)
    ly = np.log(np.where(use, vals, 1.0))
    t = (idx - start[:, None]).astype(np.float64)
    s0, s1, s2 = w.sum(1), (w * t).sum(1), (w * t * t).sum(1)
    sy, sty = (w * ly).sum(1), (w * t * ly).sum(1)
    with np.errstate(divide="ignore", invalid="ignore"):
        slope = (s0 * sty - s1 * sy) / (s0 * s2 - s1 * s1)
        tau = -1.0 / slope
    return np.where((use.sum(1) >= 3) & (slope < 0), tau, np.nan)


def _count_pulses(above: np.ndarray, under: np.ndarray) -> np.ndarray:
    """Pulses per row: entries into ``above`` that follow a dip into ``under`` (or the start).

    Block by block where the masks can be read 8 samples to a machine word (records of a
    multiple of 8 samples), else sample by sample; both give the same counts."""
    if above.shape[1] % 8 == 0 and above.flags.c_contiguous and under.flags.c_contiguous:
        return _count_pulses_blocks(above, under)
    return _count_pulses_sparse(above, under)


def _prev_nonzero(tok: np.ndarray) -> np.ndarray:
    """For each position, the last nonzero token strictly before it in its row (-1 if none:
    a record starts "under")."""
    r, m = tok.shape
    pos = np.where(tok != 0, np.arange(m, dtype=np.int32), np.int32(-1))
    last = np.maximum.accumulate(pos, axis=1)
    prev_pos = np.full_like(last, -1)
    prev_pos[:, 1:] = last[:, :-1]
    vals = np.take_along_axis(tok, np.maximum(prev_pos, 0), axis=1)
    return np.where(prev_pos >= 0, vals, np.int8(-1)).astype(np.int8)


def _block_any(mask: np.ndarray, words: int) -> np.ndarray:
    """Whether each block of ``words`` x 8 samples holds a True (a last, shorter block takes
    the rest), reading the booleans as 64-bit words and OR-ing them pairwise."""
    w = mask.view(np.uint64)
    nb = w.shape[1] // words
    m = w[:, : nb * words]
    while m.shape[1] > nb:
        m = m[:, 0::2] | m[:, 1::2]
    out = m != 0
    if w.shape[1] > nb * words:
        out = np.concatenate([out, (w[:, nb * words :] != 0).any(axis=1)[:, None]], axis=1)
    return out


def _count_pulses_blocks(above: np.ndarray, under: np.ndarray, block: int = 64) -> np.ndarray:
    """_count_pulses on blocks: a block with only "above" (or only "under") samples is one
    token +1 (-1); the few blocks with both are resolved sample by sample into their first
    and last state and the rises inside them."""
    r, n = above.shape
    a_any = _block_any(above, block // 8)
    u_any = _block_any(under, block // 8)
    nb = a_any.shape[1]
    tok = np.zeros((r, 2 * nb), dtype=np.int8)  # (first, last) state of every block
    plain = a_any.astype(np.int8) - u_any.astype(np.int8)
    tok[:, 0::2] = plain
    tok[:, 1::2] = plain
    inner = np.zeros(r, dtype=np.int64)
    br, bb = np.nonzero(a_any & u_any)
    if br.size:
        idx = bb[:, None] * block + np.arange(block)
        valid = idx < n
        idx = np.minimum(idx, n - 1)
        st = above[br[:, None], idx].view(np.int8) - under[br[:, None], idx].view(np.int8)
        st = np.where(valid, st, 0).astype(np.int8)
        prev = _prev_nonzero(st)
        first_pos = np.argmax(st != 0, axis=1)
        last_pos = block - 1 - np.argmax(st[:, ::-1] != 0, axis=1)
        first = st[np.arange(br.size), first_pos]
        last = st[np.arange(br.size), last_pos]
        # rises inside the block; one at its first state depends on the block before and is
        # counted through the block's token instead
        rises = ((st == 1) & (prev == -1)).sum(axis=1) - (first == 1)
        tok[br, 2 * bb] = first
        tok[br, 2 * bb + 1] = last
        np.add.at(inner, br, rises)
    # Only tokens that differ from their neighbour can start a rise: few per row.
    keep = tok != 0
    keep[:, 1:] &= tok[:, 1:] != tok[:, :-1]
    rows, cols = np.nonzero(keep)
    vals = tok[rows, cols]
    prev = np.full(vals.size, -1, dtype=np.int8)  # a record starts "under"
    if vals.size > 1:
        same_row = rows[1:] == rows[:-1]
        prev[1:] = np.where(same_row, vals[:-1], -1)
    rise = (vals == 1) & (prev == -1) & (cols % 2 == 0)  # rises at a block's first state
    return np.bincount(rows[rise], minlength=r) + inner


def _count_pulses_sparse(above: np.ndarray, under: np.ndarray) -> np.ndarray:
    """_count_pulses sample by sample.

    The state +1 (above), -1 (under) or 0 (between) changes only at a few samples; those
    changes, found in one pass, are all the hysteresis logic needs."""
    r, n = above.shape
    state = above.view(np.int8) - under.view(np.int8)
    change = np.flatnonzero(state[:, 1:] != state[:, :-1])  # flat in the (r, n - 1) grid
    rows, col = np.divmod(change, n - 1)
    new = state.reshape(-1)[rows * n + col + 1]
    keep = new != 0  # entering "between" changes nothing
    rows, new = rows[keep], new[keep]
    start = np.where(state[:, 0] > 0, 1, -1).astype(np.int8)  # between at the start: under
    prev = np.empty_like(new)
    if new.size:
        prev[1:] = new[:-1]
        first = np.ones(new.size, dtype=bool)
        first[1:] = rows[1:] != rows[:-1]
        prev[first] = start[rows[first]]
    starts = (new == 1) & (prev == -1)
    return np.bincount(rows[starts], minlength=r) + (start > 0)


def quick_metrics(wf: Waveform, channel: str = "current") -> dict[str, Any]:
    """Metrics of one waveform as it is captured (live display): METRIC_COLUMNS values as
    Python scalars, ``abs_peak_a`` None below noise, and ``flagged`` (clipped, truncated or
    below noise). No charge voltage or load is known here, so c_equiv and energy are NaN."""
    k = wf.index(channel)
    res = event_metrics(
        wf.codes[k : k + 1],
        dt=wf.dt,
        t0=wf.t0,
        gain=wf.gain[k],
        offset=wf.offset[k],
        code_min=wf.code_min[k],
        code_max=wf.code_max[k],
    )
    out: dict[str, Any] = {name: v[0].item() for name, v in res.items()}
    if not np.isfinite(out["abs_peak_a"]):
        out["abs_peak_a"] = None
    out["flagged"] = bool(out["flag_clipped"] or out["flag_truncated"] or out["flag_below_noise"])
    return out
