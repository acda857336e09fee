"""The layers drawn in DEVELOPERS.md are the ones import-linter enforces (pyproject.toml).

The first test runs the contracts on the tree; the second proves they can fail: it copies the
packages, plants one forbidden import of each kind, and expects ``lint-imports`` to name the
broken contract.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]
LINT = shutil.which("lint-imports") or str(Path(sys.executable).parent / "lint-imports")


def _lint(cwd: Path) -> subprocess.CompletedProcess[str]:
    env = {**os.environ, "PYTHONPATH": str(cwd)}
    return subprocess.run(
        [LINT, "--config", str(cwd / "pyproject.toml")],
        cwd=cwd,
        env=env,
        capture_output=True,
        text=True,
        timeout=120,
    )


def test_the_tree_keeps_every_contract():
    result = _lint(ROOT)
    assert result.returncode == 0, result.stdout[-3000:] + result.stderr[-2000:]
    assert "0 broken" in result.stdout


@pytest.mark.parametrize(
    ("module", "planted", "contract"),
    [
        ("rig/analysis/stats.py", "import drivers.session", "never touch the instrument layer"),
        ("drivers/scope.py", "import rig.store.schema", "knows nothing of the controller"),
        ("rig/store/schema.py", "import rig.analysis.stats", "data flow runs one way"),
        ("rig/cli/running.py", "import drivers.sim.bench", "only through the bench opener"),
        ("rigbase/units.py", "import rig", "base layer stands alone"),
        ("rig/dataset/query.py", "import rig.runner.cycle", "never reaches the runner"),
    ],
)
def test_a_planted_violation_breaks_its_contract(tmp_path, module, planted, contract):
    for pkg in ("rig", "drivers", "rigbase"):
        shutil.copytree(
            ROOT / pkg, tmp_path / pkg, ignore=shutil.ignore_patterns("__pycache__", "*.toml")
        )
    shutil.copy(ROOT / "pyproject.toml", tmp_path / "pyproject.toml")
    target = tmp_path / module
    target.write_text(target.read_text() + f"\n{planted}  # planted by the test\n")
    result = _lint(tmp_path)
    assert result.returncode != 0
    broken = [line for line in result.stdout.splitlines() if line.endswith("BROKEN")]
    assert any(contract in line for line in broken), result.stdout[-3000:]
