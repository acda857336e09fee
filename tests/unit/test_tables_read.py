"""rig.store.tables.read_parquet_table: a table read a few columns at a time (to hold it about
once, not twice, while it is decoded) is the frame pandas' own reader gives.

Reference: ``pandas.read_parquet`` (pyarrow engine), compared with
``pandas.testing.assert_frame_equal(check_exact=True)``: values, dtypes, column order, index.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from rig.store import tables
from rig.store.tables import read_parquet_table
from rigbase.errors import RunFolderError


def _table(rows: int, rng: np.random.Generator) -> pd.DataFrame:
    """More columns than are decoded at once, of every kind the run tables hold."""
    df = pd.DataFrame(
        {
            "meter": rng.choice(["Candidate A", "Candidate B", None], rows),
            "volts": rng.uniform(0, 1000, rows),
            "event": np.arange(rows, dtype=np.int64),
            "clipped": rng.random(rows) < 0.1,
            "flag": pd.array(rng.choice([True, False, None], rows), dtype="boolean"),
            "pulses": rng.integers(0, 5, rows).astype(np.int8),
            "charge_c": np.where(rng.random(rows) < 0.2, np.nan, rng.normal(0, 1e-6, rows)),
        }
    )
    for k in range(2 * tables._COLUMNS_AT_ONCE):
        df[f"x{k}"] = rng.normal(size=rows)
    df["file"] = [f"waveforms/e{k:06d}.zarr.zip" for k in range(rows)]
    return df


@pytest.mark.parametrize("rows", [0, 1, 1000])
def test_read_by_columns_equals_pandas_reader(tmp_path, rows):
    path = tmp_path / "t.parquet"
    _table(rows, np.random.default_rng(rows)).to_parquet(path, index=False)
    pd.testing.assert_frame_equal(read_parquet_table(path), pd.read_parquet(path), check_exact=True)
    some = ["x3", "meter", "nope", "x12", "flag", "x0", "volts", "x9", "pulses", "event"]
    got = read_parquet_table(path, columns=some, exclude=("volts",))
    want = pd.read_parquet(path, columns=[c for c in some if c not in ("nope", "volts")])
    pd.testing.assert_frame_equal(got, want, check_exact=True)


def test_a_stored_index_is_restored_as_pandas_restores_it(tmp_path):
    path = tmp_path / "t.parquet"
    df = _table(50, np.random.default_rng(1)).set_index("file")
    df.to_parquet(path)
    got = read_parquet_table(path)
    pd.testing.assert_frame_equal(got, pd.read_parquet(path), check_exact=True)
    assert got.index.name == "file"


def test_a_damaged_table_names_the_file(tmp_path):
    path = tmp_path / "metrics.parquet"
    _table(100, np.random.default_rng(2)).to_parquet(path, index=False)
    path.write_bytes(path.read_bytes()[:-300])
    with pytest.raises(RunFolderError, match=r"metrics\.parquet: unreadable table"):
        read_parquet_table(path)
