"""Issue 11 on the simulated bench: a report a lab can sign.

One small run of the bundled qualification (sequences/qualification.toml with 5 events per
group instead of 25; same meters, modes, voltages, captures and limits), made by `rig run` in
a subprocess as a user would, then checked for: the exit code of a failed verdict, "At a
glance" per charge voltage with its verdicts and a buyer's sentence, labels that name their
capture, the README's notebook code, the printable certificate (pdftoppm and pdftotext of
poppler-utils are the outside references for the PDF) and the report's print view and width
in headless Chromium (the reference renderer).
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from rigbase.errors import RunFolderError
from rigbase.units import eng

from .test_report_browser import _chromium, _console_lines
from .test_report_browser import _run as _chromium_run

ROOT = Path(__file__).resolve().parents[2]
BENCH = ROOT / "sequences" / "benches" / "sim-demo.toml"
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (W3C/ISO 15948), section 5.2


def rig(*args: str, cwd: Path = ROOT) -> subprocess.CompletedProcess[str]:
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    return subprocess.run(
        [sys.executable, "-m", "rig.cli", *args],
        capture_output=True,
        text=True,
        timeout=600,
        cwd=cwd,
        env=env,
    )


def _tool(name: str) -> str:
    exe = shutil.which(name)
    if exe is None:
        if os.environ.get("CI", "").lower() == "true":
            pytest.fail(f"CI=true but {name} is not installed (Debian package poppler-utils)")
        pytest.skip(f"{name} not installed (Debian package poppler-utils)")
    return exe


@pytest.fixture(scope="module")
def small_qualification(tmp_path_factory):
    """(run folder, `rig run` result) of the bundled qualification with 5 events per group."""
    root = tmp_path_factory.mktemp("qual")
    text = (ROOT / "sequences" / "qualification.toml").read_text(encoding="utf-8")
    text, n = re.subn(r"(?m)^repetitions = 25\b", "repetitions = 5", text)
    assert n == 1
    seq = root / "qualification-small.toml"
    seq.write_text(text, encoding="utf-8")
    res = rig("run", str(seq), "--bench", str(BENCH), "--results", str(root / "results"), "--quiet")
    runs = [p for p in (root / "results").iterdir() if p.is_dir()]
    assert len(runs) == 1, res.stdout + res.stderr
    return runs[0], res


def _page_text(html: str) -> str:
    text = re.sub(r"<[^>]+>", " ", html)
    return " ".join(text.split())


def test_run_exits_1_when_a_verdict_against_the_limits_fails(small_qualification):
    """README, "Exit codes": 1 when a verdict said no. The demo meters fail their charge
    limit in AC V at 1 kV, so the run must say "fail" and exit 1 (it exited 0)."""
    run, res = small_qualification
    assert "verdicts against the sequence's limits:" in res.stdout
    g = pd.read_csv(run / "groups.csv")
    n_fail = int((g["verdict"] == "fail").sum())
    assert n_fail > 0 and f"fail {n_fail}" in res.stdout
    assert res.returncode == 1, res.stdout[-2000:] + res.stderr[-2000:]
    assert (run / "report.html").exists() and (run / "certificate.pdf").exists()


def test_at_a_glance_answers_at_every_charge_voltage_with_verdicts(small_qualification):
    """At 500 V one meter passes every check and the other fails its AC charge checks: the
    glance must say so (it compared at the highest voltage only)."""
    run, _res = small_qualification
    html = (run / "report.html").read_text(encoding="utf-8")
    glance = html.split("<section id='glance'>")[1].split("</section>")[0]
    g = pd.read_csv(run / "groups.csv")
    g = g[g["verdict"].fillna("") != ""]
    at = {v: g[g["volts"] <= v] for v in sorted(g["volts"].unique())}
    passing = {
        v: sorted(k for k, d in at[v].groupby("meter") if (d["verdict"] == "pass").all())
        for v in at
    }
    text = _page_text(glance)
    rows = re.findall(r"<tr>(.*?)</tr>", glance.split("<tbody>")[1])
    assert len(rows) == g.groupby(["mode", "volts", "load"]).ngroups  # every voltage, every mode
    for v, ok in passing.items():
        assert f"{eng(v, 'V')}" in text
        if len(ok) == 1:  # the sentence a buyer acts on
            assert f"For work up to {eng(v, 'V')}, choose {ok[0]}" in text, text[:800]
        if not ok:
            assert f"At {eng(v, 'V')}, no meter passes every check" in text
    assert "Verdicts at this voltage" in glance
    assert glance.count('class="v fail"') == int(
        g.groupby(["mode", "volts", "load", "meter"])["verdict"]
        .apply(lambda s: (s == "fail").any())
        .sum()
    )


def test_waveform_panels_and_tables_name_what_their_capture_measures(small_qualification):
    run, _res = small_qualification
    figs = run / "figures"
    slow = (figs / "waveforms-ac-v-charge.svg").read_text(encoding="utf-8")
    fast = (figs / "waveforms-ac-v-peak.svg").read_text(encoding="utf-8")
    assert "· peak (linear time)" not in slow and "peak not resolved" in slow
    assert "· peak (linear time)" in fast
    html = (run / "report.html").read_text(encoding="utf-8")
    groups = html.split("<section id='groups'>")[1].split("</section>")[0]
    rows = re.findall(r"<tr>(.*?)</tr>", groups)
    cells = [re.findall(r"<td>(.*?)</td>", r) for r in rows[1:]]
    # no peak row from the 200 ns capture, no charge row from the 20 us one, no signed peak
    header = re.findall(r"<th>(.*?)</th>", rows[0])
    cap, metric = header.index("Capture"), header.index("Metric")
    shown = {(c[cap], c[metric]) for c in cells}
    assert ("charge", "|peak current|") not in shown and ("peak", "charge") not in shown
    assert ("peak", "|peak current|") in shown and ("charge", "charge") in shown
    assert not any(c[metric] == "peak current" for c in cells)
    # bench values with units, not raw floats
    tested = html.split("<section id='tested'>")[1].split("</section>")[0]
    assert "4.5e-05" not in tested and "45 µC" in tested
    assert "peak=…" not in tested


def test_readme_python_blocks_run_on_a_small_run(small_qualification, tmp_path):
    """Every ```python block of the README, with "results/<run>" pointing at the run."""
    run, _res = small_qualification
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    blocks = re.findall(r"```python\n(.*?)```", readme, flags=re.S)
    assert blocks, "the README has no python block"
    for k, code in enumerate(blocks):
        assert "results/<run>" in code
        script = tmp_path / f"block{k}.py"
        script.write_text(code.replace("results/<run>", run.as_posix()), encoding="utf-8")
        res = subprocess.run(
            [sys.executable, "-W", "error", str(script)],
            capture_output=True,
            text=True,
            timeout=300,
            env={**os.environ, "PYTHONPATH": str(ROOT)},
        )
        assert res.returncode == 0, f"README block {k}:\n{code}\n{res.stderr[-2000:]}"


def test_readme_test_command_works_on_a_fresh_machine():
    """A fresh machine's package lists are empty: apt-get update must come before install,
    and the tools the tests need (poppler-utils for the PDF) are installed by it and .ci/run."""
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    line = next(x for x in readme.splitlines() if "apt-get install" in x)
    assert line.index("apt-get update") < line.index("apt-get install")
    for pkg in ("ngspice", "chromium", "poppler-utils"):
        assert pkg in line
    ci = (ROOT / ".ci" / "run").read_text(encoding="utf-8")
    assert "need+=(poppler-utils)" in ci and ci.index("apt-get update") < ci.index(
        "apt-get install"
    )


def test_certificate_pdf_renders_and_reads(small_qualification, tmp_path):
    """pdftoppm renders every page (A4 at 50 dpi: 414 x 585 pixels, from 8.27 x 11.69 in,
    ISO 216); pdftotext finds the unit, the verdicts, the cautions and the sign-off block."""
    run, _res = small_qualification
    pdf = run / "certificate.pdf"
    assert pdf.read_bytes().startswith(b"%PDF-")  # ISO 32000-1, 7.5.2 file header
    text = subprocess.run(
        [_tool("pdftotext"), "-layout", str(pdf), "-"], capture_output=True, text=True, check=True
    ).stdout
    pages = text.split("\f")
    pages = [p for p in pages if p.strip()]
    man = json.loads((run / "manifest.json").read_text(encoding="utf-8"))
    meters = man["sequence"]["meters"]
    assert len(meters) <= len(pages) <= 2 * len(meters)
    for meter in meters:
        own = [p for p in pages if f"serial {meter['serial']}" in p]
        assert 1 <= len(own) <= 2, meter
        body = "\n".join(own)
        assert meter["model"] in body and meter["rating"] in body
        # The run records who started it (on the simulated bench "(simulated bench)").
        operator = (man.get("operator") or {}).get("name")
        assert (f"Operator: {operator}" if operator else "Operator: not recorded") in body
        assert "Calibrations: not recorded" in body
        assert "HIGH VOLTAGE CAN INJURE OR KILL" in body
        assert "Tested by (name)" in body and "Reviewed by (name)" in body
        g = pd.read_csv(run / "groups.csv")
        mine = g[(g["meter"] == meter["model"]) & (g["verdict"].fillna("") != "")]
        want = "PASS" if (mine["verdict"] == "pass").all() else "FAIL"
        assert f"Result against the sequence's limits: {want}" in body
        assert body.count("FAIL") >= int((mine["verdict"] == "fail").sum())
    subprocess.run(
        [_tool("pdftoppm"), "-r", "50", "-png", str(pdf), str(tmp_path / "page")], check=True
    )
    import matplotlib.image as mpimg

    shots = sorted(tmp_path.glob("page-*.png"))
    assert len(shots) == len(pages)
    for shot in shots:
        assert shot.read_bytes().startswith(PNG_SIGNATURE)
        img = mpimg.imread(shot)
        assert abs(img.shape[1] - 414) <= 1 and abs(img.shape[0] - 585) <= 1
        grey = img[..., :3].mean(axis=2)
        assert (grey < 0.5).mean() > 0.005  # printed text, not a blank page


def test_certificate_shows_the_operator_and_calibrations_the_run_recorded(
    small_qualification, tmp_path
):
    run0, _res = small_qualification
    run = tmp_path / run0.name
    shutil.copytree(run0, run)
    man = json.loads((run / "manifest.json").read_text(encoding="utf-8"))
    man["operator"] = "R. Example (fictitious)"
    man["calibrations"] = [{"instrument": "scope", "certificate": "CAL-DEMO-1", "due": "2027-06"}]
    (run / "manifest.json").write_text(json.dumps(man), encoding="utf-8")
    from rig.analysis.analyze import analyze_run
    from rig.report.certificate import write_certificate

    # the analysis no longer matches the edited manifest: refused, as the report refuses it
    with pytest.raises(RunFolderError, match="older than manifest.json"):
        write_certificate(run)
    analyze_run(run, table=False)
    text = subprocess.run(
        [_tool("pdftotext"), str(write_certificate(run)), "-"],
        capture_output=True,
        text=True,
        check=True,
    ).stdout
    assert "Operator: R. Example (fictitious)" in text
    assert "CAL-DEMO-1" in text and "not recorded" not in text


def _measure_page(html_path: Path, tmp_path: Path, width: int) -> dict[str, float]:
    """The report in Chromium at ``width`` pixels: the document's scroll width and the right
    edge of the glance section's widest element, written into the DOM by a script (the copy
    has no Content-Security-Policy so that the script may run)."""
    html = html_path.read_text(encoding="utf-8")
    html = re.sub(r"<meta http-equiv='Content-Security-Policy'[^>]*>", "", html)
    probe = (
        "<script>window.addEventListener('load',()=>{const g=document.getElementById('glance');"
        "let r=0;for(const e of g.querySelectorAll('*')){r=Math.max(r,e.getBoundingClientRect()"
        ".right)}const p=document.createElement('pre');p.id='probe';p.textContent=JSON.stringify("
        "{scroll:document.documentElement.scrollWidth,client:document.documentElement."
        "clientWidth,glance_right:r,glance_scroll:g.scrollWidth});document.body.appendChild(p)})"
        "</script>"
    )
    page = tmp_path / "probe.html"
    page.write_text(html.replace("</body>", probe + "</body>"), encoding="utf-8")
    exe = _chromium()
    res = _chromium_run(
        exe,
        tmp_path / "profile",
        f"--window-size={width},1000",
        "--virtual-time-budget=5000",
        "--dump-dom",
        page.as_uri(),
    )
    assert res.returncode == 0, res.stderr[-2000:]
    found = re.search(r"<pre id=\"probe\">(.*?)</pre>", res.stdout)
    assert found, res.stdout[-1000:]
    return json.loads(found.group(1).replace("&quot;", '"'))


def test_at_a_glance_fits_a_1400_pixel_window(small_qualification, tmp_path):
    run, _res = small_qualification
    sizes = _measure_page(run / "report.html", tmp_path, 1400)
    assert sizes["client"] == pytest.approx(1400, abs=20)  # the window the page was laid out in
    assert sizes["glance_right"] <= sizes["client"], sizes
    assert sizes["scroll"] <= sizes["client"], sizes  # no horizontal scrolling anywhere


def test_measuring_probe_sees_an_overflow(small_qualification, tmp_path):
    """The failure path of the width check: at 500 pixels the glance table overflows."""
    run, _res = small_qualification
    sizes = _measure_page(run / "report.html", tmp_path, 500)
    assert sizes["glance_right"] > sizes["client"] or sizes["scroll"] > sizes["client"]


def test_print_view_in_chromium(small_qualification, tmp_path):
    """Chromium's print to PDF uses the @media print styles: no navigation bar, A4 pages,
    every section's heading present, nothing cut at the right edge (pdftotext's text of the
    group table's last column, "Verdict", is on the pages)."""
    run, _res = small_qualification
    exe = _chromium()
    out = tmp_path / "print.pdf"
    res = _chromium_run(
        exe,
        tmp_path / "profile",
        "--no-pdf-header-footer",
        f"--print-to-pdf={out}",
        (run / "report.html").as_uri(),
    )
    assert res.returncode == 0, res.stderr[-2000:]
    assert _console_lines(res.stderr) == []
    info = subprocess.run(
        [_tool("pdfinfo"), str(out)], capture_output=True, text=True, check=True
    ).stdout
    size = re.search(r"Page size:\s+([\d.]+) x ([\d.]+) pts", info)
    assert size and abs(float(size.group(1)) - 595.3) < 2 and abs(float(size.group(2)) - 841.9) < 2
    text = subprocess.run(
        [_tool("pdftotext"), str(out), "-"], capture_output=True, text=True, check=True
    ).stdout
    for heading in ("What was tested", "At a glance", "Verdicts against the limits", "Group table"):
        assert heading in text
    flat = " ".join(text.split())
    # last columns kept (a header may wrap, and pdftotext then reads its lines apart)
    assert "Over limit" in flat and "Verdicts at this" in flat
    nav = "What was tested · At a glance"
    assert nav not in flat  # the navigation bar is hidden in print
    subprocess.run(
        [
            _tool("pdftoppm"),
            "-r",
            "40",
            "-f",
            "1",
            "-l",
            "2",
            "-png",
            str(out),
            str(tmp_path / "p"),
        ],
        check=True,
    )
    shots = sorted(tmp_path.glob("p-*.png"))
    assert shots and all(s.read_bytes().startswith(PNG_SIGNATURE) for s in shots)
    import matplotlib.image as mpimg

    grey = mpimg.imread(shots[0])[..., :3].mean(axis=2)
    assert (grey < 0.5).mean() > 0.003 and np.isfinite(grey).all()
