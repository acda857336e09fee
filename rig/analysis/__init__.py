"""Numbers from stored runs: per-event metrics vectorised over many records (`metrics`),
run folders to metrics.parquet and groups.csv (`analyze`), per-group statistics, tolerance bounds
and verdicts (`stats`), comparison with a baseline run (`compare`), delay sweeps (`selfdischarge`)
and single waveforms from elsewhere (`measure`). It reads run folders only, never instruments.
"""

from rig.analysis.analyze import (
    METRIC_COLUMNS,
    AnalysisResult,
    analyze_run,
    compute_metrics,
    find_setting,
    journal_frame,
)
from rig.analysis.compare import (
    COMPARE_COLUMNS,
    COMPARE_KEYS,
    METRIC_CAPTURE_ROLE,
    all_equivalent,
    compare_runs,
    compare_samples,
    tost_log,
    write_comparison,
)
from rig.analysis.measure import (
    measure_file,
    read_trace,
)
from rig.analysis.metrics import (
    DECAY_LEVEL,
    HBM_FARADS,
    HBM_OHMS,
    IEC61010_CHARGE_C,
    MAD_TO_SIGMA,
    current_after_onset,
    event_metrics,
    quick_metrics,
)
from rig.analysis.runs import (
    group_waveforms,
    load_event_waveform,
    load_run,
)
from rig.analysis.selfdischarge import (
    DEFAULT_SAFE_VOLTS,
    SELFDISCHARGE_COLUMNS,
    SweepFit,
    delay_curve,
    fit_self_discharge,
    has_delay_sweep,
    self_discharge,
)
from rig.analysis.stats import (
    DEFAULT_CAPTURE,
    DEFAULT_METRICS,
    GROUP_KEYS,
    GROUPS_COLUMNS,
    STATISTICS,
    bootstrap_ci,
    capture_roles,
    group_stats,
    limits_from_manifest,
    tolerance_factor,
    tolerance_factor_approx,
    upper_tolerance_bound,
    with_capture,
)

__all__ = [
    "AnalysisResult",
    "COMPARE_COLUMNS",
    "COMPARE_KEYS",
    "DECAY_LEVEL",
    "DEFAULT_CAPTURE",
    "DEFAULT_METRICS",
    "DEFAULT_SAFE_VOLTS",
    "GROUPS_COLUMNS",
    "GROUP_KEYS",
    "HBM_FARADS",
    "HBM_OHMS",
    "IEC61010_CHARGE_C",
    "MAD_TO_SIGMA",
    "METRIC_CAPTURE_ROLE",
    "METRIC_COLUMNS",
    "SELFDISCHARGE_COLUMNS",
    "STATISTICS",
    "SweepFit",
    "all_equivalent",
    "analyze_run",
    "bootstrap_ci",
    "capture_roles",
    "compare_runs",
    "compare_samples",
    "compute_metrics",
    "current_after_onset",
    "delay_curve",
    "event_metrics",
    "find_setting",
    "fit_self_discharge",
    "group_stats",
    "group_waveforms",
    "has_delay_sweep",
    "journal_frame",
    "limits_from_manifest",
    "load_event_waveform",
    "load_run",
    "measure_file",
    "quick_metrics",
    "read_trace",
    "self_discharge",
    "tolerance_factor",
    "tolerance_factor_approx",
    "tost_log",
    "upper_tolerance_bound",
    "with_capture",
    "write_comparison",
]

# Source identification and prediction into any load (identify, sourcenet, predict,
# predictrun), kept in one block of their own.
from rig.analysis.identify import DataSet, collect, fit_source, identify, path_of_load  # noqa: E402
from rig.analysis.predict import METRICS, Prediction, predict, simulate_into  # noqa: E402
from rig.analysis.predictrun import (  # noqa: E402
    PREDICT_COLUMNS,
    PREDICT_GROUP_KEYS,
    identifiable_groups,
    identify_groups,
    predict_run,
    record_after_trigger,
    resolve_load,
)
from rig.analysis.sourcenet import FosterSource, linear_current, source_parts  # noqa: E402

__all__ += [
    "DataSet",
    "FosterSource",
    "METRICS",
    "PREDICT_COLUMNS",
    "PREDICT_GROUP_KEYS",
    "Prediction",
    "collect",
    "fit_source",
    "identifiable_groups",
    "identify",
    "identify_groups",
    "linear_current",
    "path_of_load",
    "predict",
    "predict_run",
    "record_after_trigger",
    "resolve_load",
    "simulate_into",
    "source_parts",
]
