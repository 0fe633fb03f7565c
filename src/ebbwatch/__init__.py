"""ebbwatch: per-account activity baselines and daily alerts for drops and surges.

The public API is what the ``ebbwatch`` command calls; each function returns plain Python or
pandas objects.
"""

__version__ = "0.1.0"

# The submodule ``ebbwatch.backtest`` is loaded first so that the name ``backtest`` on the
# package stays the API function below (a submodule's first import would otherwise replace it).
from . import backtest as _backtest_module  # noqa: E402,F401
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
