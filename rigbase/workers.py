"""Calls made side by side in forked worker processes: the report's figures (matplotlib draws
on one core, and the figures do not depend on each other) and the analysis's batches of
events (each batch's metrics depend on its own records only) are computed in forked workers
while the calling process goes on (it makes the report's tables, reads the next batch).

:class:`WorkerPool` runs module-level functions there and hands back a :class:`Job` per call.
The workers are forked (so they start with matplotlib, pandas and the run's tables already
imported and loaded, at no cost) and only when the platform forks and the process runs a
single thread (forking a process with other threads can leave a lock held in the child);
otherwise, or with ``workers=1``, each call runs at once in this process, exactly as a plain
call would. A call that fails in a worker raises its error (own type, one-line message) from
:meth:`Job.result`, as without the pool; a call whose worker died, or whose error cannot be
sent back (an exception that does not unpickle), is run again here and raises as a plain call
does. Workers ignore Ctrl-C (the report's process handles it) and exit on their own when that
process dies, so none outlives it holding the run folder's lock. A worker collects its garbage
once after each call instead of as it goes (the collector otherwise runs hundreds of times
over the objects a figure makes, about a tenth of the drawing time), and never over what it
inherited.

A call's arguments are pickled to its worker, and the pool's call queue holds a few pickled
calls at once: a 40 MB table given to four calls costs the calling process four to six copies
of it. :meth:`WorkerPool.share` hands a value to the workers by inheritance instead: shared
before the workers fork (at the pool's first call), it is in every worker already, and a call
given the :class:`Shared` handle sends only its key. A value shared after the fork, or in a
pool without workers, is given as itself (pickled, or here), so a call always receives the
value and is the same either way.
"""

from __future__ import annotations

import gc
import itertools
import logging
import multiprocessing
import os
import signal
import threading
import time
from collections.abc import Callable, Iterable
from concurrent.futures import Future, ProcessPoolExecutor
from concurrent.futures.process import BrokenProcessPool
from typing import Any, Generic, TypeVar

__all__ = ["MAX_WORKERS", "WorkerPool", "Job", "Shared", "default_workers", "joined"]

log = logging.getLogger(__name__)

T = TypeVar("T")

MAX_WORKERS = 4  # a report has about 6-12 slow figures; more workers mostly add memory
_WATCH_S = 0.5  # how often a worker checks that the report's process is still there, s


def default_workers() -> int:
    """Worker processes for this machine: its usable cores, at most :data:`MAX_WORKERS`
    (1, no pool, on a single core)."""
    try:
        cores = len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        cores = os.cpu_count() or 1
    return max(1, min(cores, MAX_WORKERS))


def _can_fork() -> bool:
    return "fork" in multiprocessing.get_all_start_methods() and threading.active_count() == 1


def _watch_parent(parent: int) -> None:
    """Exit this worker once the report's process has gone (it was killed): an orphan would
    keep the run folder's lock file open."""
    while os.getppid() == parent:
        time.sleep(_WATCH_S)
    os._exit(1)


def _worker_start(parent: int) -> None:
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # Ctrl-C is the report's process's to handle
    threading.Thread(target=_watch_parent, args=(parent,), daemon=True).start()
    gc.freeze()  # what the worker inherited lives as long as it does: never scan it
    gc.disable()  # collected once per call instead, in _call


# Values shared with workers about to fork, by key; a forked worker holds the parent's copy
# (copy-on-write pages, never pickled). Keys are never reused within a process.
_SHARED: dict[int, Any] = {}
_next_key = itertools.count(1)


class Shared(Generic[T]):
    """A handle on a value given to a pool's calls (:meth:`WorkerPool.share`); a call
    receives the value itself."""

    __slots__ = ("key", "value")

    def __init__(self, key: int, value: T) -> None:
        self.key, self.value = key, value


class _Inherited:
    """What a call's argument becomes on its way to a worker that inherited the value: its
    key only."""

    __slots__ = ("key",)

    def __init__(self, key: int) -> None:
        self.key = key


def _call(fn: Callable[..., T], *args: Any) -> T:
    """``fn(*args)`` in a worker (inherited values looked up by key), then its cyclic garbage
    (figures are full of cycles)."""
    try:
        return fn(*(_SHARED[a.key] if isinstance(a, _Inherited) else a for a in args))
    finally:
        gc.collect()


