"""Run folders on disk: manifest, append-only journal, waveform files, event table.

Layout of ``results/<run-id>/`` (format 1)::

    manifest.json    what was run, on what, by which software; status and times
    plan.json        the planned events in order (the runner's to-do list, for resume)
    journal.jsonl    one JSON object per finished event, appended, flushed and fsynced
    waveforms/       one ``e<event>.zarr.zip`` per captured event (``.npz`` in older runs;
                     see rig.store.waveform)
    events.parquet   the journal as a table, written when the run ends

A killed run loses at most the event in flight: a final journal line without its newline is
ignored (and later overwritten on resume). A run folder has one writer: :class:`RunWriter`
holds the folder's exclusive lock (``rig.store.lock``) from creation or reopening to its
close. Every file but the append-only journal is written atomically (``rig.store.atomic``).
A new run is assembled in a hidden staging folder and renamed into place, so a crash while
creating it leaves no half-made run folder; a run whose bench never opened is marked
``failed to start`` with its error.
"""

from __future__ import annotations

import errno
import json
import logging
import os
import re
import shutil
from collections.abc import Iterator
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from rig.store.atomic import atomic_write, atomic_write_text, fsync_dir
from rig.store.lock import RunLock
from rig.store.waveform import WAVEFORM_SUFFIX, Waveform, save_waveform, sha256_file
from rigbase.errors import RunFolderError

__all__ = [
    "FAILED_TO_START",
    "RunWriter",
    "Verification",
    "new_run_id",
    "iter_journal",
    "read_journal",
    "read_manifest",
    "iter_plan",
    "read_plan",
    "verify_run",
]

log = logging.getLogger(__name__)

MANIFEST = "manifest.json"
PLAN = "plan.json"
JOURNAL = "journal.jsonl"
WAVEFORMS = "waveforms"
EVENTS = "events.parquet"
FAILED_TO_START = "failed to start"


def _read_json(path: Path, missing: str) -> Any:
    """A run-folder JSON file; RunFolderError naming the file when absent or not JSON."""
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise RunFolderError(f"{path}: {missing}") from None
    except json.JSONDecodeError as exc:
        raise RunFolderError(f"{path}: not valid JSON ({exc.msg}, line {exc.lineno})") from None


def read_manifest(run_dir: str | Path) -> dict[str, Any]:
    """The run's manifest as a dict (RunFolderError if missing, not JSON or not an object)."""
    path = Path(run_dir) / MANIFEST
    obj = _read_json(path, f"no manifest; is {run_dir} a run folder?")
    if not isinstance(obj, dict):
        raise RunFolderError(f"{path}: expected a JSON object, found {type(obj).__name__}")
    return obj


def read_plan(run_dir: str | Path) -> list[dict[str, Any]]:
    """The planned events, in order (RunFolderError naming the entry if one is malformed)."""
    return list(iter_plan(run_dir))


_PLAN_CHUNK = 1 << 20  # characters of plan.json decoded at a time


def iter_plan(run_dir: str | Path) -> Iterator[dict[str, Any]]:
    """The planned events one at a time, as :func:`read_plan` gives them (the same errors,
    raised when reached). plan.json is decoded a megabyte at a time: at 100,000 events the
    whole list is some 100 MB of dicts, which a count of the planned events does not need."""
    path = Path(run_dir) / PLAN
    dec = json.JSONDecoder()
    try:
        f = path.open(encoding="utf-8")
    except FileNotFoundError:
        raise RunFolderError(f"{path}: no plan file") from None
    with f:
        buf, pos, i = "", 0, 0
        eof = False

        def skip() -> bool:  # past whitespace, reading on; False at the end of the file
            nonlocal buf, pos, eof
            while True:
                while pos < len(buf) and buf[pos].isspace():
                    pos += 1
                if pos < len(buf) or eof:
                    return pos < len(buf)
                buf, pos = f.read(_PLAN_CHUNK), 0
                eof = not buf

        if not skip() or buf[pos] != "[":
            found = "nothing" if pos >= len(buf) else repr(buf[pos])
            raise RunFolderError(f"{path}: expected a JSON list of events, found {found}")
        pos += 1
        if skip() and buf[pos] == "]":
            return
        while skip():
            try:
                obj, end = dec.raw_decode(buf, pos)
            except json.JSONDecodeError as exc:
                more = "" if eof else f.read(_PLAN_CHUNK)
                if not more:  # the entry is malformed, not cut by the chunk
                    raise RunFolderError(f"{path}: not valid JSON ({exc.msg})") from None
                buf, pos = buf[pos:] + more, 0
                continue
            if end == len(buf) and not eof:  # a number or name may go on in the next chunk
                more = f.read(_PLAN_CHUNK)
                if more:
                    buf, pos = buf[pos:] + more, 0
                    continue
                eof = True
            if not isinstance(obj, dict) or not isinstance(obj.get("key"), str):
                raise RunFolderError(f"{path}: entry {i} is not an event object with a text 'key'")
            _event_number(obj.get("event", obj.get("index")), f"{path}: entry {i}")
            yield obj
            pos, i = end, i + 1
            if not skip():
                break
            if buf[pos] == "]":
                return
            if buf[pos] != ",":
                raise RunFolderError(f"{path}: not valid JSON (expected ',' after entry {i - 1})")
            pos += 1
    raise RunFolderError(f"{path}: not valid JSON (the list of events is not closed)")


