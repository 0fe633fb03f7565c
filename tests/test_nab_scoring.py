"""NAB's scoring against the values ../shared/data/nab/SCORING.md §2 and §8 publish (skips without
the shared data, which holds the windows)."""

import json

import pytest

from .benchmarks.nab_scoring import scaled_sigmoid, score_file
from .conftest import SHARED_DATA

NAB = SHARED_DATA / "nab"


def test_scaled_sigmoid_key_values():
    # SCORING.md §2 table (nab/sweeper.py scaledSigmoid).
    for y, value in [(-1, 0.98661), (-0.5, 0.84828), (0, 0.0), (1, -0.98661)]:
        assert scaled_sigmoid(y) == pytest.approx(value, abs=1e-5)
    assert scaled_sigmoid(3.5) == -1.0


@pytest.fixture(scope="module")
def taxi():
    if not NAB.exists():
        pytest.skip("../shared/data not found")
    import pandas as pd

    frame = pd.read_csv(NAB / "data" / "realKnownCause" / "nyc_taxi.csv", parse_dates=["timestamp"])
    raw = json.loads((NAB / "labels" / "combined_windows.json").read_text())["realKnownCause/nyc_taxi.csv"]
    row = {ts: i for i, ts in enumerate(frame["timestamp"])}
    windows = [(row[pd.Timestamp(a)], row[pd.Timestamp(b)]) for a, b in raw]
    return frame, row, windows


def test_null_detector_scores_minus_five(taxi):
    frame, _, windows = taxi
    assert score_file([], windows, len(frame))["score"] == pytest.approx(-5.0)


@pytest.mark.parametrize("day, expected", [("2014-10-30", 0.994), ("2014-11-01", 0.828), ("2014-11-27", 0.797),
                                           ("2015-01-02", 0.134), ("2015-01-26", 0.865)])
def test_day_end_flag_scores_published_in_section_8(taxi, day, expected):
    import pandas as pd

    frame, row, windows = taxi
    result = score_file([row[pd.Timestamp(day + " 23:30")]], windows, len(frame))
    best = max(s for s in result["per_window"] if s is not None)
    assert best == pytest.approx(expected, abs=1e-3)


@pytest.mark.parametrize("day, cost", [("2014-11-03", -0.024), ("2014-11-29", -0.109), ("2015-01-29", -0.451)])
def test_day_end_false_positive_costs(taxi, day, cost):
    import pandas as pd

    frame, row, windows = taxi
    result = score_file([row[pd.Timestamp(day + " 23:30")]], windows, len(frame))
    assert result["false_positive_part"] == pytest.approx(cost * 0.11, abs=1e-3 * 0.11 + 1e-4)
