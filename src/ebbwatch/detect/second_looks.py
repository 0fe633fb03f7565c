"""Second looks at a tail of the long windows' tests, for the accounts whose first look already
points that way (``detect.ScanParams`` holds their settings): the falling tail judged again with
heavy days capped and the longest windows against their median week, and the rising tail of the
longest windows asked to be high against that median week too."""

from __future__ import annotations

import numpy as np

from .contrasts import BASE_WINDOW, WindowTests
from .heavy_days import cap_heavy_days


def long_windows(windows) -> tuple:
    """The windows of a week or more: those whose falling tail gets the second look."""
    return tuple(k for k in windows if k >= BASE_WINDOW)


def _columns(windows, chosen) -> list:
    """The positions in ``windows`` of the ``chosen`` window lengths."""
    return [list(windows).index(k) for k in chosen]


def _again(tests: WindowTests, accounts, values, factors, first_seen, half_event, whole_weeks_only, params,
           priors, **changed) -> WindowTests:
    """The first look's tests with the ``changed`` parameters, fitted on ``accounts`` alone
    (``values`` and ``factors`` already those accounts' rows)."""
    return WindowTests(**{**tests.get_params(), **changed}).fit(
        values, factors, first_seen[accounts], half_event[accounts], priors=priors,
        count_dispersion=params.pooled_count_dispersion or 0.0, whole_weeks_only=whole_weeks_only[accounts])


def falling_tail_second_look(tests: WindowTests, values, factors, first_seen, half_event, whole_weeks_only,
                             hist_end: int, params) -> None:
    """Replace ``tests.p_low_`` of the windows of a week or more, for the accounts whose falling
    p-value there is at most ``falling_screen_p``, by the same tests with heavy days capped
    (``heavy_days``) and the longest windows against the median week of their half-year
    (``ScanParams``).  In place."""
    columns = _columns(tests.windows_, long_windows(tests.windows_))
    accounts = np.flatnonzero(tests.p_low_[:, columns].min(axis=1) <= params.falling_screen_p)
    if not accounts.size:
        return
    factors = factors[accounts]
    second = _again(tests, accounts, cap_heavy_days(values[accounts], factors, hist_end, params.heavy_day_multiple),
                    factors, first_seen, half_event, whole_weeks_only, params,
                    tests.priors_.second_look or tests.priors_, windows=long_windows(tests.windows_),
                    median_reference_from=params.falling_median_reference_from)
    tests.p_low_[np.ix_(accounts, columns)] = second.p_low_


def rising_tail_against_median_week(tests: WindowTests, values, factors, first_seen, half_event, whole_weeks_only,
                                    params) -> None:
    """Raise ``tests.p_high_`` of the windows of ``rising_median_reference_from`` days or more to
    their p-value against the median week of the half-year, where that is larger, for the accounts
    whose rising p-value there is at most ``rising_screen_p`` (``ScanParams``).  In place."""
    start = params.rising_median_reference_from
    judged = tuple(k for k in tests.windows_ if k >= start) if start else ()
    if not judged:
        return
    columns = _columns(tests.windows_, judged)
    accounts = np.flatnonzero(tests.p_high_[:, columns].min(axis=1) <= params.rising_screen_p)
    if not accounts.size:
        return
    # The tests need the weekly window beside the judged ones (their spread leans on its own).
    again = _again(tests, accounts, values[accounts], factors[accounts], first_seen, half_event, whole_weeks_only,
                   params, tests.priors_, windows=tuple(sorted({BASE_WINDOW, *judged})), median_reference_from=start)
    again_columns = _columns(again.windows_, judged)
    rows = np.ix_(accounts, columns)
    tests.p_high_[rows] = np.maximum(tests.p_high_[rows], again.p_high_[:, again_columns])
