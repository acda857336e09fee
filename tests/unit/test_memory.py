"""rigbase.memory: freed C-heap memory goes back to the OS.

Reference: glibc's malloc keeps freed blocks below its heap top until ``malloc_trim``
returns their pages (glibc manual, "Memory Allocation" and malloc_trim(3); from memory).
The check is on /proc/self/status (VmRSS), so it runs on Linux with glibc only.
"""

from __future__ import annotations

import os
import subprocess
import sys

import numpy as np
import pytest

from rigbase.memory import _malloc_trim, release_freed_memory


def _rss_mb() -> float:
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith("VmRSS"):
                return int(line.split()[1]) / 1024
    raise AssertionError("no VmRSS")


@pytest.mark.skipif(_malloc_trim() is None, reason="needs glibc's malloc_trim")
def test_freed_heap_blocks_are_returned():
    # 40 MB in 64 kB blocks (below the mmap threshold: they live on the heap), all freed but
    # the last, which pins the heap's top so that free() alone cannot shrink it
    blocks = [np.ones(8192) for _ in range(640)]
    last = blocks[-1]
    del blocks
    before = _rss_mb()
    assert release_freed_memory() is True
    assert before - _rss_mb() > 20  # most of the 40 MB went back
    assert last.sum() == 8192


def test_arrow_uses_the_system_pool_when_the_command_starts():
    # a fresh interpreter: the setting works only before pyarrow is imported
    code = (
        "from rigbase.memory import prefer_system_allocator; prefer_system_allocator(); "
        "import pyarrow as pa; print(pa.default_memory_pool().backend_name)"
    )
    env = {k: v for k, v in os.environ.items() if k != "ARROW_DEFAULT_MEMORY_POOL"}
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env)
    assert out.stdout.strip() == "system", out.stderr
    # a pool the user chose is kept
    env["ARROW_DEFAULT_MEMORY_POOL"] = "jemalloc"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env)
    assert out.returncode == 0 and out.stdout.strip() not in ("", "system"), out.stderr
