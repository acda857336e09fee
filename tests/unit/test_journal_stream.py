"""The journal read line by line and tabled in chunks equals the journal read whole (a list
of rows into one pandas DataFrame, pandas' own construction being the reference), dtypes
included; a torn last line is still left out and a corrupt one still named."""

from __future__ import annotations

import json

import pandas as pd
import pytest

from rig.analysis import analyze
from rig.store.runfolder import iter_journal, read_journal
from rigbase.errors import RunFolderError


def _write(tmp_path, rows, tail: bytes = b"") -> None:
    text = "".join(json.dumps(r) + "\n" for r in rows).encode() + tail
    (tmp_path / "journal.jsonl").write_bytes(text)


def _rows(n: int) -> list[dict]:
    out = []
    for e in range(n):
        out.append(
            {
                "event": e,
                "status": "captured" if e % 4 else "not captured",
                "file": f"waveforms/e{e:06d}.zarr.zip" if e % 4 else None,
                "volts": 1000.0,
                "load_ohms": 0.05,
                # None throughout the first chunk, numbers later: one chunk alone is objects
                "charged_volts": None if e < 7 else 998.5 + e,
                "note": None if e % 5 else f"retake {e}",
            }
        )
    return out


def test_chunked_table_equals_the_whole(tmp_path, monkeypatch) -> None:
    rows = _rows(23) + [dict(_rows(23)[5], volts=500.0)]  # event 5 retaken: the last wins
    _write(tmp_path, rows)
    whole = (
        pd.DataFrame(read_journal(tmp_path))
        .drop_duplicates("event", keep="last")
        .sort_values("event")
        .reset_index(drop=True)
    )
    monkeypatch.setattr(analyze, "JOURNAL_CHUNK", 7)
    chunked = analyze.journal_frame(tmp_path)
    pd.testing.assert_frame_equal(chunked, whole, check_exact=True)
    assert chunked["charged_volts"].dtype == "float64"
    assert chunked.loc[chunked["event"] == 5, "volts"].item() == 500.0


def test_a_torn_last_line_is_left_out_and_a_corrupt_line_is_named(tmp_path) -> None:
    _write(tmp_path, _rows(3), tail=b'{"event": 3, "sta')
    assert [r["event"] for r in iter_journal(tmp_path)] == [0, 1, 2]
    _write(tmp_path, _rows(3), tail=b"not json\n")
    with pytest.raises(RunFolderError, match=r"journal.jsonl:4: journal line is not JSON"):
        list(iter_journal(tmp_path))
