"""`rig sim serve --port BASE` serves on fixed ports and prints a bench file that works."""

from __future__ import annotations

import signal
import socket
import subprocess
import sys
from pathlib import Path

from rig.cli import main

from ..dialect_support import ROOT, dialect_bench


def _free_base() -> int:
    # four consecutive free ports: try bases until all four bind
    for base in range(47000, 48000, 7):
        socks = []
        try:
            for k in range(4):
                s = socket.socket()
                s.bind(("127.0.0.1", base + k))
                socks.append(s)
            return base
        except OSError:
            continue
        finally:
            for s in socks:
                s.close()
    raise AssertionError("no four free ports")


def test_fixed_ports_and_a_pasteable_bench(tmp_path: Path, capsys) -> None:
    bench = dialect_bench(tmp_path, "served", switch="relay-line", scope="scope-b")
    base = _free_base()
    proc = subprocess.Popen(
        [sys.executable, "-m", "rig.cli", "sim", "serve", str(bench), "--port", str(base)],
        stdout=subprocess.PIPE,
        text=True,
        cwd=ROOT,
    )
    try:
        lines = []
        assert proc.stdout is not None
        for line in proc.stdout:
            lines.append(line)
            if "Ctrl-C stops" in line:
                break
        out = "".join(lines)
        assert f"supply   TCPIP0::127.0.0.1::{base}::SOCKET" in out
        assert f"scope    TCPIP0::127.0.0.1::{base + 2}::SOCKET" in out
        text = out.split("# ---8<---\n", 1)[1].rsplit("# ---8<---", 1)[0]
        assert "\n[simulation" not in text and '\nresource = "sim"' not in text
        assert 'resource = "ASRL/dev/pts/' in text
        pasted = tmp_path / "pasted.toml"
        pasted.write_text(text, encoding="utf-8")
        capsys.readouterr()
        assert main(["instruments", str(pasted)]) == 0  # reaches the served instruments
        got = capsys.readouterr().out
        assert "SIMULATED,DIGITISER-4CH" in got and "ASRL/dev/pts/" in got
    finally:
        proc.send_signal(signal.SIGINT)
        proc.wait(timeout=20)
        if proc.stdout is not None:
            proc.stdout.close()
