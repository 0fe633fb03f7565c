"""What past alerts led to: outcome counts from a replay, rates with exact intervals made
monotone across severity bands, the recurring revenue they put at risk, and segments compared
with the rest of the fleet.

Pure functions on frames and arrays; the api reads the replay and the store and saves the counts.
A rate here is a frequency in this product's own history — of the alert episodes of a kind and
severity replayed, how many were followed by an outcome within the horizon — not a prediction
about any person.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import stats

from .alerts import RESOLVE_DAYS
from .backtest import DOWN_OUTCOMES, UP_OUTCOMES

OUTCOMES = DOWN_OUTCOMES + UP_OUTCOMES  # churned, contracted, expanded
# Severity bands (lower edges; the last is open): severity is -log10 of the alert's q-value, so an
# alert has at least 2 at the default fdr of 0.01; a stop's severity is 99.
BAND_EDGES = (0.0, 3.0, 5.0, 10.0)
MIN_ALERTS = 10  # a band (or pooled bands) with fewer alert episodes shows no rate
NO_ALERT = "none"  # the kind under which accounts with no alert are counted (the base rate)
COUNT_COLUMNS = ["segment", "kind", "band", "outcome", "k", "n"]
# Which outcome an alert of a direction is about (messages and MRR at risk).
DIRECTION_OUTCOME = {"down": "churned", "up": "expanded"}
OUTCOME_WORDS = {"churned": "a cancellation", "contracted": "a contraction", "expanded": "an expansion"}
KIND_PLURAL = {"drop": "drops", "stop": "stops", "slide": "slides", "surge": "surges"}


def band_of(severity) -> np.ndarray:
    """The band index (0 … len(BAND_EDGES) − 1) of each severity."""
    return np.searchsorted(BAND_EDGES, np.asarray(severity, float), side="right") - 1


def band_label(first: int, last: int | None = None) -> str:
    """"under 3", "3–5", "10 and over", "any" for bands ``first`` … ``last`` (inclusive)."""
    last = first if last is None else last
    if first == 0 and last >= len(BAND_EDGES) - 1:
        return "any"
    if last >= len(BAND_EDGES) - 1:
        return f"{BAND_EDGES[first]:g} and over"
    if first == 0:
        return f"under {BAND_EDGES[last + 1]:g}"
    return f"{BAND_EDGES[first]:g}–{BAND_EDGES[last + 1]:g}"


def _followed(accounts, days, outcomes: pd.DataFrame, horizon_days: int) -> dict:
    """Per outcome, a bool array: was ``accounts[i]`` followed by that outcome within
    ``horizon_days`` after ``days[i]`` (0 <= outcome date − day <= horizon)?"""
    pairs = pd.DataFrame({"account": np.asarray(accounts, dtype=object),
                          "day": pd.to_datetime(pd.Series(days)).to_numpy()})
    pairs["pair"] = np.arange(len(pairs))
    dated = outcomes.assign(date=pd.to_datetime(outcomes["date"]))[["account", "date", "outcome"]]
    joined = pairs.merge(dated, on="account")
    lag = (joined["date"] - joined["day"]).dt.days
    joined = joined[(lag >= 0) & (lag <= horizon_days)]
    out = {}
    for outcome in OUTCOMES:
        hit = np.zeros(len(pairs), bool)
        hit[joined.loc[joined["outcome"] == outcome, "pair"].to_numpy()] = True
        out[outcome] = hit
    return out


def alert_episodes(alerts: pd.DataFrame, exposure: pd.DataFrame) -> pd.DataFrame:
    """Each run of one account's alerts in one direction on the sampled replay days, once:
    ``account, direction, first`` (its first sampled day), ``kind`` and ``severity`` at its
    strongest.  A run ends where the account goes unalerted for longer than both the spacing of
    the sampled days and the days an alert takes to resolve, so a weekly replay does not split an
    episode the daily scan would keep whole."""
    if alerts.empty:
        return pd.DataFrame(columns=["account", "direction", "first", "kind", "severity"])
    sampled = pd.to_datetime(exposure.loc[exposure["sampled"], "as_of"] if "sampled" in exposure else exposure["as_of"])
    a = alerts.assign(as_of=pd.to_datetime(alerts["as_of"]))
    a = a[a["as_of"].isin(set(sampled))].sort_values(["account", "direction", "as_of"])
    gap = max(_spacing(sorted(set(sampled))), RESOLVE_DAYS)
    new = (a["account"] != a["account"].shift()) | (a["direction"] != a["direction"].shift()) \
        | ((a["as_of"] - a["as_of"].shift()).dt.days > gap)
    a = a.assign(episode=new.cumsum())
    first = a.groupby("episode")["as_of"].min()
    peak = a.loc[a.groupby("episode")["severity"].idxmax()].set_index("episode")
    return pd.DataFrame({"account": peak["account"], "direction": peak["direction"], "first": first[peak.index],
                         "kind": peak["kind"], "severity": peak["severity"]}).reset_index(drop=True)


def outcome_counts(alerts: pd.DataFrame, exposure: pd.DataFrame, outcomes: pd.DataFrame, *, horizon_days: int,
                   known_until, eligible: pd.DataFrame, segments: dict | None = None) -> pd.DataFrame:
    """Counts behind the rates, from a replay: rows ``segment, kind, band, outcome, k, n``.

    An alert episode (:func:`alert_episodes`) counts once, under its kind and severity band at
    its strongest, when the whole horizon from its first day has passed by ``known_until`` (the
    last day outcomes are known for), so an outcome not yet possible never lowers a rate; ``k``
    is how many of the ``n`` were followed by the outcome within ``horizon_days`` of their first
    day.  The base rate
    (kind ``"none"``, band −1): on sampled days ``horizon_days`` apart, every account in
    ``eligible`` (``account, first_day, last_day``: the days it could be judged) with no alert
    in either direction that day or in the days before it that decide whether an alert is new.
    ``segments``: account → segment; every count is kept per segment ("" where unknown) and
    summed over segments by :func:`rates_table`.
    """
    segments = segments or {}
    known_until = pd.Timestamp(known_until)
    horizon = pd.Timedelta(days=horizon_days)
    rows = []
    episodes = alert_episodes(alerts, exposure)
    episodes = episodes[episodes["first"] + horizon <= known_until]
    if len(episodes):
        rows += _tally(episodes["account"].to_numpy(), episodes["first"], episodes["kind"].to_numpy(),
                       band_of(episodes["severity"]), outcomes, horizon_days, segments)
    # Base rate: days a horizon apart (the windows do not overlap), counted back from the last.
    sampled = pd.to_datetime(exposure.loc[exposure["sampled"], "as_of"] if "sampled" in exposure else exposure["as_of"])
    usable = sorted(d for d in sampled if d + horizon <= known_until)
    base_days = usable[::-1][::max(1, int(round(horizon_days / _spacing(usable))))] if usable else []
    if base_days:
        alerted_on = pd.to_datetime(alerts["as_of"]) if len(alerts) else pd.Series([], dtype="datetime64[ns]")
        first, last = pd.to_datetime(eligible["first_day"]), pd.to_datetime(eligible["last_day"])
        accounts, days = [], []
        for day in base_days:
            recent = (alerted_on <= day) & (alerted_on >= day - pd.Timedelta(days=RESOLVE_DAYS))
            quiet = (first <= day) & (last >= day) & ~eligible["account"].isin(alerts.loc[recent.to_numpy(), "account"])
            accounts += eligible["account"][quiet].tolist()
            days += [day] * int(quiet.sum())
        if accounts:
            rows += _tally(np.array(accounts), days, NO_ALERT, -1, outcomes, horizon_days, segments)
    if not rows:
        return pd.DataFrame(columns=COUNT_COLUMNS)
    return pd.concat(rows, ignore_index=True)[COUNT_COLUMNS]


def _tally(accounts, days, kind, band, outcomes, horizon_days: int, segments: dict) -> list[pd.DataFrame]:
    """Per outcome, ``segment, kind, band, outcome, k, n`` rows: how many of these (account, day)
    pairs were followed by the outcome within the horizon."""
    hits = _followed(accounts, days, outcomes, horizon_days)
    frame = pd.DataFrame({"segment": [segments.get(a) or "" for a in accounts], "kind": kind, "band": band})
    return [frame.assign(k=hit.astype(int), n=1).groupby(["segment", "kind", "band"], as_index=False)[["k", "n"]].sum()
            .assign(outcome=outcome) for outcome, hit in hits.items()]


def _spacing(days) -> float:
    """The typical gap between consecutive sampled days (1 for a daily replay)."""
    if len(days) < 2:
        return 1.0
    return float(np.median(np.diff(np.array(days, dtype="datetime64[D]")).astype(float)))


def clopper_pearson(k, n, confidence: float = 0.95) -> tuple[np.ndarray, np.ndarray]:
    """Exact binomial interval (Clopper & Pearson 1934) for ``k`` of ``n``, elementwise."""
    k, n = np.asarray(k, float), np.asarray(n, float)
    alpha = 1.0 - confidence
    with np.errstate(invalid="ignore", divide="ignore"):
        low = np.where(k > 0, stats.beta.ppf(alpha / 2, k, n - k + 1), 0.0)
        high = np.where(k < n, stats.beta.ppf(1 - alpha / 2, k + 1, n - k), 1.0)
    return low, high


def pool_adjacent_violators(values, weights) -> tuple[np.ndarray, list[tuple[int, int]]]:
    """The non-decreasing fit of ``values`` closest in weighted least squares (pool adjacent
    violators; Ayer et al. 1955): ``(fitted, blocks)``, blocks as (first, last) index pairs."""
    blocks = []  # [sum of w·v, sum of w, first, last]
    for i, (v, w) in enumerate(zip(values, weights)):
        blocks.append([v * w, w, i, i])
        while len(blocks) > 1 and blocks[-2][0] * blocks[-1][1] > blocks[-1][0] * blocks[-2][1]:
            sv, sw, _, last = blocks.pop()
            blocks[-1][0] += sv
            blocks[-1][1] += sw
            blocks[-1][3] = last
    fitted = np.empty(len(values))
    for sv, sw, first, last in blocks:
        fitted[first:last + 1] = sv / sw if sw > 0 else np.nan
    return fitted, [(first, last) for _, _, first, last in blocks]


def rates_table(counts: pd.DataFrame, min_alerts: int = MIN_ALERTS, segment: str | None = None) -> pd.DataFrame:
    """Rates per kind, band and outcome from :func:`outcome_counts`' rows (summed over segments,
    or of one ``segment``): ``kind, band, outcome, rate, low, high, k, n, bands`` — for an
    outcome in the alert's own direction (churned or contracted after a drop, stop or slide,
    expanded after a surge) the bands are pooled where a stronger band would read as less
    likely (pool adjacent violators, weighted by alerts), and ``k``, ``n`` and the exact 95%
    interval are the pooled block's; ``bands`` names the severities pooled.  Fewer than
    ``min_alerts`` alerts: rate, low and high are None."""
    if segment is not None:
        counts = counts[counts["segment"] == segment]
    summed = counts.groupby(["kind", "band", "outcome"], as_index=False)[["k", "n"]].sum()
    out = []
    for (kind, outcome), rows in summed.groupby(["kind", "outcome"]):
        rows = rows.sort_values("band")
        k, n, bands = rows["k"].to_numpy(float), rows["n"].to_numpy(float), rows["band"].to_numpy(int)
        ordered = kind != NO_ALERT and outcome in (UP_OUTCOMES if kind == "surge" else DOWN_OUTCOMES)
        blocks = pool_adjacent_violators(k / n, n)[1] if ordered else [(i, i) for i in range(len(bands))]
        for first, last in blocks:
            bk, bn = k[first:last + 1].sum(), n[first:last + 1].sum()
            low, high = clopper_pearson(bk, bn)
            enough = bn >= min_alerts
            label = "no alert" if kind == NO_ALERT else band_label(bands[first], bands[last])
            for band in bands[first:last + 1]:
                out.append({"kind": kind, "band": int(band), "outcome": outcome,
                            "rate": float(bk / bn) if enough else None, "low": float(low) if enough else None,
                            "high": float(high) if enough else None, "k": int(bk), "n": int(bn), "bands": label})
    return pd.DataFrame(out, columns=["kind", "band", "outcome", "rate", "low", "high", "k", "n", "bands"])


def rate_lookup(table: pd.DataFrame):
    """A function ``(kind, severity) -> {outcome: {rate, low, high, k, n, bands}}`` over
    :func:`rates_table`'s rows, indexed once (a scan looks up every alert); an outcome with no
    replayed alert of that kind and band is left out."""
    number = lambda x: None if x is None or pd.isna(x) else float(x)  # noqa: E731  (JSON-ready, NaN as null)
    index = {}
    for r in table.itertuples():
        index.setdefault((r.kind, int(r.band)), {})[r.outcome] = {
            "rate": number(r.rate), "low": number(r.low), "high": number(r.high), "k": int(r.k), "n": int(r.n),
            "bands": r.bands}
    return lambda kind, severity: dict(index.get((kind, int(band_of([severity])[0])), {}))


def rate_sentence(kind: str, direction: str, rates: dict, horizon_days: int) -> str | None:
    """"In past replays, 9 of 26 slides this strong (severity 3–5) were followed by a
    cancellation within 90 days."; where the replay had too few such alerts, says so instead;
    None when it had none."""
    outcome = DIRECTION_OUTCOME[direction]
    r = rates.get(outcome)
    if not r:
        return None
    plural = KIND_PLURAL.get(kind, kind)
    strength = "" if r["bands"] == "any" else f" this strong (severity {r['bands']})"
    if r["rate"] is None:
        return (f"Past replays had only {r['n']} {plural}{strength}: too few to tell how often "
                f"{OUTCOME_WORDS[outcome]} followed.")
    return (f"In past replays, {r['k']} of {r['n']} {plural}{strength} "
            f"were followed by {OUTCOME_WORDS[outcome]} within {horizon_days} days.")


def value_at_risk(values, k, n, *, draws: int = 4000, seed: int = 0, coverage: float = 0.9) -> dict:
    """Expected value (MRR or activity) lost to the outcome over accounts with values ``values``
    whose alerts were followed by it ``k`` of ``n`` times in the replay: ``{"expected",
    "low", "high", "accounts"}``.  The interval simulates each account's outcome from its rate's
    uncertainty (rate drawn from its Jeffreys posterior, Beta(k + ½, n − k + ½), then the outcome
    from the rate), so it holds both the rates' uncertainty and the luck of a few accounts."""
    values, k, n = (np.asarray(x, float) for x in (values, k, n))
    if values.size == 0:
        return {"expected": 0.0, "low": 0.0, "high": 0.0, "accounts": 0}
    rng = np.random.default_rng(seed)
    rate = rng.beta(k + 0.5, n - k + 0.5, size=(draws, values.size))
    happens = rng.random((draws, values.size)) < rate
    totals = np.einsum("da,a->d", happens, values)  # not a BLAS product: its threads would spin beside the scan's
    tail = (1 - coverage) / 2
    return {"expected": float((values * k / n).sum()), "low": float(np.quantile(totals, tail)),
            "high": float(np.quantile(totals, 1 - tail)), "accounts": int(values.size)}


