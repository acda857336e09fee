"""Running test code in a new Python interpreter: the worker pool (rigbase.workers) forks only
in a process without other threads, and the test session holds some (the simulated bench's
servers), so checks that need real workers run in a fresh interpreter."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def run_python(code: str) -> subprocess.CompletedProcess:
    """``python -c code`` from the repository's root, with it on the path; output captured."""
    return subprocess.run(
        [sys.executable, "-c", code],
        cwd=ROOT,
        env={**os.environ, "PYTHONPATH": str(ROOT)},
        capture_output=True,
        text=True,
    )
