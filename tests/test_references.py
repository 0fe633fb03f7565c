"""The maths checked against outside references; each check names its source."""

import numpy as np
import pytest
import ruptures as rpt
from ruptures.metrics import hausdorff, precision_recall
from scipy import stats

from ebbwatch.alerts import benjamini_hochberg
from ebbwatch.baseline import nbinom_mid_p
from ebbwatch.detect.calibrate import cauchy_combination, history_tail_p, nested_min_p
from ebbwatch.detect.changepoint import ChangepointSearch, cusum_split
from ebbwatch.detect.trend import _single_regressor_sse, mann_kendall, step_or_ramp, theil_sen


def test_negative_binomial_mid_p_against_scipy_nbinom():
    """Reference: scipy.stats.nbinom(n=2, p=2/12) has mean 10, variance 60 and P(0) = 1/36
    (../shared/METHODS.md, verified there); our parametrisation is mean 10, dispersion 1/2."""
    ref = stats.nbinom(2, 2 / 12)
    assert ref.mean() == pytest.approx(10) and ref.var() == pytest.approx(60)
    low, high = nbinom_mid_p(np.array([0.0, 10.0]), np.array([10.0, 10.0]), np.array([0.5, 0.5]))
    assert low[0] == pytest.approx(0.5 / 36)
    assert low[1] == pytest.approx(ref.cdf(9) + 0.5 * ref.pmf(10))
    assert high[1] == pytest.approx(ref.sf(10) + 0.5 * ref.pmf(10))
    # Dispersion 0 is Poisson (scipy.stats.poisson).
    low, _ = nbinom_mid_p(np.array([3.0]), np.array([7.0]), np.array([0.0]))
    assert low[0] == pytest.approx(stats.poisson(7).cdf(2) + 0.5 * stats.poisson(7).pmf(3))


def test_history_tail_p_is_the_t_tail_or_the_conformal_rank():
    """References: scipy.stats.t for the tail (no history, and beyond the empirical anchor it is
    never lighter than the t); the conformal p-value (r + 1) / (n + 1) of Vovk, Gammerman &
    Shafer (2005) in the bulk."""
    rng = np.random.default_rng(8)
    z = np.array([-1.0, -3.0, -6.0])
    empty = np.full((3, 0), np.nan)
    np.testing.assert_allclose(history_tail_p(z, empty, 7.0, 5), stats.t.cdf(z, 7.0), rtol=1e-12)
    history = rng.standard_normal((3, 400))
    p = history_tail_p(z, history, 30.0, 5)
    assert p[0] == pytest.approx(((history[0] <= -1.0).sum() + 1) / 401)
    assert p[2] >= stats.t.cdf(-6.0, 30.0) and p[2] < 1e-5  # far outside: says how far
    assert history_tail_p(-z, -history, 30.0, 5, lower=False)[0] == pytest.approx(p[0])


def test_history_tail_p_is_uniform_on_exchangeable_draws():
    """Reference: the uniform distribution.  A draw exchangeable with its history of 300 falls
    below alpha with probability alpha, within binomial error: in the conformal bulk (alpha >=
    5/301) whatever the distribution, here Student-t with 3 degrees of freedom; beyond the
    anchor, where the t tail carries on, for data whose tail the t matches (normal draws)."""
    rng = np.random.default_rng(9)
    heavy = rng.standard_t(3, size=(20_000, 301))
    p = history_tail_p(heavy[:, 0], heavy[:, 1:], 30.0, 5)
    for alpha in (0.05, 0.1, 0.2):
        se = np.sqrt(alpha * (1 - alpha) / len(p))
        assert abs(np.mean(p < alpha) - alpha) < 4 * se, alpha
    normal = rng.standard_normal((40_000, 301))
    p = history_tail_p(normal[:, 0], normal[:, 1:], 50.0, 5, independent=True)
    for alpha in (0.001, 0.01, 0.05):
        se = np.sqrt(alpha * (1 - alpha) / len(p))
        assert abs(np.mean(p < alpha) - alpha) < 4 * se, alpha


