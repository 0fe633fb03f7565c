"""The maths checked against outside references; each check names its source."""

import numpy as np
import pytest
import ruptures as rpt
from ruptures.metrics import hausdorff, precision_recall
from scipy import stats

from ebbwatch.alerts import benjamini_hochberg
from ebbwatch.baseline import LevelDistribution, nbinom_mid_p
from ebbwatch.baseline.mixture import fit_normal, fit_two_gaussians, row_quantiles
from ebbwatch.detect.changepoint import ChangepointSearch, cusum_split
from ebbwatch.detect.trend import mann_kendall, theil_sen


def test_lognormal_tails_match_scipy_lognorm():
    """Reference: scipy.stats.lognorm with the same shape and scale."""
    rng = np.random.default_rng(1)
    sample = rng.lognormal(3.0, 0.4, size=(3, 300))
    model = LevelDistribution(model="lognormal", window=1).fit(sample)
    level = np.array([5.0, 20.0, 60.0])
    low, high = model.parametric_tails(level)
    ref = stats.lognorm(s=model.sigma_, scale=np.exp(model.mu_))
    np.testing.assert_allclose(low, ref.cdf(level + model.offset_), rtol=1e-10)
    np.testing.assert_allclose(high, ref.sf(level + model.offset_), rtol=1e-10)


def test_mixture_tails_match_a_scipy_norm_mixture():
    """Reference: the weighted sum of scipy.stats.norm CDFs at the fitted parameters."""
    rng = np.random.default_rng(2)
    sample = np.exp(np.concatenate([rng.normal(2, 0.1, 200), rng.normal(3.5, 0.1, 200)]))[None, :]
    model = LevelDistribution(model="mixture", window=1).fit(sample)
    level = np.array([np.exp(2.7)])
    low, _ = model.parametric_tails(level)
    x = np.log(level + model.offset_)[0]
    ref = sum(w * stats.norm(m, np.sqrt(v)).cdf(x) for w, m, v in
              zip(model.weights_[0], model.means_[0], model.variances_[0]))
    assert low[0] == pytest.approx(ref, rel=1e-10)
    # Between the two peaks the level sits near the lower component's weight: not a tail.
    assert 0.4 < low[0] < 0.6


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


def test_batched_em_matches_scikit_learn_gaussian_mixture():
    """Reference: sklearn.mixture.GaussianMixture (full EM, tight tolerance), account by account."""
    from sklearn.mixture import GaussianMixture

    rng = np.random.default_rng(3)
    samples = []
    for a in range(5):
        n1, n2 = 150 + 20 * a, 250 - 20 * a
        samples.append(np.concatenate([rng.normal(-1 - a * 0.3, 0.5, n1), rng.normal(2 + a * 0.2, 0.8, n2)]))
    x = np.stack(samples)
    w, m, v, _, _ = fit_two_gaussians(x, max_iter=500, tol=1e-10, var_floor=1e-6, min_weight=0.01)
    for a in range(5):
        gm = GaussianMixture(2, tol=1e-10, max_iter=1000, random_state=0, reg_covar=1e-6).fit(x[a][:, None])
        order = np.argsort(gm.means_[:, 0])
        np.testing.assert_allclose(w[a], gm.weights_[order], atol=5e-3)
        np.testing.assert_allclose(m[a], gm.means_[order, 0], atol=5e-3)
        np.testing.assert_allclose(v[a], gm.covariances_[order, 0, 0], rtol=1e-2)


def test_em_and_normal_log_likelihoods_match_scipy_norm_densities():
    """Reference: scipy.stats.norm.logpdf summed over each row's finite values, at the fitted
    parameters (one component: the ML mean and variance; two: the weighted density sum)."""
    rng = np.random.default_rng(5)
    x = np.concatenate([rng.normal(0, 1, (4, 60)), rng.normal(3, 0.5, (4, 40))], axis=1)
    x[rng.random(x.shape) < 0.15] = np.nan
    mean, var, loglik1 = fit_normal(x)
    w, m, v, loglik2, _ = fit_two_gaussians(x, max_iter=50, var_floor=1e-6, min_weight=0.01)
    for a in range(4):
        row = x[a][np.isfinite(x[a])]
        np.testing.assert_allclose(mean[a], row.mean(), rtol=1e-12)
        np.testing.assert_allclose(var[a], row.var(), rtol=1e-12)
        np.testing.assert_allclose(loglik1[a], stats.norm(row.mean(), row.std()).logpdf(row).sum(), rtol=1e-10)
        density = sum(w[a, k] * stats.norm(m[a, k], np.sqrt(v[a, k])).pdf(row) for k in range(2))
        np.testing.assert_allclose(loglik2[a], np.log(density).sum(), rtol=1e-10)


def test_row_quantiles_match_numpy_nanpercentile():
    """Reference: numpy.nanpercentile (linear interpolation), row by row; an empty row gives 0."""
    rng = np.random.default_rng(6)
    x = rng.normal(size=(6, 37))
    x[rng.random(x.shape) < 0.3] = np.nan
    x[0] = np.nan
    x[1, 1:] = np.nan
    got = row_quantiles(x, (0.0, 0.25, 0.5, 0.75, 1.0))
    assert np.all(got[0] == 0)
    for a in range(1, 6):
        np.testing.assert_allclose(got[a], np.nanpercentile(x[a], [0, 25, 50, 75, 100]), rtol=1e-12)


def test_bic_prefers_two_components_for_two_separated_groups():
    """Reference: ../shared/METHODS.md (checked with scikit-learn): on 300 N(0,1) + 300 N(8,1)
    BIC is lowest at k = 2.  One group alone prefers one component."""
    rng = np.random.default_rng(4)
    two = np.exp(np.concatenate([rng.normal(0, 1, 300), rng.normal(8, 1, 300)]))
    one = np.exp(rng.normal(0, 1, 600))
    model = LevelDistribution(model="auto", window=1, offset_share=1e-9, var_floor=1e-6).fit(np.stack([two, one]))
    assert list(model.model_) == ["mixture", "lognormal"]


@pytest.mark.parametrize("seed", range(5))
def test_changepoints_on_ruptures_pw_constant(seed):
    """Reference: ruptures.pw_constant signals and ruptures.metrics (margin 5)."""
    signal, truth = rpt.pw_constant(300, 1, 3, noise_std=1.0, seed=seed)
    found = ChangepointSearch().fit(signal.T).breakpoints_[0]
    precision, recall = precision_recall(truth, found, margin=5)
    assert (precision, recall) == (1.0, 1.0)
    assert hausdorff(truth, found) <= 5


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
    for min_size in (1, 2, 5):
        search = ChangepointSearch(penalty_factor=3.0, min_size=min_size).fit(signal)
        for row, sigma, found in zip(signal, search.sigma_, search.breakpoints_):
            expected = rpt.KernelCPD(kernel="linear", min_size=min_size, jump=1).fit(row.reshape(-1, 1)).predict(
                pen=3.0 * sigma**2 * np.log(182))
            assert found == expected


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


def test_mann_kendall_reference_values():
    """Reference: for 20 strictly increasing values S = 190, Var(S) = 20·19·45/18 = 950 and
    z = (S − 1)/√Var = 6.132 (Mann 1945 / Kendall 1975 formulas; ../shared/METHODS.md)."""
    s, var, z = mann_kendall(np.arange(20.0)[None, :])
    assert (s[0], var[0]) == (190, 950)
    assert z[0] == pytest.approx(6.132, abs=1e-3)


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
