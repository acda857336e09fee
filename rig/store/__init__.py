"""The run folder on disk: manifest, plan, fsynced journal and atomically written waveform
files (`runfolder`, `waveform`), and the column names and group keys every later stage shares
(`schema`). It imports nothing from the instrument layer.
"""

from rig.store.runfolder import (
    RunWriter,
    Verification,
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
from rig.store.waveform import (
    WAVEFORM_SUFFIX,
    Waveform,
    load_waveform,
    save_waveform,
    sha256_file,
)

__all__ = [
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
    "read_journal",
    "read_manifest",
    "read_plan",
    "save_waveform",
    "sha256_file",
    "verify_run",
]
