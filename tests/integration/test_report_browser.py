"""The report in a real browser: headless Chromium renders it without a console message.

Chromium (Debian package ``chromium``) is the reference renderer here. The report holds no
script and loads nothing, so any console line (a Content-Security-Policy violation, a blocked
load, a parse error) is a failure. With CI=true a missing Chromium fails the test; elsewhere
it is skipped with the reason.
"""

from __future__ import annotations

import os
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest

from rig.report.page import write_report
from tests.report_fixtures import build_run

HEADINGS = [
    "What was tested",
    "At a glance",
    "Verdicts against the limits",
    "High-voltage caution",
    "Discharge waveforms",
    "Flagged events",
    "Group table",
]
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (W3C/ISO 15948), section 5.2


def _chromium() -> str:
    exe = shutil.which("chromium") or (
        "/usr/bin/chromium" if Path("/usr/bin/chromium").exists() else None
    )
    if exe is None:
        if os.environ.get("CI", "").lower() == "true":
            pytest.fail("CI=true but chromium is not installed (Debian package chromium)")
        pytest.skip("chromium not installed (Debian package chromium); browser check not run")
    return exe


def _run(exe: str, profile: Path, *args: str) -> subprocess.CompletedProcess[str]:
    cmd = [
        exe,
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-quic",
        "--no-first-run",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        f"--user-data-dir={profile}",
        "--enable-logging=stderr",
        "--v=0",
        *args,
    ]
    return subprocess.run(cmd, capture_output=True, text=True, timeout=120, check=False)


def _console_lines(stderr: str) -> list[str]:
    """Chromium's log lines for page console messages (``...:INFO:CONSOLE...] "..."``)."""
    return [line for line in stderr.splitlines() if ":CONSOLE" in line]


@pytest.fixture(scope="module")
def report(tmp_path_factory) -> Path:
    root = tmp_path_factory.mktemp("runs")
    run = build_run(root, np.random.default_rng(21), reps=3)
    return write_report(run)


def test_dom_renders_with_every_heading_and_no_console_message(report, tmp_path):
    exe = _chromium()
    res = _run(exe, tmp_path / "profile", "--dump-dom", report.as_uri())
    assert res.returncode == 0, res.stderr[-2000:]
    assert _console_lines(res.stderr) == []
    dom = res.stdout
    for h in HEADINGS:
        assert f"<h2>{h}</h2>" in dom
    assert dom.count("<img ") >= 5  # the browser kept the embedded figures in the DOM


def test_screenshot_is_a_non_empty_picture(report, tmp_path):
    import matplotlib.image as mpimg

    exe = _chromium()
    shot = tmp_path / "shot.png"
    res = _run(
        exe,
        tmp_path / "profile",
        "--hide-scrollbars",
        "--window-size=1200,3000",
        f"--screenshot={shot}",
        report.as_uri(),
    )
    assert res.returncode == 0, res.stderr[-2000:]
    assert _console_lines(res.stderr) == []
    data = shot.read_bytes()
    assert data.startswith(PNG_SIGNATURE) and len(data) > 20_000
    img = mpimg.imread(shot)
    assert img.shape[0] == 3000 and img.shape[1] == 1200
    # rendered content, not a blank page: many distinct grey levels, dark text pixels present
    grey = img[..., :3].mean(axis=2)
    assert grey.std() > 0.05 and (grey < 0.3).mean() > 0.002


def test_console_check_would_catch_a_blocked_load(tmp_path):
    """The failure path of the check itself: a page that tries to load a file gets a console
    line under the same Content-Security-Policy the report uses."""
    exe = _chromium()
    html = (
        "<!DOCTYPE html><html><head><meta charset='utf-8'>"
        "<meta http-equiv='Content-Security-Policy' content=\"default-src 'none'; "
        "img-src data:; style-src 'unsafe-inline'\"></head>"
        "<body><h2>x</h2><img src='missing.png' alt=''></body></html>"
    )
    page = tmp_path / "bad.html"
    page.write_text(html, encoding="utf-8")
    res = _run(exe, tmp_path / "profile", "--dump-dom", page.as_uri())
    assert _console_lines(res.stderr)
