"""Analysis on synthetic data and synthetic run folders: metrics, run analysis, groups,
self-discharge, comparison and saved-file measurement.

The run folders are built the way rig/store/runfolder.py and DEVELOPERS.md describe them (plan.json,
journal.jsonl, manifest.json, waveforms/*.npz written by rig.store.waveform.save_waveform). The
meters, serials and values are invented.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from rig.analysis.analyze import METRIC_COLUMNS, analyze_run, compute_metrics
from rig.analysis.baseline import baseline_int8
from rig.analysis.compare import COMPARE_COLUMNS, all_equivalent, compare_runs, write_comparison
from rig.analysis.measure import measure_file
from rig.analysis.metrics import event_metrics
from rig.analysis.pulses import count_pulses_blocks, count_pulses_sparse
from rig.analysis.selfdischarge import SELFDISCHARGE_COLUMNS, fit_self_discharge, self_discharge
from rig.analysis.stats import GROUPS_COLUMNS
from rig.store.waveform import Waveform, save_waveform
from rigbase.errors import FileFormatError, RunFolderError

DT = 0.5e-9
N = 3000
PRE = 300
GAIN = 0.02  # A per code
# Invented source per mode: equivalent capacitance (F) and source resistance (ohm)
MODES = {"ACV": (2.0e-9, 50.0), "ACmV": (0.5e-9, 100.0)}
JOURNAL_EXTRA = ("time", "supply_volts", "residual_volts")


def pulse(volts: float, c: float, r: float, t: np.ndarray) -> np.ndarray:
    """Ideal RC discharge current, A."""
    return np.where(t >= 0, volts / r * np.exp(-np.maximum(t, 0.0) / (r * c)), 0.0)


def make_run(
    root: Path,
    name: str,
    *,
    rng: np.random.Generator,
    reps: int = 8,
    volts: tuple[float, ...] = (100.0,),
    modes: dict[str, tuple[float, float]] = MODES,
    delays: tuple[float, ...] = (0.0,),
    sd_tau: float = 3.0,
    scale: float = 1.0,
    jitter: float = 0.02,
    limits: list[dict] | None = None,
    drop: set[int] = frozenset(),
    noise_only: set[int] = frozenset(),
    serial: str = "SN-0001",
) -> Path:
    """A run folder of invented events: per mode an RC discharge with a few % spread,
    charge falling as exp(-delay / sd_tau) over the delay (self-discharge)."""
    run = root / name
    (run / "waveforms").mkdir(parents=True)
    t = (np.arange(N) - PRE) * DT
    plan, journal = [], []
    event = 0
    for mode, (c, r) in modes.items():
        for v in volts:
            for d in delays:
                for rep in range(reps):
                    row = {
                        "event": event,
                        "key": f"{mode}/{v:g}/short/{d:g}/{rep}",
                        "meter": "Fictitia FM-1",
                        "serial": serial,
                        "mode": mode,
                        "volts": v,
                        "load": "short",
                        "load_ohms": 0.05,
                        "delay_s": d,
                        "rep": rep,
                    }
                    plan.append(dict(row))
                    if event in drop:
                        journal.append(
                            {
                                **row,
                                "status": "not_captured",
                                "file": None,
                                "sha256": None,
                                "time": "2026-12-01T10:00:00Z",
                                "supply_volts": v,
                                "residual_volts": None,
                            }
                        )
                        event += 1
                        continue
                    v_left = v * math.exp(-d / sd_tau)
                    amp = scale * (1 + jitter * rng.standard_normal())
                    i = amp * pulse(v_left, c, r, t)
                    if event in noise_only:
                        i = np.zeros_like(t)
                    codes = np.round(i / GAIN + rng.normal(0.0, 0.7, N))
                    wf = Waveform(
                        codes=np.clip(codes, -32768, 32767).astype(np.int16)[None, :],
                        gain=np.array([GAIN]),
                        offset=np.array([0.0]),
                        code_min=np.array([-32768]),
                        code_max=np.array([32767]),
                        dt=DT,
                        t0=float(t[0]),
                        channels=("current",),
                        units=("A",),
                    )
                    rel = f"waveforms/e{event:06d}.npz"
                    sha = save_waveform(run / rel, wf)
                    journal.append(
                        {
                            **row,
                            "status": "captured",
                            "file": rel,
                            "sha256": sha,
                            "time": "2026-12-01T10:00:00Z",
                            "supply_volts": v,
                            "residual_volts": 0.5,
                        }
                    )
                    event += 1
    manifest = {
        "format": 1,
        "run_id": name,
        "status": "complete",
        "sequence": {"name": "invented qualification", "limits": limits or []},
        "bench": {"limits": {"safe_residual_volts": 30.0}},
    }
    (run / "manifest.json").write_text(json.dumps(manifest), encoding="utf-8")
    (run / "plan.json").write_text(json.dumps(plan), encoding="utf-8")
    with open(run / "journal.jsonl", "w", encoding="utf-8") as fh:
        for row in journal:
            fh.write(json.dumps(row) + "\n")
    return run


# --------------------------------------------------------------------------- kernel


def test_histogram_baseline_equals_numpy():
    # Reference: numpy.mean and numpy.std (ddof 1) of the samples inside the window
    # numpy.median +- (4 IQR / 1.349 + 3 codes) found by numpy.sort, on the same codes.
    rng = np.random.default_rng(11)
    for k in (101, 256):
        for sigma in (0.6, 2.0, 8.0):
            pre = np.clip(np.round(rng.normal(3, sigma, (30, k))), -128, 127).astype(np.int8)
            base, noise = baseline_int8(pre)
            med = np.median(pre, axis=1)
            srt = np.sort(pre, axis=1).astype(float)
            s = (srt[:, (3 * k) // 4] - srt[:, k // 4]) / 1.349
            for row in range(30):
                x = pre[row][np.abs(pre[row] - med[row]) <= 4 * s[row] + 3]
                assert noise[row] == pytest.approx(max(x.std(ddof=1), 12**-0.5), rel=1e-9)
                # always the mean of the kept samples: no switching rule noise could trip
                assert base[row] == pytest.approx(x.mean(), rel=1e-9, abs=1e-12)
            # normal noise: the estimate is close to sigma (Sheppard: + 1/12 code^2)
            assert np.median(noise) == pytest.approx(np.hypot(sigma, 12**-0.5), rel=0.1)
    # a spike far outside the window does not count as noise
    pre = np.clip(np.round(rng.normal(0, 1.0, (1, 500))), -128, 127).astype(np.int8)
    pre[0, 7] = 120
    assert baseline_int8(pre)[1][0] == pytest.approx(np.delete(pre[0], 7).std(ddof=1))


def test_code_baseline_is_not_rounded_to_a_whole_code():
    """The charge integral multiplies a baseline error by the record length; the median of
    whole codes is a whole code. A true offset of 0.37 code under 3 codes of normal noise:
    the mean of the kept samples finds it (standard error 3 / sqrt(18000) code), the median
    would say 0. Long pre-triggers are used in full (here 18000 of 20000 samples); the
    estimator is the same whatever the level (no rule that switches between two)."""
    rng = np.random.default_rng(17)
    n_pre, n = 20_000, 40_000
    t0 = -n_pre * 1e-7
    codes = np.round(rng.normal(0.37, 3.0, (4, n))).astype(np.int16)
    for dtype in (np.int16, np.int8):
        m = event_metrics(codes.astype(dtype), dt=1e-7, t0=t0, gain=1e-3)
        base_codes = m["baseline_a"] / 1e-3
        assert np.median(np.median(codes[:, : n_pre - n_pre // 10], axis=1)) == 0.0
        np.testing.assert_allclose(base_codes, 0.37, atol=5 * 3.0 / np.sqrt(18_000))
        # so the integral of a record of pure noise is near zero, not 0.37 code x 4 ms
        assert np.all(np.abs(m["charge_c"]) < 0.1 * 0.37e-3 * n * 1e-7)
    on_code = np.round(rng.normal(2.0, 0.7, (4, n))).astype(np.int16)
    m = event_metrics(on_code, dt=1e-7, t0=t0, gain=1e-3)
    # the mean of normal noise around a code (Sheppard: rounding adds no bias when dithered)
    np.testing.assert_allclose(m["baseline_a"], 2e-3, atol=5 * 0.7e-3 / np.sqrt(18_000))
    np.testing.assert_array_less(m["baseline_u_a"], 3 * 0.7e-3 / np.sqrt(18_000) + 1e-9)


def test_block_pulse_count_equals_sample_by_sample():
    # Reference: the plain sample-by-sample hysteresis count on the same random state masks
    # (dense random states are the hardest case for the block shortcut).
    rng = np.random.default_rng(12)
    for trial in range(150):
        r, n = int(rng.integers(1, 6)), 8 * int(rng.integers(1, 60))
        x = rng.integers(-1, 2, (r, n))
        if trial % 3 == 0:  # runs of equal states, like real pulses
            x = np.repeat(rng.integers(-1, 2, (r, n // 8 + 1)), 8, axis=1)[:, :n]
        above, under = x == 1, x == -1
        ref = count_pulses_sparse(above, under)
        for block in (8, 64):
            np.testing.assert_array_equal(count_pulses_blocks(above, under, block), ref)


def test_codes_and_floats_give_the_same_metrics():
    rng = np.random.default_rng(5)
    t = (np.arange(N) - PRE) * DT
    i = np.stack([pulse(100.0, 2e-9, 50.0, t) * s for s in (1.0, -0.7)])
    codes = np.round(i / GAIN + rng.normal(0, 0.7, i.shape)).astype(np.int16)
    a = event_metrics(codes, dt=DT, t0=t[0], gain=GAIN, charge_volts=100.0, load_ohms=1.0)
    b = event_metrics(codes * GAIN, dt=DT, t0=t[0], charge_volts=100.0, load_ohms=1.0)
    assert set(a) == set(METRIC_COLUMNS)
    # the baselines are trimmed means over slightly different windows (codes: +- 3 codes
    # more), so the metrics agree to a few parts in 10^4 (the charge, which multiplies the
    # baseline by the record length, to 2e-3)
    for k in ("peak_a", "energy_j", "rise_s", "decay_s", "fwhm_s"):
        np.testing.assert_allclose(a[k], b[k], rtol=5e-4, err_msg=k)
    np.testing.assert_allclose(a["charge_record_c"], b["charge_record_c"], rtol=2e-3)
    # the fit's lower end depends on the noise estimate, which differs by design (codes:
    # trimmed standard deviation; floats: MAD), so tau agrees to the noise level only
    np.testing.assert_allclose(a["tau_s"], b["tau_s"], rtol=0.02)
    assert list(a["polarity"]) == [1, -1]
    assert a["peak_a"][1] < 0 and a["charge_c"][1] < 0
    # negative gain flips the sign of the current, not the magnitude
    c = event_metrics(-codes, dt=DT, t0=t[0], gain=-GAIN)
    np.testing.assert_allclose(c["peak_a"], a["peak_a"])


def test_chunking_does_not_change_results():
    rng = np.random.default_rng(8)
    t = (np.arange(N) - PRE) * DT
    i = pulse(100.0, 2e-9, 50.0, t) * rng.uniform(0.5, 1.5, (40, 1))
    codes = np.round(i / GAIN + rng.normal(0, 0.7, i.shape)).astype(np.int8)
    whole = event_metrics(codes, dt=DT, t0=t[0], gain=GAIN)
    small = event_metrics(codes, dt=DT, t0=t[0], gain=GAIN, chunk_bytes=3 * 4 * N)
    for k in METRIC_COLUMNS:
        np.testing.assert_array_equal(whole[k], small[k], err_msg=k)


def test_bounce_pulses_clipping_and_truncation():
    t = (np.arange(N) - PRE) * DT
    base = pulse(100.0, 2e-9, 50.0, t)
    bounce = base.copy()
    bounce[(t > 20e-9) & (t < 40e-9)] = 0.0  # contact opens for 20 ns, then makes again
    long = pulse(100.0, 2e-6, 50.0, t)  # tau 100 us: still high at the record's end
    clipped = np.minimum(base, 1.2)
    m = event_metrics(np.stack([base, bounce, long, clipped]) / GAIN, dt=DT, t0=t[0])
    assert list(m["pulses"]) == [1, 2, 1, 1]
    assert list(m["flag_truncated"]) == [False, False, True, False]
    rows = np.stack([base, clipped, 0.3 * base]) / 0.005  # 2 A, 1.2 A, 0.6 A at 5 mA per code
    codes = np.clip(np.round(rows), -128, 127).astype(np.int8)
    mc = event_metrics(codes, dt=DT, t0=t[0], gain=0.005, code_min=-128, code_max=127)
    assert list(mc["flag_clipped"]) == [True, True, False]


def test_indicators():
    t = (np.arange(N) - PRE) * DT
    m = event_metrics(pulse(1500.0, 2e-9, 50.0, t)[None, :], dt=DT, t0=t[0])
    # ind_hbm_volts = |peak| x 1500 ohm; HBM 100 pF at that voltage, Q = C V, E = C V^2 / 2
    # (HBM network 100 pF / 1500 ohm: ANSI/ESDA/JEDEC JS-001; textbook capacitor relations)
    assert m["ind_hbm_volts"][0] == pytest.approx(m["abs_peak_a"][0] * 1500.0)
    assert m["ind_hbm_charge_c"][0] == pytest.approx(100e-12 * m["ind_hbm_volts"][0])
    assert m["ind_hbm_energy_j"][0] == pytest.approx(0.5 * 100e-12 * m["ind_hbm_volts"][0] ** 2)
    # stored charge against 45 uC (IEC 61010-1 stored-charge figure): 3 uC here (+1 %: the
    # ideal step at t = 0 adds half a sample, dt / (2 tau), to the sampled integral)
    assert m["ind_iec61010_charge_ratio"][0] == pytest.approx(3e-6 / 45e-6, rel=0.015)


# --------------------------------------------------------------------------- run folders


@pytest.fixture
def limits():
    return [
        {
            "metric": "charge_c",
            "max": 150e-9,
            "statistic": "utl",
            "modes": ["ACV"],
            "volts": None,
            "loads": None,
        },
        {
            "metric": "peak_a",
            "max": 1.0,
            "statistic": "max",
            "modes": None,
            "volts": [100.0],
            "loads": ["short"],
        },
    ]


def test_analyze_run_end_to_end(tmp_path, limits):
    run = make_run(
        tmp_path, "r1", rng=np.random.default_rng(1), limits=limits, drop={3}, noise_only={12}
    )
    res = analyze_run(run)
    assert res.metrics_path.exists() and res.groups_path.exists()
    assert res.selfdischarge is None and "selfdischarge" not in res.paths
    m = pd.read_parquet(res.metrics_path)
    journal_cols = [
        "event",
        "key",
        "meter",
        "serial",
        "mode",
        "volts",
        "load",
        "load_ohms",
        "delay_s",
        "rep",
        "status",
        "file",
        "sha256",
        *JOURNAL_EXTRA,
    ]
    # every journal column, then the metric columns in the order of DEVELOPERS.md (other
    # columns a later format adds may sit between them)
    assert set(journal_cols) <= set(m.columns)
    assert [c for c in m.columns if c in METRIC_COLUMNS] == list(METRIC_COLUMNS)
    assert list(m.columns).index("peak_a") > max(list(m.columns).index(c) for c in journal_cols)
    assert m.loc[m.event == 3, "flag_not_captured"].all()
    assert np.isnan(m.loc[m.event == 3, "peak_a"]).all()
    assert m.loc[m.event == 12, "flag_below_noise"].all()
    ok = m[~m.flag_not_captured & ~m.flag_below_noise]
    # physics of the invented sources: Q = C V, tau = R C (textbook RC relations)
    for mode, (c, r) in MODES.items():
        sel = ok[ok["mode"] == mode]
        np.testing.assert_allclose(sel["c_equiv_f"].median(), c, rtol=0.03)
        np.testing.assert_allclose(sel["tau_s"].median(), r * c, rtol=0.03)
        np.testing.assert_allclose(sel["peak_a"].median(), 100.0 / r, rtol=0.03)

    g = pd.read_csv(res.groups_path)
    assert list(g.columns) == list(GROUPS_COLUMNS)
    acv_q = g[(g["mode"] == "ACV") & (g["metric"] == "charge_c")].iloc[0]
    assert acv_q["n_planned"] == 8 and acv_q["n_captured"] == 7  # event 3 was lost
    assert acv_q["limit"] == 150e-9
    assert acv_q["verdict"] == ("pass" if acv_q["utl"] <= 150e-9 else "fail")
    assert acv_q["verdict"] == "fail"  # 200 nC per event: over the limit
    assert acv_q["share_over_limit"] == 1.0
    assert acv_q["median_ci_low"] <= acv_q["median"] <= acv_q["median_ci_high"]
    # the ACmV group has no charge limit, and its peak (1 A nominal) is judged by its max
    acmv_q = g[(g["mode"] == "ACmV") & (g["metric"] == "charge_c")].iloc[0]
    assert np.isnan(acmv_q["limit"]) and pd.isna(acmv_q["verdict"])
    peaks = g[g["metric"] == "peak_a"].set_index("mode")
    assert peaks.loc["ACmV", "verdict"] == ("pass" if peaks.loc["ACmV", "max"] <= 1.0 else "fail")
    assert peaks.loc["ACV", "verdict"] == "fail"  # 2 A
    # the ACmV group lost event 12 to noise: 7 peaks counted, the charge of all 8 kept
    assert peaks.loc["ACmV", "n_captured"] == 8


def test_too_few_events_is_insufficient(tmp_path, limits):
    run = make_run(tmp_path, "r2", rng=np.random.default_rng(2), reps=3, limits=limits)
    g = analyze_run(run).groups
    assert set(g.loc[g["limit"].notna(), "verdict"]) == {"insufficient"}
    # an interrupted run: the ACmV group is planned but nothing of it was journalled
    lines = (run / "journal.jsonl").read_text(encoding="utf-8").splitlines(keepends=True)
    (run / "journal.jsonl").write_text("".join(lines[:3]), encoding="utf-8")
    g2 = analyze_run(run).groups
    acmv = g2[g2["mode"] == "ACmV"]
    assert len(acmv) > 0 and (acmv["n_planned"] == 3).all() and (acmv["n_captured"] == 0).all()
    assert set(acmv.loc[acmv["limit"].notna(), "verdict"]) == {"insufficient"}


def test_run_folder_errors_name_the_file(tmp_path):
    run = make_run(tmp_path, "r3", rng=np.random.default_rng(3), reps=2)
    (run / "waveforms" / "e000001.npz").unlink()
    with pytest.raises(RunFolderError, match="e000001.npz"):
        compute_metrics(run)
    with pytest.raises(RunFolderError, match="manifest"):
        analyze_run(tmp_path / "nowhere")


def test_self_discharge_on_exponential_data(tmp_path):
    # a 95 % interval misses the truth about one time in twenty: over seeds 4..15 this one
    # covered 3.0 in 22 of 24 groups with the whole-discharge charge (seed 4 was a miss)
    run = make_run(
        tmp_path,
        "sweep",
        rng=np.random.default_rng(5),
        reps=4,
        delays=(0.0, 1.0, 2.0, 4.0),
        sd_tau=3.0,
    )
    res = analyze_run(run)
    sd = pd.read_csv(res.selfdischarge_path)
    assert list(sd.columns) == list(SELFDISCHARGE_COLUMNS)
    for _, row in sd.iterrows():
        c, _ = MODES[row["mode"]]
        assert row["tau_ci_low"] <= 3.0 <= row["tau_ci_high"]
        assert row["tau_s"] == pytest.approx(3.0, rel=0.05)
        assert row["n_delays"] == 4
        # Q_safe = C_equiv(0) x safe residual (30 V from the manifest's bench limits)
        assert row["safe_charge_c"] == pytest.approx(c * 30.0, rel=0.03)
        # exponential: the charge falls from C 100 V to C 30 V after tau ln(100/30)
        assert row["delay_to_safe_s"] == pytest.approx(3.0 * math.log(100 / 30), rel=0.06)


def test_fit_self_discharge_against_numpy_polyfit():
    # Reference: numpy.polyfit (least squares) on log |Q|.
    rng = np.random.default_rng(9)
    d = np.repeat([0.0, 0.5, 1.0, 2.0, 5.0], 6)
    q = 1e-6 * np.exp(-d / 2.5) * np.exp(rng.normal(0, 0.03, d.size))
    fit = fit_self_discharge(d, -q)
    slope, icpt = np.polyfit(d, np.log(q), 1)
    assert fit.tau_s == pytest.approx(-1 / slope, rel=1e-9)
    assert fit.q0_c == pytest.approx(math.exp(icpt), rel=1e-9)
    assert fit.tau_ci_low < fit.tau_s < fit.tau_ci_high
    assert math.isnan(fit_self_discharge([1.0, 1.0, 1.0], [1, 2, 3]).tau_s)
    df = pd.DataFrame(
        {
            "meter": "m",
            "serial": "s",
            "mode": "ACV",
            "volts": 100.0,
            "load": "short",
            "delay_s": d,
            "charge_c": q,
            "flag_not_captured": False,
            "c_equiv_f": q / 100.0,
            "peak_a": q * 1e6,
        }
    )
    sd = self_discharge(df, safe_charge_c=0.1e-6)
    assert sd["delay_to_safe_s"][0] == pytest.approx(fit.tau_s * math.log(fit.q0_c / 0.1e-6))


# --------------------------------------------------------------------------- comparison


def test_compare_equivalent_different_and_missing(tmp_path):
    base = make_run(tmp_path, "base", rng=np.random.default_rng(10), reps=12)
    same = make_run(tmp_path, "same", rng=np.random.default_rng(11), reps=12, serial="SN-0002")
    worse = make_run(
        tmp_path, "worse", rng=np.random.default_rng(12), reps=12, scale=1.3, volts=(100.0, 200.0)
    )
    analyze_run(base)  # one analysed, the others computed in memory
    three = ("peak_a", "charge_c", "energy_j")  # energy on request, beside the defaults

    df = compare_runs(same, base, metrics=three)
    assert list(df.columns) == list(COMPARE_COLUMNS)
    assert set(df["verdict"]) == {"equivalent"} and all_equivalent(df)
    assert set(df["serials_run"]) == {"SN-0002"} and set(df["serials_baseline"]) == {"SN-0001"}
    assert ((df["ratio_ci_low"] < 1.05) & (df["ratio_ci_high"] > 0.95)).all()

    dw = compare_runs(worse, base, metrics=three)
    at100 = dw[dw["volts"] == 100.0]
    assert set(at100["verdict"]) == {"different"}
    np.testing.assert_allclose(at100.loc[at100.metric == "peak_a", "ratio"], 1.3, rtol=0.03)
    np.testing.assert_allclose(at100.loc[at100.metric == "energy_j", "ratio"], 1.69, rtol=0.06)
    assert set(dw.loc[dw["volts"] == 200.0, "verdict"]) == {"only in run"}
    assert not all_equivalent(dw)
    path = write_comparison(dw, worse, base)
    assert path.name == "compare-base.csv" and len(pd.read_csv(path)) == len(dw)
    rev = compare_runs(base, worse, metrics=three)
    assert set(rev.loc[rev["volts"] == 200.0, "verdict"]) == {"only in baseline"}


def test_compare_small_samples_inconclusive(tmp_path):
    a = make_run(tmp_path, "a", rng=np.random.default_rng(13), reps=3, jitter=0.2)
    b = make_run(tmp_path, "b", rng=np.random.default_rng(14), reps=3, jitter=0.2)
    df = compare_runs(a, b)
    assert set(df["verdict"]) == {"inconclusive"}
    assert not all_equivalent(df) and not all_equivalent(df.iloc[0:0])


# --------------------------------------------------------------------------- saved files


def test_measure_csv_npy_and_errors(tmp_path):
    t = np.arange(-200, 2800) * 1e-9
    i = pulse(100.0, 2e-9, 50.0, t)
    csv = tmp_path / "scope.csv"
    pd.DataFrame({"Time (s)": t, "Current (A)": i}).to_csv(csv, index=False)
    m = measure_file(csv, charge_volts=100.0, load_ohms=50.0)
    # Q = C V = 200 nC; E in R = C V^2 / 2 = 10 uJ; tau = R C (textbook RC relations)
    assert m["charge_c"] == pytest.approx(200e-9, rel=0.01)
    assert m["energy_j"] == pytest.approx(10e-6, rel=0.03)
    assert m["tau_s"] == pytest.approx(100e-9, rel=0.01)
    assert m["dt_s"] == pytest.approx(1e-9) and m["t0_s"] == pytest.approx(-200e-9)

    vcsv = tmp_path / "shunt.csv"
    pd.DataFrame({"time": t, "voltage": i * 0.1}).to_csv(vcsv, index=False)
    mv = measure_file(vcsv, shunt_ohms=0.1, charge_volts=100.0, load_ohms=50.0)
    assert mv["peak_a"] == pytest.approx(m["peak_a"], rel=1e-9)
    with pytest.raises(FileFormatError, match=r"shunt\.csv \[voltage\].*shunt_ohms"):
        measure_file(vcsv, charge_volts=100.0, load_ohms=50.0)

    npy = tmp_path / "trace.npy"
    np.save(npy, np.concatenate([np.zeros(300), i[200:]]))
    mn = measure_file(npy, dt=1e-9, charge_volts=100.0, load_ohms=50.0)
    assert mn["charge_c"] == pytest.approx(200e-9, rel=0.01)
    with pytest.raises(FileFormatError, match=r"trace\.npy \[dt\]"):
        measure_file(npy, charge_volts=100.0, load_ohms=50.0)

    bad = tmp_path / "bad.csv"
    bad.write_text("time,current\n0,1\n1e-9,x\n2e-9,1\n3e-9,1\n4e-9,0\n", encoding="utf-8")
    with pytest.raises(FileFormatError, match=r"bad\.csv:3 \[current\]: not a number"):
        measure_file(bad, charge_volts=1.0, load_ohms=1.0)
    cols = tmp_path / "cols.csv"
    cols.write_text("when,amps\n0,1\n", encoding="utf-8")
    with pytest.raises(FileFormatError, match=r"cols\.csv \[time\]"):
        measure_file(cols, charge_volts=1.0, load_ohms=1.0)


# --------------------------------------------------------------------------- scope captures


def _split_captures(run: Path) -> None:
    """Mark even repetitions as capture "fast", odd ones as "slow" in plan and journal (as a
    sequence with two [scope.captures] tables would record them)."""
    for name in ("plan.json",):
        rows = json.loads((run / name).read_text(encoding="utf-8"))
        for r in rows:
            r["capture"] = "fast" if r["rep"] % 2 == 0 else "slow"
        (run / name).write_text(json.dumps(rows), encoding="utf-8")
    lines = (run / "journal.jsonl").read_text(encoding="utf-8").splitlines()
    rows = [json.loads(x) for x in lines]
    for r in rows:
        r["capture"] = "fast" if r["rep"] % 2 == 0 else "slow"
    (run / "journal.jsonl").write_text("".join(json.dumps(r) + "\n" for r in rows), "utf-8")


def test_capture_is_a_group_key_and_limits_can_name_captures(tmp_path):
    from rig.analysis.compare import COMPARE_KEYS
    from rig.analysis.selfdischarge import SWEEP_KEYS
    from rig.analysis.stats import GROUP_KEYS
    from rig.report.page import _GROUP_KEYS as REPORT_KEYS

    # one definition: "capture" right after "mode" everywhere
    assert GROUP_KEYS == ("meter", "serial", "mode", "capture", "volts", "load", "delay_s")
    assert list(GROUPS_COLUMNS[: len(GROUP_KEYS)]) == list(GROUP_KEYS)
    assert COMPARE_KEYS == tuple(k for k in GROUP_KEYS if k != "serial")
    assert SWEEP_KEYS == tuple(k for k in GROUP_KEYS if k != "delay_s")
    assert tuple(REPORT_KEYS) == GROUP_KEYS
    assert SELFDISCHARGE_COLUMNS[:6] == SWEEP_KEYS
    assert COMPARE_COLUMNS[:6] == COMPARE_KEYS
    lim = {
        "metric": "peak_a",
        "max": 100.0,
        "statistic": "max",
        "modes": None,
        "volts": None,
        "loads": None,
        "captures": ["fast"],
    }
    run = make_run(tmp_path, "cap", rng=np.random.default_rng(4), reps=10, limits=[lim])
    _split_captures(run)
    res = analyze_run(run)
    m = res.metrics
    assert set(m["capture"]) == {"fast", "slow"}
    # the sample interval and record span of every captured event, from its waveform
    np.testing.assert_allclose(m["dt_s"], DT)
    np.testing.assert_allclose(m["record_s"], N * DT)
    g = res.groups
    peaks = g[g["metric"] == "peak_a"]
    assert len(peaks) == 2 * len(MODES)  # one group per mode and capture
    assert (peaks["n_planned"] == 5).all()  # 10 repetitions split in two captures
    fast, slow = peaks[peaks["capture"] == "fast"], peaks[peaks["capture"] == "slow"]
    assert (fast["limit"] == 100.0).all() and (fast["verdict"] == "pass").all()
    assert slow["limit"].isna().all() and slow["verdict"].isna().all()


def test_run_without_captures_analyses_as_main(tmp_path):
    run = make_run(tmp_path, "old", rng=np.random.default_rng(5))
    assert '"capture"' not in (run / "journal.jsonl").read_text(encoding="utf-8")
    res = analyze_run(run)
    assert set(res.metrics["capture"]) == {"main"}
    assert set(res.groups["capture"]) == {"main"}
    # a baseline recorded before captures existed still pairs with a "main" capture
    c = compare_runs(run, run)
    assert set(c["capture"]) == {"main"} and (c["verdict"] == "equivalent").all()


def test_integer_envelope_equals_the_float_one():
    """The crossing search's block minima taken on raw codes equal those of the float trace
    (both polarities, int8 and int16): a speed-up must not change a number."""
    from rig.analysis.shape import block_min, envelope

    rng = np.random.default_rng(3)
    for dtype in (np.int8, np.int16):
        info = np.iinfo(dtype)
        raw = rng.integers(info.min, info.max, size=(40, 4096)).astype(dtype)
        base = rng.normal(0.0, 3.0, 40)
        for neg in (np.array([], dtype=int), np.array([1, 5, 7, 20]), np.arange(40)):
            y = np.empty(raw.shape, np.float32)
            np.subtract(raw, base[:, None].astype(np.float32), out=y, casting="unsafe")
            for i in neg:
                np.negative(y[i], out=y[i])
            assert np.array_equal(block_min(y, 64), envelope(raw, y, base, neg, True, np.float32))


def test_repair_gate_judges_the_groups_the_run_retested():
    """A repair check re-tests part of a qualification: baseline-only groups are listed but
    do not fail the gate; a group only in the run, or any non-equivalent group, does."""
    rows = [
        {"verdict": "equivalent"},
        {"verdict": "equivalent"},
        {"verdict": "only in baseline"},
    ]
    assert all_equivalent(pd.DataFrame(rows))
    assert not all_equivalent(pd.DataFrame([*rows, {"verdict": "only in run"}]))
    assert not all_equivalent(pd.DataFrame([*rows, {"verdict": "inconclusive"}]))
    assert not all_equivalent(pd.DataFrame([{"verdict": "only in baseline"}]))


def test_compare_uses_each_metric_on_the_capture_meant_for_it(tmp_path):
    """Two captures: |peak| and energy are compared on the finest timebase only, charge on
    the longest record only (names chosen so they do not give the answer away)."""
    from tests.report_fixtures import build_run

    caps = (("zeta", 2e-7, 4000, -1e-4), ("alpha", 1e-9, 2000, -2e-7))
    kw = dict(captures=caps, delays=(), reps=5)
    base = build_run(tmp_path / "b", np.random.default_rng(1), run_id="base", **kw)
    run = build_run(tmp_path / "r", np.random.default_rng(2), run_id="run", **kw)
    df = compare_runs(run, base)
    assert set(df.loc[df["metric"].isin(["peak_a", "energy_j"]), "capture"]) == {"alpha"}
    assert set(df.loc[df["metric"] == "charge_c", "capture"]) == {"zeta"}
