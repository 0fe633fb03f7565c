"""The fleet's own null for a day on which its typical account moves: Efron's empirical null.

Each account's p-value is calibrated on its own history.  On most days the fleet's p-values then
sit where calibrated ones should: the median of their probits Φ⁻¹(p) is near 0.  On a day when the
typical account itself falls — people of most customers away over a summer, each in their own
weeks, a move too uneven for the daily fleet factor (a robust centre of single days) to divide
out — the median moves, and a third of quiet accounts can sit below p = 0.01 at once.  Such a day
is told by the median probit of the window tests' p-values falling below ``trigger``; where the
``[scan] read_against_fleet`` setting asks for it, each account is then read against the fleet's
own spread that day: the normal fitted to the central part of the day's probits (Efron 2004,
"Large-scale simultaneous hypothesis testing: the choice of a null hypothesis", JASA 99:96-104;
here its centre and scale by least squares on the 25th to 55th percentiles), never narrower than
the standard normal nor centred above 0, and never making a p-value smaller.

It is off by default: a fleet of which a quarter or more truly changed at once moves the median
as a season does (one of the suite's fleets, a quarter of its accounts changed, reads -0.64), and
its accounts would then be read against their own changes.  On the development family's fleets
the median stayed above -0.35 on every replayed day.

Tallies: probits are counted into ``PROBIT_EDGES`` bins, so blocks of accounts scored apart (the
backtest's, a cluster's) add their tallies and every block is judged by the same fleet.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import stats

from ..baseline._base import Estimator
from .silence import falling_p

PROBIT_LIMIT = 6.0
PROBIT_BIN = 0.02
PROBIT_EDGES = np.linspace(-PROBIT_LIMIT, PROBIT_LIMIT, int(round(2 * PROBIT_LIMIT / PROBIT_BIN)) + 1)
N_BINS = PROBIT_EDGES.size - 1


def probits(p, limit: float | None = PROBIT_LIMIT) -> np.ndarray:
    """Φ⁻¹(p) of p-values (any shape), clipped to ±``limit`` (None: only p to [1e-300, 1]); NaN
    stays NaN."""
    p = np.asarray(p, float)
    with np.errstate(invalid="ignore"):
        z = stats.norm.ppf(np.clip(p, 1e-300, 1.0))
    return z if limit is None else np.clip(z, -limit, limit)


def probit_tally(p) -> np.ndarray:
    """How many of the p-values ``p`` (n,) fall in each probit bin: int64 (``N_BINS``,); NaN left out."""
    z = probits(p)
    z = z[np.isfinite(z)]
    return np.bincount(np.clip(np.searchsorted(PROBIT_EDGES, z, side="right") - 1, 0, N_BINS - 1),
                       minlength=N_BINS).astype(np.int64)


def tally_quantiles(tally, q) -> np.ndarray:
    """Quantiles ``q`` of the probits counted in ``tally`` (``N_BINS``,), linear within a bin."""
    tally = np.asarray(tally, float)
    cumulative = np.concatenate([[0.0], np.cumsum(tally)])
    return np.interp(np.asarray(q, float) * cumulative[-1], cumulative, PROBIT_EDGES)


class FleetNull(Estimator):
    """The day's empirical null of one direction's p-values across the fleet.

    Parameters
    ----------
    trigger : float
        The day moved as a fleet where the median probit of its p-values is below this.
    quantiles : tuple of float
        The probit quantiles the normal is fitted to (centre = intercept, scale = slope against
        the normal's own quantiles).
    min_accounts : int
        Fewer judged accounts than this tell the fleet's centre too poorly: never moved.

    Attributes (after ``fit``): ``accounts_``, ``median_z_``, ``moved_`` (bool), ``shift_`` (≤ 0)
    and ``scale_`` (≥ 1; 0 and 1 where it did not move): ``transform`` makes p-values
    ``max(p, Φ((Φ⁻¹(p) - shift_) / scale_))``.
    """

    _parameters = ("trigger", "quantiles", "min_accounts")

    def __init__(self, trigger: float = -0.5, quantiles=(0.25, 0.35, 0.45, 0.55), min_accounts: int = 50):
        self.trigger = trigger
        self.quantiles = quantiles
        self.min_accounts = min_accounts

    def fit(self, tally):
        """Fit on a probit tally (``N_BINS``,) of one direction's p-values (:func:`probit_tally`)."""
        q = np.asarray(self.quantiles, float)
        if q.size < 2 or not ((q > 0) & (q < 1)).all():
            raise ValueError(f"quantiles must be two or more levels in (0, 1), got {self.quantiles!r}")
        tally = np.asarray(tally)
        if tally.shape != (N_BINS,):
            raise ValueError(f"tally must have {N_BINS} bins, got shape {tally.shape}")
        self.accounts_ = int(tally.sum())
        self.median_z_ = float(tally_quantiles(tally, [0.5])[0]) if self.accounts_ else float("nan")
        self.moved_ = bool(self.accounts_ >= self.min_accounts and self.median_z_ < self.trigger)
        self.shift_, self.scale_ = 0.0, 1.0
        if self.moved_:
            scale, shift = np.polyfit(stats.norm.ppf(q), tally_quantiles(tally, q), 1)
            self.shift_, self.scale_ = float(min(shift, 0.0)), float(max(scale, 1.0))
        return self

    def transform(self, p) -> np.ndarray:
        """The p-values ``p`` (any shape) read against the fitted null (unchanged where it did not move)."""
        self._check_fitted("moved_")
        p = np.asarray(p, float)
        if not self.moved_:
            return p
        with np.errstate(invalid="ignore"):
            moved = stats.norm.cdf((probits(p, None) - self.shift_) / self.scale_)
            return np.where(np.isfinite(p), np.maximum(p, moved), p)

    def summary(self, applied: bool) -> dict:
        """What was fitted, and whether it was ``applied``, for the scan's summary."""
        self._check_fitted("moved_")
        return {"moved": self.moved_, "applied": bool(applied and self.moved_), "median_z": round(self.median_z_, 3),
                "shift": round(self.shift_, 3), "scale": round(self.scale_, 3), "accounts": self.accounts_}


def judged_tallies(scores: pd.DataFrame) -> np.ndarray:
    """The probit tallies (2, ``N_BINS``) of the judged accounts' window-test p-values, falling
    (``p_level_low``) and rising (``p_level_high``)."""
    judged = (scores["status"] == "judged").to_numpy()
    return np.vstack([probit_tally(scores.loc[judged, column].to_numpy(float))
                      for column in ("p_level_low", "p_level_high")])


def against_fleet(scores: pd.DataFrame, tallies, *, trigger: float = -0.5,
                  apply: bool = False) -> tuple[pd.DataFrame, dict]:
    """The day's :class:`FleetNull` of each direction, fitted on ``tallies`` (2, ``N_BINS``: the
    whole fleet's, :func:`judged_tallies`); and, with ``apply`` and where the fleet moved,
    ``scores`` (``detect.SCORE_COLUMNS``) with the judged accounts' window tests read against it
    and ``p_down``/``p_up`` made from them again (a copy).  The silence test is left as it is: a
    fleet whose accounts are lower does not make one go quiet.  Returns ``(scores, {"down":
    summary, "up": summary})``."""
    nulls = {d: FleetNull(trigger=trigger).fit(t) for d, t in zip(("down", "up"), np.asarray(tallies))}
    if apply and len(scores) and any(n.moved_ for n in nulls.values()):
        scores = scores.copy()
        judged = (scores["status"] == "judged").to_numpy()
        low = nulls["down"].transform(scores.loc[judged, "p_level_low"].to_numpy(float))
        high = nulls["up"].transform(scores.loc[judged, "p_level_high"].to_numpy(float))
        scores.loc[judged, "p_level_low"], scores.loc[judged, "p_level_high"] = low, high
        scores.loc[judged, "p_down"] = falling_p(low, scores.loc[judged, "p_stop"].to_numpy(float),
                                                 scores.loc[judged, "silent_days"].to_numpy())
        scores.loc[judged, "p_up"] = high
    return scores, {d: n.summary(apply) for d, n in nulls.items()}
