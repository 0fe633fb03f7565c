"""Drivers: which event names and which of the account's regular users account for a change.

Pure functions on frames of the accounts' rows; the api reads those rows from the store.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

MAX_EVENT_DRIVERS = 5
MAX_USER_DRIVERS = 5


def _event_weights(events: pd.Series, weights: dict) -> pd.Series:
    """Each row's event weight (1 for a name the weights do not list), looked up once per name."""
    codes, names = pd.factorize(events)
    per_name = np.array([weights.get(name, 1.0) for name in names], dtype=float)
    return pd.Series(per_name[codes] if len(names) else np.ones(len(events)), index=events.index)


def event_drivers(event_days: pd.DataFrame, weights: dict, baseline_days, window_days) -> list[dict]:
    """Per event name: expected (from the baseline days' daily mean) vs observed in the window.

    ``event_days``: rows ``day, event, events`` of one account; ``baseline_days`` and
    ``window_days``: the days of each period (of the same kind as the ``day`` column: dates or
    day numbers), masked days already left out.
    Values are in activity-index units (event counts times their weights).  ``share`` is each
    event's part of the whole change in the index, so the shares add up to 1; the list is ranked
    by the size of each event's change.
    """
    return event_drivers_many(event_days.assign(account=""), weights, [("", baseline_days)], [window_days])[0]


def event_drivers_many(event_days: pd.DataFrame, weights: dict, baselines, windows) -> list[list[dict]]:
    """:func:`event_drivers` for many accounts in one pass of frame operations.

    ``event_days``: rows ``account, day, event, events``; ``baselines``: ``(account,
    baseline_days)`` pairs, one per wanted result (in that order); ``windows``: each wanted
    result's window days (an alert's own window: a stop's silent days, a slide's four weeks).
    """
    sums = event_period_sums(event_days, weights, baselines, windows)
    return drivers_from_sums(sums, weights, [len(days) for _, days in baselines], [len(days) for days in windows])


def _place_days(wanted) -> pd.DataFrame:
    """Rows ``place, account, day``: each wanted ``(place, account, days)`` spread over its days."""
    sizes = [len(d) for _, _, d in wanted]
    return pd.DataFrame({"place": np.repeat([i for i, _, _ in wanted], sizes),
                         "account": np.repeat(np.array([a for _, a, _ in wanted], dtype=object), sizes),
                         "day": np.concatenate([np.asarray(days) for _, _, days in wanted]) if wanted else []})


def event_period_sums(event_days: pd.DataFrame, weights: dict, baselines, windows) -> pd.DataFrame:
    """Index totals per wanted result and event name: rows ``place, event, baseline, observed``
    (``place`` indexes ``baselines``; see :func:`event_drivers_many` for the arguments).  The
    scan gets the same table from the store (``Store.event_period_sums``) without the rows."""
    columns = ["place", "event", "baseline", "observed"]
    wanted = [(i, account, days) for i, (account, days) in enumerate(baselines) if len(days) and len(windows[i])]
    if event_days.empty or not wanted:
        return pd.DataFrame(columns=columns)
    rows = event_days.assign(index=event_days["events"] * _event_weights(event_days["event"], weights))
    # Each wanted result's baseline rows, and its window rows.
    baseline = rows.merge(_place_days(wanted), on=["account", "day"]).groupby(["place", "event"])["index"].sum()
    in_window = _place_days([(i, account, windows[i]) for i, account, _ in wanted])
    observed = rows.merge(in_window, on=["account", "day"]).groupby(["place", "event"])["index"].sum()
    table = pd.concat({"baseline": baseline, "observed": observed}, axis=1).fillna(0.0).reset_index()
    return table[columns]


