"""The Dask client for dataset work: a local cluster by default, or an existing scheduler.

``dask_client(None)`` starts a local cluster in this process (one worker per core, one thread
each, the machine's memory shared out as their limits, so workers spill to disk instead of
failing) and closes it on exit; in-process workers start in tens of milliseconds, where worker
processes took 2.5-3.5 s here and need a ``__main__`` guard in the calling script; ``dask_client("tcp://host:8786")`` connects to a running scheduler and
leaves it running. Dask and distributed are imported here only, on first use, so the ``rig``
command starts fast.
"""

from __future__ import annotations

import os
import warnings
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

from rigbase.errors import RigError

__all__ = ["dask_client"]


@contextmanager
def dask_client(scheduler: str | None = None) -> Iterator[Any]:
    """A ``distributed.Client`` made the default scheduler inside the ``with`` block."""
    # dask 2026.8 still calls reset_index(inplace=True), which pandas 3.1 deprecates; the
    # warning is dask's to fix and says nothing about our data, so it is silenced for dask's
    # modules only (in-process workers share this process's warning filters)
    warnings.filterwarnings(
        "ignore", message=r"The inplace keyword in DataFrame\.reset_index", module=r"dask\."
    )
    try:
        from distributed import Client, LocalCluster
    except ImportError as exc:  # an optional engine: say what to install
        raise RigError("the dask engine needs `pip install dask[dataframe] distributed`") from exc
    if scheduler:
        try:
            client = Client(scheduler, timeout="10s", set_as_default=True)
        except OSError as exc:
            raise RigError(f"--scheduler {scheduler}: cannot connect ({exc})") from exc
        with client:
            yield client
        return
    workers = max(1, min(4, os.cpu_count() or 1))
    with (
        LocalCluster(
            n_workers=workers,
            threads_per_worker=1,
            processes=False,
            dashboard_address=None,
            silence_logs=40,  # logging.ERROR: worker chatter would drown the answer
        ) as cluster,
        Client(cluster, set_as_default=True) as client,
    ):
        yield client
