"""ebbwatch: per-account activity baselines and daily alerts for drops and surges.

The public API is what the ``ebbwatch`` command calls; each function returns plain Python or
pandas objects.
"""

__version__ = "0.1.0"

from .api import daily_frame, export_daily, ingest_files, scan, status  # noqa: E402

__all__ = ["__version__", "daily_frame", "export_daily", "ingest_files", "scan", "status"]
