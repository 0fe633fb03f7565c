"""A notebook-style tour of the library API with pandas (run: python examples/notebook.py DIR).

DIR is a directory made by ``ebbwatch demo --dir DIR`` (it holds ebbwatch.duckdb).  Each block
is what you would type into a notebook cell.
"""

import sys
from pathlib import Path

import pandas as pd

import ebbwatch

directory = Path(sys.argv[1] if len(sys.argv) > 1 else "ebbwatch-demo")
db = str(directory / "ebbwatch.duckdb")

# What the store holds.
info = ebbwatch.status(db=db)
print(f"{info['accounts']} accounts, {info['events']:,} events, {info['first_day']} .. {info['last_day']}")

# Today's alerts as a DataFrame, and every account's scores behind them.
alerts = ebbwatch.scan(db=db)
print(alerts[["account", "name", "kind", "severity", "change_pct", "onset"]].head(10).to_string(index=False))
scores = alerts.attrs["scores"]
print(scores.groupby("model")["account"].count().rename("accounts by baseline model"))

# The daily history of the most severe alert's account, weekly.
daily = ebbwatch.daily_frame(db=db)
top = alerts["account"].iloc[0]
mine = daily[daily["account"] == top].assign(day=lambda f: pd.to_datetime(f["day"]))
weekly = mine.groupby(pd.Grouper(key="day", freq="W"))["events"].sum()
print(f"\nweekly events of {top} (last 12 weeks):")
print(weekly.tail(12).to_string())