def _event_number(value: Any, where: str) -> int:
    """A plan index from a JSON value: an integer (not a bool, not a float), else an error."""
    if isinstance(value, bool) or not isinstance(value, int) or value < 0:
        raise RunFolderError(f"{where}: 'event' is {value!r}, not a non-negative integer")
    return value


def read_journal(run_dir: str | Path) -> list[dict[str, Any]]:
    """Finished events in the order they were journalled (all of :func:`iter_journal`)."""
    return list(iter_journal(run_dir))


def iter_journal(run_dir: str | Path) -> Iterator[dict[str, Any]]:
    """Finished events in the order they were journalled, one row at a time (the file is read
    line by line: a 100,000-event journal held as a list of rows took 250 MB).

    A last line without its newline (the event in flight when the process died) is ignored;
    a complete line that is not JSON is corruption and raises RunFolderError naming the line.
    """
    path = Path(run_dir) / JOURNAL
    if not path.exists():
        return
    with open(path, "rb") as fh:
        for lineno, raw in enumerate(fh, start=1):
            if not raw.endswith(b"\n"):
                return  # the partial last line
            if not raw.strip():
                continue
            try:
                row = json.loads(raw)
            except (json.JSONDecodeError, UnicodeDecodeError) as exc:
                msg = getattr(exc, "msg", None) or "not UTF-8"
                raise RunFolderError(f"{path}:{lineno}: journal line is not JSON ({msg})") from None
            if not isinstance(row, dict):
                raise RunFolderError(
                    f"{path}:{lineno}: journal line is a JSON {type(row).__name__}, not an object"
                )
            _event_number(row.get("event"), f"{path}:{lineno}")
            f = row.get("file")
            if f is not None and not (isinstance(f, str) and _SAFE_REL.fullmatch(f)):
                raise RunFolderError(f"{path}:{lineno}: 'file' {f!r} is not a waveforms/ file name")
            yield row


# a journalled waveform name: inside waveforms/, no way out of the run folder
# (``.zarr.zip`` since the compressed store, ``.npz`` in older runs)
_SAFE_REL = re.compile(r"waveforms/[A-Za-z0-9_-]+(\.zarr\.zip|\.npz)")


# --------------------------------------------------------------------------------------------
# writing


def _write_json_atomic(path: Path, obj: Any) -> None:
    """Write JSON to a temporary name, fsync, rename: a reader sees the old or the new file."""
    atomic_write_text(path, json.dumps(obj, indent=2, default=_json_default) + "\n")


def _json_default(obj: Any) -> Any:
    if isinstance(obj, Path):
        return str(obj)
    if hasattr(obj, "item"):  # numpy scalars
        return obj.item()
    if isinstance(obj, (set, frozenset, tuple)):
        return list(obj)
    raise TypeError(f"not JSON-serialisable: {type(obj).__name__}")


def _now_iso() -> str:
    return datetime.now(UTC).isoformat(timespec="seconds")


def new_run_id(name: str, when: datetime | None = None) -> str:
    """A sortable, file-system-safe run id: ``20261201-221530-qualification``."""
    when = when or datetime.now(UTC)
    stem = re.sub(r"[^A-Za-z0-9_.-]+", "-", name).strip("-") or "run"
    return f"{when:%Y%m%d-%H%M%S}-{stem}"


