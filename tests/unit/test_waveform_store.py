"""Waveform files: the compressed Zarr v3 zip that new runs write, and the ``.npz`` of older run
folders, behind the same save/load functions.

The zip is checked with zarr's own reader (the general-purpose Zarr v3 library) opening it
without any of our code, and with the standard library's zipfile listing the members the
Zarr v3 core specification names (``zarr.json`` metadata documents, chunk keys ``c/...``).
"""

from __future__ import annotations

import json
import zipfile

import numpy as np
import pytest

from rig.store.runfolder import RunWriter, verify_run
from rig.store.waveform import WAVEFORM_SUFFIX, Waveform, load_waveform, save_waveform


def _wf(rng: np.random.Generator, n: int = 5000, dtype=np.int16) -> Waveform:
    t = np.arange(n) * 1e-9
    pulse = 20000 * np.exp(-t / 1e-6) * (t > 5e-7)
    codes = np.round(pulse + rng.normal(0, 6, n))
    info = np.iinfo(dtype)
    return Waveform(
        codes=np.stack([codes, 0.5 * codes]).clip(info.min, info.max).astype(dtype),
        gain=np.array([1.2345678901234567e-3, 0.1 / 3]),
        offset=np.array([0.0, -1e-7]),
        code_min=np.array([info.min, info.min]),
        code_max=np.array([info.max, info.max]),
        dt=1e-9 / 3,
        t0=-2e-6,
        channels=("current", "voltage"),
        units=("A", "V"),
    )


def _same(a: Waveform, b: Waveform) -> None:
    assert np.array_equal(a.codes, b.codes) and a.codes.dtype == b.codes.dtype
    for k in ("gain", "offset", "code_min", "code_max"):
        assert np.array_equal(getattr(a, k), getattr(b, k)), k
    assert (a.dt, a.t0, a.channels, a.units) == (b.dt, b.t0, b.channels, b.units)


@pytest.mark.parametrize("suffix", [WAVEFORM_SUFFIX, ".npz"])
@pytest.mark.parametrize("dtype", [np.int8, np.int16])
def test_both_formats_round_trip_bit_exact(tmp_path, suffix, dtype):
    wf = _wf(np.random.default_rng(1), dtype=dtype)
    path = tmp_path / f"e000001{suffix}"
    sha = save_waveform(path, wf)
    assert len(sha) == 64 and not list(tmp_path.glob("*.tmp"))
    _same(load_waveform(path), wf)


def test_the_zip_is_plain_zarr_v3_that_zarr_itself_reads(tmp_path):
    import zarr

    wf = _wf(np.random.default_rng(2))
    path = tmp_path / f"e000002{WAVEFORM_SUFFIX}"
    save_waveform(path, wf)
    names = set(zipfile.ZipFile(path).namelist())
    assert {"zarr.json", "codes/zarr.json"} <= names  # Zarr v3 core spec: metadata documents
    meta = json.loads(zipfile.ZipFile(path).read("codes/zarr.json"))
    assert meta["zarr_format"] == 3 and meta["node_type"] == "array"
    assert any(c["name"] == "blosc" for c in meta["codecs"])  # blosc: a v3 core codec
    store = zarr.storage.ZipStore(path, mode="r")
    group = zarr.open_group(store, mode="r")
    assert np.array_equal(group["codes"][...], wf.codes)
    assert group.attrs["channels"] == ["current", "voltage"]
    store.close()
    # noise of a few codes limits compression, but a pulse with noise still shrinks
    assert path.stat().st_size < wf.codes.nbytes


def test_an_old_run_folder_of_npz_files_still_opens_and_resumes_in_the_new_format(tmp_path):
    from rig.analysis.runs import group_waveforms, load_event_waveform, load_run
    from tests.report_fixtures import build_run  # writes waveforms/<event>.npz (old format)

    run = build_run(tmp_path, np.random.default_rng(4), reps=3, delays=())
    df = load_run(run)
    captured = df[df["status"] == "captured"]
    assert captured["file"].str.endswith(".npz").all()
    wf = load_event_waveform(run, int(captured["event"].iloc[0]))
    assert wf.n > 0 and "current" in wf.channels
    row = captured.iloc[0]
    t, values, rows = group_waveforms(
        run,
        mode=row["mode"],
        capture=row["capture"],
        volts=float(row["volts"]),
        load=row["load"],
        serial=row["serial"],
    )
    assert values.shape == (len(rows), len(t)) and len(rows) > 1
    assert verify_run(run).ok


