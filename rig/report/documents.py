"""A run's two documents made together: ``report.html`` (rig.report.page) and
``certificate.pdf`` (rig.report.certificate) share one pool of worker processes
(rigbase.workers), so the certificate is drawn while the report's figures are. What
``rig report`` and the end of ``rig run`` write; each file is the same as when it is written
on its own.
"""

from __future__ import annotations

from pathlib import Path

from rig.report.certificate import write_certificate
from rig.report.data import read_run_tables
from rig.report.page import write_report
from rigbase.workers import WorkerPool

__all__ = ["write_documents"]


def write_documents(
    run_dir: str | Path, baseline_dir: str | Path | None = None, workers: int | None = None
) -> tuple[Path, Path]:
    """Write the report and the certificate of ``run_dir`` (against ``baseline_dir`` when
    given); returns (report.html, certificate.pdf). ``workers`` as for
    :func:`rig.report.page.write_report`. An error of either is raised as the function that
    writes it alone raises it."""
    tables = read_run_tables(Path(run_dir))
    with WorkerPool(workers) as pool:
        # Shared before the first call forks the workers, so they inherit the run's table
        # instead of receiving a pickled copy with each figure's call (the report's figures
        # are given the same share: rigbase.workers.WorkerPool.share).
        pool.share(tables.metrics)
        # first, so it runs beside the report's tables and figures rather than after them
        certificate = pool.submit(write_certificate, run_dir, baseline_dir, pool.share(tables))
        report = write_report(run_dir, baseline_dir, pool=pool, tables=tables)
        return report, certificate.result()
