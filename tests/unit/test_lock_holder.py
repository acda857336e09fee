"""The refusal names the lock's holder even when it is read in the instant between the
holder taking the lock and writing its name (a race seen between two resumes)."""

from __future__ import annotations

import fcntl
import threading
import time

import pytest

from rig.store.lock import LOCK_NAME, RunLock, RunLockedError


def test_a_holder_that_writes_its_name_late_is_still_named(tmp_path) -> None:
    path = tmp_path / LOCK_NAME
    fh = open(path, "a+", encoding="utf-8")  # noqa: SIM115 - the other process's handle
    fcntl.flock(fh.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)  # locked, nothing written yet

    def write_late() -> None:
        time.sleep(0.2)
        fh.write('{"pid": 4242, "host": "bench-pc", "started": "x", "purpose": "resume"}')
        fh.flush()

    writer = threading.Thread(target=write_late)
    writer.start()
    try:
        with pytest.raises(RunLockedError, match=r"pid 4242 on bench-pc.*resume"):
            RunLock(tmp_path, "resume").acquire()
    finally:
        writer.join()
        fh.close()


def test_a_lock_file_that_never_names_a_holder_is_reported_as_such(tmp_path) -> None:
    path = tmp_path / LOCK_NAME
    with open(path, "a+", encoding="utf-8") as fh:
        fcntl.flock(fh.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
        t0 = time.monotonic()
        with pytest.raises(RunLockedError, match="holder unknown"):
            RunLock(tmp_path).acquire()
        assert time.monotonic() - t0 < 5.0  # gives up after its short wait