def fisher_two_sided(a, b, c, d) -> np.ndarray:
    """Two-sided Fisher's exact test of 2×2 tables [[a, b], [c, d]], elementwise: the total
    probability (hypergeometric, margins fixed) of tables no more likely than the one seen."""
    a, b, c, d = (np.asarray(x, np.int64) for x in (a, b, c, d))
    out = np.ones(a.shape, float)
    for i in np.ndindex(a.shape):
        row, col, total = a[i] + b[i], a[i] + c[i], a[i] + b[i] + c[i] + d[i]
        if total == 0:
            continue
        dist = stats.hypergeom(total, col, row)
        support = np.arange(max(0, row + col - total), min(row, col) + 1)
        pmf = dist.pmf(support)
        observed = dist.pmf(a[i])
        out[i] = min(1.0, float(pmf[pmf <= observed * (1 + 1e-7)].sum()))
    return out


def benjamini_hochberg(p) -> np.ndarray:
    """Benjamini–Hochberg adjusted p-values (q-values), elementwise over a flat array."""
    p = np.asarray(p, float)
    if p.size == 0:
        return p
    order = np.argsort(p)
    ranked = p[order] * p.size / np.arange(1, p.size + 1)
    q = np.minimum.accumulate(ranked[::-1])[::-1]
    out = np.empty_like(q)
    out[order] = np.minimum(q, 1.0)
    return out


