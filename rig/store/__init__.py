"""The run folder on disk: manifest, plan, fsynced journal and atomically written waveform
files (`runfolder`, `waveform`), and the column names and group keys every later stage shares
(`schema`). It imports nothing from the instrument layer.
"""

from rig.store.atomic import atomic_write, atomic_write_bytes, atomic_write_text, fsync_dir
from rig.store.lock import LOCK_NAME, RunLock, RunLockedError
from rig.store.runfolder import (
    FAILED_TO_START,
    RunWriter,
    Verification,
    iter_journal,
    iter_plan,
    new_run_id,
    read_journal,
    read_manifest,
    read_plan,
    verify_run,
)
from rig.store.schema import (
    DEFAULT_CAPTURE,
    GROUP_KEYS,
    LIMIT_METRICS,
    METRIC_COLUMNS,
)
from rig.store.tables import read_csv_table, read_parquet_table
from rig.store.waveform import (
    WAVEFORM_SUFFIX,
    Waveform,
    load_waveform,
    save_waveform,
    sha256_file,
)

__all__ = [
    "FAILED_TO_START",
    "LOCK_NAME",
    "RunLock",
    "RunLockedError",
    "atomic_write",
    "atomic_write_bytes",
    "atomic_write_text",
    "fsync_dir",
    "DEFAULT_CAPTURE",
    "GROUP_KEYS",
    "LIMIT_METRICS",
    "METRIC_COLUMNS",
    "RunWriter",
    "Verification",
    "WAVEFORM_SUFFIX",
    "Waveform",
    "load_waveform",
    "new_run_id",
    "read_csv_table",
    "iter_journal",
    "read_journal",
    "read_parquet_table",
    "read_manifest",
    "iter_plan",
    "read_plan",
    "save_waveform",
    "sha256_file",
    "verify_run",
]
