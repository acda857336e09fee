"""The report drawn in worker processes: the same page and files as drawn in one process, errors
raised as without workers, figures written as matplotlib's own savefig writes them, and the
report's imports without scipy."""

from __future__ import annotations

import io
import logging
import multiprocessing
import os
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from PIL import Image

from rig.analysis.compare import compare_runs, write_comparison
from rig.report import figures as F
from rig.report.documents import write_documents
from rig.report.page import write_report
from rigbase.errors import FileFormatError, RunFolderError
from rigbase.workers import WorkerPool, joined
from tests.fresh import run_python
from tests.report_fixtures import build_run

PARENT = os.getpid()

# The pool forks only in a process without other threads, and the test session may hold some
# (servers of the simulated bench): the checks that need workers run in a fresh interpreter.
needs_fork = pytest.mark.skipif(
    "fork" not in multiprocessing.get_all_start_methods(), reason="no fork on this platform"
)


def _fresh(call: str) -> None:
    """Run ``call`` (a function of this module with its arguments) in a new Python."""
    out = run_python(f"import tests.unit.test_workers as t\nt.{call}\n")
    assert out.returncode == 0, out.stderr[-4000:]


@pytest.fixture(scope="module")
def pair(tmp_path_factory):
    root = tmp_path_factory.mktemp("runs")
    rng = np.random.default_rng(11)
    run = build_run(root, rng, run_id="w-run", reps=5)
    base = build_run(root, rng, run_id="w-base", reps=5, gain_scale=1.1)
    write_comparison(compare_runs(run, base), run, base)
    return run, base


def _written(run: Path) -> tuple[str, dict[str, bytes]]:
    """The page without its time stamp, and every figure file's bytes."""
    page = (run / "report.html").read_text(encoding="utf-8")
    page = re.sub(r"on \d{4}-\d\d-\d\d \d\d:\d\d UTC", "on (time)", page)
    return page, {p.name: p.read_bytes() for p in sorted((run / "figures").iterdir())}


def _forks() -> None:
    with WorkerPool(2) as pool:
        assert pool.workers == 2, "the pool did not fork"


def check_same_page(run: str, base: str) -> None:
    _forks()
    write_report(run, base, workers=1)
    page_1, files_1 = _written(Path(run))
    for p in (Path(run) / "figures").iterdir():
        p.unlink()
    write_report(run, base, workers=2)
    page_2, files_2 = _written(Path(run))
    # every figure of the run: waveforms per mode and capture, baseline overlays, strip plots
    # (jittered by the seeded rng: the points must sit in the same places), trends, bounce,
    # self-discharge
    assert any(n.startswith("baseline-") for n in files_1)
    assert {"peak-current.png", "iec-charge.png", "selfdischarge.png"} <= set(files_1)
    assert files_2.keys() == files_1.keys()
    assert [n for n in files_1 if files_1[n] != files_2[n]] == []
    assert page_2 == page_1


@needs_fork
def test_workers_write_the_same_page_and_figures_as_one_process(pair):
    run, base = pair
    _fresh(f"check_same_page({str(run)!r}, {str(base)!r})")


def check_documents(run: str) -> None:
    _forks()
    report, certificate = write_documents(run, workers=2)
    assert (report, certificate) == (Path(run) / "report.html", Path(run) / "certificate.pdf")
    assert certificate.read_bytes().startswith(b"%PDF-")  # PDF 1.7 (ISO 32000-1), 7.5.2
    together = _written(Path(run))
    write_report(run, workers=1)
    assert _written(Path(run)) == together


@needs_fork
def test_report_and_certificate_made_together_are_those_made_alone(pair):
    _fresh(f"check_documents({str(pair[0])!r})")


def _fails(kind: str) -> str:
    if kind == "run folder":
        raise RunFolderError("/runs/x/metrics.parquet [charge_c]: column missing")
    # its __init__ takes three arguments, so it cannot be unpickled from the worker's reply
    raise FileFormatError("/runs/x/bench.toml", "scope.range", "must be a number")


ERRORS = [
    ("run folder", RunFolderError, "/runs/x/metrics.parquet [charge_c]: column missing"),
    ("file format", FileFormatError, "/runs/x/bench.toml [scope.range]: must be a number"),
]


def check_errors(workers: int) -> None:
    if workers > 1:
        _forks()
    for kind, error, text in ERRORS:
        with WorkerPool(workers) as pool:
            job = pool.submit(_fails, kind)  # raises nothing yet
            with pytest.raises(error) as got:
                job.result()
        assert str(got.value) == text and type(got.value) is error


@needs_fork
def test_an_error_in_a_worker_is_raised_as_without_workers():
    check_errors(1)
    _fresh("check_errors(2)")


def _dies_in_a_worker(x: int) -> int:
    if os.getpid() != PARENT:
        os._exit(3)  # a worker killed (out of memory, say)
    return 2 * x


