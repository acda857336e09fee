"""Bench files for the dialect tests: the demo bench with other profiles, seed and extras."""

from __future__ import annotations

import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
DEMO_BENCH = ROOT / "sequences" / "benches" / "sim-demo.toml"


def dialect_bench(
    folder: Path,
    name: str,
    *,
    supply: str = "scpi1999",
    switch: str = "scpi1999",
    scope: str = "scpi1999",
    seed: int = 20240611,
    noise: str = "0.5m",
    extra: str = "",
) -> Path:
    """Write ``<folder>/<name>.toml``: the demo bench speaking the given profiles (names or
    paths), with ``seed``, scope ``noise`` and ``extra`` TOML appended."""
    text = DEMO_BENCH.read_text(encoding="utf-8")
    for role, profile in (("supply", supply), ("switch", switch), ("scope", scope)):
        pattern = rf'(\[instruments\.{role}\][^\[]*?profile = )"scpi1999"'
        text, n = re.subn(pattern, lambda m, p=profile: f'{m.group(1)}"{p}"', text)
        assert n == 1, role
    text = text.replace("seed = 20240611", f"seed = {seed}")
    text = text.replace('noise_volts = "0.5m"', f'noise_volts = "{noise}"')
    path = folder / f"{name}.toml"
    path.write_text(text + "\n" + extra, encoding="utf-8")
    return path
