"""ebbwatch: per-account activity baselines and daily alerts for drops and surges.

The public API is what the ``ebbwatch`` command calls; each function returns plain Python or
pandas objects.
"""

__version__ = "0.1.0"

# The submodules ``ebbwatch.backtest`` and ``ebbwatch.explain`` are loaded first so that the
# names ``backtest`` and ``explain`` on the package stay the API functions below (a submodule's
# first import, say inside a scan, would otherwise replace them).
from . import backtest as _backtest_module  # noqa: E402,F401
from . import explain as _explain_module  # noqa: E402,F401
from .detect.changepoint import changepoints  # noqa: E402
from .api import (  # noqa: E402
    alert_history,
    backtest,
    daily_frame,
    explain,
    export_daily,
    ingest_files,
    run_demo,
    scan,
    snooze,
    status,
)

__all__ = ["__version__", "alert_history", "backtest", "changepoints", "daily_frame", "explain", "export_daily",
           "ingest_files", "run_demo", "scan", "snooze", "status"]