def test_cauchy_combination_against_scipy_cauchy():
    """Reference: Liu & Xie (2020): the combined p is scipy.stats.cauchy's survival function at
    the weighted mean of tan((0.5 - p) pi); one test, or equal p-values, give that p back."""
    p = np.array([[0.01, 0.2, 0.5], [0.03, 0.2, 0.9]])
    expected = stats.cauchy.sf(np.tan((0.5 - p) * np.pi).mean(axis=0))
    np.testing.assert_allclose(cauchy_combination(p), expected, rtol=1e-10)
    np.testing.assert_allclose(cauchy_combination(p[:1]), p[0], rtol=1e-10)


def test_nested_window_multiplicity_against_scipy_multivariate_normal():
    """Reference: scipy.stats.multivariate_normal (Genz's integration) for the chance that the
    smallest of the windows' z falls below -2, with the covariance of nested means of
    independent days beside a shared reference: Cov(z_j, z_k) = (1/max(j, k) + 1/R) /
    sqrt((1/j + 1/R)(1/k + 1/R)).  A single window needs no correction."""
    from ebbwatch.detect.calibrate import nested_window_multiplicity

    windows, reference = (1, 2, 3, 5, 7, 14, 28), 182
    k = np.array(windows, float)
    var = 1 / k + 1 / reference
    cov = (1 / np.maximum.outer(k, k) + 1 / reference) / np.sqrt(np.outer(var, var))
    exact = 1 - stats.multivariate_normal(mean=np.zeros(7), cov=cov, abseps=1e-6, releps=1e-6).cdf(np.full(7, 2.0))
    grid, factor = nested_window_multiplicity(windows, reference)
    got = np.interp(-2.0, grid, factor) * stats.norm.cdf(-2.0)
    assert got == pytest.approx(exact, rel=0.05)
    assert 1.0 < np.interp(-3.0, grid, factor) < len(windows)  # well under Bonferroni's
    single = nested_min_p(np.array([[1e-3, 0.02]]), (7,), reference)
    np.testing.assert_allclose(single, [1e-3, 0.02], rtol=0.05)


def test_changepoints_on_ruptures_pw_constant():
    """Reference: ruptures.pw_constant signals (300 samples, 3 changes, noise 1) and
    ruptures.metrics (margin 5).  The penalty is set by the series' whole spread, so the search
    is conservative: no change it reports is a false one, and it finds most of them; a steady
    staircase of equal steps can read as a trend and go unreported (2 of the 10 signals)."""
    recalls = []
    for seed in range(10):
        signal, truth = rpt.pw_constant(300, 1, 3, noise_std=1.0, seed=seed)
        found = ChangepointSearch().fit(signal.T).breakpoints_[0]
        assert all(min(abs(b - t) for t in truth[:-1]) <= 5 for b in found[:-1]), (seed, found, truth)
        recalls.append(precision_recall(truth, found, margin=5)[1] if len(found) > 1 else 0.0)
        if len(found) > 1:
            assert hausdorff(truth, found) <= 5 or len(found) < len(truth)
    assert np.mean(recalls) >= 0.6


