"""What past alerts led to, saved by a backtest: the counts behind the outcome rates and the
replay they came from (one saved set; a new save replaces it)."""

from __future__ import annotations

import json
from datetime import datetime, timezone

import pandas as pd

from .sql import registered


class OutcomeRates:
    """The saved outcome counts."""

    def save_outcome_counts(self, counts: pd.DataFrame, replay: dict):
        """Replace the saved counts (``segment, kind, band, outcome, k, n``) and their replay
        (``from``, ``to``, ``step_days``, ``horizon_days``, ``known_until``, ``settings``)."""
        with self.transaction():
            self.con.execute("DELETE FROM outcome_counts")
            self.con.execute("DELETE FROM outcome_replay")
            if len(counts):
                with registered(self.con, "incoming_counts", counts[["segment", "kind", "band", "outcome", "k", "n"]]):
                    self.con.execute("INSERT INTO outcome_counts SELECT * FROM incoming_counts")
            self.con.execute("INSERT INTO outcome_replay VALUES (?, ?, ?, ?, ?, ?, ?)",
                             [datetime.now(timezone.utc), replay["from"], replay["to"], replay["step_days"],
                              replay["horizon_days"], replay["known_until"], json.dumps(replay.get("settings", {}))])

    def saved_outcome_counts(self) -> tuple[pd.DataFrame, dict] | None:
        """``(counts, replay)`` as saved, or None when no backtest saved rates."""
        rows = self.con.execute(
            "SELECT saved_at, replay_from, replay_to, step_days, horizon_days, known_until, settings FROM outcome_replay"
        ).fetchall()
        if not rows:
            return None
        saved_at, start, end, step, horizon, known_until, settings = rows[0]
        counts = self.con.execute("SELECT segment, kind, band, outcome, k, n FROM outcome_counts").df()
        replay = {"saved_at": saved_at.isoformat(timespec="seconds"), "from": start.isoformat(), "to": end.isoformat(),
                  "step_days": step, "horizon_days": horizon, "known_until": known_until.isoformat(),
                  "settings": json.loads(settings or "{}")}
        return counts, replay