def check_dead_worker() -> None:
    _forks()
    seen: list[str] = []
    handler = logging.Handler()
    handler.emit = lambda record: seen.append(record.getMessage())  # type: ignore[method-assign]
    logging.getLogger("rigbase.workers").addHandler(handler)
    with WorkerPool(2) as pool:
        jobs = [pool.submit(_dies_in_a_worker, k) for k in range(3)]
        assert [j.result() for j in jobs] == [0, 2, 4]
    assert any("worker process stopped" in m for m in seen), seen


@needs_fork
def test_a_dead_worker_leaves_its_figure_to_this_process():
    _fresh("check_dead_worker()")


class _NoPickle:
    """A value that cannot be pickled: a call given it reached a worker by inheritance."""

    def __init__(self, rows: int) -> None:
        self.rows = rows

    def __reduce__(self):
        raise TypeError("this value was pickled")


def _rows_in_worker(value: _NoPickle, extra: int) -> tuple[int, int]:
    return value.rows + extra, os.getpid()


def check_shared_values() -> None:
    _forks()
    with WorkerPool(2) as pool:
        early = pool.share(_NoPickle(7))
        assert pool.share(early.value).key == early.key  # the same object: the same share
        jobs = [pool.submit(_rows_in_worker, early, k) for k in range(3)]
        got = [j.result() for j in jobs]
        assert [r for r, _ in got] == [7, 8, 9]
        assert all(pid != os.getpid() for _, pid in got)  # computed in the workers
        # shared after the workers forked: given as itself, pickled like any argument
        late = pool.share(_NoPickle(1))
        with pytest.raises(TypeError, match="pickled"):
            pool.submit(_rows_in_worker, late, 0).result()
        plain = pool.share(np.arange(4))
        assert pool.submit(np.sum, plain).result() == 6
    from rigbase import workers

    assert not workers._SHARED  # the pool's shares are dropped when it closes


@needs_fork
def test_a_shared_value_reaches_the_workers_by_fork_not_by_pickle():
    """``WorkerPool.share``: a value shared before the workers fork is used there without being
    pickled (an unpicklable value proves it); one shared afterwards is sent as itself."""
    _fresh("check_shared_values()")


def test_without_workers_a_shared_value_is_given_as_itself():
    with WorkerPool(1) as pool:
        value = _NoPickle(3)
        assert pool.submit(_rows_in_worker, pool.share(value), 1).result()[0] == 4


def test_without_workers_each_call_runs_at_once_in_order():
    seen: list[int] = []
    with WorkerPool(1) as pool:
        assert pool.workers == 1
        parts = ["a", pool.submit(seen.append, 1), pool.submit(seen.append, 2)]
        assert seen == [1, 2]  # before any result is asked for
    assert joined(["<p>", pool.submit(str, 3), "</p>"]) == "<p>3</p>"
    assert parts[1].result() is None


def _pixels(png: bytes) -> np.ndarray:
    return np.asarray(Image.open(io.BytesIO(png)).convert("RGBA"))


def test_render_writes_what_savefig_writes(tmp_path):
    """F.render prints through the canvases instead of Figure.savefig (which draws a figure
    with a layout engine once more first); the reference is matplotlib's savefig itself: the
    same pixels and the same SVG text, for a constrained-layout figure."""
    df = {
        "mode": ["AC V"] * 6 + ["DC V"] * 6,
        "volts": [500.0, 1000.0] * 6,
        "meter": ["Candidate A", "Candidate A", "Candidate B"] * 4,
        "abs_peak_a": np.linspace(3.0, 38.0, 12),
        "flagged": [False] * 11 + [True],
    }

    def fig():
        return F.fig_strip(
            pd.DataFrame(df),
            "abs_peak_a",
            "A",
            "|Peak current|",
            ["AC V", "DC V"],
            F.colour_map(["Candidate A", "Candidate B"]),
            np.random.default_rng(3),
            "|Peak current| per event",
        )

    got = F.render(fig(), "strip", tmp_path)
    ref = fig()
    with F.house_style():
        png = io.BytesIO()
        ref.savefig(png, format="png", dpi=100, metadata={"Software": None})
        ref.set_layout_engine("none")
        svg = io.StringIO()
        ref.savefig(svg, format="svg", metadata={"Creator": None, "Date": None})
    assert np.array_equal(_pixels(got.png), _pixels(png.getvalue()))
    assert got.svg == svg.getvalue()


def test_the_report_imports_no_scipy():
    """scipy (about 1 s of imports) is imported where a statistic or a fit needs it, and the
    report needs none: importing what `rig report` imports leaves it out."""
    code = (
        "import sys\n"
        "import rig.cli.results, rig.analysis, rig.report\n"
        "from rig.report.documents import write_documents\n"
        "print(sorted({m.split('.')[0] for m in sys.modules} & {'scipy'}))\n"
    )
    out = run_python(code)
    assert out.returncode == 0, out.stderr[-4000:]
    assert out.stdout.strip() == "[]"
