"""Outcome rates (issue 23): the statistics against outside references, counting without
leakage, and a planted fleet whose rates are known."""

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from ebbwatch.outcomes import (
    NO_ALERT, band_label, benjamini_hochberg, clopper_pearson, fisher_two_sided, outcome_counts,
    pool_adjacent_violators, rate_lookup, rate_sentence, rates_table, segment_table, value_at_risk,
)


@pytest.mark.parametrize("k, n", [(0, 10), (1, 10), (9, 26), (26, 26), (3, 1000), (500, 1000)])
def test_clopper_pearson_matches_scipy_binomtest(k, n):
    # Reference: scipy.stats.binomtest(k, n).proportion_ci(method="exact") (Clopper–Pearson).
    low, high = clopper_pearson(k, n)
    ref = stats.binomtest(k, n).proportion_ci(confidence_level=0.95, method="exact")
    assert low == pytest.approx(ref.low, abs=1e-12) and high == pytest.approx(ref.high, abs=1e-12)


@pytest.mark.parametrize("table", [(8, 2, 1, 5), (0, 10, 5, 5), (3, 97, 20, 280), (1, 0, 0, 1), (12, 40, 30, 400)])
def test_fisher_matches_scipy_fisher_exact(table):
    # Reference: scipy.stats.fisher_exact(..., alternative="two-sided").
    a, b, c, d = table
    expected = stats.fisher_exact([[a, b], [c, d]], alternative="two-sided").pvalue
    assert fisher_two_sided([a], [b], [c], [d])[0] == pytest.approx(expected, rel=1e-9)


def test_pool_adjacent_violators_matches_sklearn_isotonic_regression():
    # Reference: sklearn.isotonic.IsotonicRegression (increasing) on the same weighted points.
    from sklearn.isotonic import IsotonicRegression

    rng = np.random.default_rng(3)
    for _ in range(20):
        size = int(rng.integers(2, 9))
        values, weights = rng.random(size), rng.integers(1, 50, size).astype(float)
        fitted, blocks = pool_adjacent_violators(values, weights)
        ref = IsotonicRegression(increasing=True).fit(np.arange(size), values, sample_weight=weights)
        np.testing.assert_allclose(fitted, ref.predict(np.arange(size)), atol=1e-12)
        assert blocks[0][0] == 0 and blocks[-1][1] == size - 1


def test_benjamini_hochberg_matches_statsmodels():
    # Reference: statsmodels.stats.multitest.multipletests(method="fdr_bh").
    from statsmodels.stats.multitest import multipletests

    p = np.array([0.001, 0.04, 0.03, 0.2, 0.0004, 0.9, 0.049])
    np.testing.assert_allclose(benjamini_hochberg(p), multipletests(p, method="fdr_bh")[1])


def _counts(rows):
    return pd.DataFrame(rows, columns=["segment", "kind", "band", "outcome", "k", "n"])


def test_rates_are_monotone_across_bands_and_few_alerts_show_no_rate():
    counts = _counts([("", "slide", 0, "churned", 6, 20), ("", "slide", 1, "churned", 3, 20),
                      ("", "slide", 2, "churned", 9, 15), ("", "slide", 3, "churned", 2, 4)])
    table = rates_table(counts)
    churn = table[table["outcome"] == "churned"].sort_values("band")
    # Bands 0 and 1 (6/20 then 3/20) are pooled to 9/40; bands 2 and 3 (9/15 then 2/4) to 11/19.
    assert churn["k"].tolist() == [9, 9, 11, 11] and churn["n"].tolist() == [40, 40, 19, 19]
    assert churn["bands"].tolist() == ["under 5", "under 5", "5 and over", "5 and over"]
    assert churn["rate"].is_monotonic_increasing
    low, high = clopper_pearson(9, 40)
    assert churn.iloc[0]["low"] == pytest.approx(low) and churn.iloc[0]["high"] == pytest.approx(high)
    few = rates_table(_counts([("", "drop", 1, "churned", 2, 9)]))
    assert few.iloc[0]["rate"] is None and few.iloc[0]["n"] == 9
    # An outcome in the other direction is not forced to be monotone.
    other = rates_table(_counts([("", "slide", 0, "expanded", 5, 20), ("", "slide", 1, "expanded", 1, 20)]))
    assert other["k"].tolist() == [5, 1]


