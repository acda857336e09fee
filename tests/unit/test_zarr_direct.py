"""The direct reader of our Zarr v3 waveform zips (zipfile + Blosc, one channel at a time)
against zarr's own reader (the general-purpose Zarr v3 library) on the same files."""

from __future__ import annotations

import numpy as np
import pytest

from rig.store.waveform import WAVEFORM_SUFFIX, Waveform, load_waveform, save_waveform
from rig.store.zarrwave import _read_direct
from rigbase.errors import RunFolderError


def _wf(rng: np.random.Generator, dtype=np.int16, n: int = 7000) -> Waveform:
    info = np.iinfo(dtype)
    codes = rng.integers(info.min, info.max, (2, n), endpoint=True).astype(dtype)
    return Waveform(
        codes=codes,
        gain=np.array([1.25e-3, 0.1 / 3]),
        offset=np.array([20.0, -1e-7]),
        code_min=np.array([info.min, info.min]),
        code_max=np.array([info.max, info.max]),
        dt=5e-7,
        t0=-1.0000001e-4,
        channels=("current", "voltage"),
        units=("A", "V"),
    )


def _zarr_read(path):
    import zarr

    store = zarr.storage.ZipStore(path, mode="r")
    try:
        g = zarr.open_group(store, mode="r")
        return dict(g.attrs), np.asarray(g["codes"][...])
    finally:
        store.close()


@pytest.mark.parametrize("dtype", [np.int8, np.int16])
def test_direct_read_equals_zarr(tmp_path, dtype):
    path = tmp_path / f"e000001{WAVEFORM_SUFFIX}"
    save_waveform(path, _wf(np.random.default_rng(4), dtype))
    attrs, codes = _zarr_read(path)
    direct = _read_direct(path, None)
    assert direct is not None  # our own layout takes the direct path
    assert direct["codes"].dtype == codes.dtype
    np.testing.assert_array_equal(direct["codes"], codes)
    assert list(direct["gain"]) == attrs["gain"] and direct["t0"] == attrs["t0"]
    one = load_waveform(path, channels=("voltage",))
    np.testing.assert_array_equal(one.codes, codes[1:2])
    assert one.channels == ("voltage",) and one.gain[0] == attrs["gain"][1]
    with pytest.raises(RunFolderError, match="no 'charge' channel"):
        load_waveform(path, channels=("charge",))


def test_another_layout_falls_back_to_zarr(tmp_path):
    """A zip zarr wrote with other chunks (any Zarr v3 writer may) is read by zarr itself."""
    import zarr

    wf = _wf(np.random.default_rng(5))
    path = tmp_path / f"e000002{WAVEFORM_SUFFIX}"
    store = zarr.storage.ZipStore(path, mode="w")
    attrs = {
        "format": 1,
        "gain": wf.gain.tolist(),
        "offset": wf.offset.tolist(),
        "code_min": wf.code_min.tolist(),
        "code_max": wf.code_max.tolist(),
        "dt": wf.dt,
        "t0": wf.t0,
        "channels": list(wf.channels),
        "units": list(wf.units),
    }
    try:
        g = zarr.create_group(store, zarr_format=3, attributes=attrs)
        a = g.create_array("codes", shape=wf.codes.shape, dtype=wf.codes.dtype, chunks=(2, 1000))
        a[...] = wf.codes
    finally:
        store.close()
    assert _read_direct(path, None) is None
    got = load_waveform(path, channels=("current",))
    np.testing.assert_array_equal(got.codes, wf.codes[:1])
    np.testing.assert_array_equal(load_waveform(path).codes, wf.codes)


def test_npz_gives_the_same_channel_subset(tmp_path):
    wf = _wf(np.random.default_rng(6))
    path = tmp_path / "e000003.npz"
    save_waveform(path, wf)
    one = load_waveform(path, channels=("current",))
    np.testing.assert_array_equal(one.codes, wf.codes[:1])
    assert one.units == ("A",) and one.offset[0] == 20.0