@pytest.mark.parametrize("route", ["ctypes", "cython"])
def test_changepoint_search_matches_ruptures_public_api(route, monkeypatch):
    """Reference: ruptures' public ``KernelCPD(kernel="linear").fit(x).predict(pen=...)`` on
    noisy steps, ramps, flat rows, sparse counts and several minimum sizes, which both direct
    routes to its C core (through ctypes, without the GIL, and through its Cython wrapper) must
    match exactly."""
    from ebbwatch.detect import changepoint

    if route == "ctypes":
        assert changepoint._ctypes_pelt_l2() is not None  # ruptures 1.1 exports the C function
    else:
        monkeypatch.setattr(changepoint, "_ctypes_pelt_l2", lambda: None)
    monkeypatch.setattr(changepoint, "_SEARCH_ROWS", None)
    rng = np.random.default_rng(11)
    rows = [rpt.pw_constant(182, 1, k, noise_std=s, seed=seed)[0][:, 0]
            for seed, (k, s) in enumerate([(0, 1.0), (1, 0.5), (2, 2.0), (3, 1.0), (1, 0.1)])]
    rows += [np.linspace(0, 3, 182) + rng.normal(0, 0.3, 182), np.zeros(182), rng.normal(0, 1, 182)]
    rows += [np.log(rng.poisson(lam, 182) + 0.1) for lam in (0.05, 0.3, 2.0, 20.0)]  # sparse to busy
    signal = np.array(rows)
    penalties = 3.0 * signal.std(axis=1) ** 2 * np.log(182) + 1e-6
    for min_size in (1, 2, 5):
        routed = changepoint.pelt_l2_rows(signal, penalties, min_size)
        for row, penalty, found in zip(signal, penalties, routed):
            expected = rpt.KernelCPD(kernel="linear", min_size=min_size, jump=1).fit(row.reshape(-1, 1)).predict(
                pen=penalty)
            assert found == expected


def test_trend_breaks_are_dropped_and_steps_kept():
    """A straight line cut into a staircase is one segment; a step is kept (the BIC comparison of
    Schwarz 1978, checked against numpy.polyfit's residuals for the line)."""
    from ebbwatch.detect.changepoint import _segment_sums, _step_and_line_sse, drop_trend_breaks

    rng = np.random.default_rng(3)
    line = np.linspace(0, 10, 200) + rng.normal(0, 0.2, 200)
    assert drop_trend_breaks(line, [50, 100, 150, 200]) == [200]
    step = np.r_[np.zeros(100), np.full(100, 5.0)] + rng.normal(0, 0.2, 200)
    assert drop_trend_breaks(step, [100, 200]) == [100, 200]
    _, sse_line = _step_and_line_sse(_segment_sums(line), 20, 90, 170)
    residual = line[20:170] - np.polyval(np.polyfit(np.arange(20, 170), line[20:170], 1), np.arange(20, 170))
    assert sse_line == pytest.approx((residual**2).sum(), rel=1e-8)


def test_nile_change_after_1898():
    """Reference: statsmodels.datasets.nile; Cobb (1978) places the change near 1898, the new
    level starting in 1899 (index 28)."""
    from statsmodels.datasets import nile

    data = nile.load_pandas().data
    found = ChangepointSearch().fit(data["volume"].to_numpy()[None, :]).breakpoints_[0]
    assert len(found) == 2  # one change, then the end
    assert int(data["year"].iloc[found[0]]) == 1899


def test_cusum_split_finds_a_step():
    rng = np.random.default_rng(5)
    y = np.concatenate([rng.normal(0, 1, 80), rng.normal(-3, 1, 20)])[None, :]
    k, stat = cusum_split(y, 1, 98, np.array([1.0]))
    assert abs(k[0] - 80) <= 2 and stat[0] < -8


def test_cusum_split_from_a_rows_own_start_is_the_split_of_its_own_columns():
    """A young row (data from column 30, the columns before it filled with its first value)
    gets the statistic and split of its own columns searched alone."""
    rng = np.random.default_rng(2)
    own = np.concatenate([rng.normal(0, 1, 50), rng.normal(-2, 1, 20)])
    row = np.concatenate([np.full(30, own[0]), own])[None, :]
    k, stat = cusum_split(row, 40, 98, np.array([1.0]), starts=np.array([30]))
    k_own, stat_own = cusum_split(own[None, :], 10, 68, np.array([1.0]))
    assert k[0] == k_own[0] + 30 and np.isclose(stat[0], stat_own[0])


