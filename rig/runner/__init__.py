"""Running the bench: the event cycle as a state machine (`cycle`), the interlocks and the
safe-state procedure (`interlocks`), the one module that opens the instruments a bench file names
and starts the simulated bench when asked (`opener`), and the live progress display. The runner
writes through the store and never computes metrics itself.
"""

from rig.runner.cycle import (
    ExitPath,
    Phase,
    Runner,
    RunOutcome,
    Terminated,
)
from rig.runner.display import (
    LiveDisplay,
    RunningMedian,
)
from rig.runner.interlocks import (
    Interlocks,
    SafeReport,
)
from rig.runner.opener import (
    OpenBench,
    check_meter_netlists,
    load_bench,
    meter_time_constants,
    open_bench,
    serve_simulated_bench,
)

__all__ = [
    "ExitPath",
    "Interlocks",
    "LiveDisplay",
    "RunningMedian",
    "OpenBench",
    "Phase",
    "RunOutcome",
    "Runner",
    "SafeReport",
    "Terminated",
    "check_meter_netlists",
    "load_bench",
    "meter_time_constants",
    "open_bench",
    "serve_simulated_bench",
]