class Job(Generic[T]):
    """One call given to a :class:`WorkerPool`; :meth:`result` waits for its value."""

    def __init__(
        self,
        fn: Callable[..., T],
        args: tuple[Any, ...],
        future: Future[T] | None = None,
        value: T | None = None,
        error: Exception | None = None,
    ) -> None:
        self._fn, self._args, self._future, self._value = fn, args, future, value
        self._error = error

    def result(self) -> T:
        """The call's value, or its error raised here (with the worker's traceback as its
        cause); a call whose worker died, or whose error could not be sent back, is made again
        here (so it raises as a plain call does)."""
        if self._error is not None:
            raise self._error
        if self._future is None:
            return self._value  # type: ignore[return-value]
        future, self._future = self._future, None
        try:
            self._value = future.result()
        except BrokenProcessPool as exc:
            log.warning("a worker process stopped (%s); running %s here", exc, self._name)
            self._value = self._fn(*self._args)
        return self._value  # type: ignore[return-value]

    @property
    def _name(self) -> str:
        return getattr(self._fn, "__name__", "the call")


class WorkerPool:
    """Runs calls in forked worker processes (see the module doc); use it as a context
    manager, which waits for the workers to end. ``workers``: processes (default
    :func:`default_workers`; 1 runs every call here, at once)."""

    def __init__(self, workers: int | None = None) -> None:
        n = default_workers() if workers is None else int(workers)
        self.workers = n if n > 1 and _can_fork() else 1
        self._ex: ProcessPoolExecutor | None = None
        self._forked = False  # the workers fork at the first call
        self._inherited: dict[int, int] = {}  # id(value) -> key, for values shared before
        if self.workers > 1:
            self._ex = ProcessPoolExecutor(
                self.workers,
                mp_context=multiprocessing.get_context("fork"),
                initializer=_worker_start,
                initargs=(os.getpid(),),
            )

    def share(self, value: T) -> Shared[T]:
        """A handle that gives ``value`` to this pool's calls (pass it as an argument of
        :meth:`submit`; the call receives ``value``). Shared before the pool's first call,
        the workers inherit it when they fork and a call sends its key only; afterwards, or
        without workers, a call is given the value itself. Sharing the same object again
        returns its handle. The value must not be changed while the pool runs."""
        key = self._inherited.get(id(value))
        if key is not None:
            return Shared(key, value)
        key = next(_next_key)
        if self._ex is not None and not self._forked:
            _SHARED[key] = value
            self._inherited[id(value)] = key
        return Shared(key, value)

    def submit(self, fn: Callable[..., T], *args: Any) -> Job[T]:
        """``fn(*args)`` in a worker (``fn`` a module-level function, ``args`` picklable or
        :class:`Shared` handles), or here and now without workers; its error, if any, is
        raised by :meth:`Job.result` either way."""
        plain = tuple(a.value if isinstance(a, Shared) else a for a in args)
        if self._ex is not None:
            sent = tuple(
                _Inherited(a.key) if isinstance(a, Shared) and self._owns(a) else p
                for a, p in zip(args, plain, strict=True)
            )
            self._forked = True
            try:
                return Job(fn, plain, future=self._ex.submit(_call, fn, *sent))
            except BrokenProcessPool:  # a worker died already: the rest is drawn here
                pass
        args = plain
        try:
            return Job(fn, args, value=fn(*args))
        except Exception as exc:
            return Job(fn, args, error=exc)

    def _owns(self, handle: Shared[Any]) -> bool:
        """True if this pool's workers inherited ``handle``'s value."""
        return self._inherited.get(id(handle.value)) == handle.key

    def close(self) -> None:
        """Let the workers end (a job not started yet is dropped) and forget the values
        shared with them."""
        if self._ex is not None:
            self._ex.shutdown(wait=True, cancel_futures=True)
            self._ex = None
        for key in self._inherited.values():
            _SHARED.pop(key, None)
        self._inherited.clear()

    def __enter__(self) -> WorkerPool:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def joined(parts: Iterable[str | Job[str]]) -> str:
    """The HTML of ``parts``, each a string or a job giving one, in their order."""
    return "".join(p if isinstance(p, str) else p.result() for p in parts)