def test_mann_kendall_reference_values():
    """Reference: for 20 strictly increasing values S = 190, Var(S) = 20·19·45/18 = 950 and
    z = (S − 1)/√Var = 6.132 (Mann 1945 / Kendall 1975 formulas; ../shared/METHODS.md)."""
    s, var, z = mann_kendall(np.arange(20.0)[None, :])
    assert (s[0], var[0]) == (190, 950)
    assert z[0] == pytest.approx(6.132, abs=1e-3)


def test_mann_kendall_tie_correction_matches_scipy_kendalltau():
    """Reference: scipy.stats.kendalltau against time (asymptotic method), whose variance of S
    carries the same tie correction, Σ t(t−1)(2t+5)/18, when only the values have ties: the
    two-sided p-value of S / √Var(S) agrees, rows with many ties and none, lengths 6 to 13."""
    rng = np.random.default_rng(3)
    for n in (6, 12, 13):
        y = rng.integers(0, 4, (40, n)).astype(float)  # few distinct values: tie groups of every size
        y[:5] = rng.normal(size=(5, n))  # no ties
        y[5] = 2.0  # all tied: no information
        s, var, _ = mann_kendall(y)
        assert var[5] == 0
        for row in [r for r in range(40) if r != 5]:
            ref = stats.kendalltau(np.arange(n), y[row], method="asymptotic")
            assert 2 * stats.norm.sf(abs(s[row]) / np.sqrt(var[row])) == pytest.approx(ref.pvalue, rel=1e-9, abs=1e-12)


def test_weeks_of_equal_activity_are_ties_for_the_trend_test():
    """The scan's weekly levels (``detect.tail.weekly_levels``) of a small account's integer
    counts are the weeks' exact ratios, so two weeks of equal activity are a tie for
    Mann–Kendall, as scipy.stats.kendalltau (the reference above) counts them.  Running sums'
    differences carried rounding that broke such ties at random (until 2026-12-05: on the scan
    benchmark's 100k accounts p_trend moved by more than 0.01 on 13,763 of them)."""
    from ebbwatch.detect.tail import weekly_levels

    rng = np.random.default_rng(5)
    counts = rng.integers(0, 3, (200, 12 * 7)).astype(float)  # 0-2 events a day: many equal weeks
    factors = np.tile(np.array([1.2, 1.2, 1.1, 1.1, 1.0, 0.7, 0.7]), (200, 12))
    weekly = weekly_levels(counts, factors)
    exact = counts.reshape(200, 12, 7).sum(axis=2) / factors[:, :7].sum(axis=1, keepdims=True)
    assert np.array_equal(weekly == weekly[:, :1], exact == exact[:, :1])  # the same weeks tie
    s, var, _ = mann_kendall(weekly)
    for row in range(0, 200, 20):
        ref = stats.kendalltau(np.arange(12), exact[row], method="asymptotic")
        assert 2 * stats.norm.sf(abs(s[row]) / np.sqrt(var[row])) == pytest.approx(ref.pvalue, rel=1e-9, abs=1e-12)


def test_theil_sen_matches_scipy_theilslopes():
    """Reference: scipy.stats.theilslopes (Sen 1968)."""
    rng = np.random.default_rng(6)
    y = rng.normal(size=(4, 12)).cumsum(axis=1)
    slope, intercept = theil_sen(y)
    for row in range(4):
        ref = stats.theilslopes(y[row], np.arange(12), method="joint")  # intercept = median(y − b·x)
        assert slope[row] == pytest.approx(ref.slope)
        assert intercept[row] == pytest.approx(ref.intercept)


def test_benjamini_hochberg_over_part_of_the_family():
    """Reference: scipy.stats.false_discovery_control on the whole family.  Given only the
    p-values at or below 0.05 and the family's size, every q-value at or below 0.05 is the same."""
    rng = np.random.default_rng(4)
    p = np.concatenate([rng.uniform(0, 1e-3, 30), rng.uniform(0, 1, 970)])
    whole = stats.false_discovery_control(p, method="bh")
    assert np.allclose(benjamini_hochberg(p, family_size=p.size), whole, rtol=1e-12, atol=0)
    small = p <= 0.05
    part = benjamini_hochberg(p[small], family_size=p.size)
    passing = whole[small] <= 0.05
    assert passing.sum() >= 20
    assert np.allclose(part[passing], whole[small][passing], rtol=1e-12, atol=0)
    assert ((part <= 0.05) == passing).all()
    with pytest.raises(ValueError):
        benjamini_hochberg(p, family_size=10)


