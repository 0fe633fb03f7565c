"""ebbwatch: per-account activity baselines and daily alerts for drops and surges.

The public API is what the ``ebbwatch`` command calls; each function returns plain Python or
pandas objects.
"""

__version__ = "0.1.0"

from .api import (  # noqa: E402
    alert_history,
    daily_frame,
    explain,
    export_daily,
    ingest_files,
    run_demo,
    scan,
    snooze,
    status,
)

__all__ = ["__version__", "alert_history", "daily_frame", "explain", "export_daily", "ingest_files", "run_demo",
           "scan", "snooze", "status"]