def segment_table(accounts: pd.DataFrame, open_alerts: pd.DataFrame, counts: pd.DataFrame | None = None,
                  highlight_q: float = 0.05) -> pd.DataFrame:
    """Per segment: accounts, open alerts by kind, the share with open downward and upward alerts
    against the rest of the fleet (Fisher's exact test, Benjamini–Hochberg across segments and
    both directions; ``holds`` where q < ``highlight_q``), and, given replay ``counts``, the share
    of its downward alert episodes followed by a cancellation and of its upward ones by an
    expansion.  ``accounts``: ``account, segment``; ``open_alerts``: ``account, direction, kind``."""
    accounts = accounts.assign(segment=accounts["segment"].fillna("").astype(str))
    accounts = accounts[accounts["segment"] != ""]
    if accounts.empty:
        return pd.DataFrame()
    total = len(accounts)
    rows = []
    for direction in ("down", "up"):
        flagged = set(open_alerts.loc[open_alerts["direction"] == direction, "account"])
        in_all = accounts["account"].isin(flagged).sum()
        for segment, members in accounts.groupby("segment"):
            hit = members["account"].isin(flagged).sum()
            rows.append((segment, direction, hit, len(members) - hit, in_all - hit, total - len(members) - (in_all - hit)))
    table = pd.DataFrame(rows, columns=["segment", "direction", "a", "b", "c", "d"])
    table["p"] = fisher_two_sided(table["a"], table["b"], table["c"], table["d"])
    table["q"] = benjamini_hochberg(table["p"].to_numpy())
    out = []
    for segment, members in accounts.groupby("segment"):
        mine = open_alerts[open_alerts["account"].isin(set(members["account"]))]
        row = {"segment": segment, "accounts": len(members),
               "alerts": {k: int(v) for k, v in mine["kind"].value_counts().sort_index().items()}}
        for direction in ("down", "up"):
            t = table[(table["segment"] == segment) & (table["direction"] == direction)].iloc[0]
            rest = t["c"] / max(t["c"] + t["d"], 1)
            row[direction] = {"share": t["a"] / len(members), "rest": rest, "p": float(t["p"]), "q": float(t["q"]),
                              "holds": bool(t["q"] < highlight_q)}
        if counts is not None and len(counts):
            mine_counts = counts[(counts["segment"] == segment) & (counts["kind"] != NO_ALERT)]
            for direction, kinds in (("down", ("drop", "stop", "slide")), ("up", ("surge",))):
                c = mine_counts[mine_counts["kind"].isin(kinds) & (mine_counts["outcome"] == DIRECTION_OUTCOME[direction])]
                k, n = int(c["k"].sum()), int(c["n"].sum())
                row[f"replay_{direction}"] = {"k": k, "n": n, "rate": k / n if n >= MIN_ALERTS else None}
        out.append(row)
    return pd.DataFrame(out)