def test_benjamini_hochberg_published_example():
    """Reference: Benjamini & Hochberg (1995)'s 15 p-values, as in the docstring of
    scipy.stats.false_discovery_control: BH rejects 4 at q = 0.05, Bonferroni 3."""
    p = np.array([0.0001, 0.0004, 0.0019, 0.0095, 0.0201, 0.0278, 0.0298, 0.0344, 0.0459,
                  0.3240, 0.4262, 0.5719, 0.6528, 0.7590, 1.000])
    assert (benjamini_hochberg(p) <= 0.05).sum() == 4
    assert (p * p.size <= 0.05).sum() == 3


def test_pooled_dispersion_recovers_a_negative_binomial():
    """Reference: scipy.stats.nbinom.  Daily counts NB(size r) summed over 7 days are NB(size 7r),
    whose dispersion (var = mean + d·mean²) is 1 / (7r); Poisson counts have dispersion 0."""
    from ebbwatch.baseline.counts import pooled_dispersion

    rng = np.random.default_rng(3)
    r, mean = 0.5, 2.0
    daily = stats.nbinom.rvs(r, r / (r + mean), size=(400, 200), random_state=rng).astype(float)
    assert pooled_dispersion(daily) == pytest.approx(1 / (7 * r), rel=0.15)
    poisson = stats.poisson.rvs(2.0, size=(400, 200), random_state=rng).astype(float)
    assert pooled_dispersion(poisson) == pytest.approx(0.0, abs=0.01)
    big = stats.poisson.rvs(50.0, size=(40, 200), random_state=rng).astype(float)
    assert pooled_dispersion(big) == 0.0  # no low-volume account in the sample


def test_regression_sse_over_each_rows_own_columns_against_numpy_lstsq():
    """Reference: numpy's least squares (``np.linalg.lstsq``) of y on [1, x] over the columns from
    each row's first one: rows that start later are fitted on their own columns only."""
    rng = np.random.default_rng(4)
    y = rng.normal(size=(3, 40))
    x = np.vstack([np.arange(40.0), (np.arange(40) >= 25).astype(float)])
    first = np.array([0, 10, 30])
    got = _single_regressor_sse(y, x, first)
    for a in range(3):
        for k in range(2):
            cols = slice(first[a], None)
            design = np.column_stack([np.ones(40 - first[a]), x[k, cols]])
            coef, *_ = np.linalg.lstsq(design, y[a, cols], rcond=None)  # rank 1 where x is constant there
            assert np.isclose(got[a, k], ((y[a, cols] - design @ coef) ** 2).sum()), (a, k)


def test_a_young_rows_filled_prehistory_does_not_move_its_ramp():
    """Planted: 60 days flat at 0, then a ramp down by 1 over the last 28 days; before them, 120
    filled columns at the first day's value (+0.8, as ``fill_gaps`` leaves a young account).  Told
    where the row starts, the ramp starts within a week of day 32 (untold, the filled columns
    pull it to the earliest start allowed)."""
    rng = np.random.default_rng(9)
    life = np.where(np.arange(60) < 32, 0.0, -(np.arange(60) - 31) / 28.0) + rng.normal(0, 0.1, 60)
    life[0] = 0.8
    y = np.concatenate([np.full(120, life[0]), life])[None, :]
    earliest = np.array([127])
    _, _, start = step_or_ramp(y, earliest, starts=np.array([120]))
    assert abs(int(start[0]) - (120 + 32)) <= 7, start
    _, _, untold = step_or_ramp(y, earliest)
    assert untold[0] == 127
