"""The accounts, identities, outcomes and daily-aggregate files: read and checked up front.

Each error names the file, the line (1 = header) and the value.
"""

from __future__ import annotations

from pathlib import Path
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

import numpy as np
import pandas as pd

from ..errors import InputError


def _read_csv(path: str, required: tuple[str, ...]) -> pd.DataFrame:
    if not Path(path).is_file():
        raise InputError(f"no such file: {path}")
    try:
        frame = pd.read_csv(path, dtype=str, keep_default_na=False, encoding="utf-8")
    except (OSError, UnicodeDecodeError, pd.errors.ParserError, pd.errors.EmptyDataError) as exc:
        raise InputError(f"cannot read {path}: {exc}") from exc
    frame.columns = [c.strip() for c in frame.columns]
    missing = [c for c in required if c not in frame.columns]
    if missing:
        raise InputError(
            f"{path}: missing column(s) {', '.join(missing)}; the header has {', '.join(frame.columns)}"
        )
    return frame


def _where(path, index) -> str:
    return f"{path} line {int(index) + 2}"


def _numbers(frame, column, path, *, allow_empty=True) -> pd.Series:
    values = frame[column].str.strip()
    out = pd.to_numeric(values.replace("", np.nan), errors="coerce")
    bad = out.isna() & (values != "") | (out < 0)
    if bad.any():
        i = bad.idxmax()
        raise InputError(f"{_where(path, i)}: {column} must be a number >= 0, got {frame[column][i]!r}")
    return out


def read_accounts(path: str) -> pd.DataFrame:
    """accounts.csv: ``account,name,seats,segment,timezone,mrr`` (all but account optional)."""
    frame = _read_csv(path, ("account",))
    out = pd.DataFrame({"account": frame["account"].str.strip()})
    if (out["account"] == "").any():
        raise InputError(f"{_where(path, (out['account'] == '').idxmax())}: empty account")
    dup = out["account"].duplicated()
    if dup.any():
        raise InputError(f"{_where(path, dup.idxmax())}: account {out['account'][dup.idxmax()]!r} appears twice")
    for column in ("name", "segment", "timezone"):
        if column in frame:
            values = frame[column].str.strip()
            out[column] = pd.Series([v if v else None for v in values], index=frame.index, dtype=object)
        else:
            out[column] = None
    for column in ("seats", "mrr"):
        out[column] = _numbers(frame, column, path) if column in frame else np.nan
    for i, zone in out["timezone"].items():
        if not isinstance(zone, str):
            continue
        try:
            ZoneInfo(zone)
        except (ZoneInfoNotFoundError, ValueError):
            raise InputError(
                f"{_where(path, i)}: unknown time zone {zone!r}; use an IANA name such as Europe/Berlin"
            ) from None
    return out[["account", "name", "seats", "segment", "timezone", "mrr"]]


def _instants(frame, column, path) -> pd.Series:
    values = frame[column].str.strip() if column in frame else pd.Series([""] * len(frame))
    parsed = pd.to_datetime(values.replace("", None), utc=True, errors="coerce", format="ISO8601")
    bad = parsed.isna() & (values != "")
    if bad.any():
        i = bad.idxmax()
        raise InputError(f"{_where(path, i)}: {column} must be a date or RFC 3339 time, got {values[i]!r}")
    return parsed


def read_identities(path: str) -> pd.DataFrame:
    """identities.csv: ``user,account,valid_from,valid_to``; empty bounds are open.

    Intervals are half-open, ``[valid_from, valid_to)``; a date means its midnight UTC.  One user's
    intervals must not overlap.
    """
    frame = _read_csv(path, ("user", "account"))
    out = pd.DataFrame(
        {
            "user": frame["user"].str.strip(),
            "account": frame["account"].str.strip(),
            "valid_from": _instants(frame, "valid_from", path),
            "valid_to": _instants(frame, "valid_to", path),
        }
    )
    empty = (out["user"] == "") | (out["account"] == "")
    if empty.any():
        raise InputError(f"{_where(path, empty.idxmax())}: user and account must not be empty")
    backwards = out["valid_to"].notna() & out["valid_from"].notna() & (out["valid_to"] <= out["valid_from"])
    if backwards.any():
        raise InputError(f"{_where(path, backwards.idxmax())}: valid_to must be after valid_from")
    lo = out["valid_from"].fillna(pd.Timestamp("1677-09-22", tz="UTC").as_unit("us"))
    hi = out["valid_to"].fillna(pd.Timestamp("2262-04-10", tz="UTC").as_unit("us"))
    order = out.assign(lo=lo, hi=hi).sort_values(["user", "lo"])
    same_user = order["user"].eq(order["user"].shift())
    overlap = same_user & (order["lo"] < order["hi"].shift())
    if overlap.any():
        i = overlap.idxmax()
        raise InputError(
            f"{_where(path, i)}: user {out['user'][i]!r} has overlapping identity intervals; "
            "a user belongs to one account at a time"
        )
    return out


OUTCOME_KINDS = ("churned", "contracted", "expanded")


def read_outcomes(path: str, kinds=OUTCOME_KINDS) -> pd.DataFrame:
    """outcomes.csv: ``account,date,outcome`` with outcome one of ``kinds``."""
    frame = _read_csv(path, ("account", "date", "outcome"))
    dates = pd.to_datetime(frame["date"].str.strip(), errors="coerce", format="ISO8601")
    if dates.isna().any():
        i = dates.isna().idxmax()
        raise InputError(f"{_where(path, i)}: date must be YYYY-MM-DD, got {frame['date'][i]!r}")
    outcome = frame["outcome"].str.strip()
    unknown = ~outcome.isin(kinds)
    if unknown.any():
        i = unknown.idxmax()
        raise InputError(f"{_where(path, i)}: unknown outcome {outcome[i]!r}; expected one of {', '.join(kinds)}")
    return pd.DataFrame({"account": frame["account"].str.strip(), "date": dates.dt.date, "outcome": outcome})
