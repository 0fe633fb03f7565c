"""The report's chart helpers: the level a card draws, and axes a person can read."""

import numpy as np
import pytest

from ebbwatch.detect.tail import trailing_levels
from ebbwatch.report.charts import account_chart, date_ticks, nice_ticks, tick_label
from ebbwatch.series import weekday_of


def test_a_weekday_rhythm_alone_draws_a_flat_level():
    # Issue 24: the band of 7-day levels was drawn against the raw days, so ordinary weekdays fell
    # outside it.  The drawn level divides each day by its weekday's factor: a pure weekday rhythm
    # around 20 a day is a flat line at 20 from the seventh day on, masked days or not.
    factors = np.array([[1.3, 1.2, 1.2, 1.1, 1.0, 0.6, 0.6]])
    days = np.arange(20_000, 20_060)
    values = 20.0 * factors[:, weekday_of(days)]
    values[0, [30, 41]] = np.nan
    level = trailing_levels(values, factors, weekday_of(days))
    assert np.isnan(level[0, :6]).all()
    np.testing.assert_allclose(level[0, 6:], 20.0)
    # Against the same days without the adjustment the line swings with the week.
    plain = trailing_levels(values, np.ones((1, 7)), weekday_of(days))
    assert np.nanmax(plain) - np.nanmin(plain) > 1.0


def test_a_drop_shows_in_the_level_within_a_week():
    factors = np.ones((1, 7))
    values = np.r_[np.full(40, 30.0), np.full(20, 10.0)][None, :]
    level = trailing_levels(values, factors, weekday_of(np.arange(60)))
    assert level[0, 39] == pytest.approx(30.0) and level[0, 46] == pytest.approx(10.0)
    assert 10.0 < level[0, 43] < 30.0


@pytest.mark.parametrize("vmax, expected", [(87.0, [0, 50, 100]), (1.3, [0, 0.5, 1, 1.5]), (1.0, [0, 0.5, 1]),
                                            (2400.0, [0, 1000, 2000, 3000]), (0.0, [0, 1])])
def test_axis_ticks_are_round_numbers_covering_the_data(vmax, expected):
    assert nice_ticks(vmax) == pytest.approx(expected)
    assert nice_ticks(vmax)[-1] >= vmax


def test_tick_labels_read_as_written():
    assert [tick_label(v) for v in (0, 2.5, 40, 1200, 25_000)] == ["0", "2.5", "40", "1.2k", "25k"]


def test_date_ticks_fall_on_month_starts_inside_the_chart():
    days = [str(np.datetime64("2026-08-03") + i) for i in range(120)]
    ticks = date_ticks(days)
    assert [days[i] for i in ticks] == ["2026-09-01", "2026-10-01", "2026-11-01"]
    short = [str(np.datetime64("2026-08-03") + i) for i in range(20)]
    assert len(date_ticks(short)) == 4 and 0 not in date_ticks(short) and 19 not in date_ticks(short)


def test_account_chart_draws_every_part_it_is_given():
    days = [str(np.datetime64("2026-08-03") + i) for i in range(120)]
    raw = [10.0] * 60 + [None] + [4.0] * 59
    level = [None] * 6 + [10.0] * 54 + [None] + [4.0] * 59
    svg = account_chart(days, raw, level, band=(9.0, 11.0), onset_index=60, masked=[60],
                        segments=[(0, 59, 10.0), (61, 119, 4.0)])
    for part in ('class="band"', 'class="judged"', 'class="raw"', 'class="level"', 'class="onset"',
                 'class="onset-label"', 'class="masked"', 'class="tick x"', 'class="tick y"'):
        assert part in svg, part
    assert svg.count('class="segment"') == 2
    assert ">Sep 1<" in svg and ">10<" in svg