class RunWriter:
    """Append-only writer of one run folder. Use :meth:`create` or :meth:`reopen`."""

    def __init__(self, path: Path, lock: RunLock | None = None) -> None:
        self.path = path
        self._journal = None
        self._done: set[int] = set()
        self._lock = lock

    # -- life cycle ---------------------------------------------------------------------------
    @classmethod
    def create(
        cls,
        results_dir: str | Path,
        run_id: str,
        manifest: dict[str, Any],
        plan: list[dict[str, Any]],
        inputs: dict[str, Path] | None = None,
    ) -> RunWriter:
        """Make ``results_dir/run_id`` with its manifest, plan and copies of the input files.

        ``inputs`` maps a file name in the run folder (``sequence.toml``, ``bench.toml``) to the
        file to copy, so a run can be resumed and audited without its original files. The
        folder is assembled under a hidden staging name, locked, and renamed into place: a
        crash on the way leaves only a ``.staging-*`` folder, never a half-made run.
        """
        results = Path(results_dir)
        results.mkdir(parents=True, exist_ok=True)
        stage = results / f".staging-{run_id}-{os.getpid()}"
        if stage.exists():
            shutil.rmtree(stage)
        (stage / WAVEFORMS).mkdir(parents=True)
        lock = RunLock(stage, "run").acquire()
        try:
            for name, src in (inputs or {}).items():
                data = Path(src).read_bytes()
                atomic_write(stage / name, lambda p, d=data: p.write_bytes(d))
            base = results / run_id
            path, k = base, 1
            while True:
                manifest_out = {
                    **manifest,
                    "run_id": path.name,
                    "format": 1,
                    "planned_events": len(plan),
                }
                _write_json_atomic(stage / PLAN, plan)
                _write_json_atomic(stage / MANIFEST, manifest_out)
                try:
                    # rename(2) onto an existing non-empty folder fails; an empty one is
                    # never left by this code, so this also settles a race between two runs
                    if path.exists():
                        raise FileExistsError(path)
                    os.rename(stage, path)
                    break
                except OSError as exc:
                    if exc.errno not in (None, errno.EEXIST, errno.ENOTEMPTY):
                        raise
                    k += 1
                    path = base.with_name(f"{base.name}-{k}")
            fsync_dir(results)
        except BaseException:
            lock.release()
            shutil.rmtree(stage, ignore_errors=True)
            raise
        writer = cls(path, lock)
        writer._open_journal()
        return writer

    @classmethod
    def reopen(cls, run_dir: str | Path) -> RunWriter:
        """Open an interrupted run to continue it: take the folder's lock (RunLockedError when
        another process writes it), drop a torn last journal line and any waveform file the
        journal does not name (the event in flight is planned again)."""
        path = Path(run_dir)
        read_manifest(path)
        lock = RunLock(path, "resume").acquire()
        try:
            read_plan(path)
            journal = path / JOURNAL
            if journal.exists():
                data = journal.read_bytes()
                cut = data.rfind(b"\n") + 1
                if cut != len(data):
                    with open(journal, "r+b") as fh:
                        fh.truncate(cut)
                        fh.flush()
                        os.fsync(fh.fileno())
                    log.warning(
                        "%s: dropped a torn last journal line (%d bytes)", journal, len(data) - cut
                    )
            rows = read_journal(path)
            named = {r["file"] for r in rows if r.get("file")}
            for f in (path / WAVEFORMS).iterdir():
                rel = f"{WAVEFORMS}/{f.name}"
                if rel not in named:
                    f.unlink()
                    log.warning("%s: removed %s (not in the journal)", path, rel)
        except BaseException:
            lock.release()
            raise
        writer = cls(path, lock)
        writer._done = {int(r["event"]) for r in rows}
        writer._open_journal()
        return writer

    def _open_journal(self) -> None:
        self._journal = open(self.path / JOURNAL, "ab")  # noqa: SIM115 - kept open for the run

    def close(self) -> None:
        """Close the journal and release the folder's lock (safe to call twice)."""
        if self._journal is not None:
            self._journal.close()
            self._journal = None
        if self._lock is not None:
            self._lock.release()
            self._lock = None

    def mark_failed_start(self, error: str) -> None:
        """Record that the run never reached its first event (the bench did not open, the
        operator stopped it before, ...): status ``failed to start`` and the error."""
        self.update_manifest(status=FAILED_TO_START, error=error, ended=_now_iso())

    def __enter__(self) -> RunWriter:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # -- events -------------------------------------------------------------------------------
    @property
    def done(self) -> set[int]:
        """Plan indices already journalled."""
        return set(self._done)

    def reload_done(self) -> set[int]:
        """Plan indices in the journal file, re-read (the count to report after a stop)."""
        self._done = {int(r["event"]) for r in read_journal(self.path)}
        return set(self._done)

    def waveform_path(self, event: int) -> tuple[Path, str]:
        """Absolute path and run-relative name of an event's waveform file."""
        rel = f"{WAVEFORMS}/e{event:06d}{WAVEFORM_SUFFIX}"
        return self.path / rel, rel

    def commit(self, row: dict[str, Any], waveform: Waveform | None) -> dict[str, Any]:
        """Write the event's waveform (atomically), then append its journal line and fsync.

        Returns the row as journalled (with ``file`` and ``sha256``). The waveform goes first:
        a crash between the two leaves an orphan file that :meth:`reopen` removes, never a
        journal line without its data.
        """
        if self._journal is None:
            raise RunFolderError(f"{self.path}: journal is closed")
        event = int(row["event"])
        if event in self._done:
            raise RunFolderError(f"{self.path}: event {event} is already in the journal")
        row = dict(row)
        if waveform is not None:
            abs_path, rel = self.waveform_path(event)
            row["file"] = rel
            row["sha256"] = save_waveform(abs_path, waveform)
        else:
            row["file"] = None
            row["sha256"] = None
        line = json.dumps(row, default=_json_default, separators=(",", ":")).encode() + b"\n"
        self._journal.write(line)
        self._journal.flush()
        os.fsync(self._journal.fileno())
        self._done.add(event)
        return row

    # -- manifest and end of run ----------------------------------------------------------------
    def update_manifest(self, **fields: Any) -> dict[str, Any]:
        """Merge ``fields`` into the manifest (atomic rewrite)."""
        manifest = read_manifest(self.path)
        manifest.update(fields)
        _write_json_atomic(self.path / MANIFEST, manifest)
        return manifest

    def write_event_table(self) -> Path:
        """Consolidate the journal into ``events.parquet`` (plan order)."""
        import pandas as pd

        rows = read_journal(self.path)
        df = pd.DataFrame(rows)
        if len(df):
            df = df.sort_values("event", kind="stable").reset_index(drop=True)
        return atomic_write(self.path / EVENTS, lambda p: df.to_parquet(p, index=False))