def test_sentence_and_lookup():
    table = rates_table(_counts([("", "slide", 1, "churned", 9, 26)]))
    rates = rate_lookup(table)("slide", 4.2)
    assert rates["churned"]["k"] == 9 and rates["churned"]["n"] == 26
    assert rate_sentence("slide", "down", rates, 90) == (
        "In past replays, 9 of 26 slides this strong (severity 3–5) were followed by a cancellation within 90 days.")
    assert rate_lookup(table)("slide", 12.0) == {}
    few = rate_lookup(rates_table(_counts([("", "drop", 1, "churned", 2, 9)])))("drop", 4.0)
    assert rate_sentence("drop", "down", few, 90) == (
        "Past replays had only 9 drops this strong (severity 3–5): too few to tell how often a cancellation followed.")
    assert rate_sentence("drop", "down", {}, 90) is None
    assert band_label(0) == "under 3" and band_label(3) == "10 and over" and band_label(0, 3) == "any"


def test_only_replay_days_whose_horizon_has_passed_count():
    day = pd.Timestamp("2026-01-01")
    alerts = pd.DataFrame({"as_of": [day.date(), (day + pd.Timedelta(days=50)).date()], "account": ["a", "b"],
                           "direction": ["down", "down"], "kind": ["slide", "slide"], "severity": [4.0, 4.0]})
    exposure = pd.DataFrame({"as_of": [day.date(), (day + pd.Timedelta(days=50)).date()], "judged": [2, 2],
                             "sampled": [True, True]})
    outcomes = pd.DataFrame({"account": ["a", "b"], "date": [day + pd.Timedelta(days=30), day + pd.Timedelta(days=60)],
                             "outcome": ["churned", "churned"]})
    eligible = pd.DataFrame({"account": ["a", "b"], "first_day": [day.date()] * 2,
                             "last_day": [(day + pd.Timedelta(days=100)).date()] * 2})
    counts = outcome_counts(alerts, exposure, outcomes, horizon_days=90, known_until=day + pd.Timedelta(days=100),
                            eligible=eligible)
    slides = counts[(counts["kind"] == "slide") & (counts["outcome"] == "churned")]
    # b's alert (day 50) has 40 of its 90 days left: it is not counted, though it did churn.
    assert slides["n"].sum() == 1 and slides["k"].sum() == 1
    # Outcomes after a counted day's horizon change nothing.
    later = pd.concat([outcomes, pd.DataFrame({"account": ["a", "b"], "date": [day + pd.Timedelta(days=95)] * 2,
                                               "outcome": ["expanded", "contracted"]})])
    again = outcome_counts(alerts, exposure, later, horizon_days=90, known_until=day + pd.Timedelta(days=100),
                           eligible=eligible)
    pd.testing.assert_frame_equal(counts, again)


def test_value_at_risk():
    # Expected value: each account's value times its rate; the interval holds it.
    risk = value_at_risk([100.0, 50.0, 200.0], [10, 0, 5], [20, 20, 10])
    assert risk["expected"] == pytest.approx(100 * 0.5 + 0 + 200 * 0.5)
    assert risk["low"] <= risk["expected"] <= risk["high"] and risk["accounts"] == 3
    assert value_at_risk([], [], []) == {"expected": 0.0, "low": 0.0, "high": 0.0, "accounts": 0}
    # Rates known very precisely: the simulated mean approaches the expected value (law of large numbers).
    many = value_at_risk(np.full(400, 10.0), np.full(400, 3000), np.full(400, 10000), draws=2000)
    assert many["low"] < 1200 < many["high"] and abs((many["low"] + many["high"]) / 2 - 1200) < 60


def test_segment_table_highlights_only_a_difference_that_holds():
    accounts = pd.DataFrame({"account": [f"a{i}" for i in range(200)],
                             "segment": ["small"] * 100 + ["large"] * 100})
    # 30 of 100 small accounts alerted down against 2 of 100 large ones: holds; up: 3 vs 2, does not.
    down = [f"a{i}" for i in range(30)] + ["a150", "a151"]
    up = ["a40", "a41", "a42", "a160", "a161"]
    open_alerts = pd.DataFrame({"account": down + up, "direction": ["down"] * len(down) + ["up"] * len(up),
                                "kind": ["slide"] * len(down) + ["surge"] * len(up)})
    table = segment_table(accounts, open_alerts).set_index("segment")
    assert table.loc["small", "down"]["holds"] and not table.loc["small", "up"]["holds"]
    expected = stats.fisher_exact([[30, 70], [2, 98]]).pvalue  # reference: scipy.stats.fisher_exact
    assert table.loc["small", "down"]["p"] == pytest.approx(expected)
    assert table.loc["small", "alerts"] == {"slide": 30, "surge": 3}
    assert NO_ALERT == "none"