def drivers_from_sums(sums: pd.DataFrame, weights: dict, baseline_sizes, window_sizes) -> list[list[dict]]:
    """Drivers (see :func:`event_drivers`) from period totals ``place, event, baseline,
    observed``; ``baseline_sizes[place]`` and ``window_sizes[place]`` are the numbers of
    baseline and window days (a place without either gets no drivers)."""
    found = [[] for _ in baseline_sizes]
    sizes = np.asarray(baseline_sizes, dtype=float)
    window_sizes = np.asarray(window_sizes, dtype=float)
    if not len(sums):
        return found
    place = sums["place"].to_numpy(int)
    table = sums[(sizes[place] > 0) & (window_sizes[place] > 0)]
    if not len(table):
        return found
    place = table["place"].to_numpy(int)
    table = table.assign(expected=table["baseline"].to_numpy(float) / sizes[place] * window_sizes[place])
    table["change"] = table["observed"] - table["expected"]
    total = table.groupby("place")["change"].transform("sum")
    table = table.assign(total=total, size=-table["change"].abs()).sort_values(["place", "size", "event"])
    for row in table.itertuples(index=False):
        if weights.get(row.event, 1.0) == 0:
            continue
        found[row.place].append({
            "type": "event", "event": row.event, "expected": round(float(row.expected), 2),
            "observed": round(float(row.observed), 2),
            "change_pct": None if row.expected == 0 else round(100 * float(row.change / row.expected), 1),
            "share": None if row.total == 0 else round(float(row.change / row.total), 4),
        })
    return found


def user_drivers(user_days: pd.DataFrame, weights: dict, baseline_days, window_days, direction: str,
                 regular_share: float = 0.25) -> list[dict]:
    """Regular users who went quiet (down) or users newly active (up), by share of the baseline.

    ``user_days``: rows ``day, user, event, events``.  A regular user was active on at least
    ``regular_share`` of the baseline days.  Going quiet: a regular user with no activity in the
    window; newly active: a user with activity in the window and none in the baseline.  Each
    user's ``baseline_share`` is their part of the account's baseline activity; ``share`` their
    part of the whole change.  User ids are given as stored.
    """
    if user_days.empty or not len(window_days) or not len(baseline_days):
        return []
    frame = user_days.assign(index=user_days["events"] * _event_weights(user_days["event"], weights))
    in_base = frame[frame["day"].isin(np.asarray(baseline_days))]
    in_window = frame[frame["day"].isin(np.asarray(window_days))]
    base_total = in_base["index"].sum()
    per_user_base = in_base.groupby("user")["index"].sum()
    active_days = in_base.groupby("user")["day"].nunique()
    window_per_user = in_window.groupby("user")["index"].sum()
    expected_total = base_total / len(baseline_days) * len(window_days)
    total_change = window_per_user.sum() - expected_total
    rows = []
    if direction == "down":
        regular = active_days[active_days >= regular_share * len(baseline_days)].index
        for user in regular:
            if window_per_user.get(user, 0.0) > 0:
                continue
            expected = per_user_base[user] / len(baseline_days) * len(window_days)
            rows.append({"type": "user", "user": user, "change": "went quiet",
                         "baseline_share": round(float(per_user_base[user] / base_total), 4),
                         "share": None if total_change == 0 else round(float(-expected / total_change), 4)})
    else:
        for user, value in window_per_user.items():
            if user in per_user_base.index:
                continue
            rows.append({"type": "user", "user": user, "change": "newly active", "baseline_share": 0.0,
                         "share": None if total_change == 0 else round(float(value / total_change), 4)})
    rows.sort(key=lambda r: (-(r["baseline_share"] or 0), -(r["share"] or 0), r["user"]))
    return rows[:MAX_USER_DRIVERS]


def drivers_phrase(drivers: list[dict], plain) -> str:
    """A short clause for the chat message, e.g. "mostly booking.create (-72%); 2 regular users
    went quiet".  ``plain`` makes data values inert for the message."""
    parts = []
    events = [d for d in drivers if d["type"] == "event" and d.get("share") is not None]
    if events and events[0]["share"] is not None and events[0]["share"] >= 0.4:
        top = events[0]
        change = "" if top["change_pct"] is None else f" ({top['change_pct']:+.0f}%)"
        parts.append(f"mostly {plain(top['event'])}{change}")
    quiet = [d for d in drivers if d["type"] == "user" and d["change"] == "went quiet"]
    new = [d for d in drivers if d["type"] == "user" and d["change"] == "newly active"]
    if quiet:
        parts.append(f"{len(quiet)} regular user{'s' if len(quiet) > 1 else ''} went quiet")
    if new:
        parts.append(f"{len(new)}{'+' if len(new) >= MAX_USER_DRIVERS else ''} new user{'s' if len(new) > 1 else ''} active")
    return "; ".join(parts)