# --------------------------------------------------------------------------------------------
# verification


@dataclass
class Verification:
    """What :func:`verify_run` found."""

    path: Path
    status: str
    planned: int
    journalled: int
    captured: int
    problems: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)

    @property
    def ok(self) -> bool:
        """True when nothing is corrupt (an interrupted run can be ok and resumable)."""
        return not self.problems

    @property
    def missing(self) -> int:
        return self.planned - self.journalled


def verify_run(run_dir: str | Path) -> Verification:
    """Check a run folder: counts against the plan, duplicates, files and their checksums."""
    path = Path(run_dir)
    manifest = read_manifest(path)
    plan = read_plan(path)
    planned_idx = {int(p["event"]) if "event" in p else int(p["index"]) for p in plan}
    if len(planned_idx) != len(plan):
        problems_plan = [f"{PLAN}: {len(plan) - len(planned_idx)} event numbers repeat"]
    else:
        problems_plan = []
    problems: list[str] = list(problems_plan)
    notes: list[str] = []
    journal = path / JOURNAL
    if journal.exists():
        data = journal.read_bytes()
        if data and not data.endswith(b"\n"):
            notes.append(
                f"{JOURNAL}: last line is torn (event in flight when the run stopped); "
                "resume drops it"
            )
    try:
        rows = read_journal(path)
    except RunFolderError as exc:
        problems.append(str(exc))
        rows = []
    seen: set[int] = set()
    captured = 0
    for r in rows:
        ev = int(r["event"])
        if ev in seen:
            problems.append(f"{JOURNAL}: event {ev} appears more than once")
        seen.add(ev)
        if ev not in planned_idx:
            problems.append(f"{JOURNAL}: event {ev} is not in the plan")
        f = r.get("file")
        if f:
            captured += 1
            fp = path / f
            if not fp.exists():
                problems.append(f"{f}: missing (journalled for event {ev})")
            elif sha256_file(fp) != r.get("sha256"):
                problems.append(f"{f}: checksum differs from the journal (event {ev})")
    wf_dir = path / WAVEFORMS
    if wf_dir.exists():
        named = {r.get("file") for r in rows}
        for f in sorted(wf_dir.iterdir()):
            rel = f"{WAVEFORMS}/{f.name}"
            if rel not in named:
                notes.append(f"{rel}: not in the journal (left by an interrupted event)")
    status = str(manifest.get("status", "unknown"))
    missing = len(planned_idx - seen)
    if status == FAILED_TO_START:
        notes.append(f"the run failed to start: {manifest.get('error') or 'no error recorded'}")
    if status == "complete" and missing:
        problems.append(f"{MANIFEST}: status complete but {missing} planned events are missing")
    if missing and status not in ("complete", FAILED_TO_START):
        notes.append(
            f"{missing} of {len(planned_idx)} planned events not done: `rig resume` continues"
        )
    events = path / EVENTS
    if status == "complete" and events.exists():
        import pyarrow.parquet as pq

        try:
            n = pq.ParquetFile(events).metadata.num_rows
            if n != len(rows):
                problems.append(f"{EVENTS}: {n} rows, journal has {len(rows)}")
        except Exception as exc:  # pyarrow raises several types for a damaged file
            problems.append(f"{EVENTS}: unreadable ({exc})")
    metrics = path / "metrics.parquet"
    if metrics.exists():
        import pyarrow.parquet as pq

        try:
            _ = pq.ParquetFile(metrics).metadata.num_rows
        except Exception as exc:  # pyarrow raises several types for a damaged file
            problems.append(f"metrics.parquet: unreadable ({exc}); re-run `rig analyze`")
    return Verification(path, status, len(planned_idx), len(rows), captured, problems, notes)
