"""The public library API: composes the stages.  The only place that opens the store and unpacks
config into plain arguments; the CLI is a thin shell over these functions.

One module per job: ``ingesting`` (event files and daily aggregates; what the store holds),
``loading`` (account blocks for the scan and the replay, the fleet-wide fit, the Dask exchange),
``scanning`` (the daily scan and its drivers), ``explaining`` (one account; snoozes and the alert
history), ``replaying`` (the backtest), ``reporting`` (the HTML report's data), ``demo_run``;
``common`` holds what they share.  The module names differ from the functions' so that importing
a module never replaces a function of the same name on this package.
"""

from ..engine import DEFAULT_CHUNK_SIZE
from .common import _config, _fleet_params, _scan_params, parse_day
from .demo_run import run_demo
from .explaining import alert_history, explain, lift_snooze, snooze, snoozes
from .ingesting import daily_frame, export_daily, ingest_files, status
from .loading import PanelLoader, fleet_sample
from .replaying import backtest
from .reporting import report_data, write_report
from .scanning import export_index, scan

__all__ = ["DEFAULT_CHUNK_SIZE", "PanelLoader", "alert_history", "backtest", "daily_frame", "explain", "export_daily", "export_index",
           "fleet_sample", "ingest_files", "lift_snooze", "parse_day", "report_data", "run_demo", "scan", "snooze",
           "snoozes", "status", "write_report", "_config", "_fleet_params", "_scan_params"]