def test_a_resumed_run_writes_new_events_as_zarr_beside_old_npz(tmp_path):
    run = tmp_path / "run"
    plan = [{"event": 0, "key": "k0"}, {"event": 1, "key": "k1"}]
    writer = RunWriter.create(tmp_path, "run", {"status": "running"}, plan)
    wf = _wf(np.random.default_rng(3), n=500)
    old = run / "waveforms" / "e000000.npz"
    sha = save_waveform(old, wf)
    writer._journal.write(  # an event journalled by an older version of the runner
        json.dumps(
            {"event": 0, "status": "captured", "file": "waveforms/e000000.npz", "sha256": sha}
        ).encode()
        + b"\n"
    )
    writer.close()
    writer = RunWriter.reopen(run)
    row = writer.commit({"event": 1, "status": "captured"}, wf)
    writer.close()
    assert row["file"].endswith(WAVEFORM_SUFFIX)
    _same(load_waveform(run / row["file"]), wf)
    _same(load_waveform(old), wf)


@pytest.mark.parametrize("suffix", [WAVEFORM_SUFFIX, ".npz"])
def test_one_channel_reads_alone_and_a_missing_one_is_named(tmp_path, suffix):
    wf = _wf(np.random.default_rng(4))
    path = tmp_path / f"e000004{suffix}"
    save_waveform(path, wf)
    one = load_waveform(path, ("voltage",))
    assert one.channels == ("voltage",) and one.units == ("V",)
    assert np.array_equal(one.values("voltage"), wf.values("voltage"))
    with pytest.raises(ValueError, match=r"e000004.*\[channels\].*'light'"):
        load_waveform(path, ("light",))


@pytest.mark.parametrize("rows", [None, ("voltage",), ("voltage", "current")])
def test_our_own_decoder_reads_what_zarr_reads(tmp_path, rows):
    """The zip decoder that skips zarr's machinery against zarr's reader (the reference),
    with a channel all at the fill value, which Zarr v3 does not store as a chunk."""
    import zarr

    import rig.store.zarrwave as zw

    wf = _wf(np.random.default_rng(3))
    wf = Waveform(**{**wf.__dict__, "codes": wf.codes * np.array([[1], [0]], dtype=wf.codes.dtype)})
    path = tmp_path / f"e000003{WAVEFORM_SUFFIX}"
    save_waveform(path, wf)
    assert "codes/c/1/0" not in zipfile.ZipFile(path).namelist()  # all fill value: no chunk
    ours = zw._read_direct(path, rows)
    assert ours is not None
    store = zarr.storage.ZipStore(path, mode="r")
    group = zarr.open_group(store, mode="r")
    want = zw._rows(dict(group.attrs), rows)
    assert np.array_equal(ours["codes"], group["codes"][...][want])
    assert ours["codes"].dtype == group["codes"].dtype
    assert ours["channels"] == tuple(group.attrs["channels"][j] for j in want)
    store.close()


def test_a_zip_laid_out_otherwise_is_read_through_zarr(tmp_path):
    import zarr

    wf = _wf(np.random.default_rng(5))
    path = tmp_path / f"e000005{WAVEFORM_SUFFIX}"
    attrs = json.loads(json.dumps({k: getattr(wf, k) for k in ("dt", "t0", "channels", "units")}))
    for k in ("gain", "offset", "code_min", "code_max"):
        attrs[k] = getattr(wf, k).tolist()
    store = zarr.storage.ZipStore(path, mode="w")
    group = zarr.create_group(store, zarr_format=3, attributes=attrs)
    group.create_array("codes", shape=wf.codes.shape, dtype=wf.codes.dtype, chunks=(2, 1000))
    group["codes"][...] = wf.codes
    store.close()
    _same(load_waveform(path), wf)
    assert np.array_equal(load_waveform(path, ("voltage",)).codes[0], wf.codes[1])


@pytest.mark.parametrize("name", ["e1.zarr.zip", "e1.npz", "e1.bin"])
def test_a_broken_or_unknown_waveform_file_names_itself(tmp_path, name):
    path = tmp_path / name
    path.write_bytes(b"not a waveform")
    with pytest.raises((ValueError, OSError), match="e1"):
        load_waveform(path)


def test_zarrs_threads_stop_and_start_again_when_needed(tmp_path):
    import threading

    from rig.store.zarrwave import stop_io_threads

    wf = _wf(np.random.default_rng(5))
    save_waveform(tmp_path / f"a{WAVEFORM_SUFFIX}", wf)  # zarr starts its loop and executor
    stop_io_threads()
    names = [t.name for t in threading.enumerate()]
    assert not [n for n in names if n == "zarr_io" or n.startswith("asyncio_")], names
    save_waveform(tmp_path / f"b{WAVEFORM_SUFFIX}", wf)  # and starts them again
    _same(load_waveform(tmp_path / f"b{WAVEFORM_SUFFIX}"), wf)
