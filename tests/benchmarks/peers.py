"""General-purpose detectors run the way a careful user would run them on each account's daily
totals, at their documented defaults and one setting for every family: the peers ebbwatch is
compared with at matched false rates (``accuracy.py --peers``).

Each peer returns, per account, a down-score and an up-score (larger = more unusual in that
direction) for the last days of the series, so every detector can be cut at the same share of
quiet accounts flagged.  The libraries are the ``bench`` extra: ``pip install -e '.[bench]'``.

* ``hand``: the last 7 days' mean against the 28 before, in standard deviations of those days
  (common practice).
* ``stl``: statsmodels ``STL(period=7, robust=True)`` on log1p counts of the last 182 days; the
  last 7 days' mean residual in standard errors of the residuals before them.
* ``ets``: statsforecast ``AutoETS(season_length=7)`` fitted up to 7 days before the end; the
  last 7 days' total against the forecast total, in standard deviations read off its 95%
  prediction intervals.
* ``prophet``: ``Prophet()`` at its defaults (80% intervals), the same way.
* ``capa``: skchange ``CAPA()`` (collective anomalies, L2 saving) on log1p counts standardised
  by the median and MAD of the days before the last 91; an anomalous segment reaching the last
  week scores its mean times the square root of its length.
* ``kernelcpd``: ruptures ``KernelCPD(kernel="linear", min_size=2, jump=1)`` with a BIC penalty
  (σ̂² log n, σ̂ from first differences) on log1p counts of the last 182 days; a change in the
  last 91 days scores the shift of the last segment's mean in units of σ̂ times the square root
  of its length.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

PEERS = ("hand", "stl", "ets", "prophet", "capa", "kernelcpd")
SLOW = ("prophet",)  # scored on a sample of accounts unless told otherwise


def _hand(totals):
    from rules import hand_z

    z = hand_z(totals.astype(float))
    return -z, z


def _stl(totals):
    from statsmodels.tsa.seasonal import STL

    down, up = np.zeros(len(totals)), np.zeros(len(totals))
    for a, row in enumerate(np.log1p(totals[:, -182:].astype(float))):
        if np.all(row == row[0]):
            continue
        resid = STL(row, period=7, robust=True).fit().resid
        sd = resid[:-7].std(ddof=1)
        if sd > 0:
            z = resid[-7:].mean() / (sd / np.sqrt(7))
            down[a], up[a] = -z, z
    return down, up


def _interval_z(observed, mean, low, high, level):
    """z of the observed 7-day total against a forecast's daily means and central intervals."""
    from scipy import stats

    sd = (high - low) / (2 * stats.norm.ppf(0.5 + level / 200))
    total_sd = np.sqrt((sd**2).sum())
    return (observed.sum() - mean.sum()) / total_sd if total_sd > 0 else 0.0


def _ets(totals, start):
    from statsforecast import StatsForecast
    from statsforecast.models import AutoETS

    days = pd.date_range(start, periods=totals.shape[1], freq="D")
    frame = pd.DataFrame({"unique_id": np.repeat(np.arange(len(totals)), totals.shape[1] - 7),
                          "ds": np.tile(days[:-7], len(totals)), "y": totals[:, :-7].astype(float).ravel()})
    forecast = StatsForecast(models=[AutoETS(season_length=7)], freq="D").forecast(df=frame, h=7, level=[95])
    down, up = np.zeros(len(totals)), np.zeros(len(totals))
    for a, part in forecast.groupby("unique_id"):
        z = _interval_z(totals[int(a), -7:].astype(float), part["AutoETS"].to_numpy(),
                        part["AutoETS-lo-95"].to_numpy(), part["AutoETS-hi-95"].to_numpy(), 95)
        down[int(a)], up[int(a)] = -z, z
    return down, up


def _prophet(totals, start):
    import logging

    from prophet import Prophet

    logging.getLogger("cmdstanpy").setLevel(logging.ERROR)
    logging.getLogger("prophet").setLevel(logging.ERROR)
    days = pd.date_range(start, periods=totals.shape[1], freq="D")
    down, up = np.zeros(len(totals)), np.zeros(len(totals))
    for a, row in enumerate(totals.astype(float)):
        history = pd.DataFrame({"ds": days[-372:-7], "y": row[-372:-7]})
        model = Prophet()
        model.fit(history)
        future = model.predict(pd.DataFrame({"ds": days[-7:]}))
        z = _interval_z(row[-7:], future["yhat"].to_numpy(), future["yhat_lower"].to_numpy(),
                        future["yhat_upper"].to_numpy(), 80)
        down[a], up[a] = -z, z
    return down, up


def _capa(totals):
    from skchange.detectors import CAPA

    down, up = np.zeros(len(totals)), np.zeros(len(totals))
    for a, row in enumerate(np.log1p(totals[:, -365:].astype(float))):
        before = row[:-91]
        centre = np.median(before)
        mad = 1.4826 * np.median(np.abs(before - centre))
        if mad <= 0:
            continue
        x = ((row - centre) / mad).reshape(-1, 1)
        segments = CAPA().fit(x).predict_segment_anomalies(x)
        for first, end in np.atleast_2d(segments):
            if end >= len(row) - 7:
                score = x[first:end, 0].mean() * np.sqrt(end - first)
                down[a], up[a] = max(down[a], -score), max(up[a], score)
    return down, up


def _kernelcpd(totals):
    import ruptures as rpt

    down, up = np.zeros(len(totals)), np.zeros(len(totals))
    for a, row in enumerate(np.log1p(totals[:, -182:].astype(float))):
        diffs = np.diff(row)
        sigma = 1.4826 * np.median(np.abs(diffs - np.median(diffs))) / np.sqrt(2)
        if sigma <= 0:
            continue
        breaks = rpt.KernelCPD(kernel="linear", min_size=2, jump=1).fit(row.reshape(-1, 1)).predict(
            pen=sigma**2 * np.log(len(row)))
        if len(breaks) >= 2 and breaks[-2] >= len(row) - 91:
            cut = breaks[-2]
            previous = breaks[-3] if len(breaks) >= 3 else 0
            shift = (row[cut:].mean() - row[previous:cut].mean()) / sigma * np.sqrt(len(row) - cut)
            down[a], up[a] = -shift, shift
    return down, up


def peer_scores(name: str, fleet, sample: int = 0):
    """``((down, up), n_scored)``: dicts account -> score for the peer ``name`` on ``fleet``
    (``fleets.PlantedFleet``).  ``sample``: score only this many accounts (slow peers), spread
    over the fleet; the others get no score."""
    if name not in PEERS:
        raise ValueError(f"unknown peer {name!r}; expected one of {', '.join(PEERS)}")
    totals = fleet.counts
    rows = np.arange(len(totals))
    if sample and (name in SLOW or sample < len(totals)):
        rows = rows[:: max(1, len(totals) // sample)][:sample]
    part = totals[rows]
    if name == "ets":
        down, up = _ets(part, fleet.start)
    elif name == "prophet":
        down, up = _prophet(part, fleet.start)
    else:
        down, up = {"hand": _hand, "stl": _stl, "capa": _capa, "kernelcpd": _kernelcpd}[name](part)
    accounts = [fleet.accounts[r] for r in rows]
    return (dict(zip(accounts, np.nan_to_num(down))), dict(zip(accounts, np.nan_to_num(up)))), len(rows)
